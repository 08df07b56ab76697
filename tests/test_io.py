"""Tests of domains.io: loading every open format, sidecars, lazy opening, saving, provenance and the bundle."""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import re

import dask.array as da
import h5py
import numpy as np
import pytest
import tifffile
import zarr
from numpy.testing import assert_allclose, assert_array_equal

from domains import InputError, Scan
from domains.io import (
    json_safe,
    load_scan,
    package_versions,
    provenance,
    read_bundle,
    save_scan,
    sha256_file,
    write_bundle,
)

PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 16  # the signature is all write_bundle checks


def _image(shape=(12, 15), seed=0):
    return np.random.default_rng(seed).normal(size=shape)


def _sidecar(data_path, **content):
    data_path.with_suffix(".json").write_text(json.dumps(content))


def _no_hidden(folder):
    return [p.name for p in folder.iterdir() if p.name.startswith(".")]


# --------------------------------------------------------------------------- round trips


def test_npy_round_trip_with_sidecar(tmp_path):
    image = _image()
    path = tmp_path / "topo.npy"
    np.save(path, image)
    _sidecar(path, pixel_size_nm=[0.05, 0.04], channel="conductance", bias_V=-0.3, setpoint_A=2e-10)
    scan = load_scan(path)
    assert_array_equal(scan.data, image)  # exact: np.save/np.load reference round trip
    assert scan.pixel_size_nm == (0.05, 0.04)  # sidecar value, (row, col)
    assert (scan.channel, scan.bias_V, scan.setpoint_A) == ("conductance", -0.3, 2e-10)
    assert scan.source == str(path)
    assert scan.mask is None  # no NaN, no sidecar mask
    assert not scan.is_lazy


def test_npz_first_and_named_array(tmp_path):
    a, b = _image(seed=1), _image(seed=2)
    path = tmp_path / "maps.npz"
    np.savez(path, first=a, second=b)
    _sidecar(path, pixel_size_nm=0.1)
    assert_array_equal(load_scan(path).data, a)  # first array in archive order (numpy.savez reference)
    named = load_scan(f"{path}:second")
    assert_array_equal(named.data, b)
    assert named.source == f"{path}:second"
    with pytest.raises(InputError, match=re.escape(f"{path}:third") + ".*no array 'third'"):
        load_scan(f"{path}:third")


@pytest.mark.parametrize("compression", [None, "zlib"])
def test_tiff_round_trip(tmp_path, compression):
    image = _image().astype(np.float32)
    path = tmp_path / "topo.tif"
    tifffile.imwrite(path, image, compression=compression)
    scan = load_scan(path, pixel_size_nm=0.07)
    assert_array_equal(scan.data, image)  # exact: tifffile is the reference writer
    assert scan.data.dtype == np.float32


def test_hdf5_named_and_single_dataset(tmp_path):
    image = _image()
    path = tmp_path / "data.h5"
    with h5py.File(path, "w") as h5:
        h5.create_dataset("scans/topo", data=image)
    _sidecar(path, pixel_size_nm=0.05, bias_V=0.2)
    scan = load_scan(f"{path}:/scans/topo")
    assert_array_equal(scan.data, image)  # h5py reference writer
    assert scan.bias_V == 0.2  # sidecar next to the file, not the dataset
    assert_array_equal(load_scan(path).data, image)  # the only dataset is taken


def test_hdf5_two_datasets_need_a_name(tmp_path):
    path = tmp_path / "two.h5"
    with h5py.File(path, "w") as h5:
        h5["a"] = _image()
        h5["b"] = _image()
    with pytest.raises(InputError, match=re.escape(str(path)) + ".*/a, /b"):
        load_scan(path, pixel_size_nm=0.1)
    with pytest.raises(InputError, match="no dataset /c"):
        load_scan(f"{path}:/c", pixel_size_nm=0.1)


def test_zarr_root_array_and_group_path(tmp_path):
    image = _image()
    root = tmp_path / "root.zarr"
    zarr.open_array(str(root), mode="w", shape=image.shape, dtype=image.dtype)[...] = image
    _sidecar(root, pixel_size_nm=0.05)  # root.json next to root.zarr
    assert_array_equal(load_scan(root).data, image)  # zarr reference writer

    store = tmp_path / "store.zarr"
    group = zarr.open_group(str(store), mode="w")
    group.create_array("maps/topo", shape=image.shape, dtype=image.dtype)[...] = image
    group.create_array("maps/other", shape=(3, 3), dtype="f8")
    assert_array_equal(load_scan(f"{store}:/maps/topo", pixel_size_nm=0.05).data, image)
    with pytest.raises(InputError, match=re.escape(str(store)) + ".*name the array"):
        load_scan(store, pixel_size_nm=0.05)


@pytest.mark.parametrize("separator", [",", " ", "\t", "  "])
def test_text_matrix(tmp_path, separator):
    image = np.round(_image((5, 4)), 6)
    path = tmp_path / ("m.csv" if separator == "," else "m.txt")
    lines = ["# a comment line"] + [separator.join(repr(float(v)) for v in row) for row in image]
    path.write_text("\n".join(lines) + "\n")
    assert_array_equal(load_scan(path, pixel_size_nm=0.1).data, image)  # repr() round trip of floats is exact


def test_grid_with_energies(tmp_path):
    grid = _image((4, 10, 11))
    path = tmp_path / "grid.npy"
    np.save(path, grid)
    _sidecar(path, pixel_size_nm=0.2, channel="conductance", energies_V=[-0.1, 0.0, 0.1, 0.2])
    scan = load_scan(path)
    assert scan.is_grid and scan.shape == (4, 10, 11)
    assert_allclose(scan.energies_V, [-0.1, 0.0, 0.1, 0.2], rtol=0, atol=0)  # sidecar values
    h5 = tmp_path / "cube.h5"  # its own name: grid.json would be its sidecar too
    with h5py.File(h5, "w") as f:
        f["g"] = grid
    scan = load_scan(f"{h5}:/g", pixel_size_nm=0.2, energies_V=[1, 2, 3, 4])
    assert_array_equal(scan.data, grid)
    with pytest.raises(InputError, match=re.escape(str(h5)) + ".*energies_V"):
        load_scan(f"{h5}:/g", pixel_size_nm=0.2)


def test_nan_pixels_become_mask_and_data_unchanged(tmp_path):
    image = _image()
    image[2, 3] = np.nan
    image[5, 7] = np.inf
    path = tmp_path / "nan.npy"
    np.save(path, image)
    scan = load_scan(path, pixel_size_nm=0.05)
    expected = np.zeros(image.shape, bool)
    expected[2, 3] = expected[5, 7] = True
    assert_array_equal(scan.mask, expected)  # derived: mask = ~isfinite
    assert np.isnan(scan.data[2, 3]) and np.isinf(scan.data[5, 7])  # data not modified


def test_grid_nan_in_one_slice_masks_the_pixel(tmp_path):
    grid = _image((3, 6, 7))
    grid[1, 2, 2] = np.nan
    path = tmp_path / "g.npy"
    np.save(path, grid)
    scan = load_scan(path, pixel_size_nm=0.1, energies_V=[0, 1, 2])
    assert scan.mask.shape == (6, 7) and scan.mask.sum() == 1 and scan.mask[2, 2]  # derived: any over energy


def test_sidecar_mask_file_combined_with_nan(tmp_path):
    image = _image()
    image[0, 0] = np.nan
    path = tmp_path / "topo.npy"
    np.save(path, image)
    user = np.zeros(image.shape, bool)
    user[4:6, 4:6] = True
    (tmp_path / "masks").mkdir()
    np.save(tmp_path / "masks" / "bad.npy", user)
    _sidecar(path, pixel_size_nm=0.05, mask="masks/bad.npy")
    scan = load_scan(path)
    expected = user.copy()
    expected[0, 0] = True
    assert_array_equal(scan.mask, expected)  # derived: sidecar mask OR non-finite


def test_sidecar_mask_wrong_shape(tmp_path):
    path = tmp_path / "topo.npy"
    np.save(path, _image())
    np.save(tmp_path / "m.npy", np.zeros((3, 3), bool))
    _sidecar(path, pixel_size_nm=0.05, mask="m.npy")
    with pytest.raises(InputError, match=re.escape(str(path)) + ".*m.npy.*shape"):
        load_scan(path)


def test_keywords_override_sidecar_and_unknown_keys_kept(tmp_path):
    path = tmp_path / "topo.npy"
    np.save(path, _image())
    _sidecar(path, pixel_size_nm=0.05, channel="current", bias_V=0.1, sample="synthetic 1T", operator_note=3)
    scan = load_scan(path, pixel_size_nm=(0.02, 0.03), channel="topography", bias_V=-1.0, setpoint_A=5e-11)
    assert scan.pixel_size_nm == (0.02, 0.03)  # keyword wins over sidecar
    assert (scan.channel, scan.bias_V, scan.setpoint_A) == ("topography", -1.0, 5e-11)
    assert scan.metadata["sample"] == "synthetic 1T" and scan.metadata["operator_note"] == 3
    assert scan.metadata["sidecar_path"] == str(path.with_suffix(".json"))


def test_missing_pixel_size_names_the_file(tmp_path):
    path = tmp_path / "nosize.npy"
    np.save(path, _image())
    with pytest.raises(InputError, match=re.escape(str(path)) + ".*--pixel-size.*sidecar") as info:
        load_scan(path)
    assert str(info.value).startswith(str(path))


# --------------------------------------------------------------------------- lazy opening


def _graph_bytes(array):
    # The pickled graph is what a scheduler ships around; it must not carry the data.
    return len(pickle.dumps(dict(array.__dask_graph__())))


def _write_npy(path, a):
    np.save(path, a)


def _write_tiff(path, a):
    tifffile.imwrite(path, a)


def _write_tiff_tiled(path, a):
    tifffile.imwrite(path, a, compression="zlib", tile=(32, 32))


def _write_h5(path, a):
    with h5py.File(path, "w") as h5:
        h5["d"] = a


def _write_zarr(path, a):
    z = zarr.open_array(str(path), mode="w", shape=a.shape, dtype=a.dtype, chunks=(32, 32))
    z[...] = a


def _overwrite_h5(path, a):
    with h5py.File(path, "r+") as h5:
        h5["d"][...] = a


def _overwrite_zarr(path, a):
    zarr.open_array(str(path), mode="r+")[...] = a


LAZY_CASES = {
    "npy": ("x.npy", _write_npy, _write_npy),
    "tiff": ("x.tif", _write_tiff, _write_tiff),
    "tiff-tiled": ("x.tif", _write_tiff_tiled, _write_tiff_tiled),
    "hdf5": ("x.h5", _write_h5, _overwrite_h5),
    "zarr": ("x.zarr", _write_zarr, _overwrite_zarr),
}


@pytest.mark.parametrize("case", sorted(LAZY_CASES))
def test_lazy_opening_does_not_read_the_file(tmp_path, case):
    name, write, overwrite = LAZY_CASES[case]
    path = tmp_path / name
    image = _image((64, 96)).astype(np.float32)
    write(path, image)
    scan = load_scan(path, pixel_size_nm=0.05, lazy_threshold_bytes=1024)
    assert scan.is_lazy and isinstance(scan.data, da.Array)
    assert scan.mask is None  # lazily opened: NaN is not searched at load time (documented)
    assert _graph_bytes(scan.data) < image.nbytes // 4  # common practice, no source: no full copy in the graph
    # Changing the file after loading changes what is computed: the load read nothing.
    overwrite(path, image + 1)
    assert_array_equal(scan.data.compute(), image + 1)  # reference writer of each format
    assert_array_equal(scan.data[10:20, 30:40].compute(), (image + 1)[10:20, 30:40])


def test_lazy_npy_reads_through_a_memory_map(tmp_path):
    path = tmp_path / "x.npy"
    np.save(path, _image((64, 64)))
    scan = load_scan(path, pixel_size_nm=0.05, lazy_threshold_bytes=1024)
    sources = [v for v in dict(scan.data.__dask_graph__()).values() if type(v).__name__ == "_LazyFile"]
    if not sources:  # dask may wrap the source inside a task; search its arguments
        sources = [
            dep for v in dict(scan.data.__dask_graph__()).values()
            for dep in getattr(v, "args", ()) if type(dep).__name__ == "_LazyFile"
        ]
    assert sources, "the dask graph should read from the file wrapper"
    sources[0][0:1, 0:1]
    assert isinstance(sources[0]._handle[0], np.memmap)  # numpy memory map underneath


def test_lazy_threshold_small_file_stays_in_memory(tmp_path):
    path = tmp_path / "x.npy"
    np.save(path, _image((8, 8)))
    assert not load_scan(path, pixel_size_nm=0.05, lazy_threshold_bytes=10**6).is_lazy


# --------------------------------------------------------------------------- bad inputs


def _bad(path, match=""):
    with pytest.raises(InputError, match=re.escape(str(path)) + match) as info:
        load_scan(path, pixel_size_nm=0.1)
    assert str(info.value).startswith(str(path))  # the message starts with the path


def test_missing_file(tmp_path):
    _bad(tmp_path / "absent.npy", ".*no such file")


def test_directory_instead_of_file(tmp_path):
    folder = tmp_path / "folder.npy"
    folder.mkdir()
    _bad(folder, ".*directory")
    store = tmp_path / "file.zarr"
    store.write_bytes(b"x")
    _bad(store, ".*zarr store")


@pytest.mark.parametrize("name", ["empty.npy", "empty.txt", "empty.tif", "empty.h5"])
def test_empty_file(tmp_path, name):
    path = tmp_path / name
    path.write_bytes(b"")
    _bad(path, ".*empty")


def test_text_with_only_comments(tmp_path):
    path = tmp_path / "c.txt"
    path.write_text("# nothing\n\n")
    _bad(path, ".*no numbers")


@pytest.mark.parametrize("shape", [(10,), (2, 3, 4, 5)])
def test_wrong_dimensionality(tmp_path, shape):
    path = tmp_path / "bad.npy"
    np.save(path, np.zeros(shape))
    _bad(path, ".*2-D image.*3-D grid")


def test_all_nan(tmp_path):
    path = tmp_path / "nan.npy"
    np.save(path, np.full((5, 5), np.nan))
    _bad(path, ".*no finite pixel")


def test_malformed_sidecar(tmp_path):
    path = tmp_path / "topo.npy"
    np.save(path, _image())
    path.with_suffix(".json").write_text("{pixel_size_nm: 0.05")
    _bad(path, ".*sidecar")
    path.with_suffix(".json").write_text("[0.05]")
    _bad(path, ".*JSON object")


def test_non_numeric_text(tmp_path):
    path = tmp_path / "words.csv"
    path.write_text("1,2,3\n4,five,6\n")
    _bad(path, ".*not a numeric matrix")


def test_ragged_text(tmp_path):
    path = tmp_path / "ragged.txt"
    path.write_text("1 2 3\n4 5\n")
    _bad(path, ".*not a numeric matrix")


@pytest.mark.parametrize("array", [np.array([["a", "b"], ["c", "d"]]), np.ones((3, 3), complex)])
def test_non_numeric_npy(tmp_path, array):
    path = tmp_path / "x.npy"
    np.save(path, array)
    _bad(path, ".*real numbers")


def test_garbage_npy(tmp_path):
    path = tmp_path / "x.npy"
    path.write_bytes(b"this is not an array file")
    _bad(path, ".*not a readable .npy")


def test_rgb_tiff_refused(tmp_path):
    path = tmp_path / "rgb.tif"
    tifffile.imwrite(path, np.zeros((8, 8, 3), np.uint8), photometric="rgb")
    _bad(path, ".*RGB")


def test_unknown_extension(tmp_path):
    path = tmp_path / "x.dat"
    path.write_bytes(b"1")
    _bad(path, ".*unknown file type")


def test_scan_errors_start_with_the_path(tmp_path):
    path = tmp_path / "topo.npy"
    np.save(path, _image())
    _sidecar(path, pixel_size_nm=0.05, channel="height")
    _bad(path, ".*channel")


# --------------------------------------------------------------------------- save_scan


def test_save_scan_round_trip(tmp_path):
    image = _image()
    mask = np.zeros(image.shape, bool)
    mask[1, 1] = True
    scan = Scan(image, pixel_size_nm=(0.05, 0.04), channel="conductance", bias_V=0.4, setpoint_A=1e-10,
                mask=mask, metadata={"kind": "stripes", "seed": np.int64(3)})
    path = save_scan(scan, tmp_path / "scene.npy")
    again = load_scan(path)
    assert_array_equal(again.data, image)  # numpy .npy reference round trip
    assert_array_equal(again.mask, mask)
    assert again.pixel_size_nm == (0.05, 0.04)
    assert (again.channel, again.bias_V, again.setpoint_A) == ("conductance", 0.4, 1e-10)
    assert again.metadata["kind"] == "stripes" and again.metadata["seed"] == 3


def test_save_scan_never_overwrites_unless_asked(tmp_path):
    scan = Scan(np.zeros((4, 4)), pixel_size_nm=0.1)
    path = save_scan(scan, tmp_path / "a.npy")
    with pytest.raises(InputError, match=re.escape(str(path)) + ".*already exists"):
        save_scan(scan.with_data(np.ones((4, 4))), path)
    assert_array_equal(np.load(path), 0)  # untouched
    save_scan(scan.with_data(np.ones((4, 4))), path, overwrite=True)
    assert_array_equal(np.load(path), 1)
    assert _no_hidden(tmp_path) == []  # no temporary file left behind


def test_save_lazy_scan_and_grid(tmp_path):
    grid = _image((3, 8, 9))
    scan = Scan(da.from_array(grid, chunks=(1, 4, 5)), pixel_size_nm=0.1, energies_V=[0.1, 0.2, 0.3])
    path = save_scan(scan, tmp_path / "grid.npy")
    again = load_scan(path)
    assert_array_equal(again.data, grid)  # numpy .npy reference
    assert_allclose(again.energies_V, [0.1, 0.2, 0.3], rtol=0, atol=0)


def test_save_scan_wants_npy(tmp_path):
    with pytest.raises(InputError, match="must end in .npy"):
        save_scan(Scan(np.zeros((4, 4)), pixel_size_nm=0.1), tmp_path / "a.tif")


# --------------------------------------------------------------------------- provenance


def test_sha256_file_matches_hashlib(tmp_path):
    path = tmp_path / "blob.bin"
    content = np.random.default_rng(1).bytes(3 * 2**20 + 17)  # spans several read blocks
    path.write_bytes(content)
    assert sha256_file(path) == hashlib.sha256(content).hexdigest()  # reference: hashlib


def test_sha256_of_zarr_directory_follows_the_documented_rule(tmp_path):
    store = tmp_path / "s.zarr"
    zarr.open_array(str(store), mode="w", shape=(4, 4), chunks=(2, 2), dtype="f8")[...] = np.arange(16.0).reshape(4, 4)
    files = sorted((p for p in store.rglob("*") if p.is_file()), key=lambda p: p.relative_to(store).as_posix())
    reference = hashlib.sha256()  # reference: hashlib over the rule in sha256_file's docstring
    for file in files:
        data = file.read_bytes()
        reference.update(file.relative_to(store).as_posix().encode() + b"\0" + len(data).to_bytes(8, "little") + data)
    assert sha256_file(store) == reference.hexdigest()
    before = sha256_file(store)
    zarr.open_array(str(store), mode="r+")[0, 0] = -1.0
    assert sha256_file(store) != before  # common practice, no source: a content change changes the hash


def test_provenance_record(tmp_path):
    path = tmp_path / "data.h5"
    with h5py.File(path, "w") as h5:
        h5["topo"] = _image()
    _sidecar(path, pixel_size_nm=0.05)
    record = provenance(command_line=["domains", "analyze", f"{path}:/topo"],
                        parameters={"sigma_nm": np.float64(1.5), "q": np.array([1.0, np.nan])},
                        inputs=[f"{path}:/topo"])
    entry = record["inputs"][0]
    assert entry["sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()  # reference: hashlib
    assert entry["size_bytes"] == path.stat().st_size
    assert entry["sidecar"]["sha256"] == hashlib.sha256(path.with_suffix(".json").read_bytes()).hexdigest()
    assert record["parameters"] == {"sigma_nm": 1.5, "q": [1.0, None]}
    for name in ("python", "cdw-domains", "numpy", "scipy", "scikit-image", "dask", "zarr", "tifffile", "h5py",
                 "matplotlib"):
        assert name in record["versions"]
    assert record["versions"]["numpy"] == np.__version__  # reference: the imported package
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ", record["created_utc"])
    json.dumps(record, allow_nan=False)  # JSON-ready
    with pytest.raises(InputError, match="absent.npy"):
        provenance(command_line="x", parameters={}, inputs=[tmp_path / "absent.npy"])


def test_package_versions_python():
    import platform

    assert package_versions()["python"] == platform.python_version()  # reference: platform module


def test_json_safe():
    value = {"a": np.float32(0.25), "b": np.arange(3), "c": [np.nan, np.inf, -np.inf], 4: np.bool_(True),
             "d": (1, 2)}
    assert json_safe(value) == {"a": 0.25, "b": [0, 1, 2], "c": [None, None, None], "4": True, "d": [1, 2]}
    with pytest.raises(TypeError, match="complex"):
        json_safe(1 + 2j)


# --------------------------------------------------------------------------- the bundle


def _parts():
    labels = np.arange(20, dtype=np.int32).reshape(4, 5)
    amplitude = da.from_array(np.linspace(0, 1, 24 * 30).reshape(24, 30), chunks=(7, 11))
    return dict(
        summary={"domains": {"count": np.int64(3), "area_nm2_mean": np.float64(1.5)}, "moire": None,
                 "bad": np.nan},
        provenance={"command_line": ["domains", "demo"]},
        tables={"domains": (["label", "area_nm2", "variant"], [{"label": 1, "area_nm2": 0.5, "variant": "A"},
                                                              {"label": 2, "area_nm2": np.nan}]),
                "walls": (["wall", "length_nm"], [])},
        maps={"labels": (labels, {"pixel_size_nm": 0.05, "units": ""}),
              "amplitude/cdw_1": (amplitude, {"pixel_size_nm": (0.05, 0.04), "units": "pm",
                                              "q_rad_per_nm": [1.0, 2.0]})},
        figures={"fft": PNG, "domains.png": PNG},
        report_html="<html><body>report</body></html>",
        extra_files={"inputs/config.toml": "sigma_nm = 1.5\n", "raw.bin": b"\x00\x01"},
    )


def test_write_bundle_every_part(tmp_path):
    parts = _parts()
    out = write_bundle(tmp_path / "result", **parts)
    assert out == tmp_path / "result"
    for name in ("summary.json", "provenance.json", "domains.csv", "walls.csv", "maps.zarr", "figures/fft.png",
                 "figures/domains.png", "report.html", "inputs/config.toml", "raw.bin"):
        assert (out / name).exists(), name
    summary = json.loads((out / "summary.json").read_text())  # reference: the json module
    assert summary == {"domains": {"count": 3, "area_nm2_mean": 1.5}, "moire": None, "bad": None}
    assert (out / "walls.csv").read_text() == "wall,length_nm\n"  # header even with no rows
    assert (out / "figures" / "fft.png").read_bytes() == PNG
    assert (out / "raw.bin").read_bytes() == b"\x00\x01"
    group = zarr.open_group(str(out / "maps.zarr"), mode="r")  # reference: zarr reads it back
    assert group.metadata.zarr_format == 3
    assert dict(group["labels"].attrs) == {"pixel_size_nm": [0.05, 0.05], "units": ""}
    assert group["amplitude/cdw_1"].attrs["pixel_size_nm"] == [0.05, 0.04]
    assert group["amplitude/cdw_1"].attrs["q_rad_per_nm"] == [1.0, 2.0]
    assert_array_equal(group["labels"][...], parts["maps"]["labels"][0])
    assert group["labels"].dtype == np.int32
    assert_array_equal(group["amplitude/cdw_1"][...], parts["maps"]["amplitude/cdw_1"][0].compute())  # dask map
    assert _no_hidden(tmp_path) == []  # no temporary folder left


def test_read_bundle(tmp_path):
    out = write_bundle(tmp_path / "b", **_parts())
    bundle = read_bundle(out)
    assert bundle.summary["domains"]["count"] == 3
    assert bundle.provenance == {"command_line": ["domains", "demo"]}
    assert bundle.tables["domains"] == [{"label": 1, "area_nm2": 0.5, "variant": "A"},
                                        {"label": 2, "area_nm2": None, "variant": None}]
    assert bundle.tables["walls"] == [] and bundle.columns["walls"] == ["wall", "length_nm"]
    assert bundle.maps["amplitude"]["cdw_1"].shape == (24, 30)
    assert sorted(bundle.figures) == ["domains", "fft"]
    assert bundle.report_path == out / "report.html"
    with pytest.raises(InputError, match="no such bundle"):
        read_bundle(tmp_path / "none")


def test_bundle_failure_midway_leaves_nothing(tmp_path):
    parts = _parts()
    parts["figures"] = {"fft": PNG, "broken": "not bytes"}
    with pytest.raises(InputError, match="broken"):
        write_bundle(tmp_path / "result", **parts)
    assert list(tmp_path.iterdir()) == []  # no bundle, no temporary folder


def test_bundle_failure_in_a_dask_map_leaves_nothing(tmp_path):
    def explode(block):
        raise RuntimeError("boom while computing")

    parts = _parts()
    parts["maps"]["late"] = (da.ones((8, 8), chunks=4).map_blocks(explode, dtype=float), {"pixel_size_nm": 0.1,
                                                                                        "units": "nm"})
    with pytest.raises(RuntimeError, match="boom"):
        write_bundle(tmp_path / "result", **parts)
    assert list(tmp_path.iterdir()) == []


def test_bundle_existing_not_overwritten_then_replaced(tmp_path):
    first = write_bundle(tmp_path / "result", summary={"run": 1}, provenance={}, report_html="old")
    with pytest.raises(InputError, match=re.escape(str(first)) + ".*already exists"):
        write_bundle(first, summary={"run": 2}, provenance={})
    assert json.loads((first / "summary.json").read_text()) == {"run": 1}
    # A failing overwrite leaves the old bundle in place.
    with pytest.raises(InputError):
        write_bundle(first, summary={"run": 2}, provenance={}, figures={"x": 3}, overwrite=True)
    assert json.loads((first / "summary.json").read_text()) == {"run": 1}
    write_bundle(first, summary={"run": 2}, provenance={}, overwrite=True)
    assert json.loads((first / "summary.json").read_text()) == {"run": 2}
    assert not (first / "report.html").exists()  # replaced as a whole, not merged
    assert _no_hidden(tmp_path) == []  # old bundle and temporary folders removed


def test_bundle_map_attrs_required(tmp_path):
    for attrs, missing in (({"units": "nm"}, "pixel_size_nm"), ({"pixel_size_nm": 0.1}, "units")):
        with pytest.raises(InputError, match=f"labels.*{missing}"):
            write_bundle(tmp_path / "r", summary={}, provenance={}, maps={"labels": (np.zeros((3, 3)), attrs)})
    with pytest.raises(InputError, match="pixel_size_nm"):
        write_bundle(tmp_path / "r", summary={}, provenance={},
                     maps={"labels": (np.zeros((3, 3)), {"pixel_size_nm": -1, "units": ""})})
    assert list(tmp_path.iterdir()) == []


def test_bundle_names_checked(tmp_path):
    with pytest.raises(InputError, match="extra_files"):
        write_bundle(tmp_path / "r", summary={}, provenance={}, extra_files={"../escape.txt": "x"})
    with pytest.raises(InputError, match="clashes"):
        write_bundle(tmp_path / "r", summary={}, provenance={}, extra_files={"summary.json": "x"})
    with pytest.raises(InputError, match="table name"):
        write_bundle(tmp_path / "r", summary={}, provenance={}, tables={"a/b": ([], [])})
    with pytest.raises(InputError, match="not a PNG"):
        write_bundle(tmp_path / "r", summary={}, provenance={}, figures={"f": b"GIF89a"})
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- output location, lock, stale folders

from domains.io import check_output_location, lock_path, output_lock  # noqa: E402


def test_check_output_location_refuses_before_any_work(tmp_path):
    (tmp_path / "file").write_text("x")
    (tmp_path / "done").mkdir()
    for out, words in [(tmp_path / "file", "not a folder"), (tmp_path / "file" / "sub" / "b", "is a file"),
                       (tmp_path / "done", "--overwrite"), (tmp_path / "..", "folder name"),
                       ("/proc/no-such-place/b", "cannot create")]:
        with pytest.raises(InputError, match=re.escape(words)):  # named reason (common practice, no source)
            check_output_location(out)
    assert check_output_location(tmp_path / "done", overwrite=True) == tmp_path / "done"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["done", "file"]  # the probe leaves nothing (idem)


def test_write_bundle_never_replaces_a_bundle_that_appears_meanwhile(tmp_path, monkeypatch):
    import domains.io as io_module

    out = tmp_path / "res"

    def another_run_finishes(temporary):
        out.mkdir()
        (out / "summary.json").write_text('{"theirs": true}')

    monkeypatch.setattr(io_module, "_wait_for_barrier", another_run_finishes)
    with pytest.raises(InputError, match="--overwrite"):
        write_bundle(out, summary={"ours": True}, provenance={})
    # the other bundle is intact and our temporary folder is gone (common practice, no source)
    assert json.loads((out / "summary.json").read_text()) == {"theirs": True}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["res"]


def test_output_lock_removes_stale_temp_folders_and_restores_a_moved_bundle(tmp_path, caplog):
    out = tmp_path / "res"
    stale_tmp = tmp_path / ".res.tmp-0123abcd"
    stale_tmp.mkdir()
    (stale_tmp / "summary.json").write_text("{}")
    moved = tmp_path / ".res.old-89abcdef"
    moved.mkdir()
    (moved / "summary.json").write_text('{"previous": 1}')
    unrelated = tmp_path / ".other.tmp-0123abcd"
    unrelated.mkdir()
    with output_lock(out) as notes:
        assert lock_path(out).read_text().strip() == str(os.getpid())  # the owner's pid (common practice)
        with output_lock(out) as again:  # re-entrant in one process (derived: one owner)
            assert again == []
    assert len(notes) == 2 and any(stale_tmp.name in n for n in notes)  # both named (common practice)
    assert not stale_tmp.exists() and unrelated.exists()  # only this bundle's leftovers (common practice)
    assert json.loads((out / "summary.json").read_text()) == {"previous": 1}  # the old bundle is back
    assert not lock_path(out).exists()  # the lock file goes with the lock (common practice, no source)


def test_a_second_process_cannot_take_the_lock(tmp_path):
    import subprocess
    import sys

    out = tmp_path / "res"
    code = ("import sys; from domains.io import output_lock\n"
            "try:\n    with output_lock(sys.argv[1]): pass\nexcept Exception as e: print(e); sys.exit(2)\n")
    with output_lock(out):
        done = subprocess.run([sys.executable, "-c", code, str(out)], capture_output=True, text=True)
    assert done.returncode == 2 and f"pid {os.getpid()}" in done.stdout  # flock(2) excludes (from memory)
    assert list(tmp_path.iterdir()) == []  # nothing left after release (common practice, no source)


def test_sidecar_values_that_are_not_numbers_name_the_sidecar(tmp_path):
    path = tmp_path / "topo.npy"
    np.save(path, _image())
    for value in ("abc", "0.056 nm", True, [0.05, "x"]):
        _sidecar(path, pixel_size_nm=value)
        with pytest.raises(InputError, match=r"topo\.npy: its sidecar topo\.json: pixel_size_nm"):
            load_scan(path)  # a string or a boolean is not a size (common practice, no source)


def test_multi_page_tiff_of_mixed_sizes_is_an_error(tmp_path):
    path = tmp_path / "pages.tif"
    with tifffile.TiffWriter(path) as tif:
        tif.write(np.zeros((16, 16), np.float32))
        tif.write(np.zeros((8, 12), np.float32))
    with pytest.raises(InputError, match="2 images of different sizes"):  # never page 1 silently (issue 13)
        load_scan(path, pixel_size_nm=0.05)


def test_symlink_loop_is_reported_as_such(tmp_path):
    os.symlink(tmp_path / "b.npy", tmp_path / "a.npy")
    os.symlink(tmp_path / "a.npy", tmp_path / "b.npy")
    with pytest.raises(InputError, match="symbolic link loop"):  # not "no such file" (common practice)
        load_scan(tmp_path / "a.npy", pixel_size_nm=0.05)
