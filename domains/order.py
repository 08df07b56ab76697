"""What the lock-in phases mean: translational variants of a commensurate CDW, stripe orientation, presence of order."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._errors import InputError
from ._lockin import amplitude, lockin, trusted_mask

#: False-alarm probability per pixel for "order present" on pure noise (Rayleigh tail).
NOISE_FALSE_ALARM = 1e-3


@dataclass
class NoiseFloor:
    """Lock-in amplitude of the image where it holds no peak.

    Attributes
    ----------
    rayleigh_scale : float
        Scale s of the Rayleigh distribution of 2|A| on noise alone (image units).
    threshold : float
        2|A| above which order is present, s sqrt(-2 ln p) with p the false-alarm rate.
    false_alarm : float
        That probability per pixel.
    probe_q_rad_per_nm : ndarray
        The empty wavevectors the estimate used.
    """

    rayleigh_scale: float
    threshold: float
    false_alarm: float
    probe_q_rad_per_nm: np.ndarray


def noise_floor(image, q, *, sigma_nm, pixel_size_nm, avoid_q=(), mask=None, trusted=None,
                false_alarm=NOISE_FALSE_ALARM, n_probes=6):
    """Noise floor of the lock-in amplitude, measured at empty wavevectors of the same length.

    The lock-in of noise is a complex Gaussian, so 2|A| follows a Rayleigh law;
    its scale is measured, not assumed, by demodulating at wavevectors where the
    spectrum holds no peak (at least 3/sigma from every peak in ``q`` and
    ``avoid_q``, their negatives and the origin), as close to the length of ``q``
    as the peaks allow. The median of 2|A| there is s sqrt(2 ln 2).

    Parameters
    ----------
    image : (row, col) ndarray
        The (levelled) image.
    q : (k, 2) array_like
        The order's wavevectors, rad/nm.
    sigma_nm : float
        Lock-in width in nm, the same as for the order maps.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    avoid_q : (m, 2) array_like
        Other peaks to keep away from (Bragg peaks, harmonics).
    mask : ndarray of bool, optional
        Untrusted pixels.
    trusted : ndarray of bool, optional
        Where to take the statistics (default: :func:`domains.trusted_mask`).
    false_alarm : float
        Probability that pure noise exceeds the threshold at one pixel.
    n_probes : int
        How many empty wavevectors to use.

    Returns
    -------
    NoiseFloor

    Raises
    ------
    InputError
        If no empty wavevector of that length exists.

    References
    ----------
    .. [1] S. O. Rice, "Mathematical analysis of random noise", Bell Syst. Tech.
       J. 24, 46 (1945). doi:10.1002/j.1538-7305.1945.tb00453.x

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> floor = noise_floor(rng.normal(size=(256, 256)), [[6.0, 0.0]], sigma_nm=0.5, pixel_size_nm=0.1)
    >>> # derived: 2|A| of unit white noise is Rayleigh with scale 1 / sqrt(2 pi sigma_px^2) = 0.0798
    >>> bool(abs(floor.rayleigh_scale / (1 / np.sqrt(2 * np.pi * 25)) - 1) < 0.15)
    True
    """
    q = np.atleast_2d(np.asarray(q, dtype=float))
    peaks = np.concatenate([q, -q, np.zeros((1, 2))] + ([np.atleast_2d(avoid_q), -np.atleast_2d(avoid_q)] if len(avoid_q) else []))
    radius = float(np.mean(np.hypot(*q.T)))
    clearance = 3.0 / sigma_nm
    # Prefer the order's own |q| (the noise need not be white); move off the ring if it is full.
    candidates = []
    for factor in (1.0, 0.9, 1.1, 0.8, 1.2, 0.7, 1.3, 0.6, 1.4, 1.6, 1.8, 2.0, 2.2, 2.5):
        for t in np.linspace(0, np.pi, 181)[:-1]:
            p = factor * radius * np.array([np.cos(t), np.sin(t)])
            if np.min(np.hypot(*(peaks - p).T)) >= clearance:
                candidates.append(p)
        if len(candidates) >= n_probes:
            break
    if not candidates:
        raise InputError(
            f"no empty wavevector near |q| = {radius:.3g} rad/nm lies 3/sigma = {clearance:.3g} rad/nm from every "
            "peak; give a larger sigma_nm"
        )
    pick = np.linspace(0, len(candidates) - 1, min(n_probes, len(candidates))).round().astype(int)
    probes = np.array([candidates[i] for i in pick])
    amps = amplitude(lockin(image, probes, sigma_nm=sigma_nm, pixel_size_nm=pixel_size_nm, mask=mask))
    if trusted is None:
        # Near edges and masks fewer pixels are averaged and the noise is larger: keep away.
        trusted = trusted_mask(np.shape(image), sigma_nm=sigma_nm, pixel_size_nm=pixel_size_nm, mask=mask)
    where = trusted & np.isfinite(amps[0])
    values = amps[:, where]
    scale = float(np.median(values) / np.sqrt(2 * np.log(2)))
    return NoiseFloor(scale, scale * float(np.sqrt(-2 * np.log(false_alarm))), false_alarm, probes)


def relative_phase(a_cdw, n, *, bragg_phase=None):
    """Drift-free relative phase phi_CDW,j - phi_Bragg,j / n of each CDW component (wrapped, rad).

    The Bragg phase theta_j = G_j . u carries the drift; the CDW at Q_j = G_j / n
    carries theta_j / n of it. Dividing a wrapped Bragg phase by n would jump by
    2 pi / n wherever it wraps and draw false walls, so ``bragg_phase`` must be
    unwrapped, e.g. G_j . u from the drift field, or the small residual phase
    left after drift correction.

    Parameters
    ----------
    a_cdw : (k, row, col) complex ndarray
        Lock-in fields at the CDW wavevectors Q_j.
    n : int
        Superlattice order (Q_j = G_j / n).
    bragg_phase : (k, row, col) ndarray, optional
        Unwrapped Bragg phases theta_j; None when the image is already drift
        corrected and the residual may be neglected.

    Returns
    -------
    ndarray, (k, row, col)
        Relative phases in (-pi, pi].

    References
    ----------
    .. [1] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> a = np.exp(1j * np.full((3, 2, 2), 0.5))
    >>> theta = np.full((3, 2, 2), 3.0)   # unwrapped drift phase of the Bragg peaks
    >>> float(np.round(relative_phase(a, 3, bragg_phase=theta)[0, 0, 0], 6))
    -0.5
    """
    a_cdw = np.asarray(a_cdw)
    if bragg_phase is None:
        return np.angle(a_cdw)
    bragg_phase = np.asarray(bragg_phase, dtype=float)
    if bragg_phase.shape != a_cdw.shape:
        raise InputError(f"bragg_phase shape {bragg_phase.shape} differs from the CDW fields' {a_cdw.shape}")
    return np.angle(a_cdw * np.exp(-1j * bragg_phase / n))


def variant_templates(n):
    """Phase patterns of the n^2 translational variants of a triple-q n x n CDW.

    Parameters
    ----------
    n : int
        Superlattice order.

    Returns
    -------
    variants : (n*n, 2) ndarray of int
        (m1, m2) for each variant: the CDW translated by m1 a1 + m2 a2.
    phases : (n*n, 3) ndarray
        -2 pi (m1, m2, -m1-m2) / n (METHODS §5).

    Examples
    --------
    >>> v, p = variant_templates(3)
    >>> len(v), bool(np.allclose(np.exp(1j * p.sum(axis=1)), 1))
    (9, True)
    """
    if int(n) != n or n < 2:
        raise InputError(f"superlattice order n must be an integer >= 2, got {n!r}")
    n = int(n)
    variants = np.array([(m1, m2) for m1 in range(n) for m2 in range(n)])
    phases = -2 * np.pi * np.stack([variants[:, 0], variants[:, 1], -variants.sum(axis=1)], axis=1) / n
    return variants, phases


@dataclass
class CommensurateOrder:
    """Per-pixel translational variant of a commensurate CDW.

    Attributes
    ----------
    n : int
        Superlattice order.
    variant : (row, col) int32
        Index into ``variants`` (-1 where no order).
    variants : (n*n, 2) int
        (m1, m2) of each index, relative to the variant at the origin offset.
    offset_rad : (3,) float
        The global phase offset removed before quantising (the choice of origin).
    score : (row, col) float
        Amplitude-weighted cosine of the phase residual to the chosen variant,
        1 for a perfect match, cos(pi/n) halfway to the next variant.
    margin : (row, col) float
        Score of the best variant less that of the second best.
    residual_rad : (3, row, col) float
        Phase residual to the chosen variant.
    ordered : (row, col) bool
        Where the order amplitude is above the noise threshold.
    amplitude : (3, row, col) float
        2|A_j|.
    phase_sum_rad : (row, col) float
        sum_j phi_j (translation invariant: labels the structural type).
    """

    n: int
    variant: np.ndarray
    variants: np.ndarray
    offset_rad: np.ndarray
    score: np.ndarray
    margin: np.ndarray
    residual_rad: np.ndarray
    ordered: np.ndarray
    amplitude: np.ndarray
    phase_sum_rad: np.ndarray


def commensurate_order(a_cdw, n, *, bragg_phase=None, threshold=None, trusted=None):
    """Quantise the relative CDW phases to the n^2 translational variants.

    The global offset (the choice of origin) is removed first: per component, the
    amplitude-weighted circular mean of n phi_j fixes phi_j modulo 2 pi / n, and
    the translation-invariant sum sum_j phi_j (METHODS §5) fixes the remaining
    2 pi / n ambiguity, so that the domains sit at the centres of their
    quantisation cells, not on a boundary. Each pixel then takes the variant
    whose template phases best match all three components at once,
    score = sum_j |A_j| cos(phi_j - offset_j - template_j) / sum_j |A_j|.

    Parameters
    ----------
    a_cdw : (3, row, col) complex ndarray
        Lock-in fields at Q_j = G_j / n (in the order G1, G2, G3 = -(G1 + G2)).
    n : int
        Superlattice order.
    bragg_phase : (3, row, col) ndarray, optional
        Unwrapped Bragg phases (see :func:`relative_phase`).
    threshold : float, optional
        2|A| below which a pixel has no order (see :func:`noise_floor`); default 0.
    trusted : (row, col) bool, optional
        Pixels to use for the offset estimate.

    Returns
    -------
    CommensurateOrder

    Examples
    --------
    >>> _, templates = variant_templates(3)
    >>> a = np.exp(1j * (templates[4][:, None, None] + 0.3)) * np.ones((3, 4, 4))
    >>> order = commensurate_order(a, 3)
    >>> len(np.unique(order.variant)), round(float(order.score.min()), 6)
    (1, 1.0)
    """
    a_cdw = np.asarray(a_cdw)
    if a_cdw.ndim != 3 or a_cdw.shape[0] != 3:
        raise InputError(f"commensurate_order needs three CDW components (3, row, col), got shape {a_cdw.shape}")
    variants, templates = variant_templates(n)
    phi = relative_phase(a_cdw, n, bragg_phase=bragg_phase)
    amp = amplitude(a_cdw)
    total = amp.sum(axis=0)
    ordered = np.isfinite(total) & (amp.min(axis=0) > (threshold or 0.0))
    use = ordered if trusted is None else ordered & trusted
    if not use.any():
        use = np.isfinite(total)
    weights = np.where(use, amp, 0.0)
    # Per component modulo 2 pi / n: the mean of exp(i n phi) is blind to the variant.
    offset = np.angle(np.nansum(weights * np.exp(1j * n * phi), axis=(1, 2))) / n
    # Fix the remaining 2 pi / n freedom so that the offsets add up to the mean of sum_j phi_j.
    phase_sum = np.angle(np.exp(1j * phi.sum(axis=0)))
    mean_sum = np.angle(np.nansum(np.where(use, total, 0.0) * np.exp(1j * phase_sum)))
    k = np.round((mean_sum - offset.sum()) / (2 * np.pi / n))
    offset[2] += k * 2 * np.pi / n
    centred = phi - offset[:, None, None]
    weight_sum = np.where(total > 0, total, np.nan)
    scores = np.einsum("jrc,vjrc->vrc", amp, np.cos(centred[None] - templates[:, :, None, None])) / weight_sum
    scores = np.nan_to_num(scores, nan=-np.inf)
    best = np.argmax(scores, axis=0)
    ordered_scores = np.sort(scores, axis=0)
    score = np.take_along_axis(scores, best[None], 0)[0]
    margin = ordered_scores[-1] - ordered_scores[-2]
    residual = np.angle(np.exp(1j * (centred - templates[best].transpose(2, 0, 1))))
    variant = np.where(ordered, best, -1).astype(np.int32)
    return CommensurateOrder(int(n), variant, variants, offset, np.where(np.isfinite(score), score, np.nan), margin,
                             residual, ordered, amp, phase_sum)


@dataclass
class OrientationOrder:
    """Per-pixel dominant component of unidirectional (stripe) order.

    Attributes
    ----------
    orientation : (row, col) int32
        Index of the dominant wavevector, -1 where no order or no clear winner.
    anisotropy : (row, col) float
        For two components (|A_0|^2 - |A_1|^2) / (|A_0|^2 + |A_1|^2); in general
        (largest - second) / (largest + second) of |A_j|^2, in [0, 1].
    ordered : (row, col) bool
        Where the largest amplitude is above the noise threshold.
    amplitude : (k, row, col) float
        2|A_j|.
    anisotropy_threshold : float
        The threshold used.
    """

    orientation: np.ndarray
    anisotropy: np.ndarray
    ordered: np.ndarray
    amplitude: np.ndarray
    anisotropy_threshold: float


def orientation_order(a_components, *, threshold=None, anisotropy_threshold=0.5):
    """Orientational domains of unidirectional order: which wavevector dominates locally.

    Parameters
    ----------
    a_components : (k, row, col) complex ndarray
        Lock-in fields at the k candidate stripe wavevectors (k >= 2).
    threshold : float, optional
        2|A| below which a pixel has no order (see :func:`noise_floor`).
    anisotropy_threshold : float
        Smallest (|A_1|^2 - |A_2|^2) / (|A_1|^2 + |A_2|^2) (largest and second
        largest) for a pixel to be assigned; 0.5 means one component carries
        three times the power of the other (METHODS §6).

    Returns
    -------
    OrientationOrder

    Examples
    --------
    >>> a = np.zeros((2, 4, 4), complex); a[0, :, :2] = 1; a[1, :, 2:] = 1
    >>> orientation_order(a).orientation[0].tolist()
    [0, 0, 1, 1]
    """
    amp = amplitude(np.asarray(a_components))
    if amp.ndim != 3 or amp.shape[0] < 2:
        raise InputError(f"orientation_order needs at least two components (k, row, col), got shape {amp.shape}")
    power = np.sort(amp**2, axis=0)
    first, second = power[-1], power[-2]
    with np.errstate(invalid="ignore", divide="ignore"):
        anisotropy = np.where(first + second > 0, (first - second) / (first + second), 0.0)
    dominant = np.argmax(np.nan_to_num(amp, nan=-1.0), axis=0)
    ordered = np.isfinite(first) & (np.sqrt(first) > (threshold or 0.0))
    orientation = np.where(ordered & (anisotropy >= anisotropy_threshold), dominant, -1).astype(np.int32)
    return OrientationOrder(orientation, anisotropy, ordered, amp, float(anisotropy_threshold))
