"""What the lock-in phases mean: translational variants of a commensurate CDW, stripe orientation, presence of order."""

from __future__ import annotations

import functools
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
                false_alarm=NOISE_FALSE_ALARM, n_probes=6, step=None, scratch=None):
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
    step : int, optional
        Demodulate on the decimated grid (every ``step``-th row and column, see
        :func:`domains.lockin`); ``trusted`` is then on that grid. The samples are
        the full-resolution values, so the statistics are those of the full grid.
    scratch : domains._scratch.Scratch, optional
        For a dask image: the probes' amplitudes (float32) are stored there once and the median is
        taken from per-chunk partial histograms (:func:`domains._coarse.median_chunked`, exact),
        so no probe's amplitude is ever whole in memory.

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
    amps = amplitude(lockin(image, probes, sigma_nm=sigma_nm, pixel_size_nm=pixel_size_nm, mask=mask, step=step))
    if scratch is not None and hasattr(amps, "dask"):
        # Chunk by chunk: the amplitudes stored once (float32), the exact median from two passes.
        import dask.array as da

        from ._coarse import median_chunked
        from ._scratch import checkpoint

        if trusted is None:
            raise InputError("noise_floor: a dask image needs trusted (the samples to take)")
        amps = checkpoint(amps.astype(np.float32), scratch, "noise_probes")
        scale = median_chunked(amps, da.isfinite(amps[0]) & np.asarray(trusted, bool)) / np.sqrt(2 * np.log(2))
        return NoiseFloor(scale, scale * float(np.sqrt(-2 * np.log(false_alarm))), false_alarm, probes)
    # np.asarray: a dask image gives a lazy lock-in; its samples are few enough to hold.
    amps = np.asarray(amps)
    if trusted is None:
        # Near edges and masks fewer pixels are averaged and the noise is larger: keep away.
        trusted = trusted_mask(np.shape(image), sigma_nm=sigma_nm, pixel_size_nm=pixel_size_nm, mask=mask)
        if step:
            trusted = trusted[::step, ::step]
    where = trusted & np.isfinite(amps[0])
    values = amps[:, where]
    scale = float(np.median(values) / np.sqrt(2 * np.log(2)))
    return NoiseFloor(scale, scale * float(np.sqrt(-2 * np.log(false_alarm))), false_alarm, probes)


def coefficients_nxn(n):
    """Coefficients (h, k) of the CDW wavevectors Q_j = G_j / n in the reciprocal basis b1, b2.

    With G1 = b1, G2 = b2, G3 = -(b1 + b2) (the hexagonal triple of
    :func:`domains._lattice.bragg_vectors`).

    Parameters
    ----------
    n : int
        Superlattice order, n >= 2.

    Returns
    -------
    ndarray, shape (3, 2)

    Examples
    --------
    >>> coefficients_nxn(3) * 3
    array([[ 1.,  0.],
           [ 0.,  1.],
           [-1., -1.]])
    """
    if int(n) != n or n < 2:
        raise InputError(f"superlattice order n must be an integer >= 2, got {n!r}")
    return np.array([[1, 0], [0, 1], [-1, -1]], dtype=float) / int(n)


def _coefficients(order):
    coefficients = coefficients_nxn(order) if np.ndim(order) == 0 else np.asarray(order, dtype=float)
    if coefficients.ndim != 2 or coefficients.shape[1] != 2 or len(coefficients) < 1:
        raise InputError(f"coefficients must have shape (k, 2), got {coefficients.shape}")
    return coefficients


def _denominator(x, limit=64):
    from fractions import Fraction

    f = Fraction(float(x)).limit_denominator(limit)
    if abs(float(f) - x) > 1e-6:
        raise InputError(f"coefficient {x} is not a simple fraction: the order is not commensurate")
    return f.denominator


def relative_phase(a_cdw, coefficients, *, bragg_phase=None):
    """Drift-free relative phase of each CDW component, phi_CDW,j - (h_j theta_1 + k_j theta_2) (wrapped, rad).

    The Bragg phases theta_i = b_i . u carry the drift; the CDW at
    Q_j = h_j b1 + k_j b2 carries h_j theta_1 + k_j theta_2 of it (theta_j / n for
    Q_j = G_j / n). Dividing a wrapped Bragg phase by n would jump by 2 pi / n
    wherever it wraps and draw false walls, so ``bragg_phase`` must be unwrapped,
    e.g. b_i . u from the drift field, or the small residual phase left after drift
    correction.

    Parameters
    ----------
    a_cdw : (k, row, col) complex ndarray
        Lock-in fields at the CDW wavevectors Q_j.
    coefficients : int or (k, 2) array_like
        (h_j, k_j) of each Q_j in the reciprocal basis, or n for Q_j = G_j / n.
    bragg_phase : (2 or 3, row, col) ndarray, optional
        Unwrapped Bragg phases for G1 = b1 and G2 = b2 (a third, G3, is not
        needed); None when the image is already drift corrected and the residual
        may be neglected.

    Returns
    -------
    ndarray, (k, row, col)
        Relative phases in (-pi, pi].

    References
    ----------
    .. [1] M. J. Lawler et al., Nature 466, 347 (2010). doi:10.1038/nature09169

    Examples
    --------
    >>> theta = np.full((2, 2, 2), 3.0)   # unwrapped drift phases of b1 and b2
    >>> a = np.exp(1j * np.full((3, 2, 2), 0.5)) * np.exp(1j * np.array([1, 1, -2])[:, None, None])
    >>> np.round(relative_phase(a, 3, bragg_phase=theta)[:, 0, 0], 6)
    array([0.5, 0.5, 0.5])
    """
    a_cdw = np.asarray(a_cdw)
    coefficients = _coefficients(coefficients)
    if len(coefficients) != len(a_cdw):
        raise InputError(f"{len(a_cdw)} CDW components but {len(coefficients)} coefficient pairs")
    if bragg_phase is not None:
        bragg_phase = np.asarray(bragg_phase)
        if bragg_phase.ndim != 3 or bragg_phase.shape[0] < 2 or bragg_phase.shape[1:] != a_cdw.shape[1:]:
            raise InputError(f"bragg_phase must be (2 or 3, row, col) like the CDW fields, got {bragg_phase.shape}")
    # One component at a time, in the fields' precision: no (k, row, col) complex temporaries.
    out = np.empty(a_cdw.shape, _real_dtype(a_cdw))
    for j in range(len(a_cdw)):
        z = _drift_free(a_cdw[j], coefficients[j], bragg_phase)
        np.arctan2(z.imag, z.real, out=out[j])   # np.angle, written in place
        del z
    return out


def _real_dtype(a):
    """float32 for complex64 (or float32) fields, float64 otherwise: the precision the fields carry."""
    return np.float32 if np.asarray(a).dtype in (np.complex64, np.float32) else np.float64


def _drift_free(a_j, coefficient, bragg_phase, offset=0.0, out=None):
    """One component's field A_j exp(-i (h_j theta_1 + k_j theta_2 + offset)), in the field's precision.

    Written into ``out`` (complex, shaped like ``a_j``) when given; the only temporary is the real
    phase shift.
    """
    real = _real_dtype(a_j)
    if bragg_phase is None and offset == 0.0:
        if out is None:
            return a_j
        out[...] = a_j
        return out
    shift = np.full(a_j.shape, offset, real)
    if bragg_phase is not None:
        for c, theta in zip(coefficient, bragg_phase[:2]):
            if c != 0:
                shift += np.multiply(theta, real(c), dtype=real)
    if out is None:
        out = np.empty(a_j.shape, np.result_type(a_j.dtype, shift.dtype, np.complex64))
    np.multiply(shift, -1j, out=out)
    del shift
    np.exp(out, out=out)
    out *= a_j
    return out


def variant_templates(coefficients):
    """Phase patterns of the translational variants of a commensurate superlattice.

    A lattice translation R = m1 a1 + m2 a2 shifts component j by
    -Q_j . R = -2 pi (h_j m1 + k_j m2) (docs/methods.md §5); the distinct patterns over all
    (m1, m2) are the variants (n^2 of them for an n x n CDW, 3 for sqrt3 x sqrt3).

    Parameters
    ----------
    coefficients : int or (k, 2) array_like
        n for Q_j = G_j / n, or the rational (h_j, k_j) of each Q_j.

    Returns
    -------
    variants : (V, 2) ndarray of int
        (m1, m2) of one translation per variant.
    phases : (V, k) ndarray
        The phase pattern of each variant, wrapped to (-pi, pi].

    Examples
    --------
    >>> v, p = variant_templates(3)
    >>> len(v), bool(np.allclose(np.exp(1j * p.sum(axis=1)), 1))
    (9, True)
    >>> len(variant_templates([[1/3, 1/3], [-2/3, 1/3], [1/3, -2/3]])[0])   # sqrt3 x sqrt3
    3
    """
    coefficients = _coefficients(coefficients)
    # The same coefficients come back for every piece of pixels scored (domains._refine.order_score_at):
    # the search over the translations runs once per set of coefficients.
    variants, phases = _variant_templates(tuple(float(c) for c in coefficients.ravel()), coefficients.shape)
    return variants.copy(), phases.copy()


@functools.lru_cache(maxsize=64)
def _variant_templates(flat, shape):
    """:func:`variant_templates` of the coefficients ``np.reshape(flat, shape)`` (cached; read-only arrays)."""
    coefficients = np.reshape(np.array(flat, float), shape)
    period = int(np.lcm.reduce([_denominator(c) for c in coefficients.ravel()]))
    seen, variants, phases = set(), [], []
    for m1 in range(period):
        for m2 in range(period):
            pattern = -2 * np.pi * (coefficients @ np.array([m1, m2], dtype=float))
            wrapped = np.angle(np.exp(1j * pattern))
            key = tuple(np.round(np.mod(wrapped, 2 * np.pi), 6) % round(2 * np.pi, 6))
            if key not in seen:
                seen.add(key)
                variants.append((m1, m2))
                phases.append(wrapped)
    variants, phases = np.array(variants), np.array(phases)
    variants.flags.writeable = phases.flags.writeable = False
    return variants, phases


@dataclass
class CommensurateOrder:
    """Per-pixel translational variant of a commensurate CDW.

    Attributes
    ----------
    coefficients : (k, 2) float
        (h_j, k_j) of the CDW wavevectors in the reciprocal basis.
    variant : (row, col) int32
        Index into ``variants`` (-1 where no order).
    variants : (V, 2) int
        (m1, m2) of each index, relative to the variant at the origin offset.
    offset_rad : (k,) float
        The global phase offset removed before quantising (the choice of origin).
    score : (row, col) float
        Amplitude-weighted cosine of the phase residual to the chosen variant,
        1 for a perfect match, cos(pi/n) halfway to the next variant.
    margin : (row, col) float
        Score of the best variant less that of the second best.
    residual_rad : (k, row, col) float
        Phase residual to the chosen variant.
    ordered : (row, col) bool
        Where the order amplitude is above the noise threshold.
    amplitude : (k, row, col) float
        2|A_j|.
    phase_sum_rad : (row, col) float
        sum_j phi_j (translation invariant for an n x n triple-q CDW: labels the structural type).
    """

    coefficients: np.ndarray
    variant: np.ndarray
    variants: np.ndarray
    offset_rad: np.ndarray
    score: np.ndarray
    margin: np.ndarray
    residual_rad: np.ndarray
    ordered: np.ndarray
    amplitude: np.ndarray
    phase_sum_rad: np.ndarray


def _scores(amp, centred, templates):
    total = amp.sum(axis=0)
    weight = np.where(total > 0, total, np.nan)
    scores = np.einsum("j...,vj...->v...", amp, np.cos(centred[None] - templates.reshape(templates.shape + (1,) * (amp.ndim - 1)))) / weight
    return np.nan_to_num(scores, nan=-np.inf)


def commensurate_order(a_cdw, coefficients, *, bragg_phase=None, threshold=None, trusted=None, rng=0,
                       offset_rad=None):
    """Quantise the relative CDW phases to the translational variants of a commensurate order.

    The global offset (the choice of origin) is removed first, so that domains sit
    at the centres of their quantisation cells, not on a boundary: per component,
    the amplitude-weighted circular mean of d_j phi_j (d_j the denominator of the
    component's phase steps, n for an n x n CDW) fixes phi_j modulo 2 pi / d_j;
    the remaining discrete choice is the one under which the ordered pixels match
    the variant templates best. Each pixel then takes the variant whose template
    best matches all components at once,
    score = sum_j |A_j| cos(phi_j - offset_j - template_j) / sum_j |A_j|.

    Parameters
    ----------
    a_cdw : (k, row, col) complex ndarray
        Lock-in fields at the CDW wavevectors Q_j (for an n x n CDW in the order
        G1 / n, G2 / n, G3 / n with G3 = -(G1 + G2)).
    coefficients : int or (k, 2) array_like
        n for Q_j = G_j / n, or the rational (h_j, k_j) of each Q_j.
    bragg_phase : (2 or 3, row, col) ndarray, optional
        Unwrapped Bragg phases (see :func:`relative_phase`).
    threshold : float, optional
        2|A| below which a pixel has no order (see :func:`noise_floor`); default 0.
    trusted : (row, col) bool, optional
        Pixels to use for the offset estimate.
    rng : int or numpy.random.Generator
        Chooses the pixels sampled for the offset search (fixed by default).
    offset_rad : (k,) array_like, optional
        Use this global offset (e.g. the one found on the whole frame, to classify a
        few more pixels consistently) instead of estimating it.

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
    return _commensurate(a_cdw, coefficients, bragg_phase=bragg_phase, threshold=threshold, trusted=trusted, rng=rng,
                         offset_rad=offset_rad, full=True)


def _commensurate(a_cdw, coefficients, *, bragg_phase=None, threshold=None, trusted=None, rng=0, offset_rad=None,
                  full=True):
    """:func:`commensurate_order`; with ``full=False`` only the variant, score, ordered mask and offset are
    computed (the margin, residual, amplitude and phase sum are None): what :func:`family_order` needs.

    Memory: the per-pixel work runs in the fields' precision (float32 for complex64 fields) and one
    component or one variant at a time, so the peak is a few (row, col) planes per component, never a
    (variants, components, row, col) stack.
    """
    a_cdw = np.asarray(a_cdw)
    coefficients = _coefficients(coefficients)
    if a_cdw.ndim != 3 or a_cdw.shape[0] != len(coefficients):
        raise InputError(f"commensurate_order needs {len(coefficients)} CDW components (k, row, col), "
                         f"got shape {a_cdw.shape}")
    variants, templates = variant_templates(coefficients)
    phi = relative_phase(a_cdw, coefficients, bragg_phase=bragg_phase)
    amp = np.empty(a_cdw.shape, phi.dtype)
    for j in range(len(a_cdw)):
        amp[j] = amplitude(a_cdw[j])
    total = amp.sum(axis=0)
    ordered = np.isfinite(total)
    for amp_j in amp:
        ordered &= amp_j > (threshold or 0.0)
    use = ordered if trusted is None else ordered & trusted
    if not use.any():
        use = np.isfinite(total)
    if offset_rad is not None:
        return _quantise(phi, amp, total, np.asarray(offset_rad, float), templates, ordered, coefficients, variants,
                         full)
    # Per component, modulo its phase step 2 pi / d_j: the mean of exp(i d_j phi) is blind to the variant.
    steps = np.array([np.lcm.reduce([_denominator(c) for c in row]) for row in coefficients])
    offset = np.empty(len(steps))
    for j, d in enumerate(steps):
        # sum over the used pixels of |A_j| exp(i d_j phi_j), summed in float64
        angle = phi[j] * phi.dtype.type(d)
        re = np.cos(angle)
        im = np.sin(angle, out=angle)
        del angle
        for part in (re, im):
            part *= amp[j]
            np.copyto(part, 0, where=~use)
        offset[j] = np.angle(complex(np.sum(re, dtype=np.float64), np.sum(im, dtype=np.float64))) / d
        del re, im
    # The remaining choice (multiples of 2 pi / d_j per component): the one the variants explain best.
    rng = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    where = np.flatnonzero(use)
    sample = rng.choice(where, size=min(where.size, 4000), replace=False) if where.size else where
    del where
    phi_s = phi.reshape(len(phi), -1)[:, sample].astype(float)
    amp_s = amp.reshape(len(amp), -1)[:, sample].astype(float)
    best_shift, best_score = np.zeros(len(steps)), -np.inf
    # Shifts that differ by a variant's template relabel the variants without changing the fit: where
    # the templates take every value of a component, that component's shift can be fixed at 0 (a
    # sqrt13 cell then needs 13^2 trials instead of 13^3; derived).
    steps_int = steps.astype(int)
    units = np.rint(np.mod(templates, 2 * np.pi) * steps_int / (2 * np.pi)).astype(int) % steps_int
    ranges = []
    for j in range(len(steps_int)):
        if len(set(units[:, j].tolist())) == steps_int[j]:
            ranges.append(range(1))
            units = units[units[:, j] == 0]
        else:
            ranges.append(range(steps_int[j]))
    import itertools

    for shift in itertools.product(*ranges):
        trial = offset + 2 * np.pi * np.array(shift) / steps
        score = np.mean(np.max(_scores(amp_s, phi_s - trial[:, None], templates), axis=0)) if sample.size else 0.0
        if score > best_score + 1e-12:
            best_shift, best_score = np.array(shift), score
    offset = np.angle(np.exp(1j * (offset + 2 * np.pi * best_shift / steps)))
    return _quantise(phi, amp, total, offset, templates, ordered, coefficients, variants, full)


def _quantise(phi, amp, total, offset, templates, ordered, coefficients, variants, full=True):
    """Each pixel's best variant, its score and margin, once the global offset is fixed.

    score_v = sum_j |A_j| cos(phi_j - offset_j - template_vj) / sum_j |A_j|, kept as a running
    best and second best over the variants (the first of equal bests wins, as ``np.argmax``).
    ``phi`` is overwritten with the centred phases phi - offset.
    """
    real = phi.dtype.type
    centred = phi
    centred -= offset.astype(phi.dtype)[:, None, None]
    t = templates.astype(phi.dtype)
    shape = phi.shape[1:]
    best = np.full(shape, -np.inf, phi.dtype)
    second = np.full(shape, -np.inf, phi.dtype) if full else None
    index = np.zeros(shape, np.int32)
    acc = np.empty(shape, phi.dtype)
    tmp = np.empty(shape, phi.dtype)
    for v in range(len(t)):
        acc.fill(0)
        for j in range(len(phi)):
            np.subtract(centred[j], t[v, j], out=tmp)
            np.cos(tmp, out=tmp)
            tmp *= amp[j]
            acc += tmp
        if full:
            # second best: the old best where v wins, else v where it beats the second best
            np.maximum(second, np.minimum(acc, best), out=second)
        win = acc > best
        index[win] = v
        np.copyto(best, acc, where=win)
        del win
    del acc, tmp
    with np.errstate(invalid="ignore", divide="ignore"):
        weight = total if not full else total.copy()    # the total amplitude, NaN where not > 0
        weight[~(weight > 0)] = np.nan
        margin = None
        if full:
            margin = np.nan_to_num((best - second) / weight) if len(t) > 1 else np.ones(shape, phi.dtype)
        score = np.divide(best, weight, out=best)
        score[~np.isfinite(score)] = np.nan
    del second, weight
    variant = index if not full else index.copy()
    variant[~ordered] = -1
    if not full:
        return CommensurateOrder(coefficients, variant, variants, offset, score, None, None, ordered, None, None)
    residual = np.empty(phi.shape, phi.dtype)
    for j in range(len(phi)):
        residual[j] = np.angle(np.exp(1j * (centred[j] - t[:, j][index])))
    # centred = phi - offset: the sum of phi is that of the centred phases plus the sum of offsets
    phase_sum = np.angle(np.exp(1j * (centred.sum(axis=0) + real(offset.sum()))))
    return CommensurateOrder(coefficients, variant, variants, offset, score, margin, residual, ordered, amp,
                             phase_sum)


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
        three times the power of the other (docs/methods.md §6).

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


def commensurate_candidates(q, basis, *, max_denominator=6):
    """The simple fractions of the reciprocal basis nearest to each wavevector.

    Parameters
    ----------
    q : (k, 2) array_like
        Measured wavevectors, rad/nm.
    basis : (2, 2) array_like
        Reciprocal basis, rows b1, b2 in rad/nm.
    max_denominator : int
        Largest denominator tried.

    Returns
    -------
    ndarray, shape (k, 2)
        Fractional coefficients (h, k) with q_c = h b1 + k b2.

    Examples
    --------
    >>> commensurate_candidates([[0.35, 0.0]], np.eye(2)).tolist()
    [[0.3333333333333333, 0.0]]
    """
    coefficients = np.atleast_2d(np.asarray(q, float)) @ np.linalg.inv(np.asarray(basis, float))
    return nearest_fractions(coefficients, max_denominator=max_denominator)


def nearest_fractions(coefficients, *, max_denominator=6):
    """Each coefficient replaced by the nearest fraction with a denominator up to ``max_denominator``.

    Parameters
    ----------
    coefficients : array_like
        Fractional coordinates in a reciprocal basis.
    max_denominator : int
        Largest denominator tried.

    Returns
    -------
    ndarray
        Same shape, the fractions as floats.

    Examples
    --------
    >>> nearest_fractions([[0.201, -0.334]]).tolist()
    [[0.2, -0.3333333333333333]]
    """
    from fractions import Fraction

    values = np.asarray(coefficients, float)
    return np.array([float(Fraction(float(c)).limit_denominator(max_denominator)) for c in values.ravel()]
                    ).reshape(values.shape)


def phase_flatness(image, q, *, sigma_nm, pixel_size_nm, mask=None, threshold=None):
    """How far the order's local wavevector departs from q: the median phase gradient over ordered pixels.

    Demodulated at the exact commensurate wavevector, a commensurate order has a
    flat phase inside every domain (its gradient vanishes but at the walls), even
    when domains of different phase split its Fourier peak into speckle; an
    incommensurate order at q = q_c + dq keeps a uniform gradient dq
    (McMillan 1976). The median over ordered pixels ignores the walls.

    Parameters
    ----------
    image : (row, col) ndarray
        The drift-corrected image.
    q : (k, 2) array_like
        Candidate wavevectors, rad/nm.
    sigma_nm : float
        Lock-in width, nm.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    mask : ndarray of bool, optional
        Untrusted pixels.
    threshold : float, optional
        2|A| above which a pixel counts as ordered (default: above the median).

    Returns
    -------
    gradient : (k, 2) ndarray
        Median (d phi/dx, d phi/dy) per candidate, rad/nm.
    error : (k,) ndarray
        Its standard error: 1.2533 x the gradient's spread / sqrt(independent areas),
        with one independent area per 4 pi sigma^2 (derived).

    References
    ----------
    .. [1] W. L. McMillan, Phys. Rev. B 14, 1496 (1976). doi:10.1103/PhysRevB.14.1496

    Examples
    --------
    >>> y, x = np.mgrid[:96, :96] * 0.1
    >>> g, e = phase_flatness(np.cos(3.0 * x + 0.2 * x), [[3.0, 0.0]], sigma_nm=0.6, pixel_size_nm=0.1)
    >>> round(float(g[0, 0]), 2)
    0.2
    """
    from ._lockin import phase_gradient
    from ._scan import pixel_size_pair

    dy, dx = pixel_size_pair(pixel_size_nm)
    q = np.atleast_2d(np.asarray(q, float))
    a = lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=(dy, dx), mask=mask)
    grad = phase_gradient(a, pixel_size_nm=(dy, dx))
    trusted = trusted_mask(np.shape(image), sigma_nm=sigma_nm, pixel_size_nm=(dy, dx), mask=mask)
    amp = amplitude(a)
    gradient, error = np.zeros((len(q), 2)), np.zeros(len(q))
    for j in range(len(q)):
        cut = np.nanmedian(amp[j][trusted]) if threshold is None else threshold
        where = trusted & (amp[j] > cut) & np.all(np.isfinite(grad[:, j]), axis=0)
        if where.sum() < 4:
            gradient[j], error[j] = np.nan, np.nan
            continue
        gx, gy = grad[0, j][where], grad[1, j][where]
        gradient[j] = (np.median(gx), np.median(gy))
        n_independent = max(where.sum() * dx * dy / (4 * np.pi * sigma_nm**2), 1.0)
        spread = np.hypot(*(np.percentile(np.stack([gx, gy]), [75], axis=1)[0] - np.percentile(np.stack([gx, gy]), [25], axis=1)[0])) / 1.349
        error[j] = 1.2533 * spread / np.sqrt(n_independent)
    return gradient, error


@dataclass
class FamilyOrder:
    """Per-pixel state of an order made of several families (chiralities, stripe orientations).

    Attributes
    ----------
    state : (row, col) int32
        Index into ``names`` (-1 where no order or no clear winner).
    score : (row, col) float
        Confidence of the state (the variant score times the dominance of the family); float32 for
        complex64 fields, float64 otherwise.
    ordered : (row, col) bool
        Where the order's amplitude is above the noise threshold.
    names : list of str
        Name of each state: the family and the variant (lattice translation m = (m1, m2)).
    fields : (k, row, col) complex
        Per component, the lock-in field with the drift-free phase less the variant offset (commensurate
        families) or the raw field (incommensurate ones): what walls and defects are measured on. In the
        input's complex precision (complex64 stays complex64).
    family : (row, col) int32
        The dominant family (-1 where none).
    offsets_rad : list of ndarray
        The global phase offset removed from each commensurate family.
    """

    state: np.ndarray
    score: np.ndarray
    ordered: np.ndarray
    names: list
    fields: np.ndarray
    family: np.ndarray
    offsets_rad: list


def family_order(a_components, groups, *, coefficients=None, bragg_phase=None, threshold=None, trusted=None,
                 anisotropy_threshold=0.5, family_names=None, offsets_rad=None):
    """States of an order made of families: which family dominates locally, and its translational variant.

    One family (a triple-q CDW) reduces to :func:`commensurate_order`. Several
    families are told apart by their amplitudes, as stripes are (docs/methods.md §6):
    the family whose mean |A|^2 is largest wins where its anisotropy against the
    next is above ``anisotropy_threshold``. Inside the winning family a
    commensurate order is quantised to its translational variants (|det M| for
    a triple-q supercell; the denominator of q for a single stripe
    component, whose phase-slip domains are then separate states); an
    incommensurate family has a single state.

    Parameters
    ----------
    a_components : (k, row, col) complex ndarray
        Lock-in fields at every order wavevector.
    groups : list of list of int
        Component indices of each family, e.g. ``[[0, 1, 2]]`` for one triple-q CDW,
        ``[[0], [1], [2]]`` for stripes, ``[[0, 1, 2], [3, 4, 5]]`` for two chiralities.
    coefficients : (k, 2) array_like, optional
        Exact fractions (h, k) of commensurate components in the Bragg basis; None for incommensurate order.
    bragg_phase : (2 or 3, row, col) ndarray, optional
        Unwrapped Bragg phases (see :func:`relative_phase`).
    threshold : float, optional
        2|A| below which a pixel has no order.
    trusted : (row, col) bool, optional
        Pixels used for the offsets.
    anisotropy_threshold : float
        Dominance needed to assign a family.
    family_names : list of str, optional
        A name per family (default "q1", "q2", ...).
    offsets_rad : list of (len(group),) arrays, optional
        The global offset of each family (:attr:`FamilyOrder.offsets_rad` of an earlier
        call), to classify more pixels with the same variant labels.

    Returns
    -------
    FamilyOrder

    Examples
    --------
    >>> a = np.zeros((2, 4, 6), complex); a[0, :, :3] = 1; a[1, :, 3:] = 1
    >>> fo = family_order(a, [[0], [1]], coefficients=[[0.5, 0], [0, 0.5]])
    >>> [fo.names[s] for s in fo.state[0]]
    ['q1 m=(0,0)', 'q1 m=(0,0)', 'q1 m=(0,0)', 'q2 m=(0,0)', 'q2 m=(0,0)', 'q2 m=(0,0)']
    """
    a = np.asarray(a_components)
    if a.ndim != 3:
        raise InputError(f"family_order needs (k, row, col) fields, got shape {a.shape}")
    k = len(a)
    if sorted(i for g in groups for i in g) != list(range(k)):
        raise InputError(f"groups must cover the {k} components once each, got {groups}")
    coef = None if coefficients is None else _coefficients(coefficients)
    names_f = family_names or [f"q{g + 1}" for g in range(len(groups))]
    # Memory: per-pixel work in the fields' precision (float32 for complex64 fields), one family
    # and one component at a time; the fields come back in the input's complex precision.
    real = _real_dtype(a)
    shape = a.shape[1:]
    thr = threshold or 0.0
    if len(groups) > 1:
        # mean |A|^2 of each family, 2|A| = amplitude
        power = np.empty((len(groups),) + shape, real)
        for gi, g in enumerate(groups):
            power[gi] = 0
            for j in g:
                power[gi] += np.square(amplitude(a[j]))
            power[gi] /= len(g)
        family = np.argmax(np.nan_to_num(power, nan=-1.0), axis=0).astype(np.int8 if len(groups) < 128 else np.int32)
        power.sort(axis=0)
        first, second = power[-1], power[-2]
        with np.errstate(invalid="ignore", divide="ignore"):
            dominance = np.where(first + second > 0, (first - second) / (first + second), real(0))
        strong = np.sqrt(np.nan_to_num(first)) > thr
        del power, first, second
        clear = dominance >= anisotropy_threshold
        # the dominance of the family as a factor of the score, min(1, dominance / threshold)
        dominance /= real(max(anisotropy_threshold, 1e-9))
        np.minimum(dominance, 1, out=dominance)
        factor = dominance
    else:
        family = np.zeros(shape, np.int8)
        factor = None
        strong = np.ones(shape, bool)
        clear = strong
    state = np.full(shape, -1, np.int32)
    score = np.zeros(shape, real)
    ordered = np.zeros(shape, bool)
    names, offsets = [], []
    for gi, g in enumerate(groups):
        here = family == gi
        if coef is not None:
            # a view for the usual contiguous group (fancy indexing would copy the family's fields)
            a_g = a[g[0]: g[-1] + 1] if len(g) and list(g) == list(range(g[0], g[-1] + 1)) else a[g]
            co = _commensurate(a_g, coef[g], bragg_phase=bragg_phase, threshold=threshold,
                               trusted=None if trusted is None else trusted & here & strong,
                               offset_rad=None if offsets_rad is None else offsets_rad[gi], full=False)
            base = len(names)
            names += [f"{names_f[gi]} m=({m1},{m2})" for m1, m2 in co.variants]
            offsets.append(co.offset_rad)
            fam_ordered = co.ordered if len(groups) == 1 else strong
            take = here & fam_ordered & clear & (co.variant >= 0)
            state[take] = base + co.variant[take]
            score[take] = co.score[take] if factor is None else co.score[take] * factor[take]
            ordered |= here & fam_ordered
            del co, take
        else:
            base = len(names)
            names.append(names_f[gi])
            offsets.append(np.zeros(len(g)))
            if len(groups) == 1:
                fam_ordered = np.ones(shape, bool)
                for j in g:
                    fam_ordered &= amplitude(a[j]) > thr
            else:
                fam_ordered = strong
            take = here & fam_ordered & clear
            state[take] = base
            score[take] = factor[take] if factor is not None else 1.0
            ordered |= here & fam_ordered
            del take
    family = np.where(ordered & clear, family, -1).astype(np.int32)
    del clear, strong, factor
    # The fields last, when the per-family work is freed: A_j exp(-i (drift_j + offset_j)) for a
    # commensurate family (the drift-free relative field less the variant offset), A_j otherwise.
    fields = np.empty(a.shape, np.result_type(a.dtype, np.complex64))
    for g, offset in zip(groups, offsets):
        for i, j in enumerate(g):
            if coef is None:
                fields[j] = a[j]
            else:
                _drift_free(a[j], coef[j], bragg_phase, float(offset[i]), out=fields[j])
    return FamilyOrder(state, score, ordered, names, fields, family, offsets)


def variant_confidence(coefficients):
    """Score that a pixel needs to seed a domain: halfway from a variant's template to the boundary with
    its nearest neighbour.

    For two variants whose templates differ by d_j per component, the score at a residual of d/4
    (halfway to the midpoint) is mean_j cos(d_j / 4); the smallest over all pairs is returned
    (derived; cos(pi / 6) = 0.866 for one component of a 3 x 3 CDW, 0.911 for all three).

    Parameters
    ----------
    coefficients : (k, 2) array_like
        Exact fractions of the order's wavevectors in the Bragg basis.

    Returns
    -------
    float

    Examples
    --------
    >>> round(variant_confidence([[0.5, 0.0]]), 4)   # two stripe variants, 0 and pi
    0.7071
    """
    _, templates = variant_templates(coefficients)
    if len(templates) < 2:
        return 0.5
    d = np.angle(np.exp(1j * (templates[:, None, :] - templates[None, :, :])))
    score = np.mean(np.cos(np.abs(d) / 4), axis=-1)
    np.fill_diagonal(score, np.inf)
    return float(np.min(score))
