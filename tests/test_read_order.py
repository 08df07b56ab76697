"""The order step: which peaks are the atomic lattice, which a superlattice (any supercell), commensurate or not.

Truths are built analytically here or by ``domains.synth`` (exact wavevectors from the lattice and the
supercell matrix), never by the code under test.
"""

import math

import numpy as np
import pytest

from domains._lattice import bragg_vectors
from domains._read_order import (LatticeReading, find_lattice, read_order, slow_axis_drift_fit,
                                 supercell_name)
from domains.fourier import Lattice, Peak
from domains.pipeline import find_order
from domains.synth import real_scene

PIXEL = (0.05, 0.05)


def _peaks(vectors, powers):
    return [Peak(np.asarray(v, float), 1e-3, power=p) for v, p in zip(vectors, powers)]


def _hex_sqrt_fraction(h, k):
    """Fractions (in the basis G1, G2 at 120 degrees) of the sqrt(N) R theta wavevector (h b1' + k b2')/N.

    derived: on a hexagonal lattice the superlattice vector h a1 + k a2 (a2 at 60 degrees) has
    N = h^2 + hk + k^2; with G1, G2 at 120 degrees |u G1 + v G2|^2 = |G|^2 (u^2 + v^2 - uv), and
    (u, v) = (h + k, k) gives N, so the fundamental lies at (h + k, k)/N of (G1, G2) (checked below
    against |Q| = |G| / sqrt(N)); its mirror image is (h, -k)/N.
    """
    n = h * h + h * k + k * k
    return np.array([h + k, k]) / n, n


@pytest.mark.parametrize("h,k,theta", [(3, 1, 13.898), (2, 1, 19.107), (1, 1, 30.0)])
def test_supercell_names_and_variants_follow_the_sqrt_n_formula(h, k, theta):
    lat = Lattice.from_params("hexagonal", 0.336, 0.0)
    frac, n = _hex_sqrt_fraction(h, k)
    g = np.asarray(lat.bragg)[:2]
    # derived: |Q| = |G| / sqrt(N) for a sqrt(N) x sqrt(N) superlattice
    assert math.isclose(np.hypot(*(frac @ g)), np.hypot(*g[0]) / math.sqrt(n), rel_tol=1e-9)
    m, name, variants, chirality = supercell_name([frac], lat)
    # derived: N = h^2 + hk + k^2 translational variants, |det M| = N
    assert variants == n and abs(round(np.linalg.det(m))) == n
    if n == 3:
        assert name == "sqrt3xsqrt3R30"
    else:
        # derived: theta = atan(sqrt(3) k / (2h + k)); docs/methods.md §8 gives 13.90 and 19.11 degrees
        assert math.isclose(math.degrees(math.atan2(math.sqrt(3) * k, 2 * h + k)), theta, abs_tol=1e-3)
        assert name.startswith(f"sqrt{n}xsqrt{n}R") and abs(float(name.split("R")[1]) - theta) < 0.06
        # the mirror fraction (h, -k)/N is the other chirality (derived, see _hex_sqrt_fraction)
        mirror = np.array([h, -k]) / n
        assert supercell_name([mirror], lat)[3] == -chirality != 0


def test_nxn_and_stripe_supercells():
    lat = Lattice.from_params("hexagonal", 0.34, 4.0)
    # derived: G_j / 3 for all three j is the 3x3 cell (9 variants); a single G1 / 2 is a 2x1 stripe cell
    assert supercell_name(np.array([[1, 0], [0, 1], [-1, -1]]) / 3, lat)[1:3] == ("3x3", 9)
    assert supercell_name([[0.5, 0.0]], lat)[1:3] == ("2x1", 2)


def test_atomic_lattice_is_the_finest_set_not_the_strongest():
    g = bragg_vectors("hexagonal", 0.344, 6.0)
    # CDW 4x the atomic corrugation: 16x the power (common practice, no source: the CDW dominates)
    peaks = _peaks(list(g) + list(g / 3), [1.0] * 3 + [16.0] * 3)
    found = find_lattice(peaks, shape=(1024, 1024), pixel_size_nm=PIXEL)
    assert found.resolved
    # derived: a = 4 pi / (sqrt(3) |G|) of the given Bragg vectors
    assert math.isclose(found.lattice.a_nm, 0.344, rel_tol=1e-6)


def test_a_cdw_alone_is_not_called_an_atomic_lattice():
    g = bragg_vectors("hexagonal", 0.344, 6.0)
    peaks = _peaks(list(g / 3), [1.0] * 3)
    found = find_lattice(peaks, shape=(1024, 1024), pixel_size_nm=PIXEL)
    # from memory: atomic lattices of layered crystals are 0.24-0.45 nm; 3a = 1.03 nm is a superlattice
    assert not found.resolved and found.lattice is None
    assert any("not resolved" in r for r in found.reasons)
    with_a = find_lattice(peaks, shape=(1024, 1024), pixel_size_nm=PIXEL, a_nm=0.344)
    # derived: with a given, the set indexes as G/3 of a lattice along the same direction
    assert with_a.lattice is not None and math.isclose(with_a.lattice.a_nm, 0.344)


def test_slow_axis_drift_fit_recovers_the_regular_lattice():
    g = bragg_vectors("hexagonal", 0.3355, -12.0)
    for shear, stretch in ((0.02, -0.015), (-0.04, 0.03)):
        d = np.array([[1, shear], [0, 1 + stretch]])
        # derived: r_img = D r, so G_img = D^-T G
        a, angle, s, e = slow_axis_drift_fit(g @ np.linalg.inv(d))
        assert math.isclose(a, 0.3355, rel_tol=1e-9) and math.isclose(angle, -12.0, abs_tol=1e-6)
        assert math.isclose(s, shear, abs_tol=1e-9) and math.isclose(e, stretch, abs_tol=1e-9)


def _image(q_list, amps, shape=(512, 512), pixel=0.05, noise=0.0, rng=0):
    y, x = np.mgrid[: shape[0], : shape[1]] * pixel
    img = sum(a * np.cos(q[0] * x + q[1] * y) for q, a in zip(q_list, amps))
    return img + np.random.default_rng(rng).normal(0, noise, shape)


def test_nearly_commensurate_order_is_not_snapped():
    lat = Lattice.from_params("hexagonal", 0.344, 5.0)
    g = np.asarray(lat.bragg)
    delta = 0.015
    q_true = (1 - delta) * g / 3  # from memory: q = (1 - delta) G / 3 in a nearly commensurate diselenide
    img = _image(list(g) + list(q_true), [1.0] * 3 + [2.0] * 3, noise=0.5)
    res = read_order(img, pixel_size_nm=PIXEL, lattice_reading=LatticeReading(lat, True, "given"))
    assert res.kind == "incommensurate"
    fam = res.families[0]
    for qt in q_true:
        j = int(np.argmin([min(np.hypot(*(qt - v)), np.hypot(*(qt + v))) for v in fam.q_rad_per_nm]))
        v = fam.q_rad_per_nm[j] * np.sign(fam.q_rad_per_nm[j] @ qt)
        err = np.hypot(*(v - qt))
        # issue requirement: within 1 % of |q| and within 3 reported errors (plus a tenth of a bin of grid jitter)
        assert err < 0.01 * np.hypot(*qt)
        assert err < 3 * fam.q_err_rad_per_nm[j] + 0.1 * 2 * np.pi / (512 * 0.05)
    # McMillan (1976): discommensurations every 2 pi / |dq|
    expected = 2 * np.pi / (delta * np.hypot(*g[0]) / 3)
    assert fam.discommensuration_nm == pytest.approx(expected, rel=0.1)


def test_commensurate_sqrt13_order_is_named_with_its_variants():
    lat = Lattice.from_params("hexagonal", 0.336, 0.0)
    g = np.asarray(lat.bragg)[:2]
    frac, n = _hex_sqrt_fraction(3, 1)
    q1 = frac @ g
    rot = np.array([[-0.5, -math.sqrt(3) / 2], [math.sqrt(3) / 2, -0.5]])  # 120 degrees
    qs = [q1, rot @ q1, rot @ rot @ q1]
    img = _image(list(lat.bragg) + qs, [1.0] * 3 + [2.0] * 3, noise=0.3)
    res = read_order(img, pixel_size_nm=PIXEL, lattice_reading=LatticeReading(lat, True, "given"))
    assert res.kind == "commensurate"
    fam = res.families[0]
    # derived: 13 variants, rotated +-13.90 degrees
    assert fam.variants == 13 and fam.name in ("sqrt13xsqrt13R13.9", "sqrt13xsqrt13R-13.9")


@pytest.mark.slow
@pytest.mark.parametrize("kind,expected", [
    ("sqrt13", ("commensurate", "sqrt13")),
    ("nearly_commensurate", ("incommensurate", "incommensurate")),
    ("strong_cdw_tip_change", ("commensurate", "3x3")),
    ("creep", ("commensurate", "3x3")),
    ("steps", ("commensurate", "3x3")),
    ("stripes_2x1", ("stripes", "2x1")),
])
def test_hostile_scenes_are_read_right(kind, expected):
    # Seeds other than the generator's own tests; truths from domains.synth (analytic).
    scene = real_scene(kind, size=768, rng=31)
    found = find_order(scene.topography)
    spec = found["spec"]
    assert spec["order_kind"] == expected[0]
    assert expected[1] in (spec["superlattice_summary"]["order"] or "")
    a_true = scene.truth["lattice"]["a_nm"]
    # issue requirement: lattice constant within 0.2 % with drift or creep
    assert spec["lattice_summary"]["a_nm"] == pytest.approx(a_true, rel=2e-3)
    q_true = np.asarray(scene.truth.get("q_cdw_rad_per_nm") or [], float).reshape(-1, 2)
    for qt in q_true:
        # issue requirement: every true q within 1 % of a reported one (up to sign)
        reported = np.asarray(spec["superlattice_summary"]["q_rad_per_nm"])  # in the material's frame
        d = min(min(np.hypot(*(qt - v)), np.hypot(*(qt + v))) for v in reported)
        assert d < 0.01 * np.hypot(*qt)
