"""The Fourier step: power spectrum, peak finding with sub-pixel refinement, and lattice and superlattice indexing.

Every wavevector is (qx, qy) in rad/nm with x along columns and y along rows
(docs/methods.md, Conventions); the period of a peak is 2 pi / |q|. Peaks are
reported once per +q/-q pair, in the half-plane qy > 0 (or qy = 0, qx > 0), so
their angles lie in [0, 180) degrees.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, replace
from fractions import Fraction

import numpy as np
from scipy import fft as sfft
from scipy import ndimage, special

from ._checks import positive, within_nyquist
from ._errors import InputError
from ._lattice import bragg_from_reciprocal, real_basis, reciprocal_basis
from ._lockin import lockin, phase_gradient
from ._scan import Scan, _is_dask, pixel_size_pair

__all__ = [
    "WELCH_TILE_PX",
    "WHOLE_FRAME_MAX_PIXELS",
    "Lattice",
    "Peak",
    "SpectrumResult",
    "Superlattice",
    "analyze_spectrum",
    "find_peaks",
    "format_peak_table",
    "index_lattice",
    "index_peaks",
    "power_spectrum",
    "refine_q",
]

ROLES = ("bragg", "superlattice", "incommensurate", "moire", "second_lattice", "harmonic", "unindexed")

#: Half-width (bins) of the band around the qx = 0 and qy = 0 axes whose noise floor is
#: estimated along the band itself: a periodic Hann window spreads a constant per scan
#: line over exactly three bins (offsets -1, 0, +1), so line offsets live in this band.
_AXIS_BAND = 1
#: Number of bins a noise-floor cell should hold. The median of m exponential variates
#: scatters by about 1/sqrt(m); a floor off by a fraction e multiplies the false-alarm
#: rate at threshold t by about exp(t^2 e^2 / 2), so cells must be large (derived).
_CELL_BINS = 192


# --------------------------------------------------------------------------------------
# Data classes
# --------------------------------------------------------------------------------------


@dataclass
class Peak:
    """One Fourier peak (the +q member of a +q/-q pair).

    Attributes
    ----------
    q : ndarray, shape (2,)
        Wavevector (qx, qy) in rad/nm.
    q_err : float
        One-sigma statistical uncertainty of each component of ``q``, rad/nm
        (the root mean square of the two when they differ; ``q_cov`` has both).
        It is the scatter that the estimate would show over repeated images of
        the same sample with new noise, from the noise measured in this image:
        for an interpolated peak, the noise propagated through the three-bin
        formula (Cramér–Rao-type, from the local noise floor) plus the bias
        that the window leakage of every other detected peak may cause, plus
        the peak's misfit to the single-tone shape where that is significant
        (a peak broadened by domains or drift); for a lock-in refined peak, the
        scatter of the lock-in phase about a plane over the independent
        sigma-patches of the trusted region (which includes a spatially varying
        wavevector, e.g. drift), never below the Cramér–Rao bound over that
        region. It does not include the pixel-size calibration or the
        difference between the image's mean lattice and the sample's (drift).
    q_cov : ndarray, shape (2, 2), or None
        Covariance of (qx, qy), rad^2/nm^2, when known (detected or refined peaks).
    power : float
        Peak power in image units squared: (A0/2)^2 for a cosine of amplitude A0
        centred on a frequency bin (Hann-windowed spectrum).
    snr : float
        Power above the local noise floor (ratio to the mean noise power there).
    amplitude : float
        Estimated modulation amplitude A0 (image units), scalloping corrected.
    role : str or None
        One of ``ROLES`` once indexed (see :func:`index_peaks`).
    hk : tuple of float or None
        Fractional coordinates in the reciprocal basis: q = h b1 + k b2.
    fraction : tuple of Fraction or None
        The rational (h, k) that fits within the uncertainty, if any.
    refined : str
        How ``q`` was obtained: "bin", "interpolated", "lockin" or "manual".
    """

    q: np.ndarray
    q_err: float
    power: float = float("nan")
    snr: float = float("nan")
    amplitude: float = float("nan")
    role: str | None = None
    hk: tuple[float, float] | None = None
    fraction: tuple[Fraction, Fraction] | None = None
    refined: str = "interpolated"
    q_cov: np.ndarray | None = None

    def __post_init__(self):
        self.q = np.asarray(self.q, dtype=float).reshape(2)
        self.q_err = float(self.q_err)
        if self.q_cov is not None:
            self.q_cov = np.asarray(self.q_cov, dtype=float).reshape(2, 2)

    def _cov(self):
        if self.q_cov is not None and np.all(np.isfinite(self.q_cov)):
            return self.q_cov
        return np.eye(2) * self.q_err**2

    @property
    def q_abs_err_rad_per_nm(self) -> float:
        """One-sigma uncertainty of |q| in rad/nm (the radial part of ``q_cov``)."""
        u = self.q / max(np.hypot(*self.q), 1e-300)
        return float(math.sqrt(max(u @ self._cov() @ u, 0.0)))

    @property
    def angle_err_deg(self) -> float:
        """One-sigma uncertainty of the direction of q in degrees (the tangential part of ``q_cov`` over |q|)."""
        qa = max(float(np.hypot(*self.q)), 1e-300)
        t = np.array([-self.q[1], self.q[0]]) / qa
        return float(math.degrees(math.sqrt(max(t @ self._cov() @ t, 0.0)) / qa))

    @property
    def q_abs_rad_per_nm(self) -> float:
        """|q| in rad/nm."""
        return float(np.hypot(*self.q))

    @property
    def period_nm(self) -> float:
        """2 pi / |q| in nm."""
        return 2 * math.pi / self.q_abs_rad_per_nm

    @property
    def angle_deg(self) -> float:
        """Direction of q from the x axis, degrees in [0, 180) for a canonical peak."""
        return float(np.degrees(np.arctan2(self.q[1], self.q[0])))


@dataclass
class Lattice:
    """A Bravais lattice seen through its Bragg peaks.

    Attributes
    ----------
    kind : {"hexagonal", "square", "oblique"}
    b : ndarray, shape (2, 2)
        Reciprocal basis, rows b1 and b2 (the two shortest Bragg vectors), rad/nm,
        with a_i . b_j = 2 pi delta_ij for the real basis a1, a2 of
        ``domains._lattice`` (hexagonal: a2 at +60 degrees from a1, so b2 is at
        +120 degrees from b1; square: +90 degrees). Fitted to the measured
        peaks, so it follows a linear distortion of the image.
    bragg : ndarray, shape (3, 2) or (2, 2)
        The Bragg vectors used for drift correction and lock-in: hexagonal,
        G1 = b1, G2 = b2, G3 = -(b1 + b2) (at 120 degrees, summing to zero);
        square and oblique, b1 and b2.
    a_nm, a_err_nm : float
        Real-space lattice constant |a1| and its one-sigma uncertainty.
    angle_deg, angle_err_deg : float
        Direction of the first real-space lattice vector a1 from the x axis, in
        [-30, 30) for hexagonal, [-45, 45) for square lattices (their symmetry
        leaves it defined modulo 60 or 90), and its uncertainty.
    a2_nm, gamma_deg : float
        |a2| and the angle between a1 and a2 (60 for hexagonal, 90 for square).
    bragg_measured : ndarray or None
        The measured Bragg peaks matched to ``bragg`` (same order and sign).
    """

    kind: str
    b: np.ndarray
    bragg: np.ndarray
    a_nm: float
    a_err_nm: float
    angle_deg: float
    angle_err_deg: float
    a2_nm: float
    gamma_deg: float
    bragg_measured: np.ndarray | None = None

    @property
    def real_basis_nm(self) -> np.ndarray:
        """Real-space basis, rows a1, a2 in nm, with a_i . b_j = 2 pi delta_ij."""
        return 2 * math.pi * np.linalg.inv(self.b).T

    @property
    def q_bragg_rad_per_nm(self) -> float:
        """|G| of the ideal lattice (4 pi / (sqrt(3) a) hexagonal, 2 pi / a square)."""
        if self.kind == "hexagonal":
            return 4 * math.pi / (math.sqrt(3) * self.a_nm)
        if self.kind == "square":
            return 2 * math.pi / self.a_nm
        return float(np.hypot(*self.b[0]))

    @property
    def bragg_ideal(self) -> np.ndarray:
        """Bragg vectors of the undistorted lattice with ``a_nm`` and ``angle_deg``."""
        return _ideal_basis(self.kind, self.a_nm, self.angle_deg, self.a2_nm, self.gamma_deg, bragg=True)

    @classmethod
    def from_params(cls, kind, a_nm, angle_deg=0.0, *, a2_nm=None, gamma_deg=None) -> "Lattice":
        """An ideal lattice from its kind, constant(s) and orientation.

        Parameters
        ----------
        kind : {"hexagonal", "square", "oblique"}
        a_nm : float
            |a1| in nm.
        angle_deg : float
            Direction of a1 from the x axis, degrees.
        a2_nm, gamma_deg : float, optional
            Oblique lattices only: |a2| and the angle between a1 and a2.

        Returns
        -------
        Lattice

        Raises
        ------
        InputError
            If the kind is unknown or a length is not positive.

        Examples
        --------
        >>> lat = Lattice.from_params("hexagonal", 0.35, 10.0)
        >>> round(lat.q_bragg_rad_per_nm, 4), bool(np.allclose(lat.bragg.sum(axis=0), 0))
        (20.7291, True)
        """
        if kind not in ("hexagonal", "square", "oblique"):
            raise InputError(f"lattice kind must be 'hexagonal', 'square' or 'oblique', got {kind!r}")
        a_nm = positive(a_nm, "lattice a_nm")
        angle_deg = _finite_float(angle_deg, "lattice angle_deg")
        if kind == "hexagonal":
            a2_nm, gamma_deg = a_nm, 60.0
            angle_deg = (angle_deg + 30.0) % 60.0 - 30.0
        elif kind == "square":
            a2_nm, gamma_deg = a_nm, 90.0
            angle_deg = (angle_deg + 45.0) % 90.0 - 45.0
        else:
            if a2_nm is None or gamma_deg is None:
                raise InputError("an oblique lattice needs a2_nm and gamma_deg as well as a_nm")
            a2_nm = positive(a2_nm, "lattice a2_nm")
            gamma_deg = _finite_float(gamma_deg, "lattice gamma_deg")
            if not 0 < gamma_deg % 180 < 180:
                raise InputError(f"lattice gamma_deg must not be a multiple of 180, got {gamma_deg}")
        b = _ideal_basis(kind, a_nm, angle_deg, a2_nm, gamma_deg)
        return cls(kind, b, bragg_from_reciprocal(kind, b), a_nm, 0.0, angle_deg, 0.0, a2_nm, gamma_deg, None)

    def to_dict(self) -> dict:
        """JSON-ready summary (angles in degrees, lengths in nm, q in rad/nm)."""
        return {
            "kind": self.kind,
            "a_nm": self.a_nm,
            "a_err_nm": self.a_err_nm,
            "a2_nm": self.a2_nm,
            "gamma_deg": self.gamma_deg,
            "angle_deg": self.angle_deg,
            "angle_err_deg": self.angle_err_deg,
            "q_bragg_rad_per_nm": self.q_bragg_rad_per_nm,
            "b_rad_per_nm": self.b.tolist(),
            "bragg_rad_per_nm": self.bragg.tolist(),
        }


@dataclass
class Superlattice:
    """What the non-Bragg peaks say about order beyond the lattice.

    Attributes
    ----------
    order : str or None
        "3x3", "2x2", "4x1", "sqrt3xsqrt3R30", "sqrt7xsqrt7R19.1", "incommensurate",
        "supercell [[m11, m12], [m21, m22]]" or None.
    commensurate : bool
    q : ndarray, shape (k, 2)
        One wavevector per independent direction, rad/nm. For an n x n order,
        G_j / n for the lattice's Bragg vectors G_j.
    q_err : ndarray, shape (k,)
        One-sigma uncertainty per component, rad/nm. For commensurate order the q
        are fractions of the lattice's reciprocal basis and inherit its errors
        (scale and rotation; 0 for a lattice given by the user).
    coefficients : list of tuple
        (h, k) of each q in the reciprocal basis; Fractions when commensurate.
    supercell : ndarray of int, shape (2, 2), or None
        M with real-space supercell rows A_s = M A (A rows a1, a2).
    n_sites : int or None
        Lattice sites per supercell, |det M|.
    delta : ndarray or None
        Incommensurate only: 1 - |q| / |q_c| for the nearest simple fraction q_c
        along the same direction.
    note : str
    """

    order: str | None
    commensurate: bool
    q: np.ndarray
    q_err: np.ndarray
    coefficients: list
    supercell: np.ndarray | None = None
    n_sites: int | None = None
    delta: np.ndarray | None = None
    note: str = ""

    def to_dict(self) -> dict:
        """JSON-ready summary."""
        return {
            "order": self.order,
            "commensurate": self.commensurate,
            "q_rad_per_nm": np.asarray(self.q).tolist(),
            "q_err_rad_per_nm": np.asarray(self.q_err).tolist(),
            "coefficients": [[str(c) if isinstance(c, Fraction) else float(c) for c in hk] for hk in self.coefficients],
            "supercell": None if self.supercell is None else np.asarray(self.supercell).tolist(),
            "n_sites": self.n_sites,
            "delta": None if self.delta is None else np.asarray(self.delta).tolist(),
            "note": self.note,
        }


@dataclass
class SpectrumResult:
    """Peaks, their roles, the lattice and the superlattice of one image.

    Attributes
    ----------
    peaks : list of Peak
        Indexed peaks, strongest first.
    lattice : Lattice or None
    superlattice : Superlattice or None
    moire_q : ndarray, shape (k, 2)
        Moire candidates (role "moire"), shortest first, rad/nm.
    pixel_size_nm : tuple of float
    shape : tuple of int
    """

    peaks: list
    lattice: Lattice | None
    superlattice: Superlattice | None
    moire_q: np.ndarray
    pixel_size_nm: tuple
    shape: tuple

    def rows(self) -> list[dict]:
        """One dict per peak: qx, qy, |q|, period_nm, angle_deg, h, k, role, q_err (and of |q|, angle) and more."""
        out = []
        for p in self.peaks:
            h, k = p.hk if p.hk is not None else (None, None)
            out.append({
                "qx_rad_per_nm": float(p.q[0]),
                "qy_rad_per_nm": float(p.q[1]),
                "q_abs_rad_per_nm": p.q_abs_rad_per_nm,
                "period_nm": p.period_nm,
                "angle_deg": p.angle_deg,
                "h": None if h is None else float(h),
                "k": None if k is None else float(k),
                "hk_fraction": None if p.fraction is None else f"{p.fraction[0]}, {p.fraction[1]}",
                "role": p.role,
                "q_err_rad_per_nm": p.q_err,
                "q_abs_err_rad_per_nm": p.q_abs_err_rad_per_nm,
                "angle_err_deg": p.angle_err_deg,
                "power": p.power,
                "snr": p.snr,
                "amplitude": p.amplitude,
            })
        return out

    def to_dict(self) -> dict:
        """JSON-ready summary of the whole result."""
        return {
            "shape": list(self.shape),
            "pixel_size_nm": list(self.pixel_size_nm),
            "lattice": None if self.lattice is None else self.lattice.to_dict(),
            "superlattice": None if self.superlattice is None else self.superlattice.to_dict(),
            "moire_q_rad_per_nm": np.asarray(self.moire_q).tolist(),
            "peaks": _json_clean(self.rows()),
        }


# --------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------


def _finite_float(value, name) -> float:
    try:
        value = float(value)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(value):
        raise InputError(f"{name} must be finite, got {value!r}")
    return value


def _json_clean(obj):
    if isinstance(obj, dict):
        return {k: _json_clean(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_json_clean(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def _open(image, pixel_size_nm, mask, caller):
    """The image (ndarray or dask array, not read), the (dy, dx) pixel size and the mask, checked."""
    if isinstance(image, Scan):
        if image.is_grid:
            raise InputError(f"{caller} needs a 2-D image, got a 3-D grid; pass one energy slice")
        if pixel_size_nm is None:
            pixel_size_nm = image.pixel_size_nm
        if mask is None:
            mask = image.mask
        image = image.data
    if not _is_dask(image):
        image = np.asarray(image)
    if image.ndim != 2:
        raise InputError(f"{caller} needs a 2-D image (row, col), got shape {tuple(image.shape)}")
    if image.size == 0 or min(image.shape) < 8:
        raise InputError(f"{caller} needs an image of at least 8 x 8 pixels, got shape {tuple(image.shape)}")
    if image.dtype.kind not in "biuf":
        raise InputError(f"{caller} needs a real-valued image, got dtype {image.dtype}")
    pixel = pixel_size_pair(pixel_size_nm)
    if mask is not None and tuple(mask.shape if _is_dask(mask) else np.shape(mask)) != tuple(image.shape):
        raise InputError(f"mask shape {tuple(np.shape(mask))} differs from the image shape {tuple(image.shape)}")
    return image, pixel, mask


def _unpack(image, pixel_size_nm, mask, caller):
    """Image as a float ndarray, the (dy, dx) pixel size and the validity map."""
    image, pixel, mask = _open(image, pixel_size_nm, mask, caller)
    if _is_dask(image):
        # The whole-frame FFT needs the whole frame at once (one chunk per FFT axis).
        image = image.compute()
    if _is_dask(mask):
        mask = mask.compute()
    valid = np.isfinite(image)
    if mask is not None:
        mask = np.asarray(mask)
        if mask.shape != image.shape:
            raise InputError(f"mask shape {mask.shape} differs from the image shape {image.shape}")
        valid &= ~mask.astype(bool)
    if valid.sum() < 16:
        raise InputError(f"{caller}: fewer than 16 valid (finite, unmasked) pixels in the image")
    return image.astype(float), pixel, valid


def _check_q_override(q, pixel):
    q = np.asarray(q, dtype=float) if not isinstance(q, np.ndarray) else q.astype(float)
    q = np.atleast_2d(q)
    if q.ndim != 2 or q.shape[1] != 2 or q.shape[0] == 0:
        raise InputError(f"q must be a (k, 2) list of (qx, qy) wavevectors in rad/nm, got shape {q.shape}")
    if not np.all(np.isfinite(q)):
        raise InputError(f"q must be finite, got {q.tolist()}")
    within_nyquist(q, pixel)
    if np.any(np.hypot(q[:, 0], q[:, 1]) == 0):
        raise InputError("q must not contain the zero wavevector")
    return q


# --------------------------------------------------------------------------------------
# Power spectrum
# --------------------------------------------------------------------------------------


def _subtract_plane(image, valid, pixel):
    """Least-squares plane over the valid pixels removed; invalid pixels set to the mean (zero)."""
    dy, dx = pixel
    ny, nx = image.shape
    w = valid.astype(float)
    z = np.where(valid, image, 0.0)
    x = np.arange(nx) * dx
    y = np.arange(ny) * dy
    # Normal equations of z = c + gx x + gy y from row and column sums (no pixel lists).
    wr, wc = w.sum(axis=1), w.sum(axis=0)
    zr, zc = z.sum(axis=1), z.sum(axis=0)
    n = wr.sum()
    sx, sy = wc @ x, wr @ y
    sxx, syy, sxy = wc @ x**2, wr @ y**2, y @ (w @ x)
    sz, sxz, syz = zr.sum(), zc @ x, zr @ y
    mat = np.array([[n, sx, sy], [sx, sxx, sxy], [sy, sxy, syy]])
    rhs = np.array([sz, sxz, syz])
    try:
        c, gx, gy = np.linalg.solve(mat, rhs)
        if not np.all(np.isfinite([c, gx, gy])):
            raise np.linalg.LinAlgError
    except np.linalg.LinAlgError:  # a single row or column of valid pixels: remove the mean only
        c, gx, gy = sz / n, 0.0, 0.0
    level = image - (c + gx * x[None, :] + gy * y[:, None])
    return np.where(valid, level, 0.0)


def _hann(n):
    # Periodic (DFT-even) Hann: a constant row spreads over exactly bins -1, 0, +1.
    return 0.5 - 0.5 * np.cos(2 * np.pi * np.arange(n) / n)


def _q_axes(shape, pixel):
    ny, nx = shape
    dy, dx = pixel
    qx = 2 * np.pi * np.fft.fftshift(np.fft.fftfreq(nx, d=dx))
    qy = 2 * np.pi * np.fft.fftshift(np.fft.fftfreq(ny, d=dy))
    return qx, qy


def _half_power(level, wy, wx):
    """|rfft2(level w)|^2, float64, normalised so that a cosine of amplitude A0 centred on a bin gives (A0/2)^2."""
    f = sfft.rfft2(level * wy[:, None] * wx[None, :], workers=-1)
    return (f.real**2 + f.imag**2) / (wy.sum() * wx.sum()) ** 2


def _full_plane(half, shape, dtype):
    """The whole (row, col) power plane, zero wavevector at the centre (``fftshift`` layout), from its real-FFT half.

    The other half follows from the Hermitian symmetry of a real image's transform,
    P(-k) = P(k), so it costs no second transform.
    """
    ny, nx = shape
    half = half.astype(dtype, copy=False)
    ki = np.arange(ny) - ny // 2
    m = nx // 2
    out = np.empty((ny, nx), dtype)
    out[:, m:] = np.take(half, ki % ny, axis=0)[:, : nx - m]  # qx >= 0
    out[:, :m] = np.take(half, (-ki) % ny, axis=0)[:, m:0:-1]  # qx < 0: P(ky, kx) = P(-ky, -kx)
    return out


def _windows(shape, window):
    ny, nx = shape
    if window == "hann":
        return _hann(ny), _hann(nx)
    return np.ones(ny), np.ones(nx)


def _spectrum(level, window, dtype=np.float64):
    """Power of the windowed image with the zero wavevector at the centre (``fftshift`` layout).

    One real FFT in float64 (scipy.fft, all cores) and the Hermitian mirror
    (:func:`_full_plane`). Stored as ``dtype`` (float32 is plenty for peak
    finding, where only ratios of powers matter).
    """
    wy, wx = _windows(level.shape, window)
    return _full_plane(_half_power(level, wy, wx), level.shape, dtype)


def power_spectrum(image, *, pixel_size_nm, mask=None, window="hann", tile_px=None):
    """Plane-levelled, Hann-windowed power spectrum with physical wavevector axes.

    A least-squares plane over the valid pixels is subtracted, masked and NaN
    pixels are set to the mean, a periodic Hann window is applied along both
    axes (docs/methods.md §7), and the squared modulus of the FFT is returned with the
    zero wavevector at the centre (``numpy.fft.fftshift`` layout).

    With tiles (``tile_px``, or a dask array of more than ``WHOLE_FRAME_MAX_PIXELS``
    pixels) it is instead the average of the periodograms of overlapping tiles
    (50 %), each with its own plane removed and its own window (Welch 1967):
    computed tile by tile, so the image is never held whole, on the tile's
    frequency grid (coarser by frame / tile), with the same normalisation.

    Parameters
    ----------
    image : (row, col) array_like, dask array or Scan
        The image.
    pixel_size_nm : float or (float, float)
        Pixel size in nm, one value or (row, col). May be None for a Scan.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    window : {"hann", None}
        "hann" (default) or None for no window.
    tile_px : int, optional
        Side of the tiles in pixels. Default: the whole frame for an ndarray or
        a dask array up to ``WHOLE_FRAME_MAX_PIXELS`` pixels, else
        ``WELCH_TILE_PX``. A tile at least as large as the frame means the
        whole frame.

    Returns
    -------
    power : ndarray, shape (row, col) (of a tile with tiles)
        Normalised so that a cosine of amplitude A0 centred on a frequency bin
        gives a peak of (A0/2)^2 (image units squared).
    qx_rad_per_nm : ndarray, shape (col,)
        Wavevector of each column of ``power``.
    qy_rad_per_nm : ndarray, shape (row,)
        Wavevector of each row of ``power``.

    Raises
    ------
    InputError
        If the image is not 2-D, smaller than 8 x 8, not real, or the pixel
        size or mask is invalid.

    References
    ----------
    .. [1] F. J. Harris, "On the use of windows for harmonic analysis with the
       discrete Fourier transform", Proc. IEEE 66, 51 (1978).
       doi:10.1109/PROC.1978.10837
    .. [2] P. D. Welch, "The use of fast Fourier transform for the estimation of
       power spectra: a method based on time averaging over short, modified
       periodograms", IEEE Trans. Audio Electroacoust. 15, 70 (1967).
       doi:10.1109/TAU.1967.1161901

    Examples
    --------
    >>> n, dx = 64, 0.1
    >>> y, x = np.mgrid[:n, :n] * dx
    >>> q = 2 * np.pi * 8 / (n * dx)
    >>> p, qx, qy = power_spectrum(2.0 * np.cos(q * x) + 0.3 * x, pixel_size_nm=dx)
    >>> row, col = np.unravel_index(np.argmax(p), p.shape)
    >>> round(abs(float(qx[col])), 4) == round(q, 4), round(float(p[row, col]), 6)
    (True, 1.0)
    """
    if window not in ("hann", None):
        raise InputError(f"window must be 'hann' or None, got {window!r}")
    image, pixel, mask = _open(image, pixel_size_nm, mask, "power_spectrum")
    tile = _tile_size(image, tile_px)
    if tile is not None:
        power, shape, _, _, _ = _welch_spectrum(image, mask, pixel, tile, window, np.float64)
        qx, qy = _q_axes(shape, pixel)
        return power, qx, qy
    image, pixel, valid = _unpack(image, pixel, mask, "power_spectrum")
    power = _spectrum(_subtract_plane(image, valid, pixel), window)
    qx, qy = _q_axes(image.shape, pixel)
    return power, qx, qy


# --------------------------------------------------------------------------------------
# Noise floor and peak detection
# --------------------------------------------------------------------------------------


def _bin_offsets(shape):
    ny, nx = shape
    i = (np.arange(ny) - ny // 2)[:, None]
    j = (np.arange(nx) - nx // 2)[None, :]
    return i, j


class _FloorCells:
    """The polar cells of the noise floor for one spectrum shape (built once per shape and cached).

    ``labels`` numbers every bin's cell (1 ... n_cells: thin rings near the origin, sectors of
    about ``_CELL_BINS`` bins further out); ``in_band`` marks the bands along the qx = 0 and
    qy = 0 axes, which belong to no cell. ``index`` lists the flat bin numbers of each cell,
    one row per cell, padded with the number of bins (an extra slot that holds +inf), so that
    all cell medians come from one row-wise sort.
    """

    def __init__(self, shape):
        ny, nx = shape
        i, j = _bin_offsets(shape)
        r = np.hypot(i, j)
        theta = np.arctan2(i, j) + np.pi  # [0, 2 pi]
        edges = [0.0, 1.0]
        r_max = float(r.max())
        while edges[-1] <= r_max:
            edges.append(edges[-1] + max(1.0, 0.08 * edges[-1]))
        edges = np.asarray(edges)
        ring = np.searchsorted(edges, r, side="right") - 1
        mids = 0.5 * (edges[:-1] + edges[1:])
        widths = np.diff(edges)
        n_sec = np.maximum(1, np.round(2 * np.pi * mids * widths / _CELL_BINS)).astype(int)
        offset = np.concatenate([[1], 1 + np.cumsum(n_sec)[:-1]])
        ns = n_sec[ring]
        sector = np.minimum((theta / (2 * np.pi) * ns).astype(int), ns - 1)
        del theta, ns
        self.labels = (offset[ring] + sector).astype(np.int32)
        del ring, sector
        self.in_band = np.broadcast_to((np.abs(i) <= _AXIS_BAND) | (np.abs(j) <= _AXIS_BAND), shape).copy()
        self.n_labels = n = int(offset[-1] + n_sec[-1])
        self.edges, self.offset, self.n_sec = edges, offset, n_sec
        self.ring_of_label = np.searchsorted(offset, np.arange(n + 1), side="right") - 1
        cell = np.where(self.in_band, 0, self.labels).ravel()
        self.counts = np.bincount(cell, minlength=n + 1)
        # Band bins (label 0) sort first; 16-bit labels sort by radix.
        order = np.argsort(cell.astype(np.uint16) if n < 2**16 else cell, kind="stable")[self.counts[0]:]
        lab = cell[order].astype(np.int64)
        starts = np.concatenate([[0], np.cumsum(self.counts[1:])[:-1]])
        width = max(int(self.counts[1:].max()), 1)
        index = np.full(n * width, ny * nx, dtype=np.int32 if ny * nx < 2**31 - 1 else np.int64)
        index[(lab - 1) * width + (np.arange(order.size) - starts[lab - 1])] = order  # in increasing order
        self.index = index.reshape(n, width)
        # Peak search region without options: beyond the 3-bin disc, off the unpaired first row/column.
        search = r >= 3.0
        search[0, :] = search[-1, :] = search[:, 0] = search[:, -1] = False
        self.n_search = int(search.sum())


_CELLS_CACHE: dict = {}


def _floor_cells(shape):
    shape = tuple(int(s) for s in shape)
    cells = _CELLS_CACHE.get(shape)
    if cells is None:
        cells = _FloorCells(shape)
        while len(_CELLS_CACHE) >= 2:  # a couple of shapes at a time: bounded memory
            _CELLS_CACHE.pop(next(iter(_CELLS_CACHE)))
        _CELLS_CACHE[shape] = cells
    return cells


def _row_medians(rows, counts):
    """Median of the first ``counts[m]`` entries of each sorted row (0 for an empty row)."""
    counts = np.asarray(counts)
    idx = np.arange(len(rows))
    lo = np.maximum((counts - 1) // 2, 0)
    hi = np.maximum(counts // 2, 0)
    med = 0.5 * (rows[idx, lo].astype(float) + rows[idx, hi].astype(float))
    return np.where(counts > 0, med, 0.0)


def _cell_medians(power, cells):
    """Median power of every cell (index = label, 0 unused) and the flat power with its +inf slot."""
    ext = np.empty(power.size + 1, np.float32)
    ext[:-1] = power.ravel()
    ext[-1] = np.inf
    rows = ext[cells.index]
    rows.sort(axis=1)
    med = np.zeros(cells.n_labels + 1)
    med[1:] = _row_medians(rows, cells.counts[1:])
    return med, ext


def _excluded_medians(power, ext, cells, med, exclude):
    """Cell medians and sample counts without the bins in ``exclude`` (flat indices).

    Only the cells that hold an excluded bin change. Where peaks crowd a cell (thin rings
    near q = 0) so that fewer than 16 bins remain, it is widened radially until 16 bins
    that are not excluded remain; failing that, it keeps the median of all its bins.
    """
    counts = cells.counts
    band = cells.in_band.ravel()
    ex = exclude[~band[exclude]]
    n_ex = np.bincount(cells.labels.ravel()[ex], minlength=cells.n_labels + 1)
    n_ex[0] = 0
    counts2 = counts - n_ex
    med2 = med.copy()
    touched = np.flatnonzero(n_ex)
    if touched.size:
        marked = np.zeros(ext.size, bool)
        marked[ex] = True
        idx = cells.index[touched - 1]
        rows = ext[idx]
        rows[marked[idx]] = np.inf
        rows.sort(axis=1)
        med2[touched] = _row_medians(rows, counts2[touched])
    crowded = np.flatnonzero((counts2 < 16) & (counts > 0))
    crowded = crowded[crowded > 0]
    if crowded.size:
        ny, nx = power.shape
        edges = cells.edges
        flat = power.ravel()
        marked = np.zeros(flat.size, bool)
        marked[ex] = True
        rings = cells.ring_of_label[crowded]
        # The result depends on the ring only (its radial range, widened): once per ring. That
        # covers the corner fragments of the outer rings, cut by the frame into cells of few bins.
        for k in np.unique(rings):
            lo, hi = edges[k], edges[k + 1]
            for grow in (1, 2, 4, 8, 16, 32):
                a, b = lo - grow, hi + grow
                first = max(int(np.searchsorted(edges, a, side="right")) - 1, 0)
                last = min(int(np.searchsorted(edges, b, side="left")) - 1, len(cells.n_sec) - 1)
                labs = np.arange(cells.offset[first], cells.offset[last] + cells.n_sec[last])
                idx = cells.index[labs - 1].ravel()  # non-band bins of the rings that meet [a, b)
                idx = idx[idx < flat.size]
                idx = idx[~marked[idx]]
                rr, cc = np.divmod(idx, nx)
                r = np.hypot(rr - ny // 2, cc - nx // 2)
                sel = idx[(r >= a) & (r < b)]
                if sel.size >= 16:
                    med2[crowded[rings == k]] = float(np.median(flat[sel].astype(float)))
                    counts2[crowded[rings == k]] = sel.size
                    break
    use2 = counts2 >= 16
    return np.where(use2, med2, med), np.where(use2, counts2, counts)


def _median_to_mean(dof):
    """Median over mean of the noise power of a bin: ln 2 for one periodogram (exponential),
    that of a Gamma(dof) variate for an average of dof independent ones (Welch)."""
    if dof == 1:
        return math.log(2)
    return float(special.gammaincinv(dof, 0.5) / dof)


def _floor_map(power, cells, med, counts, dof=1):
    """The floor (mean noise power, float32) and its sample count at every bin from the cell medians.

    Along the qx = 0 and qy = 0 bands: a running median along each band line (the
    spectrum is periodic in q: wrap), so that the streak of scan-line offsets is its own
    background. The power of pure noise in one bin is exponentially distributed, whose
    mean is median / ln 2 (median / :func:`_median_to_mean` for ``dof`` averaged
    periodograms).
    """
    ny, nx = power.shape
    floor = med.astype(np.float32)[cells.labels]
    samples = counts.astype(np.int32)[cells.labels]
    half_r = max(16, ny // 16)
    half_c = max(16, nx // 16)
    cc, rc = nx // 2, ny // 2
    for dj in range(-_AXIS_BAND, _AXIS_BAND + 1):
        col = cc + dj
        if 0 <= col < nx:
            floor[:, col] = ndimage.median_filter(power[:, col], size=2 * half_r + 1, mode="wrap")
            samples[:, col] = 2 * half_r + 1
    for di in range(-_AXIS_BAND, _AXIS_BAND + 1):
        row = rc + di
        if 0 <= row < ny:
            floor[row, :] = ndimage.median_filter(power[row, :], size=2 * half_c + 1, mode="wrap")
            samples[row, :] = 2 * half_c + 1
    floor *= np.float32(1 / _median_to_mean(dof))
    tiny = max(1e-14 * float(power.max()), float(np.finfo(np.float32).tiny))
    np.maximum(floor, np.float32(tiny), out=floor)
    return floor, samples


def _two_pass_floor(power, dof=1):
    """Local mean noise power at every bin (float32) and the number of bins it was estimated from.

    Away from the axes: the median over a polar cell (thin rings near the origin,
    where the background falls steeply; sectors of ~192 bins further out). Along
    the qx = 0 and qy = 0 bands: a running median along the band itself, so that
    the streak of scan-line offsets is its own background. The power of pure
    noise in one bin is exponentially distributed, whose mean is median / ln 2.
    The second pass leaves out the bins around clear first-pass excesses, so
    that peaks crowding a thin ring do not raise its floor. All cell medians
    come from one row-wise sort of the cells (geometry cached per shape), and
    the second pass re-sorts only the cells that lost bins.
    """
    cells = _floor_cells(power.shape)
    med, ext = _cell_medians(power, cells)
    floor, _ = _floor_map(power, cells, med, cells.counts, dof)
    # A bin 10 times above the mean noise has probability exp(-10) = 5e-5 under pure
    # noise; masking those (and the window's main lobe around them) barely thins the
    # noise sample but keeps crowded peaks out of thin rings. For an average of dof
    # periodograms, the level with the same probability under Gamma(dof) noise.
    level = 10.0 if dof == 1 else float(special.gammainccinv(dof, math.exp(-10.0)) / dof)
    strong = np.flatnonzero(power > level * floor)
    del floor
    ny, nx = power.shape
    rows, cols = np.divmod(strong, nx)
    parts = [strong]
    for di in (-1, 0, 1):  # the 3 x 3 neighbourhood, inside the frame (a binary dilation)
        for dj in (-1, 0, 1):
            rr, cc = rows + di, cols + dj
            ok = (rr >= 0) & (rr < ny) & (cc >= 0) & (cc < nx)
            parts.append(rr[ok] * nx + cc[ok])
    exclude = np.unique(np.concatenate(parts))
    med2, counts2 = _excluded_medians(power, ext, cells, med, exclude)
    return _floor_map(power, cells, med2, counts2, dof)


def _threshold_values(unique, n_bins, false_alarm, dof=1):
    """Detection threshold for a power / floor ratio, per distinct sample count m of the floor.

    Under pure noise the bin power X is exponential (mean 1) and the floor is the
    median M of m such powers divided by ln 2. Then P(X > t M / ln 2) =
    E[exp(-s M)] with s = t / ln 2, and by the Rényi representation of order
    statistics M = sum_{i<=k} E_i / (m - i + 1), k = ceil(m / 2), so
    P = prod_{i<=k} (m - i + 1) / (m - i + 1 + s) (derived). t solves
    n_bins * P = false_alarm; for large m it tends to ln(n_bins / false_alarm).
    Beyond ~1000 samples the floor's scatter no longer matters (callers clip m).
    For an average of ``dof`` periodograms see :func:`_threshold_values_averaged`.
    """
    if dof != 1:
        return _threshold_values_averaged(unique, n_bins, false_alarm, dof)
    target = math.log(false_alarm / n_bins)
    kmax = int((unique.max() + 1) // 2)
    i = np.arange(kmax)[None, :]
    j = unique[:, None] - i + 0.0  # m, m-1, ..., m-k+1 for each m (padded)
    used = i < ((unique[:, None] + 1) // 2)
    j = np.where(used, j, 1.0)
    log_j = np.where(used, np.log(j), 0.0)

    def log_p(t):
        return np.sum(log_j - np.where(used, np.log(j + t[:, None] / math.log(2)), 0.0), axis=1)

    return _solve_decreasing(log_p, target, len(unique))


def _solve_decreasing(log_p, target, n):
    """The t > 0 (n of them, vectorised) where a decreasing log_p(t) falls to ``target``: doubling to
    bracket it, then 60 bisections (relative precision below 1e-15)."""
    lo = np.zeros(n)
    hi = np.ones(n)
    while np.any((log_p(hi) > target) & (hi < 1e12)):
        hi = np.where(log_p(hi) > target, hi * 2, hi)
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        above = log_p(mid) > target
        lo = np.where(above, mid, lo)
        hi = np.where(above, hi, mid)
    return hi


def _threshold_values_averaged(unique, n_bins, false_alarm, dof):
    """Thresholds for a power / floor ratio when every bin is an average of ``dof`` independent periodograms.

    Under pure noise a bin's power over its mean is Gamma(dof, 1/dof) distributed (an
    average of dof exponentials), P(X > x) = Q(dof, dof x) with Q the regularised upper
    incomplete gamma function. The floor is a median of m such bins over the Gamma
    median mu, which scatters by 1 / (2 f(mu) mu sqrt(m)) relative (f the Gamma density;
    the large-sample variance of a median). The chance that noise passes t times the floor
    is averaged over that scatter (Gauss–Hermite, 24 nodes) and t solves
    n_bins * P = false_alarm (derived; dof = 1 is the exact formula of :func:`_threshold_values`).
    """
    k = float(dof)
    mu = float(special.gammaincinv(k, 0.5) / k)
    log_f = (k - 1) * math.log(mu) + k * math.log(k) - k * mu - float(special.gammaln(k))
    rel = 1.0 / (2 * math.exp(log_f) * mu * np.sqrt(np.asarray(unique, dtype=float)))
    nodes, weights = np.polynomial.hermite.hermgauss(24)
    scale = np.maximum(1 + math.sqrt(2) * rel[:, None] * nodes[None, :], 0.05)
    target = math.log(false_alarm / n_bins)

    def log_p(t):
        p = np.sum(weights * special.gammaincc(k, k * t[:, None] * scale), axis=1) / math.sqrt(math.pi)
        return np.log(np.maximum(p, 1e-300))

    return _solve_decreasing(log_p, target, len(unique))


def _hann_leak(d):
    """Upper bound of the Hann kernel magnitude |W| at integer bin distance d (W(0) = 1).

    |W(u)| = |sinc(u)| / |1 - u^2| for a tone u bins away (Harris 1978); a tone
    anywhere within half a bin of its peak bin gives at most 1/(pi u |u^2 - 1|)
    with u = d - 1/2.
    """
    d = np.abs(np.asarray(d, dtype=float))
    u = d - 0.5
    with np.errstate(divide="ignore"):
        bound = 1.0 / (np.pi * u * np.abs(u**2 - 1.0))
    return np.where(d < 2, 1.0, np.minimum(1.0, bound))


def _grandke(power, r, c, floor=None, others=(), dof=1):
    """Sub-bin offsets (d_row, d_col) by the Hann three-bin formula, the scalloping factor and their one-sigma errors (bins).

    delta = (2 alpha - 1) / (1 + alpha), alpha the ratio of the larger neighbour to
    the peak bin (Grandke, IEEE Trans. Instrum. Meas. 32, 350 (1983)); exact for one
    complex tone (to 1e-8 bins at N >= 64, checked numerically).

    The errors (per axis, bins; NaN without ``floor``) add in quadrature:

    - noise (derived): a bin's magnitude moves by Re(n e^{-i phi}), variance F / 2
      (F = ``floor``, the mean noise power of a bin). The periodic Hann window
      correlates the noise of adjacent bins by -2/3 (sum w^2 e^{2 pi i n / N} over
      sum w^2) and a tone's phase turns by pi from one bin to the next, so the two
      magnitudes correlate by +2/3: var(alpha) = (1 + alpha^2 - 4 alpha / 3) / (2 SNR),
      SNR = P / F with P the tone's power in the peak bin, and d delta / d alpha =
      3 / (1 + alpha)^2. That is 0.72 / sqrt(SNR) bins on a bin centre and
      0.43 / sqrt(SNR) half-way, 1.7 to 2.8 times the Cramér–Rao bound of the tone,
      0.26 / sqrt(SNR) (Rife & Boorstyn 1974 in 2-D with the Hann SNR). An average of
      ``dof`` independent periodograms (Welch) divides the variance by dof;
    - discretisation: the leakage of every other peak in ``others`` ((row, col, power)
      of the detected bins, the mirror included) into the three bins, bounded by the
      Hann kernel (:func:`_hann_leak`), with a random relative phase;
    - model misfit: the other neighbour should be (1 - delta) / (2 + delta) of the peak
      (same kernel). Where it differs by more than 3 times its noise, the peak is not
      one tone (domains, drift, a close neighbour) and the difference, times
      d delta / d alpha (about 1.5), is added.
    """
    ny, nx = power.shape
    others = np.asarray(others, dtype=float).reshape(-1, 3)

    def mag(rr, cc):
        return math.sqrt(max(float(power[rr, cc]), 0.0))

    out, errs = [], []
    noise = float(floor) if floor is not None else float("nan")
    for axis in (0, 1):
        n = ny if axis == 0 else nx
        idx = r if axis == 0 else c
        peak = mag(r, c)
        if idx <= 0 or idx >= n - 1 or peak <= 0:
            out.append(0.0)
            errs.append(1 / math.sqrt(12))  # uniform within the bin
            continue
        left = mag(r - 1, c) if axis == 0 else mag(r, c - 1)
        right = mag(r + 1, c) if axis == 0 else mag(r, c + 1)
        sign = 1.0 if right >= left else -1.0
        alpha = max(left, right) / peak
        delta = float(np.clip((2 * alpha - 1) / (1 + alpha), 0.0, 0.5))
        beta = min(left, right) / peak
        out.append(sign * delta)
        if not math.isfinite(noise):
            errs.append(float("nan"))
            continue
        snr = max(peak**2 - noise, 1e-12 * noise, 1e-300) / max(noise, 1e-300)
        slope = 3 / (1 + alpha) ** 2
        var_noise = slope**2 * max(1 + alpha**2 - 4 * alpha / 3, 0.0) / (2 * snr * dof)
        var_leak = 0.0
        if len(others):
            rj, cj, pj = others[:, 0], others[:, 1], others[:, 2]
            rel = np.sqrt(np.maximum(pj, 0.0) / peak**2)
            rel = np.where((rj == r) & (cj == c), 0.0, rel)  # not the peak itself
            step_r, step_c = (sign, 0) if axis == 0 else (0, sign)

            def leak(rr, cc):
                d_r, d_c = np.abs(rr - rj) % ny, np.abs(cc - cj) % nx
                return _hann_leak(np.minimum(d_r, ny - d_r)) * _hann_leak(np.minimum(d_c, nx - d_c))

            e0 = rel * leak(r, c)
            e1 = rel * leak(r + step_r, c + step_c)
            var_leak = float(np.sum(slope**2 * (e1**2 + alpha**2 * e0**2) / 2))
        model = (1 - delta) / (2 + delta)
        var_beta = max(1 + beta**2 - 4 * beta / 3, 0.0) / (2 * snr * dof) + (3 / (2 + delta) ** 2) ** 2 * var_noise
        misfit = abs(beta - model)
        var_misfit = (1.5 * misfit) ** 2 if misfit > 3 * math.sqrt(var_beta + var_leak) else 0.0
        errs.append(math.sqrt(var_noise + var_leak + var_misfit))
    d_row, d_col = out
    # Hann kernel at the offset, normalised: sinc(d) / (1 - d^2) (Harris 1978).
    scallop = float(np.sinc(d_row) / (1 - d_row**2) * np.sinc(d_col) / (1 - d_col**2))
    return d_row, d_col, scallop, (errs[0], errs[1])


def find_peaks(image, *, pixel_size_nm, mask=None, max_peaks=40, min_q_rad_per_nm=None, snr=None,
               false_alarm=0.01, refine="interpolate", sigma_nm=None, tile_px=None):
    """Find the peaks of an image's power spectrum, one per +q/-q pair.

    The spectrum is that of :func:`power_spectrum`. A peak is a local maximum
    (5 x 5 bins) whose power exceeds ``snr`` times the local mean noise power.
    The local noise floor is a median over polar cells of ~192 bins (thin rings
    near the origin); along the qx = 0 and qy = 0 axes, where the offsets of
    whole scan lines put their energy, the floor is a running median along the
    axis itself, so a streak is reported only where an isolated maximum stands
    well above it. Side lobes of stronger peaks (Hann window leakage) are
    rejected, and a disc around q = 0 (at least 3 bins, the reach of the
    window's main lobe) is ignored.

    A large image (``tile_px``, or a dask array beyond ``WHOLE_FRAME_MAX_PIXELS``
    pixels) is searched on the averaged periodogram of tiles (:func:`power_spectrum`;
    the floor and threshold then follow the Gamma statistics of an average of
    the equivalent number of independent periodograms), and every peak is
    then refined on the full-resolution frame by the chunked lock-in with a
    decimated output (as ``refine="lockin"``, unless ``refine`` is None), so
    neither step holds the whole image.

    Parameters
    ----------
    image : (row, col) array_like, dask array or Scan
        The image (a dask array up to ``WHOLE_FRAME_MAX_PIXELS`` pixels is
        computed: the whole-frame FFT needs the whole frame).
    pixel_size_nm : float or (float, float)
        Pixel size in nm. May be None for a Scan.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    max_peaks : int
        Keep at most this many peaks, strongest first.
    min_q_rad_per_nm : float, optional
        Ignore peaks with |q| below this (on top of the 3-bin disc).
    snr : float, optional
        Detection threshold, power over local mean noise power. Default: per
        bin, the level that pure noise exceeds with probability ``false_alarm``
        anywhere in the searched half-plane, allowing for the scatter of the
        floor's median (about ln(n_bins / false_alarm) for well-sampled floors;
        the noise power of a bin is exponentially distributed).
    false_alarm : float
        See ``snr``.
    refine : {"interpolate", "lockin", None}
        Sub-bin position: the Hann three-bin formula (default), that followed by
        the lock-in phase-gradient update of :func:`refine_q`, or the bin centre.
    sigma_nm : float, optional
        Lock-in width for ``refine="lockin"`` (default: per peak, from its
        distance to its neighbours).
    tile_px : int, optional
        Tiles of this many pixels a side (see above). Default: the whole frame
        for an ndarray or a dask array up to ``WHOLE_FRAME_MAX_PIXELS`` pixels,
        else ``WELCH_TILE_PX``.

    Returns
    -------
    list of Peak
        Strongest first, each in the half-plane qy > 0 (or qy = 0, qx > 0),
        with ``q_err`` and ``q_cov``: one-sigma statistical errors from the
        noise measured in this image (see :class:`Peak`), calibrated by
        coverage over noise realisations (tests/test_fourier_errors.py).

    Raises
    ------
    InputError
        For an invalid image, pixel size, mask or option.

    References
    ----------
    .. [1] D. C. Rife and R. R. Boorstyn, "Single-tone parameter estimation from
       discrete-time observations", IEEE Trans. Inf. Theory 20, 591 (1974).
       doi:10.1109/TIT.1974.1055282
    .. [2] T. Grandke, "Interpolation algorithms for discrete Fourier transforms
       of weighted signals", IEEE Trans. Instrum. Meas. 32, 350 (1983).
       doi:10.1109/TIM.1983.4315077
    .. [3] P. D. Welch, IEEE Trans. Audio Electroacoust. 15, 70 (1967).
       doi:10.1109/TAU.1967.1161901

    Examples
    --------
    >>> n, dx = 128, 0.05
    >>> y, x = np.mgrid[:n, :n] * dx
    >>> rng = np.random.default_rng(0)
    >>> image = np.cos(9.3 * x + 4.1 * y) + 0.5 * rng.standard_normal((n, n))
    >>> peaks = find_peaks(image, pixel_size_nm=dx)
    >>> len(peaks), np.round(peaks[0].q, 1).tolist()
    (1, [9.3, 4.1])
    """
    image, pixel, mask = _open(image, pixel_size_nm, mask, "find_peaks")
    if refine not in ("interpolate", "lockin", None):
        raise InputError(f"refine must be 'interpolate', 'lockin' or None, got {refine!r}")
    max_peaks = int(max_peaks)
    if max_peaks < 1:
        raise InputError(f"max_peaks must be at least 1, got {max_peaks}")
    if not 0 < false_alarm < 1:
        raise InputError(f"false_alarm must lie between 0 and 1, got {false_alarm}")
    if sigma_nm is not None:
        sigma_nm = positive(sigma_nm, "sigma_nm")
    tile = _tile_size(image, tile_px)
    if tile is not None:
        power, shape, dof, counts, bad = _welch_spectrum(image, mask, pixel, tile, "hann", np.float32)
        peaks = _detect(power, shape, pixel, max_peaks, min_q_rad_per_nm, snr, false_alarm, refine is not None, dof)
        if refine is not None and peaks:
            peaks = _refine_tiled(image, mask, pixel, peaks, counts, bad, shape, sigma_nm=sigma_nm)
        return peaks
    image, pixel, valid = _unpack(image, pixel, mask, "find_peaks")
    level = _subtract_plane(image, valid, pixel)
    power = _spectrum(level, "hann", np.float32)
    peaks = _detect(power, image.shape, pixel, max_peaks, min_q_rad_per_nm, snr, false_alarm, refine is not None)
    if refine == "lockin" and peaks:
        peaks = _refine_peaks(level, valid, pixel, peaks, sigma_nm=sigma_nm)
    return peaks


def _candidates(power, ratio, samples, shape, pixel, min_q, snr, false_alarm, dof=1):
    """Bins (rows, cols) that may hold a peak: in the search region, above the threshold, 5 x 5 local maxima.

    The search region is beyond a 3-bin disc around q = 0 and off the first row and column
    (the Nyquist bin of an even axis has no mirror partner), and |q| >= ``min_q``. The
    tests run on the few bins above the lowest threshold only, never on the whole plane.
    """
    ny, nx = shape
    cells = _floor_cells(shape)
    n_search = cells.n_search
    if min_q is not None:
        min_q = _finite_float(min_q, "min_q_rad_per_nm")
        qx_axis, qy_axis = _q_axes(shape, pixel)
        i, j = _bin_offsets(shape)
        search = (np.hypot(i, j) >= 3.0) & (np.hypot(qy_axis[:, None], qx_axis[None, :]) >= min_q)
        search[0, :] = search[-1, :] = search[:, 0] = search[:, -1] = False
        n_search = int(search.sum())
    n_search = max(n_search // 2, 1)
    flat_ratio = ratio.ravel()
    if snr is None:
        clipped = np.clip(samples.ravel(), 1, 1001)
        present = np.flatnonzero(np.bincount(clipped, minlength=1002))
        table = np.zeros(1002)
        table[present] = _threshold_values(present, n_search, false_alarm, dof)
        pre = np.flatnonzero(flat_ratio > table[present].min())
        pre = pre[flat_ratio[pre] > table[clipped[pre]]]
    else:
        pre = np.flatnonzero(flat_ratio > positive(snr, "snr"))
    rows, cols = np.divmod(pre, nx)
    ki, kj = rows - ny // 2, cols - nx // 2
    ok = (ki * ki + kj * kj >= 9) & (rows > 0) & (rows < ny - 1) & (cols > 0) & (cols < nx - 1)
    ok &= power[rows, cols] > 0
    if min_q is not None:
        ok &= np.hypot(qx_axis[cols], qy_axis[rows]) >= min_q
    rows, cols = rows[ok], cols[ok]
    # Local maxima over 5 x 5 bins, the frame edge replicated (as ndimage.maximum_filter, mode "nearest").
    off = np.arange(-2, 3)
    rr = np.clip(rows[:, None, None] + off[None, :, None], 0, ny - 1)
    cc = np.clip(cols[:, None, None] + off[None, None, :], 0, nx - 1)
    neighbours = power[rr, cc].reshape(len(rows), -1).max(axis=1) if len(rows) else np.zeros(0)
    top = power[rows, cols] >= neighbours
    return rows[top], cols[top]


def _detect(power, shape, pixel, max_peaks, min_q, snr, false_alarm, interpolate, dof=1):
    """Peaks of a power plane of ``shape`` (the frame, or the Welch tile with ``dof`` averaged periodograms)."""
    ny, nx = shape
    dy, dx = pixel
    floor, samples = _two_pass_floor(power, dof)
    ratio = power / floor
    cand = _candidates(power, ratio, samples, shape, pixel, min_q, snr, false_alarm, dof)
    # Both members of every pair are kept at this stage (side lobes of a peak's mirror
    # matter too); enough candidates for max_peaks canonical peaks and their mirrors.
    order = np.argsort(power[cand])[::-1][: 40 * max_peaks]
    rows, cols = cand[0][order], cand[1][order]
    acc_r = np.empty(len(rows), dtype=int)
    acc_c = np.empty(len(rows), dtype=int)
    acc_p = np.empty(len(rows))
    n_acc = 0
    accepted = []
    for r, c in zip(rows, cols):
        p = power[r, c]
        if n_acc:
            drow = r - acc_r[:n_acc]
            dcol = c - acc_c[:n_acc]
            # A plateau or shoulder of an accepted peak...
            if np.any(np.maximum(np.abs(drow), np.abs(dcol)) <= 2):
                continue
            # ... or within a factor 10 of the window's side lobe of a stronger peak.
            leak = (_hann_leak(drow) * _hann_leak(dcol)) ** 2
            if np.any(p < 10.0 * acc_p[:n_acc] * leak):
                continue
        acc_r[n_acc], acc_c[n_acc], acc_p[n_acc] = r, c, p
        n_acc += 1
        accepted.append((r, c, float(p)))
    peaks = []
    others = np.array(accepted, dtype=float).reshape(-1, 3)
    for r, c, p in accepted:
        ki, kj = r - ny // 2, c - nx // 2
        if not (ki > 0 or (ki == 0 and kj > 0)):
            continue  # keep the canonical member of each +q/-q pair
        if interpolate:
            d_row, d_col, scallop, (e_row, e_col) = _grandke(power, r, c, floor[r, c], others, dof)
            how = "interpolated"
        else:
            d_row = d_col = 0.0
            scallop = 1.0
            e_row = e_col = 1 / math.sqrt(12)  # uniform within the bin
            how = "bin"
        q = np.array([2 * np.pi * (kj + d_col) / (nx * dx), 2 * np.pi * (ki + d_row) / (ny * dy)])
        cov = np.diag([(e_col * 2 * np.pi / (nx * dx)) ** 2, (e_row * 2 * np.pi / (ny * dy)) ** 2])
        peaks.append(Peak(q=q, q_err=math.sqrt(0.5 * np.trace(cov)), power=float(p), snr=float(ratio[r, c]),
                          amplitude=2 * math.sqrt(p) / max(scallop, 1e-6), refined=how, q_cov=cov))
        if len(peaks) >= max_peaks:
            break
    return peaks


# --------------------------------------------------------------------------------------
# Sub-pixel refinement by lock-in
# --------------------------------------------------------------------------------------


def _auto_sigma_px(qj, others, pixel, shape):
    """Lock-in width (nm) that keeps every other peak, its mirror and q = 0 below 0.1 % leakage.

    Leakage of a peak dk away is exp(-sigma^2 dk^2 / 2) (docs/methods.md §1); 0.1 % needs
    sigma dk >= 3.72. Capped at 1/12 of the frame so that the trusted region (2.5 sigma
    from each edge) keeps more than half the frame, and at least 1.5 pixels.
    """
    pts = [np.zeros(2), -qj]
    if others is not None and len(others):
        pts += list(others) + list(-np.asarray(others))
    pts = np.asarray(pts)
    d = np.hypot(*(pts - qj).T)
    d = d[d > 1e-9 * max(np.hypot(*qj), 1e-300)]
    sigma = 3.72 / d.min()
    dy, dx = pixel
    lo = 1.5 * max(dy, dx)
    hi = min(shape[0] * dy, shape[1] * dx) / 12
    return float(np.clip(sigma, lo, max(hi, lo)))


def _edge_distance(valid, pixel):
    """Distance (nm) from every pixel to the nearest invalid pixel or the frame edge, as trusted_mask measures it.

    None when every pixel is valid: then it is separable and computed where needed.
    """
    if valid.all():
        return None
    padded = np.pad(valid, 1, constant_values=False)
    return ndimage.distance_transform_edt(padded, sampling=pixel)[1:-1, 1:-1]


def _coarse_trusted(shape, pixel, step, sigma_nm, distance, margin_sigma=2.5):
    """``trusted_mask`` (edge and mask margin ``margin_sigma`` sigma) sampled at rows and columns 0, s, 2s ..."""
    ny, nx = shape
    dy, dx = pixel
    rows = np.arange(0, ny, step)
    cols = np.arange(0, nx, step)
    if distance is None:
        # The edge sits half a pixel outside the outermost row or column (trusted_mask's convention).
        dr = np.minimum(rows + 1, ny - rows) * dy
        dc = np.minimum(cols + 1, nx - cols) * dx
        dist = np.minimum(dr[:, None], dc[None, :])
    else:
        dist = distance[::step, ::step]
    return dist - 0.5 * min(dy, dx) >= margin_sigma * float(sigma_nm)


def _refine_step(shape, pixel, sigma_nm, distance=None):
    """Decimation step (pixels) of the refinement lock-in and the trusted pixel count at full resolution.

    The lock-in is exact at the pixels it returns (``_lockin.lockin``, ``step``), and its
    noise is correlated over about sigma (correlation exp(-r^2 / 4 sigma^2)), so samples
    every 1.5 sigma keep nearly all the information for the phase-plane fit (neighbours
    still correlate by 0.57). At least 64 samples stay in the trusted region.
    """
    ny, nx = shape
    dy, dx = pixel
    if distance is None:
        inner = max(ny - 2 * math.ceil(2.5 * sigma_nm / dy + 0.5) + 2, 0) * max(nx - 2 * math.ceil(2.5 * sigma_nm / dx + 0.5) + 2, 0)
    else:
        inner = int(np.count_nonzero(distance - 0.5 * min(dy, dx) >= 2.5 * sigma_nm))
    step = max(1, int(1.5 * sigma_nm / max(pixel)))
    return int(max(1, min(step, math.floor(math.sqrt(inner / 64))))), inner


def _lockin_refine(level, valid, pixel, q0, sigma_nm, iterations, distance=None, noise_var=None):
    """Iterated phase-gradient update and a final phase-plane fit for wavevectors sharing one sigma.

    One call of the lock-in for all of them (one shared forward FFT), sampled every
    ``_refine_step`` pixels (exact at those pixels). The updates of q do not need a new
    lock-in: for a tone at q_t, the lock-in at q + dq is exp(-i dq.r) times the one at q,
    up to the constant factor exp(-sigma^2 (|q_t - q - dq|^2 - |q_t - q|^2) / 2)
    (the Gaussian transfer; derived), so the field is re-referenced in place.

    The covariance of each q is that of the phase-plane slope, cov = s^2 n_eff (X^T W X)^-1,
    from the measured phase scatter s^2 about the plane and n_eff samples per independent
    sigma-patch (the larger of the lock-in's own 4 pi sigma^2 and the residual's
    correlation area), never below the Cramér–Rao bound of a tone over the trusted
    region, var(q_x) >= 2 sigma_n^2 / (A0^2 sum (x - <x>)^2) (Rife & Boorstyn 1974,
    Fisher information summed over the pixels; derived), with sigma_n^2 the white-noise
    variance per pixel: the smaller of the one that gives the measured local floor
    (``noise_var``) and the one that the lock-in phase scatter implies.

    Returns q (k, 2), q_err (k,), amplitude (k,), q_cov (k, 2, 2) and the number of
    independent sigma-patches in the trusted region (k,).
    """
    dy, dx = pixel
    ny, nx = level.shape
    step, inner = _refine_step(level.shape, pixel, sigma_nm, distance)
    trusted = _coarse_trusted(level.shape, pixel, step, sigma_nm, distance)
    if inner < 16 or trusted.sum() < 4:
        raise InputError(
            f"sigma_nm = {sigma_nm:g} nm leaves almost no trusted region in a {ny} x {nx} image; use a smaller sigma"
        )
    q = np.array(q0, dtype=float).reshape(-1, 2)
    k = len(q)
    mask = None if valid.all() else ~valid
    a = np.asarray(lockin(level.astype(np.float32), q, sigma_nm=sigma_nm, pixel_size_nm=pixel, mask=mask, step=step))
    a = a.reshape(k, *trusted.shape)
    wc, wr = valid.sum(axis=0), valid.sum(axis=1)
    return _fit_field(a, trusted, q, step, pixel, sigma_nm, iterations, noise_var, _spread_nm2(wr, wc, pixel))


def _spread_nm2(wr, wc, pixel):
    """sum (x - <x>)^2 and sum (y - <y>)^2 over the valid pixels (nm^2), from their row and column counts."""
    dy, dx = pixel
    xs, ys = np.arange(len(wc)) * dx, np.arange(len(wr)) * dy
    n_valid = max(float(np.sum(wc)), 1.0)
    return float(wc @ xs**2 - (wc @ xs) ** 2 / n_valid), float(wr @ ys**2 - (wr @ ys) ** 2 / n_valid)


def _phase_slope(a, trusted, coarse):
    """Phase slope (d/dx, d/dy) of each field by the angle of the summed lag-one products, (k, 2) rad/nm.

    sum conj(A(r)) A(r + h) over neighbouring trusted samples: exact for a phase plane up to
    pi per sample and weighted by |A|^2, so one update removes the offset of q (derived).
    """
    out = np.zeros((len(a), 2))
    both_x = trusted[:, :-1] & trusted[:, 1:]
    both_y = trusted[:-1, :] & trusted[1:, :]
    for m, f in enumerate(a):
        f = np.where(np.isfinite(f), f, 0)
        px = np.sum((np.conj(f[:, :-1]) * f[:, 1:])[both_x])
        py = np.sum((np.conj(f[:-1, :]) * f[1:, :])[both_y])
        out[m] = [np.angle(px) / coarse[1], np.angle(py) / coarse[0]]
    return out


def _fit_field(a, trusted, q, step, pixel, sigma_nm, iterations, noise_var, spread):
    """Refined q, errors and amplitude from lock-in fields ``a`` (k, rows, cols) sampled every ``step`` pixels.

    See :func:`_lockin_refine`; ``spread`` is sum (x - <x>)^2, sum (y - <y>)^2 over the valid
    pixels for the Cramér–Rao bound.
    """
    dy, dx = pixel
    k = len(q)
    q = np.array(q, dtype=float)
    a = np.asarray(a).astype(np.complex128)
    coarse = (dy * step, dx * step)
    rows, cols = np.nonzero(trusted)
    x = cols * coarse[1]
    y = rows * coarse[0]
    xg = np.arange(trusted.shape[1]) * coarse[1]
    yg = np.arange(trusted.shape[0]) * coarse[0]
    q_start = q.copy()
    q_err = np.full(k, np.nan)
    q_cov = np.full((k, 2, 2), np.nan)
    amp = np.full(k, np.nan)
    phase_noise_var = np.full(k, np.nan)
    # Samples per independent sample of the lock-in phase: the noise in A is white noise
    # filtered by the Gaussian, correlation exp(-r^2 / 4 sigma^2), whose integral is
    # 4 pi sigma^2 (derived), here in units of the sampled grid.
    n_corr = max(4 * np.pi * sigma_nm**2 / (coarse[0] * coarse[1]), 1.0)
    n_patches = trusted.sum() / n_corr

    def rereference(dq):
        for m in range(k):
            a[m] *= np.exp(-1j * dq[m, 1] * yg)[:, None] * np.exp(-1j * dq[m, 0] * xg)[None, :]

    for _ in range(iterations - 1):
        dq = _phase_slope(a, trusted, coarse)
        q += dq
        rereference(dq)
    at = a[:, trusted]
    w = np.abs(at) ** 2
    w = np.where(np.isfinite(w), w, 0.0)
    at = np.where(np.isfinite(at), at, 0.0)
    for m in range(k):
        wm = w[m]
        # The Gaussian transfer attenuated the tone by exp(-sigma^2 |q - q_start|^2 / 2) (derived).
        gain = math.exp(min(0.5 * sigma_nm**2 * float(np.sum((q[m] - q_start[m]) ** 2)), 50.0))
        amp[m] = float(2 * np.sum(np.abs(at[m]) * wm) / max(wm.sum(), 1e-300)) * gain
        # The |A|^2-weighted median of the local wavevector offset: robust to the
        # phase slips at walls between domains of different phase, which bias a
        # mean or a plane fit. Its error: 1.25 (median efficiency for Gaussian
        # noise) x spread / sqrt(independent areas).
        grad = phase_gradient(a[m], pixel_size_nm=coarse)[:, trusted]
        ok = np.all(np.isfinite(grad), axis=0) & (wm > 0)
        med_g = np.array([_weighted_median(grad[c, ok], wm[ok]) for c in (0, 1)])
        spread2 = np.sum((grad[:, ok] - med_g[:, None]) ** 2 * wm[ok], axis=1) / wm[ok].sum()
        err_med = 1.25 * np.sqrt(spread2 * n_corr / max(ok.sum(), 1))
        unit = at[m] / np.where(np.abs(at[m]) > 0, np.abs(at[m]), 1.0)
        mean = np.sum(unit * wm)
        psi = np.angle(unit * np.conj(mean))
        wrapped = np.sum(wm[np.abs(psi) > 2.5]) / max(wm.sum(), 1e-300)
        cov_med = np.diag(err_med**2)
        if wrapped >= 0.01:
            # The phase wraps inside the trusted region (walls, slips): no plane fit.
            q[m] += med_g
            q_cov[m] = cov_med
            continue
        # Weighted least-squares plane through the residual phase: its slope is the
        # remaining offset of q (phase regression, efficient at high SNR).
        xm = np.sum(wm * x) / wm.sum()
        ym = np.sum(wm * y) / wm.sum()
        design = np.stack([np.ones_like(x), x - xm, y - ym], axis=1)
        normal = design.T @ (design * wm[:, None])
        beta = np.linalg.solve(normal, design.T @ (wm * psi))
        resid = psi - design @ beta
        s2 = np.sum(wm * resid**2) / max(len(x) - 3, 1)
        # The white noise per pixel that this phase scatter means: var(phi) = sigma_n^2 /
        # (2 pi sigma_px^2 A0^2) for a Gaussian-filtered tone (derived); s2 is weighted by |A|^2.
        phase_noise_var[m] = s2 / np.mean(wm) * 2 * np.pi * sigma_nm**2 / (dx * dy) * amp[m] ** 2 \
            if np.mean(wm) > 0 else np.nan
        # A residual correlated over more than the lock-in's own noise area (phase
        # texture, domains of different phase) leaves fewer independent samples.
        n_eff = max(n_corr, _correlation_area_px(resid * np.sqrt(wm), trusted, sigma_nm / max(coarse)))
        cov = s2 * n_eff * np.linalg.inv(normal)
        cov_fit = cov[1:, 1:]
        err_fit = math.sqrt(max(0.5 * (cov_fit[0, 0] + cov_fit[1, 1]), 0.0))
        diff = float(np.hypot(*(beta[1:] - med_g)))
        if diff <= 3 * math.hypot(err_fit, float(np.sqrt(0.5 * np.sum(err_med**2)))):
            q[m] += beta[1:]
            q_cov[m] = cov_fit
        else:
            # The phase is not one plane (domains of different phase): keep the median.
            q[m] += med_g
            q_cov[m] = cov_med
    if noise_var is not None:
        # The bound over every valid pixel (the lock-in reaches beyond the trusted region).
        sxx, syy = spread
        for m in range(k):
            # The spectral floor can hold more than noise (the leakage of a tone through a
            # mask): the smaller of it and the noise the lock-in phase itself shows.
            nv = np.nanmin([noise_var[m], phase_noise_var[m]])
            if math.isfinite(nv) and math.isfinite(amp[m]) and amp[m] > 0:
                crb = 2 * nv / amp[m] ** 2 * np.array([1 / max(sxx, 1e-300), 1 / max(syy, 1e-300)])
                d = np.diag(q_cov[m]).copy()
                scale = np.sqrt(np.maximum(crb, d) / np.where(d > 0, d, 1.0))
                q_cov[m] = np.where(d > 0, q_cov[m] * np.outer(scale, scale), np.diag(crb))
    for m in range(k):
        q_err[m] = math.sqrt(max(0.5 * (q_cov[m, 0, 0] + q_cov[m, 1, 1]), 0.0))
    return q, q_err, amp, q_cov, np.full(k, n_patches)


def _weighted_median(values, weights):
    order = np.argsort(values)
    cum = np.cumsum(weights[order])
    return float(values[order][min(np.searchsorted(cum, 0.5 * cum[-1]), len(values) - 1)])


def _correlation_area_px(values, trusted, sigma_px):
    """Pixels per independent sample of a field known on ``trusted``, from its autocorrelation.

    The autocorrelation (FFT, zero padded, on blocks of about sigma / 2 pixels, at most 256 a side)
    is normalised to 1 at zero lag and summed over the lags inside the radius
    where its azimuthal mean first falls below 0.02. For white noise filtered
    by a Gaussian of width sigma this gives 4 pi sigma^2 (derived).
    """
    field = np.zeros(trusted.shape)
    field[trusted] = values
    # Blocks of sigma / 2 keep the correlation resolved; at most 256 blocks a side keeps it cheap
    # (coarser blocks can only underestimate the area, and the caller never goes below 4 pi sigma^2).
    b = max(1, int(sigma_px / 2), int(math.ceil(max(trusted.shape) / 256)))
    ny, nx = (trusted.shape[0] // b) * b, (trusted.shape[1] // b) * b
    if ny < b or nx < b:
        return 0.0
    coarse = field[:ny, :nx].reshape(ny // b, b, nx // b, b).mean(axis=(1, 3))
    spec = np.fft.rfft2(coarse, s=(2 * coarse.shape[0], 2 * coarse.shape[1]))
    corr = np.fft.irfft2(np.abs(spec) ** 2, s=(2 * coarse.shape[0], 2 * coarse.shape[1]))
    if corr[0, 0] <= 0:
        return 0.0
    corr = np.fft.fftshift(corr / corr[0, 0])
    cy, cx = coarse.shape
    rr = np.hypot(*np.meshgrid(np.arange(2 * cy) - cy, np.arange(2 * cx) - cx, indexing="ij"))
    ring = rr.astype(int)
    radial = np.bincount(ring.ravel(), corr.ravel()) / np.maximum(np.bincount(ring.ravel()), 1)
    below = np.nonzero(radial < 0.02)[0]
    r0 = below[0] if len(below) else len(radial)
    return float(corr[rr < r0].sum()) * b * b


def refine_q(image, q, *, pixel_size_nm, sigma_nm=None, mask=None, iterations=3, other_q=None):
    """Sub-pixel wavevector of a Fourier peak, with its uncertainty.

    First the Hann three-bin interpolation around the spectrum bin nearest to
    ``q`` (Grandke 1983: delta = (2 alpha - 1) / (1 + alpha) per axis, alpha
    the ratio of the larger neighbour to the peak bin). Then the lock-in
    update q <- q + <grad phi>, the |A|^2-weighted mean of the phase gradient
    over the trusted region (at least 2.5 sigma from edges and masked pixels),
    repeated; the last step fits a plane to the residual phase instead, whose
    slope is the final correction and whose covariance gives the uncertainty:
    cov = s^2 n_c (X^T W X)^-1, with s^2 the weighted residual phase variance
    and n_c = 4 pi sigma^2 / pixel area the pixels per independent sample of the
    lock-in phase (its noise correlation is exp(-r^2 / 4 sigma^2)). For a tone in
    white noise this is the Cramér–Rao bound of Rife & Boorstyn (1974) over the
    trusted region (derived). All wavevectors that share a sigma come from one
    lock-in call (one forward FFT) sampled every ~1.5 sigma (exact at the
    sampled pixels); the updates re-reference that field instead of repeating
    the lock-in (a tone's lock-in at q + dq is exp(-i dq.r) times the one at q,
    up to a constant).

    Parameters
    ----------
    image : (row, col) array_like or Scan
        The image.
    q : (2,) or (k, 2) array_like
        Starting wavevector(s) in rad/nm, within about a bin of the peak.
    pixel_size_nm : float or (float, float)
        Pixel size in nm. May be None for a Scan.
    sigma_nm : float, optional
        Lock-in width in nm. Default: large enough that the mirror peak, q = 0
        and the peaks in ``other_q`` leak in by less than 0.1 %, at most 1/12 of
        the frame.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    iterations : int
        Lock-in passes (the last one is the plane fit), at least 1.
    other_q : (m, 2) array_like, optional
        Other peaks of the image, used to choose the default sigma.

    Returns
    -------
    q : ndarray, (2,) or (k, 2)
        Refined wavevector(s), rad/nm.
    q_err : float or ndarray (k,)
        One-sigma uncertainty of each component, rad/nm.

    Raises
    ------
    InputError
        For an invalid image, q beyond the Nyquist limit, or a sigma that
        leaves no trusted region.

    References
    ----------
    .. [1] T. Grandke, "Interpolation algorithms for discrete Fourier transforms
       of weighted signals", IEEE Trans. Instrum. Meas. 32, 350 (1983).
       doi:10.1109/TIM.1983.4315077
    .. [2] D. C. Rife and R. R. Boorstyn, "Single-tone parameter estimation from
       discrete-time observations", IEEE Trans. Inf. Theory 20, 591 (1974).
       doi:10.1109/TIT.1974.1055282
    .. [3] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> n, dx = 96, 0.1
    >>> y, x = np.mgrid[:n, :n] * dx
    >>> image = np.cos(5.4321 * x - 2.2222 * y + 0.3)
    >>> q, err = refine_q(image, [5.2, -2.0], pixel_size_nm=dx)
    >>> np.round(q, 4).tolist(), bool(err < 1e-3)
    ([5.4321, -2.2222], True)
    """
    image, pixel, valid = _unpack(image, pixel_size_nm, mask, "refine_q")
    q_arr = np.asarray(q, dtype=float)
    single = q_arr.ndim == 1
    q_arr = _check_q_override(q_arr, pixel)
    iterations = int(iterations)
    if iterations < 1:
        raise InputError(f"iterations must be at least 1, got {iterations}")
    if sigma_nm is not None:
        sigma_nm = positive(sigma_nm, "sigma_nm")
    other = None if other_q is None else _check_q_override(other_q, pixel)
    level = _subtract_plane(image, valid, pixel)
    power = _spectrum(level, "hann", np.float32)
    ny, nx = image.shape
    dy, dx = pixel
    start, bins = [], []
    for qj in q_arr:
        # Nearest bin, then the strongest bin within one bin of it.
        c = int(round(qj[0] * nx * dx / (2 * np.pi))) + nx // 2
        r = int(round(qj[1] * ny * dy / (2 * np.pi))) + ny // 2
        r0, r1 = max(r - 1, 1), min(r + 2, ny - 1)
        c0, c1 = max(c - 1, 1), min(c + 2, nx - 1)
        sub = power[r0:r1, c0:c1]
        if sub.size:
            rr, cc = np.unravel_index(np.argmax(sub), sub.shape)
            r, c = r0 + rr, c0 + cc
        d_row, d_col, _, _ = _grandke(power, r, c)
        bins.append((r, c))
        start.append([2 * np.pi * (c - nx // 2 + d_col) / (nx * dx), 2 * np.pi * (r - ny // 2 + d_row) / (ny * dy)])
    start = np.asarray(start)
    # The local noise floor at each start bin sets the Cramér–Rao bound of the refined q.
    floor, _ = _two_pass_floor(power)
    peaks = []
    for qs, (r, c) in zip(start, bins):
        p_bin = float(power[r, c])
        peaks.append(Peak(q=qs, q_err=np.nan, power=p_bin, snr=p_bin / float(floor[r, c])))
    refined = _refine_peaks(level, valid, pixel, peaks, sigma_nm=sigma_nm, other_q=other,
                            iterations=iterations, guard=False)
    q_out = np.array([p.q for p in refined])
    err = np.array([p.q_err for p in refined])
    return (q_out[0], float(err[0])) if single else (q_out, err)


def _plan_refinement(peaks, pixel, shape, sigma_nm=None, other_q=None, guard=True, ladder=1.25):
    """Lock-in width of every peak and whether to refine it (``shape``: the frame whose spectrum found them).

    Widths are rounded up to steps of ``ladder`` so that peaks share lock-in passes (a
    larger sigma only lowers the leakage; the cap of 1/12 of ``shape`` still holds).
    With ``guard``, peaks too weak for the lock-in are left out.
    """
    ny, nx = shape
    dy, dx = pixel
    allq = np.array([p.q for p in peaks])
    if other_q is not None:
        allq = np.concatenate([allq, np.asarray(other_q)])
    sigmas = []
    for m, p in enumerate(peaks):
        if sigma_nm is not None:
            sigmas.append(float(sigma_nm))
        else:
            others = np.delete(allq, m, axis=0)
            s = _auto_sigma_px(p.q, others, pixel, shape)
            s = min(float(np.exp(np.ceil(np.log(s) / np.log(ladder)) * np.log(ladder))),
                    max(min(ny * dy, nx * dx) / 12, 1.5 * max(dy, dx)))
            sigmas.append(s)
    sigmas = np.asarray(sigmas)
    todo = np.ones(len(peaks), bool)
    if guard:
        for m, p in enumerate(peaks):
            # Derived: per-pixel lock-in phase variance sigma_n^2 / (2 pi sigma_px^2 A0^2),
            # with A0^2 / sigma_n^2 = 9 SNR / (Nx Ny) for the Hann spectrum; above
            # (0.5 rad)^2 the phase wraps too often for a gradient to mean anything.
            s_px2 = sigmas[m] ** 2 / (dx * dy)
            if math.isfinite(p.snr):
                var_phi = nx * ny / (2 * np.pi * s_px2 * 9 * max(p.snr, 1e-12))
                todo[m] = var_phi < 0.25
    return sigmas, todo


def _noise_var(peak, shape):
    """White-noise variance per pixel that gives a peak's local floor F = power / snr (Hann:
    F = 2.25 sigma_n^2 / (Nx Ny) for the frame or tile ``shape``; derived)."""
    if not (math.isfinite(peak.snr) and peak.snr > 0 and math.isfinite(peak.power)):
        return np.nan
    return peak.power / peak.snr * shape[0] * shape[1] / 2.25


def _accepted(peak, qm, em, am, cm, bin_q, guard):
    """The refined peak, or None when the refinement failed or (with ``guard``) moved it by more
    than 5 times its interpolation uncertainty (or 0.3 bin): it locked onto noise or a neighbour."""
    moved = float(np.hypot(*(qm - peak.q)))
    limit = max(5 * peak.q_err if math.isfinite(peak.q_err) else 0.0, 0.3 * float(np.min(bin_q)))
    if not np.all(np.isfinite(qm)) or not math.isfinite(em) or (guard and moved > limit):
        return None
    return replace(peak, q=qm, q_err=float(em), q_cov=cm,
                   amplitude=float(am) if math.isfinite(am) else peak.amplitude, refined="lockin")


def _refine_peaks(level, valid, pixel, peaks, *, sigma_nm=None, other_q=None, iterations=2, guard=True):
    """Lock-in refinement of a list of peaks, grouped by lock-in width; returns new Peaks.

    With ``guard``, peaks too weak for the lock-in are left as they are, and a
    refinement that moves a peak by more than 5 times its interpolation
    uncertainty (or 0.3 bin) is discarded: it locked onto noise or a neighbour.
    """
    ny, nx = level.shape
    dy, dx = pixel
    sigmas, todo = _plan_refinement(peaks, pixel, level.shape, sigma_nm, other_q, guard)
    out = list(peaks)
    bin_q = 2 * np.pi / np.array([nx * dx, ny * dy])
    distance = _edge_distance(valid, pixel)
    for s in np.unique(sigmas[todo]):
        idx = np.nonzero((sigmas == s) & todo)[0]
        # All peaks of one sigma in one lock-in call (one forward FFT), a bounded output at a time.
        step, _ = _refine_step(level.shape, pixel, float(s), distance)
        group = max(1, int(16e6 // (-(-ny // step) * -(-nx // step))))
        for start in range(0, len(idx), group):
            sel = idx[start:start + group]
            q0 = np.array([peaks[m].q for m in sel])
            noise_var = np.array([_noise_var(peaks[m], level.shape) for m in sel])
            try:
                q, err, amp, cov, _ = _lockin_refine(level, valid, pixel, q0, float(s), iterations, distance,
                                                     noise_var)
            except InputError:
                if not guard:
                    raise
                continue  # sigma chosen here leaves no trusted region (a large mask): keep the peaks
            for m, qm, em, am, cm in zip(sel, q, err, amp, cov):
                new = _accepted(peaks[m], qm, em, am, cm, bin_q, guard)
                if new is not None:
                    out[m] = new
    return out


# --------------------------------------------------------------------------------------
# Large images: averaged periodogram of tiles (Welch) and a lazy, decimated refinement
# --------------------------------------------------------------------------------------

#: A dask array of up to this many pixels is read whole and transformed whole (as an ndarray).
WHOLE_FRAME_MAX_PIXELS = 4096 * 4096
#: Tile side (pixels) of the averaged periodogram of larger images.
WELCH_TILE_PX = 2048
#: Lock-in samples held at a time when refining the peaks of a large image (complex64: 128 MiB).
_LAZY_SAMPLES = 1 << 24
#: Side (pixels) of the blocks on which invalid pixels are mapped for the trusted region.
_BAD_BLOCK = 16


def _tile_size(image, tile_px):
    """Side of the Welch tiles, or None for one transform of the whole frame."""
    ny, nx = image.shape
    if tile_px is None:
        if not (_is_dask(image) and ny * nx > WHOLE_FRAME_MAX_PIXELS):
            return None
        tile_px = WELCH_TILE_PX
    if isinstance(tile_px, (bool, np.bool_)) or not isinstance(tile_px, (int, np.integer)) or tile_px < 16:
        raise InputError(f"tile_px must be a whole number of pixels, at least 16 (or None), got {tile_px!r}")
    if tile_px >= max(ny, nx):
        return None
    return int(tile_px)


def _tile_starts(n, tile):
    """First pixels of the tiles along an axis of n pixels: 50 % overlap, the last tile flush with the end."""
    if tile >= n:
        return np.array([0]), n
    starts = list(range(0, n - tile + 1, max(tile // 2, 1)))
    if starts[-1] + tile < n:
        starts.append(n - tile)
    return np.array(starts), tile


def _overlap_sum(starts, window):
    """Sum over all pairs of tiles along one axis of the squared correlation of their windowed noise.

    Two tiles d pixels apart share the noise of their overlap: the correlation of their
    transforms at one frequency is c(d) = sum_n w(n) w(n - d) / sum w^2 (1/6 for a Hann
    window at 50 %; Harris 1978), that of their periodograms c(d)^2 (derived).
    """
    n = len(window)
    w2 = float(np.sum(window**2))
    full = np.correlate(window, window, mode="full")  # lags -(n - 1) ... n - 1
    d = np.abs(starts[:, None] - starts[None, :])
    c = np.where(d < n, full[np.clip(n - 1 + d, 0, 2 * n - 2)] / w2, 0.0)
    return float(np.sum(c**2))


def _as_dask_mask(mask, chunks):
    import dask.array as da

    if _is_dask(mask):
        return mask.astype(bool).rechunk(chunks)
    return da.from_array(np.asarray(mask, dtype=bool), chunks=chunks)


def _tile_power(block, invalid, pixel, window):
    """Periodogram half-plane (float64) of one tile and 1, or zeros and 0 for a tile with almost no data.

    The recipe of :func:`power_spectrum` on the tile: its own least-squares plane removed,
    invalid pixels set to zero, windowed.
    """
    block = np.asarray(block, dtype=np.float64)
    ty, tx = block.shape
    valid = np.isfinite(block)
    if invalid is not None:
        valid &= ~np.asarray(invalid, dtype=bool)
    if valid.sum() < 16:
        return np.zeros((ty, tx // 2 + 1)), 0
    wy, wx = _windows((ty, tx), window)
    return _half_power(_subtract_plane(np.where(valid, block, 0.0), valid, pixel), wy, wx), 1


def _add_parts(a, b):
    return a[0] + b[0], a[1] + b[1]


def _block_any(invalid, block):
    """Whether each block x block cell (from pixel 0; the last ones may be partial) holds a True."""
    ny, nx = invalid.shape
    pad = ((0, -ny % block), (0, -nx % block))
    if _is_dask(invalid):
        import dask.array as da

        padded = da.pad(invalid, pad, mode="constant", constant_values=False)
        side = block * max(1, 2048 // block)
        return da.coarsen(np.any, padded.rechunk((side, side)), {0: block, 1: block})
    padded = np.pad(invalid, pad, constant_values=False)
    return padded.reshape(padded.shape[0] // block, block, padded.shape[1] // block, block).any(axis=(1, 3))


def _welch_spectrum(image, mask, pixel, tile, window, dtype):
    """Averaged periodogram of overlapping windowed tiles (Welch 1967), in one reading of the image.

    Returns the power plane of one tile (``fftshift`` layout), the tile shape, the
    equivalent number of independent periodograms averaged, the valid pixel counts per
    row and per column, and which ``_BAD_BLOCK``-pixel blocks hold an invalid pixel (None if
    none does). A dask array is read chunk by chunk (one task per tile, summed in a tree,
    with the counts in the same pass), an ndarray (e.g. a memory map) through views, so the
    whole image is never held at once.
    """
    ny, nx = image.shape
    rows, ty = _tile_starts(ny, tile)
    cols, tx = _tile_starts(nx, tile)
    starts = [(int(r0), int(c0)) for r0 in rows for c0 in cols]
    if _is_dask(image):
        import dask
        import dask.array as da

        invalid = ~da.isfinite(image)
        if mask is not None:
            invalid = invalid | _as_dask_mask(mask, image.chunks)
        parts = [dask.delayed(_tile_power)(image[r0:r0 + ty, c0:c0 + tx], invalid[r0:r0 + ty, c0:c0 + tx],
                                           pixel, window) for r0, c0 in starts]
        while len(parts) > 1:  # a tree of sums keeps a few tiles in memory at a time
            parts = [dask.delayed(_add_parts)(parts[i], parts[i + 1]) if i + 1 < len(parts) else parts[i]
                     for i in range(0, len(parts), 2)]
        valid = (~invalid).astype(np.int64)
        (total, used), wr, wc, bad = dask.compute(parts[0], valid.sum(axis=1), valid.sum(axis=0),
                                                  _block_any(invalid, _BAD_BLOCK))
    else:
        invalid = ~np.isfinite(image)
        if mask is not None:
            invalid |= np.asarray(mask, dtype=bool)
        total, used = 0.0, 0
        for r0, c0 in starts:
            part = _tile_power(image[r0:r0 + ty, c0:c0 + tx], invalid[r0:r0 + ty, c0:c0 + tx], pixel, window)
            total, used = _add_parts((total, used), part)
        wr, wc = (~invalid).sum(axis=1), (~invalid).sum(axis=0)
        bad = _block_any(invalid, _BAD_BLOCK)
    if used == 0:
        raise InputError(f"no tile of {ty} x {tx} pixels holds 16 valid (finite, unmasked) pixels")
    wy, wx = _windows((ty, tx), window)
    # Variance of the average over that of one periodogram: the sum of the pair correlations over
    # K^2, separable in rows and columns (derived); its inverse is the equivalent count.
    dof = len(starts) ** 2 / (_overlap_sum(rows, wy) * _overlap_sum(cols, wx))
    bad = np.asarray(bad)
    return (_full_plane(total / used, (ty, tx), dtype), (ty, tx), float(dof),
            (np.asarray(wr), np.asarray(wc)), bad if bad.any() else None)


def _refine_tiled(image, mask, pixel, peaks, counts, bad, tile_shape, *, sigma_nm=None, iterations=3):
    """Lock-in refinement of peaks found on tiles, over the whole full-resolution frame, lazily.

    All peaks share one lock-in width (the largest any of them needs, at most 1/12 of a
    tile), so the frame is read once: the chunked lock-in (``domains._lockin.lockin`` on a
    dask array, invalid pixels NaN) with a decimated output, computed for a bounded number
    of samples at a time; the fit is that of :func:`_lockin_refine`. No plane is removed:
    the lock-in's width keeps q = 0 below 0.1 % leakage (:func:`_auto_sigma_px`). The
    trusted region keeps 2.5 sigma from the frame edge and from invalid pixels (mapped on
    blocks of ``_BAD_BLOCK`` pixels, so a little more).
    """
    import dask.array as da

    ny, nx = image.shape
    dy, dx = pixel
    sigmas, todo = _plan_refinement(peaks, pixel, tile_shape, sigma_nm, None, True)
    out = list(peaks)
    if not todo.any():
        return out
    s = float(sigmas[todo].max())
    lazy = image if _is_dask(image) else da.from_array(image, chunks=(min(ny, 4096), min(nx, 4096)))
    lazy = lazy.astype(np.float32)
    if mask is not None:
        lazy = da.where(_as_dask_mask(mask, lazy.chunks), np.float32(np.nan), lazy)
    step = max(1, int(1.5 * s / max(pixel)))
    cells = -(-ny // step) * -(-nx // step)
    if cells > _LAZY_SAMPLES:
        step = int(math.ceil(step * math.sqrt(cells / _LAZY_SAMPLES)))
    trusted = _coarse_trusted((ny, nx), pixel, step, s, None)
    if bad is not None:
        reach = int(math.ceil(2.5 * s / (_BAD_BLOCK * min(dy, dx)))) + 1
        yy, xx = np.mgrid[-reach:reach + 1, -reach:reach + 1]
        near = ndimage.binary_dilation(bad, structure=yy**2 + xx**2 <= (reach + 0.5) ** 2)
        r_idx = (np.arange(trusted.shape[0]) * step) // _BAD_BLOCK
        c_idx = (np.arange(trusted.shape[1]) * step) // _BAD_BLOCK
        trusted &= ~near[r_idx][:, c_idx]
    if trusted.sum() < 16:
        return out
    spread = _spread_nm2(counts[0], counts[1], pixel)
    bin_q = 2 * np.pi / np.array([tile_shape[1] * dx, tile_shape[0] * dy])
    idx = np.nonzero(todo)[0]
    group = max(1, _LAZY_SAMPLES // trusted.size)
    for start in range(0, len(idx), group):
        sel = idx[start:start + group]
        q0 = np.array([peaks[m].q for m in sel])
        a = np.asarray(lockin(lazy, q0, sigma_nm=s, pixel_size_nm=pixel, step=step).compute())
        noise_var = np.array([_noise_var(peaks[m], tile_shape) for m in sel])
        q, err, amp, cov, _ = _fit_field(a, trusted, q0, step, pixel, s, iterations, noise_var, spread)
        for m, qm, em, am, cm in zip(sel, q, err, amp, cov):
            new = _accepted(peaks[m], qm, em, am, cm, bin_q, True)
            if new is not None:
                out[m] = new
    return out


# --------------------------------------------------------------------------------------
# Lattice indexing
# --------------------------------------------------------------------------------------


def _canonical(q, q_err=0.0):
    """The member of +q/-q in the half-plane qy > 0 (or qy = 0, qx > 0); |qy| <= 3 q_err counts as 0."""
    q = np.asarray(q, dtype=float)
    q_err = float(q_err) if q_err is not None and math.isfinite(q_err) else 0.0
    tiny = max(1e-9 * float(np.hypot(*q)), 3 * q_err, 1e-300)
    if q[1] < -tiny or (abs(q[1]) <= tiny and q[0] < 0):
        return -q
    return q


def _ideal_basis(kind, a_nm, angle_deg, a2_nm, gamma_deg, bragg=False):
    """Reciprocal basis b (rows) of an ideal lattice with a1 at angle_deg (conventions of domains._lattice)."""
    if kind == "oblique":
        real = real_basis(kind, a_nm, angle_deg, b_nm=a2_nm, gamma_deg=gamma_deg)
    else:
        real = real_basis(kind, a_nm, angle_deg)
    b = reciprocal_basis(real)
    return bragg_from_reciprocal(kind, b) if bragg else b


def _peak_arrays(peaks):
    if isinstance(peaks, SpectrumResult):
        peaks = peaks.peaks
    if isinstance(peaks, np.ndarray) or (len(peaks) and not isinstance(peaks[0], Peak)):
        arr = np.atleast_2d(np.asarray(peaks, dtype=float))
        if arr.ndim != 2 or arr.shape[1] != 2:
            raise InputError(f"peaks must be a list of Peak or a (k, 2) array of wavevectors, got shape {arr.shape}")
        peaks = [Peak(q=_canonical(qq), q_err=0.0, power=1.0, snr=np.inf, refined="manual") for qq in arr]
    peaks = list(peaks)
    for p in peaks:
        if not isinstance(p, Peak):
            raise InputError(f"peaks must be Peak objects or a (k, 2) array, got {type(p).__name__}")
    return peaks


def _angle_diff_deg(a, b, period):
    d = (a - b) % period
    return min(d, period - d)


def _candidate_sets(q, power, rel_tol, angle_tol_deg):
    """Hexagonal triplets (three canonical peaks at 60 deg) and square pairs (two at 90 deg) of equal |q|."""
    n = len(q)
    qabs = np.hypot(q[:, 0], q[:, 1])
    ang = np.degrees(np.arctan2(q[:, 1], q[:, 0])) % 180
    sets = {}
    for i in range(n):
        for j in range(i + 1, n):
            if abs(qabs[i] - qabs[j]) > rel_tol * 0.5 * (qabs[i] + qabs[j]):
                continue
            d = _angle_diff_deg(ang[i], ang[j], 180.0)
            if abs(d - 60) <= angle_tol_deg:
                for third in (q[i] - q[j], q[i] + q[j]):
                    if abs(np.hypot(*third) - qabs[i]) > 2 * rel_tol * qabs[i]:
                        continue
                    t = _canonical(third)
                    dist = np.hypot(*(q - t).T)
                    m = int(np.argmin(dist))
                    if m in (i, j) or dist[m] > 2 * rel_tol * qabs[i]:
                        continue
                    idx = tuple(sorted((i, j, m)))
                    if abs(qabs[m] - qabs[i]) > rel_tol * qabs[i]:
                        continue
                    g = qabs[list(idx)]
                    resid = float(np.std(g) / g.mean() + dist[m] / g.mean())
                    sets[("hexagonal", idx)] = dict(kind="hexagonal", idx=idx, g=float(g.mean()),
                                                    power=float(np.mean(power[list(idx)])), resid=resid)
            elif abs(d - 90) <= angle_tol_deg:
                idx = (i, j)
                g = qabs[list(idx)]
                sets[("square", idx)] = dict(kind="square", idx=idx, g=float(g.mean()),
                                             power=float(np.mean(power[list(idx)])),
                                             resid=float(np.std(g) / g.mean() + abs(d - 90) / 90))
    return list(sets.values())


def _set_basis(q, cand):
    idx = cand["idx"]
    return np.array([q[idx[0]], q[idx[1]]])


def _is_harmonic(large, small, q, power, rel_tol):
    """Whether candidate set ``large`` is made of harmonics of ``small``.

    It is if every vector of ``large`` is an integer combination of the basis of
    ``small``, every lattice point of ``small`` shorter than ``large`` is itself
    a detected peak (a lattice's Fourier amplitudes fall off with |q|, so its
    harmonics come with all the lower orders), and ``large`` is weaker.
    """
    if large["power"] >= small["power"]:
        return False
    basis = _set_basis(q, small)
    inv = np.linalg.inv(basis)
    for m in large["idx"]:
        f = q[m] @ inv
        if np.any(np.abs(f - np.round(f)) > 0.05 + rel_tol * np.abs(f)):
            return False
    nmax = int(math.ceil(large["g"] / small["g"])) + 1
    for h in range(-nmax, nmax + 1):
        for k in range(-nmax, nmax + 1):
            if h == 0 and k == 0:
                continue
            p = h * basis[0] + k * basis[1]
            pa = np.hypot(*p)
            if pa >= large["g"] * (1 - rel_tol) or pa < small["g"] * (1 - rel_tol):
                continue
            t = _canonical(p)
            if np.min(np.hypot(*(q - t).T)) > 2 * rel_tol * pa:
                return False
    return True


def _is_mixed_harmonic(large, s1, s2, q, rel_tol):
    """Whether every vector of ``large`` is u + w, u and w low-order (|h|, |k| <= 2) points of two other sets.

    Two lattices in one image (the layers of a moire) make such combination peaks
    through any nonlinearity of the measurement; they are not a third lattice.
    """
    if large["power"] >= min(s1["power"], s2["power"]):
        return False
    pts = []
    for cand in (s1, s2):
        basis = _set_basis(q, cand)
        pts.append(np.array([h * basis[0] + k * basis[1] for h in range(-2, 3) for k in range(-2, 3)]))
    sums = (pts[0][:, None, :] + pts[1][None, :, :]).reshape(-1, 2)
    for m in large["idx"]:
        d = np.min(np.hypot(*(sums - q[m]).T))
        d2 = np.min(np.hypot(*(sums + q[m]).T))
        if min(d, d2) > rel_tol * large["g"] * 0.5:
            return False
    return True


def _fit_lattice(kind, q_meas, err):
    """Fit the lattice to its measured canonical Bragg peaks."""
    qabs = np.hypot(q_meas[:, 0], q_meas[:, 1])
    ang = np.arctan2(q_meas[:, 1], q_meas[:, 0])
    n = len(q_meas)
    err = np.where(np.isfinite(err) & (err > 0), err, np.nan)
    if np.all(np.isnan(err)):
        err = np.full(n, 1e-12 * qabs.mean())
    err = np.where(np.isnan(err), np.nanmax(err), err)
    w = 1 / err**2
    g = float(np.sum(w * qabs) / w.sum())
    g_stat = float(1 / math.sqrt(w.sum()))
    g_scatter = float(np.std(qabs, ddof=1) / math.sqrt(n)) if n > 1 else 0.0
    g_err = max(g_stat, g_scatter)
    fold = 6 if kind == "hexagonal" else 4
    w_ang = w * qabs**2  # angular error of a peak is err / |q|
    mean_b = float(np.angle(np.sum(w_ang * np.exp(1j * fold * ang))) / fold)
    dev = (ang - mean_b + np.pi / fold) % (2 * np.pi / fold) - np.pi / fold
    ang_stat = float(1 / math.sqrt(w_ang.sum()))
    ang_scatter = float(np.std(dev, ddof=1) / math.sqrt(n)) if n > 1 else 0.0
    ang_err = max(ang_stat, ang_scatter)
    # Orientation in a range symmetric about 0, so that an aligned lattice reads ~0, not ~60 or ~90.
    if kind == "hexagonal":
        a_nm = 4 * math.pi / (math.sqrt(3) * g)
        angle = (math.degrees(mean_b) + 30.0 + 30.0) % 60.0 - 30.0  # b1 is 30 deg from a1
    else:
        a_nm = 2 * math.pi / g
        angle = (math.degrees(mean_b) + 45.0) % 90.0 - 45.0
    a_err = a_nm * g_err / g
    ideal = _ideal_basis(kind, a_nm, angle, a_nm, 60.0 if kind == "hexagonal" else 90.0, bragg=True)
    # Match each ideal Bragg vector to a measured peak, with its sign.
    matched = np.zeros_like(ideal)
    for jj, gj in enumerate(ideal):
        cosines = (q_meas @ gj) / (qabs * np.hypot(*gj))
        m = int(np.argmax(np.abs(cosines)))
        matched[jj] = np.sign(cosines[m]) * q_meas[m]
    # Basis fitted to the measured peaks (follows a linear distortion): least squares
    # on G1 = b1, G2 = b2, G3 = -(b1 + b2) (hexagonal) or G_j = b_j (square).
    coef = np.array([[1, 0], [0, 1], [-1, -1]], dtype=float) if kind == "hexagonal" else np.eye(2)
    b = np.linalg.lstsq(coef, matched, rcond=None)[0]
    bragg = bragg_from_reciprocal(kind, b)
    return Lattice(kind, b, bragg, a_nm, a_err, angle, math.degrees(ang_err), a_nm,
                   60.0 if kind == "hexagonal" else 90.0, matched)


def _oblique(q, power, err, closure_tol):
    """Two strongest non-collinear peaks whose sum or difference is also a peak."""
    order = np.argsort(power)[::-1]
    for ii, i in enumerate(order):
        for j in order[ii + 1:]:
            cross = abs(q[i, 0] * q[j, 1] - q[i, 1] * q[j, 0]) / (np.hypot(*q[i]) * np.hypot(*q[j]))
            if cross < math.sin(math.radians(10)):
                continue
            for comb in (q[i] + q[j], q[i] - q[j]):
                t = _canonical(comb)
                if np.min(np.hypot(*(q - t).T)) <= closure_tol * np.hypot(*t):
                    b = _gauss_reduce(np.array([q[i], q[j]]))
                    if b[0, 0] * b[1, 1] - b[0, 1] * b[1, 0] < 0:
                        b[1] = -b[1]
                    a = 2 * math.pi * np.linalg.inv(b).T
                    a1, a2 = np.hypot(*a[0]), np.hypot(*a[1])
                    gamma = math.degrees(math.acos(np.clip(a[0] @ a[1] / (a1 * a2), -1, 1)))
                    e = float(np.nanmax([err[i], err[j], 0.0]))
                    return Lattice("oblique", b, b.copy(), float(a1), float(a1 * e / np.hypot(*b[0])),
                                   math.degrees(math.atan2(a[0, 1], a[0, 0])) % 180.0,
                                   math.degrees(e / np.hypot(*b[0])), float(a2), gamma, b.copy())
    return None


def _gauss_reduce(b):
    b = np.array(b, dtype=float)
    for _ in range(100):
        if b[1] @ b[1] < b[0] @ b[0]:
            b = b[::-1].copy()
        mu = round(float(b[0] @ b[1] / (b[0] @ b[0])))
        if mu == 0:
            break
        b[1] = b[1] - mu * b[0]
    if b[1] @ b[1] < b[0] @ b[0]:
        b = b[::-1].copy()
    return b


def index_lattice(peaks, *, kind=None, rel_tol=0.03, angle_tol_deg=3.0, max_a_nm=1.2,
                  min_power_fraction=0.02):
    """Which peaks are the Bragg peaks, and what lattice they make.

    Candidate lattices are the sets of peaks of equal |q| (within ``rel_tol``):
    three canonical peaks at 60 degrees (six peaks in all: hexagonal) or two at
    90 degrees (square). A set made of harmonics of a shorter set (integer
    combinations of it, with all lower orders present and weaker) is dropped;
    so is one whose lattice constant exceeds ``max_a_nm`` (a superstructure or
    moire, not an atomic lattice) or whose power is below
    ``min_power_fraction`` of the strongest set. The Bragg set is the remaining
    set at the largest |q| (the strongest of sets of equal |q|). Without one, an
    oblique lattice is accepted from two strong non-collinear peaks whose sum
    or difference is also a peak.

    Parameters
    ----------
    peaks : list of Peak, SpectrumResult, or (k, 2) array_like
        Detected (ideally refined) peaks.
    kind : {"hexagonal", "square", "oblique"}, optional
        Restrict the search to this kind.
    rel_tol : float
        Relative tolerance on equal lengths (allows for drift distortion).
    angle_tol_deg : float
        Tolerance on the 60 or 90 degree angles.
    max_a_nm : float
        Largest lattice constant taken for an atomic lattice, nm.
    min_power_fraction : float
        Weakest candidate set kept, relative to the strongest.

    Returns
    -------
    Lattice or None
        None when no lattice is found (for example when atoms are not resolved).

    Raises
    ------
    InputError
        For an unknown ``kind`` or malformed peaks.

    Notes
    -----
    A hexagonal lattice of constant a has |G| = 4 pi / (sqrt(3) a); a square one
    |G| = 2 pi / a. When a superlattice is stronger than the Bragg peaks and
    the Bragg peaks are its (1, 1)-type combinations (sqrt3 x sqrt3 R30), the
    superlattice is taken as the lattice; pass ``lattice=`` to
    :func:`analyze_spectrum` in that case.

    Examples
    --------
    >>> lat = Lattice.from_params("hexagonal", 0.3, 12.0)
    >>> found = index_lattice(np.concatenate([lat.bragg, lat.bragg / 3]))
    >>> found.kind, round(found.a_nm, 6), round(found.angle_deg, 6)
    ('hexagonal', 0.3, 12.0)
    """
    if kind not in (None, "hexagonal", "square", "oblique"):
        raise InputError(f"kind must be 'hexagonal', 'square', 'oblique' or None, got {kind!r}")
    peaks = _peak_arrays(peaks)
    if len(peaks) < 2:
        return None
    q = np.array([_canonical(p.q, p.q_err) for p in peaks])
    power = np.array([p.power if math.isfinite(p.power) else 1.0 for p in peaks])
    err = np.array([p.q_err for p in peaks])
    qabs = np.hypot(q[:, 0], q[:, 1])
    if kind != "oblique":
        cands = _candidate_sets(q, power, rel_tol, angle_tol_deg)
        if kind is not None:
            cands = [c for c in cands if c["kind"] == kind]
        for c in cands:
            a = 4 * math.pi / (math.sqrt(3) * c["g"]) if c["kind"] == "hexagonal" else 2 * math.pi / c["g"]
            c["a"] = a
        cands = [c for c in cands if c["a"] <= max_a_nm]
        if cands:
            strongest = max(c["power"] for c in cands)
            cands = [c for c in cands if c["power"] >= min_power_fraction * strongest]
            cands.sort(key=lambda c: c["g"])
            harmonic = [False] * len(cands)
            for li, large in enumerate(cands):
                smaller = [si for si, small in enumerate(cands[:li])
                           if not harmonic[si] and small["g"] < large["g"] * (1 - rel_tol)]
                if any(_is_harmonic(large, cands[si], q, power, rel_tol) for si in smaller):
                    harmonic[li] = True
                    continue
                for n1, s1 in enumerate(smaller):
                    if any(_is_mixed_harmonic(large, cands[s1], cands[s2], q, rel_tol) for s2 in smaller[n1 + 1:]):
                        harmonic[li] = True
                        break
            keep = [c for c, h in zip(cands, harmonic) if not h]
            if keep:
                gmax = max(c["g"] for c in keep)
                top = [c for c in keep if c["g"] >= gmax * (1 - rel_tol)]
                best_power = max(c["power"] for c in top)
                # Among near-equal candidates (two layers, mixed triplets), the most regular.
                close = [c for c in top if c["power"] >= 0.5 * best_power]
                best = min(close, key=lambda c: c["resid"])
                idx = list(best["idx"])
                return _fit_lattice(best["kind"], q[idx], err[idx])
        if kind is not None:
            return None
    big = qabs >= 2 * math.pi / max_a_nm
    if big.sum() < 2:
        return None
    sel = np.nonzero(big)[0]
    return _oblique(q[sel], power[sel], err[sel], 2 * rel_tol)


# --------------------------------------------------------------------------------------
# Peak roles and superlattice
# --------------------------------------------------------------------------------------


def _rational(f, f_err_q, basis, max_den, n_sigma, frac_tol):
    """Smallest common denominator n <= max_den whose grid point fits q within tolerance."""
    gq = float(np.mean(np.hypot(basis[:, 0], basis[:, 1])))
    tol = max(n_sigma * f_err_q, frac_tol * gq)
    for n in range(1, max_den + 1):
        fr = np.round(f * n) / n
        if np.all(fr == 0):
            continue
        dist = float(np.hypot(*((f - fr) @ basis)))
        if dist <= tol:
            return (Fraction(int(round(fr[0] * n)), n), Fraction(int(round(fr[1] * n)), n)), n
    return None, None


def index_peaks(peaks, lattice, *, max_denominator=6, n_sigma=3.0, frac_tol=0.003, moire_max_fraction=0.25):
    """Give every peak its fractional coordinates in the Bragg basis and a role.

    q = h b1 + k b2 with b = ``lattice.b``. The tests, in this order, strongest
    peak first:

    1. "bragg": one of the lattice's Bragg peaks (or its mirror);
    2. (h, k) rational with a common denominator n <= ``max_denominator``
       within the tolerance: "harmonic" if n = 1, else "superlattice";
    3. "moire": |q| below ``moire_max_fraction`` of |G|;
    4. "harmonic": an integer combination of a stronger incommensurate or
       second-lattice peak with lattice vectors (i q_p + G with |i| <= 3, or
       q_p1 +/- q_p2 + G, unless all three have the same |q|: the third
       member of a triple-q set is not a harmonic);
    5. "second_lattice": near a Bragg peak (|q| within 15 %, angle within
       15 degrees): the other layer of a moire;
    6. "incommensurate": none of the above.

    The tolerance on the distance from a rational point is
    max(n_sigma * uncertainty, frac_tol * |b|), with the uncertainty the
    peak's ``q_err`` combined with the Bragg vectors' error scaled by |(h, k)|.
    Fractional coordinates are unchanged by a linear distortion of the image
    (drift, creep), since ``lattice.b`` is fitted to the measured peaks.

    Notes
    -----
    For a hexagonal lattice b2 is at 120 degrees from b1 (the real vectors at
    60 degrees), so the n x n points are (i/n, j/n), and the sqrt3 x sqrt3 R30
    points (the Brillouin-zone corners) are (2/3, 1/3), (1/3, 2/3) and
    (-1/3, 1/3) (they read (1/3, 1/3) in a reciprocal basis at 60 degrees).

    Parameters
    ----------
    peaks : list of Peak or SpectrumResult
        The peaks (not modified).
    lattice : Lattice or None
        The lattice; with None every peak gets role "unindexed".
    max_denominator : int
        Largest denominator of a commensurate fraction.
    n_sigma : float
        Tolerance in units of the uncertainty.
    frac_tol : float
        Smallest tolerance, as a fraction of |b|.
    moire_max_fraction : float
        Largest |q| / |G| of a moire candidate.

    Returns
    -------
    list of Peak
        Copies of the peaks with ``hk``, ``fraction`` and ``role`` set.

    Examples
    --------
    >>> lat = Lattice.from_params("hexagonal", 0.35, 0.0)
    >>> qs = np.concatenate([lat.bragg, lat.bragg / 3, [lat.bragg[0] * 0.3]])
    >>> [p.role for p in index_peaks([Peak(q, 1e-4) for q in qs], lat)]
    ['bragg', 'bragg', 'bragg', 'superlattice', 'superlattice', 'superlattice', 'incommensurate']
    """
    peaks = [replace(p, q=_canonical(p.q, p.q_err)) for p in _peak_arrays(peaks)]
    if lattice is None:
        return [replace(p, role="unindexed", hk=None, fraction=None) for p in peaks]
    if not isinstance(lattice, Lattice):
        raise InputError(f"lattice must be a Lattice or None, got {type(lattice).__name__}")
    max_denominator = int(max_denominator)
    if max_denominator < 1:
        raise InputError(f"max_denominator must be at least 1, got {max_denominator}")
    b = np.asarray(lattice.b, dtype=float)
    inv = np.linalg.inv(b)
    gmin = float(np.min(np.hypot(b[:, 0], b[:, 1])))
    bragg = np.asarray(lattice.bragg)
    bragg_err = lattice.a_err_nm / lattice.a_nm * gmin if lattice.a_nm > 0 else 0.0
    order = np.argsort([-(p.power if math.isfinite(p.power) else 0.0) for p in peaks], kind="stable")
    primaries = []  # fractional coordinates of incommensurate / moire / second-lattice peaks
    out = [None] * len(peaks)
    for m in order:
        p = peaks[m]
        f = p.q @ inv
        err = math.hypot(p.q_err if math.isfinite(p.q_err) else 0.0, bragg_err * float(np.hypot(*f)))
        tol = max(n_sigma * err, frac_tol * gmin)
        hk = (float(f[0]), float(f[1]))
        dist_bragg = min(float(np.min(np.hypot(*(bragg - p.q).T))), float(np.min(np.hypot(*(bragg + p.q).T))))
        if dist_bragg <= tol:
            out[m] = replace(p, role="bragg", hk=hk, fraction=tuple(Fraction(int(round(v))) for v in f))
            continue
        frac, n = _rational(f, err, b, max_denominator, n_sigma, frac_tol)
        if frac is not None:
            out[m] = replace(p, role="harmonic" if n == 1 else "superlattice", hk=hk, fraction=frac)
            continue
        qa = p.q_abs_rad_per_nm
        if qa < moire_max_fraction * gmin:
            # Low |q| and off the rational grid: a moire period (or one of its harmonics).
            out[m] = replace(p, role="moire", hk=hk, fraction=None)
            continue
        role = None
        for fp in primaries:
            combos = [i * fp for i in (1, -1, 2, -2, 3, -3)]
            # Sums of two primaries, except where all three have the same |q|: then the
            # peak is a symmetry partner (Q3 = -Q1 - Q2 of a triple-q order), not a harmonic.
            for fq in primaries:
                if fq is fp:
                    continue
                la, lb = (float(np.hypot(*(v @ b))) for v in (fp, fq))
                if abs(qa - la) <= 0.05 * la and abs(qa - lb) <= 0.05 * lb:
                    continue
                combos += [fp + fq, fp - fq]
            for cmb in combos:
                d = f - cmb
                if float(np.hypot(*((d - np.round(d)) @ b))) <= tol and np.any(np.abs(cmb) > 1e-9):
                    role = "harmonic"
                    break
            if role:
                break
        if role is None:
            near_bragg = any(
                abs(qa - np.hypot(*g)) <= 0.15 * np.hypot(*g)
                and _angle_diff_deg(p.angle_deg, math.degrees(math.atan2(g[1], g[0])), 180.0) <= 15
                for g in bragg
            )
            role = "second_lattice" if near_bragg else "incommensurate"
            primaries.append(f)
        out[m] = replace(p, role=role, hk=hk, fraction=None)
    return out


def _hnf2(vectors):
    """Upper-triangular integer basis [[g, x], [0, h]] of the lattice spanned by integer row vectors."""
    rows = [list(map(int, v)) for v in vectors if any(int(t) != 0 for t in v)]
    # First column: combine rows to a single gcd.
    g, x = 0, 0
    rest = []
    for r in rows:
        if r[0] == 0:
            rest.append(r[1])
            continue
        if g == 0:
            g, x = r
            continue
        # extended gcd on (g, r0)
        a0, a1 = g, r[0]
        s0, s1, t0, t1 = 1, 0, 0, 1
        while a1 != 0:
            qq = a0 // a1
            a0, a1 = a1, a0 - qq * a1
            s0, s1 = s1, s0 - qq * s1
            t0, t1 = t1, t0 - qq * t1
        # new first row = s0*(g, x) + t0*r; eliminated row = (r0/a0)*(g,x) - (g/a0)*r
        new = (s0 * g + t0 * r[0], s0 * x + t0 * r[1])
        elim = (r[0] // a0) * x - (g // a0) * r[1]
        rest.append(elim)
        g, x = new
    h = 0
    for v in rest:
        h = math.gcd(h, abs(int(v)))
    if g < 0:
        g, x = -g, -x
    if h:
        x %= h
    return np.array([[g, x], [0, h]], dtype=np.int64)


def _supercell(fracs, kind, lattice):
    """Supercell of the reciprocal lattice spanned by Z^2 and the rational peaks: (M, order string)."""
    den = 1
    for fr in fracs:
        for c in fr:
            den = den * c.denominator // math.gcd(den, c.denominator)
    vecs = [(den, 0), (0, den)] + [(int(fr[0] * den), int(fr[1] * den)) for fr in fracs]
    hmat = _hnf2(vecs)
    if hmat[1, 1] == 0 or hmat[0, 0] == 0:
        return None, None
    m = np.rint(den * np.linalg.inv(hmat.astype(float))).astype(np.int64).T
    n_sites = int(round(abs(np.linalg.det(m))))
    # Classify on the ideal lattice (same basis order as the fitted one), so that the
    # lengths and angles compared below are exact up to rounding.
    if kind in ("hexagonal", "square"):
        a = Lattice.from_params(kind, lattice.a_nm, lattice.angle_deg).real_basis_nm
    else:
        a = lattice.real_basis_nm
    cells = _gauss_reduce(m.astype(float) @ a)
    la, lb = np.hypot(*cells[0]), np.hypot(*cells[1])
    a0 = lattice.a_nm
    cosg = abs(cells[0] @ cells[1]) / (la * lb)
    fold = 60.0 if kind == "hexagonal" else 90.0
    target_cos = 0.5 if kind == "hexagonal" else 0.0
    rot = (math.degrees(math.atan2(cells[0, 1], cells[0, 0])) - lattice.angle_deg) % fold
    rot = min(rot, fold - rot)
    if kind in ("hexagonal", "square") and abs(la - lb) < 1e-6 * la and abs(cosg - target_cos) < 1e-6:
        s = la / a0
        if abs(s - round(s)) < 1e-6 and rot < 1e-6:
            return m, f"{int(round(s))}x{int(round(s))}"
        return m, f"sqrt{n_sites}xsqrt{n_sites}R{_fmt_deg(rot)}"
    # n x m: the supercell spanned by n u and m v for two primitive lattice vectors u, v.
    if kind in ("hexagonal", "square"):
        prim = [a[0], a[1]] + ([a[1] - a[0]] if kind == "hexagonal" else [])
        target = m.astype(float) @ a
        for n1 in range(1, 13):
            for n2 in range(1, n1 + 1):
                if n1 * n2 != n_sites:
                    continue
                for u in prim:
                    for v in prim:
                        cand = np.array([n1 * u, n2 * v])
                        if abs(np.linalg.det(cand)) < 1e-12 * a0**2:
                            continue
                        if _same_lattice(cand, target):
                            return m, f"{n1}x{n2}"
    return m, f"supercell {m.tolist()}"


def _same_lattice(p, q):
    """Whether the rows of p and of q span the same 2-D lattice."""
    coords = p @ np.linalg.inv(q)
    back = q @ np.linalg.inv(p)
    return bool(np.allclose(coords, np.round(coords), atol=1e-6) and np.allclose(back, np.round(back), atol=1e-6))


def _fmt_deg(x):
    return f"{x:.0f}" if abs(x - round(x)) < 0.05 else f"{x:.1f}"


def _fix_signs(q):
    """For three vectors, signs that make them sum to zero if possible (triple-q convention)."""
    if len(q) != 3:
        return q
    best, best_s = None, None
    for s1 in (1, -1):
        for s2 in (1, -1):
            tot = np.hypot(*(q[0] + s1 * q[1] + s2 * q[2]))
            if best is None or tot < best:
                best, best_s = tot, (s1, s2)
    if best < 1e-6 * np.hypot(*q[0]):
        return np.array([q[0], best_s[0] * q[1], best_s[1] * q[2]])
    return q


def _directions(vectors, errs, coefs):
    """The shortest vector along each distinct direction (up to sign), ordered by angle."""
    chosen = []
    for v, e, c in sorted(zip(vectors, errs, coefs), key=lambda t: np.hypot(*t[0])):
        ang = math.degrees(math.atan2(v[1], v[0])) % 180
        if any(_angle_diff_deg(ang, math.degrees(math.atan2(w[1], w[0])) % 180, 180) < 2.0 for w, _, _ in chosen):
            continue
        chosen.append((v, e, c))
    chosen.sort(key=lambda t: math.degrees(math.atan2(t[0][1], t[0][0])) % 180)
    return chosen


def _ideal_q_err(q, lattice):
    """One-sigma error per component of wavevectors fixed to the lattice (commensurate q = f b).

    They inherit the lattice's errors: radially |q| a_err / a (a scale), tangentially
    |q| angle_err (a rotation), per component the root mean square of the two (derived).
    """
    q = np.asarray(q, dtype=float).reshape(-1, 2)
    qa = np.hypot(q[:, 0], q[:, 1])
    rel = lattice.a_err_nm / lattice.a_nm if lattice.a_nm > 0 else 0.0
    rot = math.radians(lattice.angle_err_deg)
    return qa * math.sqrt(0.5 * (rel**2 + rot**2))


def _summarize_superlattice(peaks, lattice):
    if lattice is None:
        return None
    b = np.asarray(lattice.b)
    sup = [p for p in peaks if p.role == "superlattice"]
    inc = [p for p in peaks if p.role == "incommensurate"]
    if sup:
        fracs = [p.fraction for p in sup]
        m, order = _supercell(fracs, lattice.kind, lattice)
        n_sites = None if m is None else int(round(abs(np.linalg.det(m))))
        mt = re.fullmatch(r"(\d+)x\1", order or "")
        note = ""
        if mt and lattice.kind in ("hexagonal", "square"):
            n = int(mt.group(1))
            q = np.asarray(lattice.bragg) / n
            coefs = [tuple(Fraction(int(round(v)), n) for v in (g @ np.linalg.inv(b))) for g in lattice.bragg]
            note = ("peaks along every Bragg direction: multiple-q order, or single-q stripes "
                    "in domains of every orientation (the spectrum alone cannot tell)")
        else:
            vecs = [np.array([float(fr[0]), float(fr[1])]) @ b for fr in fracs]
            chosen = _directions(vecs, [0.0] * len(vecs), fracs)
            q = _fix_signs(np.array([c[0] for c in chosen]))
            coefs = []
            for v in q:
                f = v @ np.linalg.inv(b)
                coefs.append(tuple(Fraction(v_).limit_denominator(64) for v_ in f))
        return Superlattice(order, True, np.asarray(q), _ideal_q_err(q, lattice), coefs, m, n_sites, None, note)
    if inc:
        vecs = [p.q for p in inc]
        chosen = _directions(vecs, [p.q_err for p in inc], [p.hk for p in inc])
        q = np.array([c[0] for c in chosen])
        q_err = np.array([c[1] for c in chosen])
        coefs = [c[2] for c in chosen]
        delta = []
        for v in q:
            f = v @ np.linalg.inv(b)
            best = None
            for n in range(1, 7):
                fr = np.round(f * n) / n
                if np.all(fr == 0):
                    continue
                vc = fr @ b
                d = np.hypot(*(v - vc))
                if best is None or d < best[0] - 1e-12:
                    best = (d, vc)
            vc = best[1]
            delta.append(1 - (v @ vc) / (vc @ vc))
        return Superlattice("incommensurate", False, q, q_err, coefs, None, None, np.array(delta),
                            "delta = 1 - (q . q_c) / |q_c|^2 for the nearest fraction q_c of the Bragg basis "
                            "(denominator <= 6)")
    return None


def _superlattice_override(order, lattice):
    if lattice is None:
        raise InputError(f"superlattice={order!r} needs a lattice (none was found; pass lattice=)")
    if not isinstance(order, str):
        raise InputError(f"superlattice must be a string such as '3x3' or 'sqrt3xsqrt3R30', got {order!r}")
    b = np.asarray(lattice.b)
    s = order.replace(" ", "").replace("×", "x").replace("√", "sqrt").lower()
    mt = re.fullmatch(r"(\d+)x(\d+)", s)
    kind = lattice.kind
    if mt:
        n1, n2 = int(mt.group(1)), int(mt.group(2))
        if n1 < 1 or n2 < 1:
            raise InputError(f"superlattice {order!r}: both factors must be at least 1")
        if n1 == n2:
            q = np.asarray(lattice.bragg) / n1
        elif n2 == 1:
            q = b[:1] / n1
        elif n1 == 1:
            q = b[:1] / n2
        else:
            q = np.array([b[0] / n1, b[1] / n2])
        name = f"{n1}x{n2}"
    else:
        mt = re.fullmatch(r"sqrt(\d+)xsqrt(\d+)r-?([\d.]+)", s)
        if not mt or mt.group(1) != mt.group(2):
            raise InputError(
                f"superlattice must look like '3x3', '4x1' or 'sqrt3xsqrt3R30', got {order!r}"
            )
        n = int(mt.group(1))
        angle = float(mt.group(3))
        if kind == "hexagonal" and n == 3:
            # The K points (2 b1 + b2) / 3 and its images at 120 degrees; they sum to zero.
            q = np.array([(2 * b[0] + b[1]) / 3, (b[1] - b[0]) / 3, -(b[0] + 2 * b[1]) / 3])
        elif kind == "square" and n == 2:
            q = np.array([(b[0] + b[1]) / 2, (b[0] - b[1]) / 2])
        elif kind == "hexagonal":
            # sqrt(N) x sqrt(N) R theta: N = h^2 + hk + k^2, theta = atan(sqrt3 k / (2h + k)); the
            # fundamental is (h + k, k) / N of (b1, b2) (b2 at 120 degrees), its mirror (h, -k) / N.
            found = None
            for h in range(1, 8):
                for k in range(0, h + 1):
                    if h * h + h * k + k * k == n:
                        theta = math.degrees(math.atan2(math.sqrt(3) * k, 2 * h + k))
                        if abs(theta - abs(angle)) < 0.2:
                            found = (h, k)
            if found is None:
                raise InputError(f"superlattice {order!r}: no sqrt(N) x sqrt(N) cell of a hexagonal lattice has "
                                 f"N = {n} and a rotation of {angle} deg (N = h^2 + hk + k^2, "
                                 "theta = atan(sqrt(3) k / (2h + k)))")
            h, k = found
            frac = np.array([h + k, k]) / n if not s.endswith(f"r-{mt.group(3)}") else np.array([h, -k]) / n
            q1 = frac @ b
            rot = np.array([[-0.5, -math.sqrt(3) / 2], [math.sqrt(3) / 2, -0.5]])
            q = np.array([q1, rot @ q1, rot @ rot @ q1])
        else:
            raise InputError(f"superlattice {order!r} is not supported for a {kind} lattice "
                             "(supported: sqrtNxsqrtNRtheta hexagonal, sqrt2xsqrt2R45 square)")
        name = f"sqrt{n}xsqrt{n}R{mt.group(3)}"
    inv = np.linalg.inv(b)
    coefs = [tuple(Fraction(v).limit_denominator(64) for v in (qq @ inv)) for qq in q]
    return Superlattice(name, True, q, _ideal_q_err(q, lattice), coefs, None, None, None, "set by the user")


# --------------------------------------------------------------------------------------
# Whole spectrum
# --------------------------------------------------------------------------------------


def _lattice_from_dict(spec):
    if isinstance(spec, Lattice):
        return spec
    if not isinstance(spec, dict):
        raise InputError(f"lattice must be a Lattice or a dict with kind, a_nm, angle_deg; got {type(spec).__name__}")
    unknown = set(spec) - {"kind", "a_nm", "angle_deg", "a2_nm", "gamma_deg"}
    if unknown:
        raise InputError(f"lattice: unknown keys {sorted(unknown)} (allowed: kind, a_nm, angle_deg, a2_nm, gamma_deg)")
    if "kind" not in spec or "a_nm" not in spec:
        raise InputError(f"lattice needs at least 'kind' and 'a_nm', got {spec}")
    return Lattice.from_params(spec["kind"], spec["a_nm"], spec.get("angle_deg", 0.0),
                               a2_nm=spec.get("a2_nm"), gamma_deg=spec.get("gamma_deg"))


def analyze_spectrum(image, *, pixel_size_nm, mask=None, lattice=None, q=None, superlattice=None,
                     max_peaks=40, snr=None, max_refine=8, max_denominator=6, kind=None, tile_px=None):
    """Peaks, lattice, superlattice and moire candidates of one image, with manual overrides.

    Steps: :func:`find_peaks` (or the given ``q``), :func:`index_lattice` (or
    the given ``lattice``), lock-in refinement (:func:`refine_q`) of the Bragg
    peaks and the strongest other peaks, the lattice fitted again to the
    refined Bragg peaks, :func:`index_peaks`, and a superlattice summary:
    commensurate order and supercell from the rational peaks (n x n, n x 1,
    sqrt(N) x sqrt(N) R angle, or a general supercell matrix), else the
    incommensurate wavevectors with their misfit delta.

    Parameters
    ----------
    image : (row, col) array_like, dask array or Scan
        The image.
    pixel_size_nm : float or (float, float)
        Pixel size in nm. May be None for a Scan.
    mask : (row, col) array of bool, optional
        True where pixels are untrusted.
    lattice : Lattice or dict, optional
        The lattice, e.g. ``{"kind": "hexagonal", "a_nm": 0.35, "angle_deg": 5}``;
        skips the automatic search.
    q : (k, 2) array_like, optional
        Wavevectors (rad/nm) to use instead of detected peaks; used as given.
    superlattice : str, optional
        "3x3", "2x2", "4x1", "sqrt3xsqrt3R30", "sqrt2xsqrt2R45": sets the order
        and its ideal wavevectors from the lattice.
    max_peaks, snr : see :func:`find_peaks`.
    max_refine : int
        Number of peaks refined by lock-in: the Bragg peaks first, then the
        strongest peaks that are not integer harmonics (0 for none).
    max_denominator : int
        Largest denominator of a commensurate fraction.
    kind : {"hexagonal", "square", "oblique"}, optional
        Restrict the automatic lattice search.
    tile_px : int, optional
        Search a large image on tiles (see :func:`find_peaks`); every peak is
        then refined on the whole frame and ``max_refine`` does not apply.

    Returns
    -------
    SpectrumResult

    Raises
    ------
    InputError
        For an invalid image or pixel size, a ``q`` beyond the Nyquist limit,
        a malformed ``lattice`` or an unknown ``superlattice``.

    Examples
    --------
    >>> lat = Lattice.from_params("hexagonal", 0.35, 4.0)
    >>> n, dx = 128, 0.05
    >>> y, x = np.mgrid[:n, :n] * dx
    >>> image = sum(np.cos(g[0] * x + g[1] * y) + 0.3 * np.cos((g[0] * x + g[1] * y) / 3)
    ...             for g in lat.bragg)
    >>> result = analyze_spectrum(image, pixel_size_nm=dx)
    >>> result.superlattice.order, round(result.lattice.a_nm, 3)
    ('3x3', 0.35)
    """
    image, pixel, mask = _open(image, pixel_size_nm, mask, "analyze_spectrum")
    if superlattice is not None and not isinstance(superlattice, str):
        raise InputError(f"superlattice must be a string such as '3x3', got {superlattice!r}")
    given_lattice = None if lattice is None else _lattice_from_dict(lattice)
    tile = _tile_size(image, tile_px)
    full_shape = tuple(image.shape)
    if tile is not None:
        # A large image: peaks from the tiles, every one already refined on the whole frame.
        power, shape, dof, _, _ = _welch_spectrum(image, mask, pixel, tile, "hann", np.float32)
        if q is None:
            peaks = find_peaks(image, pixel_size_nm=pixel, mask=mask, max_peaks=max_peaks, snr=snr, tile_px=tile)
    else:
        image, pixel, valid = _unpack(image, pixel, mask, "analyze_spectrum")
        level = _subtract_plane(image, valid, pixel)
        power = _spectrum(level, "hann", np.float32)
        shape, dof = image.shape, 1
        if q is None:
            peaks = _detect(power, shape, pixel, int(max_peaks), None, snr, 0.01, True)
    if q is not None:
        q_arr = _check_q_override(q, pixel)
        floor, _ = _two_pass_floor(power, dof)
        ny, nx = shape
        dy, dx = pixel
        peaks = []
        for qj in q_arr:
            c = int(round(qj[0] * nx * dx / (2 * np.pi))) + nx // 2
            r = int(round(qj[1] * ny * dy / (2 * np.pi))) + ny // 2
            r, c = min(max(r, 0), ny - 1), min(max(c, 0), nx - 1)
            peaks.append(Peak(q=_canonical(qj), q_err=0.0, power=float(power[r, c]),
                              snr=float(power[r, c] / floor[r, c]), amplitude=2 * math.sqrt(power[r, c]),
                              refined="manual"))
    lat = given_lattice if given_lattice is not None else index_lattice(peaks, kind=kind)
    if q is None and peaks and max_refine > 0 and tile is None:
        # Refine the peaks that matter most: the Bragg peaks, then the strongest
        # peaks that are not integer harmonics of the lattice.
        first = index_peaks(peaks, lat, max_denominator=max_denominator)

        def priority(m):
            integer = first[m].fraction is not None and all(f.denominator == 1 for f in first[m].fraction)
            return (first[m].role != "bragg", integer, -peaks[m].power)

        rank = sorted(range(len(peaks)), key=priority)
        chosen = rank[:int(max_refine)]
        rest = np.array([peaks[m].q for m in range(len(peaks)) if m not in chosen]).reshape(-1, 2)
        refined = _refine_peaks(level, valid, pixel, [peaks[m] for m in chosen], other_q=rest if len(rest) else None)
        peaks = list(peaks)
        for m, p in zip(chosen, refined):
            peaks[m] = p
        if given_lattice is None and lat is not None:
            lat = index_lattice(peaks, kind=lat.kind)
    indexed = index_peaks(peaks, lat, max_denominator=max_denominator)
    if superlattice is not None:
        sup = _superlattice_override(superlattice, lat)
    else:
        sup = _summarize_superlattice(indexed, lat)
    moire = sorted([p for p in indexed if p.role == "moire"], key=lambda p: p.q_abs_rad_per_nm)
    moire_q = np.array([p.q for p in moire]).reshape(-1, 2)
    return SpectrumResult(indexed, lat, sup, moire_q, pixel, full_shape)


def format_peak_table(result):
    """Human-readable text: the lattice, the superlattice and one line per peak.

    Parameters
    ----------
    result : SpectrumResult

    Returns
    -------
    str

    Examples
    --------
    >>> lat = Lattice.from_params("square", 0.4, 0.0)
    >>> res = SpectrumResult(index_peaks([Peak(g, 1e-4) for g in lat.bragg], lat), lat, None,
    ...                      np.zeros((0, 2)), (0.05, 0.05), (64, 64))
    >>> print(format_peak_table(res).splitlines()[0])
    lattice: square, a = 0.40000 +/- 0.00000 nm, angle = 0.000 +/- 0.000 deg
    """
    if not isinstance(result, SpectrumResult):
        raise InputError(f"format_peak_table needs a SpectrumResult, got {type(result).__name__}")
    lines = []
    lat = result.lattice
    if lat is None:
        lines.append("lattice: none found")
    else:
        extra = "" if lat.kind != "oblique" else f", a2 = {lat.a2_nm:.5f} nm, gamma = {lat.gamma_deg:.2f} deg"
        lines.append(f"lattice: {lat.kind}, a = {lat.a_nm:.5f} +/- {lat.a_err_nm:.5f} nm, "
                     f"angle = {lat.angle_deg:.3f} +/- {lat.angle_err_deg:.3f} deg{extra}")
    sup = result.superlattice
    if sup is None:
        lines.append("superlattice: none")
    else:
        qs = "; ".join(f"({v[0]:.4f}, {v[1]:.4f})" for v in np.asarray(sup.q))
        lines.append(f"superlattice: {sup.order}, q = {qs} rad/nm")
        if sup.delta is not None:
            lines.append("  delta = " + ", ".join(f"{d:.4f}" for d in sup.delta))
    if len(result.moire_q):
        lines.append("moire candidates: " + "; ".join(
            f"({v[0]:.4f}, {v[1]:.4f}) period {2 * math.pi / np.hypot(*v):.3f} nm" for v in result.moire_q))
    header = f"{'#':>3} {'role':<15}{'h':>8}{'k':>8} {'fraction':<11}{'|q| rad/nm':>11}{'period nm':>11}" \
             f"{'angle':>9}{'qx':>10}{'qy':>10}{'q_err':>10}{'snr':>10}"
    lines += ["", header, "-" * len(header)]
    for n, row in enumerate(result.rows(), 1):
        h = "" if row["h"] is None else f"{row['h']:.4f}"
        k = "" if row["k"] is None else f"{row['k']:.4f}"
        frac = row["hk_fraction"] or ""
        snr = row["snr"]
        snr_s = "inf" if not math.isfinite(snr) else (f"{snr:.3g}")
        lines.append(f"{n:>3} {row['role'] or '':<15}{h:>8}{k:>8} {frac:<11}{row['q_abs_rad_per_nm']:>11.4f}"
                     f"{row['period_nm']:>11.4f}{row['angle_deg']:>9.3f}{row['qx_rad_per_nm']:>10.4f}"
                     f"{row['qy_rad_per_nm']:>10.4f}{row['q_err_rad_per_nm']:>10.2e}{snr_s:>10}")
    return "\n".join(lines)
