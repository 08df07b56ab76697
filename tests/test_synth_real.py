"""Hostile synthetic scenes carry the truth they claim: each check against an outside or derived truth."""

import json
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import ndimage

from domains._errors import InputError
from domains.synth import (REAL_SCENES, Conditions, bilayer_scene, incommensurate_cdw_scene, real_scene,
                           scan_displacement, supercell_cdw_scene, supercell_geometry)

SQRT13 = ((4, -1), (1, 3))
SQRT7 = ((3, -1), (1, 2))
SQRT3 = ((2, -1), (1, 1))
THREE = ((3, 0), (0, 3))
STRIPE = ((2, 0), (0, 1))


def hex_basis(a, angle_deg=0.0):
    """Rows a1, a2 of a hexagonal lattice, written out here (not taken from the package)."""
    t = math.radians(angle_deg)
    return a * np.array([[math.cos(t), math.sin(t)], [math.cos(t + math.pi / 3), math.sin(t + math.pi / 3)]])


def fft_peaks(image, pixel_size, count, q_min=0.0):
    """The ``count`` largest local maxima of the Hann-windowed power spectrum in the half plane qy > 0
    (or qy = 0, qx > 0), beyond |q| > q_min; returns their wavevectors (rad/nm) and the bin sizes."""
    ny, nx = image.shape
    dy, dx = pixel_size
    window = np.outer(np.hanning(ny), np.hanning(nx))
    power = np.abs(np.fft.fftshift(np.fft.fft2((image - image.mean()) * window))) ** 2
    qy = np.fft.fftshift(np.fft.fftfreq(ny, dy)) * 2 * np.pi
    qx = np.fft.fftshift(np.fft.fftfreq(nx, dx)) * 2 * np.pi
    QX, QY = np.meshgrid(qx, qy)
    half = (QY > 0) | ((QY == 0) & (QX > 0))
    is_max = power == ndimage.maximum_filter(power, size=3)
    ok = half & is_max & (np.hypot(QX, QY) > q_min)
    idx = np.argsort(power[ok])[::-1][:count]
    q = np.stack([QX[ok][idx], QY[ok][idx]], 1)
    return q, np.array([2 * np.pi / (nx * dx), 2 * np.pi / (ny * dy)])


def within_bin(q, targets, bins):
    """True if q matches one of ±targets within one FFT bin along each axis."""
    t = np.vstack([targets, -np.asarray(targets)])
    return bool(np.any(np.all(np.abs(t - q) <= bins * 1.0001, axis=1)))


def peak_amplitude(image, pixel_size, q):
    """Amplitude of the cosine of wavevector q: sqrt of the Hann-windowed power summed over ±3 bins,
    normalised so that a pure A cos(q.r) gives A (derived: Parseval for a windowed tone)."""
    ny, nx = image.shape
    dy, dx = pixel_size
    window = np.outer(np.hanning(ny), np.hanning(nx))
    spec = np.fft.fft2(image * window)
    iy = int(round(q[1] * ny * dy / (2 * np.pi))) % ny
    ix = int(round(q[0] * nx * dx / (2 * np.pi))) % nx
    rows = np.arange(iy - 3, iy + 4) % ny
    cols = np.arange(ix - 3, ix + 4) % nx
    energy = np.sum(np.abs(spec[np.ix_(rows, cols)]) ** 2)
    # A cos gives |F|^2 summed over one peak = (A/2)^2 * sum(w^2) * N (Parseval over the window).
    return 2 * math.sqrt(energy / (np.sum(window**2) * nx * ny))


# --------------------------------------------------------------------------- supercell geometry


@pytest.mark.parametrize("M, hk", [(SQRT13, (3, 1)), (SQRT7, (2, 1)), (SQRT3, (1, 1))])
def test_root_n_rotation_matches_the_hexagonal_formula(M, hk):
    h, k = hk
    expected = math.degrees(math.atan(math.sqrt(3) * k / (2 * h + k)))  # derived: docs/methods.md §8, atan(√3k/(2h+k))
    geom = supercell_geometry(M, 0.336, 5.0)
    assert abs(abs(geom["rotation_deg"]) - expected) < 1e-9  # derived, exact geometry
    assert geom["det"] == h * h + h * k + k * k  # derived: N = h² + hk + k²
    mirror = supercell_geometry(np.array(M) @ [[1, 0], [1, -1]], 0.336, 5.0)
    if expected < 29.9:  # √13, √7 (√3 is 30 degrees)
        # derived: the mirror image is rotated by -θ, a distinct superlattice with other Q vectors
        assert abs(mirror["rotation_deg"] + geom["rotation_deg"]) < 1e-9
        assert geom["chirality"] == -mirror["chirality"] != 0
        q, qm = np.array(geom["q_cdw_rad_per_nm"]), np.array(mirror["q_cdw_rad_per_nm"])
        assert min(np.hypot(*(qm[:, None] - s * q[None]).T).min() for s in (1, -1)) > 0.1
    else:
        assert geom["chirality"] == 0  # derived: √3 R30° is its own mirror image


@pytest.mark.parametrize("M", [SQRT13, SQRT7, SQRT3, THREE, STRIPE, ((2, 0), (0, 2))])
def test_det_m_equals_the_number_of_distinct_variant_phase_sets(M):
    a = 0.336
    geom = supercell_geometry(M, a, 3.0)
    det = round(abs(np.linalg.det(np.array(M, float))))
    q = np.array(geom["q_cdw_rad_per_nm"])
    A = hex_basis(a, 3.0)
    # derived (docs/methods.md §8): translations R shift the phases by -Q.R; the distinct sets over all R
    # are the translational variants, |det M| of them.
    sets = set()
    for m1 in range(-9, 10):
        for m2 in range(-9, 10):
            p = np.mod(-(q @ (np.array([m1, m2]) @ A)), 2 * np.pi)
            sets.add(tuple(np.round(np.mod(p + 1e-6, 2 * np.pi) - 1e-6, 5)))
    assert len(sets) == det  # derived
    assert len(geom["variants"]) == det  # derived
    # the truth's variants are pairwise distinct modulo the superlattice: (m - m') M^-1 not integer
    Minv = np.linalg.inv(np.array(M, float))
    v = np.array(geom["variants"])
    for i in range(len(v)):
        for j in range(i):
            c = (v[i] - v[j]) @ Minv
            assert not np.allclose(c, np.round(c))  # derived


@pytest.mark.parametrize("M, n_root", [(SQRT13, 13), (SQRT7, 7), (SQRT3, 3)])
def test_root_n_cdw_wavevectors_are_the_bragg_length_over_root_n(M, n_root):
    a = 0.336
    g = 4 * math.pi / (math.sqrt(3) * a)  # derived: hexagonal Bragg length
    q = np.array(supercell_geometry(M, a)["q_cdw_rad_per_nm"])
    assert q.shape == (3, 2)  # triple q
    assert_allclose(np.hypot(*q.T), g / math.sqrt(n_root), rtol=1e-12)  # derived: hexagonal superlattice √N a
    assert_allclose(q.sum(axis=0), 0, atol=1e-9)  # derived: three at 120 degrees sum to zero


def test_n_by_n_and_stripe_wavevectors():
    a = 0.336
    geom = supercell_geometry(THREE, a, 10.0)
    bragg = np.array(geom["q_bragg_rad_per_nm"])
    q = np.array(geom["q_cdw_rad_per_nm"])
    for qq in q:  # derived: n x n has Q_j = ±G_j / n
        assert min(np.hypot(*(bragg / 3 - s * qq).T).min() for s in (1, -1)) < 1e-9
    stripe = np.array(supercell_geometry(STRIPE, a, 10.0)["q_cdw_rad_per_nm"])
    assert stripe.shape == (1, 2)  # derived: 2 x 1 is unidirectional, b1/2 the only non-Bragg shortest vector
    assert min(np.hypot(*(bragg / 2 - s * stripe[0]).T).min() for s in (1, -1)) < 1e-9


# --------------------------------------------------------------------------- rendered supercell scenes


@pytest.mark.parametrize("ratio", [0.5, 1.0, 3.0])
def test_clean_supercell_fft_peaks_sit_at_the_truth_with_the_amplitude_ratio(ratio):
    ps = (0.05, 0.05)
    scene = supercell_cdw_scene(shape=(384, 384), pixel_size_nm=ps, supercell=SQRT13, n_domains=1,
                                cdw_to_lattice=ratio, biases_V=(), rng=2)
    img = scene.topography.data
    q_cdw = np.array(scene.truth["q_cdw_rad_per_nm"])
    bragg = np.array(scene.truth["lattice"]["q_bragg_rad_per_nm"])
    peaks, bins = fft_peaks(img, ps, 6)
    strongest = q_cdw if ratio > 1 else bragg
    if ratio != 1.0:
        # derived: the three largest half-plane peaks are the stronger triplet, each within one bin
        assert all(within_bin(p, strongest, bins) for p in peaks[:3])
    # derived: all six largest are the CDW and Bragg peaks
    assert all(within_bin(p, np.vstack([q_cdw, bragg]), bins) for p in peaks)
    # derived (Parseval, windowed tone): CDW / atomic amplitudes equal the ratio; 5 % for window leakage
    amp_cdw = np.mean([peak_amplitude(img, ps, q) for q in q_cdw])
    amp_lat = np.mean([peak_amplitude(img, ps, g) for g in bragg])
    assert abs(amp_cdw / amp_lat - ratio) < 0.05 * ratio
    assert abs(amp_lat - scene.truth["lattice_nm"]) < 0.05 * scene.truth["lattice_nm"]


def test_rectangular_frame_and_non_square_pixels_keep_x_along_columns():
    ps = (0.055, 0.045)  # (dy, dx)
    scene = supercell_cdw_scene(shape=(320, 400), pixel_size_nm=ps, supercell=SQRT7, n_domains=1, cdw_to_lattice=2.0,
                                angle_deg=17.0, biases_V=(), rng=4)
    q_cdw = np.array(scene.truth["q_cdw_rad_per_nm"])
    peaks, bins = fft_peaks(scene.topography.data, ps, 3)
    # derived: x = col * dx, y = row * dy, so the FFT bins are 2π/(nx dx) along qx and 2π/(ny dy) along qy
    assert all(within_bin(p, q_cdw, bins) for p in peaks)
    assert_allclose(bins, [2 * np.pi / (400 * 0.045), 2 * np.pi / (320 * 0.055)])


def test_cdw_contrast_inverts_between_the_two_biases():
    ps = (0.05, 0.05)
    scene = supercell_cdw_scene(shape=(256, 256), pixel_size_nm=ps, supercell=THREE, n_domains=1, rng=2)
    y, x = np.mgrid[:256, :256] * 0.05
    w = np.outer(np.hanning(256), np.hanning(256))
    for q in np.array(scene.truth["q_cdw_rad_per_nm"]):
        a, b = (np.sum(w * m.data * np.exp(-1j * (q[0] * x + q[1] * y))) for m in scene.maps)
        # Carpinelli et al., Nature 381, 398 (1996): filled and empty states complementary; the truth says π
        assert abs(abs(np.angle(a * np.conj(b))) - scene.truth["contrast_phase_shift_rad"]) < 0.05
    g = np.array(scene.truth["lattice"]["q_bragg_rad_per_nm"])[0]
    a, b = (np.sum(w * m.data * np.exp(-1j * (g[0] * x + g[1] * y))) for m in scene.maps)
    assert abs(np.angle(a * np.conj(b))) < 0.05  # derived: the lattice term does not invert


def test_bilayer_tip_shift_moves_the_moire_and_the_atoms():
    ps = (0.08, 0.08)
    kw = dict(shape=(160, 160), pixel_size_nm=ps, theta_deg=2.0, heterostrain_percent=0.2, rng=0)
    clean = bilayer_scene(**kw).topography.data
    shifted = bilayer_scene(conditions=Conditions(tip_change_row=60, tip_change_shift_px=(3, 2)), **kw)
    assert_allclose(shifted.truth_maps["displacement"][:, 100, 5], [3 * 0.08, 2 * 0.08], atol=1e-12)  # brief
    # derived: pixel (r, c) shows s = r + u; the scene is normalised over the whole frame, so compare by
    # correlation (the normalisation changes with the frame content, the pattern does not)
    a, b = shifted.topography.data[70:150, 10:150].ravel(), clean[72:152, 13:153].ravel()
    assert np.corrcoef(a, b)[0, 1] > 0.999
    assert np.corrcoef(shifted.topography.data[70:150, 10:150].ravel(), clean[70:150, 10:150].ravel())[0, 1] < 0.9


def test_nonlinearity_adds_the_mixing_peak_of_the_stated_size():
    ps = (0.05, 0.05)
    r, kappa = 2.0, 0.3
    kw = dict(shape=(384, 384), pixel_size_nm=ps, supercell=SQRT13, n_domains=1, cdw_to_lattice=r, biases_V=(), rng=3)
    plain = supercell_cdw_scene(**kw)
    mixed = supercell_cdw_scene(nonlinearity=kappa, **kw)
    q = np.array(mixed.truth["q_cdw_rad_per_nm"])
    lat = mixed.truth["lattice_nm"]
    # derived: p² holds 2 (r cos a)(r cos b) = r² cos(a - b) + ..., so the peak at Q1 - Q2 has amplitude
    # κ r² / (3 (1 + r)) lattice_nm; the plain scene has none there (window leakage < 1 %)
    expected = kappa * r**2 / (3 * (1 + r)) * lat
    assert abs(peak_amplitude(mixed.topography.data, ps, q[0] - q[1]) - expected) < 0.05 * expected
    assert peak_amplitude(plain.topography.data, ps, q[0] - q[1]) < 0.01 * expected
    assert mixed.truth["nonlinearity"] == kappa


def test_domain_interiors_have_the_variant_phases_of_the_truth():
    ps = (0.05, 0.05)
    scene = supercell_cdw_scene(shape=(320, 320), pixel_size_nm=ps, supercell=SQRT13, mirror_domains=True,
                                n_domains=4, cdw_to_lattice=2.0, wall_width_nm=0.2, biases_V=(), rng=5)
    img = scene.topography.data / scene.truth["cdw_nm"]
    labels = scene.truth_maps["labels"]
    y, x = np.mgrid[:320, :320] * 0.05
    chir = {d["chirality"] for d in scene.truth["domains"]}
    assert chir == {1, -1}  # brief: half the domains take the mirror superlattice
    checked = 0
    for d in scene.truth["domains"]:
        inner = ndimage.binary_erosion(labels == d["label"], iterations=12)  # > 4 sigma of the wall
        if inner.sum() < 4000:
            continue
        checked += 1
        structure = scene.truth["structures"][d["structure"]]
        A = np.array(structure["real_basis_nm"])
        for q, phase in zip(np.array(structure["q_cdw_rad_per_nm"]), d["phases_rad"]):
            # derived: the CDW is cos(Q.r - Q.R), so its projection on exp(-i Q.r) has phase -Q.R
            proj = np.mean(img[inner] * np.exp(-1j * (q[0] * x[inner] + q[1] * y[inner])))
            expected = -(q @ (np.array(d["R"]) @ A))
            # leakage of the other components (|dq| >= 6 rad/nm) over a region > 3 nm across: ~1/(|dq| L) < 0.1
            assert abs(np.angle(np.exp(1j * (np.angle(proj) - expected)))) < 0.15
            assert abs(np.angle(np.exp(1j * (phase - expected)))) < 1e-9
            assert abs(2 * abs(proj) - 1) < 0.15  # derived: amplitude 1 in cdw_nm units
    assert checked >= 3


def test_neighbouring_domains_differ_in_structure_or_variant():
    scene = supercell_cdw_scene(shape=(256, 256), pixel_size_nm=0.05, supercell=STRIPE, rotation_domains=True,
                                n_domains=7, biases_V=(), rng=3)
    labels = scene.truth_maps["labels"]
    key = {d["label"]: (d["structure"], d["variant"]) for d in scene.truth["domains"]}
    edge = labels[:, :-1] != labels[:, 1:]
    for a, b in set(zip(labels[:, :-1][edge].tolist(), labels[:, 1:][edge].tolist())):
        assert key[a] != key[b]  # derived: otherwise there is no wall
    assert len(scene.truth["structures"]) == 3  # derived: a 2 x 1 stripe on a hexagonal lattice has 3 orientations
    assert all(s["det"] == 2 for s in scene.truth["structures"])


# --------------------------------------------------------------------------- conditions


def test_displacement_equals_the_drift_and_creep_formula_at_chosen_rows():
    c = Conditions(thermal_drift_nm_per_line=(0.002, -0.001), creep_nm=(0.8, 0.5), creep_lines=40,
                   tip_change_row=150, tip_change_shift_px=(3, -2))
    u = scan_displacement((200, 64), (0.05, 0.04), c)
    for row in (0, 10, 40, 149, 150, 199):
        jump = np.array([3 * 0.04, -2 * 0.05]) * (row >= 150)
        # brief: u = drift * row + creep * exp(-row / creep_lines) + shift below the tip change
        expected = np.array([0.002, -0.001]) * row + np.array([0.8, 0.5]) * math.exp(-row / 40) + jump
        assert_allclose(u[:, row, 17], expected, atol=1e-12)
    assert np.all(u == u[:, :, :1])  # derived: the scan displacement depends on the row only


def test_creep_shows_as_the_bragg_phase_of_each_row():
    ps = (0.05, 0.05)
    c = Conditions(creep_nm=(0.6, 0.4), creep_lines=30, thermal_drift_nm_per_line=(0.001, 0.0005))
    scene = supercell_cdw_scene(shape=(128, 512), pixel_size_nm=ps, angle_deg=7.0, supercell=THREE, n_domains=1,
                                cdw_to_lattice=0.0, conditions=c, biases_V=(), rng=0)
    img = scene.topography.data / scene.truth["lattice_nm"]
    g = np.array(scene.truth["lattice"]["q_bragg_rad_per_nm"])
    j = int(np.argmax(g[:, 0]))  # the Bragg vector with the largest qx, far from the others along x
    x = np.arange(512) * ps[1]
    w = np.hanning(512)
    for row in (0, 5, 30, 90, 127):
        proj = np.sum(w * img[row] * np.exp(-1j * g[j, 0] * x)) / np.sum(w) * 2
        measured = np.angle(proj) - g[j, 1] * row * ps[0]
        u = np.array([0.001 * row + 0.6 * math.exp(-row / 30), 0.0005 * row + 0.4 * math.exp(-row / 30)])
        # derived: the image is cos(G.(r + u)), so the row's phase at G_x is G_y y + G.u
        assert abs(np.angle(np.exp(1j * (measured - g[j] @ u)))) < 0.02


def test_tip_change_shift_moves_the_content_by_whole_pixels():
    ps = (0.05, 0.05)
    kw = dict(shape=(200, 200), pixel_size_nm=ps, supercell=SQRT7, n_domains=4, biases_V=(), rng=9)
    clean = supercell_cdw_scene(**kw).topography.data
    shifted = supercell_cdw_scene(conditions=Conditions(tip_change_row=100, tip_change_shift_px=(3, 2)),
                                  **kw).topography.data
    # derived: below the tip change pixel (r, c) shows s = r + u, the clean pixel (r + 2, c + 3); away from the
    # tip-change row and the frame edge by more than the wall filter's 4-sigma support (20 pixels)
    assert_allclose(shifted[130:170, 25:170], clean[132:172, 28:173], atol=1e-12)
    assert_allclose(shifted[:70], clean[:70], atol=1e-12)  # above: untouched


def test_tip_change_contrast_and_offset():
    c = Conditions(tip_change_row=128, tip_change_contrast=0.5, tip_change_offset_nm=0.07)
    scene = supercell_cdw_scene(shape=(256, 256), pixel_size_nm=0.05, supercell=THREE, n_domains=1, conditions=c,
                                biases_V=(), rng=1)
    img = scene.topography.data
    top, bottom = img[:128], img[128:]
    # derived: corrugation scaled by the contrast, mean shifted by the offset (the corrugation averages to ~0,
    # to 2 % of its amplitude over 64 periods)
    assert abs(bottom.std() / top.std() - 0.5) < 0.02
    assert abs((bottom.mean() - top.mean()) - 0.07) < 0.004
    assert scene.truth_maps["tip_changed"][128:].all() and not scene.truth_maps["tip_changed"][:128].any()


def test_glitched_rows_are_where_the_truth_says():
    c = Conditions(glitch_lines=5, white_noise_nm=0.002)
    scene = supercell_cdw_scene(shape=(256, 256), pixel_size_nm=0.05, supercell=SQRT13, n_domains=3, conditions=c,
                                biases_V=(0.3,), rng=4)
    img = scene.topography.data
    # common practice, no source: a glitched row stands out from the rows beside it; each pixel is compared
    # with the mean of the two rows two apart (the corrugation changes little over that)
    pad = np.pad(img, ((2, 2), (0, 0)), mode="reflect")
    diff = np.sqrt(np.mean((img - 0.5 * (pad[:-4] + pad[4:])) ** 2, axis=1))
    flagged = set(np.nonzero(diff > 5 * np.median(diff))[0].tolist())
    truth_rows = set(scene.truth["conditions"]["glitch_rows"])
    assert len(truth_rows) == 5
    # a glitched row also spoils the comparison of the rows two away from it
    assert truth_rows <= flagged <= truth_rows | {r + s for r in truth_rows for s in (-2, 2)}
    assert set(np.nonzero(scene.truth_maps["glitch_mask"].all(axis=1))[0].tolist()) == truth_rows
    gmap = scene.maps[0].data  # same scan: the conductance map is glitched in the same rows
    gd = np.sqrt(np.mean((gmap - np.median(gmap)) ** 2, axis=1))
    assert set(np.nonzero(gd > 5 * np.median(gd))[0].tolist()) == truth_rows


def test_steps_raise_each_terrace_by_the_step_height():
    c = Conditions(steps=2, step_height_nm=0.6)
    scene = supercell_cdw_scene(shape=(384, 384), pixel_size_nm=0.05, supercell=THREE, n_domains=1, conditions=c,
                                biases_V=(), rng=6)
    img = scene.topography.data
    terrace = scene.truth_maps["terrace"]
    edges = scene.truth_maps["step_edges"]
    assert sorted(np.unique(terrace).tolist()) == [0, 1, 2]
    means = [img[(terrace == k) & ~edges].mean() for k in range(3)]
    # brief: each terrace raised by the step height; the corrugation (~0.1 nm peak) averages to < 0.01 nm
    assert_allclose(np.diff(means), 0.6, atol=0.01)
    assert 0.6 / (3 * scene.truth["lattice_nm"]) > 9  # brief: steps dwarf the corrugation


def test_line_and_pink_noise_have_the_requested_size_and_spectrum():
    ps = (0.05, 0.05)
    c = Conditions(line_noise_nm=0.01)
    scene = supercell_cdw_scene(shape=(256, 256), pixel_size_nm=ps, supercell=THREE, n_domains=1, cdw_to_lattice=0,
                                lattice_nm=1e-9, conditions=c, biases_V=(), rng=1)
    # derived: with no corrugation each row is its offset
    assert_allclose(scene.topography.data.mean(axis=1), scene.truth["conditions"]["line_offsets_nm"], atol=1e-8)
    c = Conditions(pink_noise_nm=0.02)
    scene = supercell_cdw_scene(shape=(512, 512), pixel_size_nm=ps, supercell=THREE, n_domains=1, cdw_to_lattice=0,
                                lattice_nm=1e-9, conditions=c, biases_V=(), rng=1)
    img = scene.topography.data
    assert abs(img.std() - 0.02) < 1e-6  # brief: the standard deviation asked for
    power = np.abs(np.fft.fft2(img)) ** 2
    k = np.hypot(*np.meshgrid(np.fft.fftfreq(512), np.fft.fftfreq(512)))
    bins = np.geomspace(4 / 512, 0.4, 12)
    idx = np.digitize(k, bins)
    radial = np.array([power[idx == i].mean() for i in range(1, len(bins))])
    centres = np.sqrt(bins[1:] * bins[:-1])
    slope = np.polyfit(np.log(centres), np.log(radial), 1)[0]
    assert abs(slope + 1) < 0.1  # derived: 1/f noise has PSD ∝ 1/|k|; the radial average scatter is a few %


def test_conditions_reject_bad_values():
    with pytest.raises(InputError, match="white_noise_nm"):
        Conditions(white_noise_nm=-1)
    with pytest.raises(InputError, match="creep_lines"):
        Conditions(creep_lines=0)
    with pytest.raises(InputError, match="glitch_lines"):
        Conditions(glitch_lines=1.5)
    with pytest.raises(InputError, match="pixel_size_nm"):  # the atoms must be resolved
        supercell_cdw_scene(shape=(64, 64), pixel_size_nm=0.2)
    with pytest.raises(InputError, match="supercell"):
        supercell_cdw_scene(shape=(64, 64), supercell=((1, 2), (2, 4)))


# --------------------------------------------------------------------------- incommensurate


def test_uniform_incommensurate_peak_is_at_one_minus_delta_g_over_n():
    ps = (0.1, 0.1)
    a, n, delta = 0.344, 3, 0.05
    scene = incommensurate_cdw_scene(shape=(512, 512), pixel_size_nm=ps, a_nm=a, n=n, delta=delta, biases_V=(),
                                     rng=1)
    g = 4 * math.pi / (math.sqrt(3) * a)
    truth = scene.truth
    # McMillan, PRB 14, 1496 (1976): slips of 2π/n spaced d_G / δ, d_G = 2π/|G|; the beat 2π/|Δq| is n times that
    assert abs(truth["slip_spacing_nm"] - (2 * math.pi / g) / delta) < 1e-9
    assert abs(truth["discommensuration_spacing_nm"] - n * (2 * math.pi / g) / delta) < 1e-9
    q = np.array(truth["q_cdw_rad_per_nm"])
    assert_allclose(np.hypot(*q.T), (1 - delta) * g / n, rtol=1e-12)  # brief: q = (1 - δ) G / n
    peaks, bins = fft_peaks(scene.topography.data, ps, 3)
    assert all(within_bin(p, q, bins) for p in peaks)  # derived
    commensurate = np.array(truth["q_commensurate_rad_per_nm"])
    assert all(not within_bin(p, commensurate, bins) for p in peaks)  # Δq = 2.9 bins: resolved


def test_discommensurate_patches_are_commensurate_inside_and_slip_by_a_lattice_vector():
    ps = (0.08, 0.08)
    a, n, delta = 0.344, 3, 0.05
    scene = incommensurate_cdw_scene(shape=(512, 512), pixel_size_nm=ps, a_nm=a, n=n, delta=delta,
                                     discommensurations=True, slip_width_nm=0.3, biases_V=(), rng=2)
    img = scene.topography.data / scene.truth["cdw_nm"]
    labels = scene.truth_maps["labels"]
    A = hex_basis(a, scene.truth["lattice"]["angle_deg"])
    Q = np.array(scene.truth["q_commensurate_rad_per_nm"])
    y, x = np.mgrid[:512, :512] * 0.08
    patches = {p["label"]: p for p in scene.truth["patches"]}
    assert len(patches) >= 6
    checked = 0
    for lab, p in patches.items():
        inner = ndimage.binary_erosion(labels == lab, iterations=8)
        if inner.sum() < 1500:
            continue
        checked += 1
        for q in Q:
            # derived: inside a patch the CDW is cos(Q.r - Q.R) with Q = G/n exactly (commensurate)
            proj = np.mean(img[inner] * np.exp(-1j * (q[0] * x[inner] + q[1] * y[inner])))
            assert abs(np.angle(np.exp(1j * (np.angle(proj) + q @ (np.array(p["R"]) @ A))))) < 0.15
        assert p["variant"] == (p["R"][0] % n) * n + p["R"][1] % n
    assert checked >= 3
    # derived: the patches are Wigner–Seitz cells of the lattice, so neighbours differ by a nearest-neighbour vector
    edge = labels[:, :-1] != labels[:, 1:]
    for i, j in set(zip(labels[:, :-1][edge].tolist(), labels[:, 1:][edge].tolist())):
        d = np.array(patches[i]["R"]) - np.array(patches[j]["R"])
        assert d[0] ** 2 + d[1] ** 2 + d[0] * d[1] == 1
    # McMillan 1976: the mean wavevector is (1 - δ) G / n; the strongest peak near each Q sits there
    peaks, bins = fft_peaks(scene.topography.data, ps, 12, q_min=0.5)
    near = [p for p in peaks if np.min(np.hypot(*(np.vstack([Q, -Q]) - p).T)) < 0.15 * np.hypot(*Q[0])]
    assert within_bin(near[0], np.array(scene.truth["q_cdw_rad_per_nm"]), bins)


# --------------------------------------------------------------------------- bilayer


def test_bilayer_period_follows_hermann_at_zero_strain():
    a, theta = 0.246, 1.5
    scene = bilayer_scene(shape=(64, 64), pixel_size_nm=0.08, a_nm=a, theta_deg=theta, heterostrain_percent=0.0)
    expected = a / (2 * math.sin(math.radians(theta) / 2))  # Hermann, J. Phys. Condens. Matter 2012
    assert abs(scene.truth["period_nm"] - expected) < 1e-9 * expected
    top, bottom = np.array(scene.truth["bragg_q_top_rad_per_nm"]), np.array(scene.truth["bragg_q_bottom_rad_per_nm"])
    assert_allclose(np.array(scene.truth["moire_q_rad_per_nm"]), top - bottom, atol=1e-12)  # brief: k = G_top - G_bot
    cosines = np.sum(top * bottom, axis=1) / (np.hypot(*top.T) * np.hypot(*bottom.T))
    assert_allclose(np.degrees(np.arccos(cosines)), theta, atol=1e-6)  # derived: the layers differ by the twist


def test_mismatched_bilayer_follows_yankowitz():
    a, theta, delta = 0.246, 1.0, 0.018
    scene = bilayer_scene(shape=(64, 64), pixel_size_nm=0.08, a_nm=a, theta_deg=theta, heterostrain_percent=0.0,
                          mismatch=delta)
    t = math.radians(theta)
    # Yankowitz et al., Nat. Phys. 8, 382 (2012): λ = (1+δ)a / sqrt(2(1+δ)(1 - cos θ) + δ²),
    # tan φ = sin θ / ((1 + δ) - cos θ)
    period = (1 + delta) * a / math.sqrt(2 * (1 + delta) * (1 - math.cos(t)) + delta**2)
    phi = math.degrees(math.atan2(math.sin(t), (1 + delta) - math.cos(t)))
    assert abs(scene.truth["period_nm"] - period) < 1e-9 * period
    top = np.array(scene.truth["bragg_q_top_rad_per_nm"])
    bottom = np.array(scene.truth["bragg_q_bottom_rad_per_nm"])
    assert_allclose(np.hypot(*bottom.T), np.hypot(*top.T) / (1 + delta), rtol=1e-12)  # derived: a_bot = (1+δ)a
    k = np.array(scene.truth["moire_q_rad_per_nm"])
    angle = np.degrees(np.arccos(np.sum(k * top, axis=1) / (np.hypot(*k.T) * np.hypot(*top.T))))
    assert_allclose(angle, phi, atol=1e-6)  # derived: arg(1 + δ - e^{iθ}) is the moiré rotation φ


def test_bilayer_image_has_its_moire_peaks_at_the_truth():
    ps = (0.09, 0.09)
    scene = bilayer_scene(shape=(512, 512), pixel_size_nm=ps, theta_deg=1.2, heterostrain_percent=0.3,
                          heterostrain_angle_deg=25.0, rng=0)
    k = np.array(scene.truth["moire_q_rad_per_nm"])
    g = np.hypot(*np.array(scene.truth["bragg_q_top_rad_per_nm"])[0])
    peaks, bins = fft_peaks(scene.topography.data, ps, 40, q_min=4 * 2 * math.pi / (512 * 0.09))
    low = [p for p in peaks if np.hypot(*p) < g / 4]
    assert within_bin(low[0], k, bins)  # derived: exp(κ(ρ1 + ρ2)) holds G_top - G_bot at first order
    high = [p for p in peaks if np.hypot(*p) > g / 2]
    both = np.vstack([scene.truth["bragg_q_top_rad_per_nm"], scene.truth["bragg_q_bottom_rad_per_nm"]])
    assert within_bin(high[0], both, bins)  # derived: the atoms of both layers are resolved
    with pytest.raises(InputError, match="pixel_size_nm"):
        bilayer_scene(shape=(64, 64), pixel_size_nm=0.12)  # Nyquist: √3 a / 4 = 0.107 nm


# --------------------------------------------------------------------------- catalogue


@pytest.mark.parametrize("kind", REAL_SCENES)
def test_catalogue_scenes_are_valid_and_seeds_differ(kind):
    a = real_scene(kind, size=160, rng=1)
    b = real_scene(kind, size=160, rng=2)
    for scene in (a, b):
        img = scene.topography.data
        assert np.all(np.isfinite(img))
        assert scene.truth["scene"] == kind
        json.dumps(scene.truth)  # the truth is JSON-ready
        u = scene.truth_maps["displacement"]
        assert u.shape == (2,) + img.shape
        assert scene.truth_maps["labels"].shape == img.shape and scene.truth_maps["labels"].min() >= 1
    assert not np.allclose(a.topography.data[:64, :64], b.topography.data[:64, :64])  # different seeds differ
    assert a.truth != b.truth


def test_catalogue_promises():
    noisy = real_scene("noisy", size=128, rng=0)
    ny, nx = noisy.topography.shape
    dy, dx = noisy.topography.pixel_size_nm
    assert (ny, nx) == (96, 128) and dy != dx  # brief: rectangular frame, non-square pixels
    assert noisy.truth["conditions"]["glitch_rows"]
    s13 = real_scene("sqrt13", size=128, rng=0)
    assert {d["chirality"] for d in s13.truth["domains"]} == {1, -1}  # brief: mirror domains
    assert abs(abs(s13.truth["structures"][0]["rotation_deg"]) - 13.898) < 1e-3  # derived: atan(√3/7)
    steps = real_scene("steps", size=128, rng=0)
    assert steps.truth["conditions"]["steps"] == 2 and steps.truth["conditions"]["step_height_nm"] == 0.6
    mm = real_scene("mismatch", size=128, rng=0)
    assert mm.truth["mismatch"] == 0.018
    with pytest.raises(InputError, match="kind"):
        real_scene("nonsense")


def test_full_size_smoke():
    scene = real_scene("sqrt13", size=1024, rng=5)
    assert scene.topography.shape == (1024, 1024)
    assert np.all(np.isfinite(scene.topography.data))
    assert len(scene.maps) == 2 and scene.maps[0].shape == (1024, 1024)
    assert scene.truth_maps["order_amplitude"].shape == (6, 1024, 1024)  # two structures x three components
