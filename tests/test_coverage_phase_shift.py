"""Coverage of the phase shift between two biases, Δφ_j = arg(A_j(V1) conj A_j(V2)), and its reported error.

An error bar is tested by what it promises: over independent noise realisations of one scene the truth
lies within two reported standard errors in about 95 % of them (95.45 % for a calibrated normal error;
derived). Issue 12 asks for 90-99 %: below, the errors are too small; above, too large.

Two scenes, both built here or by domains.synth from their parameters, never from the code under test:

- two maps written with numpy: in two domains split by a tilted straight wall, three components at the
  commensurate Q_j = G_j / 3 of a hexagonal lattice with phases phi_j^d at V1 and phi_j^d - Δ_j^d at V2,
  so that the truth is Δφ_j^d = Δ_j^d (chosen per domain and component: inverted, not inverted and in
  between), on a conductance background of 1 (tens of times the order's amplitude, as in a dI/dV map)
  with a tilt, plus white noise; the lock-in is taken at the true Q with the true labels
  (domains.compare.phase_shifts after domains.lockin);
- domains.synth.cdw_scene with its two conductance maps (the CDW term flips sign between the biases:
  Δφ = π for every component, the scene's truth), run through domains.analyze as a user would; the
  numbers are those of summary.json's bias_comparison.
"""

import math

import numpy as np
import pytest

from domains import lockin
from domains._lattice import bragg_vectors
from domains.compare import _without_background, phase_shifts

PX, N_PIX, SIGMA_NM = 0.05, 192, 0.43
A_NM, ANGLE_DEG = 0.34, 4.0
# Per domain: the phases at V1 and the true shifts (degrees), inverted, not inverted and in between.
PHASES = {1: np.array([0.3, 1.2, -2.0]), 2: np.array([2.4, -0.7, 0.9])}
SHIFTS_DEG = {1: np.array([180.0, 170.0, -175.0]), 2: np.array([60.0, -100.0, 10.0])}
REALISATIONS = 100
LOW, HIGH = 0.90, 0.99


def _wrap(x):
    return (np.asarray(x) + np.pi) % (2 * np.pi) - np.pi


def _maps(rng, *, amp_1, amp_2, noise, background=1.0):
    """Two maps of the two-domain scene (module docstring), the labels and the order's Q."""
    y, x = np.mgrid[:N_PIX, :N_PIX] * PX
    labels = np.where(x < N_PIX * PX / 2 + 0.3 * (y - N_PIX * PX / 2), 1, 2).astype(np.int32)
    q = bragg_vectors("hexagonal", A_NM, ANGLE_DEG) / 3
    plane = background * (1 + 0.2 * x / (N_PIX * PX) - 0.1 * y / (N_PIX * PX))
    m1, m2 = plane.copy(), 1.3 * plane
    for d in (1, 2):
        inside = labels == d
        for j, qj in enumerate(q):
            wave = qj[0] * x + qj[1] * y + PHASES[d][j]
            m1 += inside * amp_1 * np.cos(wave)
            m2 += inside * amp_2 * np.cos(wave - np.radians(SHIFTS_DEG[d][j]))
    return m1 + rng.normal(0, noise, m1.shape), m2 + rng.normal(0, noise, m1.shape), labels, q


def _z(rows):
    return [_wrap(r.delta_phi_rad - np.radians(SHIFTS_DEG[r.domain])) / r.se_rad for r in rows]


def _lockin_flat(image, q):
    # The background is removed as compare_biases does before its lock-in (tested below on its own).
    flat = _without_background(image, np.zeros(image.shape, bool), sigma_nm=SIGMA_NM, pixel=(PX, PX), step=1)
    return lockin(flat, q, sigma_nm=SIGMA_NM, pixel_size_nm=PX)


@pytest.mark.slow
@pytest.mark.parametrize("amp_1, amp_2, noise", [(1.0, 0.5, 2.0), (0.15, 0.15, 2.0), (1.0, 1.0, 0.2)])
def test_phase_shift_error_covers_the_truth(amp_1, amp_2, noise):
    # Signal-to-noise per independent sigma-patch, |A| / (noise / sqrt(4 pi sigma^2 / px^2)) (derived):
    # about 7 and 4, 1.1, and 76: from barely ordered to clean; amplitudes may differ between biases.
    z = []
    for seed in range(REALISATIONS):
        m1, m2, labels, q = _maps(np.random.default_rng(seed), amp_1=amp_1, amp_2=amp_2, noise=noise)
        z += _z(phase_shifts(_lockin_flat(m1, q), _lockin_flat(m2, q), labels, sigma_nm=SIGMA_NM,
                             pixel_size_nm=PX))
    z = np.asarray(z)  # (2 domains x REALISATIONS, 3 components)
    assert z.shape == (2 * REALISATIONS, 3) and np.all(np.isfinite(z))
    # 600 values: for calibrated normal errors 4.6 % +- 0.85 % fall outside 2 sigma (binomial, derived),
    # so 90-99 % holds with certainty for practical purposes, and an error 1.25x too small (89 %) or
    # 1.3x too large (99.6 %) fails (derived from the normal law)
    coverage = float(np.mean(np.abs(z) < 2))
    assert LOW <= coverage <= HIGH, coverage
    # each component and domain alone (200 values: binomial sd 1.5 %; the window is 3 sd wide): no
    # component's error is off alone
    for j in range(3):
        assert LOW <= float(np.mean(np.abs(z[:, j]) < 2)) <= HIGH
    # the errors are not biased either way: no systematic offset of the mean z (derived: the mean of
    # 600 unit normals is known to 0.04; 0.2 is five of those)
    assert abs(float(np.mean(z))) < 0.2


def test_background_leaks_into_the_lock_in_unless_removed():
    # Without noise Δφ is exact (derived): the lock-in at Q sees only its own wave. A background of 1
    # leaks exp(-sigma^2 Q^2 / 2) of itself into it (the Gaussian's transfer at |Q|; docs/methods.md
    # §1), turning as exp(-i Q.r): the phase shift then ripples over the domain.
    m1, m2, labels, q = _maps(np.random.default_rng(0), amp_1=0.1, amp_2=0.1, noise=0.0)
    raw = [lockin(m, q, sigma_nm=SIGMA_NM, pixel_size_nm=PX) for m in (m1, m2)]
    leak = 1.3 * math.exp(-(SIGMA_NM * np.hypot(*q[0])) ** 2 / 2)  # the larger map's background (derived)
    assert leak > 0.2 * 0.1 / 2  # the leak exceeds a fifth of |A| = 0.05: the ripple is not small
    rippled = phase_shifts(*raw, labels, sigma_nm=SIGMA_NM, pixel_size_nm=PX)
    flat = phase_shifts(_lockin_flat(m1, q), _lockin_flat(m2, q), labels, sigma_nm=SIGMA_NM, pixel_size_nm=PX)
    # the ripple is seen as a spread of several degrees (how much depends on the shift: derived, the
    # leak is common to both maps, so it cancels least where the order inverts)
    assert max(float(np.max(np.degrees(r.spread_rad))) for r in rippled) > 5
    for r in flat:
        # derived: with the background removed only the wall's leak (0.6 % at 2.5 sigma, compare's
        # interior margin) and the removal's own exp(-2 sigma^2 Q^2) of the order remain
        assert np.all(np.degrees(r.spread_rad) < 1)
        assert np.all(np.degrees(np.abs(_wrap(r.delta_phi_rad - np.radians(SHIFTS_DEG[r.domain])))) < 0.5)


PIPE_REALISATIONS = 24


@pytest.mark.slow
def test_phase_shift_error_covers_the_truth_through_the_pipeline():
    # cdw_scene with a fixed layout (two domains split by a tilted wall, variants (0, 0) and (1, 0)) and
    # 24 draws of its noise and drift; the maps' noise is noise_nm / cdw_nm x 0.08 nS per pixel against
    # a CDW term of 0.08 nS per component on a 1 nS background (the scene's construction).
    from domains.pipeline import analyze
    from domains.synth import cdw_scene

    n = 192
    y, x = np.mgrid[:n, :n]
    layout = np.where(x < n / 2 + 0.3 * (y - n / 2), 1, 2).astype(np.int32)
    z = []
    for seed in range(PIPE_REALISATIONS):
        scene = cdw_scene(shape=(n, n), labels=layout, variants=[(0, 0), (1, 0)], noise_nm=0.008, rng=700 + seed)
        truth = scene.truth["contrast_phase_shift_rad"]  # pi: the CDW term flips sign (the scene's truth)
        summary = analyze(scene.topography, maps=scene.maps, progress=False).summary
        for row in summary["bias_comparison"]["pairs"][0]["domains"]:
            dphi = np.radians(row["delta_phi_deg"])
            z.append(_wrap(dphi - truth) / np.radians(row["delta_phi_deg_se"]))
    z = np.asarray(z)
    # every domain found has the scene's shift pi, however the frame was cut (a third domain split off
    # by the segmentation in a noisy draw is still one side of the wall): two or more per draw
    assert z.shape[0] >= 2 * PIPE_REALISATIONS and z.shape[1] == 3
    # >= 144 values: for calibrated normal errors 6.6 +- 2.5 fall outside 2 sigma (binomial, derived), so
    # 90-99 % (1-14 outside) holds with probability 0.99, while errors 10x too large (the background's
    # leak counted as noise, before it was removed) cover 100 %
    assert LOW <= float(np.mean(np.abs(z) < 2)) <= HIGH
