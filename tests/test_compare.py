"""Tests of domains.compare: registration, per-domain phase shifts and contrast verdicts, grid fingerprints."""

from __future__ import annotations

import json

import dask.array as da
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import ndimage
from skimage.registration import phase_cross_correlation

import domains
from domains.compare import (
    apply_shift,
    classify_contrast,
    compare_biases,
    domain_contrast,
    fingerprint_peaks,
    grid_fingerprints,
    phase_shifts,
    register,
    undo_displacement,
)

# ----------------------------------------------------------------------------- scenes
# Invented scenes with analytically known truth.

PX = 0.1          # nm per pixel
N = 192           # pixels per side
SIGMA = 0.5       # nm; sigma |Q| = 3.5 keeps every other peak's leakage below 0.3 % (docs/methods.md §1)
Q_MAG = 2 * np.pi / 0.9  # rad/nm, a triple-q order with 0.9 nm wavefront spacing
# The three translational variants of a commensurate 3x3 order: phi_j = -2 pi n_j / 3,
# sum n_j = 0 (derived, docs/methods.md §5).
VARIANT_PHASES = {1: (0.0, 0.0, 0.0), 2: (-2 * np.pi / 3, 2 * np.pi / 3, 0.0), 3: (2 * np.pi / 3, 0.0, -2 * np.pi / 3)}


def triple_q(magnitude, angle_deg):
    angles = np.radians(angle_deg + np.array([0.0, 120.0, 240.0]))
    return magnitude * np.stack([np.cos(angles), np.sin(angles)], axis=1)


Q = triple_q(Q_MAG, 12.0)


def strip_layout(n, count=3, wall_px=2):
    """Vertical strips 1..count; `region` has no gaps, `labels` marks wall_px columns at each boundary as 0."""
    col = np.arange(n)
    region = np.repeat((1 + col * count // n)[None, :], n, axis=0).astype(np.int32)
    labels = region.copy()
    for b in range(1, count):
        edge = b * n // count
        labels[:, edge - wall_px // 2: edge + (wall_px + 1) // 2] = 0
    return region, labels


def pattern(region, q, phases, amplitude=1.0, pixel_size=PX):
    """sum_j a_d cos(q_j . r + phi_j^(d)) with phases[d] = (phi_1, phi_2, phi_3) and a_d per region."""
    n0, n1 = region.shape
    y, x = np.mgrid[:n0, :n1] * pixel_size
    phi = np.zeros((len(q),) + region.shape)
    amp = np.zeros(region.shape)
    for d, ph in phases.items():
        sel = region == d
        phi[:, sel] = np.asarray(ph)[:, None]
        amp[sel] = amplitude[d] if isinstance(amplitude, dict) else amplitude
    return amp * sum(np.cos(q[j, 0] * x + q[j, 1] * y + phi[j]) for j in range(len(q)))


def shifted_phases(delta):
    """Phases at V2 such that arg(A_j(V1) conj A_j(V2)) = delta_j (per domain if delta is a dict)."""
    return {d: tuple(np.asarray(ph) - np.asarray(delta[d] if isinstance(delta, dict) else delta))
            for d, ph in VARIANT_PHASES.items()}


def bias_pair(delta, noise, rng):
    region, labels = strip_layout(N)
    v1 = pattern(region, Q, VARIANT_PHASES) + noise * rng.normal(size=region.shape)
    v2 = pattern(region, Q, shifted_phases(delta)) + noise * rng.normal(size=region.shape)
    return v1, v2, labels


def expected_phase_se(noise, amplitude, n_pixels):
    # derived: a lock-in phase of a wave of amplitude A0 in white noise s_n, averaged over
    # N pixels, has variance 2 s_n^2 / (A0^2 N) (the lock-in's correlation area 4 pi sigma^2
    # cancels); the difference of two independent maps doubles it: SE = 2 s_n / (A0 sqrt N).
    return 2 * noise / (amplitude * np.sqrt(n_pixels))


# ----------------------------------------------------------------------------- registration

REG_N, REG_PX = 128, 0.05
# Bragg peaks on whole FFT bins (the docs/methods.md §2 lattice), so the frame is periodic and
# scipy.ndimage.fourier_shift moves it exactly.
REG_BRAGG = 2 * np.pi * np.array([(16, 0), (-8, 14), (-8, -14)]) / (REG_N * REG_PX)


def registration_scene(rng):
    """A lattice plus a smooth random landscape (periodic): the landscape fixes the lattice translation."""
    y, x = np.mgrid[:REG_N, :REG_N] * REG_PX
    lattice = sum(np.cos(qj[0] * x + qj[1] * y) for qj in REG_BRAGG)
    land = ndimage.gaussian_filter(rng.normal(size=(REG_N, REG_N)), 6, mode="wrap")
    return lattice + land / land.std()


@pytest.mark.parametrize("true_shift", [(0.37, -0.61), (5.3, -3.7)])
def test_register_bragg_phase_subpixel(true_shift):
    rng = np.random.default_rng(11)
    scene = registration_scene(rng)
    moved = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(scene), true_shift)).real
    noise = 0.3
    reference = scene + noise * rng.normal(size=scene.shape)
    moving = moved + noise * rng.normal(size=scene.shape)
    reg = register(reference, moving, pixel_size_nm=REG_PX, bragg_q=REG_BRAGG, sigma_nm=0.25)
    expected = -np.asarray(true_shift)  # the shift that undoes the displacement (scikit-image convention)
    assert reg.method == "bragg-phase" and reg.contrast_sign == 1
    # The brief's 0.05 px; derived: Bragg phase error 2 s_n / (A sqrt N) ~ 0.006 rad over
    # ~1e4 trusted pixels, i.e. ~0.01 px at |Q| = 0.785 rad/px.
    assert_allclose(reg.shift_px, expected, atol=0.05)
    # Reference library: scikit-image's upsampled cross-correlation finds the same shift.
    sk = phase_cross_correlation(reference, moving, upsample_factor=100, normalization=None)[0]
    assert_allclose(sk, expected, atol=0.05)
    assert_allclose(reg.shift_px, sk, atol=0.05)
    # derived: x = col * dx, y = row * dy
    assert_allclose(reg.shift_nm, (reg.shift_px[1] * REG_PX, reg.shift_px[0] * REG_PX), rtol=1e-12)
    # derived: after the right shift only noise is left, phase noise per pixel
    # s_n / (sqrt(2 pi) sigma_px A) times sqrt 2 for two maps = 0.034 rad; far below 1 rad.
    assert reg.residual < 0.1
    # The shift really aligns: undoing it leaves the difference at the noise level.
    back = apply_shift(moving, reg.shift_px, mode="fourier")
    assert np.std((back - reference)[16:-16, 16:-16]) < 1.2 * np.sqrt(2) * noise  # derived: two noises


def test_register_detects_inverted_bragg_contrast():
    rng = np.random.default_rng(12)
    scene = registration_scene(rng)
    moved = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(scene), (1.25, 0.4))).real
    reg = register(scene, -moved, pixel_size_nm=REG_PX, bragg_q=REG_BRAGG, sigma_nm=0.25)
    # derived: -T(r) has every Bragg phase moved by pi, which no rigid shift of a
    # hexagonal lattice can give (sum Q_j = 0), so the sign is found and the shift kept.
    assert reg.contrast_sign == -1
    assert_allclose(reg.shift_px, (-1.25, -0.4), atol=0.02)


def test_register_without_bragg_is_scikit_image():
    rng = np.random.default_rng(13)
    scene = registration_scene(rng)
    moved = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(scene), (-2.4, 3.15))).real
    for normalization in (None, "phase"):
        reg = register(scene, moved, pixel_size_nm=REG_PX, normalization=normalization)
        # Reference library: the same numbers as scikit-image on the mean-removed images.
        sk = phase_cross_correlation(scene - scene.mean(), moved - moved.mean(), upsample_factor=100,
                                     normalization=normalization)[0]
        assert_allclose(reg.shift_px, sk, atol=1e-12)
        assert_allclose(reg.shift_px, (2.4, -3.15), atol=0.02)  # noise-free: 1/upsample_factor


def test_apply_shift_modes():
    n = 96
    y, x = np.mgrid[:n, :n].astype(float)
    image = np.cos(2 * np.pi * (x / 16 + y / 32)) + 0.5 * np.sin(2 * np.pi * y / 24)
    shift = (1.7, -2.35)
    moved = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(image), shift)).real
    # derived: fourier mode is the inverse of scipy.ndimage.fourier_shift (reference library)
    assert_allclose(apply_shift(moved, (-1.7, 2.35), mode="fourier"), image, atol=1e-10)
    out = apply_shift(image, shift)  # spline
    truth = np.cos(2 * np.pi * ((x - shift[1]) / 16 + (y - shift[0]) / 32)) + 0.5 * np.sin(
        2 * np.pi * (y - shift[0]) / 24)
    # Interpolating cubic spline error <= 5/384 h^4 max|f''''| (Hall & Meyer, J. Approx. Theory
    # 1976; from memory): (2 pi/16)^4 * 5/384 + 0.5 (2 pi/24)^4 * 5/384 = 3.4e-4 for unit h.
    bound = 5 / 384 * ((2 * np.pi / 16 * np.hypot(1, 0.5)) ** 4 + 0.5 * (2 * np.pi / 24) ** 4)
    assert np.nanmax(np.abs(out - truth)[12:-12, 12:-12]) < bound
    # derived: rows/cols brought in from outside the frame are NaN, the rest finite
    assert np.all(np.isnan(out[:1])) and np.all(np.isnan(out[:, -2:]))
    assert np.all(np.isfinite(out[3:, :-3]))


def test_undo_displacement_against_analytic_resampling():
    n, px = 96, 0.05
    y, x = np.mgrid[:n, :n] * px
    k = 2 * np.pi / 0.8
    image = np.cos(k * x)
    ux = 0.06 * np.sin(2 * np.pi * y / (n * px))  # nm, varying along y
    u = np.stack([ux, np.zeros_like(ux)])
    out = undo_displacement(image, u, pixel_size_nm=px)
    # derived: T'(r) = T(r - u) = cos(k (x - ux(y))); cubic spline error bound as above
    # (5/384 (k px)^4 = 2.0e-3 at 16 px per period).
    truth = np.cos(k * (x - ux))
    assert np.nanmax(np.abs(out - truth)[8:-8, 8:-8]) < 5 / 384 * (k * px) ** 4
    # derived: a uniform field is a rigid shift by u / pixel size
    uniform = np.stack([np.full((n, n), 0.07), np.full((n, n), -0.03)])
    undone = undo_displacement(image, uniform, pixel_size_nm=px)
    shifted = apply_shift(image, (-0.03 / px, 0.07 / px))
    both = np.isfinite(undone) & np.isfinite(shifted)
    assert_allclose(undone[both], shifted[both], atol=1e-12)
    # derived: pixels whose source r - u lies outside the frame (columns 0 and 1 for a 1.4 px
    # shift, the last row for -0.6 px) are NaN, never extrapolated
    assert np.isnan(undone[:, :2]).all() and np.isnan(undone[-1]).all()
    assert np.isfinite(undone[:-1, 2:]).all()


# ----------------------------------------------------------------------------- phase shifts and verdicts

NOISE = 1.0  # white noise per pixel; SNR = component amplitude / noise = 1


def _lockin_pair(v1, v2):
    a1 = domains.lockin(v1, Q, sigma_nm=SIGMA, pixel_size_nm=PX)
    a2 = domains.lockin(v2, Q, sigma_nm=SIGMA, pixel_size_nm=PX)
    return a1, a2


@pytest.mark.parametrize(
    "delta, verdict",
    [((np.pi, np.pi, np.pi), "inverted"), ((0.0, 0.0, 0.0), "not inverted"),
     ((np.pi, np.pi, np.pi / 3), "dephased")],
)
def test_phase_shifts_and_verdicts(delta, verdict):
    rng = np.random.default_rng(21)
    v1, v2, labels = bias_pair(delta, NOISE, rng)
    rows = phase_shifts(*_lockin_pair(v1, v2), labels, sigma_nm=SIGMA, pixel_size_nm=PX)
    assert [r.domain for r in rows] == [1, 2, 3]
    for r in rows:
        se = expected_phase_se(NOISE, 1.0, r.n_pixels)
        # Each component's mean shift within 4 expected standard errors of the imposed one
        # (derived SE above; the shift is uniform, so wall leakage cancels exactly).
        assert_allclose(np.angle(np.exp(1j * (r.delta_phi_rad - np.asarray(delta)))), 0, atol=4 * se)
        # The reported error agrees with the derived one; the spread is estimated from
        # ~20 independent areas (relative error ~ 1/sqrt(40) = 16 %), so within a factor 2.
        assert np.all((r.se_rad > se / 2) & (r.se_rad < 2 * se))
        assert r.verdict.verdict == verdict
        # The verdict comes with its confidence: the rejected hypothesis lies > 10 sigma away.
        assert r.verdict.confidence > 0.999
    if verdict == "dephased":
        assert all(r.verdict.p_inverted < 0.01 for r in rows)  # derived: pi/3 is 2 pi/3 from pi


def test_classify_contrast_logic():
    # derived: errors of 2 rad leave both 0 and pi within ~1.6 sigma: nothing can be concluded
    undetermined = classify_contrast([np.pi - 0.1, 3.0, -3.1], [2.0, 2.0, 2.0])
    assert undetermined.verdict == "undetermined" and undetermined.confidence == 0.0
    # derived: a common shift of pi/2 on all components is neither 0 nor pi
    shifted = classify_contrast([np.pi / 2] * 3, [0.02] * 3)
    assert shifted.verdict == "shifted"
    assert_allclose(shifted.common_phase_rad, np.pi / 2, atol=1e-12)
    # derived: -3.1 and 3.1 rad both lie 0.04 rad from pi (wrapping)
    inv = classify_contrast([3.1, -3.1, np.pi], [0.05] * 3, tolerance_rad=0.0)
    assert inv.verdict == "inverted"
    assert_allclose(inv.sigmas_from_inverted, (np.pi - 3.1) / 0.05, rtol=1e-9)
    # chi-square p-value against scipy.stats (reference library)
    from scipy import stats

    chi2 = 2 * ((np.pi - 3.1) / 0.05) ** 2
    assert_allclose(inv.p_inverted, stats.chi2.sf(chi2, 3), rtol=1e-9)


def test_domain_contrast_amplitudes_and_means():
    rng = np.random.default_rng(31)
    region, labels = strip_layout(N)
    amp1, amp2 = {1: 1.0, 2: 0.4, 3: 0.7}, {1: 0.3, 2: 0.9, 3: 0.7}
    g1, g2 = {1: 2.0, 2: 2.5, 3: 3.0}, {1: 1.0, 2: 1.5, 3: 1.2}
    noise = 0.5
    offset1 = np.vectorize(g1.get)(region)
    offset2 = np.vectorize(g2.get)(region)
    v1 = offset1 + pattern(region, Q, VARIANT_PHASES, amp1) + noise * rng.normal(size=region.shape)
    v2 = offset2 + pattern(region, Q, VARIANT_PHASES, amp2) + noise * rng.normal(size=region.shape)
    rows = domain_contrast({0.3: v2, -0.3: v1}, labels, Q, sigma_nm=SIGMA, pixel_size_nm=PX)
    assert [(r["bias_V"], r["domain"]) for r in rows] == [(-0.3, 1), (-0.3, 2), (-0.3, 3), (0.3, 1), (0.3, 2), (0.3, 3)]
    for r in rows:
        amp = (amp1 if r["bias_V"] < 0 else amp2)[r["domain"]]
        g = (g1 if r["bias_V"] < 0 else g2)[r["domain"]]
        n_int = r["n_pixels_interior"]
        # derived: noise adds |dA|^2 = s_n^2 / (4 pi sigma_px^2) to |A|^2, so 2|A| is biased up by
        # about s_n^2 / (4 pi sigma_px^2 A0) (~0.004 here); its mean's SE is s_n sqrt(2/N) (as for the phase).
        bias = noise**2 / (4 * np.pi * (SIGMA / PX) ** 2 * amp)
        tol = 4 * noise * np.sqrt(2 / n_int) + bias
        for j in (1, 2, 3):
            assert_allclose(r[f"amplitude_q{j}"], amp, atol=tol)
        assert_allclose(r["amplitude_total"], np.sqrt(3) * amp, atol=np.sqrt(3) * tol)  # derived: sqrt(sum amp_j^2)
        # derived: the pattern averages to ~0 over whole periods; the mean is within 4 SE of the offset,
        # SE = sqrt(s_n^2 + 3 amp^2 / 2) / sqrt(n) (pattern variance counted as pixel scatter) plus a
        # partial-period remainder below amp / (|Q| width) ~ 0.01.
        width_nm = 62 * PX
        assert_allclose(r["map_mean"], g, atol=4 * r["map_mean_se"] + 3 * amp / (Q_MAG * width_nm))
        assert r["area_nm2"] == pytest.approx(r["n_pixels"] * PX**2)  # derived


# ----------------------------------------------------------------------------- top level


def test_compare_biases_registers_and_classifies_each_domain():
    """A Bragg lattice (never inverted) with a 3x3 order whose contrast depends on the domain."""
    rng = np.random.default_rng(41)
    n, px = 240, 0.05
    a_nm = 0.33                                     # invented lattice constant
    bragg = triple_q(4 * np.pi / (np.sqrt(3) * a_nm), 5.0)
    q = bragg / 3                                   # commensurate 3x3 order (docs/methods.md §5)
    region, labels = strip_layout(n)
    delta = {1: (np.pi,) * 3, 2: (0.0,) * 3, 3: (np.pi, np.pi, np.pi / 3)}
    expected = {1: "inverted", 2: "not inverted", 3: "dephased"}
    y, x = np.mgrid[:n, :n] * px
    lattice = sum(np.cos(g[0] * x + g[1] * y) for g in bragg)
    land = ndimage.gaussian_filter(rng.normal(size=(n, n)), 8)
    land /= land.std()
    topo = lattice + pattern(region, q, VARIANT_PHASES, 1.0, px) + land
    v1 = lattice + pattern(region, q, VARIANT_PHASES, 1.0, px) + land
    v2_aligned = lattice + pattern(region, q, shifted_phases(delta), 1.0, px) + land
    true_shift = (0.6, -1.3)                        # px, the second map's own offset
    v2 = ndimage.shift(v2_aligned, true_shift, order=3, mode="nearest")
    noise = 0.3
    maps = {-0.3: v1 + noise * rng.normal(size=(n, n)), 0.3: v2 + noise * rng.normal(size=(n, n))}
    sigma = domains.choose_sigma(q)[0]
    res = compare_biases(topo, maps, labels, q, sigma_nm=sigma, pixel_size_nm=px, bragg_q=bragg)
    reg = res.registrations[0.3]
    assert reg.method == "bragg-phase"
    # derived: the Bragg phases undo the offset; noise 0.3 over ~2e4 pixels gives < 0.01 px
    assert_allclose(reg.shift_px, -np.asarray(true_shift), atol=0.05)
    assert_allclose(res.registrations[-0.3].shift_px, (0, 0), atol=0.05)  # derived: no offset
    assert res.verdicts((-0.3, 0.3)) == expected
    summary = res.summary()
    json.dumps(summary)  # JSON-ready
    dom = {d["domain"]: d for d in summary["pairs"][0]["domains"]}
    # Angles are reported in degrees. Error budget (derived): noise 2 s_n / (A0 sqrt N) ~ 0.01 rad;
    # the landscape (std 1) leaks into the lock-in at <= 1 % (choose_sigma), <= 0.02 rad against
    # |A| = 0.5; a neighbouring domain leaks <= 0.6 % at 2.5 sigma, <= 0.02 rad: 0.05 rad in all.
    for d, truth in delta.items():
        err = np.angle(np.exp(1j * (np.radians(dom[d]["delta_phi_deg"]) - np.asarray(truth))))
        assert_allclose(err, 0, atol=0.05)
    assert summary["reference_bias_V"] == -0.3
    assert {d: dom[d]["verdict"]["verdict"] for d in dom} == expected
    assert all(dom[d]["verdict"]["confidence"] > 0.999 for d in dom)
    rows = res.contrast_rows()
    assert len(rows) == 6 and {r["bias_V"] for r in rows} == {-0.3, 0.3}


def test_compare_biases_same_scan_matches_phase_shifts():
    rng = np.random.default_rng(42)
    v1, v2, labels = bias_pair((np.pi, np.pi, np.pi), NOISE, rng)
    res = compare_biases(v1, {-0.3: v1, 0.3: v2}, labels, Q, sigma_nm=SIGMA, pixel_size_nm=PX,
                         register_maps=False)
    from domains._lockin import lossless_step
    from domains.compare import _without_background

    step = lossless_step(SIGMA, (PX, PX))
    flat = [_without_background(v, np.zeros(v.shape, bool), sigma_nm=SIGMA, pixel=(PX, PX), step=step) for v in (v1, v2)]
    direct = phase_shifts(*_lockin_pair(*flat), labels, sigma_nm=SIGMA, pixel_size_nm=PX)
    # derived: with no registration the top level is phase_shifts on the same fields (the maps' background
    # removed the same way), demodulated at every step-th pixel there and at every pixel here, where the
    # lock-in gives the same values up to float32 rounding (relative 6e-8 of each A, about 1e-7 rad)
    for a, b in zip(res.pairs[(-0.3, 0.3)], direct):
        assert_allclose(a.delta_phi_rad, b.delta_phi_rad, rtol=0, atol=1e-6)
        assert a.verdict.verdict == b.verdict.verdict == "inverted"
    assert res.registrations == {-0.3: None, 0.3: None}
    # derived: the contrast rows are those of domain_contrast on the same maps
    assert res.contrast_rows() == domain_contrast({-0.3: v1, 0.3: v2}, labels, Q, sigma_nm=SIGMA,
                                                  pixel_size_nm=PX)


# ----------------------------------------------------------------------------- grids

GRID_E = np.round(np.linspace(-0.5, 0.5, 21), 10)  # 50 mV steps
PEAK_V = {1: -0.12, 2: 0.23}                       # invented peak energies of the two domain types
WIDTH_V = 0.1


def make_grid(rng, n=96):
    region, labels = strip_layout(n, count=2)
    phases = {1: VARIANT_PHASES[1], 2: VARIANT_PHASES[2]}
    slices = []
    for e in GRID_E:
        amp = {d: 1 / (1 + ((e - e0) / WIDTH_V) ** 2) for d, e0 in PEAK_V.items()}  # Lorentzian
        slices.append(2.0 + pattern(region, Q, phases, amp) + 0.2 * rng.normal(size=region.shape))
    return np.stack(slices), labels


class _CountingStore:
    """An array-like that records how much of the grid each read asks for."""

    def __init__(self, array):
        self.array, self.shape, self.dtype, self.ndim = array, array.shape, array.dtype, array.ndim
        self.max_energies, self.reads = 0, 0

    def __getitem__(self, key):
        out = self.array[key]
        if out.size == 0:  # dask's look at the dtype, not a read of data
            return out
        self.reads += 1
        self.max_energies = max(self.max_energies, out.shape[0] if out.ndim == 3 else 1)
        return out


def test_grid_fingerprints_recover_peak_energy_numpy_and_dask():
    rng = np.random.default_rng(51)
    grid, labels = make_grid(rng)
    fp = grid_fingerprints(grid, GRID_E, labels, Q, sigma_nm=SIGMA, pixel_size_nm=PX)
    peaks = {p["domain"]: p for p in fingerprint_peaks(fp)}
    step = GRID_E[1] - GRID_E[0]
    for d, e0 in PEAK_V.items():
        # the brief: within one energy step (derived: the sampled maximum is within half a step)
        assert abs(peaks[d]["peak_energy_V"] - e0) < step
        assert abs(peaks[d]["peak_energy_V_grid"] - e0) <= step / 2 + 1e-9
        # derived: the total amplitude at the peak is sqrt(3) * L(E) for three unit components;
        # noise bias s_n^2/(4 pi sigma_px^2) ~ 1e-4, SE ~ 0.2 sqrt(2/N) ~ 0.005 per component
        lorentz = 1 / (1 + ((GRID_E - e0) / WIDTH_V) ** 2)
        i = list(fp.domains).index(d)
        assert_allclose(fp.amplitude_total[i], np.sqrt(3) * lorentz, atol=0.03)
        # derived: the order keeps its variant phase (arg A = phi_j) wherever it is strong
        # (L >= 1/2): phase SE sqrt(2) s_n / (A0 sqrt N) < 0.01 rad, and the offset 2.0 leaks in at
        # 2.0 exp(-sigma^2 |Q|^2 / 2) = 0.005 against |A| >= 0.25: 0.05 rad in all.
        strong = lorentz >= 0.5
        err = np.angle(np.exp(1j * (fp.phase_rad[i][strong] - np.asarray(VARIANT_PHASES[d]))))
        assert_allclose(err, 0, atol=0.05)
    # dask, a few energies per chunk: the same numbers (the same slices go through the same code)
    store = _CountingStore(grid)
    lazy = da.from_array(store, chunks=(3, 48, 96))
    fp_lazy = grid_fingerprints(lazy, GRID_E, labels, Q, sigma_nm=SIGMA, pixel_size_nm=PX)
    assert_allclose(fp_lazy.amplitude, fp.amplitude, rtol=1e-12)
    assert_allclose(fp_lazy.phase_rad, fp.phase_rad, atol=1e-12)
    # The grid was never read whole: no read spanned more than one chunk of 3 energies,
    # and every chunk was read once (7 energy chunks x 2 row chunks).
    assert store.max_energies == 3 and store.reads == 14
    rows = fp.rows()
    assert len(rows) == 2 * len(GRID_E) and "phase_q1_deg" in rows[0]


# ----------------------------------------------------------------------------- bad input


def test_bad_input_raises_input_error():
    rng = np.random.default_rng(61)
    v1, v2, labels = bias_pair((0, 0, 0), 0.1, rng)
    kw = dict(sigma_nm=SIGMA, pixel_size_nm=PX)
    with pytest.raises(domains.InputError, match=r"map at 0.3 V has shape \(100, 100\)"):
        compare_biases(v1, {-0.3: v1, 0.3: v2[:100, :100]}, labels, Q, **kw)
    with pytest.raises(domains.InputError, match=r"reference_bias = 0.5 V is not among"):
        compare_biases(v1, {-0.3: v1, 0.3: v2}, labels, Q, reference_bias=0.5, **kw)
    with pytest.raises(domains.InputError, match="pixel size"):
        compare_biases(v1, {-0.3: v1, 0.3: domains.Scan(v2, pixel_size_nm=0.2, bias_V=0.3)}, labels, Q, **kw)
    with pytest.raises(domains.InputError, match="bias_V = 0.4 V"):
        compare_biases(v1, {-0.3: v1, 0.3: domains.Scan(v2, pixel_size_nm=PX, bias_V=0.4)}, labels, Q, **kw)
    with pytest.raises(domains.InputError, match="two biases"):
        compare_biases(v1, {-0.3: v1}, labels, Q, **kw)
    with pytest.raises(domains.InputError, match="labels must be integers"):
        compare_biases(v1, {-0.3: v1, 0.3: v2}, labels.astype(float), Q, **kw)
    with pytest.raises(domains.InputError, match=r"0.3 V has shape \(192, 192\), expected \(191, 192\) like the labels"):
        domain_contrast({0.3: v2}, labels[:-1], Q, **kw)
    with pytest.raises(domains.InputError, match="labels shape"):
        compare_biases(v1, {-0.3: v1, 0.3: v2}, labels[:-1], Q, **kw)
    with pytest.raises(domains.InputError, match=r"q must be"):
        domain_contrast({0.3: v2}, labels, [[1.0, 2.0, 3.0]], **kw)
    with pytest.raises(domains.InputError, match="displacement_nm is given for bias 0.1 V"):
        compare_biases(v1, {-0.3: v1, 0.3: v2}, labels, Q, displacement_nm={0.1: np.zeros((2,) + v1.shape)}, **kw)
    with pytest.raises(domains.InputError, match="moving image shape"):
        register(v1, v2[:-2], pixel_size_nm=PX)
    with pytest.raises(domains.InputError, match="non-collinear"):
        register(v1, v2, pixel_size_nm=PX, bragg_q=[[1.0, 0.0], [2.0, 0.0]])
    with pytest.raises(domains.InputError, match="energies_V must hold 3"):
        grid_fingerprints(np.stack([v1, v1, v1]), [0.1, 0.2], labels, Q, **kw)
    with pytest.raises(domains.InputError, match="shift_px"):
        apply_shift(v1, (1.0,))
    with pytest.raises(domains.InputError, match="displacement_nm must have shape"):
        undo_displacement(v1, np.zeros((2, 4, 4)), pixel_size_nm=PX)
    with pytest.raises(domains.InputError, match="se_rad"):
        classify_contrast([0.0, 1.0], [0.1])
    with pytest.raises(domains.InputError, match="component"):
        fingerprint_peaks(grid_fingerprints(np.stack([v1, v2]), [0.1, 0.2], labels, Q, **kw), component=5)
