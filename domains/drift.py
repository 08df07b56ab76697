"""Lawler–Fujita drift correction: measure a lattice's slowly varying displacement from its Bragg-peak phases and undo it.

The topograph of a lattice distorted by piezo drift and creep is modelled as
T(r) = sum_j cos(Q_j . (r + u(r))), with Q_j the ideal Bragg vectors and u(r)
slowly varying [1]_. The spatial lock-in at Q_j gives theta_j(r) = Q_j . u(r)
(modulo 2 pi); u follows by least squares over the peaks, and the image is
resampled as T'(r) = T(r - u(r)). The same u straightens every channel and
bias of the same scan.

Two grids. The lock-in phases are band-limited to about 1/sigma, so they are
measured, unwrapped and solved on a decimated grid (every s-th row and column,
s <= 0.6 sigma from :func:`domains.lossless_step`, where the decimated lock-in
equals the full-resolution one exactly). A not-a-knot cubic spline through
those samples gives u at every pixel, block of rows by block of rows, when the
image is resampled; the full-resolution field is never needed at once (see
:func:`correct_drift` for the error bound and :func:`straighten_rows` for one
block).

Sign convention: ``u`` here is the shift of the *sampling point*, T(r) = f(r + u).
Geometric phase analysis [2]_ describes the same distortion by the shift of the
*atoms*, I(r) = f(r - u_GPA), so u = -u_GPA.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np
from scipy import ndimage
from scipy.interpolate import BSpline, NdBSpline
from scipy.linalg import solve_banded
from skimage.restoration import unwrap_phase

from ._errors import InputError
from ._lockin import _as_q_array, _trusted, _trusted_halo, _trusted_rows, lockin, lossless_step
from ._scan import Scan, _is_dask, pixel_size_pair

__all__ = ["DriftResult", "apply_displacement", "correct_channels", "correct_drift", "displacement_field",
           "straighten_rows"]

TRANSLATIONS = ("remove", "lattice")

#: Three Bragg vectors whose signed sum is shorter than this fraction of the
#: shortest one are taken as a closed triple (hexagonal), for the phase-sum check.
_CLOSURE_FRACTION = 0.25

#: Relative Gaussian tail allowed to alias on the decimated grid (``lossless_step``): the step is
#: then s <= pi sigma / 5.26 = 0.6 sigma.
_STEP_TOLERANCE = 1e-6

#: The decimated grid keeps at least this many samples along each axis (for the cubic spline and
#: the unwrapping), whatever sigma is.
_MIN_SAMPLES = 16

#: Source rows read beyond the spline support on each side of a block, so that the cubic-spline
#: prefilter, a recursive filter with pole z = sqrt(3) - 2 (Unser 1999), forgets where the block
#: was cut: |z|^24 = 2e-14 of the coefficients, far below float32 (and at float64 rounding).
_PREFILTER_ROWS = 24

#: Output pixels resampled per block of rows: the temporaries are a few float64 copies of a block.
_BLOCK_PIXELS = 1 << 18

#: Edge pixels padded before the spline prefilter in mode "nearest", as scipy.ndimage does.
_EDGE_PAD = 12

def _wrap(phi):
    """Wrap angles to [-pi, pi)."""
    return (np.asarray(phi) + np.pi) % (2 * np.pi) - np.pi


def _check_bragg(bragg_q) -> np.ndarray:
    try:
        q, _ = _as_q_array(bragg_q)
    except InputError as err:
        raise InputError(f"bragg_q: {err}") from None
    except (TypeError, ValueError):
        raise InputError(f"bragg_q must be an array of shape (k, 2) in rad/nm, got {bragg_q!r}") from None
    if len(q) < 2:
        raise InputError(f"bragg_q needs at least two non-collinear Bragg vectors (shape (k, 2)), got shape {q.shape}")
    # Two collinear vectors leave the displacement along their normal undetermined.
    singular = np.linalg.svd(q, compute_uv=False)
    if singular[-1] <= 1e-6 * singular[0]:
        raise InputError(f"bragg_q must hold two non-collinear wavevectors, got {q.tolist()}")
    return q


def _check_translation(translation):
    if translation not in TRANSLATIONS:
        raise InputError(f"translation must be one of {TRANSLATIONS}, got {translation!r}")


def _check_image(image, name="image") -> np.ndarray:
    image = np.asarray(image)
    if image.ndim != 2 or min(image.shape) < 2:
        raise InputError(f"{name} must be a 2-D image (row, col), got shape {image.shape}")
    if image.dtype.kind not in "biuf":
        raise InputError(f"{name} must hold real numbers, got dtype {image.dtype}")
    return image


def _closure_signs(q):
    """Signs c (each +-1) with sum_j c_j Q_j ~ 0 for three Bragg vectors, else None."""
    if len(q) != 3:
        return None
    best, best_norm = None, np.inf
    for signs in ((1, 1, 1), (1, 1, -1), (1, -1, 1), (-1, 1, 1)):
        norm = float(np.hypot(*(np.asarray(signs, float) @ q)))
        if norm < best_norm:
            best, best_norm = np.asarray(signs, float), norm
    if best_norm < _CLOSURE_FRACTION * np.hypot(*q.T).min():
        return best
    return None


def _solve(theta, q):
    """Per-pixel least squares u = (M^T M)^-1 M^T theta, rows of M the Q_j (Lawler et al. 2010)."""
    return np.einsum("ik,k...->i...", np.linalg.pinv(q), theta)


def _unwrap(theta, valid):
    """Unwrap one phase map over the valid pixels (NaN elsewhere)."""
    if not valid.any():
        return np.full(theta.shape, np.nan)
    masked = np.ma.masked_array(np.where(valid, theta, 0.0), mask=~valid)
    return np.ma.filled(unwrap_phase(masked), np.nan)


def _target_phases(q, theta_mean, translation):
    """The Bragg phases the corrected image should have, and the phase-sum (motif) term.

    For a closed triple the sum sum_j c_j theta_j does not change under any
    displacement; it belongs to the lattice's motif. "lattice" aims every
    component at a third of that sum (zero for a plain sum of cosines); "remove"
    keeps the mean phases of the input, so the lattice does not move as a whole.
    """
    if translation == "remove":
        return _wrap(theta_mean)
    signs = _closure_signs(q)
    if signs is None:
        return np.zeros(len(q))
    motif = float(_wrap(signs @ theta_mean))
    return signs * motif / 3


def _lattice_translation(q, theta_mean, target):
    """Rigid shift t with Q_j . t = theta_mean_j - target_j (mod 2 pi), the smallest of the equivalent ones."""
    pair = None
    for i in range(len(q)):
        for j in range(i + 1, len(q)):
            det = abs(q[i, 0] * q[j, 1] - q[i, 1] * q[j, 0])
            if pair is None or det > pair[0]:
                pair = (det, i, j)
    _, i, j = pair
    sub = q[[i, j]]
    t0 = np.linalg.solve(sub, _wrap(theta_mean[[i, j]] - target[[i, j]]))
    # Lattice vectors a_m with Q_i . a_m = 2 pi delta_im: any t0 + n1 a1 + n2 a2 fits the pair.
    lattice = 2 * np.pi * np.linalg.inv(sub)
    best_key, best_t = None, t0
    for n1 in range(-2, 3):
        for n2 in range(-2, 3):
            t = t0 + lattice @ np.array([n1, n2])
            cost = float(np.sum(1 - np.cos(theta_mean - target - q @ t)))
            key = (round(cost, 6), float(np.hypot(*t)))
            if best_key is None or key < best_key:
                best_key, best_t = key, t
    return best_t


def _phase_sum(theta, q, trusted):
    """Circular mean and RMS spread of the wrapped phase sum of a closed triple over the trusted region."""
    signs = _closure_signs(q)
    if signs is None or not trusted.any():
        return None, None
    total = np.einsum("k,k...->...", signs, theta)[trusted]
    total = total[np.isfinite(total)]
    if total.size == 0:
        return None, None
    mean = float(np.angle(np.mean(np.exp(1j * total))))
    rms = float(np.sqrt(np.mean(_wrap(total - mean) ** 2)))
    return mean, rms


# --------------------------------------------------------------------------- the decimated grid


def _decimation_step(sigma_nm, pixel_size, shape):
    """Step of the decimated grid: lossless for the lock-in (s <= 0.6 sigma), and >= 16 samples per axis."""
    step = lossless_step(sigma_nm, pixel_size, tolerance=_STEP_TOLERANCE)
    return max(1, min(step, min(shape) // _MIN_SAMPLES))


def _band_storage(matrix):
    """((lower, upper), bands) of a square sparse banded matrix, as :func:`scipy.linalg.solve_banded` takes it."""
    coo = matrix.tocoo()
    rows, cols = coo.row.astype(np.int64), coo.col.astype(np.int64)
    lower, upper = int(max(0, np.max(rows - cols))), int(max(0, np.max(cols - rows)))
    bands = np.zeros((lower + upper + 1, matrix.shape[0]))
    bands[upper + rows - cols, cols] = coo.data  # LAPACK band storage: ab[u + i - j, j] = a[i, j]
    return (lower, upper), bands


class _SplineAxis:
    """The not-a-knot cubic spline through samples at pixels 0, s, 2s, ... of one axis.

    ``basis`` (pixels x samples, sparse, four entries a row) evaluates the B-spline
    coefficients at every pixel; the pixels after the last sample (fewer than s)
    are extrapolated by the last cubic piece.
    """

    def __init__(self, n, step):
        self.n, self.step = n, step
        self.count = -(-n // step)
        x = step * np.arange(self.count, dtype=float)
        self.k = 3 if self.count >= 4 else 1
        m = (self.k - 1) // 2
        # Not-a-knot (de Boor 1978): the knots are the samples less the first and last m + 1 inner ones.
        self.knots = np.r_[[x[0]] * (self.k + 1), x[m + 1 : self.count - m - 1], [x[-1]] * (self.k + 1)]
        collocation = BSpline.design_matrix(x, self.knots, self.k)
        # The collocation matrix is banded (k + 1 entries a row); keep it in LAPACK band storage, and its transpose.
        self._bands = {"N": _band_storage(collocation), "T": _band_storage(collocation.T)}
        self.basis = BSpline.design_matrix(np.arange(n, dtype=float), self.knots, self.k, extrapolate=True).tocsr()
        self.basis_t = self.basis.T.tocsr()
        self.basis32 = self.basis.astype(np.float32)

    def solve(self, values, axis, trans="N"):
        """Coefficients from samples along ``axis`` (trans="T": the transposed system)."""
        moved = np.moveaxis(np.asarray(values, dtype=float), axis, 0)
        flat = moved.reshape(self.count, -1)
        (lower, upper), bands = self._bands[trans]
        solved = solve_banded((lower, upper), bands, flat, check_finite=False)
        return np.moveaxis(solved.reshape(moved.shape), 0, axis)

    def nearest(self, first, stop):
        """Index of the nearest sample of each pixel first ... stop - 1."""
        return np.minimum(np.rint(np.arange(first, stop) / self.step).astype(int), self.count - 1)


class _Grid:
    """The decimated grid of a frame (rows and columns 0, s, 2s, ...) and its tensor-product cubic spline."""

    def __init__(self, shape, step):
        self.shape, self.step = tuple(int(n) for n in shape), int(step)
        self.axes = (_SplineAxis(self.shape[0], self.step), _SplineAxis(self.shape[1], self.step))
        self.coarse_shape = (self.axes[0].count, self.axes[1].count)

    def sample(self, fine):
        """The pixels of a full-resolution array that lie on the grid."""
        return fine[..., :: self.step, :: self.step]

    def coefficients(self, values, out=None):
        """B-spline coefficients (..., rows, cols) of real samples (..., rows, cols).

        One plane at a time, so the temporaries are a plane's (the banded solver treats each
        right-hand side on its own: the same numbers as all planes at once). ``out`` may be
        ``values`` itself (float64): the coefficients then replace the samples.
        """
        values = np.asarray(values, dtype=float)
        out = np.empty(values.shape) if out is None else out
        planes_in = values.reshape((-1,) + values.shape[-2:])
        planes_out = out.reshape(planes_in.shape)
        for v, c in zip(planes_in, planes_out):
            c[...] = self.axes[1].solve(self.axes[0].solve(v, -2), -1)
        return out

    def rows(self, coef, first, stop, dtype=np.float64):
        """The spline at every pixel of rows first ... stop - 1: shape (..., stop - first, cols).

        float32 halves the work where its precision (1e-7 of the values) is enough.
        """
        return self.outer(coef, slice(first, stop), slice(None), dtype)

    def outer(self, coef, rows, cols, dtype=np.float64):
        """The spline at the pixels rows x cols (each a slice or an index array): (..., len(rows), len(cols)).

        The same sums as :meth:`rows` (a pixel's value does not depend on which others are asked for).
        """
        single = np.dtype(dtype) == np.float32
        axis_y, axis_x = self.axes
        by = (axis_y.basis32 if single else axis_y.basis)[rows]
        bx = axis_x.basis32 if single else axis_x.basis
        if not (isinstance(cols, slice) and cols == slice(None)):
            bx = bx[cols]
        flat = coef.reshape((-1,) + coef.shape[-2:]).astype(dtype, copy=False)
        out = np.empty((len(flat), by.shape[0], bx.shape[0]), dtype=dtype)
        for i, c in enumerate(flat):
            out[i] = (bx @ (by @ c).T).T
        return out.reshape(coef.shape[:-2] + out.shape[1:])

    def at(self, coef, rows_px, cols_px):
        """The spline at arbitrary points (pixel coordinates), for every leading component of ``coef``."""
        points = np.stack([rows_px, cols_px], axis=-1)
        knots = (self.axes[0].knots, self.axes[1].knots)
        degree = (self.axes[0].k, self.axes[1].k)
        return np.stack([NdBSpline(knots, c, degree, extrapolate=True)(points) for c in coef])

    def nearest_invalid(self, invalid, first, stop, col_first=0, col_stop=None):
        """Pixels of rows first ... stop - 1 (columns col_first ... col_stop - 1) whose nearest grid
        sample is flagged in ``invalid``."""
        col_stop = self.shape[1] if col_stop is None else col_stop
        return invalid[np.ix_(self.axes[0].nearest(first, stop), self.axes[1].nearest(col_first, col_stop))]

    def block_rows(self):
        return max(1, _BLOCK_PIXELS // self.shape[1])

    def mean_weights(self, region):
        """Weights w on the grid with sum(w * v) = the mean over ``region`` (pixels) of the spline through v.

        The spline is linear in its samples: with S the collocation matrices and B the
        pixel bases of the two axes, the mean is <v, S_y^-T (B_y^T R B_x) S_x^-1> / |R|.
        ``region`` is a full-resolution boolean array or a :class:`_Region` (read block by block).
        """
        moment, count = self.moment(_Region.of(region))[:2]
        return self.weights_of(moment, count)

    def moment(self, region):
        """(B_y^T R B_x, |R|, R on the grid's samples) of a :class:`_Region`, in one pass over its rows."""
        moment = np.zeros(self.coarse_shape)
        coarse = np.zeros(self.coarse_shape, dtype=bool)
        count = 0
        by, bx_t = self.axes[0].basis, self.axes[1].basis_t
        for r0, r1, part in region.blocks(self.block_rows()):
            if part.any():
                moment += (by[r0:r1].T @ (bx_t @ part.T.astype(float)).T)
                count += int(np.count_nonzero(part))
            self._sample_into(coarse, r0, r1, part)
        return moment, count, coarse

    def weights_of(self, moment, count):
        """The mean weights of :meth:`mean_weights` from a region's moment and pixel count."""
        return self.axes[1].solve(self.axes[0].solve(moment / count, -2, trans="T"), -1, trans="T")

    def _sample_into(self, coarse, r0, r1, part):
        """Copy the grid's samples that lie in rows r0 ... r1 - 1 of a full-resolution block into ``coarse``."""
        s = self.step
        first = -(-r0 // s) * s
        if first < r1:
            coarse[first // s : -(-r1 // s)] = part[first - r0 :: s, ::s]


class _Region:
    """A full-resolution boolean region of a frame, handed out block of rows by block of rows.

    Either a boolean array, or a function rows(r0, r1) -> (r1 - r0, cols) that computes its rows
    on demand (a lazy frame keeps no full-size array); ``min_block`` is the fewest rows worth
    computing at a time (a function that reads a halo around each block prefers large blocks).
    """

    def __init__(self, shape, rows, min_block=1):
        self.shape, self._rows, self.min_block = tuple(shape), rows, int(min_block)

    @classmethod
    def of(cls, region):
        if isinstance(region, _Region):
            return region
        region = np.asarray(region, dtype=bool)
        return cls(region.shape, lambda r0, r1: region[r0:r1])

    def rows(self, r0, r1):
        return self._rows(r0, r1)

    def blocks(self, block):
        """(r0, r1, rows) over the whole frame, blocks of at least ``block`` rows."""
        block = max(int(block), self.min_block)
        for r0 in range(0, self.shape[0], block):
            r1 = min(self.shape[0], r0 + block)
            yield r0, r1, self._rows(r0, r1)


def _fill_nearest(values, invalid):
    """Samples flagged ``invalid`` take the value of the nearest valid sample (the spline needs finite samples)."""
    if not invalid.any() or invalid.all():
        return values
    index = ndimage.distance_transform_edt(invalid, return_distances=False, return_indices=True)
    return values[..., index[0], index[1]]


class _Field:
    """A displacement (ux, uy) in nm known on the decimated grid; its spline gives it at any pixel."""

    def __init__(self, grid, samples, invalid):
        self.grid = grid
        self.invalid = np.asarray(invalid, dtype=bool)
        self.samples = np.where(self.invalid, np.nan, samples)
        self.coef = grid.coefficients(_fill_nearest(np.asarray(samples, dtype=float), self.invalid))

    def rows(self, first, stop):
        """u at rows first ... stop - 1 (2, rows, cols) in nm; NaN where the nearest sample is invalid."""
        u = self.grid.rows(self.coef, first, stop)
        if self.invalid.any():
            u[:, self.grid.nearest_invalid(self.invalid, first, stop)] = np.nan
        return u

    def at(self, rows_px, cols_px):
        return self.grid.at(self.coef, rows_px, cols_px)

    def window(self, r0, r1, c0, c1):
        """u at rows r0 ... r1 - 1 and columns c0 ... c1 - 1 (2, rows, cols) in nm, the same values as :meth:`rows`."""
        u = self.grid.outer(self.coef, slice(r0, r1), slice(c0, c1))
        if self.invalid.any():
            u[:, self.grid.nearest_invalid(self.invalid, r0, r1, c0, c1)] = np.nan
        return u

    def largest_row_shift(self, pixel_size):
        """max |u_y| / dy over every pixel of the frame (finite ones), in rows."""
        return self.largest_shift(pixel_size)[0]

    def largest_shift(self, pixel_size):
        """(max |u_y| / dy, max |u_x| / dx) over every pixel of the frame, in pixels, block of rows by block of rows."""
        largest = np.zeros(2)
        block = self.grid.block_rows()
        for r0 in range(0, self.grid.shape[0], block):
            u = self.grid.rows(self.coef, r0, min(self.grid.shape[0], r0 + block))
            largest = np.maximum(largest, np.max(np.abs(u), axis=(1, 2)))
        return float(largest[1] / pixel_size[0]), float(largest[0] / pixel_size[1])


# --------------------------------------------------------------------------- resampling by blocks of rows


def _resample_window(plane, coords, order, top, bottom, left=True, right=True):
    """The spline of one window of source rows at ``coords`` (window pixels); NaN next to NaN sources.

    ``top`` / ``bottom`` (``left`` / ``right``): the window starts / ends at the frame edge, where
    mode "nearest" pads it exactly as :func:`scipy.ndimage.map_coordinates` does; elsewhere the
    window holds ``_PREFILTER_ROWS`` real rows (columns) beyond the support.
    """
    return _evaluate(_prefilter(plane, order, top, bottom, left, right), coords, order)


def _prefilter(plane, order, top, bottom, left=True, right=True):
    """The spline coefficients of one window (see :func:`_resample_window`): (coefficients or None when
    every pixel is NaN, the pixel offset of the window in them, the NaN pixels or None)."""
    plane = np.array(plane, dtype=float)
    bad = ~np.isfinite(plane)
    if bad.all():
        return None, None, None
    if not bad.any():
        bad = None
    else:
        # The spline prefilter is recursive: a NaN would spread along its row and column. The nearest
        # valid pixel stands in (local, so the result does not depend on how the rows were blocked).
        index = ndimage.distance_transform_edt(bad, return_distances=False, return_indices=True)
        plane = plane[tuple(index)]
    if order <= 1:
        return plane, np.zeros(2), bad
    pad_top, pad_bottom = (_EDGE_PAD if top else 0), (_EDGE_PAD if bottom else 0)
    pad_left, pad_right = (_EDGE_PAD if left else 0), (_EDGE_PAD if right else 0)
    padded = np.pad(plane, ((pad_top, pad_bottom), (pad_left, pad_right)), mode="edge")
    spline = ndimage.spline_filter(padded, order, output=np.float64, mode="nearest")
    return spline, np.array([pad_top, pad_left], dtype=float), bad


def _evaluate(prefiltered, coords, order):
    """The spline of :func:`_prefilter` at ``coords`` (window pixels); NaN next to NaN sources."""
    spline, offset, bad = prefiltered
    if spline is None:
        return np.full(coords.shape[1:], np.nan)
    out = ndimage.map_coordinates(spline, coords + offset[:, None, None], order=order, mode="nearest",
                                  prefilter=False)
    if bad is not None:
        reach = ndimage.map_coordinates(bad.astype(float), coords, order=1, mode="nearest", prefilter=False)
        out[reach > 1e-9] = np.nan
    return out


def _resample_block(source, first, u, pixel_size, order, out_dtype, shape, carried=None):
    """Rows first ... first + m of T(r - u(r)) for every plane of ``source`` (..., row, col).

    ``u`` (2, m, col) is the displacement of those rows in nm. Only the source rows
    that the spline reads are taken from ``source`` (any array that slices:
    numpy, memmap, zarr, HDF5, dask). ``carried`` (row, col) bool, optional, is
    carried along by linear interpolation (a mask: True wherever any weight
    falls on it). Returns the planes (NaN where r - u(r) left the frame, where
    u is NaN and next to NaN sources), ``outside`` and the carried mask.
    """
    ny, nx = shape
    dy, dx = pixel_size
    m = u.shape[1]
    rows = (first + np.arange(m, dtype=float))[:, None] - u[1] / dy
    cols = np.arange(nx, dtype=float)[None, :] - u[0] / dx
    tol = 1e-6
    with np.errstate(invalid="ignore"):
        outside = ~(np.isfinite(rows) & np.isfinite(cols))
        outside |= (rows < -tol) | (rows > ny - 1 + tol) | (cols < -tol) | (cols > nx - 1 + tol)
    lead = () if source is None else tuple(source.shape[:-2])
    planes = np.full(lead + (m, nx), np.nan, dtype=out_dtype)
    if outside.all():
        return planes, outside, (None if carried is None else outside.copy())
    inside = rows[~outside]
    reach = order + 1 + (_PREFILTER_ROWS if order > 1 else 0)
    a = max(0, int(np.floor(inside.min())) - reach)
    b = min(ny, int(np.ceil(inside.max())) + 1 + reach)
    coords = np.stack([np.where(outside, a, rows) - a, np.where(outside, 0.0, cols)])
    if source is not None:
        window = np.asarray(source[..., a:b, :])
        flat, out = window.reshape((-1, b - a, nx)), planes.reshape((-1, m, nx))
        for i, plane in enumerate(flat):
            out[i] = _resample_window(plane, coords, order, top=a == 0, bottom=b == ny)
        planes[..., outside] = np.nan
    moved = None
    if carried is not None:
        weight = ndimage.map_coordinates(np.asarray(carried[a:b], dtype=float), coords, order=1, mode="nearest",
                                         prefilter=False)
        moved = outside | ~(weight < 1e-9)
    return planes, outside, moved


def _straighten(source, rows_of_u, pixel_size, order, out_dtype, *, carried=None, first=0, stop=None, shape=None):
    """Resample rows first ... stop - 1 block by block (u from ``rows_of_u(r0, r1)``).

    Returns (planes or None, outside, carried mask or None). The temporaries are a
    few float64 copies of one block; only the outputs are full size.
    """
    ny, nx = tuple(shape) if source is None else tuple(source.shape[-2:])
    stop = ny if stop is None else stop
    lead = () if source is None else tuple(source.shape[:-2])
    planes = None if source is None else np.empty(lead + (stop - first, nx), dtype=out_dtype)
    outside = np.empty((stop - first, nx), dtype=bool)
    moved = None if carried is None else np.empty((stop - first, nx), dtype=bool)
    block = max(1, _BLOCK_PIXELS // nx)
    for r0 in range(first, stop, block):
        r1 = min(stop, r0 + block)
        p, o, c = _resample_block(source, r0, rows_of_u(r0, r1), pixel_size, order, out_dtype, (ny, nx), carried)
        if planes is not None:
            planes[..., r0 - first : r1 - first, :] = p
        outside[r0 - first : r1 - first] = o
        if moved is not None:
            moved[r0 - first : r1 - first] = c
    return planes, outside, moved


def _halo(shift_px, order):
    """Source pixels beyond an output chunk that its resampling reads: the largest displacement, the
    spline support and, for order > 1, the pixels after which the prefilter forgets the cut."""
    return int(math.ceil(shift_px)) + order + 2 + (_PREFILTER_ROWS if order > 1 else 0)


def _apply_chunked(data, window_of_u, shift_px, pixel_size, order, out_dtype, *, carried=None, nan_carried=False):
    """T(r - u(r)) of a dask array (..., row, col), chunk by chunk: :func:`dask.array.map_overlap`.

    Each output chunk reads its source window, the chunk and a halo of :func:`_halo` pixels on the
    sides that have a neighbour (``shift_px`` = (rows, cols) of the largest displacement); the
    displacement of its pixels comes from ``window_of_u(r0, r1, c0, c1)`` (2, rows, cols) in nm,
    here the cubic spline of the decimated grid, so no full-size field exists. The spline of the
    window (:func:`_resample_window`) equals the whole frame's at the output pixels to 2e-14 of
    the values (|sqrt 3 - 2|^24 of the prefilter, Unser 1999). Chunks thinner than the halo are
    merged with their neighbours; the output keeps the (merged) chunks of the input.

    ``carried`` (row, col) bool in memory, optional: with ``nan_carried`` the output is NaN
    wherever a linear-interpolation weight falls on it (for a lock-in, which leaves NaN out).
    """
    import dask.array as da

    from ._lockin import _dask_chunks

    ny, nx = data.shape[-2:]
    dy, dx = pixel_size
    halo = [_halo(shift_px[0], order), _halo(shift_px[1], order)]
    chunks = list(data.chunks[:-2])
    for axis, (c, n) in enumerate(zip(data.chunks[-2:], (ny, nx))):
        merged = _dask_chunks(c, halo[axis], 1, n)
        chunks.append(merged)
        if len(merged) == 1:
            halo[axis] = 0  # a single chunk along this axis needs no neighbours
    data = data.rechunk(tuple(chunks))
    starts = [np.cumsum((0,) + c[:-1]) for c in chunks[-2:]]
    lead = data.ndim - 2
    nan_carried = nan_carried and carried is not None

    def block(x, block_info=None):
        i, j = block_info[0]["chunk-location"][-2:]
        r0, c0 = int(starts[0][i]), int(starts[1][j])
        r1, c1 = r0 + chunks[-2][i], c0 + chunks[-1][j]
        wy, wx = r0 - (halo[0] if i > 0 else 0), c0 - (halo[1] if j > 0 else 0)
        h, w = x.shape[-2:]
        edges = dict(top=wy == 0, bottom=wy + h == ny, left=wx == 0, right=wx + w == nx)
        out = np.full(x.shape[:-2] + (r1 - r0, c1 - c0), np.nan, dtype=out_dtype)
        planes = out.reshape((-1,) + out.shape[-2:])
        flat = x.reshape((-1, h, w))
        # The window's spline coefficients once per plane; the output rows in blocks (small temporaries).
        splines = [None] * len(flat)
        carried_window = np.asarray(carried[wy : wy + h, wx : wx + w], dtype=float) if nan_carried else None
        band = max(1, _BLOCK_PIXELS // (c1 - c0))
        for b0 in range(r0, r1, band):
            b1 = min(r1, b0 + band)
            u = window_of_u(b0, b1, c0, c1)
            rows = np.arange(b0, b1, dtype=float)[:, None] - u[1] / dy
            cols = np.arange(c0, c1, dtype=float)[None, :] - u[0] / dx
            del u
            tol = 1e-6
            with np.errstate(invalid="ignore"):
                outside = ~(np.isfinite(rows) & np.isfinite(cols))
                outside |= (rows < -tol) | (rows > ny - 1 + tol) | (cols < -tol) | (cols > nx - 1 + tol)
            if outside.all():
                continue
            coords = np.stack([np.where(outside, wy, rows) - wy, np.where(outside, wx, cols) - wx])
            del rows, cols
            for k, plane in enumerate(flat):
                if splines[k] is None:
                    splines[k] = _prefilter(plane, order, **edges)
                values = _evaluate(splines[k], coords, order)
                values[outside] = np.nan
                planes[k, b0 - r0 : b1 - r0] = values
            if nan_carried:
                weight = ndimage.map_coordinates(carried_window, coords, order=1, mode="nearest", prefilter=False)
                planes[:, b0 - r0 : b1 - r0][:, ~(weight < 1e-9)] = np.nan
        return out

    depth = {**{a: 0 for a in range(lead)}, lead: halo[0], lead + 1: halo[1]}
    return da.map_overlap(block, data, depth=depth, boundary="none", trim=False, allow_rechunk=False,
                          dtype=out_dtype, meta=np.empty((0,) * data.ndim, out_dtype), chunks=tuple(chunks))


def _bad_rows(field, carried, pixel_size, shape):
    """rows(a, b) of the untrusted pixels of a corrected frame: where r - u(r) left the frame, and the
    input's bad pixels (``carried``, or None) carried along, as :func:`correct_drift` marks them."""

    def rows(a, b):
        _, outside, moved = _straighten(None, field.rows, pixel_size, 1, np.float64, carried=carried,
                                        first=a, stop=b, shape=shape)
        return outside if moved is None else moved

    return rows


def _lazy_rows(rows, shape, row_chunks):
    """A dask boolean array (row, col) whose bands of rows (full width) come from ``rows(r0, r1)``."""
    import dask.array as da

    starts = np.cumsum((0,) + tuple(row_chunks[:-1]))

    def band(x, block_info=None):
        i = block_info[0]["chunk-location"][0]
        r0 = int(starts[i])
        return np.asarray(rows(r0, r0 + x.shape[0]), dtype=bool)

    template = da.zeros(shape, dtype=bool, chunks=(tuple(row_chunks), (shape[1],)))
    return template.map_blocks(band, dtype=bool, meta=np.empty((0, 0), bool))


def _out_dtype(dtype):
    return np.float32 if dtype == np.float32 else np.float64


def _check_order(order):
    if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or not 0 <= order <= 5:
        raise InputError(f"order must be an integer from 0 to 5, got {order!r}")
    return int(order)


def _measure(work, q, sigma_nm, pixel_size, mask, bad, grid, translation):
    """First pass on the decimated grid: lock-in, unwrap, least squares.

    ``work`` is the float32 image (NaN allowed), ``bad`` the full-resolution
    untrusted pixels (NaN or masked) or None. Returns the field, the wrapped
    phases on the grid, the full-resolution trusted pixels and the target phases.
    """
    a = lockin(work, q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=mask, step=grid.step)
    trusted = _trusted(bad, grid.shape, sigma_nm, pixel_size)
    field, theta, trusted_c, target = _measure_from(a, q, grid, _Region.of(trusted),
                                                    _Region.of(np.ones(grid.shape, bool) if bad is None else ~bad),
                                                    translation)
    return field, theta, trusted_c, target


def _measure_from(a, q, grid, trusted, fallback, translation):
    """The first field from the lock-in ``a`` on the grid: unwrap, least squares.

    ``trusted`` and ``fallback`` (the region used when nothing is trusted) are :class:`_Region`.
    Returns the field, the wrapped phases on the grid, the trusted region on the grid's samples
    and the target phases.
    """
    theta = np.angle(a).astype(float)
    # Masked samples keep the lock-in's value there (the normalised convolution fills them from their
    # neighbours): the drift does not stop at a glitched line. Only samples with no valid neighbours
    # (NaN) are left out, and u is NaN around them.
    valid = np.all(np.isfinite(a), axis=0)
    if not valid.any():
        raise InputError("image: no valid pixels left for the lock-in (all NaN or masked)")
    moment, count, trusted_c = grid.moment(trusted)
    if count == 0:
        moment, count = grid.moment(fallback)[:2]
    unwrapped = _fill_nearest(np.stack([_unwrap(t, valid) for t in theta]), ~valid)
    # The mean over the trusted *pixels* of the interpolated phases, so that "remove" leaves u with zero
    # mean there exactly (the spline is linear in its samples).
    mean = np.einsum("kij,ij->k", unwrapped, grid.weights_of(moment, count))
    u = _solve(unwrapped - mean[:, None, None], q)
    target = _target_phases(q, mean, translation)
    if translation == "lattice":
        u += _lattice_translation(q, mean, target)[:, None, None]
    return _Field(grid, u, ~valid), theta, trusted_c, target


def _rotated_samples(a, target):
    """The lock-in samples turned by their target phases, as real and imaginary planes (2k, rows, cols),
    NaN samples replaced by their nearest valid neighbour, and the mask of those samples."""
    invalid = ~np.all(np.isfinite(a), axis=0)
    k = len(a)
    planes = np.empty((2 * k,) + a.shape[1:])
    for j, turn in enumerate(np.exp(-1j * np.asarray(target))):
        rotated = a[j].astype(np.complex128) * turn  # one component at a time (small temporaries)
        planes[j], planes[k + j] = rotated.real, rotated.imag
    del rotated
    if invalid.all():
        return np.zeros_like(planes), invalid
    return _fill_nearest(planes, invalid), invalid


def _residual_rows(grid, coef, invalid, first, stop):
    """Wrapped residual phases of rows first ... stop - 1 from the spline of the rotated lock-in."""
    k = len(coef) // 2
    # float32: the phase to 1e-7 rad, far below any tolerance, at half the cost.
    values = grid.rows(coef, first, stop, dtype=np.float32)
    residual = np.arctan2(values[k:], values[:k])
    if invalid.any():
        residual[:, grid.nearest_invalid(invalid, first, stop)] = np.nan
    return residual


def _residual_stats(grid, a, target, trusted):
    """RMS and largest |residual phase| of each peak over the trusted pixels (full resolution).

    The lock-in of the corrected image is known on the grid; its spline (real and
    imaginary parts, turned by the targets) gives the residual at every pixel,
    one block of rows at a time. Returns (rms, max, trusted) with ``trusted`` less
    the pixels whose nearest lock-in sample is NaN.
    """
    invalid = ~np.all(np.isfinite(a), axis=0)
    trusted = trusted & ~grid.nearest_invalid(invalid, 0, grid.shape[0]) if invalid.any() else trusted
    rms, largest, _, _ = _residual_stats_region(grid, a, target, _Region.of(trusted))
    return rms, largest, trusted


def _trusted_less_invalid(grid, a, trusted):
    """The :class:`_Region` ``trusted`` less the pixels whose nearest lock-in sample of ``a`` is NaN."""
    invalid = ~np.all(np.isfinite(a), axis=0)
    if not invalid.any():
        return trusted
    return _Region(trusted.shape, lambda r0, r1: trusted.rows(r0, r1) & ~grid.nearest_invalid(invalid, r0, r1),
                   trusted.min_block)


def _residual_stats_region(grid, a, target, trusted):
    """:func:`_residual_stats` over a :class:`_Region` (already less the invalid samples), in one
    pass over its rows: (rms, max, the region on the grid's samples, its pixel count)."""
    planes, invalid = _rotated_samples(a, target)
    k = len(a)
    coef = grid.coefficients(planes, out=planes)  # in place: one set of grid-sized planes
    total, largest, count = np.zeros(k), np.zeros(k), 0
    coarse = np.zeros(grid.coarse_shape, dtype=bool)
    for r0, r1, where in trusted.blocks(grid.block_rows()):
        grid._sample_into(coarse, r0, r1, where)
        if not where.any():
            continue
        count += int(np.count_nonzero(where))
        residual = _residual_rows(grid, coef, invalid, r0, r1)
        np.abs(residual, out=residual)
        residual[:, ~where] = 0  # |residual| >= 0: zeros change neither the largest nor the sum of squares
        largest = np.maximum(largest, residual.max(axis=(1, 2)))
        np.square(residual, out=residual)
        total += residual.sum(axis=(1, 2), dtype=np.float64)
    if count == 0:
        return np.full(k, np.nan), np.full(k, np.nan), coarse, 0
    return np.sqrt(total / count), largest, coarse, count


def _prepare(image, mask):
    """The float32 working copy for the lock-in and the full-resolution untrusted pixels (or None)."""
    bad = ~np.isfinite(image)
    if mask is not None:
        bad |= mask
    return image.astype(np.float32), (bad if bad.any() else None)


def displacement_field(image, bragg_q, *, sigma_nm, pixel_size_nm, mask=None, translation="remove"):
    """Displacement field u(r) of a distorted lattice from the lock-in phases of its Bragg peaks.

    The image is modelled as T(r) = sum_j cos(Q_j . (r + u(r))) [1]_. The
    lock-in at each ideal Bragg vector Q_j gives theta_j = Q_j . u (plus a
    constant); the phases are unwrapped (so that |Q_j . u| > pi does not tear
    the field) and u is solved by least squares,
    u = (M^T M)^-1 M^T theta with the Q_j as the rows of M. All this is done on
    the decimated grid of :func:`correct_drift` and brought to every pixel by
    its cubic spline (error bound there).

    Parameters
    ----------
    image : (row, col) array_like
        Topograph (or any channel) showing the lattice.
    bragg_q : (k, 2) array_like
        The ideal Bragg wavevectors (qx, qy) in rad/nm, k >= 2 and not all
        collinear: two for a square lattice, three for a hexagonal one.
    sigma_nm : float
        Lock-in width in nm (see :func:`domains.choose_sigma`). The recovered
        field is the true one smoothed by this Gaussian, G_sigma * u.
    pixel_size_nm : float or (float, float)
        Pixel size in nm, one value or (row, col).
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    translation : {"remove", "lattice"}
        What to do with the constant part of u, a rigid translation of the
        whole lattice. "remove" (default): u has zero mean over the trusted
        region (pixels at least 2.5 sigma from the frame edge and from masked
        or NaN pixels), so correcting with it straightens the lattice without
        moving it as a whole. "lattice": keep the translation that puts the
        ideal lattice's origin at pixel (0, 0), i.e. every Bragg phase of the
        corrected image is zero there (for a closed triple of hexagonal peaks,
        a third of their phase sum, which no displacement can change). Only
        this choice is defined modulo a lattice vector; the smallest is given.

    Returns
    -------
    u : ndarray, shape (2, row, col), float64
        (ux, uy) in nm; NaN where the nearest sample of the decimated grid has
        no valid lock-in neighbours.

    Raises
    ------
    InputError
        If ``bragg_q`` has fewer than two non-collinear vectors, the image is
        not 2-D, ``translation`` is unknown, or any lock-in argument is bad.

    Notes
    -----
    This ``u`` is minus the displacement of geometric phase analysis [2]_:
    T(r) = f(r + u) here, I(r) = f(r - u_GPA) there.

    References
    ----------
    .. [1] M. J. Lawler et al., "Intra-unit-cell electronic nematicity of the
       high-Tc copper-oxide pseudogap states", Nature 466, 347 (2010).
       doi:10.1038/nature09169
    .. [2] M. J. Hÿtch, E. Snoeck, R. Kilaas, "Quantitative measurement of
       displacement and strain fields from HREM micrographs",
       Ultramicroscopy 74, 131 (1998). doi:10.1016/S0304-3991(98)00035-7

    Examples
    --------
    >>> import numpy as np
    >>> n = 64
    >>> y, x = np.mgrid[:n, :n].astype(float)
    >>> q = 2 * np.pi * np.array([[8, 0], [-4, 7], [-4, -7]]) / n
    >>> image = sum(np.cos(qx * (x + 0.3) + qy * y) for qx, qy in q)
    >>> u = displacement_field(image, q, sigma_nm=6.0, pixel_size_nm=1.0, translation="lattice")
    >>> bool(np.allclose(u[0][16:48, 16:48], 0.3, atol=0.01) and np.allclose(u[1][16:48, 16:48], 0, atol=0.01))
    True
    """
    _check_translation(translation)
    image = _check_image(image)
    q = _check_bragg(bragg_q)
    pixel_size = pixel_size_pair(pixel_size_nm)
    mask = _check_mask(mask, image.shape)
    grid = _Grid(image.shape, _decimation_step(sigma_nm, pixel_size, image.shape))
    work, bad = _prepare(image, mask)
    field, _, _, _ = _measure(work, q, sigma_nm, pixel_size, mask, bad, grid, translation)
    return field.rows(0, image.shape[0])


def _check_mask(mask, shape, name="mask"):
    if mask is None:
        return None
    mask = np.asarray(mask, dtype=bool)
    if mask.shape != tuple(shape[-2:]):
        raise InputError(f"{name} shape {mask.shape} differs from the image shape {tuple(shape[-2:])}")
    return mask


def apply_displacement(image_or_stack, u, *, pixel_size_nm, order=3):
    """Resample an image, or every plane of a stack, as T'(r) = T(r - u(r)).

    The spline interpolation of :func:`scipy.ndimage.map_coordinates` (mode
    "nearest") is evaluated at r - u(r) for every output pixel r; the same field
    is used for every plane of a stack (the channels or biases of one scan, or
    the energy slices of an (energy, row, col) grid). The work goes by blocks of
    rows, each reading only the source rows it needs, so the temporaries stay
    a few float64 copies of one block.

    Parameters
    ----------
    image_or_stack : (..., row, col) array_like or dask array
        One image or a stack of images sharing the field. A dask stack stays
        lazy, one task per block of leading planes.
    u : (2, row, col) array_like
        Displacement (ux, uy) in nm, as from :func:`displacement_field`.
    pixel_size_nm : float or (float, float)
        Pixel size in nm, one value or (row, col).
    order : int
        Spline order, 0 to 5 (3: cubic).

    Returns
    -------
    corrected : ndarray or dask array
        Same shape as the input; float32 stays float32, everything else
        becomes float64. NaN where r - u(r) lies outside the frame, where u is
        NaN, and next to NaN pixels of the input (a NaN pixel takes its nearest
        valid neighbour's value for the spline prefilter).
    outside : (row, col) ndarray of bool
        True where r - u(r) left the frame (or u was NaN).

    Raises
    ------
    InputError
        If ``u`` is not shaped (2, row, col) like the image, or ``order`` is
        not an integer from 0 to 5.

    References
    ----------
    .. [1] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> import numpy as np
    >>> image = np.arange(16.0).reshape(4, 4)
    >>> u = np.zeros((2, 4, 4)); u[0] = -0.25          # sample half a pixel to the right
    >>> out, outside = apply_displacement(image, u, pixel_size_nm=0.5, order=1)
    >>> out[0].tolist(), outside[0].tolist()
    ([0.5, 1.5, 2.5, nan], [False, False, False, True])
    """
    pixel_size = pixel_size_pair(pixel_size_nm)
    u = np.asarray(u, dtype=float)
    lazy = _is_dask(image_or_stack)
    data = image_or_stack if lazy else np.asarray(image_or_stack)
    if data.ndim < 2:
        raise InputError(f"image_or_stack must be an image (row, col) or a stack (..., row, col), got shape {data.shape}")
    if data.dtype.kind not in "biuf":
        raise InputError(f"image_or_stack must hold real numbers, got dtype {data.dtype}")
    if u.shape != (2,) + tuple(data.shape[-2:]):
        raise InputError(f"u must have shape (2, row, col) = {(2,) + tuple(data.shape[-2:])}, got {u.shape}")
    order = _check_order(order)
    return _apply(data, lambda r0, r1: u[:, r0:r1], pixel_size, order)


def _apply(data, rows_of_u, pixel_size, order):
    """Resample an array or a dask stack with the field ``rows_of_u``; returns (corrected, outside)."""
    out_dtype = _out_dtype(data.dtype)
    shape = tuple(data.shape[-2:])
    if _is_dask(data):
        _, outside, _ = _straighten(None, rows_of_u, pixel_size, order, out_dtype, shape=shape)

        def planes(block):
            return _straighten(np.asarray(block), rows_of_u, pixel_size, order, out_dtype)[0]

        # Each task needs whole planes: the resampling moves pixels across chunk borders.
        whole = data.rechunk(data.chunks[:-2] + ((data.shape[-2],), (data.shape[-1],)))
        return whole.map_blocks(planes, dtype=out_dtype), outside
    planes, outside, _ = _straighten(data, rows_of_u, pixel_size, order, out_dtype)
    return planes, outside


@dataclass
class DriftResult:
    """The outcome of :func:`correct_drift`.

    The displacement is kept on the decimated grid (``u_coarse_nm``, every
    ``step``-th row and column); its cubic spline gives it at any pixel.
    ``u_nm`` and ``residual_phase_rad`` are evaluated from the grid on first
    access, and :func:`straighten_rows` resamples any block of rows of any
    channel without the full-resolution field.

    For a dask frame, ``corrected``, ``outside``, ``mask`` and ``trusted`` are
    dask arrays, and ``u_nm`` and ``residual_phase_rad`` are read-only arrays
    that evaluate the grid's spline only at the pixels indexed (slices, or
    two integer arrays of points); ``np.asarray`` gives the whole of them.

    Attributes
    ----------
    corrected : ndarray
        The drift-corrected image, NaN where the source point left the frame.
        float32 for a float32 image, float64 otherwise.
    outside : ndarray of bool
        True where r - u(r) left the frame (or u was NaN).
    mask : ndarray of bool
        Untrusted pixels of the corrected frame: ``outside``, NaN, and the
        input mask carried along by the correction.
    trusted : ndarray of bool
        Where the residual is measured: at least 2.5 sigma from the frame edge
        and from ``mask``.
    u_coarse_nm : ndarray, shape (2, ceil(row / step), ceil(col / step))
        The total displacement (ux, uy) in nm at the pixels (step m, step n);
        NaN where the lock-in had no valid neighbours.
    step : int
        The step of the decimated grid, in pixels.
    lockin_coarse : complex ndarray, shape (k, ceil(row / step), ceil(col / step))
        The lock-in of the corrected image at each Bragg vector on the grid.
    target_phase_rad : ndarray, shape (k,)
        The Bragg phases the correction aims at (see ``translation``).
    residual_rms_rad, residual_max_rad : ndarray, shape (k,)
        RMS and largest |residual| of each peak over ``trusted`` (every pixel).
    phase_sum_mean_rad, phase_sum_rms_rad : float or None
        For three peaks forming a closed triple (sum_j c_j Q_j = 0 with
        c_j = +-1, as for a hexagonal lattice), the circular mean and the RMS
        spread of the wrapped sum sum_j c_j theta_j over the trusted samples of
        the grid of the *input* image. The sum is unchanged by any
        displacement, so a spread well above the phase noise means the peaks do
        not belong to one lattice (a wrong or misplaced peak). None for other
        peak sets.
    bragg_q_rad_per_nm : ndarray, shape (k, 2)
        The Bragg vectors used.
    snapped_to_pixels : bool
        Whether they were rounded to integer FFT bins of the frame.
    iterations : int
        Number of resampling passes.
    converged : bool
        Whether max |residual| fell below the tolerance.
    sigma_nm : float
    pixel_size_nm : tuple of float
    translation : str
    """

    corrected: np.ndarray
    outside: np.ndarray
    mask: np.ndarray
    trusted: np.ndarray
    u_coarse_nm: np.ndarray
    step: int
    lockin_coarse: np.ndarray
    target_phase_rad: np.ndarray
    residual_rms_rad: np.ndarray
    residual_max_rad: np.ndarray
    phase_sum_mean_rad: float | None
    phase_sum_rms_rad: float | None
    bragg_q_rad_per_nm: np.ndarray
    snapped_to_pixels: bool
    iterations: int
    converged: bool
    sigma_nm: float
    pixel_size_nm: tuple
    translation: str

    @property
    def shape(self) -> tuple:
        """The frame (row, col)."""
        return tuple(self.outside.shape)

    @cached_property
    def _field(self) -> _Field:
        invalid = ~np.all(np.isfinite(self.u_coarse_nm), axis=0)
        return _Field(_Grid(self.shape, self.step), self.u_coarse_nm, invalid)

    @cached_property
    def u_nm(self) -> np.ndarray:
        """The total displacement (ux, uy) in nm at every pixel, (2, row, col) float64, from the grid's
        cubic spline; apply it to other channels with :func:`correct_channels`. Opposite in sign to
        the GPA displacement."""
        return self._field.rows(0, self.shape[0])

    @cached_property
    def residual_phase_points(self):
        """:attr:`residual_phase_rad` evaluated from the grid's spline only at the pixels indexed
        (``[..., ::s, ::s]`` or ``[:, rows, cols]``): no full-size array (:class:`_SplineImage`)."""
        grid = self._field.grid
        planes, invalid = _rotated_samples(self.lockin_coarse, self.target_phase_rad)
        return _SplineImage(grid, grid.coefficients(planes), invalid, phase=True)

    @cached_property
    def residual_phase_rad(self) -> np.ndarray:
        """Bragg phases of the corrected image less their targets, wrapped, (k, row, col) float32: the
        spline of the grid's lock-in (real and imaginary parts), its phase at every pixel."""
        grid = self._field.grid
        planes, invalid = _rotated_samples(self.lockin_coarse, self.target_phase_rad)
        coef = grid.coefficients(planes)
        out = np.empty((len(self.lockin_coarse),) + self.shape, dtype=np.float32)
        block = grid.block_rows()
        for r0 in range(0, self.shape[0], block):
            r1 = min(self.shape[0], r0 + block)
            out[:, r0:r1] = _residual_rows(grid, coef, invalid, r0, r1)
        return out

    def overlap_rows(self, order=3) -> int:
        """The most source rows beyond a block of rows that :func:`straighten_rows` reads on either side.

        ceil(max |u_y| / dy) for the largest displacement along the rows, plus the
        spline support (order + 1) and, for order > 1, the rows that let the
        prefilter forget the cut (24). A chunked caller gives each block of rows
        this halo.
        """
        order = _check_order(order)
        if "_largest_row_shift" not in self.__dict__:
            self.__dict__["_largest_row_shift"] = self._field.largest_row_shift(self.pixel_size_nm)
        return int(math.ceil(self.__dict__["_largest_row_shift"])) + order + 1 + (_PREFILTER_ROWS if order > 1 else 0)

    @property
    def note(self) -> str:
        """A sentence for reports: the corrected lattice has exactly the Bragg vectors used."""
        periods = ", ".join(f"{2 * np.pi / np.hypot(*qj):.5g}" for qj in self.bragg_q_rad_per_nm)
        how = "rounded to integer FFT bins of the frame" if self.snapped_to_pixels else "used as given"
        return (
            f"Drift correction imposes the Bragg vectors ({how}): the corrected lattice has exactly "
            f"the Bragg-plane spacings 2 pi / |Q| = {periods} nm and their orientation, whatever the true lattice constant is."
        )


class _SplineImage:
    """A (k, row, col) array known through the cubic spline of its decimated grid (read only).

    Indexing evaluates the spline at the pixels asked for only: slices (any step) on the last two
    axes give their outer product, two integer arrays give those points; ``np.asarray`` gives the
    whole array. ``phase``: the components are (real..., imaginary...) pairs and the value is
    their angle (float32), as :attr:`DriftResult.residual_phase_rad`; otherwise the spline's values
    (float64), as :attr:`DriftResult.u_nm`. NaN where the nearest sample is flagged ``invalid``.
    """

    def __init__(self, grid, coef, invalid, phase):
        self.grid, self.coef, self.invalid, self.phase = grid, coef, np.asarray(invalid, bool), bool(phase)
        k = len(coef) // 2 if phase else len(coef)
        self.shape = (k,) + grid.shape
        self.ndim = 3
        self.dtype = np.dtype(np.float32 if phase else np.float64)

    def __len__(self):
        return self.shape[0]

    def _finish(self, values, nearest_bad):
        if self.phase:
            k = self.shape[0]
            values = np.arctan2(values[k:], values[:k]).astype(np.float32)
        if nearest_bad is not None and nearest_bad.any():
            values[:, nearest_bad] = np.nan
        return values

    def __getitem__(self, key):
        key = key if isinstance(key, tuple) else (key,)
        if any(k is Ellipsis for k in key):
            at = next(i for i, k in enumerate(key) if k is Ellipsis)
            key = key[:at] + (slice(None),) * (3 - len(key) + 1) + key[at + 1 :]
        key = key + (slice(None),) * (3 - len(key))
        if len(key) != 3:
            raise IndexError(f"too many indices for an array of shape {self.shape}")
        lead, rows, cols = key
        grid, axes = self.grid, self.grid.axes
        squeeze = []
        if isinstance(rows, (int, np.integer)) and isinstance(cols, slice):
            rows, squeeze = slice(int(rows) % self.shape[1], int(rows) % self.shape[1] + 1), [1]
        if isinstance(cols, (int, np.integer)) and isinstance(rows, slice):
            cols, squeeze = slice(int(cols) % self.shape[2], int(cols) % self.shape[2] + 1), squeeze + [2]
        if isinstance(rows, slice) and isinstance(cols, slice):
            r = np.arange(self.shape[1])[rows]
            c = np.arange(self.shape[2])[cols]
            values = grid.outer(self.coef, r, c, dtype=np.float32 if self.phase else np.float64)
            bad = self.invalid[np.ix_(axes[0].nearest(0, self.shape[1])[r], axes[1].nearest(0, self.shape[2])[c])]
        else:
            r, c = np.broadcast_arrays(np.asarray(rows), np.asarray(cols))
            r = np.where(r < 0, r + self.shape[1], r)
            c = np.where(c < 0, c + self.shape[2], c)
            values = grid.at(self.coef, r.astype(float), c.astype(float))
            bad = self.invalid[axes[0].nearest(0, self.shape[1])[r], axes[1].nearest(0, self.shape[2])[c]]
        values = self._finish(values, bad)
        if squeeze:
            values = values.squeeze(axis=tuple(squeeze))
        return values[lead]

    def __array__(self, dtype=None, copy=None):
        out = self[:, :, :]
        return out if dtype is None else out.astype(dtype)


@dataclass
class _LazyDriftResult(DriftResult):
    """A :class:`DriftResult` of a dask frame: ``corrected``, ``outside``, ``mask`` and ``trusted`` are
    dask arrays, and ``u_nm`` and ``residual_phase_rad`` evaluate the grid's spline only at the pixels
    indexed (:class:`_SplineImage`); nothing full size is held."""

    @cached_property
    def u_nm(self):
        """The displacement (2, row, col) in nm, evaluated from the grid's spline where indexed."""
        field = self._field
        return _SplineImage(field.grid, field.coef, field.invalid, phase=False)

    @cached_property
    def residual_phase_rad(self):
        """The residual Bragg phases (k, row, col), evaluated from the grid's spline where indexed."""
        grid = self._field.grid
        planes, invalid = _rotated_samples(self.lockin_coarse, self.target_phase_rad)
        return _SplineImage(grid, grid.coefficients(planes), invalid, phase=True)


def _snap(q, shape, pixel_size):
    dy, dx = pixel_size
    step = np.array([2 * np.pi / (shape[1] * dx), 2 * np.pi / (shape[0] * dy)])
    return np.round(q / step) * step


def correct_drift(
    image,
    bragg_q,
    *,
    sigma_nm,
    pixel_size_nm,
    mask=None,
    max_iter=5,
    tol_rad=0.01,
    translation="remove",
    snap_to_pixels=False,
    order=3,
):
    """Lawler–Fujita drift correction of a lattice image, iterated to a flat Bragg phase.

    The displacement u from :func:`displacement_field` is applied as
    T'(r) = T(r - u(r)) [1]_. The Bragg phases of the corrected image are then
    measured again; their residual d gives the composed field
    u_new(r) = d(r) + u(r - d(r)) (the original image is always resampled
    once, so interpolation errors do not pile up), until max |residual| over
    the trusted pixels is below ``tol_rad``, ``max_iter`` passes are done, or
    a pass fails to shrink it by 10 % (the noise floor). The pass with the
    smallest residual is returned.

    Two grids: the lock-ins, the unwrapping, the least squares and the
    composition run on a decimated grid, every s-th row and column, s the
    :func:`domains.lossless_step` of sigma (s <= 0.6 sigma; at most a
    sixteenth of the frame), where the decimated lock-in equals the
    full-resolution one at the samples. A not-a-knot cubic spline through the
    samples gives u at every pixel, block of rows by block of rows, while the
    image is resampled; the residual statistics come from the spline of the
    corrected image's lock-in, also at every pixel.

    Parameters
    ----------
    image : (row, col) array_like
        Topograph showing the lattice. float32 is kept; anything else is
        resampled in float64. A dask array (e.g. from a zarr store larger than
        memory) is corrected chunk by chunk with no full-size array in memory:
        each pass reads it once, the lock-ins decimated per chunk and the
        resampling a :func:`dask.array.map_overlap` whose halo is the largest
        displacement plus the spline support and 24 prefilter pixels; the
        result then holds dask arrays (see :class:`DriftResult`) and equals
        the in-memory one to float32 precision.
    bragg_q : (k, 2) array_like
        Ideal Bragg wavevectors (qx, qy) in rad/nm, k >= 2 non-collinear.
    sigma_nm : float
        Lock-in width in nm.
    pixel_size_nm : float or (float, float)
        Pixel size in nm, one value or (row, col).
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    max_iter : int
        Largest number of resampling passes (>= 1).
    tol_rad : float
        Stop when every Bragg phase is within this of its target over the
        trusted pixels. With noisy data the noise sets the floor.
    translation : {"remove", "lattice"}
        Handling of the rigid part of u; see :func:`displacement_field`.
    snap_to_pixels : bool
        Round each Bragg vector to the nearest integer FFT bin of the frame
        before use (the classic choice: the corrected image then holds whole
        periods). Either way the Bragg vectors used set the lattice constant of
        the corrected image; :attr:`DriftResult.note` says so.
    order : int
        Spline order of the resampling.

    Returns
    -------
    DriftResult
        Corrected image, the displacement on the decimated grid (and, on
        access, at every pixel), residual phases and their statistics, the
        hexagonal phase-sum check and the settings used.

    Raises
    ------
    InputError
        For a bad image, peaks, mask, sigma, pixel size, ``max_iter``,
        ``tol_rad``, ``order`` or ``translation``.

    Notes
    -----
    The recovered u of a single pass is G_sigma * u_true; the iteration also
    restores part of the detail the Gaussian removed, where the lattice signal
    allows it. ``u_nm`` has the opposite sign of the displacement of geometric
    phase analysis [2]_.

    Error of the interpolation. A component a sin(k . r) of the true field
    appears in the measured one as a exp(-sigma^2 |k|^2 / 2). The cubic spline
    through samples every s pixels reproduces a function within
    (5 / 384) s^4 max |f''''| per axis [3]_ (the complete-spline constant; the
    not-a-knot end condition adds a term that decays by |sqrt 3 - 2| = 0.27 per
    sample away from the frame edge [4]_, to below 0.5 % of itself at the
    2.5 sigma >= 4 samples of the trusted margin), so the spline misses at most
    (5 / 384) ((k_x s)^4 + (k_y s)^4) a exp(-sigma^2 |k|^2 / 2) (1 + small).
    For s <= 0.6 sigma this is at most 3.7e-3 a per axis, at |k| sigma = 2,
    where the lock-in itself misses 86 % of the component, and below 2.2e-4 a
    for wavelengths longer than 10 sigma. In terms of the largest strain e of
    the true field (a |k| <= e): at most 2.0e-3 sigma e per axis, e.g.
    5e-4 px for a 1 % strain at sigma = 23 px, far below the 0.04 px
    displacement tolerance of docs/methods.md §2. The residual lock-in is
    interpolated the same way (real and imaginary parts), so the residual phase
    carries the same relative error.

    References
    ----------
    .. [1] M. J. Lawler et al., "Intra-unit-cell electronic nematicity of the
       high-Tc copper-oxide pseudogap states", Nature 466, 347 (2010).
       doi:10.1038/nature09169
    .. [2] M. J. Hÿtch, E. Snoeck, R. Kilaas, Ultramicroscopy 74, 131 (1998).
       doi:10.1016/S0304-3991(98)00035-7
    .. [3] C. A. Hall, W. W. Meyer, "Optimal error bounds for cubic spline
       interpolation", J. Approx. Theory 16, 105 (1976).
       doi:10.1016/0021-9045(76)90040-X
    .. [4] M. Unser, "Splines: a perfect fit for signal and image processing",
       IEEE Signal Process. Mag. 16(6), 22 (1999). doi:10.1109/79.799930

    Examples
    --------
    >>> import numpy as np
    >>> n = 64
    >>> y, x = np.mgrid[:n, :n].astype(float)
    >>> q = 2 * np.pi * np.array([[8, 0], [-4, 7], [-4, -7]]) / n
    >>> ux = 0.5 * np.sin(2 * np.pi * y / n)
    >>> image = sum(np.cos(qx * (x + ux) + qy * y) for qx, qy in q)
    >>> result = correct_drift(image, q, sigma_nm=6.0, pixel_size_nm=1.0)
    >>> bool(result.residual_max_rad.max() < 0.03), result.phase_sum_rms_rad < 0.01
    (True, True)
    >>> result.step, result.u_coarse_nm.shape, result.u_nm.shape
    (3, (2, 22, 22), (2, 64, 64))
    >>> import dask.array as da
    >>> lazy = correct_drift(da.from_array(image, chunks=(40, 24)), q, sigma_nm=6.0, pixel_size_nm=1.0)
    >>> type(lazy.corrected).__name__, bool(np.allclose(lazy.corrected.compute(), result.corrected, atol=1e-5, equal_nan=True))
    ('Array', True)
    """
    _check_translation(translation)
    lazy = _is_dask(image)
    image = _check_lazy_image(image) if lazy else _check_image(image)
    q = _check_bragg(bragg_q)
    pixel_size = pixel_size_pair(pixel_size_nm)
    mask = _check_mask(mask, image.shape)
    if isinstance(max_iter, bool) or not isinstance(max_iter, (int, np.integer)) or max_iter < 1:
        raise InputError(f"max_iter must be a positive integer, got {max_iter!r}")
    try:
        tol_rad = float(tol_rad)
    except (TypeError, ValueError):
        raise InputError(f"tol_rad must be a number, got {tol_rad!r}") from None
    if not tol_rad > 0:
        raise InputError(f"tol_rad must be positive, got {tol_rad}")
    order = _check_order(order)
    if snap_to_pixels:
        q = _snap(q, image.shape, pixel_size)
        _check_bragg(q)
    grid = _Grid(image.shape, _decimation_step(sigma_nm, pixel_size, image.shape))
    settings = dict(bragg_q_rad_per_nm=q, snapped_to_pixels=bool(snap_to_pixels), sigma_nm=float(sigma_nm),
                    pixel_size_nm=pixel_size, translation=translation, step=grid.step,
                    target_phase_rad=None)
    if lazy:
        return _correct_drift_lazy(image, q, grid, sigma_nm, pixel_size, mask, max_iter, tol_rad, translation,
                                   order, settings)
    out_dtype = _out_dtype(image.dtype)
    work, input_bad = _prepare(image, mask)
    field, theta0, trusted0, target = _measure(work, q, sigma_nm, pixel_size, mask, input_bad, grid, translation)
    del work
    sum_mean, sum_rms = _phase_sum(theta0, q, trusted0 & np.all(np.isfinite(theta0), axis=0))

    def one_pass(field):
        corrected, outside, bad = _straighten(image, field.rows, pixel_size, order, out_dtype, carried=input_bad)
        bad = outside if bad is None else bad
        bad |= ~np.isfinite(corrected)
        # The lock-in leaves out the pixels of its mask, whatever they hold: no NaN copy is needed, and
        # a float32 frame is used as it is.
        work = corrected.astype(np.float32, copy=False)
        a = lockin(work, q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=bad, step=grid.step)
        del work
        trusted = _trusted(bad, image.shape, sigma_nm, pixel_size)
        rms, largest, trusted = _residual_stats(grid, a, target, trusted)
        worst = float(np.max(largest)) if trusted.any() else np.inf
        return worst, rms, largest, a, grid.sample(trusted), (corrected, outside, bad, trusted)

    worst, iterations, field, a, rms, largest, kept = _iterate(field, one_pass, max_iter, tol_rad, grid, target, q,
                                                               pixel_size)
    corrected, outside, bad, trusted = kept
    settings["target_phase_rad"] = np.asarray(target, dtype=float)
    return DriftResult(
        corrected=corrected,
        outside=outside,
        mask=bad,
        trusted=trusted,
        u_coarse_nm=field.samples,
        lockin_coarse=a,
        residual_rms_rad=rms,
        residual_max_rad=largest,
        phase_sum_mean_rad=sum_mean,
        phase_sum_rms_rad=sum_rms,
        iterations=iterations,
        converged=bool(worst < tol_rad),
        **settings,
    )


def _iterate(field, one_pass, max_iter, tol_rad, grid, target, q, pixel_size):
    """The passes of :func:`correct_drift`: resample with ``field``, measure the residual, compose.

    ``one_pass(field)`` returns (worst, rms, largest, lock-in on the grid, trusted samples, kept);
    ``kept`` (the full-size outputs, or None) is let go before the next pass. Returns the best
    pass: (worst, its number, field, lock-in, rms, largest, kept).
    """
    best = None
    for iteration in range(1, max_iter + 1):
        worst, rms, largest, a, trusted_c, kept = one_pass(field)
        stalled = best is not None and worst > 0.9 * best[0]
        if best is None or worst < best[0]:
            best = (worst, iteration, field, a, rms, largest)
        # Once noise sets the floor, further passes only fit the correction to the noise.
        if worst < tol_rad or iteration == max_iter or stalled:
            break
        field = _next_field(grid, a, target, trusted_c, field, q, pixel_size)
        del kept  # one full-size pass at a time
    worst, best_iteration, field, a, rms, largest = best
    if best_iteration != iteration:
        # The last pass did worse (the noise floor): redo the best one rather than keep two full frames.
        del kept
        kept = one_pass(field)[-1]
    return worst, best_iteration, field, a, rms, largest, kept


def _next_field(grid, a, target, trusted_c, field, q, pixel_size):
    """The field of the next pass from the lock-in ``a`` of the corrected image, on the decimated grid.

    As in the first pass, masked samples keep the lock-in's value from their neighbours, so the
    correction stays smooth across them. Compose: u_new(r) = d(r) + u(r - d(r)), at the samples.
    """
    valid = np.all(np.isfinite(a), axis=0)
    residual = _wrap(np.angle(a).astype(float) - target[:, None, None])
    # Residuals are small after the first pass, but unwrap anyway: a pass can overshoot.
    unwrapped = np.empty_like(residual)
    for j, r in enumerate(residual):
        unwrapped[j] = _unwrap(r, valid)
    del residual
    trusted_c = trusted_c & valid
    for j, r in enumerate(unwrapped):
        if trusted_c.any():
            unwrapped[j] = r - 2 * np.pi * np.round(np.mean(r[trusted_c]) / (2 * np.pi))
    d = _solve(_fill_nearest(unwrapped, ~valid) if valid.any() else np.zeros_like(unwrapped), q)
    rows_c = (grid.step * np.arange(grid.coarse_shape[0], dtype=float))[:, None] - d[1] / pixel_size[0]
    cols_c = (grid.step * np.arange(grid.coarse_shape[1], dtype=float))[None, :] - d[0] / pixel_size[1]
    return _Field(grid, d + field.at(rows_c, cols_c), ~valid)


def _check_lazy_image(image, name="image"):
    if image.ndim != 2 or min(image.shape) < 2:
        raise InputError(f"{name} must be a 2-D image (row, col), got shape {tuple(image.shape)}")
    if np.dtype(image.dtype).kind not in "biuf":
        raise InputError(f"{name} must hold real numbers, got dtype {image.dtype}")
    return image


def _correct_drift_lazy(image, q, grid, sigma_nm, pixel_size, mask, max_iter, tol_rad, translation, order, settings):
    """:func:`correct_drift` of a dask image, with no full-size array in memory.

    Each pass reads the image once, chunk by chunk: the lock-ins are decimated to the grid's step
    (lossless, :func:`domains.lossless_step`) as the chunks are read; the resampled chunks
    (:func:`_apply_chunked`) go straight into them. What stays in memory is the grid: the lock-ins,
    the field and its spline. The trusted pixels and the statistics over them are computed block of
    rows by block of rows from the field (where r - u(r) leaves the frame) and, only when the image
    has NaN or ``mask`` is given, from the input's bad pixels (one full-size boolean array then).
    """
    import dask
    import dask.array as da

    shape = tuple(int(n) for n in image.shape)
    out_dtype = _out_dtype(image.dtype)
    a0, any_bad = dask.compute(
        lockin(image.astype(np.float32), q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=mask, step=grid.step),
        da.any(~da.isfinite(image)))
    input_bad = np.asarray((~da.isfinite(image)).compute()) if any_bad else None
    if mask is not None and mask.any():
        input_bad = mask.copy() if input_bad is None else (input_bad | mask)
    halo_rows = _trusted_halo(sigma_nm, pixel_size)[0]
    block = max(4 * halo_rows, grid.block_rows())

    def trusted_region(bad_rows):
        return _Region(shape, lambda r0, r1: _trusted_rows(bad_rows, shape, sigma_nm, pixel_size, r0, r1), block)

    in_bad = None if input_bad is None else (lambda a, b: input_bad[a:b])
    fallback = _Region(shape, (lambda a, b: np.ones((b - a, shape[1]), bool)) if input_bad is None
                       else (lambda a, b: ~input_bad[a:b]))
    field, theta0, trusted0, target = _measure_from(a0, q, grid, trusted_region(in_bad), fallback, translation)
    sum_mean, sum_rms = _phase_sum(theta0, q, trusted0 & np.all(np.isfinite(theta0), axis=0))
    del a0, theta0, trusted0  # the grid's arrays are the memory of a lazy run: keep only the field

    def one_pass(field):
        shift = field.largest_shift(pixel_size)
        corrected = _apply_chunked(image, field.window, shift, pixel_size, order, out_dtype, carried=input_bad,
                                   nan_carried=True)
        # NaN where the in-memory pass masks (left the frame, input's bad pixels carried along): the
        # lock-in leaves NaN out as it leaves masked pixels out.
        a = np.asarray(lockin(corrected.astype(np.float32), q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size,
                              step=grid.step).compute())
        trusted = _trusted_less_invalid(grid, a, trusted_region(_bad_rows(field, input_bad, pixel_size, shape)))
        rms, largest, trusted_c, count = _residual_stats_region(grid, a, target, trusted)
        worst = float(np.max(largest)) if count else np.inf
        return worst, rms, largest, a, trusted_c, None

    worst, iterations, field, a, rms, largest, _ = _iterate(field, one_pass, max_iter, tol_rad, grid, target, q,
                                                            pixel_size)
    settings["target_phase_rad"] = np.asarray(target, dtype=float)
    bad_rows = _bad_rows(field, input_bad, pixel_size, shape)
    trusted = _trusted_less_invalid(grid, a, trusted_region(bad_rows))
    row_chunks = image.chunks[0]
    corrected = _apply_chunked(image, field.window, field.largest_shift(pixel_size), pixel_size, order, out_dtype)
    return _LazyDriftResult(
        corrected=corrected,
        outside=_lazy_rows(_bad_rows(field, None, pixel_size, shape), shape, row_chunks),
        mask=_lazy_rows(bad_rows, shape, row_chunks),
        trusted=_lazy_rows(trusted.rows, shape, row_chunks),
        u_coarse_nm=field.samples,
        lockin_coarse=a,
        residual_rms_rad=rms,
        residual_max_rad=largest,
        phase_sum_mean_rad=sum_mean,
        phase_sum_rms_rad=sum_rms,
        iterations=iterations,
        converged=bool(worst < tol_rad),
        **settings,
    )


def _check_drift(drift):
    if not isinstance(drift, DriftResult):
        raise InputError(f"drift must be a DriftResult from correct_drift, got {type(drift).__name__}")


def correct_channels(images, drift, *, pixel_size_nm=None, order=3):
    """Apply the displacement of a drift correction to other channels of the same scan.

    Every channel and bias of one scan shares the drift, so the field found on
    the topograph straightens them all [1]_. The field comes from the drift
    result's decimated grid block of rows by block of rows (see
    :func:`straighten_rows`); only the outputs are full size. Dask channels
    stay lazy and are resampled chunk by chunk (each chunk with a halo of the
    largest displacement plus the spline support).

    Parameters
    ----------
    images : array_like, dask array, Scan, or dict of them
        One image (row, col), a stack (..., row, col) such as an (energy, row,
        col) grid, a :class:`domains.Scan`, or a dict of any of these (for
        example ``{"topography": t, "conductance": g}``).
    drift : DriftResult
        The result of :func:`correct_drift` on a frame of the same shape.
    pixel_size_nm : float or (float, float), optional
        Pixel size of the channels in nm; it must match the drift result's
        (a Scan's own pixel size is checked too). Default: the drift result's.
    order : int
        Spline order of the resampling.

    Returns
    -------
    Same kind as ``images``
        Corrected arrays (NaN where the source point left the frame; float32
        stays float32, anything else becomes float64), or Scans whose mask
        also covers those pixels.

    Raises
    ------
    InputError
        If ``drift`` is not a DriftResult, a channel's frame differs from the
        drift's, or the pixel sizes disagree.

    References
    ----------
    .. [1] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> import numpy as np
    >>> n = 64
    >>> y, x = np.mgrid[:n, :n].astype(float)
    >>> q = 2 * np.pi * np.array([[8, 0], [-4, 7], [-4, -7]]) / n
    >>> ux = 0.5 * np.sin(2 * np.pi * y / n)
    >>> topo = sum(np.cos(qx * (x + ux) + qy * y) for qx, qy in q)
    >>> drift = correct_drift(topo, q, sigma_nm=6.0, pixel_size_nm=1.0)
    >>> out = correct_channels({"conductance": 2 * topo + 1}, drift)
    >>> bool(np.allclose(out["conductance"], 2 * drift.corrected + 1, equal_nan=True))
    True
    """
    _check_drift(drift)
    order = _check_order(order)
    if pixel_size_nm is not None:
        pixel_size = pixel_size_pair(pixel_size_nm)
        if not np.allclose(pixel_size, drift.pixel_size_nm, rtol=1e-9):
            raise InputError(
                f"pixel_size_nm {pixel_size} differs from the drift result's {drift.pixel_size_nm}"
            )
    field = drift._field

    def one(item, name):
        if isinstance(item, Scan):
            if not np.allclose(item.pixel_size_nm, drift.pixel_size_nm, rtol=1e-9):
                raise InputError(
                    f"{name}: pixel size {item.pixel_size_nm} nm differs from the drift result's {drift.pixel_size_nm}"
                )
            data = one(item.data, name)
            mask = drift.outside.copy()
            if item.mask is not None:
                moved = _straighten(None, field.rows, drift.pixel_size_nm, 1, np.float64,
                                    carried=np.asarray(item.mask, dtype=bool), shape=drift.shape)[2]
                mask |= moved
            return item.with_data(data, mask=mask)
        data = item if _is_dask(item) or isinstance(item, np.ndarray) else np.asarray(item)
        if data.ndim < 2 or tuple(data.shape[-2:]) != drift.shape:
            raise InputError(f"{name}: frame {tuple(data.shape[-2:])} differs from the drift result's {drift.shape}")
        if data.dtype.kind not in "biuf":
            raise InputError(f"{name} must hold real numbers, got dtype {data.dtype}")
        if _is_dask(data):
            # Chunk by chunk, each chunk reading its halo (no whole planes in memory).
            return _apply_chunked(data, field.window, field.largest_shift(drift.pixel_size_nm), drift.pixel_size_nm,
                                  order, _out_dtype(data.dtype))
        return _apply(data, field.rows, drift.pixel_size_nm, order)[0]

    if isinstance(images, dict):
        return {key: one(value, f"images[{key!r}]") for key, value in images.items()}
    return one(images, "images")


def straighten_rows(image, drift, start, stop, *, order=3):
    """Drift-correct rows ``start:stop`` of a frame, or of every plane of a stack, reading only the rows they need.

    The displacement of those rows comes from the cubic spline of the drift
    result's decimated grid (:class:`DriftResult` keeps it); the source rows read
    are at most ``drift.overlap_rows(order)`` beyond the block on either side:
    the largest displacement along the rows, the spline support, and 24 rows
    after which the spline prefilter has forgotten the cut (|sqrt 3 - 2|^24 =
    2e-14 [1]_). Blocks of any size therefore give the whole-frame result of
    :func:`correct_channels` to float32 precision and better, so a frame larger
    than memory (a memmap, zarr or HDF5 array, which are only sliced) can be
    corrected block by block.

    Parameters
    ----------
    image : (..., row, col) array
        The channel(s) of the drift's frame; anything that slices as
        ``image[..., a:b, :]`` (numpy, memmap, zarr, HDF5, dask).
    drift : DriftResult
        The result of :func:`correct_drift` on a frame of the same shape.
    start, stop : int
        The output rows, 0 <= start <= stop <= row.
    order : int
        Spline order of the resampling, 0 to 5.

    Returns
    -------
    ndarray, shape (..., stop - start, col)
        The corrected rows; float32 stays float32, anything else becomes
        float64; NaN where the source point left the frame.

    Raises
    ------
    InputError
        If ``drift`` is not a DriftResult, the frame differs from the drift's,
        or ``start``/``stop``/``order`` are out of range.

    References
    ----------
    .. [1] M. Unser, "Splines: a perfect fit for signal and image processing",
       IEEE Signal Process. Mag. 16(6), 22 (1999). doi:10.1109/79.799930
    .. [2] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> import numpy as np
    >>> n = 64
    >>> y, x = np.mgrid[:n, :n].astype(float)
    >>> q = 2 * np.pi * np.array([[8, 0], [-4, 7], [-4, -7]]) / n
    >>> topo = sum(np.cos(qx * (x + 0.5 * np.sin(2 * np.pi * y / n)) + qy * y) for qx, qy in q)
    >>> drift = correct_drift(topo, q, sigma_nm=6.0, pixel_size_nm=1.0)
    >>> blocks = [straighten_rows(topo, drift, r, min(n, r + 10)) for r in range(0, n, 10)]
    >>> bool(np.allclose(np.concatenate(blocks), drift.corrected, rtol=0, atol=1e-12, equal_nan=True))
    True
    """
    _check_drift(drift)
    order = _check_order(order)
    shape = tuple(np.shape(image)) if not hasattr(image, "shape") else tuple(image.shape)
    if len(shape) < 2 or shape[-2:] != drift.shape:
        raise InputError(f"image: frame {shape[-2:]} differs from the drift result's {drift.shape}")
    for name, value in (("start", start), ("stop", stop)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
            raise InputError(f"{name} must be an integer row, got {value!r}")
    if not 0 <= start <= stop <= shape[-2]:
        raise InputError(f"rows start={start}, stop={stop} must satisfy 0 <= start <= stop <= {shape[-2]}")
    source = image if hasattr(image, "shape") and hasattr(image, "dtype") else np.asarray(image)
    if np.dtype(source.dtype).kind not in "biuf":
        raise InputError(f"image must hold real numbers, got dtype {source.dtype}")
    out_dtype = _out_dtype(source.dtype)
    return _straighten(source, drift._field.rows, drift.pixel_size_nm, order, out_dtype,
                       first=int(start), stop=int(stop))[0]
