"""Compare maps of one area at several biases: registration, per-domain contrast, phase shifts, inversion verdicts."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage, stats

from ._checks import positive
from ._errors import InputError
from ._lockin import choose_sigma, lockin, lossless_step, trusted_mask
from ._scan import Scan, _is_dask, pixel_size_pair

__all__ = [
    "BiasComparison",
    "ContrastVerdict",
    "ContrastSet",
    "DomainPhaseShift",
    "ElectronicContrast",
    "ElectronicTypes",
    "Fingerprints",
    "Registration",
    "apply_shift",
    "classify_contrast",
    "compare_biases",
    "domain_contrast",
    "default_normalisation",
    "domain_electronic_contrast",
    "electronic_types",
    "fingerprint_peaks",
    "grid_electronic_contrast",
    "grid_fingerprints",
    "phase_difference",
    "phase_shifts",
    "register",
    "undo_displacement",
]

#: Systematic allowance added in quadrature to the statistical error of every
#: per-component phase shift before testing 0 or pi: registration error times |q|,
#: setpoint effects, residual drift. 10 degrees is a judgement (common practice, no source).
DEFAULT_TOLERANCE_RAD = math.radians(10.0)

VERDICTS = ("inverted", "not inverted", "dephased", "shifted", "undetermined")


# --------------------------------------------------------------------------- helpers


def _wrap(angle):
    """Wrap angles to (-pi, pi]."""
    return -((-np.asarray(angle) + np.pi) % (2 * np.pi) - np.pi)


def _image(array, name, *, ndim=2):
    """A real numpy float array of the expected number of dimensions, or InputError.

    float32 and float64 are kept (no copy); other real types become float64.
    """
    if isinstance(array, Scan):
        array = array.data
    if _is_dask(array):
        array = array.compute()
    try:
        array = np.asarray(array)
    except Exception as err:  # noqa: BLE001 - any conversion failure is bad input
        raise InputError(f"{name} could not be read as an array: {err}") from None
    if array.ndim != ndim:
        raise InputError(f"{name} must be a {ndim}-D array, got shape {tuple(array.shape)}")
    if array.dtype.kind not in "biuf":
        raise InputError(f"{name} must hold real numbers, got dtype {array.dtype}")
    return array if array.dtype in (np.float32, np.float64) else array.astype(float)


def _labels(labels, shape):
    labels = np.asarray(labels)
    if labels.shape != tuple(shape):
        raise InputError(f"labels shape {labels.shape} differs from the image shape {tuple(shape)}")
    if labels.dtype.kind not in "iu":
        raise InputError(f"labels must be integers (0 = wall or unassigned, 1..N domains), got dtype {labels.dtype}")
    if labels.size and labels.min() < 0:
        raise InputError(f"labels must be >= 0 (0 = wall or unassigned), got a minimum of {labels.min()}")
    return labels.astype(np.int64)


def _label_ids(labels):
    """The domain labels present (> 0), ascending (a count per label, not a sort of every pixel)."""
    counts = np.bincount(labels.ravel()) if labels.size else np.zeros(1, np.int64)
    return np.flatnonzero(counts[1:]) + 1


def _mask(mask, shape):
    if mask is None:
        return np.zeros(shape, dtype=bool)
    mask = np.asarray(mask)
    if mask.shape != tuple(shape):
        raise InputError(f"mask shape {mask.shape} differs from the image shape {tuple(shape)}")
    return mask.astype(bool)


def _q(q, name="q"):
    q = np.asarray(q, dtype=float)
    if q.ndim == 1:
        q = q[None, :]
    if q.ndim != 2 or q.shape[1] != 2 or q.shape[0] < 1:
        raise InputError(f"{name} must be (qx, qy) or an array of shape (k, 2) in rad/nm, got shape {q.shape}")
    if not np.all(np.isfinite(q)) or np.any(np.hypot(*q.T) == 0):
        raise InputError(f"{name} must hold finite, nonzero wavevectors, got {q.tolist()}")
    return q


def _fill_invalid(image, invalid):
    """Replace invalid pixels by the mean of the valid ones, so FFTs and splines stay finite."""
    if not invalid.any():
        return image
    out = image.copy()
    out[invalid] = image[~invalid].mean() if (~invalid).any() else 0.0
    return out


def _interior_labels(labels, *, sigma_nm, pixel_size, mask, margin_sigma):
    """Domain labels kept only where the lock-in sees one domain alone.

    A pixel is kept when the boundary of its label (the crack between it and a pixel of
    another label, walls included, a masked pixel or the frame edge) is at least
    ``margin_sigma`` sigma away: the lock-in's Gaussian then draws less than
    0.5 erfc(margin/sqrt 2) of its weight from beyond a straight wall (0.6 % at
    2.5 sigma; derived). One distance transform serves every label: the distance d to
    the nearest pixel that touches another label (4-neighbours) plus half a pixel is the
    distance to the crack, exact along the axes and within 0.3 pixel otherwise (derived).
    """
    dy, dx = pixel_size
    lab = np.where(mask, -1, labels) if mask.any() else labels
    lab = np.pad(lab, 1, constant_values=-1)  # the frame edge and masked pixels count as another label
    edge = np.zeros(lab.shape, dtype=bool)
    d = lab[1:] != lab[:-1]
    edge[1:] |= d
    edge[:-1] |= d
    d = lab[:, 1:] != lab[:, :-1]
    edge[:, 1:] |= d
    edge[:, :-1] |= d
    dist = ndimage.distance_transform_edt(~edge, sampling=(dy, dx))[1:-1, 1:-1]
    keep = (labels > 0) & (dist + 0.5 * min(dy, dx) >= margin_sigma * sigma_nm)
    if mask.any():
        keep &= ~mask
    return np.where(keep, labels, 0)


def _working_step(sigma_nm, pixel_size):
    """Step s of the working grid: every s-th pixel along rows and columns.

    Every statistic here is a weighted mean of a field smoothed by a Gaussian of width
    sigma (a lock-in field, a smoothed map), whose spectrum is below 1e-6 beyond about
    5.3 / sigma, so samples every s <= pi sigma / 5.3 (about 0.6 sigma) hold all of it
    (sampling theorem; :func:`domains.lossless_step`), and the lock-in gives exactly the
    full-resolution values there (``lockin(..., step=s)``). A grid already that coarse
    gives s = 1: the statistics then use the pixels as given.
    """
    return lossless_step(sigma_nm, pixel_size)


def _decimate(labels, bad, step):
    """Labels at the working grid's pixels (s m, s n), and the mask there: True when any input
    pixel nearer to that sample than to any other is untrusted."""
    if step == 1:
        return labels, bad
    labels_c = np.ascontiguousarray(labels[::step, ::step])
    if not bad.any():
        return labels_c, np.zeros(labels_c.shape, dtype=bool)
    size = 2 * (step // 2) + 1  # the samples' cells, ties on both sides
    rows = ndimage.maximum_filter1d(bad.view(np.uint8), size, axis=0, mode="constant")[::step]
    both = ndimage.maximum_filter1d(rows, size, axis=1, mode="constant")[:, ::step]
    return labels_c, both.astype(bool)


#: The correlation kernel below is cut where it falls below this (its tail changes a variance by less).
_RHO_CUT = 1e-8


def _rho_kernels(sigma_nm, pixel_size):
    """Per axis, rho(m) = exp(-(m d)^2 / (4 sigma^2)) for the pixel offsets m where it exceeds 1e-8.

    A field smoothed by a unit-sum Gaussian of width sigma from white noise has the
    correlation exp(-r^2 / 4 sigma^2) between points r apart (derived: the autocorrelation
    of a Gaussian is a Gaussian of width sigma sqrt 2); it is separable in rows and columns.
    Evaluated at the actual pixel offsets, it holds on any grid: the input pixels, the
    working grid, or input maps already averaged over blocks of about sigma / 2.
    """
    out = []
    for d in pixel_size:
        half = int(math.ceil(2 * sigma_nm * math.sqrt(math.log(1 / _RHO_CUT)) / d))
        m = np.arange(-half, half + 1)
        out.append(np.exp(-((m * d) ** 2) / (4 * sigma_nm**2)))
    return tuple(out)


def _rho_filter(w, kernels):
    """rho * w (correlation with the separable kernel, zero outside the array)."""
    out = ndimage.correlate1d(w, kernels[0], axis=0, mode="constant")
    return ndimage.correlate1d(out, kernels[1], axis=1, mode="constant")


def _quad_form(rows, cols, weights, kernels, tile=128):
    """sum_{p, p'} w_p w_p' rho(p - p') over distinct pixels p: the variance of sum_p w_p F(p)
    in units of the field's pixel variance s_F^2 (F with correlation rho; derived).

    rho * w is needed only where w is nonzero: on the bounding box when the pixels fill it,
    else tile by tile, each tile with a margin of the kernel's reach (a long diagonal band).
    """
    if rows.size == 0:
        return 0.0
    hy, hx = len(kernels[0]) // 2, len(kernels[1]) // 2
    r0, c0 = int(rows.min()), int(cols.min())
    height, width = int(rows.max()) - r0 + 1, int(cols.max()) - c0 + 1
    if height * width <= 4 * (rows.size + (tile + 2 * hy) * (tile + 2 * hx)):
        w = np.zeros((height, width))
        w[rows - r0, cols - c0] = weights
        return float(np.sum(w * _rho_filter(w, kernels)))
    tr, tc = (rows - r0) // tile, (cols - c0) // tile
    key = tr * (width // tile + 1) + tc
    total = 0.0
    for k in np.unique(key):
        own = key == k
        a0 = r0 + int(tr[own][0]) * tile - hy
        b0 = c0 + int(tc[own][0]) * tile - hx
        a1, b1 = a0 + tile + 2 * hy, b0 + tile + 2 * hx
        near = (rows >= a0) & (rows < a1) & (cols >= b0) & (cols < b1)
        w = np.zeros((a1 - a0, b1 - b0))
        w[rows[near] - a0, cols[near] - b0] = weights[near]
        f = _rho_filter(w, kernels)
        total += float(np.sum(weights[own] * f[rows[own] - a0, cols[own] - b0]))
    return total


def _independent_areas(weight_sum, weight_sq_sum, sigma_nm, pixel_size):
    """Number of statistically independent samples in a weighted mean of a lock-in field.

    The lock-in of white noise has the autocorrelation exp(-r^2 / 4 sigma^2), whose
    integral is 4 pi sigma^2 (derived), so a mean over an area S holds about
    S / (4 pi sigma^2) independent samples. Kish's (sum w)^2 / sum w^2 gives the
    effective pixel count of a weighted mean (Kish, Survey Sampling, 1965; from memory).
    """
    dy, dx = pixel_size
    with np.errstate(invalid="ignore", divide="ignore"):
        n_pix = np.where(weight_sq_sum > 0, weight_sum**2 / np.where(weight_sq_sum > 0, weight_sq_sum, 1), 0.0)
    n_eff = n_pix * dy * dx / (4 * math.pi * sigma_nm**2)
    return np.where(n_pix > 0, np.clip(n_eff, 1.0, np.maximum(n_pix, 1.0)), 0.0)


def _sums(index, values, n):
    """Per-label sums of values (real) over pixels with index > 0."""
    return np.bincount(index, weights=values, minlength=n)


# --------------------------------------------------------------------------- registration


@dataclass(frozen=True)
class Registration:
    """The rigid shift that brings a moving image onto a reference image.

    Attributes
    ----------
    shift_px : tuple of float
        (row, col) shift in pixels to apply to the moving image
        (``apply_shift(moving, shift_px)`` lands on the reference), the
        convention of ``skimage.registration.phase_cross_correlation``.
    shift_nm : tuple of float
        The same shift as (x, y) in nm.
    method : str
        "bragg-phase", "cross-correlation" or "phase-correlation".
    residual : float
        For "bragg-phase": the amplitude-weighted RMS, in rad, of the per-pixel
        Bragg phase differences left after the rigid shift (noise plus any
        non-rigid distortion); above about 1 rad the phases are unrelated and
        the shift is not to be trusted. Otherwise: the normalised RMS error
        returned by scikit-image (dimensionless).
    residual_kind : str
        "phase_rms_rad" or "correlation_error".
    contrast_sign : int
        -1 when the Bragg contrast of the moving image is inverted with
        respect to the reference (every Bragg phase differs by pi beyond the
        shift), else +1. Always +1 for correlation, which is blind to the sign.
    coarse_shift_px : tuple of float
        The correlation shift that picked the lattice translation.
    """

    shift_px: tuple
    shift_nm: tuple
    method: str
    residual: float
    residual_kind: str
    contrast_sign: int = 1
    coarse_shift_px: tuple = (0.0, 0.0)

    def to_dict(self) -> dict:
        """JSON-ready dictionary (lengths in px and nm)."""
        return {
            "method": self.method,
            "shift_px": [float(v) for v in self.shift_px],
            "shift_nm_xy": [float(v) for v in self.shift_nm],
            "residual": _json_float(self.residual),
            "residual_kind": self.residual_kind,
            "contrast_sign": int(self.contrast_sign),
            "coarse_shift_px": [float(v) for v in self.coarse_shift_px],
        }


def register(reference, moving, *, pixel_size_nm, bragg_q=None, sigma_nm=None, upsample_factor=100,
             mask=None, coarse_shift_px=None, coarse_sigma_nm=None, displacement_nm=None, normalization=None):
    """Rigid sub-pixel shift between two images of the same area.

    Without ``bragg_q`` the shift is the peak of the cross-correlation,
    upsampled around its maximum [1]_
    (``skimage.registration.phase_cross_correlation``). With ``bragg_q`` it
    comes from the Bragg lock-in phases [2]_: a shift s changes the phase of
    the component at Q_j by theta_j = Q_j . s, so the amplitude-weighted
    circular mean of arg(A_j(moving) conj A_j(reference)) over the trusted
    region gives theta_j, and s follows by least squares over
    the peaks. The Bragg phases fix s only modulo a lattice vector; the
    lattice translation is taken from the correlation (or from
    ``coarse_shift_px``): each theta_j is unwrapped to lie within pi of
    Q_j . s_coarse before the least-squares solve.

    Parameters
    ----------
    reference, moving : (row, col) array_like
        The two images, same shape. NaN pixels count as masked.
    pixel_size_nm : float or (float, float)
        Pixel size in nm, one value or (row, col).
    bragg_q : (k, 2) array_like, optional
        Bragg wavevectors (qx, qy) in rad/nm, at least two non-collinear.
    sigma_nm : float, optional
        Lock-in width for the Bragg phases; default
        ``choose_sigma(bragg_q)`` (1 % leakage).
    upsample_factor : int
        Upsampling of the correlation peak (precision 1/upsample_factor px).
    mask : (row, col) array of bool, optional
        True where pixels are untrusted (in either image).
    coarse_shift_px : (float, float), optional
        A shift known to within a quarter of a lattice period, used instead of
        the correlation to pick the lattice translation, e.g. (0, 0) for
        images recorded in the same scan.
    coarse_sigma_nm : float, optional
        With ``bragg_q``: width of the Gaussian low-pass applied to both images
        before the correlation that picks the lattice translation. Periodic
        patterns correlate equally well at every lattice translation, so only
        the non-periodic content (topographic landscape, defects, domain
        layout) can pick one; the low-pass keeps that content and drops the
        peaks. Default ``choose_sigma(bragg_q)`` (Bragg peaks below 1 %);
        pass a wider one when an order with smaller wavevectors is present.
        Set 0 to correlate the raw images.
    displacement_nm : (2, row, col) array_like, optional
        Displacement field (ux, uy) in nm of the moving image (its own drift),
        undone first with :func:`undo_displacement`.
    normalization : {None, "phase"}
        Passed to scikit-image. None (default): plain cross-correlation,
        weighted by the signal's power. "phase": phase correlation, which
        gives every Fourier bin unit weight; with the white noise of STM
        images the noise bins then outnumber the signal bins and the peak
        can land on a wrong lattice translation (common practice, no source).

    Returns
    -------
    Registration
        The shift (apply it to ``moving`` with :func:`apply_shift`), the
        method and the residual.

    Raises
    ------
    InputError
        If the images are not 2-D, differ in shape, or ``bragg_q`` has fewer
        than two non-collinear wavevectors.

    Notes
    -----
    The correlation is blind to the sign of the contrast (scikit-image
    takes the largest absolute correlation), but when part of the pattern
    inverts and part does not (e.g. a charge order that inverts on a lattice
    that does not) it may prefer a wrong lattice translation. Pass
    ``coarse_shift_px`` when the shift is known to be small.

    References
    ----------
    .. [1] M. Guizar-Sicairos, S. T. Thurman, J. R. Fienup, "Efficient subpixel
       image registration algorithms", Opt. Lett. 33, 156 (2008).
       doi:10.1364/OL.33.000156
    .. [2] M. J. Lawler et al., "Intra-unit-cell electronic nematicity of the
       high-Tc copper-oxide pseudogap states", Nature 466, 347 (2010).
       doi:10.1038/nature09169

    Examples
    --------
    >>> import numpy as np
    >>> from scipy import ndimage
    >>> rng = np.random.default_rng(0)
    >>> ref = ndimage.gaussian_filter(rng.normal(size=(64, 64)), 2, mode="wrap")
    >>> mov = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(ref), (1.3, -0.6))).real
    >>> reg = register(ref, mov, pixel_size_nm=0.1)
    >>> reg.method, [round(v, 1) for v in reg.shift_px]
    ('cross-correlation', [-1.3, 0.6])
    """
    from skimage.registration import phase_cross_correlation

    pixel_size = pixel_size_pair(pixel_size_nm)
    reference = _image(reference, "reference")
    moving = _image(moving, "moving")
    if reference.shape != moving.shape:
        raise InputError(f"moving image shape {moving.shape} differs from the reference shape {reference.shape}")
    if displacement_nm is not None:
        moving = undo_displacement(moving, displacement_nm, pixel_size_nm=pixel_size)
    bad = _mask(mask, reference.shape) | ~np.isfinite(reference) | ~np.isfinite(moving)
    if bad.all():
        raise InputError("register: every pixel is masked or NaN")
    try:
        upsample_factor = int(upsample_factor)
    except (TypeError, ValueError):
        raise InputError(f"upsample_factor must be a positive integer, got {upsample_factor!r}") from None
    if upsample_factor < 1:
        raise InputError(f"upsample_factor must be a positive integer, got {upsample_factor}")
    ref_f, mov_f = _fill_invalid(reference, bad), _fill_invalid(moving, bad)
    if normalization not in (None, "phase"):
        raise InputError(f"normalization must be None or 'phase', got {normalization!r}")
    dy, dx = pixel_size
    if bragg_q is not None:
        bragg_q = _q(bragg_q, "bragg_q")
        if bragg_q.shape[0] < 2 or np.linalg.matrix_rank(bragg_q, tol=1e-9 * np.abs(bragg_q).max()) < 2:
            raise InputError(f"bragg_q needs at least two non-collinear wavevectors, got {bragg_q.tolist()}")
        sigma_nm = choose_sigma(bragg_q)[0] if sigma_nm is None else positive(sigma_nm, "sigma_nm")
        coarse_sigma_nm = choose_sigma(bragg_q)[0] if coarse_sigma_nm is None else float(coarse_sigma_nm)
        if not np.isfinite(coarse_sigma_nm) or coarse_sigma_nm < 0:
            raise InputError(f"coarse_sigma_nm must be >= 0, got {coarse_sigma_nm}")
        if coarse_sigma_nm > 0:
            low = (coarse_sigma_nm / dy, coarse_sigma_nm / dx)
            ref_f, mov_f = ndimage.gaussian_filter(ref_f, low), ndimage.gaussian_filter(mov_f, low)
        # A Hann window keeps the frame's own edges (the same in both images) from
        # pulling the correlation peak towards zero shift.
        window = np.outer(np.hanning(ref_f.shape[0]), np.hanning(ref_f.shape[1]))
        ref_f = (ref_f - ref_f.mean()) * window
        mov_f = (mov_f - mov_f.mean()) * window
    pc_shift, pc_error, _ = phase_cross_correlation(ref_f - ref_f.mean(), mov_f - mov_f.mean(),
                                                    upsample_factor=upsample_factor,
                                                    normalization=normalization)
    pc_shift = (float(pc_shift[0]), float(pc_shift[1]))
    if bragg_q is None:
        method = "phase-correlation" if normalization == "phase" else "cross-correlation"
        return Registration(pc_shift, (pc_shift[1] * dx, pc_shift[0] * dy), method,
                            float(pc_error), "correlation_error", 1, pc_shift)

    if coarse_shift_px is None:
        coarse = pc_shift
    else:
        coarse = tuple(float(v) for v in np.asarray(coarse_shift_px, dtype=float).reshape(2))
    a_ref = lockin(reference, bragg_q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=bad)
    a_mov = lockin(moving, bragg_q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=bad)
    trusted = trusted_mask(reference.shape, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=bad)
    if not trusted.any():
        raise InputError(f"register: no pixel lies 2.5 sigma (sigma_nm = {sigma_nm:g}) from the edge and the mask")
    z = a_mov[:, trusted] * np.conj(a_ref[:, trusted])
    theta = np.angle(z.sum(axis=1))
    coarse_xy = np.array([coarse[1] * dx, coarse[0] * dy])
    predicted = bragg_q @ coarse_xy
    best = None
    # A shift moves each Bragg phase by Q.s; an inverted Bragg contrast adds pi to all of them.
    for sign, offset in ((1, 0.0), (-1, np.pi)):
        th = theta + offset
        disagreement = float(np.sqrt(np.mean(_wrap(th - predicted) ** 2)))
        unwrapped = th + 2 * np.pi * np.round((predicted - th) / (2 * np.pi))
        s_xy = np.linalg.lstsq(bragg_q, unwrapped, rcond=None)[0]
        if best is None or disagreement < best[0]:
            best = (disagreement, sign, offset, s_xy)
    _, sign, offset, s_xy = best
    dev = _wrap(np.angle(z) + offset - (bragg_q @ s_xy)[:, None])
    w = np.abs(z)
    residual = float(np.sqrt(np.sum(w * dev**2) / np.sum(w)))
    shift_px = (float(s_xy[1] / dy), float(s_xy[0] / dx))
    return Registration(shift_px, (float(s_xy[0]), float(s_xy[1])), "bragg-phase", residual,
                        "phase_rms_rad", sign, coarse)


def _resample(image, rows, cols, order):
    """Spline resampling at (rows, cols); points outside the frame or next to NaN become NaN."""
    invalid = ~np.isfinite(image)
    filled = _fill_invalid(image, invalid)
    out = ndimage.map_coordinates(filled, [rows, cols], order=order, mode="nearest")
    ny, nx = image.shape
    outside = (rows < -0.5) | (rows > ny - 0.5) | (cols < -0.5) | (cols > nx - 0.5)
    if invalid.any():
        # Any sample whose interpolation footprint touches a NaN pixel is not trusted.
        near = ndimage.map_coordinates(invalid.astype(float), [rows, cols], order=1, mode="nearest") > 0
        outside |= near
    out[outside] = np.nan
    return out


def apply_shift(image, shift_px, *, mode="spline", order=3):
    """Shift an image by a sub-pixel amount: out(r) = image(r - shift).

    Parameters
    ----------
    image : (row, col) array_like
        The image.
    shift_px : (float, float)
        (row, col) shift in pixels, as in :attr:`Registration.shift_px`.
    mode : {"spline", "fourier"}
        "spline" (default): cubic spline interpolation
        (``scipy.ndimage.map_coordinates``); its error stays local, so it suits
        real scans, which are not periodic; pixels brought in from outside the
        frame, or next to NaN pixels, become NaN. "fourier":
        ``scipy.ndimage.fourier_shift``, exact for a periodic band-limited
        image, but a non-periodic frame wraps around and rings from its edges.
    order : int
        Spline order for ``mode="spline"``.

    Returns
    -------
    ndarray
        The shifted image (float).

    Raises
    ------
    InputError
        If the image is not 2-D, the shift is not two numbers or the mode is unknown.

    Examples
    --------
    >>> import numpy as np
    >>> image = np.cos(2 * np.pi * np.arange(32) / 8)[None, :].repeat(4, 0)
    >>> out = apply_shift(image, (0, 2), mode="fourier")
    >>> bool(np.allclose(out, np.roll(image, 2, axis=1)))
    True
    """
    image = _image(image, "image")
    shift = np.asarray(shift_px, dtype=float).reshape(-1)
    if shift.size != 2 or not np.all(np.isfinite(shift)):
        raise InputError(f"shift_px must be a finite (row, col) pair, got {shift_px!r}")
    if mode == "fourier":
        if not np.all(np.isfinite(image)):
            raise InputError("apply_shift: mode='fourier' needs an image without NaN; use mode='spline'")
        return np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(image), shift)).real
    if mode != "spline":
        raise InputError(f"mode must be 'spline' or 'fourier', got {mode!r}")
    rows, cols = np.mgrid[: image.shape[0], : image.shape[1]].astype(float)
    return _resample(image, rows - shift[0], cols - shift[1], order)


def undo_displacement(image, displacement_nm, *, pixel_size_nm, order=3):
    """Resample an image through a displacement field: T'(r) = T(r - u(r)).

    This is the resampling step of drift correction [1]_ (docs/methods.md §2): with u
    the field measured on the scan, it puts every channel of that scan on an
    undistorted grid.

    Parameters
    ----------
    image : (row, col) array_like
        The image.
    displacement_nm : (2, row, col) array_like
        (ux, uy) in nm at every pixel.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    order : int
        Spline order (``scipy.ndimage.map_coordinates``).

    Returns
    -------
    ndarray
        The resampled image; pixels sampled from outside the frame are NaN.

    Raises
    ------
    InputError
        If the field's shape is not (2, row, col) of the image.

    References
    ----------
    .. [1] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> import numpy as np
    >>> image = np.tile(np.arange(16.0), (16, 1))
    >>> u = np.zeros((2, 16, 16)); u[0] = 0.2          # ux = 2 px at 0.1 nm
    >>> round(float(undo_displacement(image, u, pixel_size_nm=0.1)[8, 8]), 6)
    6.0
    """
    from .drift import apply_displacement

    image = _image(image, "image")
    u = np.asarray(displacement_nm, dtype=float)
    if u.shape != (2,) + image.shape:
        raise InputError(f"displacement_nm must have shape (2, row, col) = {(2,) + image.shape}, got {u.shape}")
    if not np.all(np.isfinite(u)):
        raise InputError("displacement_nm holds NaN or infinite values")
    # One resampling for the whole project: the drift step's T(r - u(r)).
    return apply_displacement(image, u, pixel_size_nm=pixel_size_nm, order=order)[0]


# --------------------------------------------------------------------------- phase shifts


def phase_difference(a1, a2):
    """Local phase shift between two lock-in fields: arg(A1 conj A2), in (-pi, pi].

    Parameters
    ----------
    a1, a2 : complex array, same shape
        Lock-in fields (from :func:`domains.lockin`) of the same wavevector(s)
        at two biases.

    Returns
    -------
    ndarray
        Delta phi in radians.

    Examples
    --------
    >>> round(float(phase_difference(np.exp(2.0j), np.exp(0.5j))), 6)
    1.5
    """
    a1, a2 = np.asarray(a1), np.asarray(a2)
    if a1.shape != a2.shape:
        raise InputError(f"a1 and a2 must have the same shape, got {a1.shape} and {a2.shape}")
    return np.angle(a1 * np.conj(a2))


@dataclass(frozen=True)
class ContrastVerdict:
    """What the per-component phase shifts of one domain say about its contrast.

    Attributes
    ----------
    verdict : str
        "inverted" (every Delta phi_j compatible with pi, not with 0),
        "not inverted" (compatible with 0, not with pi), "dephased" (the
        components disagree among themselves), "shifted" (they agree on a
        common shift that is neither 0 nor pi) or "undetermined" (both 0 and
        pi compatible, or no data).
    confidence : float
        1 - p of the hypothesis the verdict rejects: of "not inverted" for
        "inverted", of "inverted" for "not inverted", of "all components
        equal" for "dephased", of the more compatible of 0 and pi for
        "shifted"; 0 for "undetermined".
    p_inverted, p_not_inverted, p_consistent : float
        chi-square p-values of Delta phi_j = pi for all j, = 0 for all j, and
        of all Delta phi_j equal to their common (weighted circular) mean.
    sigmas_from_inverted, sigmas_from_not_inverted : float
        Largest |Delta phi_j - h| / sigma_j over the components, h = pi or 0,
        sigma_j the error including the tolerance.
    common_phase_rad : float
        The weighted circular mean of the Delta phi_j.
    """

    verdict: str
    confidence: float
    p_inverted: float
    p_not_inverted: float
    p_consistent: float
    sigmas_from_inverted: float
    sigmas_from_not_inverted: float
    common_phase_rad: float

    def to_dict(self) -> dict:
        """JSON-ready dictionary (angles in degrees)."""
        return {
            "verdict": self.verdict,
            "confidence": _json_float(self.confidence),
            "p_inverted": _json_float(self.p_inverted),
            "p_not_inverted": _json_float(self.p_not_inverted),
            "p_consistent": _json_float(self.p_consistent),
            "sigmas_from_inverted": _json_float(self.sigmas_from_inverted),
            "sigmas_from_not_inverted": _json_float(self.sigmas_from_not_inverted),
            "common_phase_deg": _json_float(math.degrees(self.common_phase_rad)),
        }


def classify_contrast(delta_phi_rad, se_rad, *, tolerance_rad=DEFAULT_TOLERANCE_RAD, alpha=0.01):
    """Decide whether a domain's contrast inverts between two biases, from its phase shifts.

    Filled- and empty-state images of a charge-density wave are often
    complementary [1]_, but not always, so inversion is tested, not assumed.
    Each hypothesis h (pi: inverted; 0: not inverted) is tested with
    chi^2 = sum_j wrap(Delta phi_j - h)^2 / (se_j^2 + tolerance^2) on k
    degrees of freedom; the components' mutual consistency with the same
    statistic around their weighted circular mean, on k - 1 degrees of
    freedom. A hypothesis is compatible when its p-value is at least
    ``alpha``.

    Parameters
    ----------
    delta_phi_rad : (k,) array_like
        Per-component circular-mean phase shifts, radians.
    se_rad : (k,) array_like
        Their standard errors, radians (NaN or inf: no information).
    tolerance_rad : float
        Systematic allowance added in quadrature to each error (default 10 degrees).
    alpha : float
        Significance level, 0 < alpha < 1.

    Returns
    -------
    ContrastVerdict

    Raises
    ------
    InputError
        If the arrays differ in length, a tolerance is negative or alpha is outside (0, 1).

    References
    ----------
    .. [1] J. M. Carpinelli, H. H. Weitering, E. W. Plummer, R. Stumpf,
       "Direct observation of a surface charge density wave", Nature 381,
       398 (1996). doi:10.1038/381398a0

    Examples
    --------
    >>> import numpy as np
    >>> classify_contrast([np.pi, -3.1, 3.12], [0.02, 0.02, 0.02]).verdict
    'inverted'
    >>> classify_contrast([np.pi, np.pi, np.pi / 3], [0.02, 0.02, 0.02]).verdict
    'dephased'
    """
    dphi = np.atleast_1d(np.asarray(delta_phi_rad, dtype=float))
    se = np.atleast_1d(np.asarray(se_rad, dtype=float))
    if dphi.ndim != 1 or dphi.shape != se.shape or dphi.size == 0:
        raise InputError(f"delta_phi_rad and se_rad must be 1-D of the same length, got {dphi.shape} and {se.shape}")
    if not (np.isfinite(tolerance_rad) and tolerance_rad >= 0):
        raise InputError(f"tolerance_rad must be >= 0, got {tolerance_rad}")
    if not 0 < alpha < 1:
        raise InputError(f"alpha must lie between 0 and 1, got {alpha}")
    usable = np.isfinite(dphi) & np.isfinite(se)
    if not usable.any():
        return ContrastVerdict("undetermined", 0.0, math.nan, math.nan, math.nan, math.nan, math.nan, math.nan)
    dphi, se = dphi[usable], se[usable]
    err = np.sqrt(se**2 + tolerance_rad**2)
    if np.any(err == 0):
        raise InputError("classify_contrast: a zero standard error needs a positive tolerance_rad")
    k = dphi.size
    weights = 1 / err**2
    common = float(np.angle(np.sum(weights * np.exp(1j * dphi))))

    def test(h, dof):
        z = _wrap(dphi - h) / err
        chi2 = float(np.sum(z**2))
        p = float(stats.chi2.sf(chi2, dof)) if dof > 0 else 1.0
        return p, float(np.max(np.abs(z)))

    p_pi, z_pi = test(np.pi, k)
    p_0, z_0 = test(0.0, k)
    p_cons, _ = test(common, k - 1)
    if p_cons < alpha:
        verdict, confidence = "dephased", 1 - p_cons
    elif p_pi >= alpha and p_0 < alpha:
        verdict, confidence = "inverted", 1 - p_0
    elif p_0 >= alpha and p_pi < alpha:
        verdict, confidence = "not inverted", 1 - p_pi
    elif p_0 < alpha and p_pi < alpha:
        verdict, confidence = "shifted", 1 - max(p_0, p_pi)
    else:
        verdict, confidence = "undetermined", 0.0
    return ContrastVerdict(verdict, float(confidence), p_pi, p_0, p_cons, z_pi, z_0, common)


@dataclass(frozen=True)
class DomainPhaseShift:
    """Per-component phase shift of one domain between two biases.

    Attributes
    ----------
    domain : int
        Domain label.
    n_pixels : int
        Interior pixels used (at least ``margin_sigma`` sigma from other labels,
        the edge and the mask).
    n_independent : float
        Independent areas in the weighted mean, about area / (4 pi sigma^2).
    delta_phi_rad : ndarray (k,)
        Amplitude-weighted circular mean of arg(A_j(V1) conj A_j(V2)).
    se_rad : ndarray (k,)
        Standard error of that mean.
    spread_rad : ndarray (k,)
        Circular standard deviation sqrt(-2 ln R) over the domain's pixels.
    verdict : ContrastVerdict
    """

    domain: int
    n_pixels: int
    n_independent: float
    delta_phi_rad: np.ndarray
    se_rad: np.ndarray
    spread_rad: np.ndarray
    verdict: ContrastVerdict

    def to_dict(self) -> dict:
        """JSON-ready dictionary (angles in degrees)."""
        deg = lambda v: [_json_float(math.degrees(x)) for x in v]  # noqa: E731
        return {
            "domain": int(self.domain),
            "n_pixels": int(self.n_pixels),
            "n_independent": _json_float(self.n_independent),
            "delta_phi_deg": deg(self.delta_phi_rad),
            "delta_phi_deg_se": deg(self.se_rad),
            "spread_deg": deg(self.spread_rad),
            "verdict": self.verdict.to_dict(),
        }


def _phase_shift_stats(a1, a2, interior, ids, sigma_nm, pixel_size, tolerance_rad, alpha, step=1):
    """Per-domain circular statistics of A1 conj A2 over the interior; ``a1``, ``a2``, ``interior`` and
    ``pixel_size`` on the working grid (every ``step``-th input pixel; counts are given in input pixels)."""
    flat = interior.ravel()
    n = int(max(ids.max() if ids.size else 0, flat.max() if flat.size else 0)) + 1
    k = a1.shape[0]
    mean = np.full((k, n), np.nan)
    se = np.full((k, n), np.nan)
    spread = np.full((k, n), np.nan)
    neff = np.zeros((k, n))
    sel = flat > 0
    idx = flat[sel]
    counts = np.bincount(idx, minlength=n)
    for j in range(k):
        z = (a1[j] * np.conj(a2[j])).ravel()[sel]
        ok = np.isfinite(z)
        zi, ii = z[ok], idx[ok]
        w = np.abs(zi)
        unit = np.where(w > 0, zi / np.where(w > 0, w, 1), 0)
        W = _sums(ii, w, n)
        S1 = _sums(ii, zi.real, n) + 1j * _sums(ii, zi.imag, n)
        # sum w exp(2i dphi) = sum z^2 / |z|, for the second trigonometric moment.
        z2 = zi * unit
        S2 = _sums(ii, z2.real, n) + 1j * _sums(ii, z2.imag, n)
        W2 = _sums(ii, w**2, n)
        with np.errstate(invalid="ignore", divide="ignore"):
            R = np.abs(S1) / W
            m = np.angle(S1)
            m2 = np.real(S2 * np.exp(-2j * m)) / W
            neff[j] = _independent_areas(W, W2, sigma_nm, pixel_size)
            # Circular standard error of the mean (Fisher, Statistical Analysis of
            # Circular Data, 1993, §4.4; from memory): sqrt((1 - m2) / (2 n R^2)).
            se_j = np.sqrt(np.clip(1 - m2, 0, None) / (2 * neff[j] * R**2))
            spread_j = np.sqrt(-2 * np.log(np.clip(R, 1e-300, 1)))
        good = W > 0
        mean[j, good], se[j, good], spread[j, good] = m[good], se_j[good], spread_j[good]
    out = []
    for d in ids:
        verdict = classify_contrast(mean[:, d], se[:, d], tolerance_rad=tolerance_rad, alpha=alpha)
        out.append(DomainPhaseShift(int(d), int(counts[d]) * step * step if d < counts.size else 0,
                                    float(np.min(neff[:, d])),
                                    mean[:, d].copy(), se[:, d].copy(), spread[:, d].copy(), verdict))
    return out


def phase_shifts(a1, a2, labels, *, sigma_nm, pixel_size_nm, mask=None, margin_sigma=2.5,
                 tolerance_rad=DEFAULT_TOLERANCE_RAD, alpha=0.01):
    """Per-domain, per-component phase shift Delta phi_j = arg(A_j(V1) conj A_j(V2)) and its verdict.

    In each domain's interior the shift is the circular mean of Delta phi_j
    weighted by |A_j(V1)| |A_j(V2)|, i.e. arg sum A_j(V1) conj A_j(V2).
    Its standard error is the circular standard error [1]_ with the number
    of independent areas area / (4 pi sigma^2) (the correlation area of a
    Gaussian lock-in; derived) in place of the pixel count. For a pure wave
    of amplitude A0 with white noise sigma_n per pixel this gives
    2 sigma_n / (A0 sqrt(N)) over N pixels, whatever sigma (derived). The fields
    are smooth on the scale sigma, so the means are taken at every s-th pixel,
    s = :func:`domains.lossless_step` (about 0.6 sigma), which holds their whole
    band; pixel counts are given in input pixels.

    Parameters
    ----------
    a1, a2 : (k, row, col) or (row, col) complex array
        Lock-in fields (:func:`domains.lockin`) at the same wavevectors for
        bias V1 and bias V2, on registered pixel grids.
    labels : (row, col) int array
        Domain labels, 0 = wall or unassigned, 1..N domains.
    sigma_nm : float
        The lock-in width used for ``a1`` and ``a2``, nm.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    margin_sigma : float
        Pixels closer than this many sigma to another label, the frame edge or
        the mask are left out.
    tolerance_rad, alpha : float
        Passed to :func:`classify_contrast`.

    Returns
    -------
    list of DomainPhaseShift
        One per domain label present, in increasing label order.

    Raises
    ------
    InputError
        If shapes disagree or labels are not non-negative integers.

    References
    ----------
    .. [1] N. I. Fisher, Statistical Analysis of Circular Data (Cambridge
       University Press, 1993). doi:10.1017/CBO9780511564345

    Examples
    --------
    >>> import numpy as np
    >>> a1 = np.full((1, 40, 40), 0.5 + 0j)
    >>> labels = np.ones((40, 40), dtype=np.int32)
    >>> [r.verdict.verdict for r in phase_shifts(a1, -a1, labels, sigma_nm=0.2, pixel_size_nm=0.1)]
    ['inverted']
    """
    a1, a2 = np.asarray(a1), np.asarray(a2)
    if a1.ndim == 2 and a2.ndim == 2:
        a1, a2 = a1[None], a2[None]
    if a1.shape != a2.shape or a1.ndim != 3:
        raise InputError(f"a1 and a2 must both be (k, row, col) lock-in fields, got {a1.shape} and {a2.shape}")
    pixel_size = pixel_size_pair(pixel_size_nm)
    sigma_nm = positive(sigma_nm, "sigma_nm")
    labels = _labels(labels, a1.shape[1:])
    mask = _mask(mask, a1.shape[1:])
    # The fields are smooth on the scale sigma: every step-th pixel holds all of them (_working_step).
    step = _working_step(sigma_nm, pixel_size)
    labels_c, mask_c = _decimate(labels, mask, step)
    pc = (pixel_size[0] * step, pixel_size[1] * step)
    interior = _interior_labels(labels_c, sigma_nm=sigma_nm, pixel_size=pc, mask=mask_c, margin_sigma=margin_sigma)
    ids = _label_ids(labels)
    return _phase_shift_stats(a1[:, ::step, ::step], a2[:, ::step, ::step], interior, ids, sigma_nm, pc,
                              tolerance_rad, alpha, step)


# --------------------------------------------------------------------------- per-domain contrast


def _contrast_rows(image, a, labels, interior, ids, bias_V, sigma_nm, pixel_size, step=1):
    """Rows of per-domain mean amplitude (per component, total) and mean map value.

    ``image`` (NaN where untrusted) and ``labels`` are on the input grid of ``pixel_size``;
    the lock-in fields ``a`` and the ``interior`` labels on the working grid (every
    ``step``-th pixel); interior counts are given in input pixels.
    """
    dy, dx = pixel_size
    wy, wx = dy * step, dx * step
    k = a.shape[0]
    n = int(labels.max()) + 1
    amp = 2 * np.abs(a)
    total = np.sqrt(np.sum(amp**2, axis=0))
    flat_int = interior.ravel()
    sel_int = flat_int > 0
    ii = flat_int[sel_int]
    n_int = np.bincount(ii, minlength=n) * step * step

    def mean_se(values, index, sel, neff_fn):
        v = values.ravel()[sel]
        ok = np.isfinite(v)
        c = np.bincount(index[ok], minlength=n).astype(float)
        s = _sums(index[ok], v[ok], n)
        s2 = _sums(index[ok], v[ok] ** 2, n)
        with np.errstate(invalid="ignore", divide="ignore"):
            mu = s / c
            var = np.clip(s2 / c - mu**2, 0, None) * c / np.maximum(c - 1, 1)
            se = np.sqrt(var / neff_fn(c))
        return mu, se

    def lockin_neff(c):
        # Independent areas of a lock-in field: area / (4 pi sigma^2), derived.
        return np.clip(c * wy * wx / (4 * math.pi * sigma_nm**2), 1, np.maximum(c, 1))

    amp_stats = [mean_se(amp[j], ii, sel_int, lockin_neff) for j in range(k)]
    tot_mu, tot_se = mean_se(total, ii, sel_int, lockin_neff)
    flat = labels.ravel()
    sel = flat > 0
    # Map values are averaged pixel by pixel over the whole domain; their error
    # treats pixels as independent (std / sqrt n).
    g_mu, g_se = mean_se(image, flat[sel], sel, lambda c: np.maximum(c, 1))
    n_all = np.bincount(flat[sel], minlength=n)
    rows = []
    for d in ids:
        row = {"domain": int(d), "bias_V": float(bias_V), "n_pixels": int(n_all[d]),
               "n_pixels_interior": int(n_int[d]), "area_nm2": float(n_all[d] * dy * dx)}
        for j, (mu, se) in enumerate(amp_stats, start=1):
            row[f"amplitude_q{j}"] = _json_float(mu[d])
            row[f"amplitude_q{j}_se"] = _json_float(se[d])
        row["amplitude_total"] = _json_float(tot_mu[d])
        row["amplitude_total_se"] = _json_float(tot_se[d])
        row["map_mean"] = _json_float(g_mu[d])
        row["map_mean_se"] = _json_float(g_se[d])
        rows.append(row)
    return rows


def _check_maps(maps, shape, pixel_size, like="the topograph"):
    if not isinstance(maps, dict) or not maps:
        raise InputError(f"maps must be a non-empty dict {{bias_V: image}}, got {type(maps).__name__}")
    out = {}
    for key, value in maps.items():
        try:
            bias = float(key)
        except (TypeError, ValueError):
            raise InputError(f"maps keys must be biases in V, got {key!r}") from None
        if not np.isfinite(bias):
            raise InputError(f"maps keys must be finite biases in V, got {key!r}")
        if bias in out:
            raise InputError(f"maps holds bias {bias:g} V twice")
        name = f"map at {bias:g} V"
        if isinstance(value, Scan):
            if not np.allclose(value.pixel_size_nm, pixel_size, rtol=1e-6):
                raise InputError(f"{name} ({value.source}): pixel size {value.pixel_size_nm} nm differs from "
                                 f"pixel_size_nm = {pixel_size} nm")
            if value.bias_V is not None and not np.isclose(value.bias_V, bias):
                raise InputError(f"{name} ({value.source}): the scan says bias_V = {value.bias_V:g} V, "
                                 f"but it is filed under {bias:g} V")
        image = _image(value, name)
        if shape is not None and image.shape != tuple(shape):
            raise InputError(f"{name} has shape {image.shape}, expected {tuple(shape)} like {like}")
        out[bias] = image
    return out


def domain_contrast(maps, labels, q, *, sigma_nm, pixel_size_nm, mask=None, margin_sigma=2.5):
    """Per-domain contrast at each bias: order amplitude per component and in total, and the mean map value.

    The order amplitude is the lock-in amplitude 2|A_j| [1]_ averaged over the
    domain's interior (``margin_sigma`` sigma from other labels, edges and
    masks); the total is sqrt(sum_j (2|A_j|)^2) per pixel, averaged. Its
    standard error is the pixel standard deviation over sqrt(area / (4 pi
    sigma^2)) (the independent areas of a Gaussian lock-in; derived). The mean
    map value (e.g. conductance) is averaged over all the domain's pixels,
    with error std / sqrt(n). The lock-in fields are demodulated (float32) and
    averaged at every s-th pixel only, s = :func:`domains.lossless_step` (about
    0.6 sigma), where the lock-in gives them exactly and which holds their whole
    band; ``n_pixels_interior`` counts input pixels.

    Parameters
    ----------
    maps : dict {bias_V: (row, col) array or Scan}
        One registered map per bias (e.g. dI/dV), all on one pixel grid.
    labels : (row, col) int array
        0 = wall or unassigned, 1..N domains.
    q : (k, 2) array_like
        Order wavevectors (qx, qy) in rad/nm.
    sigma_nm : float
        Lock-in width in nm.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    margin_sigma : float
        Interior margin in units of sigma.

    Returns
    -------
    list of dict
        One row per domain and bias, for ``contrast.csv``: ``domain``,
        ``bias_V``, ``n_pixels``, ``n_pixels_interior``, ``area_nm2``,
        ``amplitude_q1`` ... ``amplitude_qk`` and ``amplitude_total`` (in the
        map's units) with ``_se`` errors, ``map_mean`` and ``map_mean_se``.

    Raises
    ------
    InputError
        On mismatched shapes or pixel sizes, a bias given twice, or bad labels.

    References
    ----------
    .. [1] J. A. Slezak et al., PNAS 105, 3203 (2008). doi:10.1073/pnas.0706795105

    Examples
    --------
    >>> import numpy as np
    >>> y, x = np.mgrid[:64, :64] * 0.1
    >>> q = [[2 * np.pi / 0.8, 0.0]]
    >>> maps = {-0.3: 1 + 0.4 * np.cos(q[0][0] * x), 0.3: 1 - 0.2 * np.cos(q[0][0] * x)}
    >>> rows = domain_contrast(maps, np.ones((64, 64), np.int32), q, sigma_nm=0.4, pixel_size_nm=0.1)
    >>> [(r["bias_V"], round(r["amplitude_q1"], 2)) for r in rows]
    [(-0.3, 0.4), (0.3, 0.2)]
    """
    pixel_size = pixel_size_pair(pixel_size_nm)
    sigma_nm = positive(sigma_nm, "sigma_nm")
    q = _q(q)
    labels = np.asarray(labels)
    maps = _check_maps(maps, labels.shape, pixel_size, like="the labels")
    labels = _labels(labels, labels.shape)
    bad = _mask(mask, labels.shape)
    for image in maps.values():
        bad |= ~np.isfinite(image)
    step = _working_step(sigma_nm, pixel_size)
    labels_c, bad_c = _decimate(labels, bad, step)
    pc = (pixel_size[0] * step, pixel_size[1] * step)
    interior = _interior_labels(labels_c, sigma_nm=sigma_nm, pixel_size=pc, mask=bad_c, margin_sigma=margin_sigma)
    ids = _label_ids(labels)
    rows = []
    for bias in sorted(maps):
        flat = _without_background(maps[bias], bad, sigma_nm=sigma_nm, pixel=pixel_size, step=step)
        a = lockin(flat, q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=bad if bad.any() else None, step=step)
        rows.extend(_contrast_rows(np.where(bad, np.nan, maps[bias]), a, labels, interior, ids, bias,
                                   sigma_nm, pixel_size, step))
    return rows


# --------------------------------------------------------------------------- grids


@dataclass
class Fingerprints:
    """Per-domain order amplitude and phase at every energy of a spectroscopic grid.

    Attributes
    ----------
    energies_V : ndarray (E,)
    domains : ndarray (N,)
        Domain labels.
    amplitude : ndarray (N, E, k)
        Mean lock-in amplitude 2|A_j| over each domain's interior.
    phase_rad : ndarray (N, E, k)
        Amplitude-weighted circular mean of arg A_j, referenced to pixel (0, 0).
    n_pixels : ndarray (N,)
        Interior pixels used per domain, counted in input pixels (the means are taken at
        every s-th pixel, s = :func:`domains.lossless_step`).
    """

    energies_V: np.ndarray
    domains: np.ndarray
    amplitude: np.ndarray
    phase_rad: np.ndarray
    n_pixels: np.ndarray

    @property
    def amplitude_total(self) -> np.ndarray:
        """(N, E) total amplitude sqrt(sum_j amplitude_j^2)."""
        return np.sqrt(np.sum(self.amplitude**2, axis=-1))

    def rows(self) -> list[dict]:
        """One row per domain and energy for ``fingerprint.csv`` (phases in degrees)."""
        out = []
        k = self.amplitude.shape[-1]
        total = self.amplitude_total
        for i, d in enumerate(self.domains):
            for e, energy in enumerate(self.energies_V):
                row = {"domain": int(d), "energy_V": float(energy), "n_pixels_interior": int(self.n_pixels[i])}
                for j in range(k):
                    row[f"amplitude_q{j + 1}"] = _json_float(self.amplitude[i, e, j])
                    row[f"phase_q{j + 1}_deg"] = _json_float(math.degrees(self.phase_rad[i, e, j]))
                row["amplitude_total"] = _json_float(total[i, e])
                out.append(row)
        return out


def grid_fingerprints(grid, energies_V, labels, q, *, sigma_nm, pixel_size_nm, mask=None, margin_sigma=2.5,
                      progress=False):
    """Per-domain order amplitude and phase at every energy of a grid (energy, row, col).

    Each energy slice is demodulated on its own (spatial lock-in [1]_, in float32)
    and averaged over each domain's interior at every s-th pixel,
    s = :func:`domains.lossless_step` (about 0.6 sigma: the lock-in field is smooth
    on the scale sigma and exact there). The interiors are computed once for
    every slice. A dask grid is computed a few slices at a time (its energy chunks,
    cut to at most 4 slices and 256 MiB) and never held whole in memory; each slice
    is reduced to a few numbers per domain and dropped.

    Parameters
    ----------
    grid : (energy, row, col) array or dask array
        Spectroscopic grid, e.g. dI/dV.
    energies_V : (energy,) array_like
        Bias of each slice, V.
    labels : (row, col) int array
        0 = wall or unassigned, 1..N domains.
    q : (k, 2) array_like
        Order wavevectors in rad/nm.
    sigma_nm : float
        Lock-in width in nm.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    margin_sigma : float
        Interior margin in units of sigma.
    progress : bool or None
        Show a progress bar over the energies (None: only on a terminal).

    Returns
    -------
    Fingerprints

    Raises
    ------
    InputError
        If the grid is not 3-D, the energies do not match its first axis, or
        the labels' shape differs from a slice.

    References
    ----------
    .. [1] J. A. Slezak et al., PNAS 105, 3203 (2008). doi:10.1073/pnas.0706795105

    Examples
    --------
    >>> import numpy as np
    >>> x = np.arange(48)[None, :] * 0.1 * np.ones((48, 1))
    >>> q = [[2 * np.pi / 0.6, 0.0]]
    >>> grid = np.stack([s * np.cos(q[0][0] * x) for s in (0.1, 0.5, 0.2)])
    >>> fp = grid_fingerprints(grid, [-0.1, 0.0, 0.1], np.ones((48, 48), np.int32), q,
    ...                        sigma_nm=0.3, pixel_size_nm=0.1)
    >>> np.round(fp.amplitude[0, :, 0], 3).tolist()
    [0.1, 0.5, 0.2]
    """
    pixel_size = pixel_size_pair(pixel_size_nm)
    sigma_nm = positive(sigma_nm, "sigma_nm")
    q = _q(q)
    grid, energies, labels, bad = _check_grid(grid, energies_V, labels, mask)
    fg = _fingerprint_geometry(labels, bad, sigma_nm=sigma_nm, pixel=pixel_size, margin_sigma=margin_sigma)
    amp, ph, _, _ = _grid_pass(grid, energies.size, bad, q=q, sigma_nm=sigma_nm, pixel=pixel_size, fingerprint=fg,
                               progress=progress)
    return Fingerprints(energies, fg["ids"], amp, ph, fg["counts"])


#: A dask grid is computed at most this many slices at a time, and at most _GRID_BLOCK_BYTES (but at least one
#: slice): the memory of a block stays that of a few slices whatever the grid's length or its stored chunks.
_GRID_BLOCK_SLICES = 4
_GRID_BLOCK_BYTES = 256 * 2**20


def _check_grid(grid, energies_V, labels, mask):
    """The grid (numpy, or dask kept lazy), its energies (float, one per slice), labels (int32 kept, other integer
    types as int64) and mask, checked."""
    if not _is_dask(grid):
        grid = np.asarray(grid)
    if grid.ndim != 3:
        raise InputError(f"grid must be 3-D (energy, row, col), got shape {tuple(grid.shape)}")
    if grid.dtype.kind not in "biuf":
        raise InputError(f"grid must hold real numbers, got dtype {grid.dtype}")
    energies = np.asarray(energies_V, dtype=float).reshape(-1)
    if energies.size != grid.shape[0] or not np.all(np.isfinite(energies)):
        raise InputError(f"energies_V must hold {grid.shape[0]} finite values (one per slice), got {energies.size}")
    shape = grid.shape[1:]
    given = np.asarray(labels)
    if given.dtype == np.int32 and given.shape == tuple(shape) and (given.size == 0 or given.min() >= 0):
        # int32 labels (what the pipeline writes) are used as they are: an int64 copy would be two float32
        # slices of memory for nothing (every count and index below is taken in int64 or intp).
        return grid, energies, given, _mask(mask, shape)
    return grid, energies, _labels(labels, shape), _mask(mask, shape)


def _fingerprint_geometry(labels, bad, *, sigma_nm, pixel, margin_sigma):
    """What every slice's fingerprint needs, computed once: the interior pixels on the working grid, their
    labels, the domains and their interior pixel counts (in input pixels)."""
    step = _working_step(sigma_nm, pixel)
    labels_c, bad_c = _decimate(labels, bad, step)
    pc = (pixel[0] * step, pixel[1] * step)
    interior = _interior_labels(labels_c, sigma_nm=sigma_nm, pixel_size=pc, mask=bad_c, margin_sigma=margin_sigma)
    ids = _label_ids(labels)
    n = int(labels.max()) + 1 if labels.size else 1
    flat = interior.ravel()
    sel = np.flatnonzero(flat > 0)
    idx = flat[sel]
    return {"ids": ids, "n": n, "sel": sel, "idx": idx, "counts": np.bincount(idx, minlength=n)[ids] * step * step}


def _fingerprint_row(a, fg):
    """Per domain and component, the mean amplitude 2|A_j| over the interior and the phase of sum A_j: (N, k) each."""
    n, ids, sel, idx = fg["n"], fg["ids"], fg["sel"], fg["idx"]
    k = a.shape[0]
    amp = np.full((ids.size, k), np.nan)
    ph = np.full((ids.size, k), np.nan)
    for j in range(k):
        z = a[j].ravel()[sel]
        ok = np.isfinite(z)
        c = np.bincount(idx[ok], minlength=n)
        with np.errstate(invalid="ignore", divide="ignore"):
            amp[:, j] = (2 * _sums(idx[ok], np.abs(z[ok]), n) / c)[ids]
        s = _sums(idx[ok], z[ok].real, n) + 1j * _sums(idx[ok], z[ok].imag, n)
        ph[:, j] = np.where(c[ids] > 0, np.angle(s[ids]), np.nan)
    return amp, ph


def _grid_pass(grid, n_energies, bad, *, q, sigma_nm, pixel, fingerprint=None, geo=None, amplitude=False,
               progress=False):
    """One pass over the slices of a grid, each read once, demodulated once and reduced at once.

    Every slice gives its smoothed map and lock-in fields on the working grid
    (:func:`_slice_fields`); they are reduced to the fingerprint
    (with ``fingerprint``, :func:`_fingerprint_geometry`) and to the rows of the conductance
    and, with ``amplitude``, order-amplitude contrast sets (with ``geo``,
    :func:`_contrast_geometry`), and dropped: what is held across the slices is a few numbers
    per domain, wall and slice. The geometries are computed once by the caller.

    Returns
    -------
    amp, ph : (N, E, k) arrays or None
        The fingerprint's amplitudes and phases.
    cond, amps : lists of dict
        :func:`_field_stats` of each slice's smoothed map and order amplitude (empty without ``geo``).
    """
    step = _working_step(sigma_nm, pixel)
    amp = ph = None
    if fingerprint is not None:
        amp = np.full((fingerprint["ids"].size, n_energies, q.shape[0]), np.nan)
        ph = np.full_like(amp, np.nan)
    cond, amps = [], []
    for e, image in _grid_slices(grid, n_energies, progress):
        smooth, raw, detrended = _slice_fields(image, bad, sigma_nm=sigma_nm, pixel=pixel, step=step,
                                               fingerprint_q=q if fingerprint is not None else None,
                                               amplitude_q=q if amplitude else None)
        del image
        if fingerprint is not None:
            amp[:, e], ph[:, e] = _fingerprint_row(raw, fingerprint)
        if geo is not None:
            cond.append(_field_stats(smooth, geo))
            if amplitude:
                amps.append(_field_stats(_total_amplitude(detrended), geo))
    return amp, ph, cond, amps


def _slice_fields(image, bad, *, sigma_nm, pixel, step, fingerprint_q=None, amplitude_q=None):
    """One slice's fields on the working grid, in float32: the smoothed map, the lock-in fields at
    ``fingerprint_q`` of the slice as it is (the fingerprints), and at ``amplitude_q`` of the slice less
    its smoothed map (the electronic contrast's order amplitude, as :func:`_electronic_fields`).

    The smoothed map (the lock-in at q = 0) and the fingerprint's lock-in share one forward FFT
    (one call at every wavevector; each wavevector's result is the one it has alone).
    """
    img = np.array(image, dtype=np.float32)
    mask = bad if bad.any() else None
    kw = dict(sigma_nm=sigma_nm, pixel_size_nm=pixel, mask=mask, step=step)
    if fingerprint_q is None:
        a = lockin(img, (0.0, 0.0), **kw)[None]
    else:
        a = lockin(img, np.vstack([np.zeros((1, 2)), fingerprint_q]), **kw)
    smooth = np.asarray(a[0].real, dtype=float)
    raw = a[1:] if fingerprint_q is not None else None
    del a
    if amplitude_q is None:
        return smooth, raw, None
    finite = np.isfinite(smooth)
    filled = np.where(finite, smooth, smooth[finite].mean() if finite.any() else 0.0).astype(np.float32)
    img -= _upsample(filled, img.shape, step)
    return smooth, raw, lockin(img, amplitude_q, **kw)


def _grid_blocks(chunks, slice_bytes):
    """(start, stop) of the energy blocks read at once: the grid's energy chunks, cut into blocks of at most
    _GRID_BLOCK_SLICES slices and _GRID_BLOCK_BYTES (at least one slice)."""
    most = max(1, min(_GRID_BLOCK_SLICES, _GRID_BLOCK_BYTES // max(slice_bytes, 1)))
    out, start = [], 0
    for size in chunks:
        for b in range(start, start + size, most):
            out.append((b, min(b + most, start + size)))
        start += size
    return out


def _grid_slices(grid, n_energies, progress):
    """(index, slice) of a grid, in order. A dask grid is computed one block of energies at a time: its
    own energy chunks, cut to at most a few slices (:func:`_grid_blocks`), so each stored chunk is read
    once when it is that small, and the whole grid never sits in memory; a block is dropped before the
    next is read."""
    from tqdm import tqdm

    bar = tqdm(total=n_energies, disable=(not progress) if progress is not None else None, desc="energies",
               unit="slice")
    try:
        if not _is_dask(grid):
            for e in range(n_energies):
                yield e, np.asarray(grid[e])
                bar.update()
            return
        slice_bytes = int(np.prod(grid.shape[1:])) * grid.dtype.itemsize
        for b0, b1 in _grid_blocks(grid.chunks[0], slice_bytes):
            block = np.asarray(grid[b0:b1].compute())
            for e in range(b0, b1):
                yield e, block[e - b0]
                bar.update()
            del block
    finally:
        bar.close()


def fingerprint_peaks(fingerprints, *, component=None):
    """Energy of the largest order amplitude in each domain, refined by a parabola through three points.

    Parameters
    ----------
    fingerprints : Fingerprints
        From :func:`grid_fingerprints`.
    component : int, optional
        Component index j (0-based); default the total amplitude.

    Returns
    -------
    list of dict
        Per domain: ``domain``, ``peak_energy_V`` (vertex of the parabola
        through the maximum and its two neighbours, kept between them),
        ``peak_energy_V_grid`` (the sampled energy of the maximum),
        ``peak_amplitude`` and ``at_edge`` (maximum on the first or last
        energy: not refined, possibly outside the range).

    Raises
    ------
    InputError
        If ``component`` is out of range.

    Examples
    --------
    >>> import numpy as np
    >>> e = np.linspace(-0.5, 0.5, 21)                     # 50 mV steps
    >>> amp = 1 / (1 + ((e - 0.13) / 0.1) ** 2)            # Lorentzian peak at 0.13 V
    >>> fp = Fingerprints(e, np.array([1]), amp[None, :, None], np.zeros((1, 21, 1)), np.array([100]))
    >>> peak = fingerprint_peaks(fp)[0]
    >>> round(peak["peak_energy_V_grid"], 2), round(peak["peak_energy_V"], 2)
    (0.15, 0.13)
    """
    amp = fingerprints.amplitude
    if component is None:
        curve = fingerprints.amplitude_total
    else:
        if not (isinstance(component, (int, np.integer)) and 0 <= component < amp.shape[-1]):
            raise InputError(f"component must be an index 0..{amp.shape[-1] - 1}, got {component!r}")
        curve = amp[:, :, component]
    energies = np.asarray(fingerprints.energies_V, dtype=float)
    order = np.argsort(energies)
    energies, curve = energies[order], curve[:, order]
    out = []
    for i, d in enumerate(fingerprints.domains):
        c = curve[i]
        row = {"domain": int(d), "peak_energy_V": None, "peak_energy_V_grid": None,
               "peak_amplitude": None, "at_edge": None}
        if np.all(~np.isfinite(c)):
            out.append(row)
            continue
        m = int(np.nanargmax(c))
        e_peak, a_peak = float(energies[m]), float(c[m])
        at_edge = m == 0 or m == len(c) - 1
        if not at_edge and np.all(np.isfinite(c[m - 1:m + 2])):
            coef = np.polyfit(energies[m - 1:m + 2], c[m - 1:m + 2], 2)
            if coef[0] < 0:
                vertex = -coef[1] / (2 * coef[0])
                e_peak = float(np.clip(vertex, energies[m - 1], energies[m + 1]))
                a_peak = float(np.polyval(coef, e_peak))
        row.update(peak_energy_V=e_peak, peak_energy_V_grid=float(energies[m]), peak_amplitude=a_peak,
                   at_edge=bool(at_edge))
        out.append(row)
    return out


# --------------------------------------------------------------------------- top level


@dataclass
class BiasComparison:
    """Everything :func:`compare_biases` found: registrations, per-pair phase shifts and verdicts, contrast table.

    Attributes
    ----------
    biases_V : list of float
        The biases, sorted.
    reference_bias_V : float
        V1 of every pair (V1, V2).
    q_rad_per_nm : ndarray (k, 2)
    sigma_nm : float
    registrations : dict {bias_V: Registration or None}
        None where registration was not asked for.
    pairs : dict {(V1, V2): list of DomainPhaseShift}
    tolerance_rad, alpha : float
        The classification settings.
    """

    biases_V: list
    reference_bias_V: float
    q_rad_per_nm: np.ndarray
    sigma_nm: float
    registrations: dict
    pairs: dict
    tolerance_rad: float
    alpha: float
    _rows: list = field(default_factory=list, repr=False)

    def contrast_rows(self) -> list[dict]:
        """Per-domain, per-bias rows for ``contrast.csv`` (see :func:`domain_contrast`)."""
        return [dict(r) for r in self._rows]

    def verdicts(self, pair=None) -> dict:
        """{domain: verdict string} for one pair (default: the first)."""
        key = next(iter(self.pairs)) if pair is None else (float(pair[0]), float(pair[1]))
        if key not in self.pairs:
            raise InputError(f"no pair {pair!r}; the pairs are {list(self.pairs)}")
        return {r.domain: r.verdict.verdict for r in self.pairs[key]}

    def summary(self) -> dict:
        """JSON-ready dict for the ``bias_comparison`` block of ``summary.json`` (angles in degrees)."""
        return {
            "biases_V": [float(b) for b in self.biases_V],
            "reference_bias_V": float(self.reference_bias_V),
            "q_rad_per_nm": np.asarray(self.q_rad_per_nm, dtype=float).tolist(),
            "sigma_nm": float(self.sigma_nm),
            "tolerance_deg": float(math.degrees(self.tolerance_rad)),
            "alpha": float(self.alpha),
            "registration": [
                {"bias_V": float(b), **(reg.to_dict() if reg is not None else {"method": "none"})}
                for b, reg in self.registrations.items()
            ],
            "pairs": [
                {"bias_1_V": float(v1), "bias_2_V": float(v2), "domains": [r.to_dict() for r in rows]}
                for (v1, v2), rows in self.pairs.items()
            ],
        }


def compare_biases(topograph, maps, labels, q, *, sigma_nm, pixel_size_nm, bragg_q=None, reference_bias=None,
                   mask=None, register_maps=True, map_topographs=None, displacement_nm=None, margin_sigma=2.5,
                   tolerance_rad=DEFAULT_TOLERANCE_RAD, alpha=0.01):
    """Register maps at several biases to the topograph and compare their order domain by domain.

    Steps: undo each map's own displacement field (if given), register it to
    the topograph (:func:`register`; Bragg phases when ``bragg_q`` is given,
    else cross-correlation) and shift it (cubic spline), demodulate every map
    at the order wavevectors ``q``, then for each pair (reference bias, other
    bias) measure per domain and per component the phase shift
    Delta phi_j = arg(A_j(V1) conj A_j(V2)) and classify it
    (:func:`classify_contrast`): whether the contrast inverts is measured,
    never assumed [1]_.

    Parameters
    ----------
    topograph : (row, col) array or Scan
        The topograph the labels were drawn on.
    maps : dict {bias_V: (row, col) array or Scan}
        One map per bias (e.g. dI/dV) of the same area.
    labels : (row, col) int array
        0 = wall or unassigned, 1..N domains, on the topograph's pixel grid.
    q : (k, 2) array_like
        Order wavevectors (qx, qy) in rad/nm.
    sigma_nm : float
        Lock-in width in nm.
    pixel_size_nm : float or (float, float)
        Pixel size in nm; a Scan passed in must agree with it.
    bragg_q : (k, 2) array_like, optional
        Bragg wavevectors for Bragg-phase registration.
    reference_bias : float, optional
        V1 of every pair; default the lowest bias.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    register_maps : bool
        False for maps recorded in the same scan as the topograph (no shift to find).
    map_topographs : dict {bias_V: (row, col) array}, optional
        The topograph recorded together with each map. When given, the shift
        is found between topographs (whose lattice contrast does not change
        with the map's bias) and applied to the map; this is safer than
        registering a map whose contrast may invert onto the topograph.
    displacement_nm : (2, row, col) array or dict {bias_V: (2, row, col) array}, optional
        Displacement field(s) (ux, uy) in nm of the maps' own scans, undone
        before registration (T'(r) = T(r - u)).
    margin_sigma : float
        Interior margin, in units of sigma, from walls, edges and the mask.
    tolerance_rad, alpha : float
        Classification settings (:func:`classify_contrast`).

    Returns
    -------
    BiasComparison

    Raises
    ------
    InputError
        On mismatched shapes or pixel sizes, a reference bias not among the
        maps, an empty ``maps`` or a displacement field for a missing bias.

    References
    ----------
    .. [1] J. M. Carpinelli et al., Nature 381, 398 (1996). doi:10.1038/381398a0

    Examples
    --------
    >>> import numpy as np
    >>> y, x = np.mgrid[:64, :64] * 0.1
    >>> qx = 2 * np.pi / 0.8
    >>> labels = np.ones((64, 64), np.int32)
    >>> topo = np.cos(qx * x)
    >>> res = compare_biases(topo, {-0.3: topo, 0.3: -topo}, labels, [[qx, 0.0]], sigma_nm=0.4,
    ...                      pixel_size_nm=0.1, register_maps=False)
    >>> res.verdicts()
    {1: 'inverted'}
    """
    pixel_size = pixel_size_pair(pixel_size_nm)
    if isinstance(topograph, Scan) and not np.allclose(topograph.pixel_size_nm, pixel_size, rtol=1e-6):
        raise InputError(f"topograph ({topograph.source}): pixel size {topograph.pixel_size_nm} nm differs "
                         f"from pixel_size_nm = {pixel_size} nm")
    topograph = _image(topograph, "topograph")
    sigma_nm = positive(sigma_nm, "sigma_nm")
    q = _q(q)
    labels = _labels(labels, topograph.shape)
    maps = _check_maps(maps, topograph.shape, pixel_size)
    biases = sorted(maps)
    if reference_bias is None:
        reference = biases[0]
    else:
        try:
            reference = float(reference_bias)
        except (TypeError, ValueError):
            raise InputError(f"reference_bias must be a bias in V, got {reference_bias!r}") from None
        if reference not in maps:
            raise InputError(f"reference_bias = {reference:g} V is not among the maps' biases "
                             f"{[float(b) for b in biases]} V")
    if len(biases) < 2:
        raise InputError(f"compare_biases needs maps at two biases at least, got {[float(b) for b in biases]} V")
    bad = _mask(mask, topograph.shape) | ~np.isfinite(topograph)
    if displacement_nm is not None:
        fields = displacement_nm if isinstance(displacement_nm, dict) else {b: displacement_nm for b in biases}
        for key in fields:
            if float(key) not in maps:
                raise InputError(f"displacement_nm is given for bias {float(key):g} V, which has no map")
        for key, u in fields.items():
            maps[float(key)] = undo_displacement(maps[float(key)], u, pixel_size_nm=pixel_size)
    if map_topographs is not None:
        if not isinstance(map_topographs, dict):
            raise InputError(f"map_topographs must be a dict {{bias_V: image}}, got {type(map_topographs).__name__}")
        map_topographs = _check_maps(map_topographs, topograph.shape, pixel_size)
        missing = [b for b in biases if b not in map_topographs]
        if missing:
            raise InputError(f"map_topographs has no topograph for the map(s) at {missing} V")
        if displacement_nm is not None:
            for key, u in fields.items():
                map_topographs[float(key)] = undo_displacement(map_topographs[float(key)], u,
                                                               pixel_size_nm=pixel_size)
    reg_sigma = None
    if bragg_q is not None:
        # Lock-in and low-pass widths that keep both the Bragg and the order peaks
        # apart (below 1 % leakage, docs/methods.md §1).
        reg_sigma = choose_sigma(np.vstack([_q(bragg_q, "bragg_q"), q]))[0]
    registrations = {}
    for bias in biases:
        if not register_maps:
            registrations[bias] = None
            continue
        moving = maps[bias] if map_topographs is None else map_topographs[bias]
        reg = register(topograph, moving, pixel_size_nm=pixel_size, bragg_q=bragg_q, mask=bad,
                       sigma_nm=reg_sigma, coarse_sigma_nm=reg_sigma)
        registrations[bias] = reg
        maps[bias] = apply_shift(maps[bias], reg.shift_px, mode="spline")
    # One region for every bias, so each pair compares the same pixels.
    for image in maps.values():
        bad |= ~np.isfinite(image)
    # Every statistic is a mean of lock-in fields, smooth on the scale sigma: they are taken at every
    # step-th pixel, where the lock-in computes them exactly (_working_step).
    step = _working_step(sigma_nm, pixel_size)
    labels_c, bad_c = _decimate(labels, bad, step)
    pc = (pixel_size[0] * step, pixel_size[1] * step)
    interior = _interior_labels(labels_c, sigma_nm=sigma_nm, pixel_size=pc, mask=bad_c, margin_sigma=margin_sigma)
    ids = _label_ids(labels)
    valid = bad if bad.any() else None
    # The maps' backgrounds (their mean, often far above the order's amplitude) are removed before the
    # lock-in: their leak into it would ripple every phase and amplitude (_without_background).
    fields_a = {b: lockin(_without_background(maps[b], bad, sigma_nm=sigma_nm, pixel=pixel_size, step=step), q,
                          sigma_nm=sigma_nm, pixel_size_nm=pixel_size, mask=valid, step=step) for b in biases}
    rows = []
    for b in biases:
        rows.extend(_contrast_rows(np.where(bad, np.nan, maps[b]), fields_a[b], labels, interior, ids, b,
                                   sigma_nm, pixel_size, step))
    pairs = {}
    for b in biases:
        if b == reference:
            continue
        pairs[(reference, b)] = _phase_shift_stats(fields_a[reference], fields_a[b], interior, ids, sigma_nm,
                                                   pc, tolerance_rad, alpha, step)
    return BiasComparison(biases, reference, q, sigma_nm, registrations, pairs, tolerance_rad, alpha, rows)


def _json_float(value):
    """A float for JSON: NaN and infinities become None."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


# --------------------------------------------------------------------------- electronic contrast and types

NORMALISATIONS = ("frame", "setpoint", "none")

#: Significance level of the electronic-type tests (the family-wise false-alarm rate of
#: reporting a second type on a scene with one). A judgement (common practice, no source).
TYPES_ALPHA = 0.01


#: Relative change of the tip's gain (its density of states) during or between maps that the
#: grouping into electronic types tolerates. A judgement (common practice, no source).
GAIN_TOLERANCE = 0.2


@dataclass(frozen=True, eq=False)
class ContrastSet:
    """Per-domain values of one quantity (mean conductance or order amplitude) at every bias, with errors.

    Attributes
    ----------
    quantity : str
        "conductance" or "amplitude".
    mean, mean_se : ndarray (n_biases, n_domains)
        Mean over the domain's interior and its standard error.
    frame, frame_se : ndarray (n_biases, n_domains)
        Mean minus the area-weighted mean of all domains (contrast relative to the frame).
    contrast, contrast_se : ndarray (n_biases, n_domains)
        Contrast relative to the frame from the model F = a(row) + mu_domain (robust to
        offsets that change from scan line to scan line); area-weighted mean zero. The
        reference moves with the area weights: labels that differ by a pixel along the
        walls (another pixel size, another segmentation) shift every domain's contrast by
        one common amount, which the errors do not include; differences between domains
        (use ``cov``) do not move.
    cov : ndarray (n_biases, n_domains, n_domains)
        Covariance of ``contrast``.
    noise : ndarray (n_biases,)
        Robust pixel scatter s_F of the smoothed field (from differences along the scan lines).
    pairs : tuple of (int, int)
        Neighbouring domains (a < b).
    wall_delta, wall_se : ndarray (n_biases, n_pairs)
        Local difference a - b in a band either side of the wall, and its error.
    wall_row_matched : ndarray of bool (n_pairs,)
        Whether the difference was taken row by row (else band mean against band mean).
    """

    quantity: str
    mean: np.ndarray
    mean_se: np.ndarray
    frame: np.ndarray
    frame_se: np.ndarray
    contrast: np.ndarray
    contrast_se: np.ndarray
    cov: np.ndarray
    noise: np.ndarray
    pairs: tuple
    wall_delta: np.ndarray
    wall_se: np.ndarray
    wall_row_matched: np.ndarray


@dataclass(frozen=True, eq=False)
class ElectronicContrast:
    """Per-domain contrast of conductance maps (and order amplitude) at several biases, with errors.

    Built by :func:`domain_electronic_contrast`. ``units`` are the maps' units after the
    normalisation (``unit_token`` is the form used in column headers). ``working_step``:
    the statistics were taken at every s-th input pixel (:func:`domain_electronic_contrast`).
    ``source``: "maps" (one map per bias) or "grid" (slices of a spectroscopic grid,
    :func:`grid_electronic_contrast`; ``biases_V`` are then its energies).
    """

    biases_V: tuple
    domains: tuple
    area_nm2: np.ndarray
    units: str
    unit_token: str
    normalisation: str
    normalisation_note: str
    scale: tuple
    sigma_nm: float
    conductance: ContrastSet
    amplitude: ContrastSet | None = None
    working_step: int = 1
    source: str = "maps"

    def sets(self):
        """The quantities present: conductance, then the order amplitude if computed."""
        return [s for s in (self.conductance, self.amplitude) if s is not None]

    def rows(self) -> list[dict]:
        """One row per domain and bias for ``contrast.csv``, one value per cell, units in the headers."""
        u = self.unit_token
        out = []
        for i, d in enumerate(self.domains):
            for k, b in enumerate(self.biases_V):
                row = {"domain": int(d), "bias_V": float(b), "area_nm2": float(self.area_nm2[i])}
                for s in self.sets():
                    p = "" if s.quantity == "conductance" else "amplitude_"
                    row[f"{p}mean_{u}"] = _json_float(s.mean[k, i])
                    row[f"{p}mean_{u}_se"] = _json_float(s.mean_se[k, i])
                    row[f"{p}contrast_{u}"] = _json_float(s.contrast[k, i])
                    row[f"{p}contrast_{u}_se"] = _json_float(s.contrast_se[k, i])
                    row[f"{p}frame_contrast_{u}"] = _json_float(s.frame[k, i])
                    row[f"{p}frame_contrast_{u}_se"] = _json_float(s.frame_se[k, i])
                out.append(row)
        return out

    def wall_rows(self) -> list[dict]:
        """One row per pair of neighbouring domains, bias and quantity: the local difference across the wall."""
        u = self.unit_token
        out = []
        for s in self.sets():
            for m, (a, b) in enumerate(s.pairs):
                for k, bias in enumerate(self.biases_V):
                    delta, se = float(s.wall_delta[k, m]), float(s.wall_se[k, m])
                    z = delta / se if se > 0 else float("nan")
                    out.append({"quantity": s.quantity, "domain_a": int(a), "domain_b": int(b), "bias_V": float(bias),
                                f"difference_{u}": _json_float(delta), f"difference_{u}_se": _json_float(se),
                                "z": _json_float(z),
                                "p": _json_float(2 * stats.norm.sf(abs(z)) if math.isfinite(z) else float("nan")),
                                "row_matched": bool(s.wall_row_matched[m])})
        return out

    def to_summary(self) -> dict:
        """JSON-ready summary: normalisation, units, and per quantity the noise and the number of walls."""
        return {
            "biases_V": [float(b) for b in self.biases_V], "domains": [int(d) for d in self.domains],
            "units": self.units, "normalisation": self.normalisation, "normalisation_note": self.normalisation_note,
            "scale": [float(s) for s in self.scale], "sigma_nm": float(self.sigma_nm),
            "working_step_px": int(self.working_step), "source": self.source,
            "quantities": {s.quantity: {"noise": [_json_float(v) for v in s.noise],
                                        "n_walls": len(s.pairs)} for s in self.sets()},
        }


def _setpoint_list(setpoints_A, maps_in_order, biases):
    """Setpoint per bias from a dict {bias: A} or a sequence in the order of ``maps``."""
    if setpoints_A is None:
        raise InputError("normalisation = 'setpoint' needs setpoints_A (one setpoint current in A per map), got None")
    if isinstance(setpoints_A, dict):
        try:
            given = {float(k): v for k, v in setpoints_A.items()}
        except (TypeError, ValueError):
            raise InputError(f"setpoints_A keys must be biases in V, got {list(setpoints_A)!r}") from None
    else:
        values = list(np.ravel(np.asarray(setpoints_A, dtype=object)))
        if len(values) != len(maps_in_order):
            raise InputError(f"setpoints_A must hold one setpoint per map ({len(maps_in_order)}), got {len(values)}")
        given = dict(zip(maps_in_order, values))
    out = []
    for b in biases:
        v = given.get(b)
        try:
            v = float(v)
        except (TypeError, ValueError):
            v = float("nan")
        if not (math.isfinite(v) and v > 0):
            raise InputError(f"setpoints_A must give a positive current in A for the map at {b:g} V, "
                             f"got {given.get(b)!r}")
        out.append(v)
    return out


def _grown_labels(labels, pixel_size):
    """Every wall or unassigned pixel (0) given the label of the nearest domain pixel, and its distance to it, nm."""
    zero = labels == 0
    if not zero.any() or zero.all():
        return labels, np.zeros(labels.shape)
    d0, (ri, ci) = ndimage.distance_transform_edt(zero, sampling=pixel_size, return_indices=True)
    return labels[ri, ci], d0


def _neighbour_pairs(grown, d0, pixel_size, gap_nm, min_contact_nm):
    """Pairs (a, b), a < b, of domains that touch or face each other across a wall at most ``gap_nm`` wide.

    Two domains face each other where their grown labels (:func:`_grown_labels`) meet; the
    wall there is d0 + d0' wide (d0 of the two pixels that meet, exact for a wall along an
    axis). The contact is the length of boundary between them (one pixel side per meeting
    pair of pixels) and must be at least ``min_contact_nm``.
    """
    dy, dx = pixel_size
    base = int(grown.max()) + 1
    contact = {}
    for a, b, da, db, side in ((grown[1:], grown[:-1], d0[1:], d0[:-1], dx),
                               (grown[:, 1:], grown[:, :-1], d0[:, 1:], d0[:, :-1], dy)):
        edge = (a != b) & (a > 0) & (b > 0) & (da + db <= gap_nm * (1 + 1e-9))
        if not edge.any():
            continue
        lo = np.minimum(a[edge], b[edge]).astype(np.int64)
        hi = np.maximum(a[edge], b[edge]).astype(np.int64)
        keys, n = np.unique(lo * base + hi, return_counts=True)
        for key, c in zip(keys.tolist(), n.tolist()):
            contact[key] = contact.get(key, 0.0) + c * side
    return sorted((k // base, k % base) for k, c in contact.items() if c >= min_contact_nm * (1 - 1e-9))


def _facing(interior, grown, d0, pixel_size, reach_nm):
    """For each interior pixel, the domain across its nearest boundary when that domain lies within ``reach_nm``, else 0.

    One distance transform to the pixels of the grown labels that touch another label: the
    nearest such pixel f lies on the pixel's own side, and the domain across it is the grown
    label of f's neighbour g; the distance to that domain's own pixels is |p - f| + |f - g|
    plus g's distance to a domain pixel (half the wall). A pixel near a junction counts for the
    wall it is nearest to.
    """
    dy, dx = pixel_size
    across = np.zeros(grown.shape, dtype=np.int64)
    beyond = np.zeros(grown.shape)
    shifts = (((slice(1, None), slice(None)), (slice(None, -1), slice(None)), dy),
              ((slice(None, -1), slice(None)), (slice(1, None), slice(None)), dy),
              ((slice(None), slice(1, None)), (slice(None), slice(None, -1)), dx),
              ((slice(None), slice(None, -1)), (slice(None), slice(1, None)), dx))
    for here, there, side in shifts:
        g_here, g_there = grown[here], grown[there]
        new = (g_there != g_here) & (g_there > 0) & (across[here] == 0)
        across[here][new] = g_there[new]
        beyond[here][new] = side + d0[there][new]
    boundary = across > 0
    if not boundary.any():
        return np.zeros(grown.shape, dtype=np.int64)
    dist, (fr, fc) = ndimage.distance_transform_edt(~boundary, sampling=pixel_size, return_indices=True)
    near = (interior > 0) & (dist + beyond[fr, fc] <= reach_nm)
    return np.where(near, across[fr, fc], 0)


def _groups(values):
    """Pixels grouped by a nonzero integer image: {value: (rows, cols)}, rows in increasing order."""
    flat = values.ravel()
    idx = np.flatnonzero(flat)
    if idx.size == 0:
        return {}
    keys = flat[idx]
    order = np.argsort(keys, kind="stable")
    idx, keys = idx[order], keys[order]
    cuts = np.flatnonzero(np.diff(keys)) + 1
    out = {}
    for part in np.split(np.arange(idx.size), cuts):
        r, c = np.divmod(idx[part], values.shape[1])
        out[int(keys[part[0]])] = (r, c)
    return out


def _row_offset_model(interior, ids, area, kernels):
    """The per-domain contrasts in the model F = a(row) + mu_domain + noise, as a linear map of F, and their covariance.

    Least squares over every interior pixel with one free offset per scan line: within
    a row the offset is eliminated by subtracting the row's mean, leaving the normal
    matrix M = sum_rows [diag(n_r) - n_r n_r^T / N_r] (n_r the pixel count of each domain
    in row r, N_r their sum). The contrasts are fixed by one constraint per connected
    group of domains (domains linked by shared rows): area-weighted mean zero over the
    frame. mu = G b with b_e = sum_p phi_e(p) F(p), phi_e(p) = [p in e] - n_r(e) / N_r over
    interior pixels, G the top-left block of the inverse KKT matrix (derived; Lawson &
    Hanson, Solving Least Squares Problems, 1974; from memory). Any offset that depends
    only on the scan line (a tip change, a slow change of the tip between lines) cancels
    exactly. The covariance is s_F^2 S with S = G P G^T, P_ef = sum_pp' phi_e(p) rho(p - p')
    phi_f(p') (derived); phi_e vanishes outside the rows where e is present, so each row of
    P costs one filter over that band of rows. A change of the tip's gain within a map
    (the contrast of the lines after it scaled) is not a line offset and does not cancel.
    Returns a dict: rows, cols, dom (interior pixels and their domain index), frac, G, S,
    ncomp, comp.
    """
    from scipy.sparse.csgraph import connected_components

    nd = len(ids)
    index = np.zeros(int(interior.max()) + 1, np.int64)
    index[ids] = np.arange(nd)
    rows, cols = np.nonzero(interior > 0)  # row-major: rows ascending
    dom = index[interior[rows, cols]]
    nrow, ncol = interior.shape
    cnt = np.bincount(rows * nd + dom, minlength=nrow * nd).reshape(nrow, nd).astype(float)
    n_r = cnt.sum(1)
    used = n_r > 0
    frac = np.zeros_like(cnt)
    frac[used] = cnt[used] / n_r[used, None]
    M = np.diag(cnt.sum(0)) - cnt[used].T @ frac[used]
    link = (np.abs(M) > 1e-9 * max(np.abs(M).max(), 1.0)).astype(float)
    ncomp, comp = connected_components(link, directed=False)
    C = np.zeros((ncomp, nd))
    for c in range(ncomp):
        members = comp == c
        C[c, members] = area[members] / area[members].sum()
    # The constraint rows are scaled like M (which leaves G unchanged: G = Z (Z^T M Z)^-1 Z^T, Z spanning
    # the null space of C), so the KKT matrix stays well conditioned whatever the pixel count.
    C = C * max(float(np.abs(M).max()), 1.0)
    K = np.block([[M, C.T], [C, np.zeros((ncomp, ncomp))]])
    G = np.linalg.pinv(K, rcond=1e-12)[:nd, :nd]
    hy = len(kernels[0]) // 2
    P = np.zeros((nd, nd))
    for e in range(nd):
        present = np.flatnonzero(cnt[:, e] > 0)
        r0, r1 = max(int(present[0]) - hy, 0), min(int(present[-1]) + hy + 1, nrow)
        i0, i1 = np.searchsorted(rows, (r0, r1))
        rr, cc, dd = rows[i0:i1] - r0, cols[i0:i1], dom[i0:i1]
        phi = (dd == e) - frac[rr + r0, e]
        band = np.zeros((r1 - r0, ncol))
        band[rr, cc] = phi
        psi = _rho_filter(band, kernels)[rr, cc]
        P[e] = np.bincount(dd, psi, nd) - frac[r0:r1].T @ np.bincount(rr, psi, r1 - r0)
    S = G @ (0.5 * (P + P.T)) @ G.T
    return {"rows": rows, "cols": cols, "dom": dom, "frac": frac, "G": G, "S": S, "ncomp": ncomp, "comp": comp}


def _model_contrasts(model, values):
    """mu = G b, b_e = sum_{p in e} F(p) - sum_r frac_re sum_{p in row r} F(p), from F at the model's pixels."""
    nd = model["G"].shape[0]
    b = np.bincount(model["dom"], values, nd) - model["frac"].T @ np.bincount(model["rows"], values,
                                                                               model["frac"].shape[0])
    return model["G"] @ b


def _field_noise(field, interior, lag_px):
    """Pixel scatter s_F of a smoothed field from differences along the scan lines, robust to line offsets.

    For F = K * (white noise), F(x + L) - F(x) has variance 2 s_F^2 (1 - exp(-L^2 / 4 sigma^2))
    (derived from the autocorrelation of Gaussian-smoothed white noise). Pairs of pixels
    L apart in one row and one domain's interior are used, so offsets of whole scan lines
    (tip changes) and the domains' own contrasts cancel; the scale is 1.4826 times the
    median absolute difference (common practice, no source).
    """
    lag = int(lag_px[0])
    a, b = interior[:, :-lag], interior[:, lag:]
    same = (a > 0) & (a == b)
    if not same.any():
        return float("nan")
    diff = (field[:, lag:] - field[:, :-lag])[same]
    return float(1.4826 * np.median(np.abs(diff - np.median(diff))) / math.sqrt(2 * lag_px[1]))


def _link_groups(mu, cv, comp, ncomp, frac, fr, fr_var, pairs, delta, dse):
    """Shift groups of domains that share no scan line so that their walls' local differences hold.

    Within a group the contrasts are fixed by the line-offset model up to one shift per
    group. The shifts s_c are the weighted least-squares solution of s_c(a) - s_c(b) =
    Delta_ab - mu_a + mu_b over the walls between groups, with sum_c W_c s_c = 0 (W_c the
    group's area fraction); a group with no such wall follows its frame contrasts
    (biased by a tip change between lines). Their covariance is added (derived). The
    caller adds to each wall's error the range of the line offsets seen within the
    groups: a wall between groups lies along the scan lines, so a tip change between its
    two bands cannot be told from contrast.
    """
    W = np.array([frac[comp == c].sum() for c in range(ncomp)])
    rows_, rhs, var = [], [], []
    for m, (a, b) in enumerate(pairs):
        ca, cb = comp[a], comp[b]
        if ca != cb and np.isfinite(delta[m]) and dse[m] > 0:
            r = np.zeros(ncomp)
            r[ca], r[cb] = 1.0, -1.0
            rows_.append(r)
            rhs.append(delta[m] - mu[a] + mu[b])
            var.append(dse[m] ** 2)
    # Groups without walls to others: a weak tie to the frame contrasts (their group mean).
    for c in range(ncomp):
        u = frac[comp == c] / W[c]
        r = np.zeros(ncomp)
        r[c] = 1.0
        rows_.append(r)
        rhs.append(float(np.sum(u * fr[comp == c])))
        linked = any(comp[a] != comp[b] and (comp[a] == c or comp[b] == c) for a, b in pairs)
        var.append(float(np.sum(u**2 * fr_var[comp == c])) * (1e6 if linked else 1.0))
    A = np.array(rows_)
    w = 1 / np.array(var)
    H = A.T @ (w[:, None] * A)
    # Solved in the subspace W.s = 0 (s = N t, N orthonormal): a Lagrange (KKT) matrix would mix the
    # weights 1 / var (up to 1e8 and more) with the constraint row (~1), and its pseudo-inverse would lose
    # the constraint (a spurious common error on every contrast).
    basis, _ = np.linalg.qr(np.column_stack([W, np.eye(ncomp)]))
    N = basis[:, 1:ncomp]
    Hinv = np.linalg.pinv(N.T @ H @ N, hermitian=True)
    shift = N @ (Hinv @ (N.T @ (A.T @ (w * np.array(rhs)))))
    scov = N @ Hinv @ N.T
    mu = mu + shift[comp]
    cv = cv + scov[np.ix_(comp, comp)]
    return mu, cv


@dataclass(frozen=True, eq=False)
class _Geometry:
    """Where each estimator of :func:`domain_electronic_contrast` takes its pixels, on the working grid."""

    step: int
    pixel: tuple
    interior: np.ndarray
    ids: np.ndarray
    area: np.ndarray
    kernels: tuple
    domain_w: list
    dom_norm2: np.ndarray
    pairs: list
    wall_w: list
    wall_norm2: np.ndarray
    row_matched: list
    lag_px: tuple
    model: dict
    sigma_px: tuple


def _contrast_geometry(labels, bad, *, sigma_nm, pixel, margin_sigma, band_sigma):
    """Interiors, wall bands, the line-offset model and the variance factors, on the working grid."""
    dy, dx = pixel
    counts = np.bincount(labels.ravel())
    all_ids = np.flatnonzero(counts[1:]) + 1
    if all_ids.size < 1:
        raise InputError("labels hold no domain (every pixel is 0)")
    step = _working_step(sigma_nm, pixel)
    labels_c, bad_c = _decimate(labels, bad, step)
    pc = (dy * step, dx * step)
    interior = _interior_labels(labels_c, sigma_nm=sigma_nm, pixel_size=pc, mask=bad_c, margin_sigma=margin_sigma)
    inside = _groups(interior)
    ids = np.array([d for d in all_ids if int(d) in inside], dtype=np.int64)
    if ids.size < 1:
        raise InputError(f"no domain has an interior {margin_sigma:g} sigma from its walls "
                         f"(sigma_nm = {sigma_nm:g}); use a smaller sigma_nm")
    area = counts[ids] * dy * dx
    kernels = _rho_kernels(sigma_nm, pc)

    # Domain estimators: the mean over the interior.
    domain_w, dom_norm2 = [], []
    for d in ids:
        r, c = inside[int(d)]
        w = np.full(r.size, 1.0 / r.size)
        domain_w.append((r, c, w))
        dom_norm2.append(_quad_form(r, c, w, kernels))

    # Wall estimators: row-matched band differences.
    index = {int(d): i for i, d in enumerate(ids)}
    grown, d0 = _grown_labels(labels_c, pc)
    gap_nm = max(3 * sigma_nm, 2 * min(pc))  # walls labelled 0 up to 3 sigma wide
    candidates = [(a, b) for a, b in _neighbour_pairs(grown, d0, pc, gap_nm, sigma_nm) if a in index and b in index]
    facing = _facing(interior, grown, d0, pc, (margin_sigma + band_sigma) * sigma_nm)
    base = int(max(interior.max(), facing.max())) + 1
    bands = _groups(np.where(facing > 0, interior.astype(np.int64) * base + facing, 0))
    min_rows = 3  # any shared rows give an unbiased row-matched difference; few give a large (exact) error
    pairs, wall_w, wall_norm2, row_matched = [], [], [], []
    for a, b in candidates:
        if a * base + b not in bands or b * base + a not in bands:
            continue
        ra, ca = bands[a * base + b]
        rb, cb = bands[b * base + a]
        shared = np.intersect1d(ra, rb)
        if shared.size >= min_rows:
            keep_a, keep_b = np.isin(ra, shared), np.isin(rb, shared)
            ra, ca, rb, cb = ra[keep_a], ca[keep_a], rb[keep_b], cb[keep_b]
            na = np.bincount(ra, minlength=interior.shape[0])
            nb = np.bincount(rb, minlength=interior.shape[0])
            wa = 1.0 / (shared.size * na[ra])
            wb = -1.0 / (shared.size * nb[rb])
            matched = True
        else:
            wa, wb = np.full(ra.size, 1.0 / ra.size), np.full(rb.size, -1.0 / rb.size)
            matched = False
        r, c, w = np.concatenate([ra, rb]), np.concatenate([ca, cb]), np.concatenate([wa, wb])
        pairs.append((index[a], index[b]))
        wall_w.append((r, c, w))
        wall_norm2.append(_quad_form(r, c, w, kernels))
        row_matched.append(matched)
    lag = max(1, int(round(4 * sigma_nm / pc[1])))
    lag_px = (lag, 1 - math.exp(-((lag * pc[1] / sigma_nm) ** 2) / 4))
    model = _row_offset_model(interior, ids, area, kernels)
    return _Geometry(step, pc, interior, ids, area, kernels, domain_w, np.array(dom_norm2), pairs, wall_w,
                     np.array(wall_norm2), row_matched, lag_px, model, (sigma_nm / pc[0], sigma_nm / pc[1]))


def _upsample(coarse, shape, step):
    """Linear interpolation from the samples at (s m, s n) to every pixel (constant beyond the last sample).

    Separable: along the columns, then along the rows, each output value from its two
    neighbouring samples (two gathers and a weighted sum per axis, no interpolation matrix).
    """
    if step == 1:
        return coarse

    def weights(n, m):
        x = np.arange(n) / step
        i0 = np.minimum(np.floor(x).astype(np.int64), m - 1)
        i1 = np.minimum(i0 + 1, m - 1)
        t = np.clip(x - i0, 0.0, 1.0).astype(coarse.dtype)
        return i0, i1, t

    r0, r1, tr = weights(shape[0], coarse.shape[0])
    c0, c1, tc = weights(shape[1], coarse.shape[1])
    cols = coarse[:, c0] * (1 - tc)
    cols += coarse[:, c1] * tc
    out = cols[r0]
    out *= (1 - tr)[:, None]
    far = cols[r1]  # two full-size arrays at most
    far *= tr[:, None]
    out += far
    return out


def _without_background(image, bad, *, sigma_nm, pixel, step):
    """A map (float32) less its slowly varying background, for the lock-in at the order's wavevectors.

    The lock-in at q takes exp(-sigma^2 |q|^2 / 2) of whatever sits at k = 0 (the Gaussian's
    transfer at distance |q|; docs/methods.md §1). A conductance map's mean is often tens of
    times the order's amplitude, so that leak, turning as exp(-i q.r), puts a ripple at q on
    the phase and the amplitude: in a domain's interior the phase shift between two biases then
    spreads by some 20 degrees with no noise at all, and its error, read from that spread, came
    out ten times too large (docs/methods.md §10). The background removed is the map smoothed
    over 2 sigma (the normalised lock-in at q = 0 on the working grid, interpolated back),
    which holds constants and planes exactly and takes exp(-2 sigma^2 |q|^2), the fourth power
    of the leak above, of the order itself (derived).
    """
    img = np.asarray(image, dtype=np.float32)
    mask = bad if bad.any() else None
    smooth = np.asarray(lockin(img, (0.0, 0.0), sigma_nm=2 * sigma_nm, pixel_size_nm=pixel, mask=mask,
                               step=step).real, dtype=np.float32)
    finite = np.isfinite(smooth)
    filled = np.where(finite, smooth, smooth[finite].mean() if finite.any() else 0.0).astype(np.float32)
    return img - _upsample(filled, img.shape, step)


def _electronic_fields(image, scale, bad, *, sigma_nm, pixel, step, q):
    """The sigma-smoothed map and, with q, the order amplitude of what is left, at the working grid's pixels.

    The smoothed map is the normalised Gaussian average of the valid pixels (the lock-in at
    q = 0), taken at every ``step``-th pixel. Before the lock-in at q the slowly varying part
    is removed (interpolated back from those samples, which hold its whole band): its leak
    exp(-sigma^2 q^2 / 2) into the lock-in at q would add a ripple to the amplitude
    (docs/methods.md §1; derived).
    """
    img = np.multiply(image, scale, dtype=np.float32)
    mask = bad if bad.any() else None
    smooth = np.asarray(lockin(img, (0.0, 0.0), sigma_nm=sigma_nm, pixel_size_nm=pixel, mask=mask,
                               step=step).real, dtype=float)
    if q is None:
        return smooth, None
    finite = np.isfinite(smooth)
    filled = np.where(finite, smooth, smooth[finite].mean() if finite.any() else 0.0).astype(np.float32)
    img -= _upsample(filled, img.shape, step)
    a = lockin(img, q, sigma_nm=sigma_nm, pixel_size_nm=pixel, mask=mask, step=step)
    amp = 2 * np.abs(a).astype(float)
    return smooth, np.sqrt(np.sum(amp**2, axis=0))


def _total_amplitude(a):
    """sqrt(sum_j (2 |A_j|)^2) of lock-in fields (k, ...), float64 (as :func:`_electronic_fields` has it)."""
    amp = 2 * np.abs(a).astype(float)
    return np.sqrt(np.sum(amp**2, axis=0))


def _field_stats(f, geo):
    """One field's row of a :class:`ContrastSet`: per-domain means, frame and model contrasts with their
    covariance, wall differences and the noise, from the field ``f`` on the working grid of ``geo``."""
    interior, area, pairs = geo.interior, geo.area, geo.pairs
    frac = area / area.sum()
    model = geo.model
    rows, cols, dom = model["rows"], model["cols"], model["dom"]
    noise = _field_noise(f, interior, geo.lag_px)
    mean = np.array([float(np.sum(f[r, c] * w)) for r, c, w in geo.domain_w])
    mean_se = noise * np.sqrt(geo.dom_norm2)
    frame_mean = float(np.sum(frac * mean))
    fr = mean - frame_mean
    var = mean_se**2
    fr_var = var * (1 - frac) ** 2 + (np.sum(frac**2 * var) - frac**2 * var)
    delta = np.array([float(np.sum(f[r, c] * w)) for r, c, w in geo.wall_w])
    dse = noise * np.sqrt(geo.wall_norm2)
    values = f[rows, cols]
    mu = _model_contrasts(model, values)
    cv = noise**2 * model["S"]
    if model["ncomp"] > 1:
        # Line offsets seen inside the groups: a wall between groups may straddle such a change. Each
        # scan line holds domains of one group only; the groups' offsets relative to each other are
        # what the walls measure, so the range is taken within each group.
        n_r = np.bincount(rows, minlength=f.shape[0])
        used = np.flatnonzero(n_r)
        a_r = np.bincount(rows, values - mu[dom], f.shape[0])[used] / n_r[used]
        group_of_row = np.zeros(f.shape[0], np.int64)
        group_of_row[rows] = model["comp"][dom]
        size = max(3, int(2 * math.sqrt(math.pi) * geo.sigma_px[0]) | 1)
        step = 0.0
        for g in range(model["ncomp"]):
            mine = a_r[group_of_row[used] == g]
            if mine.size:
                mine = ndimage.median_filter(mine, size=size)
                step = max(step, float(mine.max() - mine.min()))
        mu, cv = _link_groups(mu, cv, model["comp"], model["ncomp"], frac, fr, fr_var, pairs, delta,
                              np.hypot(dse, step))
    return {"mean": mean, "mean_se": mean_se, "frame": fr, "frame_se": np.sqrt(fr_var), "contrast": mu,
            "contrast_se": np.sqrt(np.clip(np.diag(cv), 0, None)), "cov": cv, "noise": noise,
            "wall_delta": delta, "wall_se": dse}


def _stats_set(quantity, rows, geo):
    """A :class:`ContrastSet` from the rows of :func:`_field_stats`, one per bias in order."""
    ids, pairs = geo.ids, geo.pairs
    nb, nd, nw = len(rows), len(ids), len(pairs)
    shapes = {"mean": (nd,), "mean_se": (nd,), "frame": (nd,), "frame_se": (nd,), "contrast": (nd,),
              "contrast_se": (nd,), "cov": (nd, nd), "noise": (), "wall_delta": (nw,), "wall_se": (nw,)}
    out = {k: np.full((nb,) + shape, np.nan) for k, shape in shapes.items()}
    for k, row in enumerate(rows):
        for key in shapes:
            out[key][k] = row[key]
    return ContrastSet(quantity, out["mean"], out["mean_se"], out["frame"], out["frame_se"], out["contrast"],
                       out["contrast_se"], out["cov"], out["noise"],
                       tuple((int(ids[a]), int(ids[b])) for a, b in pairs), out["wall_delta"], out["wall_se"],
                       np.asarray(geo.row_matched, bool))


def _contrast_set(quantity, fields, geo):
    """A :class:`ContrastSet` of the fields (one per bias, on the working grid of ``geo``)."""
    return _stats_set(quantity, [_field_stats(f, geo) for f in fields], geo)


def default_normalisation(setpoints_A):
    """The normalisation for maps with these setpoints: "setpoint" if all are known and differ, else "none" or "frame".

    Maps recorded at one known setpoint need none; at known different setpoints they are
    scaled to one (a constant-current dI/dV map scales with the setpoint current; common
    practice, no source); with any setpoint unknown each map is divided by its frame mean.

    Parameters
    ----------
    setpoints_A : sequence of float or None
        Setpoint current of each map, A (None where unknown).

    Returns
    -------
    str
        "setpoint", "none" or "frame".

    Examples
    --------
    >>> default_normalisation([1e-10, 1.5e-10]), default_normalisation([1e-10, 1e-10]), default_normalisation([None])
    ('setpoint', 'none', 'frame')
    """
    values = []
    for v in setpoints_A:
        try:
            v = float(v)
        except (TypeError, ValueError):
            return "frame"
        if not (math.isfinite(v) and v > 0):
            return "frame"
        values.append(v)
    if not values:
        return "frame"
    return "none" if np.allclose(values, values[0], rtol=1e-6, atol=0.0) else "setpoint"


def domain_electronic_contrast(maps, labels, *, pixel_size_nm, sigma_nm, units="nS", mask=None, normalisation="frame",
                               setpoints_A=None, q=None, margin_sigma=3.5, band_sigma=3.0):
    """Per-domain conductance (and order amplitude) at each bias, relative to the frame and across each wall.

    Each map is first normalised (``normalisation``): "frame" divides it by its frame
    mean (values in % of the frame mean), "setpoint" multiplies it by I_ref / I_map so
    that every map refers to the setpoint current of the lowest-bias map (a
    constant-current dI/dV map scales with the setpoint current; common practice, no
    source), "none" leaves it. It is then smoothed by the unit-sum Gaussian of
    ``sigma_nm`` (normalised over the valid pixels; this removes the CDW and atomic
    modulation when sigma |Q| >~ 3, docs/methods.md §1).

    Every field is smooth on the scale sigma, so the statistics are taken at every s-th
    pixel along rows and columns, s = :func:`domains.lossless_step` (about 0.6 sigma;
    ``working_step`` of the result), where the lock-in gives the smoothed fields exactly
    and which holds their whole band. Maps and labels already on such a coarse grid
    (s = 1) are used as given; nothing assumes the pixel to be much smaller than sigma.

    - **Domain mean**: over the domain's interior (``margin_sigma`` sigma from other
      labels, walls, masks and the edge).
    - **Wall difference** between neighbours a and b (domains that meet across a wall at
      most 3 sigma wide along at least sigma): pixels of a's interior whose nearest
      boundary faces b and lie within (``margin_sigma`` + ``band_sigma``) sigma of b, against
      those of b facing a, taken row by
      row (scan line by scan line), so any offset that depends only on the scan line (a
      tip change, a slow drift of the tip between lines) cancels; walls along the rows,
      whose bands share fewer than 3 rows, use band means instead (``row_matched`` False).
    - **Contrast** of each domain relative to the frame: least squares of the model
      F = a(row) + mu_domain over every interior pixel, one free offset per scan line, the
      area-weighted mean of mu zero (the local difference generalised to every pair of
      domains that share scan lines): offsets of whole scan lines cancel exactly.
      ``frame`` is the plain mean minus the area-weighted frame mean, which a tip change
      between lines biases. A change of the tip's gain is not removed (see
      :func:`electronic_types`).
    - **Errors**: the smoothed field F = K * g of white noise g has the correlation
      rho(r) = exp(-r^2 / 4 sigma^2) between points r apart (derived: the autocorrelation
      of a Gaussian), so a weighted sum sum_p w_p F(p) has variance
      s_F^2 sum_pp' w_p w_p' rho(p - p'), s_F^2 the pixel variance of F, with rho taken at
      the actual distances between the pixels used: the count of independent
      sigma-patches follows from the pixel size. For a region of area S much larger than
      sigma^2 this is s_F^2 4 pi sigma^2 / S: one independent sigma-patch per
      4 pi sigma^2 (derived). s_F is measured from
      differences of F along the scan lines within domains (robust to line offsets). The
      contrasts' full covariance follows from the same formula with the model's pixel
      weights.
    - **Order amplitude** (with ``q``): the lock-in amplitude sqrt(sum_j (2|A_j|)^2) [1]_
      of the normalised map, treated with the same estimators (it is already smooth on
      the scale sigma).

    Parameters
    ----------
    maps : dict {bias_V: (row, col) array or Scan}
        Maps (e.g. dI/dV) on the labels' pixel grid, drift-corrected like the topograph.
    labels : (row, col) int array
        0 = wall or unassigned, 1..N domains.
    pixel_size_nm : float or (float, float)
        Pixel size, nm.
    sigma_nm : float
        Smoothing (and lock-in) width, nm.
    units : str
        Units of the maps (the sidecar's ``units``, e.g. "nS").
    mask : (row, col) bool array, optional
        True where pixels are untrusted.
    normalisation : {"frame", "setpoint", "none"}
        How maps taken at different times are put on one scale.
    setpoints_A : dict {bias_V: A} or sequence, optional
        Setpoint current of each map (needed for "setpoint"), a sequence in the order of ``maps``.
    q : (k, 2) array_like, optional
        Order wavevectors (qx, qy), rad/nm: adds the order amplitude.
    margin_sigma, band_sigma : float
        Interior margin and width of the band beside each wall, in units of sigma.

    Returns
    -------
    ElectronicContrast

    Raises
    ------
    InputError
        Bad maps, labels, normalisation or setpoints.

    References
    ----------
    .. [1] J. A. Slezak et al., PNAS 105, 3203 (2008). doi:10.1073/pnas.0706795105

    Examples
    --------
    >>> import numpy as np
    >>> labels = np.ones((96, 96), np.int32); labels[:, 48:] = 2
    >>> noise = np.random.default_rng(0).normal(0, 0.05, (2, 96, 96))
    >>> maps = {-0.3: 1.0 + 0.2 * (labels == 1) + noise[0], 0.3: 1.0 - 0.1 * (labels == 1) + noise[1]}
    >>> c = domain_electronic_contrast(maps, labels, pixel_size_nm=0.1, sigma_nm=0.4, normalisation="none")
    >>> np.round(c.conductance.wall_delta[:, 0], 2).tolist(), c.conductance.pairs
    ([0.2, -0.1], ((1, 2),))
    """
    pixel = pixel_size_pair(pixel_size_nm)
    dy, dx = pixel
    sigma_nm = positive(sigma_nm, "sigma_nm")
    margin_sigma = positive(margin_sigma, "margin_sigma")
    band_sigma = positive(band_sigma, "band_sigma")
    if normalisation not in NORMALISATIONS:
        raise InputError(f"normalisation must be one of {', '.join(NORMALISATIONS)}, got {normalisation!r}")
    if not isinstance(units, str) or not units.strip():
        raise InputError(f"units must be a non-empty string (the maps' units, e.g. 'nS'), got {units!r}")
    labels_in = np.asarray(labels)
    maps = _check_maps(maps, labels_in.shape, pixel, like="the labels")
    labels = _labels(labels_in, labels_in.shape)
    given_order = list(maps)
    biases = sorted(maps)
    bad = _mask(mask, labels.shape)
    for image in maps.values():
        bad |= ~np.isfinite(image)
    if q is not None:
        q = _q(q)

    # Normalisation.
    if normalisation == "setpoint":
        setpoints = _setpoint_list(setpoints_A, given_order, biases)
        scale = [setpoints[0] / s for s in setpoints]
        note = (f"each map scaled by I_ref / I_map to the setpoint {setpoints[0]:.3g} A of the map at "
                f"{biases[0]:+.2f} V")
        shown_units, token = units, units
    elif normalisation == "frame":
        scale = []
        for b in biases:
            m = float(np.mean(maps[b], where=~bad)) if (~bad).any() else float("nan")
            if not (math.isfinite(m) and m != 0):
                raise InputError(f"normalisation = 'frame' needs a nonzero frame mean; the map at {b:g} V has {m!r}")
            scale.append(100.0 / m)
        note = "each map divided by its frame mean (values in % of the frame mean)"
        shown_units, token = f"% of frame mean ({units})", "pct"
    else:
        scale = [1.0] * len(biases)
        note = "maps used as recorded (no normalisation)"
        shown_units, token = units, units
    token = "".join(ch if ch.isalnum() else "_" for ch in token).strip("_") or "value"

    return _electronic_contrast(((b, maps[b]) for b in biases), scale, labels, bad, sigma_nm=sigma_nm, pixel=pixel,
                                q=q, margin_sigma=margin_sigma, band_sigma=band_sigma, units=shown_units, token=token,
                                normalisation=normalisation, note=note, source="maps")


def _electronic_contrast(images, scale, labels, bad, *, sigma_nm, pixel, q, margin_sigma, band_sigma, units, token,
                         normalisation, note, source):
    """The contrasts of images given as (bias, image) pairs, one at a time (scaled by ``scale`` in that order)."""
    dy, dx = pixel
    geo = _contrast_geometry(labels, bad, sigma_nm=sigma_nm, pixel=pixel, margin_sigma=margin_sigma,
                             band_sigma=band_sigma)
    if q is not None and not _resolved(q, pixel):
        note += (f"; order amplitude not measured: q reaches beyond the Nyquist limit of the "
                 f"{dy:g} x {dx:g} nm pixels")
        q = None
    # Fields: the smoothed normalised map, and the order amplitude, on the working grid.
    biases, cond_fields, amp_fields = [], [], []
    for (b, image), s in zip(images, scale):
        smooth, amp = _electronic_fields(image, s, bad, sigma_nm=sigma_nm, pixel=pixel, step=geo.step, q=q)
        biases.append(float(b))
        cond_fields.append(smooth)
        if amp is not None:
            amp_fields.append(amp)
    order = np.argsort(biases, kind="stable")
    biases, scale = [biases[i] for i in order], [float(scale[i]) for i in order]
    conductance = _contrast_set("conductance", [cond_fields[i] for i in order], geo)
    amplitude = _contrast_set("amplitude", [amp_fields[i] for i in order], geo) if q is not None else None
    return ElectronicContrast(tuple(biases), tuple(int(d) for d in geo.ids), geo.area, units, token, normalisation,
                              note, tuple(scale), sigma_nm, conductance, amplitude, geo.step, source)


def grid_electronic_contrast(grid, energies_V, labels, *, pixel_size_nm, sigma_nm, units="nS", mask=None, q=None,
                             margin_sigma=3.5, band_sigma=3.0, progress=False):
    """Per-domain conductance (and order amplitude) at every energy of a spectroscopic grid, with errors.

    The slices of the grid are treated like maps at their energies
    (:func:`domain_electronic_contrast`: interior means, row-matched differences across
    the walls, contrasts free of scan-line offsets, errors from the independent
    sigma-patches), without normalisation: every spectrum of a grid is taken at one
    setpoint. The geometry (interiors, wall bands, the line-offset model and its
    covariance) depends on the labels alone and is computed once for every slice. A
    dask grid is computed a few slices at a time (its energy chunks, cut to at most 4
    slices and 256 MiB) and never held whole; each slice is smoothed and demodulated on
    the working grid (every s-th pixel, about 0.6 sigma), reduced to its per-domain and
    per-wall statistics and dropped. Pass the result to :func:`electronic_types` for the types, their mean spectra
    (:meth:`ElectronicTypes.spectra`) and the energies where they differ.

    Parameters
    ----------
    grid : (energy, row, col) array or dask array
        Spectroscopic grid, e.g. dI/dV, on the labels' pixel grid.
    energies_V : (energy,) array_like
        Bias of each slice, V (distinct).
    labels : (row, col) int array
        0 = wall or unassigned, 1..N domains.
    pixel_size_nm : float or (float, float)
        Pixel size, nm.
    sigma_nm : float
        Smoothing (and lock-in) width, nm.
    units : str
        Units of the grid's values (e.g. "nS").
    mask : (row, col) bool array, optional
        True where pixels are untrusted.
    q : (k, 2) array_like, optional
        Order wavevectors (qx, qy), rad/nm: adds the order amplitude at every energy.
    margin_sigma, band_sigma : float
        Interior margin and width of the band beside each wall, in units of sigma.
    progress : bool
        Show a progress bar over the energies.

    Returns
    -------
    ElectronicContrast
        ``biases_V`` are the energies, ascending; ``source`` is "grid".

    Raises
    ------
    InputError
        If the grid is not 3-D and real, the energies do not match its first axis or
        repeat, or the labels' shape differs from a slice.

    References
    ----------
    .. [1] J. A. Slezak et al., PNAS 105, 3203 (2008). doi:10.1073/pnas.0706795105

    Examples
    --------
    >>> import numpy as np
    >>> labels = np.ones((96, 96), np.int32); labels[:, 48:] = 2
    >>> e = np.array([-0.2, 0.0, 0.2])
    >>> noise = np.random.default_rng(0).normal(0, 0.05, (3, 96, 96))
    >>> grid = 1.0 + np.where(labels == 1, 1, -1) * e[:, None, None] + noise   # domain 1 brighter above 0 V
    >>> c = grid_electronic_contrast(grid, e, labels, pixel_size_nm=0.1, sigma_nm=0.4)
    >>> np.round(c.conductance.wall_delta[:, 0], 1).tolist()
    [-0.4, 0.0, 0.4]
    """
    pixel = pixel_size_pair(pixel_size_nm)
    sigma_nm = positive(sigma_nm, "sigma_nm")
    grid, energies, labels, bad = _check_grid(grid, energies_V, labels, mask)
    if q is not None:
        q = _q(q)
    geo = _grid_contrast_geometry(energies, labels, bad, units=units, sigma_nm=sigma_nm, pixel=pixel,
                                  margin_sigma=margin_sigma, band_sigma=band_sigma)
    amplitude = q is not None and _resolved(q, pixel)
    _, _, cond, amps = _grid_pass(grid, energies.size, bad, q=q, sigma_nm=sigma_nm, pixel=pixel, geo=geo,
                                  amplitude=amplitude, progress=progress)
    return _grid_contrast(energies, cond, amps if amplitude else None, geo, units=units, sigma_nm=sigma_nm,
                          pixel=pixel, q=q)


def _grid_contrast_geometry(energies, labels, bad, *, units, sigma_nm, pixel, margin_sigma, band_sigma):
    """The checks of a grid's electronic contrast that do not read the grid, and its geometry
    (:func:`_contrast_geometry`), once for every slice."""
    margin_sigma = positive(margin_sigma, "margin_sigma")
    band_sigma = positive(band_sigma, "band_sigma")
    if not isinstance(units, str) or not units.strip():
        raise InputError(f"units must be a non-empty string (the grid's units, e.g. 'nS'), got {units!r}")
    if np.unique(energies).size != energies.size:
        raise InputError(f"energies_V must be distinct, got {energies.tolist()}")
    return _contrast_geometry(labels, bad, sigma_nm=sigma_nm, pixel=pixel, margin_sigma=margin_sigma,
                              band_sigma=band_sigma)


def _grid_contrast(energies, cond, amps, geo, *, units, sigma_nm, pixel, q):
    """The :class:`ElectronicContrast` of a grid from its slices' rows (:func:`_field_stats`), energies ascending."""
    note = "a grid: every spectrum taken at one setpoint, used as recorded"
    if q is not None and amps is None:
        note += (f"; order amplitude not measured: q reaches beyond the Nyquist limit of the "
                 f"{pixel[0]:g} x {pixel[1]:g} nm pixels")
    order = np.argsort(energies, kind="stable")
    token = "".join(ch if ch.isalnum() else "_" for ch in units).strip("_") or "value"
    conductance = _stats_set("conductance", [cond[i] for i in order], geo)
    amplitude = None if amps is None else _stats_set("amplitude", [amps[i] for i in order], geo)
    return ElectronicContrast(tuple(float(energies[i]) for i in order), tuple(int(d) for d in geo.ids), geo.area,
                              units, token, "none", note, (1.0,) * energies.size, sigma_nm, conductance, amplitude,
                              geo.step, "grid")


def _grid_analysis(grid, energies_V, labels, q, *, sigma_nm, pixel_size_nm, mask=None, units="nS",
                   fingerprint_margin_sigma=2.5, margin_sigma=3.5, band_sigma=3.0, progress=False):
    """:func:`grid_fingerprints` and :func:`grid_electronic_contrast` (with ``q``) in one pass over the grid.

    Each slice is read, demodulated and reduced once for both; the labels' geometries (interiors,
    wall bands, the line-offset model, correlation kernels) are computed once before the pass.
    The results equal those of the two functions called one after the other.

    Returns
    -------
    fingerprints : Fingerprints
    contrast : ElectronicContrast or InputError
        The error when the contrast cannot be measured (e.g. no domain has an interior
        ``margin_sigma`` sigma from its walls); the fingerprints are measured anyway.
    """
    pixel = pixel_size_pair(pixel_size_nm)
    sigma_nm = positive(sigma_nm, "sigma_nm")
    q = _q(q)
    grid, energies, labels, bad = _check_grid(grid, energies_V, labels, mask)
    fg = _fingerprint_geometry(labels, bad, sigma_nm=sigma_nm, pixel=pixel, margin_sigma=fingerprint_margin_sigma)
    try:
        geo = _grid_contrast_geometry(energies, labels, bad, units=units, sigma_nm=sigma_nm, pixel=pixel,
                                      margin_sigma=margin_sigma, band_sigma=band_sigma)
    except InputError as err:
        geo, contrast = None, err
    amplitude = geo is not None and _resolved(q, pixel)
    amp, ph, cond, amps = _grid_pass(grid, energies.size, bad, q=q, sigma_nm=sigma_nm, pixel=pixel, fingerprint=fg,
                                     geo=geo, amplitude=amplitude, progress=progress)
    if geo is not None:
        contrast = _grid_contrast(energies, cond, amps if amplitude else None, geo, units=units, sigma_nm=sigma_nm,
                                  pixel=pixel, q=q)
    return Fingerprints(energies, fg["ids"], amp, ph, fg["counts"]), contrast


def _resolved(q, pixel):
    """Whether every wavevector lies inside the Nyquist limit pi / d of the pixels along both axes."""
    dy, dx = pixel
    return bool(np.all(np.abs(q[:, 0]) * dx < math.pi) and np.all(np.abs(q[:, 1]) * dy < math.pi))


def _letters(i):
    """Type names A, B, ..., Z, AA, AB, ..."""
    s = ""
    i += 1
    while i:
        i, r = divmod(i - 1, 26)
        s = chr(65 + r) + s
    return s


def _fmt_bias(b):
    return f"{b:+.2f} V".replace("-", "−")


def _pm(value, se):
    """'0.80 ± 0.10': the error to two significant digits if it starts with 1 or 2, else one; the value alike."""
    if not (math.isfinite(se) and se > 0):
        return f"{value:.3g}"
    exp = math.floor(math.log10(se))
    lead = se / 10**exp
    digits = max(0, -exp + (1 if lead < 3 else 0))
    return f"{value:.{digits}f} ± {se:.{digits}f}".replace("-", "−")


@dataclass(frozen=True, eq=False)
class ElectronicTypes:
    """Domains grouped into electronic types by their contrast at every bias.

    Attributes
    ----------
    contrast : ElectronicContrast
        The per-domain contrasts the grouping used.
    types : tuple of tuple of int
        Member domains of each type; type i is named ``names[i]`` (A, B, ...).
    names : tuple of str
    features : tuple of (str, float)
        (quantity, bias_V) of each compared value.
    value, se : ndarray (n_types, n_features)
        Area-weighted mean contrast of each type and its standard error.
    pair_diff, pair_se, pair_z, pair_p : ndarray (n_types, n_types, n_features)
        Difference type i minus type j, error, z and two-sided p.
    alpha : float
        Family-wise significance level of a test over all features.
    z_threshold : float
        |z| above which one feature differs (Šidák level 1 - (1 - alpha)^(1/n_features)).
    homogeneity_chi2, homogeneity_dof, homogeneity_p : float
        Test that all domains share one type.
    gain_tolerance : float
        Relative allowance for a change of the tip's gain.
    pair_z_tolerant : ndarray (n_types, n_types, n_features)
        Difference over its error and the gain allowance combined; decides significance.
    """

    contrast: ElectronicContrast
    types: tuple
    names: tuple
    features: tuple
    value: np.ndarray
    se: np.ndarray
    pair_diff: np.ndarray
    pair_se: np.ndarray
    pair_z: np.ndarray
    pair_p: np.ndarray
    alpha: float
    z_threshold: float
    homogeneity_chi2: float
    homogeneity_dof: int
    homogeneity_p: float
    gain_tolerance: float = 0.0
    pair_z_tolerant: np.ndarray | None = None

    def significant(self, i, j, f) -> bool:
        """Whether types i and j differ in feature f: |z| above the threshold with the gain allowance."""
        z = self.pair_z if self.pair_z_tolerant is None else self.pair_z_tolerant
        return bool(abs(z[i, j, f]) > self.z_threshold)

    @property
    def n_types(self) -> int:
        """Number of electronic types."""
        return len(self.types)

    def type_of(self) -> dict:
        """{domain: type name}."""
        return {d: self.names[i] for i, members in enumerate(self.types) for d in members}

    def _header(self, quantity, bias, what="contrast"):
        p = "" if quantity == "conductance" else "amplitude_"
        return f"{p}{what}_{self.contrast.unit_token}_at_{bias:+.2f}V"

    def rows(self, per_bias=True) -> list[dict]:
        """One row per type for ``types.csv``: members, area and (``per_bias``) contrast with error at each bias."""
        area = dict(zip(self.contrast.domains, self.contrast.area_nm2))
        out = []
        for i, members in enumerate(self.types):
            row = {"type": self.names[i], "domains": ";".join(str(d) for d in members), "n_domains": len(members),
                   "area_nm2": float(sum(area[d] for d in members))}
            for f, (quantity, bias) in enumerate(self.features if per_bias else ()):
                h = self._header(quantity, bias)
                row[h] = _json_float(self.value[i, f])
                row[h + "_se"] = _json_float(self.se[i, f])
            out.append(row)
        return out

    def domain_rows(self) -> list[dict]:
        """One row per domain: its type, area and, at each bias, mean and contrast with errors."""
        c = self.contrast
        kind = self.type_of()
        out = []
        for i, d in enumerate(c.domains):
            row = {"domain": int(d), "type": kind[d], "area_nm2": float(c.area_nm2[i])}
            for s in c.sets():
                for k, bias in enumerate(c.biases_V):
                    for what, arr, err in (("mean", s.mean, s.mean_se), ("contrast", s.contrast, s.contrast_se),
                                           ("frame_contrast", s.frame, s.frame_se)):
                        h = self._header(s.quantity, bias, what)
                        row[h] = _json_float(arr[k, i])
                        row[h + "_se"] = _json_float(err[k, i])
            out.append(row)
        return out

    def differences(self, i, j) -> list[dict]:
        """Feature by feature, type i minus type j: difference, error, z, p and whether it is significant."""
        return [{"quantity": q, "bias_V": float(b), "difference": _json_float(self.pair_diff[i, j, f]),
                 "difference_se": _json_float(self.pair_se[i, j, f]), "z": _json_float(self.pair_z[i, j, f]),
                 "p": _json_float(self.pair_p[i, j, f]),
                 "significant": self.significant(i, j, f)}
                for f, (q, b) in enumerate(self.features)]

    def spectra(self) -> dict:
        """Each type's mean at every bias (a mean spectrum for a grid), with errors.

        The mean of a type is the area-weighted mean of its domains' interior means; its
        error adds the domains' errors in quadrature (their interiors lie 2 ``margin_sigma``
        sigma apart, where the smoothed noise is uncorrelated; derived). Unlike the
        contrasts, the means keep every offset of the map (a tip change biases them).

        Returns
        -------
        dict
            ``biases_V`` (n_biases,) and, per quantity present ("conductance",
            "amplitude"), ``(mean, se)``, each (n_types, n_biases).
        """
        c = self.contrast
        area = np.asarray(c.area_nm2, float)
        index = {d: i for i, d in enumerate(c.domains)}
        out = {"biases_V": np.asarray(c.biases_V, float)}
        for s in c.sets():
            mean = np.zeros((self.n_types, len(c.biases_V)))
            se = np.zeros_like(mean)
            for i, members in enumerate(self.types):
                idx = [index[d] for d in members]
                u = area[idx] / area[idx].sum()
                mean[i] = s.mean[:, idx] @ u
                se[i] = np.sqrt(s.mean_se[:, idx] ** 2 @ u**2)
            out[s.quantity] = (mean, se)
        return out

    def significant_biases(self, i, j, quantity="conductance") -> list:
        """Biases (energies) at which types i and j differ significantly in ``quantity``, ascending."""
        return sorted(float(b) for f, (q, b) in enumerate(self.features) if q == quantity and self.significant(i, j, f))

    def spectrum_rows(self) -> list[dict]:
        """One row per type and bias (energy) for ``type_spectra.csv``: mean and contrast with errors."""
        c = self.contrast
        u = c.unit_token
        spectra = self.spectra()
        feature = {key: f for f, key in enumerate(self.features)}
        out = []
        for i, name in enumerate(self.names):
            for k, bias in enumerate(c.biases_V):
                row = {"type": name, "bias_V": float(bias)}
                for s in c.sets():
                    p = "" if s.quantity == "conductance" else "amplitude_"
                    mean, se = spectra[s.quantity]
                    row[f"{p}mean_{u}"] = _json_float(mean[i, k])
                    row[f"{p}mean_{u}_se"] = _json_float(se[i, k])
                    f = feature.get((s.quantity, float(bias)))
                    row[f"{p}contrast_{u}"] = _json_float(self.value[i, f]) if f is not None else None
                    row[f"{p}contrast_{u}_se"] = _json_float(self.se[i, f]) if f is not None else None
                out.append(row)
        return out

    def difference_rows(self) -> list[dict]:
        """One row per pair of types, quantity and bias (energy): the difference, its error, z, p, significance."""
        u = self.contrast.unit_token
        out = []
        for i in range(self.n_types):
            for j in range(i + 1, self.n_types):
                for d in self.differences(i, j):
                    out.append({"type_a": self.names[i], "type_b": self.names[j], "quantity": d["quantity"],
                                "bias_V": d["bias_V"], f"difference_{u}": d["difference"],
                                f"difference_{u}_se": d["difference_se"], "z": d["z"], "p": d["p"],
                                "significant": d["significant"]})
        return out

    def limitations(self) -> list[str]:
        """What the contrasts are and are not protected against, in words (the report quotes it)."""
        grid = self.contrast.source == "grid"
        one = "one grid (between its spectra)" if grid else "one map"
        tol = self.gain_tolerance
        out = [
            "Offsets that depend only on the scan line (a tip change that shifts the conductance from one line on, "
            "a slow drift of the tip between lines) cancel exactly in the contrasts: the model "
            "F = a(row) + mu_domain gives every scan line its own free offset, and walls are compared line by line.",
            f"A change of the tip's gain within {one} (a tip change that scales the conductance from one line on) "
            "does not cancel: it scales the contrast of every domain scanned after it, so a domain's contrast "
            "differs above and below that line and the model returns a mixture of the two. The grouping into "
            f"types allows for a gain change of up to {tol:.0%} by adding {tol:.0%} of the larger contrast to the "
            "error of every difference between types; a larger change can split one type in two or make a weak "
            "difference look significant.",
            "The frame contrasts and the types' mean values are plain means: a tip change between lines biases "
            "them.",
        ]
        if not grid:
            out.append("A change of gain between maps is removed by the normalisation "
                       f"({self.contrast.normalisation}) only where it scales a whole map.")
        return out

    def _one_type_words(self, where):
        """Why there is one type: the domains agree, or they differ by less than the gain allowance."""
        n = len(self.contrast.domains)
        test = (f"χ² = {self.homogeneity_chi2:.1f} for {self.homogeneity_dof} degrees of freedom, "
                f"p = {self.homogeneity_p:.2g}")
        if self.homogeneity_p >= self.alpha:
            return f"all {n} domains agree within errors at every {where} ({test})"
        return (f"the {n} domains are not all alike ({test}), but no two groups of them differ by more than "
                f"their errors and the allowance of {self.gain_tolerance:.0%} for a change of the tip's gain")

    def _spectral_sentences(self, unit):
        """The grid's result in words: per pair of types, the energy ranges where they differ."""
        c = self.contrast
        n = self.n_types
        if n == 1:
            return [f"1 electronic type in the grid: {self._one_type_words('energy')}."]
        energies = sorted(float(b) for b in c.biases_V)

        def ranges(chosen):
            runs, start, prev = [], None, None
            for e in energies:
                if e in chosen:
                    start = e if start is None else start
                    prev = e
                elif start is not None:
                    runs.append((start, prev))
                    start = None
            if start is not None:
                runs.append((start, prev))
            return ", ".join(_fmt_bias(a) if a == b else f"{_fmt_bias(a)[:-2]} to {_fmt_bias(b)}" for a, b in runs)

        head = (f"{n} electronic types in the grid: "
                + "; ".join(f"type {self.names[t]} (domain{'s' if len(m) > 1 else ''} "
                            f"{', '.join(str(d) for d in m)})" for t, m in enumerate(self.types)) + ".")
        out = [head]
        for i in range(n):
            for j in range(i + 1, n):
                parts = []
                for quantity, words in (("conductance", ("brighter", "darker")), ("amplitude", ("larger", "smaller"))):
                    feats = [f for f, (q, _) in enumerate(self.features) if q == quantity]
                    if not feats:
                        continue
                    sig = self.significant_biases(i, j, quantity)
                    what = "in conductance" if quantity == "conductance" else "in order amplitude"
                    if not sig:
                        parts.append(f"do not differ {what} at any energy")
                        continue
                    f = max((f for f in feats if self.significant(i, j, f)),
                            key=lambda f: abs(self.pair_diff[i, j, f]))
                    d, se = self.pair_diff[i, j, f], self.pair_se[i, j, f]
                    same = [e for e in energies if e not in sig and (quantity, e) in self.features]
                    parts.append(f"differ {what} at {ranges(set(sig))} (largest at {_fmt_bias(self.features[f][1])}: "
                                 f"{self.names[i]} {words[0] if d > 0 else words[1]} by {_pm(abs(d), se)} {unit})"
                                 + (f", not at {ranges(set(same))}" if same else ""))
                out.append(f"Types {self.names[i]} and {self.names[j]} " + "; ".join(parts) + ".")
        return [" ".join(out)] if n == 2 else out

    def sentences(self) -> list[str]:
        """The result in words, one sentence per pair of types (and one for the grouping)."""
        c = self.contrast
        unit = "% of the frame mean" if c.normalisation == "frame" else c.units
        if c.source == "grid":
            return self._spectral_sentences(unit)
        n = self.n_types
        if n == 1 and len(c.domains) == 1:
            return [f"1 electronic type: a single domain ({c.normalisation_note})."]
        if n == 1:
            return [f"1 electronic type: {self._one_type_words('bias')}; {c.normalisation_note}."]

        def members(i):
            m = self.types[i]
            return f"domain{'s' if len(m) > 1 else ''} {', '.join(str(d) for d in m)}"

        def clause(i, j, quantity):
            words = ("brighter", "darker") if quantity == "conductance" else ("larger", "smaller")
            parts, none = [], []
            for f, (q, b) in enumerate(self.features):
                if q != quantity:
                    continue
                d, s = self.pair_diff[i, j, f], self.pair_se[i, j, f]
                if self.significant(i, j, f):
                    parts.append((words[0] if d > 0 else words[1], _fmt_bias(b), _pm(abs(d), s)))
                else:
                    none.append(_fmt_bias(b))
            return parts, none

        def join(parts, first_target):
            said = []
            for k, (word, bias, value) in enumerate(parts):
                if k == 0:
                    said.append(f"is {word} than {first_target} at {bias} by {value} {unit}")
                else:
                    said.append(f"{word} at {bias} by {value} {unit}")
            if len(said) > 1:
                return ", ".join(said[:-1]) + " and " + said[-1]
            return said[0] if said else ""

        out = []
        pairs = [(i, j) for i in range(n) for j in range(i + 1, n)]
        for k, (i, j) in enumerate(pairs):
            parts, none = clause(i, j, "conductance")
            target = f"type {self.names[j]}" + (f" ({members(j)})" if n == 2 else "")
            if n == 2:
                head = f"2 electronic types: type {self.names[i]} ({members(i)}) "
            else:
                head = ("" if k else f"{n} electronic types: "
                        + "; ".join(f"type {self.names[t]} ({members(t)})" for t in range(n)) + ". ") \
                       + f"Type {self.names[i]} "
            if parts:
                body = join(parts, target)
            else:
                body = f"does not differ from {target} in conductance at any bias"
            tail = f"; no significant difference at {', '.join(none)}" if parts and none else ""
            sentence = head + body + tail
            if self.contrast.amplitude is not None:
                aparts, _ = clause(i, j, "amplitude")
                if aparts:
                    said = [f"{w} at {b} by {v} {unit}" for w, b, v in aparts]
                    sentence += f"; its order amplitude is {said[0]}" + "".join(f", {s}" for s in said[1:])
            out.append(sentence + ".")
        return out

    def to_summary(self) -> dict:
        """JSON-ready dict for ``summary.json``: the types, their contrasts, the pairwise tests and the sentences."""
        c = self.contrast
        return {
            "n_types": self.n_types, "alpha": self.alpha, "z_threshold": self.z_threshold,
            "gain_tolerance": self.gain_tolerance,
            "homogeneity": {"chi2": _json_float(self.homogeneity_chi2), "dof": int(self.homogeneity_dof),
                            "p": _json_float(self.homogeneity_p)},
            "units": c.units, "normalisation": c.normalisation, "normalisation_note": c.normalisation_note,
            "types": [{"type": self.names[i], "domains": [int(d) for d in m],
                       "contrast": [{"quantity": q, "bias_V": float(b), "value": _json_float(self.value[i, f]),
                                     "se": _json_float(self.se[i, f])} for f, (q, b) in enumerate(self.features)]}
                      for i, m in enumerate(self.types)],
            "differences": [{"types": [self.names[i], self.names[j]], "features": self.differences(i, j)}
                            for i in range(self.n_types) for j in range(i + 1, self.n_types)],
            "sentences": self.sentences(),
            "limitations": self.limitations(),
            "spectra": [{"type": self.names[i], "quantity": q, "bias_V": [float(b) for b in c.biases_V],
                         "mean": [_json_float(v) for v in mean[i]], "se": [_json_float(v) for v in se[i]]}
                        for q, (mean, se) in ((q, v) for q, v in self.spectra().items() if q != "biases_V")
                        for i in range(self.n_types)],
            "contrast": c.to_summary(),
        }


def electronic_types(contrast, *, alpha=TYPES_ALPHA, gain_tolerance=GAIN_TOLERANCE, use_amplitude=True):
    """Group domains into electronic types: merge while no remaining difference is significant.

    The features are the line-offset-free contrasts of :func:`domain_electronic_contrast`
    at every bias (conductance, and the order amplitude if computed and
    ``use_amplitude``), with their full covariance. First a homogeneity test: chi^2 =
    sum over features of c^T C^+ c (C^+ the pseudo-inverse of the contrasts'
    covariance, dof its rank); if p >= ``alpha`` there is one type, so the rate of a
    false second type on a one-type scene is at most ``alpha`` (derived). Otherwise
    agglomerative merging [1]_: starting from single domains, the two groups whose
    largest |z| over the features is smallest are merged while that |z| is below the
    Šidák threshold z* = Phi^-1(1 - a/2), a = 1 - (1 - alpha)^(1/n_features) [2]_. A
    group's value is the area-weighted mean of its members' contrasts; the variance of
    a difference u^T c is u^T C u, plus (``gain_tolerance`` times the larger of the two
    groups' |contrast|)^2: a tip whose gain changes during a map (a change of its density
    of states) scales the contrast of the lines scanned after it, which no offset
    correction removes. The same z* and allowance decide which differences between
    types are called significant. The translational variant plays no part.

    Parameters
    ----------
    contrast : ElectronicContrast
        From :func:`domain_electronic_contrast`.
    alpha : float
        Family-wise significance level, in (0, 0.5).
    gain_tolerance : float
        Relative allowance for a change of the tip's gain, >= 0 (0.2: 20 %).
    use_amplitude : bool
        Use the order amplitude too, when present.

    Returns
    -------
    ElectronicTypes

    Raises
    ------
    InputError
        If ``contrast`` is not an ElectronicContrast or ``alpha`` is out of range.

    References
    ----------
    .. [1] J. H. Ward, J. Am. Stat. Assoc. 58, 236 (1963) (agglomerative grouping).
       doi:10.1080/01621459.1963.10500845
    .. [2] Z. Šidák, J. Am. Stat. Assoc. 62, 626 (1967). doi:10.1080/01621459.1967.10482935

    Examples
    --------
    >>> import numpy as np
    >>> labels = np.zeros((128, 128), np.int32)
    >>> labels[:64, :64], labels[:64, 64:], labels[64:, :64], labels[64:, 64:] = 1, 2, 3, 4
    >>> step = np.where(np.isin(labels, (1, 4)), 0.2, -0.2)
    >>> noise = np.random.default_rng(0).normal(0, 0.05, (2, 128, 128))
    >>> maps = {-0.3: 1 + step + noise[0], 0.3: 1 - step + noise[1]}
    >>> c = domain_electronic_contrast(maps, labels, pixel_size_nm=0.1, sigma_nm=0.4, normalisation="none")
    >>> t = electronic_types(c)
    >>> t.types
    ((1, 4), (2, 3))
    >>> print(t.sentences()[0])  # doctest: +NORMALIZE_WHITESPACE
    2 electronic types: type A (domains 1, 4) is brighter than type B (domains 2, 3) at −0.30 V
    by 0.4007 ± 0.0010 nS and darker at +0.30 V by 0.4000 ± 0.0010 nS.
    """
    if not isinstance(contrast, ElectronicContrast):
        raise InputError(f"contrast must be an ElectronicContrast from domain_electronic_contrast, "
                         f"got {type(contrast).__name__}")
    try:
        alpha = float(alpha)
    except (TypeError, ValueError):
        alpha = float("nan")
    if not 0 < alpha < 0.5:
        raise InputError(f"alpha must be a significance level in (0, 0.5), got {alpha!r}")
    try:
        tol = float(gain_tolerance)
    except (TypeError, ValueError):
        tol = float("nan")
    if not (math.isfinite(tol) and tol >= 0):
        raise InputError(f"gain_tolerance must be a finite fraction >= 0, got {gain_tolerance!r}")
    sets = [contrast.conductance] + ([contrast.amplitude] if use_amplitude and contrast.amplitude is not None else [])
    features, values, covs = [], [], []
    for s in sets:
        for k, b in enumerate(contrast.biases_V):
            if np.all(np.isfinite(s.contrast[k])) and np.all(np.isfinite(s.cov[k])):
                features.append((s.quantity, float(b)))
                values.append(s.contrast[k])
                covs.append(s.cov[k])
    nd = len(contrast.domains)
    area = np.asarray(contrast.area_nm2, float)
    nf = len(features)
    a_feature = 1 - (1 - alpha) ** (1 / max(nf, 1))
    z_thr = float(stats.norm.isf(a_feature / 2))

    chi2, dof = 0.0, 0
    for v, C in zip(values, covs):
        if nd < 2:
            break
        Cp = np.linalg.pinv(C, rcond=1e-10, hermitian=True)
        chi2 += float(v @ Cp @ v)
        dof += int(np.linalg.matrix_rank(C, tol=1e-10 * max(np.abs(C).max(), 1e-300), hermitian=True))
    p_hom = float(stats.chi2.sf(chi2, dof)) if dof else 1.0

    def weights(group):
        u = np.zeros(nd)
        idx = list(group)
        u[idx] = area[idx] / area[idx].sum()
        return u

    V = np.array(values).reshape(nf, nd)
    Cs = np.array(covs).reshape(nf, nd, nd)

    def max_z(g, h):
        # Every feature at once (a grid has hundreds): |u.v| / sqrt(u C u + (tol max(|ug.v|, |uh.v|))^2).
        if not nf:
            return 0.0
        ug, uh = weights(g), weights(h)
        u = ug - uh
        var = np.matmul(u, Cs) @ u
        gain = tol * np.maximum(np.abs(V @ ug), np.abs(V @ uh))
        return float(np.max(np.abs(V @ u) / np.sqrt(np.maximum(var + gain**2, 1e-300))))

    groups = [[i] for i in range(nd)]
    if p_hom >= alpha or nf == 0:
        groups = [list(range(nd))]
    while len(groups) > 1:
        best, pair = None, None
        for i in range(len(groups)):
            for j in range(i + 1, len(groups)):
                z = max_z(groups[i], groups[j])
                if best is None or z < best:
                    best, pair = z, (i, j)
        if best >= z_thr:
            break
        i, j = pair
        groups[i] = groups[i] + groups[j]
        del groups[j]
    ids = contrast.domains
    groups = sorted((sorted(g, key=lambda i: ids[i]) for g in groups), key=lambda g: ids[g[0]])
    nt = len(groups)
    value, se = np.zeros((nt, nf)), np.zeros((nt, nf))
    diff, dse, sys = np.zeros((nt, nt, nf)), np.zeros((nt, nt, nf)), np.zeros((nt, nt, nf))
    U = [weights(g) for g in groups]
    for f, (v, C) in enumerate(zip(values, covs)):
        for i in range(nt):
            value[i, f] = U[i] @ v
            se[i, f] = math.sqrt(max(U[i] @ C @ U[i], 0.0))
            for j in range(nt):
                u = U[i] - U[j]
                diff[i, j, f] = u @ v
                dse[i, j, f] = math.sqrt(max(u @ C @ u, 0.0))
                sys[i, j, f] = tol * max(abs(U[i] @ v), abs(U[j] @ v))
    total = np.sqrt(dse**2 + sys**2)
    with np.errstate(invalid="ignore", divide="ignore"):
        z = np.where(dse > 0, diff / np.where(dse > 0, dse, 1), 0.0)
        zt = np.where(total > 0, diff / np.where(total > 0, total, 1), 0.0)
    p = 2 * stats.norm.sf(np.abs(z))
    return ElectronicTypes(contrast, tuple(tuple(int(ids[i]) for i in g) for g in groups),
                           tuple(_letters(i) for i in range(nt)), tuple(features), value, se, diff, dse, z, p,
                           alpha, z_thr, chi2, dof, p_hom, tol, zt)
