"""`domains analyze --scheduler`: the run on a dask.distributed cluster executes tasks there and gives the local bundle."""

import json

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from domains.cli import main


@pytest.fixture(scope="module")
def cluster():
    from dask.distributed import Client, LocalCluster

    # Two worker processes on the loopback interface, one thread each; the status server on a free port.
    with LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1", processes=True,
                      dashboard_address="127.0.0.1:0") as local:
        # Not the default scheduler: the local run below must not use it.
        with Client(local, set_as_default=False) as client:
            yield client


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """A small CDW scene written as a zarr store with irregular chunks, and its sidecar."""
    import zarr

    from domains.synth import cdw_scene

    scene = cdw_scene(shape=(192, 192), n_domains=2, rng=3)
    folder = tmp_path_factory.mktemp("scene")
    path = folder / "topo.zarr"
    image = np.asarray(scene.topography.data, dtype=np.float32)
    array = zarr.open_array(str(path), mode="w", shape=image.shape, chunks=(50, 70), dtype=image.dtype)
    array[...] = image
    (folder / "topo.json").write_text(json.dumps({"pixel_size_nm": scene.topography.pixel_size_nm[0],
                                                  "channel": "topography", "units": "nm"}))
    return path


def _bundle(path):
    from domains.io import read_bundle

    import zarr

    bundle = read_bundle(path)
    maps = {name: np.asarray(array[...]) for name, array in bundle.maps.members(max_depth=None)
            if isinstance(array, zarr.Array)}
    return bundle.summary, maps, bundle.tables


def test_analyze_on_a_local_cluster_runs_there_and_gives_the_local_bundle(cluster, store, tmp_path, capsys,
                                                                         monkeypatch):
    from domains import io

    # The local run opens the store lazily too (as every input is under a scheduler): the same graph.
    monkeypatch.setattr(io, "LAZY_THRESHOLD_BYTES", 0)
    assert main(["analyze", str(store), "--out", str(tmp_path / "here")]) == 0
    monkeypatch.undo()
    from distributed import get_task_stream

    address = cluster.scheduler.address
    with get_task_stream(client=cluster) as stream:
        assert main(["analyze", str(store), "--scheduler", address, "--out", str(tmp_path / "there")]) == 0
    # the brief: the cluster executed the run's tasks (the workers opened and read the store)
    ran = stream.data
    assert len(ran) > 0
    assert {task["worker"] for task in ran} <= set(cluster.scheduler_info()["workers"])
    summary_here, maps_here, tables_here = _bundle(tmp_path / "here")
    summary_there, maps_there, tables_there = _bundle(tmp_path / "there")
    # derived: the same graph on the same data gives the same numbers, wherever it runs; the notes differ
    # only in saying how a lazy input was read (under a scheduler every input is opened lazily)
    notes_there = summary_there.pop("notes")
    summary_here.pop("notes")
    assert any(n.startswith("Lazy run:") for n in notes_there)
    assert summary_there == summary_here
    assert tables_there == tables_here
    assert sorted(maps_there) == sorted(maps_here) and "labels" in " ".join(maps_here)
    for name in maps_here:
        assert_array_equal(maps_there[name], maps_here[name], err_msg=name)


def test_local_n_starts_its_own_cluster_and_closes_it():
    import dask.array as da

    from domains._cluster import scheduler_client

    from distributed import get_task_stream

    values = np.arange(1000.0)
    with scheduler_client("local:1") as client:
        workers = client.scheduler_info()["workers"]
        assert len(workers) == 1 and all(w.startswith("tcp://127.0.0.1:") for w in workers)  # documented
        with get_task_stream(client=client) as stream:
            total = float(da.from_array(values, chunks=100).sum().compute())
        # numpy as the reference; the default scheduler inside is the cluster, which ran the tasks
        assert total == float(values.sum()) and len(stream.data) > 0
    # documented: the client of the cluster started for the run is closed at its end (no default client is left)
    assert client.status == "closed" and _no_client()


def _no_client():
    from distributed import default_client

    try:
        default_client()
    except ValueError:
        return True
    return False


def test_an_unreachable_scheduler_is_one_line_exit_2(store, tmp_path, capsys, monkeypatch):
    import socket

    import domains._cluster

    monkeypatch.setattr(domains._cluster, "CONNECT_TIMEOUT_S", 2.0)
    with socket.socket() as s:  # a port on which nothing listens once closed
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    capsys.readouterr()
    assert main(["analyze", str(store), "--scheduler", f"tcp://127.0.0.1:{port}", "--out", str(tmp_path / "x")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    # docs/README.md contract: one line naming the option, exit 2, nothing written
    assert len(err) == 1 and "--scheduler" in err[0] and f"127.0.0.1:{port}" in err[0]
    assert "Traceback" not in err[0]
    assert not (tmp_path / "x").exists()


@pytest.mark.parametrize("name", ["image.npy", "image.tif", "tiled.tif", "image.h5:/topo"])
def test_files_opened_lazily_are_read_on_the_workers(name, cluster, tmp_path):
    import h5py
    import tifffile

    from distributed import get_task_stream

    from domains.io import load_scan

    image = np.random.default_rng(0).normal(size=(120, 90)).astype(np.float32)
    np.save(tmp_path / "image.npy", image)
    tifffile.imwrite(tmp_path / "image.tif", image)
    tifffile.imwrite(tmp_path / "tiled.tif", image, compression="zlib", tile=(32, 32))
    with h5py.File(tmp_path / "image.h5", "w") as h5:
        h5["topo"] = image
    scan = load_scan(f"{tmp_path}/{name}", pixel_size_nm=0.05, lazy_threshold_bytes=0)
    assert scan.is_lazy
    with get_task_stream(client=cluster) as stream:
        total = cluster.compute(scan.data.astype(float).sum()).result()
    # numpy as the reference (derived: float64 sums of 10^4 terms in another order agree to 1e-12); the graph
    # (paths, not open files) travelled to the workers, which read the file
    assert total == pytest.approx(float(image.astype(float).sum()), rel=1e-12, abs=1e-9)
    assert len(stream.data) > 0
