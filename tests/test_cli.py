"""The `domains` command: exit statuses, messages naming the file, no tracebacks (docs/README.md contract)."""

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
    # docs/README.md contract: bad input -> one-line message naming the file, exit 2, no traceback
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
    # truth: period-4a unidirectional stripes along either square axis, in orientational domains
    ("stripes", {"bragg", "superlattice"}, "4x1 stripes (2 orientations)"),
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


# --------------------------------------------------------------------------- interrupted and concurrent runs

import os  # noqa: E402
import signal  # noqa: E402
import time  # noqa: E402

from domains.io import BARRIER_ENV  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]


def _lattice_image(n=96, pixel_nm=0.056, a_nm=0.337):
    """A hexagonal lattice with a 3x3 modulation and noise: an input the whole analysis accepts (derived)."""
    y, x = np.mgrid[:n, :n] * pixel_nm
    g = 4 * np.pi / (np.sqrt(3) * a_nm)
    image = np.zeros((n, n))
    for k in range(3):
        angle = np.deg2rad(8.0 + 60.0 * k)
        qx, qy = g * np.cos(angle), g * np.sin(angle)
        image += np.cos(qx * x + qy * y) + 0.4 * np.cos((qx * x + qy * y) / 3)
    return image + np.random.default_rng(1).normal(scale=0.1, size=image.shape)


def _start(argv, cwd, barrier=None):
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    env.pop(BARRIER_ENV, None)
    if barrier is not None:
        env[BARRIER_ENV] = str(barrier)
    # Ctrl-C must reach the child even when this test runs in a background job (which ignores SIGINT).
    return subprocess.Popen([sys.executable, "-m", "domains.cli", *argv], cwd=cwd, env=env, text=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))


def _wait_for(path, process, limit_s=600):
    # A guard against hanging forever, not a timing assertion.
    deadline = time.monotonic() + limit_s
    while not path.exists():
        if process.poll() is not None:
            raise AssertionError(f"the run ended early: {process.returncode} {process.communicate()}")
        if time.monotonic() > deadline:
            process.kill()
            raise AssertionError("the run never reached the final rename")
        time.sleep(0.05)


def _lines(text):
    return [line for line in text.replace("\r", "\n").splitlines() if line.strip() and "step" not in line]


@pytest.fixture
def run_folder(tmp_path):
    inputs, work, barrier = tmp_path / "in", tmp_path / "work", tmp_path / "barrier"
    for folder in (inputs, work, barrier):
        folder.mkdir()
    topo = inputs / "topo.npy"
    np.save(topo, _lattice_image())
    (inputs / "topo.json").write_text(json.dumps({"pixel_size_nm": 0.056}))
    return topo, work, barrier / "go"


def test_a_run_killed_while_writing_is_cleaned_up_by_the_next(run_folder):
    topo, work, go = run_folder
    argv = ["analyze", str(topo), "--out", str(work / "res")]
    first = _start(argv, work, barrier=go)
    _wait_for(Path(str(go) + ".waiting"), first)
    stale = [p for p in work.iterdir() if p.name.startswith(".res.tmp-")]
    # The killed run leaves a complete-looking hidden folder (derived: written before the final rename)
    assert len(stale) == 1 and (stale[0] / "summary.json").is_file()
    first.send_signal(signal.SIGKILL)
    first.communicate()
    assert stale[0].exists() and not (work / "res").exists()  # SIGKILL runs no clean-up (POSIX, from memory)

    second = _start(argv, work)
    out, err = second.communicate()
    assert second.returncode == 0, err  # the next run is not blocked by the dead one's lock (flock(2), from memory)
    assert any("note: removed" in line and stale[0].name in line for line in _lines(err)), err  # named in a note
    assert sorted(p.name for p in work.iterdir()) == ["res"]  # no temp folder, no lock file left (common practice)
    assert json.loads((work / "res" / "summary.json").read_text())["input"]["shape"] == [96, 96]  # a whole bundle


def test_two_runs_on_one_out_give_one_bundle_and_one_exit_2(run_folder):
    topo, work, go = run_folder
    argv = ["analyze", str(topo), "--out", str(work / "res")]
    first = _start(argv, work, barrier=go)
    _wait_for(Path(str(go) + ".waiting"), first)  # the first run holds the lock and is about to rename
    second = _start(argv, work)
    out, err = second.communicate()
    lines = _lines(err)
    assert second.returncode == 2, err  # bad usage: the folder is taken (project contract, common practice)
    assert len(lines) == 1 and f"pid {first.pid}" in lines[0], err  # names the other run (common practice)
    assert "Traceback" not in err  # a message, not a crash (common practice, no source)
    go.write_text("")
    out, err = first.communicate()
    assert first.returncode == 0, err  # the first run is not disturbed (common practice, no source)
    assert sorted(p.name for p in work.iterdir()) == ["res"]  # exactly one bundle, nothing else (common practice)
    assert (work / "res" / "summary.json").is_file()  # the bundle is complete (derived: renamed when complete)

    third = _start(argv, work)  # a later run without --overwrite never replaces it
    out, err = third.communicate()
    assert third.returncode == 2 and "--overwrite" in err  # (project contract, common practice)


def test_ctrl_c_while_writing_exits_130_with_one_line_and_leaves_nothing(run_folder):
    topo, work, go = run_folder
    run = _start(["analyze", str(topo), "--out", str(work / "res")], work, barrier=go)
    _wait_for(Path(str(go) + ".waiting"), run)
    run.send_signal(signal.SIGINT)
    out, err = run.communicate()
    assert run.returncode == 130  # 128 + SIGINT, the shell convention (POSIX shells, from memory)
    assert "Traceback" not in err and len(_lines(err)) == 1 and "interrupted" in err  # one line (common practice)
    assert list(work.iterdir()) == []  # the temporary folder and the lock are removed (common practice, no source)


def test_debug_is_accepted_anywhere(tmp_path, capsys):
    missing = str(tmp_path / "missing.npy")
    for argv in (["--debug", "peaks", missing], ["peaks", "--debug", missing], ["peaks", missing, "--debug"]):
        assert main(argv) == 2  # an input error, whatever the position of --debug (common practice, no source)
        err = capsys.readouterr().err
        assert "Traceback" in err and err.strip().splitlines()[-1].startswith("domains peaks: error:")  # (idem)
    assert main(["peaks", missing]) == 2
    assert "Traceback" not in capsys.readouterr().err  # without --debug, one line (common practice, no source)


def test_an_error_is_printed_after_the_progress_bar_is_closed(capsys):
    from tqdm import tqdm

    from domains import cli

    bar = tqdm(total=9, desc="domains", file=sys.stderr, leave=False)
    bar.update(2)
    cli._say("domains analyze: error: x.npy: something")
    err = capsys.readouterr().err
    # the bar is gone and the message sits alone on the last line (common practice, no source)
    assert bar not in getattr(tqdm, "_instances", set())
    assert err.replace("\r", "\n").splitlines()[-1] == "domains analyze: error: x.npy: something"


def test_usage_errors_are_one_line(capsys):
    assert main(["analyze", "topo.npy", "--pixel-size", "abc"]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 1 and "--pixel-size" in lines[0]  # one line naming the option (common practice)


@pytest.mark.parametrize("value, says", [
    ("local:0", "local:N with N a whole number of workers"),
    ("local:two", "local:N with N a whole number of workers"),
    ("http://127.0.0.1:8787/status", "is a web address"),
    ("tcp://", "expected an address such as tcp://HOST:PORT"),
    ("host:99999", "port 99999 is out of range"),
    ("", "expected an address"),
])
def test_a_bad_scheduler_value_is_one_line_exit_2(value, says, tmp_path, capsys):
    assert main(["analyze", str(tmp_path / "topo.npy"), "--scheduler", value, "--out", str(tmp_path / "out")]) == 2
    lines = capsys.readouterr().err.strip().splitlines()
    # docs/README.md contract: one line naming the option and what is wrong, before any file is read
    assert len(lines) == 1 and "--scheduler" in lines[0] and says in lines[0]
    assert not (tmp_path / "out").exists()


def test_import_and_help_do_not_load_dask_distributed():
    code = ("import sys, contextlib, io\n"
            "import domains, domains.cli\n"
            "with contextlib.redirect_stdout(io.StringIO()):\n"
            "    assert domains.cli.main(['analyze', '--help']) == 0\n"
            "print(sorted(m for m in sys.modules if m == 'distributed' or m.startswith('distributed.')))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.strip() == "[]"  # the brief: dask.distributed is imported only when --scheduler is used
