"""Twist domains that cover the frame, walls between them, and the twist as a field (issue 12, items 1, 2, 5).

Scenes: ``domains.synth.moire_scene`` and ``domains.synth.moire.twisted_bilayer`` render two hexagonal
layers from their own lattice phases, with vertical bands of different twist; the truth is the band
layout (labels), the band twists given as input and, for the period, Hermann's
lambda = a / (2 sin(theta / 2)) (K. Hermann, J. Phys.: Condens. Matter 24, 314210 (2012)), none of
it computed by the analysis. The adjusted Rand index is scikit-learn's adjusted_rand_score (Hubert &
Arabie, J. Classification 2, 193 (1985); reference library).
"""

import csv
import json

import numpy as np
import pytest
from scipy import ndimage
from skimage.segmentation import find_boundaries
from sklearn.metrics import adjusted_rand_score

from domains.moire import moire_fields, moire_maps, twist_domains
from domains.pipeline import Config, _headline, analyze, write_analysis
from domains.synth import moire_scene
from domains.synth.moire import twisted_bilayer

A_NM = 0.246  # graphene's lattice constant (from memory), used by the scenes


def hermann_period_nm(theta_deg):
    # K. Hermann, J. Phys.: Condens. Matter 24, 314210 (2012): lambda = a / (2 sin(theta / 2))
    return A_NM / (2 * np.sin(np.radians(theta_deg) / 2))


@pytest.fixture(scope="module")
def two_bands():
    """The pipeline on a 102 x 102 nm moiré with bands of 1.05 and 1.30 deg (0.1 % heterostrain along 20 deg)."""
    scene = moire_scene(shape=(512, 512), rng=2)
    return scene, analyze(scene.topography, config=Config(a_nm=A_NM), progress=False)


def _matched(labels, truth, rows):
    """Found labels mapped to the true band holding most of each domain's pixels."""
    lookup = np.zeros(int(labels.max()) + 1, int)
    for row in rows:
        lookup[row["id"]] = np.bincount(truth[labels == row["id"]]).argmax()
    return lookup[labels]


def test_two_twist_domains_cover_the_frame(two_bands):
    scene, result = two_bands
    labels, walls = result.maps["labels"][0], result.maps["walls"][0]
    truth = scene.truth_maps["labels"]
    px = scene.topography.pixel_size_nm[1]
    sigma = result.summary["moire"]["sigma_nm"]
    period = hermann_period_nm(1.05)  # the longer of the two periods
    rows = result.tables["twist_domains"][1]
    assert len(rows) == 2 and result.summary["domains"]["count"] == 2  # derived: the scene has two bands
    # Every pixel belongs to a domain or to the one-pixel wall between them (no border, no band left out).
    assert np.all((labels > 0) | walls)  # derived: nothing is masked in the scene
    found = _matched(labels, truth, rows)
    assert adjusted_rand_score(truth[labels > 0], labels[labels > 0]) >= 0.9  # issue 12, done-when
    # Farther than one period from the band edge and from the frame edge the lock-in mixes in less than
    # Phi(-period / sigma) = 1.3 % of the other band (derived), so every such pixel has its band's domain;
    # the issue asks for at least 85 %.
    rr, cc = np.mgrid[:512, :512]
    to_edge = np.minimum.reduce([rr, cc, 511 - rr, 511 - cc]) * px
    far = (ndimage.distance_transform_edt(~find_boundaries(truth)) * px > period) & (to_edge > period)
    assert np.mean(found[far] == truth[far]) == 1.0  # derived, see above
    # Area fractions against the truth: a wall misplaced by up to sigma moves L sigma / A of the area
    # (L the boundary length, A the frame area; derived: the resolution-limited tolerance).
    tolerance = 512 * px * sigma / (512 * px) ** 2
    for band in (1, 2):
        assert abs(np.mean(found == band) - np.mean(truth == band)) <= tolerance  # derived, see above


def test_twist_boundary_is_a_counted_wall_and_the_domains_are_cut_by_the_frame(two_bands):
    scene, result = two_bands
    domains = result.summary["domains"]
    height = 512 * scene.topography.pixel_size_nm[0]
    # The bands meet along one vertical line from the top edge to the bottom edge (the scene's layout).
    assert domains["wall_count"] == 1  # derived: one boundary
    # Its length: at least the frame height (a straight crossing); a line wandering by up to sigma over
    # stretches of 2 sigma is longer by at most sqrt(1 + 1/4) - 1 = 12 % (derived).
    assert height <= domains["wall_length_nm"] <= 1.12 * height
    walls_table = result.tables["walls"][1]
    assert len(walls_table) == 1 and walls_table[0]["length_nm"] == domains["wall_length_nm"]  # same number
    # Both bands reach the frame's edges: both domains are cut by the frame (the issue: "0 cut by the frame").
    assert domains["count_touching_edge"] == 2  # derived: each band touches three edges
    assert all(row["touches_edge"] for row in result.tables["domains"][1])  # derived, as above
    assert "(2 cut by the frame)" in _headline(result.summary)["domains"]  # the headline says the same


def test_the_moire_lock_in_sets_the_trusted_region(two_bands):
    scene, result = two_bands
    sigma = result.summary["moire"]["sigma_nm"]
    px = scene.topography.pixel_size_nm[0]
    assert result.summary["sigma_nm"] == sigma  # the summary's resolution is the moiré lock-in's
    # Trusted: 2.5 sigma from the frame edge (docs/methods.md §1), the edge half a pixel beyond the last
    # pixel centre: a centred square of side 512 - 2 * ceil(2.5 sigma / px - 0.5) pixels (derived).
    margin = int(np.ceil(2.5 * sigma / px - 0.5))
    assert result.summary["trusted_fraction"] == pytest.approx(((512 - 2 * margin) / 512) ** 2, abs=1e-12)


def test_bimodal_twist_is_reported_per_domain_not_as_one_mean(two_bands):
    scene, result = two_bands
    moire = result.summary["moire"]
    assert moire["multimodal"] is True and moire["twist_deg_distribution"] == "multimodal"
    assert moire["period_nm_distribution"] == "multimodal"  # derived: the periods follow the twists
    # One heterostrain everywhere in the scene: the twist domains agree on it.
    assert moire["heterostrain_percent_distribution"] == "uniform"
    assert moire["twist_deg_err"] is None  # no error bar on a single twist that describes nothing
    levels = sorted(level["value"] for level in moire["twist_deg_levels"])
    errors = [level["err"] for level in sorted(moire["twist_deg_levels"], key=lambda lv: lv["value"])]
    for value, err, true in zip(levels, errors, (1.05, 1.30)):
        # the scene's band twists, within 3 errors (coverage of these errors: test_moire_coverage.py)
        assert abs(value - true) <= 3 * err
    # The quartiles of the local map bracket both band twists' neighbourhoods: the IQR spans the two modes
    # (derived: each band holds about half of the trusted pixels).
    assert moire["twist_deg_q25"] < 1.06 and moire["twist_deg_q75"] > 1.29
    row = _headline(result.summary)["twist angle"]
    assert row.startswith("multimodal") and "±" in row
    # both modes are printed, with their area fractions; the frame's median is not given an error
    assert row.count("±") == 2 and "median" in row and "%" in row
    assert "twist 1.18 ±" not in row and not row.startswith("1.1")


def analytic_period_nm(theta_deg, eps_percent, axis_deg, nu=0.16):
    """Mean of the three moiré wavelengths from the analytic wavevectors (derived, independent of the code).

    Layer 1: a1 = a(1, 0), a2 = a(1/2, sqrt 3/2) turned by -theta/2 (the scene's convention); layer 2 =
    T layer 1, T = R(theta)(I + E), E = R(phi) diag(eps, -nu eps) R(phi)^T; k_j = G1_j - T^-T G1_j.
    Real-space moiré vectors L_i . k_j = 2 pi delta_ij; the distances between neighbouring maxima are
    |L1|, |L2| and the shorter of |L1 +- L2|.
    """
    def rot(angle):
        return np.array([[np.cos(angle), -np.sin(angle)], [np.sin(angle), np.cos(angle)]])

    basis = A_NM * np.array([[1.0, 0.0], [0.5, np.sqrt(3) / 2]])
    g1 = (rot(-np.radians(theta_deg) / 2) @ (2 * np.pi * np.linalg.inv(basis))).T
    eps = eps_percent / 100
    e = rot(np.radians(axis_deg)) @ np.diag([eps, -nu * eps]) @ rot(np.radians(axis_deg)).T
    t = rot(np.radians(theta_deg)) @ (np.eye(2) + e)
    k = g1 - (np.linalg.inv(t).T @ g1.T).T
    l1, l2 = 2 * np.pi * np.linalg.inv(k).T
    return float(np.mean([np.hypot(*l1), np.hypot(*l2), min(np.hypot(*(l1 - l2)), np.hypot(*(l1 + l2)))]))


def test_analytic_period_is_hermanns_without_heterostrain():
    # Hermann (2012) at 1.05 and 1.30 deg (docs/methods.md §4: 13.424 nm at 1.05 deg)
    for theta in (1.05, 1.30):
        assert analytic_period_nm(theta, 0.0, 0.0) == pytest.approx(hermann_period_nm(theta), rel=1e-12)


def test_per_domain_period_follows_the_analytic_period(two_bands):
    scene, result = two_bands
    truth = scene.truth_maps["labels"]
    labels = result.maps["labels"][0]
    for row in result.tables["twist_domains"][1]:
        band = np.bincount(truth[labels == row["id"]]).argmax()
        theta = scene.truth["region_theta_deg"][band - 1]
        expected = analytic_period_nm(theta, scene.truth["heterostrain_percent"], scene.truth["heterostrain_angle_deg"])
        # the band's period within 3 of its errors (their coverage: test_moire_coverage.py)
        assert abs(row["period_nm"] - expected) <= 3 * row["period_nm_err"]


def test_headline_summary_and_tables_agree(two_bands, tmp_path):
    scene, result = two_bands
    moire = result.summary["moire"]
    rows = result.tables["twist_domains"][1]
    domains_rows = {r["domain"]: r for r in result.tables["domains"][1]}
    for row in rows:
        # twist_domains.csv and domains.csv describe the same domains with the same areas
        assert row["area_nm2"] == pytest.approx(domains_rows[row["id"]]["area_nm2"], rel=1e-12)
        assert domains_rows[row["id"]]["state"] == f"twist {row['twist_deg']:.4g} deg"
    # the summary's modes are the domains' own values (one domain per mode here)
    assert sorted(lv["value"] for lv in moire["twist_deg_levels"]) == sorted(r["twist_deg"] for r in rows)
    assert len(moire["twist_deg_levels"]) == moire["twist_domains"] == len(rows)
    # the bundle holds the same numbers as the analysis: twist_domains.csv, walls.csv, summary.json
    bundle = write_analysis(result, tmp_path / "bundle", command_line=["test"], inputs=[])
    with open(bundle / "twist_domains.csv", newline="", encoding="utf-8") as handle:
        written = list(csv.DictReader(handle))
    assert sorted(float(r["twist_deg"]) for r in written) == pytest.approx(sorted(r["twist_deg"] for r in rows),
                                                                          rel=1e-9)
    with open(bundle / "walls.csv", newline="", encoding="utf-8") as handle:
        walls = list(csv.DictReader(handle))
    assert [float(w["length_nm"]) for w in walls] == pytest.approx([result.summary["domains"]["wall_length_nm"]])
    written_summary = json.loads((bundle / "summary.json").read_text(encoding="utf-8"))
    assert written_summary["moire"]["twist_deg_levels"] == moire["twist_deg_levels"]  # JSON keeps float64 exactly
    assert written_summary["moire"]["twist_deg_err"] is None


# ----------------------------------------------------------------------------- the flag can tell fields apart


def _fields(**scene):
    image, truth = twisted_bilayer(shape=(320, 320), pixel_size_nm=0.3, a_nm=A_NM, noise=0.3, rng=4,
                                   heterostrain_percent=0.1, **scene)
    maps = moire_maps(image, pixel_size_nm=0.3, a_nm=A_NM)
    dom = twist_domains(maps.twist_deg, pixel_size_nm=0.3, twist_err_deg=maps.twist_deg_err,
                        resolution_nm=maps.sigma_nm, trusted=maps.trusted)
    return moire_fields(maps, dom), dom


def test_uniform_twist_is_one_value_with_an_error():
    fields, dom = _fields(theta_deg=1.2)
    s = fields.summary
    assert len(dom.table) == 1 and s["multimodal"] is False
    assert s["twist_deg_distribution"] == "uniform" and s["heterostrain_percent_distribution"] == "uniform"
    assert abs(s["twist_deg"] - 1.2) <= 3 * s["twist_deg_err"]  # the input twist, within 3 errors
    assert "uniform" in s["field_note"]


def test_a_twist_gradient_varies_but_is_not_multimodal():
    # 0.002 deg/nm across 96 nm: the twist runs from 1.10 to 1.30 deg without modes; the dip test must
    # not call a flat histogram bimodal, and no single value with an error may be quoted.
    fields, _ = _fields(theta_deg=1.2, twist_gradient_deg_per_nm=0.002)
    s = fields.summary
    assert s["twist_deg_distribution"] == "varies" and s["multimodal"] is False
    assert s["twist_deg_err"] is None
    # the quartiles of a linear ramp over the trusted width w lie at +-w/4 of the centre (derived)
    w = 96 - 2 * 2.5 * 6.7  # frame minus the 2.5 sigma margins, sigma about 6.7 nm here
    assert s["twist_deg_q75"] - s["twist_deg_q25"] == pytest.approx(0.002 * w / 2, rel=0.15)
    assert "varies" in s["field_note"]


def test_domains_cover_the_frame_under_a_mask():
    # A masked block (e.g. a contaminated patch): it belongs to no domain and cuts no domain in two.
    image, truth = twisted_bilayer(shape=(320, 320), pixel_size_nm=0.3, a_nm=A_NM, regions=[1.05, 1.3],
                                   noise=0.3, rng=2)
    mask = np.zeros(image.shape, bool)
    mask[120:170, 40:90] = True
    maps = moire_maps(image, pixel_size_nm=0.3, a_nm=A_NM, mask=mask)
    dom = twist_domains(maps.twist_deg, pixel_size_nm=0.3, twist_err_deg=maps.twist_deg_err,
                        resolution_nm=maps.sigma_nm, trusted=maps.trusted, valid=~mask)
    assert len(dom.table) == 2  # derived: two bands
    assert not dom.labels[mask].any()  # masked pixels carry no domain
    assert np.all((dom.labels > 0) | dom.walls | mask)  # every other pixel does, or is a wall
