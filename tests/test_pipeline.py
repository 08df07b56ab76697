"""The whole analysis on scenes with known truth (issue: domains from the lock-in phases).

Truth comes from domains.synth: the domain layout, each domain's translational variant,
the drift field and the noise are set analytically. The adjusted Rand index is that of
Hubert & Arabie, J. Classification 2, 193 (1985), computed by scikit-learn's
adjusted_rand_score (reference library).
"""

import json

import numpy as np
import pytest
from scipy import ndimage
from skimage.segmentation import find_boundaries
from sklearn.metrics import adjusted_rand_score

from domains import InputError
from domains.cli import main
from domains.pipeline import Config, analyze
from domains.synth import cdw_scene, stripe_scene


def _outside_walls(truth_labels, sigma_nm, pixel_nm):
    # "Outside the walls": farther than two lock-in widths from a true wall, where the order
    # parameter is not mixed by the lock-in's resolution (derived: the filter's reach).
    distance = ndimage.distance_transform_edt(~find_boundaries(truth_labels)) * pixel_nm
    return distance > 2 * sigma_nm


def _check_walls_within_one_period(result, truth_labels, pixel_nm, period_nm, trusted):
    found = result.maps["walls"][0] & trusted
    truth_walls = find_boundaries(truth_labels, mode="inner") & trusted
    to_truth = ndimage.distance_transform_edt(~find_boundaries(truth_labels)) * pixel_nm
    to_found = ndimage.distance_transform_edt(~result.maps["walls"][0]) * pixel_nm
    # every wall found lies within one CDW period of a true wall, and every true wall has a found one
    assert np.all(to_truth[found] <= period_nm)
    assert np.all(to_found[truth_walls] <= period_nm)


CDW_CASES = [
    # (n, a_nm, seed, noise relative to the CDW amplitude, drift in lattice constants)
    (3, 0.337, 11, 1.0, 1 / 3),   # amplitude signal-to-noise of 1 per pixel, drift a/3
    (2, 0.36, 5, 0.5, 1 / 3),
    (3, 0.337, 21, 0.3, 0.2),
]


@pytest.mark.parametrize("n, a_nm, seed, noise, drift", CDW_CASES)
def test_cdw_domains_match_the_truth(n, a_nm, seed, noise, drift):
    scene = cdw_scene(shape=(448, 448), n=n, a_nm=a_nm, n_domains=5, noise_nm=noise * 0.012,
                      drift_nm=drift * a_nm, rng=seed)
    result = analyze(scene.topography, progress=False)
    assert result.summary["superlattice"]["order"] == f"{n}x{n}"
    assert result.summary["order_kind"] == "commensurate"
    truth = scene.truth_maps["labels"]
    labels = result.maps["labels"][0]
    sigma = result.summary["sigma_nm"]
    pixel = scene.topography.pixel_size_nm[0]
    where = (labels > 0) & _outside_walls(truth, sigma, pixel)
    assert adjusted_rand_score(truth[where], labels[where]) >= 0.95  # issue requirement, ARI reference: sklearn
    # the domain count is exact (neighbouring domains always differ in variant)
    assert result.summary["domains"]["count"] == scene.truth["n_domains"]
    period = 2 * np.pi / np.hypot(*scene.truth["q_cdw_rad_per_nm"][0])
    trusted = ndimage.distance_transform_edt(np.pad(np.ones_like(truth, bool), 1, constant_values=False))[1:-1, 1:-1] \
        * pixel > 3 * sigma
    _check_walls_within_one_period(result, truth, pixel, period, trusted)
    # the lattice constant: within 3 standard errors of the truth, the error itself below 0.5 %
    lattice = result.summary["lattice"]
    assert abs(lattice["a_nm"] - a_nm) < max(3 * lattice["a_nm_err"], 0.002 * a_nm)


def test_stripe_orientation_domains_match_the_truth():
    scene = stripe_scene(shape=(448, 448), n_domains=4, rng=7)
    result = analyze(scene.topography, progress=False)
    assert result.summary["order_kind"] == "stripes"
    # The scene gives every Voronoi cell one of the stripe's translational variants (phase 2 pi m / 4), so
    # two touching cells of one orientation and different variants meet at a phase-slip wall: the true
    # domains are the regions of one orientation and one variant, not the regions of one orientation.
    truth = scene.truth_maps["labels"]
    labels = result.maps["labels"][0]
    where = (labels > 0) & _outside_walls(truth, result.summary["sigma_nm"], scene.topography.pixel_size_nm[0])
    assert adjusted_rand_score(truth[where], labels[where]) >= 0.95
    assert result.summary["domains"]["count"] == scene.truth["n_domains"]
    # Both orientations are found (docs/methods.md §6): the states name the stripe direction q1 or q2.
    assert {r["state"].split()[0] for r in result.tables["domains"][1]} == {"q1", "q2"}


def test_scene_without_order_says_so():
    scene = cdw_scene(shape=(320, 320), n=None, rng=3)
    result = analyze(scene.topography, progress=False)
    assert result.summary["superlattice"]["order"] is None
    assert result.summary["superlattice"]["note"] == "no superlattice found"
    assert result.summary["domains"] is None
    assert not result.maps["labels"][0].any()


def test_contradictory_overrides_are_rejected(tmp_path, capsys):
    with pytest.raises(InputError, match="contradicts"):
        Config(order="none", superlattice="3x3").validate()
    config = tmp_path / "c.toml"
    config.write_text('order = "none"\nsuperlattice = "3x3"\n')
    scene_dir = tmp_path / "scene"
    assert main(["scene", "plain", "--out", str(scene_dir)]) == 0
    status = main(["analyze", str(scene_dir / "topography.npy"), "--config", str(config), "--out", str(tmp_path / "o")])
    assert status == 2
    assert "c.toml" in capsys.readouterr().err
    config.write_text('sigma = 0.5\n')  # unknown key
    assert main(["analyze", str(scene_dir / "topography.npy"), "--config", str(config), "--out", str(tmp_path / "o")]) == 2


def test_analyze_on_scene_output_writes_a_complete_bundle(tmp_path, capsys):
    from PIL import Image

    from domains.io import read_bundle

    scene_dir = tmp_path / "scene"
    assert main(["scene", "cdw", "--out", str(scene_dir), "--seed", "2"]) == 0
    maps = sorted(str(p) for p in scene_dir.glob("map_*.npy"))
    out = tmp_path / "bundle"
    assert main(["analyze", str(scene_dir / "topography.npy"), "--map", maps[0], "--map", maps[1],
                 "--out", str(out)]) == 0
    for name in ("summary.json", "provenance.json", "domains.csv", "walls.csv", "contrast.csv", "report.html"):
        assert (out / name).is_file(), name
    bundle = read_bundle(out)
    for key in ("labels", "walls", "amplitude/cdw_1", "phase/cdw_1", "displacement/ux", "displacement/uy"):
        assert key in bundle.maps, key
        assert "pixel_size_nm" in bundle.maps[key].attrs and "units" in bundle.maps[key].attrs
    summary = json.loads((out / "summary.json").read_text())
    truth = json.loads((scene_dir / "truth.json").read_text())
    assert summary["domains"]["count"] == truth["n_domains"]
    # the demo maps invert their CDW contrast between the two biases (truth: dphi = pi)
    verdicts = {d["verdict"]["verdict"] for d in summary["bias_comparison"]["pairs"][0]["domains"]}
    assert verdicts == {"inverted"}
    provenance = json.loads((out / "provenance.json").read_text())
    assert len(provenance["inputs"]) == 3
    # every figure in the report exists and is not blank
    html = (out / "report.html").read_text()
    figures = sorted((out / "figures").glob("*.png"))
    assert len(figures) >= 6
    for figure in figures:
        assert f"figures/{figure.name}" in html
        pixels = np.asarray(Image.open(figure).convert("L"), float)
        assert pixels.std() > 5, figure.name


def test_moire_is_found_and_its_twist_domains_mapped():
    from domains.synth import moire_scene

    # Two twist bands (1.05 and 1.30 degrees) with 0.1 % heterostrain; the atoms are not
    # resolved, so the lattice constant is stated, as a user would (graphene, 0.246 nm, from memory).
    scene = moire_scene(shape=(384, 384), rng=2)
    result = analyze(scene.topography, config=Config(a_nm=0.246), progress=False)
    assert result.summary["order_kind"] == "moire"
    moire = result.summary["moire"]
    assert moire["mode"] == "period"
    assert moire["twist_domains"] == 2
    labels = result.maps["labels"][0]
    truth = scene.truth_maps["labels"]
    # each twist domain's mean twist matches its band within 0.01 deg (issue 5 precision)
    for row in result.tables["twist_domains"][1]:
        band = np.bincount(truth[labels == row["id"]]).argmax()
        assert abs(row["twist_deg_mean"] - scene.truth["region_theta_deg"][band - 1]) < 0.01
    # the boundary lies within two moiré periods of the truth (the band edge at the centre column)
    boundary_cols = np.nonzero(result.maps["walls"][0])[1]
    period_px = moire["period_nm"] / scene.topography.pixel_size_nm[1]
    assert boundary_cols.size and np.all(np.abs(boundary_cols - 384 / 2) < 2 * period_px)


def test_moire_without_lattice_constant_reports_the_period_only():
    from domains.synth import moire_scene

    scene = moire_scene(shape=(256, 256), regions=(1.1,), rng=4)
    result = analyze(scene.topography, progress=False)
    moire = result.summary["moire"]
    assert moire["twist_deg"] is None and "a_nm" in moire["note"]
    # Hermann (J. Phys.: Condens. Matter 24, 314210 (2012)): lambda = a / (2 sin(theta/2)) = 12.81 nm at 1.1 deg,
    # stretched a little by the 0.1 % heterostrain: within 2 %
    assert abs(moire["period_nm"] - 0.246 / (2 * np.sin(np.radians(1.1) / 2))) < 0.02 * 12.81


def test_electronic_types_of_domains_found_end_to_end():
    # Truth (domains.synth.electronic_types_scene): per-type conductance offsets and CDW amplitudes at
    # each bias, independent of the translational variants, maps at two setpoints and a tip change.
    from domains.synth import electronic_types_scene

    scene = electronic_types_scene(shape=(512, 512), n_types=2, rng=5)
    result = analyze(scene.topography, maps=scene.maps, progress=False)
    types = result.summary["electronic_types"]
    assert types["n_types"] == 2
    # Map every found type to the true type that covers most of its domains' area.
    labels = result.maps["labels"][0]
    true_type = scene.truth_maps["type"]
    found = np.zeros_like(labels)
    for i, t in enumerate(types["types"], start=1):
        found[np.isin(labels, t["domains"])] = i
    assigned = found > 0
    pairs = {}
    for f in np.unique(found[assigned]):
        values, counts = np.unique(true_type[found == f], return_counts=True)
        pairs[f] = values[np.argmax(counts)]
    assert len(set(pairs.values())) == 2
    agree = np.mean([pairs[f] == t for f, t in zip(found[assigned], true_type[assigned])])
    # issue requirement: at least 95 % of the domain area gets its true type
    assert agree >= 0.95
