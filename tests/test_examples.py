"""Every script in examples/ runs to completion, so the examples never rot."""

import os
import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = sorted((Path(__file__).parent.parent / "examples").glob("*.py"))


def test_there_are_examples():
    assert EXAMPLES, "examples/ holds no script"


@pytest.mark.parametrize("script", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_example_runs(script, tmp_path):
    env = {**os.environ, "DOMAINS_EXAMPLE_HEADLESS": "1", "MPLBACKEND": "Agg"}
    done = subprocess.run([sys.executable, str(script)], cwd=tmp_path, env=env, capture_output=True, text=True,
                          timeout=600)
    assert done.returncode == 0, f"{script.name} failed:\n{done.stdout[-2000:]}\n{done.stderr[-4000:]}"
    assert done.stdout.strip(), f"{script.name} printed nothing"
