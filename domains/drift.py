"""Lawler–Fujita drift correction: measure a lattice's slowly varying displacement from its Bragg-peak phases and undo it.

The topograph of a lattice distorted by piezo drift and creep is modelled as
T(r) = sum_j cos(Q_j . (r + u(r))), with Q_j the ideal Bragg vectors and u(r)
slowly varying [1]_. The spatial lock-in at Q_j gives theta_j(r) = Q_j . u(r)
(modulo 2 pi); u follows by least squares over the peaks, and the image is
resampled as T'(r) = T(r - u(r)). The same u straightens every channel and
bias of the same scan.

Sign convention: ``u`` here is the shift of the *sampling point*, T(r) = f(r + u).
Geometric phase analysis [2]_ describes the same distortion by the shift of the
*atoms*, I(r) = f(r - u_GPA), so u = -u_GPA.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage
from skimage.restoration import unwrap_phase

from ._errors import InputError
from ._lockin import _as_q_array, lockin, trusted_mask
from ._scan import Scan, _is_dask, pixel_size_pair

__all__ = ["DriftResult", "apply_displacement", "correct_channels", "correct_drift", "displacement_field"]

TRANSLATIONS = ("remove", "lattice")

#: Three Bragg vectors whose signed sum is shorter than this fraction of the
#: shortest one are taken as a closed triple (hexagonal), for the phase-sum check.
_CLOSURE_FRACTION = 0.25


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


def _measure(image, q, sigma_nm, pixel_size, mask, translation):
    """First pass: lock-in, unwrap, least squares. Returns u (2, row, col) nm and bookkeeping."""
    a = lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=mask)
    theta = np.angle(a)
    valid = np.all(np.isfinite(a), axis=0)
    if mask is not None:
        valid &= ~mask
    trusted = trusted_mask(image.shape, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=~valid)
    region = trusted if trusted.any() else valid
    if not region.any():
        raise InputError("image: no valid pixels left for the lock-in (all NaN or masked)")
    unwrapped = np.stack([_unwrap(t, valid) for t in theta])
    mean = np.array([np.mean(t[region]) for t in unwrapped])
    u = _solve(unwrapped - mean[:, None, None], q)
    target = _target_phases(q, mean, translation)
    if translation == "lattice":
        u += _lattice_translation(q, mean, target)[:, None, None]
    return u, theta, trusted, target


def displacement_field(image, bragg_q, *, sigma_nm, pixel_size_nm, mask=None, translation="remove"):
    """Displacement field u(r) of a distorted lattice from the lock-in phases of its Bragg peaks.

    The image is modelled as T(r) = sum_j cos(Q_j . (r + u(r))) [1]_. The
    lock-in at each ideal Bragg vector Q_j gives theta_j = Q_j . u (plus a
    constant); the phases are unwrapped (so that |Q_j . u| > pi does not tear
    the field) and u is solved per pixel by least squares,
    u = (M^T M)^-1 M^T theta with the Q_j as the rows of M.

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
        region, so correcting with it straightens the lattice without moving
        it as a whole. "lattice": keep the translation that puts the ideal
        lattice's origin at pixel (0, 0), i.e. every Bragg phase of the
        corrected image is zero there (for a closed triple of hexagonal peaks,
        a third of their phase sum, which no displacement can change). Only
        this choice is defined modulo a lattice vector; the smallest is given.

    Returns
    -------
    u : ndarray, shape (2, row, col)
        (ux, uy) in nm; NaN where the lock-in has no valid neighbours.

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
    u, _, _, _ = _measure(image.astype(float), q, sigma_nm, pixel_size, mask, translation)
    return u


def _check_mask(mask, shape, name="mask"):
    if mask is None:
        return None
    mask = np.asarray(mask, dtype=bool)
    if mask.shape != tuple(shape[-2:]):
        raise InputError(f"{name} shape {mask.shape} differs from the image shape {tuple(shape[-2:])}")
    return mask


def _source_coordinates(u, pixel_size):
    """Pixel coordinates (row, col) of r - u(r), and where they leave the frame."""
    dy, dx = pixel_size
    ny, nx = u.shape[-2:]
    rows = np.arange(ny, dtype=float)[:, None] - u[1] / dy
    cols = np.arange(nx, dtype=float)[None, :] - u[0] / dx
    tol = 1e-6
    with np.errstate(invalid="ignore"):
        outside = ~(np.isfinite(rows) & np.isfinite(cols))
        outside |= (rows < -tol) | (rows > ny - 1 + tol) | (cols < -tol) | (cols > nx - 1 + tol)
    rows = np.where(outside, 0.0, rows)
    cols = np.where(outside, 0.0, cols)
    return np.stack([rows, cols]), outside


def _resample_plane(plane, coords, outside, order):
    """One 2-D plane sampled at coords; NaN outside the frame and next to NaN source pixels."""
    out_dtype = plane.dtype if plane.dtype in (np.float32, np.float64) else np.float64
    plane = plane.astype(float)
    bad = ~np.isfinite(plane)
    if bad.all():
        return np.full(coords.shape[1:], np.nan, dtype=out_dtype)
    if bad.any():
        # The spline prefilter is global: a single NaN would spread over the whole image.
        plane = np.where(bad, np.mean(plane[~bad]), plane)
    out = ndimage.map_coordinates(plane, coords, order=order, mode="nearest")
    if bad.any():
        reach = ndimage.map_coordinates(bad.astype(float), coords, order=1, mode="nearest")
        out[reach > 1e-9] = np.nan
    out[outside] = np.nan
    return out.astype(out_dtype)


def apply_displacement(image_or_stack, u, *, pixel_size_nm, order=3):
    """Resample an image, or every plane of a stack, as T'(r) = T(r - u(r)).

    The spline interpolation of :func:`scipy.ndimage.map_coordinates` is
    evaluated at r - u(r) for every output pixel r; the same field is used for
    every plane of a stack (the channels or biases of one scan, or the energy
    slices of an (energy, row, col) grid).

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
        NaN, and next to NaN pixels of the input.
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
    if isinstance(order, bool) or not isinstance(order, (int, np.integer)) or not 0 <= order <= 5:
        raise InputError(f"order must be an integer from 0 to 5, got {order!r}")
    coords, outside = _source_coordinates(u, pixel_size)
    out_dtype = np.float32 if data.dtype == np.float32 else np.float64

    def planes(block):
        flat = np.asarray(block).reshape((-1,) + block.shape[-2:])
        out = np.stack([_resample_plane(p, coords, outside, order) for p in flat]) if len(flat) else flat.astype(out_dtype)
        return out.reshape(block.shape).astype(out_dtype)

    if lazy:
        # Each task needs whole planes: the resampling moves pixels across chunk borders.
        whole = data.rechunk(data.chunks[:-2] + ((data.shape[-2],), (data.shape[-1],)))
        return whole.map_blocks(planes, dtype=out_dtype), outside
    return planes(data), outside


@dataclass
class DriftResult:
    """The outcome of :func:`correct_drift`.

    Attributes
    ----------
    corrected : ndarray
        The drift-corrected image, NaN where the source point left the frame.
    u_nm : ndarray, shape (2, row, col)
        The total displacement (ux, uy) in nm; apply it to other channels with
        :func:`correct_channels`. Opposite in sign to the GPA displacement.
    outside : ndarray of bool
        True where r - u(r) left the frame.
    mask : ndarray of bool
        Untrusted pixels of the corrected frame: ``outside``, NaN, and the
        input mask carried along by the correction.
    trusted : ndarray of bool
        Where the residual is measured: at least 2.5 sigma from the frame edge
        and from ``mask``.
    residual_phase_rad : ndarray, shape (k, row, col)
        Bragg phases of the corrected image less their targets, wrapped.
    residual_rms_rad, residual_max_rad : ndarray, shape (k,)
        RMS and largest |residual| of each peak over ``trusted``.
    phase_sum_mean_rad, phase_sum_rms_rad : float or None
        For three peaks forming a closed triple (sum_j c_j Q_j = 0 with
        c_j = +-1, as for a hexagonal lattice), the circular mean and the RMS
        spread of the wrapped sum sum_j c_j theta_j over the trusted region of
        the *input* image. The sum is unchanged by any displacement, so a
        spread well above the phase noise means the peaks do not belong to one
        lattice (a wrong or misplaced peak). None for other peak sets.
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
    u_nm: np.ndarray
    outside: np.ndarray
    mask: np.ndarray
    trusted: np.ndarray
    residual_phase_rad: np.ndarray
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
    def note(self) -> str:
        """A sentence for reports: the corrected lattice has exactly the Bragg vectors used."""
        periods = ", ".join(f"{2 * np.pi / np.hypot(*qj):.5g}" for qj in self.bragg_q_rad_per_nm)
        how = "rounded to integer FFT bins of the frame" if self.snapped_to_pixels else "used as given"
        return (
            f"Drift correction imposes the Bragg vectors ({how}): the corrected lattice has exactly "
            f"the Bragg-plane spacings 2 pi / |Q| = {periods} nm and their orientation, whatever the true lattice constant is."
        )


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
    the trusted region is below ``tol_rad``, ``max_iter`` passes are done, or
    a pass fails to shrink it by 10 % (the noise floor). The pass with the
    smallest residual is returned.

    Parameters
    ----------
    image : (row, col) array_like
        Topograph showing the lattice (read into memory).
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
        trusted region. With noisy data the noise sets the floor.
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
        Corrected image, total displacement, residual phases and their
        statistics, the hexagonal phase-sum check and the settings used.

    Raises
    ------
    InputError
        For a bad image, peaks, mask, sigma, pixel size, ``max_iter``,
        ``tol_rad`` or ``translation``.

    Notes
    -----
    The recovered u of a single pass is G_sigma * u_true; the iteration also
    restores part of the detail the Gaussian removed, where the lattice signal
    allows it. ``u_nm`` has the opposite sign of the displacement of geometric
    phase analysis [2]_.

    References
    ----------
    .. [1] M. J. Lawler et al., "Intra-unit-cell electronic nematicity of the
       high-Tc copper-oxide pseudogap states", Nature 466, 347 (2010).
       doi:10.1038/nature09169
    .. [2] M. J. Hÿtch, E. Snoeck, R. Kilaas, Ultramicroscopy 74, 131 (1998).
       doi:10.1016/S0304-3991(98)00035-7

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
    """
    _check_translation(translation)
    image = _check_image(image).astype(float)
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
    if snap_to_pixels:
        q = _snap(q, image.shape, pixel_size)
        _check_bragg(q)
    u, theta0, trusted0, target = _measure(image, q, sigma_nm, pixel_size, mask, translation)
    sum_mean, sum_rms = _phase_sum(theta0, q, trusted0)
    input_bad = ~np.isfinite(image) if mask is None else (~np.isfinite(image) | mask)

    best = None
    for iteration in range(1, max_iter + 1):
        corrected, outside = apply_displacement(image, u, pixel_size_nm=pixel_size, order=order)
        moved_bad = apply_displacement(input_bad.astype(float), u, pixel_size_nm=pixel_size, order=1)[0]
        bad = outside | ~np.isfinite(corrected) | ~(moved_bad < 1e-9)
        a = lockin(np.where(bad, np.nan, corrected), q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=bad)
        residual = _wrap(np.angle(a) - target[:, None, None])
        trusted = trusted_mask(image.shape, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=bad)
        trusted &= np.all(np.isfinite(residual), axis=0)
        worst = float(np.max(np.abs(residual[:, trusted]))) if trusted.any() else np.inf
        stalled = best is not None and worst > 0.9 * best[0]
        if best is None or worst < best[0]:
            best = (worst, iteration, corrected, u, outside, bad, trusted, residual)
        # Once noise sets the floor, further passes only fit the correction to the noise.
        if worst < tol_rad or iteration == max_iter or stalled:
            break
        valid = np.all(np.isfinite(a), axis=0) & ~bad
        # Residuals are small after the first pass, but unwrap anyway: a pass can overshoot.
        unwrapped = np.stack([_unwrap(r, valid) for r in residual])
        for j, r in enumerate(unwrapped):
            if trusted.any():
                unwrapped[j] = r - 2 * np.pi * np.round(np.nanmean(r[trusted]) / (2 * np.pi))
        d = np.nan_to_num(_solve(unwrapped, q))
        # Compose: u_new(r) = d(r) + u(r - d(r)).
        coords, _ = _source_coordinates(d, pixel_size)
        u = d + np.stack([ndimage.map_coordinates(np.nan_to_num(c), coords, order=1, mode="nearest") for c in u])
        u[:, ~np.all(np.isfinite(a), axis=0) & ~bad] = np.nan

    worst, iteration, corrected, u, outside, bad, trusted, residual = best
    stats = residual[:, trusted] if trusted.any() else np.full((len(q), 1), np.nan)
    return DriftResult(
        corrected=corrected,
        u_nm=u,
        outside=outside,
        mask=bad,
        trusted=trusted,
        residual_phase_rad=residual,
        residual_rms_rad=np.sqrt(np.mean(stats**2, axis=1)),
        residual_max_rad=np.max(np.abs(stats), axis=1),
        phase_sum_mean_rad=sum_mean,
        phase_sum_rms_rad=sum_rms,
        bragg_q_rad_per_nm=q,
        snapped_to_pixels=bool(snap_to_pixels),
        iterations=iteration,
        converged=bool(worst < tol_rad),
        sigma_nm=float(sigma_nm),
        pixel_size_nm=pixel_size,
        translation=translation,
    )


def correct_channels(images, drift, *, pixel_size_nm=None, order=3):
    """Apply the displacement of a drift correction to other channels of the same scan.

    Every channel and bias of one scan shares the drift, so the field found on
    the topograph straightens them all [1]_.

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
        Corrected arrays (NaN where the source point left the frame), or Scans
        whose mask also covers those pixels.

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
    if not isinstance(drift, DriftResult):
        raise InputError(f"drift must be a DriftResult from correct_drift, got {type(drift).__name__}")
    if pixel_size_nm is not None:
        pixel_size = pixel_size_pair(pixel_size_nm)
        if not np.allclose(pixel_size, drift.pixel_size_nm, rtol=1e-9):
            raise InputError(
                f"pixel_size_nm {pixel_size} differs from the drift result's {drift.pixel_size_nm}"
            )

    def one(item, name):
        if isinstance(item, Scan):
            if not np.allclose(item.pixel_size_nm, drift.pixel_size_nm, rtol=1e-9):
                raise InputError(
                    f"{name}: pixel size {item.pixel_size_nm} nm differs from the drift result's {drift.pixel_size_nm}"
                )
            data = one(item.data, name)
            mask = drift.outside.copy()
            if item.mask is not None:
                moved = apply_displacement(item.mask.astype(float), drift.u_nm, pixel_size_nm=drift.pixel_size_nm, order=1)[0]
                mask |= ~(moved < 1e-9)
            return item.with_data(data, mask=mask)
        shape = tuple(item.shape) if _is_dask(item) else np.shape(item)
        if tuple(shape[-2:]) != drift.u_nm.shape[1:]:
            raise InputError(f"{name}: frame {tuple(shape[-2:])} differs from the drift result's {drift.u_nm.shape[1:]}")
        return apply_displacement(item, drift.u_nm, pixel_size_nm=drift.pixel_size_nm, order=order)[0]

    if isinstance(images, dict):
        return {key: one(value, f"images[{key!r}]") for key, value in images.items()}
    return one(images, "images")

