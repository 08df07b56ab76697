"""The run's step bar follows the dask computations inside a step (issue 11: a lazy run must not sit on
"step 3 of 8" for minutes without a sign of life).

What is checked against: the number of blocks a computation runs, counted independently by the
block function itself (a side channel, not the bar); dask's own scheduling model (each block of a
``map_blocks`` is at least one task); and sys.modules of a fresh interpreter for what gets imported.
"""

import json
import os
import subprocess
import sys
import threading
from pathlib import Path

import dask.array as dask_array
import numpy as np
import pytest

from domains import _progress, pipeline
from domains.synth import cdw_scene

ROOT = Path(__file__).resolve().parents[1]


def _counted_blocks(n_side=4, block=32):
    """A lazy array of n_side^2 blocks whose block function counts its own calls."""
    calls, lock = [0], threading.Lock()

    def plus_one(b):
        with lock:
            calls[0] += 1
        return b + 1

    x = dask_array.ones((n_side * block,) * 2, chunks=block).map_blocks(plus_one, dtype=float)
    calls[0] = 0  # map_blocks may call the function once on an empty block to learn its output type
    return x, calls


def _keep_bars(monkeypatch):
    made = []
    original = _progress.progress

    def keep(total, enabled, **kwargs):
        bar = original(total, enabled, **kwargs)
        made.append(bar)
        return bar

    monkeypatch.setattr(pipeline, "_progress", keep)
    return made


def test_local_scheduler_counts_every_block_of_a_compute():
    from dask.callbacks import Callback

    x, calls = _counted_blocks()
    before = set(Callback.active)
    bar = _progress.Progress(2, enabled=True)
    bar("lock-in")
    x.compute(scheduler="threads")
    bar("done")
    bar.close()
    done, total = bar.tasks["lock-in"]
    # reference: the block function's own call count (16 blocks), and dask's model: >= one task per block
    assert calls[0] == 16
    assert done == total >= calls[0]
    # closing the bar leaves dask's callbacks as they were
    assert set(Callback.active) == before


def test_lazy_analyze_with_progress_reports_tasks_in_the_bar(monkeypatch, capsys):
    made = _keep_bars(monkeypatch)
    scene = cdw_scene(shape=(256, 256), n_domains=2, rng=3)
    topo = scene.topography
    lazy = topo.with_data(dask_array.from_array(np.asarray(topo.data), chunks=64))
    pipeline.analyze(lazy, config=pipeline.Config(drift=False), progress=True)
    (bar,) = made
    # reference: a lazy run computes its levelling and lock-in with dask (docs/methods.md, large data):
    # those steps ran tasks, every one of them finished
    assert bar.tasks.get("level", [0, 0])[1] > 0 and bar.tasks.get("lock-in", [0, 0])[1] > 0, bar.tasks
    assert all(done == total for done, total in bar.tasks.values()), bar.tasks
    # the count was drawn in the bar's postfix
    assert " tasks]" in capsys.readouterr().err


def test_no_progress_is_silent_and_registers_nothing(monkeypatch, capsys):
    from dask.callbacks import Callback

    made = _keep_bars(monkeypatch)
    followers = []
    monkeypatch.setattr(_progress, "_TaskCounter", lambda *a: followers.append(a))
    monkeypatch.setattr(_progress, "_ClientPoller", lambda *a: followers.append(a))
    scene = cdw_scene(shape=(192, 192), n_domains=2, rng=3)
    lazy = scene.topography.with_data(dask_array.from_array(np.asarray(scene.topography.data), chunks=64))
    computes = []

    class Spy(Callback):  # the test's own callback: proves that the run did compute with dask
        def _start(self, dsk):
            computes.append(len(dsk))

    with Spy():
        pipeline.analyze(lazy, config=pipeline.Config(drift=False), progress=False)
    (bar,) = made
    # reference: the requirement (progress=False draws nothing and follows nothing)
    assert computes, "the lazy run computed nothing with dask"
    assert followers == []
    assert bar.tasks == {}
    assert capsys.readouterr().err == ""


PROBE = """
import json, sys
from domains import pipeline
from domains.synth import cdw_scene
scene = cdw_scene(shape=(192, 192), n_domains=2, rng=3)
pipeline.analyze(scene.topography, config=pipeline.Config(drift=False), progress=True)
print(json.dumps([m for m in ("dask", "distributed") if m in sys.modules]))
"""


def test_an_in_memory_run_with_progress_never_imports_dask():
    # reference: sys.modules of a fresh interpreter (the bar looks at dask only if something imported it)
    done = subprocess.run([sys.executable, "-c", PROBE], cwd=ROOT, capture_output=True, text=True, timeout=300,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout.strip().splitlines()[-1]) == []


def test_a_bar_without_a_client_never_imports_dask_distributed():
    # (dask itself imports it at its first compute, to look for a client: the probe computes nothing)
    code = ("import sys, dask.array as da\nfrom domains._progress import Progress\n"
            "bar = Progress(1, enabled=True)\nkind = type(bar._stop[0].__self__).__name__\nbar.close()\n"
            "print('distributed' in sys.modules, kind)")
    done = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, timeout=120,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == "False TaskCounter"  # reference: sys.modules of a fresh interpreter


_CALLS = {"n": 0}
_LOCK = threading.Lock()


def _plus_one_counted(b):
    """Module level: a client pickles it by reference, so the in-process worker counts here."""
    with _LOCK:
        _CALLS["n"] += 1
    return b + 1


@pytest.fixture
def client():  # closed after its test: a client left open would take the later tests' computations
    import distributed

    with distributed.Client(processes=False, n_workers=1, threads_per_worker=2, dashboard_address=None) as c:
        yield c


def test_distributed_counts_come_from_the_scheduler(client):
    from distributed import futures_of, wait

    x = dask_array.ones((128, 128), chunks=32).map_blocks(_plus_one_counted, dtype=float)
    _CALLS["n"] = 0  # after any call on an empty block made to learn the output type
    bar = _progress.Progress(2, enabled=True)
    try:
        (stop,) = bar._stop
        poller = stop.__self__
        assert isinstance(poller, _progress._ClientPoller)  # the client in use was found
        held = client.persist(x)
        wait(futures_of(held))
        done, total = poller.counts()
    finally:
        bar.close()
    # reference: the block function's own call count, and dask's model (>= one task per block; the
    # blocks of ones() they read are done too, released or in memory)
    assert _CALLS["n"] == 16
    assert done == total >= _CALLS["n"]
    del held


def test_writing_a_lazy_bundle_is_followed_too(monkeypatch, tmp_path):
    from domains import io

    made = _keep_bars(monkeypatch)
    scene = cdw_scene(shape=(256, 256), n_domains=2, rng=3)
    path = tmp_path / "topo.npy"
    np.save(path, np.asarray(scene.topography.data, np.float32))
    (tmp_path / "topo.json").write_text(json.dumps({"pixel_size_nm": list(scene.topography.pixel_size_nm)}))
    monkeypatch.setattr(io, "LAZY_THRESHOLD_BYTES", 1024)  # this small file is opened lazily
    pipeline.analyze_files(str(path), config=pipeline.Config(drift=False), out=tmp_path / "bundle", progress=True)
    names = [bar._name for bar in made]
    # reference: the flow of analyze_files (analysis, then the bundle; docs of pipeline.analyze_files)
    assert names == ["done", "writing the bundle"], names
    # the lazy maps (labels, walls, topograph) are computed while the bundle is written
    done, total = made[1].tasks["writing the bundle"]
    assert done == total > 0
