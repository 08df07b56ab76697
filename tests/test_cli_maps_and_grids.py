"""`domains analyze` with maps and a spectroscopic grid: the bundle's comparison parts and the input checks."""

import json

import numpy as np

from domains.cli import main
from domains.io import save_scan
from domains.synth import cdw_scene


def _scene(tmp_path):
    scene = cdw_scene(shape=(256, 256), n_domains=3, rng=6)
    topo = save_scan(scene.topography, tmp_path / "topo.npy")
    return scene, topo


def test_grid_fingerprints_find_the_peak_energy(tmp_path, capsys):
    scene, topo = _scene(tmp_path)
    energies = np.linspace(-0.2, 0.2, 9)
    centre, width = 0.05, 0.04
    # analytic truth: the order's amplitude follows a Lorentzian in energy, peaked at 0.05 V
    lorentz = 1 / (1 + ((energies - centre) / width) ** 2)
    cdw_part = scene.maps[1].data - 1.0
    grid = np.stack([1.0 + l * cdw_part for l in lorentz])
    path = tmp_path / "grid.npy"
    np.save(path, grid)
    (tmp_path / "grid.json").write_text(json.dumps({"pixel_size_nm": scene.topography.pixel_size_nm[0],
                                                    "channel": "conductance", "energies_V": energies.tolist()}))
    out = tmp_path / "bundle"
    assert main(["analyze", str(topo), "--grid", str(path), "--out", str(out)]) == 0
    rows = (out / "fingerprint.csv").read_text().strip().splitlines()
    summary = json.loads((out / "summary.json").read_text())
    n_domains = summary["domains"]["count"]
    assert len(rows) == 1 + n_domains * len(energies)
    step = energies[1] - energies[0]
    for peak in summary["grid"]["peak_energy_V"]:
        assert abs(peak["peak_energy_V"] - centre) <= step  # within one energy step (issue requirement)
    assert (out / "figures" / "fingerprint.png").is_file()


def test_map_checks_name_the_file(tmp_path, capsys):
    scene, topo = _scene(tmp_path)
    small = tmp_path / "small.npy"
    np.save(small, np.zeros((128, 128)))
    (tmp_path / "small.json").write_text(json.dumps({"pixel_size_nm": 0.056, "bias_V": 0.2}))
    nobias = tmp_path / "nobias.npy"
    np.save(nobias, scene.maps[0].data)
    (tmp_path / "nobias.json").write_text(json.dumps({"pixel_size_nm": scene.topography.pixel_size_nm[0]}))
    otherpix = tmp_path / "otherpix.npy"
    np.save(otherpix, scene.maps[0].data)
    (tmp_path / "otherpix.json").write_text(json.dumps({"pixel_size_nm": 0.07, "bias_V": 0.2}))
    for path, problem in ((small, "shape"), (nobias, "bias"), (otherpix, "pixel size")):
        status = main(["analyze", str(topo), "--map", str(path), "--out", str(tmp_path / "out")])
        err = capsys.readouterr().err
        assert status == 2, path.name
        assert path.name in err and problem in err
        assert not (tmp_path / "out").exists()
