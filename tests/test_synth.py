"""The synthetic scenes carry the truth they claim (issue: foundation)."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

import domains
from domains.synth import cdw_scene, cdw_variant_phases, smooth_partition, stripe_scene


@pytest.mark.parametrize("n", [2, 3, 4])
def test_cdw_has_n_squared_translational_variants(n):
    phases = np.array([cdw_variant_phases(n, m1, m2) for m1 in range(n) for m2 in range(n)])
    # derived (docs/methods.md §5): a lattice translation R shifts phi_j by -2 pi n_j / n, so all
    # offsets are multiples of 2 pi / n ...
    steps = phases / (2 * np.pi / n)
    assert_allclose(steps, np.round(steps), atol=1e-12)
    # ... the n^2 translations give n^2 distinct phase patterns ...
    distinct = {tuple(np.round(np.angle(np.exp(1j * p)), 9)) for p in phases}
    assert len(distinct) == n * n
    # ... and sum_j phi_j is translation invariant (sum_j n_j = 0).
    assert_allclose(np.exp(1j * phases.sum(axis=1)), 1.0, atol=1e-12)


def test_scene_variants_differ_between_neighbours_and_are_multiples_of_2pi_over_n():
    scene = cdw_scene(shape=(256, 256), n_domains=7, rng=4)
    n = scene.truth["n"]
    labels = scene.truth_maps["labels"]
    phases = {d["label"]: np.array(d["phases_rad"]) for d in scene.truth["domains"]}
    for p in phases.values():
        steps = p / (2 * np.pi / n)
        assert_allclose(steps, np.round(steps), atol=1e-9)  # derived: docs/methods.md §5
    # neighbours across a wall always differ, or there would be no wall
    edge = labels[:, :-1] != labels[:, 1:]
    for a, b in set(zip(labels[:, :-1][edge].tolist(), labels[:, 1:][edge].tolist())):
        assert not np.allclose(np.exp(1j * phases[a]), np.exp(1j * phases[b]))


def test_truth_amplitude_is_the_linear_crossover_of_two_phases():
    # derived: psi = (1 - w) e^{i a} + w e^{i b} has |psi|^2 = 1 - 2 w (1 - w)(1 - cos(b - a)),
    # so at the wall centre (w = 1/2) |psi| = |cos(dphi / 2)| (0.5 for 2 pi / 3).
    shape = (64, 96)
    labels = np.ones(shape, np.int32)
    labels[:, 48:] = 2
    scene = cdw_scene(shape=shape, labels=labels, variants=[(0, 0), (1, 0)], wall_width_nm=0.2, drift_nm=0,
                      noise_nm=0, tilt_nm=0, line_offset_nm=0, rng=0)
    w = smooth_partition(labels, 0.2 / 0.056)[1]
    dphi = 2 * np.pi / 3  # components 1 and 3 slip by 2 pi / 3, component 2 does not
    expected = np.sqrt(1 - 2 * w * (1 - w) * (1 - np.cos(dphi)))
    assert_allclose(scene.truth_maps["order_amplitude"][0], expected, atol=1e-12)
    assert_allclose(scene.truth_maps["order_amplitude"][1], 1.0, atol=1e-12)
    assert_allclose(np.sqrt(1 - 2 * 0.25 * (1 - np.cos(dphi))), 0.5, atol=1e-12)


def test_sharp_slip_shows_a_lockin_dip_of_cos_half_dphi():
    # derived (docs/methods.md §5): at a sharp phase slip dphi the lock-in amplitude dips to |cos(dphi/2)|
    # Lattice at 15 degrees: every Q_i +- Q_j lies 15 degrees off the wall normal, so the sharp
    # step of one component barely leaks into the lock-in (derived; see tests/test_order.py).
    shape = (128, 192)
    labels = np.ones(shape, np.int32)
    labels[:, 96:] = 2
    scene = cdw_scene(shape=shape, labels=labels, variants=[(0, 0), (1, 0)], wall_width_nm=0, drift_nm=0,
                      lattice_nm=0, noise_nm=0, tilt_nm=0, line_offset_nm=0, angle_deg=15.0, rng=0)
    q = np.array(scene.truth["q_cdw_rad_per_nm"])
    a = domains.lockin(scene.topography.data, q[0], sigma_nm=0.8, pixel_size_nm=0.056)
    profile = domains.amplitude(a)[64, 40:150] / scene.truth["cdw_nm"]
    assert_allclose(profile.min(), 0.5, atol=0.01)
    # The minimum sits at the wall (between columns 95 and 96), well within one CDW period
    # (2 pi / |Q| = 15.6 px); the sharp step's spectral tail skews the flat-bottomed dip by ~1 px.
    period_px = 2 * np.pi / np.hypot(*q[0]) / 0.056
    assert abs(np.argmin(profile) + 40 - 95.5) < period_px / 4


def test_scene_is_deterministic_and_units_are_stated():
    a, b = cdw_scene(shape=(96, 96), rng=11), cdw_scene(shape=(96, 96), rng=11)
    assert_allclose(a.topography.data, b.topography.data, rtol=0, atol=0)
    assert a.topography.metadata["units"] == "nm" and a.maps[0].metadata["units"] == "nS"
    assert [m.bias_V for m in a.maps] == [-0.25, 0.25]


def test_stripe_scene_has_both_orientations_along_the_lattice():
    scene = stripe_scene(shape=(192, 192), n_domains=4, rng=2)
    q = np.array(scene.truth["q_stripe_rad_per_nm"])
    g = np.array(scene.truth["lattice"]["q_bragg_rad_per_nm"])
    # derived: stripe wavevectors are G / period along each square-lattice direction
    assert_allclose(q * 4, g, atol=1e-12)
    assert set(np.unique(scene.truth_maps["orientation"]).tolist()) == {0, 1}


def test_bad_layout_is_rejected():
    with pytest.raises(domains.InputError, match="labels must have shape"):
        cdw_scene(shape=(32, 32), labels=np.zeros((32, 32), int))
