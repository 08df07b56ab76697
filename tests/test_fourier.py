"""Tests of the Fourier step: spectrum, peak finding, sub-pixel refinement, lattice and superlattice indexing."""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from numpy.testing import assert_allclose

from domains import InputError, Scan
from domains.fourier import (
    Lattice,
    Peak,
    SpectrumResult,
    analyze_spectrum,
    find_peaks,
    format_peak_table,
    index_lattice,
    index_peaks,
    power_spectrum,
    refine_q,
)

# --------------------------------------------------------------------------------------
# Scenes with analytically known truth
# --------------------------------------------------------------------------------------


def _grid(n, dx):
    y, x = np.mgrid[:n, :n] * dx
    return x, y


def _waves(qs, amps, n, dx, phases=None):
    """Sum of cosines a_j cos(q_j . r + phi_j): its Fourier peaks are exactly at +-q_j."""
    x, y = _grid(n, dx)
    phases = np.arange(len(qs)) * 0.7 if phases is None else phases
    return sum(a * np.cos(q[0] * x + q[1] * y + p) for q, a, p in zip(qs, amps, phases))


def _render_atoms(positions_nm, n, dx, sigma_nm, weights=None):
    """Sum of Gaussians exp(-|r - r_i|^2 / 2 s^2), each evaluated on a patch of +-4.5 s.

    The patch is symmetric about each atom's own pixel and the Gaussian is
    evaluated at the exact offsets, so no position is biased by the rendering
    (the truncated tail, exp(-4.5^2 / 2) = 4e-5 of the peak, is symmetric).
    """
    image = np.zeros(n * n)
    half = int(math.ceil(4.5 * sigma_nm / dx))
    off = np.arange(-half, half + 1)
    weights = np.ones(len(positions_nm)) if weights is None else np.asarray(weights, float)
    for start in range(0, len(positions_nm), 4000):
        pos = positions_nm[start:start + 4000]
        w = weights[start:start + 4000]
        col0 = np.rint(pos[:, 0] / dx).astype(int)
        row0 = np.rint(pos[:, 1] / dx).astype(int)
        rows = row0[:, None, None] + off[None, :, None]
        cols = col0[:, None, None] + off[None, None, :]
        val = w[:, None, None] * np.exp(
            -((cols * dx - pos[:, 0, None, None]) ** 2 + (rows * dx - pos[:, 1, None, None]) ** 2)
            / (2 * sigma_nm**2)
        )
        inside = (rows >= 0) & (rows < n) & (cols >= 0) & (cols < n)
        idx = (rows * n + cols)[inside]
        image += np.bincount(idx, weights=val[inside], minlength=n * n)
    return image.reshape(n, n)


def _ase_positions(atoms, n, dx, angle_deg, keep_symbol=None):
    """In-plane positions (nm) of an ASE slab repeated over the frame and rotated by angle_deg."""
    cell = atoms.cell[:2, :2] / 10.0  # Angstrom -> nm
    frame = n * dx
    reps = int(math.ceil(1.6 * frame / min(np.hypot(*cell[0]), np.hypot(*cell[1])))) + 2
    big = atoms.repeat((reps, reps, 1))
    pos = big.positions[:, :2] / 10.0
    if keep_symbol is not None:
        pos = pos[np.array(big.get_chemical_symbols()) == keep_symbol]
    centre = 0.5 * (cell[0] + cell[1]) * reps
    t = math.radians(angle_deg)
    rot = np.array([[math.cos(t), -math.sin(t)], [math.sin(t), math.cos(t)]])
    pos = (pos - centre) @ rot.T + frame / 2
    margin = 0.5
    keep = np.all((pos > -margin) & (pos < frame + margin), axis=1)
    return pos[keep]


# --------------------------------------------------------------------------------------
# Power spectrum
# --------------------------------------------------------------------------------------


def test_power_spectrum_normalisation_axes_and_plane():
    n, dx = 64, 0.1
    x, y = _grid(n, dx)
    a0 = 1.7
    q = 2 * np.pi * np.array([8, 5]) / (n * dx)
    image = a0 * np.cos(q[0] * x + q[1] * y + 0.4) + 3.0 + 0.8 * x - 0.5 * y
    power, qx, qy = power_spectrum(image, pixel_size_nm=dx)
    # Axes against numpy's own FFT frequencies (reference library: numpy).
    assert_allclose(qx, 2 * np.pi * np.fft.fftshift(np.fft.fftfreq(n, dx)), rtol=0, atol=1e-12)
    assert_allclose(qy, qx, rtol=0, atol=1e-12)
    row, col = np.unravel_index(np.argmax(power), power.shape)
    assert_allclose([abs(qx[col]), abs(qy[row])], np.abs(q), atol=1e-9)
    # Derived: a cosine of amplitude A0 on a bin gives (A0/2)^2 with the window normalised by its sum.
    assert_allclose(power[row, col], (a0 / 2) ** 2, rtol=1e-9)
    # Derived: the plane is removed exactly, so nothing but the wave and its window lobes remain;
    # beyond the Hann main lobe (1 bin) of the two peaks the spectrum is at rounding level.
    far = np.ones_like(power, bool)
    for s in (1, -1):
        r0 = n // 2 + s * int(round(q[1] * n * dx / (2 * np.pi)))
        c0 = n // 2 + s * int(round(q[0] * n * dx / (2 * np.pi)))
        far[r0 - 1:r0 + 2, c0 - 1:c0 + 2] = False
    assert power[far].max() < 1e-20


def test_power_spectrum_mask_and_nan_fill():
    n, dx = 64, 0.1
    x, y = _grid(n, dx)
    q = 2 * np.pi * np.array([8, 0]) / (n * dx)
    image = np.cos(q[0] * x + q[1] * y) + 5.0
    image[10:14, 20:30] = np.nan
    mask = np.zeros(image.shape, bool)
    mask[40:44, :] = True
    power, qx, qy = power_spectrum(image, pixel_size_nm=dx, mask=mask)
    assert np.all(np.isfinite(power))
    row, col = np.unravel_index(np.argmax(power), power.shape)
    # The peak stays at the wave's bin (derived: holes only blur it).
    assert_allclose(abs(qx[col]), q[0], atol=1e-9)


# --------------------------------------------------------------------------------------
# Lattice constants of ASE-built lattices
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "builder, a_nm, n, px_per_a, symbol",
    [
        ("graphene", 0.246, 1024, 7.0, None),
        ("mx2", 0.316, 768, 8.0, "Mo"),
    ],
)
def test_lattice_constant_and_orientation_of_ase_lattices(builder, a_nm, n, px_per_a, symbol):
    ase_build = pytest.importorskip("ase.build")
    if builder == "graphene":
        atoms = ase_build.graphene(a=a_nm * 10)
    else:
        atoms = ase_build.mx2(formula="MoS2", a=a_nm * 10)
    dx = a_nm / px_per_a
    angle = 7.3
    pos = _ase_positions(atoms, n, dx, angle, keep_symbol=symbol)
    # Broad atoms (s = 0.22 a) keep the (1, 1) harmonics of the honeycomb weaker than the Bragg peaks.
    image = _render_atoms(pos, n, dx, 0.22 * a_nm)
    image += 0.2 * np.random.default_rng(11).standard_normal(image.shape)
    result = analyze_spectrum(image, pixel_size_nm=dx)
    lat = result.lattice
    assert lat is not None and lat.kind == "hexagonal"
    # Reference: the lattice constant ASE built the slab with.
    assert_allclose(lat.a_nm, a_nm, rtol=2e-4)
    # Reference: ASE's a1 = (a, 0) rotated by the imposed angle (hexagonal, so modulo 60 degrees).
    assert abs(lat.angle_deg - angle) < 0.01
    # Derived: a hexagonal lattice of constant a has |G| = 4 pi / (sqrt(3) a).
    assert_allclose(np.hypot(*lat.bragg.T), 4 * np.pi / (np.sqrt(3) * a_nm), rtol=2e-4)
    assert_allclose(lat.bragg.sum(axis=0), 0.0, atol=1e-9)
    # The reported uncertainty is consistent with the actual error (within 4 sigma).
    assert abs(lat.a_nm - a_nm) < 4 * lat.a_err_nm + 1e-7


# --------------------------------------------------------------------------------------
# Superlattice indexing
# --------------------------------------------------------------------------------------

HEX = Lattice.from_params("hexagonal", 0.35, 7.3)
N_CDW, DX_CDW = 256, 0.04


def _cdw_image(extra_q, amp=0.3, noise=0.5, seed=1):
    qs = np.concatenate([HEX.bragg, extra_q])
    image = _waves(qs, [1.0] * 3 + [amp] * len(extra_q), N_CDW, DX_CDW)
    return image + noise * np.random.default_rng(seed).standard_normal(image.shape)


@pytest.mark.parametrize("n", [3, 2])
def test_commensurate_nxn_cdw(n):
    result = analyze_spectrum(_cdw_image(HEX.bragg / n), pixel_size_nm=DX_CDW)
    sup = result.superlattice
    assert result.lattice.kind == "hexagonal"
    # Derived: Q_j = G_j / n is the n x n order (docs/methods.md §5).
    assert sup.order == f"{n}x{n}" and sup.commensurate and sup.n_sites == n * n
    assert_allclose(sup.q, result.lattice.bragg / n, atol=1e-12)
    roles = [p.role for p in result.peaks]
    assert roles.count("bragg") == 3 and roles.count("superlattice") == 3
    # The superlattice peaks found sit at G_j / n of the imposed lattice (derived), within
    # 4 times their reported uncertainty.
    for p in result.peaks:
        if p.role == "superlattice":
            d = min(np.min(np.hypot(*(HEX.bragg / n - p.q).T)), np.min(np.hypot(*(HEX.bragg / n + p.q).T)))
            assert d < 4 * p.q_err
            assert {f.denominator for f in p.fraction} <= {1, n}


def test_incommensurate_modulation():
    delta = 0.05
    result = analyze_spectrum(_cdw_image(HEX.bragg * (1 - delta) / 3), pixel_size_nm=DX_CDW)
    sup = result.superlattice
    # Derived: q = (1 - delta) G / 3 is 0.0167 |G| away from G / 3, many uncertainties.
    assert sup.order == "incommensurate" and not sup.commensurate
    assert len(sup.q) == 3
    # delta is recovered within 4 sigma of the q uncertainty (derived: d(delta) = 3 q_err / |G|).
    g = np.hypot(*HEX.bragg[0])
    for d, e in zip(sup.delta, sup.q_err):
        assert abs(d - delta) < 4 * 3 * e / g + 1e-4


def test_sqrt3_superlattice():
    b = HEX.b
    k_points = np.array([(2 * b[0] + b[1]) / 3, (b[1] - b[0]) / 3, -(b[0] + 2 * b[1]) / 3])
    result = analyze_spectrum(_cdw_image(k_points), pixel_size_nm=DX_CDW)
    sup = result.superlattice
    # Derived: the K points (2/3, 1/3) of the reciprocal basis at 120 degrees make a
    # sqrt3 x sqrt3 R30 cell of 3 sites ((1/3, 1/3) in a basis at 60 degrees).
    assert sup.order == "sqrt3xsqrt3R30" and sup.n_sites == 3
    expected = {(Fraction(2, 3), Fraction(1, 3)), (Fraction(-1, 3), Fraction(1, 3)), (Fraction(1, 3), Fraction(2, 3))}
    found = set()
    for p in result.peaks:
        if p.role == "superlattice":
            fr = p.fraction
            found.add(fr if (fr in expected) else (-fr[0], -fr[1]))
    assert found == expected
    assert_allclose(np.sum(sup.q, axis=0), 0.0, atol=1e-9)


def test_stripes_on_a_square_lattice_in_two_orientations():
    sq = Lattice.from_params("square", 0.4, 0.0)
    n, dx = 256, 0.05
    x, y = _grid(n, dx)
    lattice = _waves(sq.bragg, [1.0, 1.0], n, dx)
    qx, qy = sq.bragg[0] / 4, sq.bragg[1] / 4
    # Two domains split by a wall of finite width (0.5 nm) at mid-frame.
    left = 0.5 * (1 - np.tanh((x - n * dx / 2) / 0.5))
    stripes = left * np.cos(qy[0] * x + qy[1] * y) + (1 - left) * np.cos(qx[0] * x + qx[1] * y)
    image = lattice + 0.5 * stripes + 0.3 * np.random.default_rng(4).standard_normal((n, n))
    result = analyze_spectrum(image, pixel_size_nm=dx)
    assert result.lattice.kind == "square"
    # Reference: the imposed square lattice constant (the Bragg peaks lie on the axes here).
    assert_allclose(result.lattice.a_nm, 0.4, rtol=1e-3)
    fracs = {p.fraction for p in result.peaks if p.role == "superlattice"}
    # Derived: stripes of period 4a along x and along y give (1/4, 0) and (0, 1/4).
    assert {(Fraction(1, 4), Fraction(0)), (Fraction(0), Fraction(1, 4))} <= fracs
    assert result.superlattice.order == "4x4"


# --------------------------------------------------------------------------------------
# Moire candidates
# --------------------------------------------------------------------------------------


def test_moire_candidates_of_two_rotated_lattices():
    a, twist = 0.246, 4.0
    n, dx = 512, 0.041
    x, y = _grid(n, dx)
    l1 = Lattice.from_params("hexagonal", a, 10.0)
    l2 = Lattice.from_params("hexagonal", a, 10.0 + twist)
    layer1 = _waves(l1.bragg, [1, 1, 1], n, dx, phases=[0, 0, 0])
    layer2 = _waves(l2.bragg, [1, 1, 1], n, dx, phases=[1, 1, 1])
    # The tunnelling current depends exponentially on the combined corrugation; this
    # nonlinearity makes the difference (moire) wavevectors appear.
    image = np.exp(0.4 * (layer1 + 0.7 * layer2)) + 0.3 * np.random.default_rng(3).standard_normal((n, n))
    result = analyze_spectrum(image, pixel_size_nm=dx)
    assert_allclose(result.lattice.a_nm, a, rtol=1e-3)
    assert abs(result.lattice.angle_deg - 10.0) < 0.05
    moire = [p for p in result.peaks if p.role == "moire"]
    assert len(moire) >= 3
    # Hermann, J. Phys.: Condens. Matter 24, 314210 (2012): lambda = a / (2 sin(theta / 2));
    # a hexagonal moire of period lambda has |k| = 4 pi / (sqrt(3) lambda) (docs/methods.md §4).
    lam = a / (2 * math.sin(math.radians(twist) / 2))
    k_expected = 4 * math.pi / (math.sqrt(3) * lam)
    fundamental = sorted(moire, key=lambda p: p.q_abs_rad_per_nm)[:3]
    for p in fundamental:
        assert abs(p.q_abs_rad_per_nm - k_expected) < 4 * p.q_err
    # Derived: k = G1 - G1' is the difference of the two layers' Bragg vectors.
    diffs = np.concatenate([l1.bragg - l2.bragg, l2.bragg - l1.bragg])
    for p in fundamental:
        assert np.min(np.hypot(*(diffs - p.q).T)) < 4 * p.q_err
    second = [p for p in result.peaks if p.role == "second_lattice"]
    assert len(second) == 3
    assert_allclose(result.moire_q[:3], np.array([p.q for p in fundamental]))


# --------------------------------------------------------------------------------------
# Sub-pixel refinement
# --------------------------------------------------------------------------------------


def test_grandke_interpolation_of_an_off_bin_tone():
    n, dx = 128, 1.0
    frac = np.array([20.3, 7.8])
    q = 2 * np.pi * frac / n
    x, y = _grid(n, dx)
    peaks = find_peaks(np.cos(q[0] * x + q[1] * y), pixel_size_nm=dx, refine="interpolate")
    assert len(peaks) == 1
    # Grandke (1983): the three-bin Hann formula is exact for one complex tone; the mirror
    # tone 2 x 20 bins away perturbs it at the 1e-3 bin level (derived from the Hann kernel).
    assert_allclose(peaks[0].q * n / (2 * np.pi), frac, atol=0.01)
    # Derived: the scalloping-corrected amplitude of a unit cosine is 1.
    assert_allclose(peaks[0].amplitude, 1.0, rtol=0.01)


def test_refinement_reaches_the_cramer_rao_bound():
    n, dx = 128, 1.0
    x, y = _grid(n, dx)
    q_true = 2 * np.pi * np.array([20.3, 7.6]) / n
    amp, noise = 1.0, 1.0
    rng = np.random.default_rng(2024)
    errors, reported = [], []
    for _ in range(30):
        image = amp * np.cos(q_true[0] * x + q_true[1] * y + rng.uniform(0, 2 * np.pi))
        image = image + noise * rng.standard_normal((n, n))
        start = q_true + rng.uniform(-0.5, 0.5, 2) * 2 * np.pi / n  # within half a bin
        q, err = refine_q(image, start, pixel_size_nm=dx)
        errors.append(q - q_true)
        reported.append(err)
    errors = np.array(errors)
    rms = math.sqrt(np.mean(errors**2))
    # Rife & Boorstyn, IEEE Trans. Inf. Theory 20, 591 (1974): var >= 12 / (eta N (N^2 - 1))
    # per 1-D tone, eta = A^2 / (2 sigma_n^2); derived for N rows of N samples each:
    # var(qx) >= 12 / (eta N^2 (N^2 - 1)) (the Fisher information adds over rows).
    eta = amp**2 / (2 * noise**2)
    crb = math.sqrt(12 / (eta * n * n * (n * n - 1)))
    assert rms < 2 * crb
    # The reported one-sigma uncertainty agrees with the observed scatter within a factor 2.
    ratio = np.mean(reported) / rms
    assert 0.5 < ratio < 2.0


def test_refine_q_with_a_mask_and_pixel_pair():
    n = 128
    dy, dx = 0.05, 0.04
    rows, cols = np.mgrid[:n, :n]
    q_true = np.array([13.7, -6.1])
    image = np.cos(q_true[0] * cols * dx + q_true[1] * rows * dy)
    mask = np.zeros((n, n), bool)
    mask[50:70, 40:90] = True
    image[mask] = 1e3  # garbage under the mask must be ignored
    q, err = refine_q(image, q_true * 1.01, pixel_size_nm=(dy, dx), mask=mask)
    # Derived: for a noiseless tone the only error is leakage of q = 0 and -q into the
    # lock-in, at most exp(-3.72^2 / 2) = 0.1 % (the default sigma) of a mean left below
    # 1 % of A0 by the levelling: a phase ripple under 1e-5 rad, so |dq| / |q| < 1e-5.
    assert_allclose(q, q_true, rtol=1e-5)
    assert err < 1e-5 * np.hypot(*q_true)


# --------------------------------------------------------------------------------------
# Scan-line artefacts, empty scenes
# --------------------------------------------------------------------------------------


def test_scan_line_offsets_give_no_false_peaks():
    n, dx = 256, 0.04
    rng = np.random.default_rng(5)
    sq = Lattice.from_params("square", 0.3, 0.0)  # Bragg peaks on both axes
    image = _waves(sq.bragg, [1.0, 1.0], n, dx) + 0.5 * rng.standard_normal((n, n))
    image = image + 1.0 * rng.standard_normal((n, 1))  # a random offset per scan line
    peaks = find_peaks(image, pixel_size_nm=dx)
    # Derived: the only true peaks are the two Bragg vectors and their harmonic (1, 1) is absent
    # in a sum of cosines; every peak reported must be one of them.
    assert len(peaks) == 2
    for p in peaks:
        assert min(np.hypot(*(sq.bragg - p.q).T).min(), np.hypot(*(sq.bragg + p.q).T).min()) < 0.05
    # A streak alone (per-line offsets, per-column offsets and white noise) gives nothing.
    streak = 3 * rng.standard_normal((n, 1)) + rng.standard_normal((1, n)) + 0.5 * rng.standard_normal((n, n))
    assert find_peaks(streak, pixel_size_nm=dx) == []


def test_pure_noise_has_no_peaks_at_the_false_alarm_rate():
    # Derived: with a 1 % false-alarm level per image, 20 noise images give at most a few.
    found = sum(len(find_peaks(np.random.default_rng(s).standard_normal((96, 96)), pixel_size_nm=0.1))
                for s in range(20))
    assert found <= 2


def test_scene_without_atoms_lists_peaks_without_a_lattice():
    n, dx = 256, 0.05
    big = Lattice.from_params("hexagonal", 2.5, 5.0)  # a 2.5 nm superstructure, no atoms
    image = _waves(big.bragg, [1, 1, 1], n, dx) + 0.3 * np.random.default_rng(6).standard_normal((n, n))
    result = analyze_spectrum(image, pixel_size_nm=dx)
    assert result.lattice is None and result.superlattice is None
    assert len(result.peaks) == 3
    assert {p.role for p in result.peaks} == {"unindexed"}
    # Derived: |G| = 4 pi / (sqrt(3) a) for the imposed hexagonal pattern.
    g = 4 * np.pi / (np.sqrt(3) * 2.5)
    assert_allclose([p.q_abs_rad_per_nm for p in result.peaks], g, rtol=0.01)
    text = format_peak_table(result)
    assert "lattice: none found" in text


# --------------------------------------------------------------------------------------
# Indexing without images, overrides, tables
# --------------------------------------------------------------------------------------


def test_index_lattice_prefers_bragg_over_cdw_and_harmonics():
    lat = Lattice.from_params("hexagonal", 0.3, 12.0)
    g = lat.bragg
    harm = np.array([g[0] - g[1], g[1] - g[2], g[2] - g[0]])  # (1, 1)-type, |q| = sqrt(3) |G|
    peaks = ([Peak(v, 1e-4, power=1.0) for v in g] + [Peak(v / 3, 1e-4, power=0.5) for v in g]
             + [Peak(v, 1e-4, power=0.05) for v in harm])
    found = index_lattice(peaks)
    # Derived: the Bragg set (not the CDW set G/3, not the harmonics) sets a.
    assert found.kind == "hexagonal"
    assert_allclose(found.a_nm, 0.3, rtol=1e-9)
    assert_allclose(found.angle_deg, 12.0, atol=1e-9)
    roles = [p.role for p in index_peaks(peaks, found)]
    assert roles == ["bragg"] * 3 + ["superlattice"] * 3 + ["harmonic"] * 3


def test_square_and_oblique_lattices_from_peaks():
    sq = Lattice.from_params("square", 0.5, 20.0)
    found = index_lattice(sq.bragg)
    assert found.kind == "square"
    assert_allclose([found.a_nm, found.angle_deg], [0.5, 20.0], atol=1e-9)  # derived: 2 pi / |G|
    ob = Lattice.from_params("oblique", 0.4, 10.0, a2_nm=0.55, gamma_deg=75.0)
    qs = np.array([ob.b[0], ob.b[1], ob.b[0] + ob.b[1]])
    found = index_lattice(qs)
    assert found.kind == "oblique"
    # Derived: the real basis is recovered up to the lattice's own symmetry (lengths).
    assert_allclose(sorted([found.a_nm, found.a2_nm]), [0.4, 0.55], rtol=1e-9)


def test_manual_overrides():
    image = _cdw_image(HEX.bragg / 3)
    qs = np.concatenate([HEX.bragg, HEX.bragg / 3])
    result = analyze_spectrum(image, pixel_size_nm=DX_CDW, q=qs)
    # The given wavevectors are used as given (canonical half-plane), no detection.
    assert len(result.peaks) == 6
    got = np.array(sorted(p.q.tolist() for p in result.peaks))
    canon = np.array([v if (v[1] > 0 or (v[1] == 0 and v[0] > 0)) else -v for v in qs])
    assert_allclose(got, np.array(sorted(canon.tolist())), atol=1e-12)
    assert result.superlattice.order == "3x3"
    forced = analyze_spectrum(image, pixel_size_nm=DX_CDW, lattice={"kind": "hexagonal", "a_nm": 0.35,
                                                                     "angle_deg": 7.3}, superlattice="sqrt3xsqrt3R30")
    assert forced.superlattice.order == "sqrt3xsqrt3R30"
    # Derived: the K points are |G| / sqrt(3) long.
    assert_allclose(np.hypot(*forced.superlattice.q.T), np.hypot(*HEX.bragg[0]) / np.sqrt(3), rtol=1e-12)
    assert_allclose(forced.lattice.bragg, HEX.bragg, atol=1e-12)


def test_rows_json_and_table():
    result = analyze_spectrum(_cdw_image(HEX.bragg / 3), pixel_size_nm=DX_CDW)
    rows = result.rows()
    assert len(rows) == len(result.peaks)
    for row, p in zip(rows, result.peaks):
        # Derived: period = 2 pi / |q|.
        assert_allclose(row["period_nm"], 2 * np.pi / row["q_abs_rad_per_nm"], rtol=1e-12)
        assert row["role"] == p.role
    import json

    text = json.dumps(result.to_dict())
    assert '"order": "3x3"' in text
    table = format_peak_table(result)
    assert "superlattice: 3x3" in table and table.count("bragg") == 3


def test_scan_and_dask_inputs_agree_with_arrays():
    da = pytest.importorskip("dask.array")
    image = _cdw_image(HEX.bragg / 3)
    ref = find_peaks(image, pixel_size_nm=DX_CDW)
    lazy = find_peaks(da.from_array(image, chunks=64), pixel_size_nm=DX_CDW)
    scan = find_peaks(Scan(image, pixel_size_nm=DX_CDW), pixel_size_nm=None)
    for other in (lazy, scan):
        assert_allclose([p.q for p in other], [p.q for p in ref], rtol=0, atol=0)
    image_before = image.copy()
    analyze_spectrum(image, pixel_size_nm=DX_CDW)
    assert np.array_equal(image, image_before)  # inputs are never modified


# --------------------------------------------------------------------------------------
# Bad input
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: find_peaks(np.zeros((0, 0)), pixel_size_nm=0.1), "at least 8 x 8"),
        (lambda: find_peaks(np.zeros(64), pixel_size_nm=0.1), "2-D image"),
        (lambda: power_spectrum(np.zeros((4, 32, 32)), pixel_size_nm=0.1), "2-D image"),
        (lambda: find_peaks(np.zeros((32, 32)), pixel_size_nm=-0.1), "pixel_size_nm"),
        (lambda: find_peaks(np.full((32, 32), np.nan), pixel_size_nm=0.1), "valid"),
        (lambda: find_peaks(np.zeros((32, 32), complex), pixel_size_nm=0.1), "real-valued"),
        (lambda: analyze_spectrum(np.zeros((32, 32)), pixel_size_nm=0.1, q=[[40.0, 0.0]]), "Nyquist"),
        (lambda: analyze_spectrum(np.zeros((32, 32)), pixel_size_nm=0.1, q=[1.0, 2.0, 3.0]), "q must be"),
        (lambda: refine_q(np.zeros((32, 32)), [0.0, 50.0], pixel_size_nm=0.1), "Nyquist"),
        (lambda: analyze_spectrum(np.zeros((32, 32)), pixel_size_nm=0.1, lattice={"a_nm": 0.3}), "kind"),
        (lambda: analyze_spectrum(np.zeros((32, 32)), pixel_size_nm=0.1,
                                  lattice={"kind": "hexagonal", "a_nm": 0.3}, superlattice="7y7"), "superlattice"),
        (lambda: analyze_spectrum(np.zeros((32, 32)), pixel_size_nm=0.1, superlattice="3x3"), "needs a lattice"),
        (lambda: find_peaks(np.zeros((32, 32)), pixel_size_nm=0.1, mask=np.zeros((8, 8), bool)), "mask shape"),
        (lambda: index_lattice([Peak([1.0, 0.0], 0.0)], kind="cubic"), "kind"),
    ],
)
def test_bad_arguments_raise_input_error(call, match):
    with pytest.raises(InputError, match=match):
        call()


def test_format_peak_table_rejects_other_objects():
    with pytest.raises(InputError, match="SpectrumResult"):
        format_peak_table([1, 2, 3])
    assert isinstance(SpectrumResult([], None, None, np.zeros((0, 2)), (0.1, 0.1), (8, 8)).rows(), list)


def test_single_direction_superlattice_is_n_by_1():
    # Derived: one modulation Q = b1 / 3 multiplies the cell along one lattice direction only.
    image = _cdw_image(HEX.bragg[:1] / 3)
    qs = np.concatenate([HEX.bragg, HEX.bragg[:1] / 3])
    result = analyze_spectrum(image, pixel_size_nm=DX_CDW, q=qs)
    assert result.superlattice.order == "3x1" and result.superlattice.n_sites == 3
    q = result.superlattice.q[0]
    q = q if q @ HEX.bragg[0] > 0 else -q  # a wavevector is defined up to its sign
    assert_allclose(q, HEX.bragg[0] / 3, atol=1e-12)
