"""``import domains`` and ``domains --help`` stay light: the heavy packages load only when a step needs them.

Each check runs in a fresh interpreter (the test process itself has imported everything) and
reads ``sys.modules`` there. No timing is asserted: the time of ``domains --help`` is a line of
the benchmark table (``make bench``).
"""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

# Packages that the parsing of a command line never needs (issue 10, "Analysis apart from
# presentation": no matplotlib, no napari, no dask.distributed; skimage and scipy.ndimage are
# kept out as well since no option parser needs them).
HEAVY = ("matplotlib", "napari", "distributed", "dask.distributed", "skimage", "scipy.ndimage", "qtpy")

PROBE = """
import contextlib, io, json, sys
{code}
print(json.dumps(sorted(m for m in {heavy!r} if m in sys.modules)))
"""

CASES = {
    "import domains": "import domains",
    "domains --help": (
        "from domains.cli import main\n"
        "with contextlib.redirect_stdout(io.StringIO()):\n"
        "    status = main(['--help'])\n"
        "assert status == 0, status"
    ),
    "domains analyze --help": (
        "from domains.cli import main\n"
        "with contextlib.redirect_stdout(io.StringIO()):\n"
        "    status = main(['analyze', '--help'])\n"
        "assert status == 0, status"
    ),
    "domains --version": (
        "from domains.cli import main\n"
        "with contextlib.redirect_stdout(io.StringIO()):\n"
        "    status = main(['--version'])\n"
        "assert status == 0, status"
    ),
}


@pytest.mark.parametrize("case", sorted(CASES))
def test_startup_imports_nothing_heavy(case):
    # Reference: the requirement itself (issue 10, item 4); the modules loaded are read from
    # sys.modules of a fresh interpreter that runs only this case, from this source tree.
    probe = PROBE.format(code=CASES[case], heavy=HEAVY)
    done = subprocess.run([sys.executable, "-c", probe], cwd=ROOT, capture_output=True, text=True, timeout=120,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert done.returncode == 0, done.stderr
    loaded = json.loads(done.stdout.strip().splitlines()[-1])
    assert loaded == [], f"{case} imported {', '.join(loaded)}"


def test_probe_sees_a_heavy_import():
    # The probe itself can fail: a case that imports matplotlib is reported (common practice, no
    # source: a check that is never seen to fail proves nothing).
    probe = PROBE.format(code="import matplotlib", heavy=HEAVY)
    done = subprocess.run([sys.executable, "-c", probe], cwd=ROOT, capture_output=True, text=True, timeout=120,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout.strip().splitlines()[-1]) == ["matplotlib"]
