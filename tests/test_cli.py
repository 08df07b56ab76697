"""The `domains` command: exit statuses, messages naming the file, no tracebacks (DESIGN.md contract)."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from domains.cli import main


def _write(tmp_path, name, array=None, sidecar=None, raw=None):
    path = tmp_path / name
    if raw is not None:
        path.write_bytes(raw)
    elif array is not None:
        np.save(path, array)
    if sidecar is not None:
        (tmp_path / (Path(name).stem + ".json")).write_text(sidecar if isinstance(sidecar, str) else json.dumps(sidecar))
    return path


BAD_INPUTS = {
    "missing file": lambda t: t / "nothing.npy",
    "directory": lambda t: (t / "folder.npy").mkdir() or t / "folder.npy",
    "empty file": lambda t: _write(t, "empty.npy", raw=b"", sidecar={"pixel_size_nm": 0.05}),
    "1-D array": lambda t: _write(t, "line.npy", np.arange(10.0), sidecar={"pixel_size_nm": 0.05}),
    "4-D array": lambda t: _write(t, "cube.npy", np.zeros((2, 2, 4, 4)), sidecar={"pixel_size_nm": 0.05}),
    "all NaN": lambda t: _write(t, "nan.npy", np.full((16, 16), np.nan), sidecar={"pixel_size_nm": 0.05}),
    "no pixel size": lambda t: _write(t, "nopix.npy", np.zeros((16, 16))),
    "malformed sidecar": lambda t: _write(t, "bad.npy", np.zeros((16, 16)), sidecar="{pixel_size_nm: "),
}


@pytest.mark.parametrize("case", sorted(BAD_INPUTS))
@pytest.mark.parametrize("command", ["peaks", "analyze"])
def test_bad_input_exits_2_naming_the_file(case, command, tmp_path, capsys):
    # DESIGN.md contract: bad input -> one-line message naming the file, exit 2, no traceback
    path = BAD_INPUTS[case](tmp_path)
    argv = [command, str(path)] + (["--out", str(tmp_path / "out")] if command == "analyze" else [])
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert path.name in err
    assert "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()


def test_usage_errors_exit_2(capsys):
    assert main(["scene", "nonsense", "--out", "x"]) == 2
    assert main([]) == 2
    assert main(["analyze"]) == 2


def test_version_and_help_exit_0(capsys):
    assert main(["--version"]) == 0
    assert "domains" in capsys.readouterr().out
    for command in ("demo", "analyze", "peaks", "scene"):
        assert main([command, "--help"]) == 0


def test_console_script_is_installed_and_reports_errors_without_traceback(tmp_path):
    done = subprocess.run([sys.executable, "-m", "domains.cli", "peaks", str(tmp_path / "missing.npy")],
                          capture_output=True, text=True)
    assert done.returncode == 2
    assert "missing.npy" in done.stderr and "Traceback" not in done.stderr


def test_scene_writes_inputs_with_sidecars_and_truth(tmp_path, capsys):
    out = tmp_path / "scene"
    assert main(["scene", "cdw", "--out", str(out), "--seed", "3"]) == 0
    names = sorted(p.name for p in out.iterdir())
    assert "topography.npy" in names and "topography.json" in names and "truth.json" in names
    sidecar = json.loads((out / "topography.json").read_text())
    assert sidecar["pixel_size_nm"] and sidecar["channel"] == "topography"
    maps = [n for n in names if n.startswith("map_") and n.endswith(".npy")]
    assert len(maps) == 2
    # never overwritten without --overwrite
    assert main(["scene", "cdw", "--out", str(out)]) == 2
    assert main(["scene", "cdw", "--out", str(out), "--overwrite"]) == 0


@pytest.mark.parametrize("kind, roles, order", [
    ("cdw", {"bragg", "superlattice"}, "3x3"),          # truth: a 3x3 CDW on a hexagonal lattice
    ("cdw2x2", {"bragg", "superlattice"}, "2x2"),       # truth: a 2x2 CDW
    ("stripes", {"bragg", "superlattice"}, "4x4"),      # truth: period-4a stripes along both square axes
    ("moire", {"moire"}, None),                         # truth: a twisted bilayer, atoms not resolved
    ("plain", {"bragg"}, None),                         # truth: the lattice alone
])
def test_peaks_prints_the_right_roles_for_each_scene(kind, roles, order, tmp_path, capsys):
    out = tmp_path / kind
    assert main(["scene", kind, "--out", str(out)]) == 0
    capsys.readouterr()
    assert main(["peaks", str(out / "topography.npy"), "--json"]) == 0
    table = json.loads(capsys.readouterr().out)
    found = {row["role"] for row in table["peaks"]}
    assert roles <= found
    assert table["verdict"]["superlattice"] == order
    if kind == "plain":
        assert "superlattice" not in found
