"""A battery of bad inputs through the real command line: exit 2, one line naming the culprit, nothing changed.

Each case builds tiny synthetic inputs in ``in/``, runs ``domains`` (``cli.main``) from the folder
``work/`` with the bundle going to ``work/out``, and checks:

- the exit status is 2 (bad input or usage), never 0, 1 or a crash;
- stderr is exactly one line, naming the file or option at fault, with no traceback;
- every input file is unchanged (sha256 before and after);
- nothing is left behind in ``work/`` (no bundle, no hidden temporary folder, no lock file).

Every case fails in the checks that run before the analysis, so the whole battery takes seconds.
The contract (exit statuses, one line naming the file, inputs never modified) is the project's
command-line contract; the checks below are common practice for command-line tools, no source.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
from pathlib import Path

import h5py
import numpy as np
import pytest
import tifffile

from domains.cli import main

RNG = np.random.default_rng(5)
GOOD = RNG.normal(size=(64, 64))          # a usable 64 x 64 image
PIXEL = {"pixel_size_nm": 0.05}


# --------------------------------------------------------------------------- building inputs


def npy(folder: Path, name: str, array=GOOD, sidecar=PIXEL) -> Path:
    path = folder / name
    np.save(path, array)
    if sidecar is not None:
        side = path.with_suffix(".json")
        side.write_text(sidecar if isinstance(sidecar, str) else json.dumps(sidecar))
    return path


def raw(folder: Path, name: str, content: bytes, sidecar=PIXEL) -> Path:
    path = folder / name
    path.write_bytes(content)
    if sidecar is not None:
        path.with_suffix(".json").write_text(json.dumps(sidecar))
    return path


def toml(folder: Path, text: str, name="run.toml") -> Path:
    path = folder / name
    path.write_text(text)
    return path


def topo_with_config(i: Path, text: str, image=GOOD):
    path = npy(i, "topo.npy", image)
    config = toml(i, text)
    return ["analyze", str(path), "--config", str(config)], "run.toml"


def sidecar_case(content, culprit="topo.json"):
    def build(i, w):
        path = npy(i, "topo.npy", GOOD, sidecar=content)
        return ["analyze", str(path)], culprit
    return build


def mask_case(mask_value=None, mask_array=None, culprit="topo"):
    def build(i, w):
        if mask_array is not None:
            np.save(i / "topo.mask.npy", mask_array)
        value = "topo.mask.npy" if mask_value is None else mask_value
        path = npy(i, "topo.npy", GOOD, sidecar={"pixel_size_nm": 0.05, "mask": value})
        return ["analyze", str(path)], culprit
    return build


def map_case(map_array=GOOD, map_sidecar=None, second=None):
    def build(i, w):
        topo = npy(i, "topo.npy")
        side = {"pixel_size_nm": 0.05, "bias_V": 0.2} if map_sidecar is None else map_sidecar
        argv = ["analyze", str(topo), "--map", str(npy(i, "map_a.npy", map_array, side))]
        culprit = "map_a"
        if second is not None:
            argv += ["--map", str(npy(i, "map_b.npy", GOOD, second))]
            culprit = "map_b.npy"
        return argv, culprit
    return build


def grid_case(grid, sidecar):
    def build(i, w):
        topo = npy(i, "topo.npy")
        return ["analyze", str(topo), "--grid", str(npy(i, "grid.npy", grid, sidecar))], "grid."  # .npy or .json
    return build


def _symlink_loop(i, w):
    os.symlink(i / "b.npy", i / "a.npy")
    os.symlink(i / "a.npy", i / "b.npy")
    return ["analyze", str(i / "a.npy")], "a.npy"


def _dangling(i, w):
    os.symlink(i / "gone.npy", i / "link.npy")
    return ["analyze", str(i / "link.npy")], "link.npy"


def _fifo(i, w):
    os.mkfifo(i / "pipe.npy")
    (i / "pipe.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "pipe.npy")], "pipe.npy"


def _tiff_rgb(i, w):
    tifffile.imwrite(i / "rgb.tif", (RNG.random((64, 64, 3)) * 255).astype(np.uint8), photometric="rgb")
    (i / "rgb.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "rgb.tif")], "rgb.tif"


def _tiff_mixed_pages(i, w):
    with tifffile.TiffWriter(i / "pages.tif") as tif:
        tif.write(GOOD.astype(np.float32))
        tif.write(RNG.normal(size=(48, 40)).astype(np.float32))
    (i / "pages.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "pages.tif")], "pages.tif"


def _h5_two(i, w):
    with h5py.File(i / "two.h5", "w") as h5:
        h5["a"] = GOOD
        h5["b"] = GOOD
    (i / "two.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "two.h5")], "two.h5"


def _h5_missing(i, w):
    with h5py.File(i / "one.h5", "w") as h5:
        h5["a"] = GOOD
    (i / "one.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "one.h5") + ":/nope"], "one.h5"


def _h5_complex(i, w):
    with h5py.File(i / "cplx.h5", "w") as h5:
        h5["a"] = GOOD.astype(complex)
    (i / "cplx.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "cplx.h5")], "cplx.h5"


def _zarr_empty(i, w):
    (i / "empty.zarr").mkdir()
    (i / "empty.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "empty.zarr")], "empty.zarr"


def _npz_empty(i, w):
    np.savez(i / "none.npz")
    (i / "none.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "none.npz")], "none.npz"


def _npz_missing(i, w):
    np.savez(i / "arch.npz", image=GOOD)
    (i / "arch.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "arch.npz") + ":other"], "arch.npz"


def _object_npy(i, w):
    np.save(i / "obj.npy", np.array([{"a": 1}, None], dtype=object), allow_pickle=True)
    (i / "obj.json").write_text(json.dumps(PIXEL))
    return ["analyze", str(i / "obj.npy")], "obj.npy"


def _truncated_npy(i, w):
    np.save(i / "full.npy", GOOD)
    content = (i / "full.npy").read_bytes()
    (i / "full.npy").unlink()
    return ["analyze", str(raw(i, "cut.npy", content[: len(content) // 2]))], "cut.npy"


def _text(content, name="m.txt", encoding=True):
    def build(i, w):
        data = content.encode() if encoding else content
        return ["analyze", str(raw(i, name, data))], name
    return build


def _out_case(make_out, culprit, *, overwrite=False):
    def build(i, w):
        topo = npy(i, "topo.npy")
        out = make_out(i, w)
        return ["analyze", str(topo), "--out", str(out)] + (["--overwrite"] if overwrite else []), culprit
    return build


def _existing_out(i, w):
    (w / "out").mkdir()
    (w / "out" / "summary.json").write_text("{}")
    return w / "out"


def _file_out(i, w):
    (w / "out").write_text("not a folder")
    return w / "out"


def _under_file(i, w):
    (w / "afile").write_text("x")
    return w / "afile" / "deeper" / "out"


def _dangling_out(i, w):
    os.symlink(w / "nowhere", w / "out")
    return w / "out"


def _looping_out(i, w):
    os.symlink(w / "out2", w / "out")
    os.symlink(w / "out", w / "out2")
    return w / "out"


def _looping_config(i, w):
    os.symlink(i / "b.toml", i / "a.toml")
    os.symlink(i / "a.toml", i / "b.toml")
    return ["analyze", str(npy(i, "topo.npy")), "--config", str(i / "a.toml")], "a.toml"


def _default_out_exists(i, w):
    topo = npy(i, "scan7.npy")
    (w / "scan7-domains").mkdir()
    return ["analyze", str(topo)], "scan7-domains"


def _demo_existing(i, w):
    (w / "demo-output").mkdir()
    return ["demo"], "demo-output"


def _demo_under_file(i, w):
    (w / "afile").write_text("x")
    return ["demo", "--out", str(w / "afile" / "d")], "afile"


def _scene_existing(i, w):
    (w / "scene").mkdir()
    (w / "scene" / "topography.npy").write_bytes(b"x")
    return ["scene", "cdw", "--out", str(w / "scene")], "--overwrite"


def _scene_on_file(i, w):
    (w / "scene").write_text("x")
    return ["scene", "cdw", "--out", str(w / "scene")], "scene"


def _peaks_grid(i, w):
    path = npy(i, "grid.npy", np.stack([GOOD, GOOD]), {"pixel_size_nm": 0.05, "energies_V": [0.1, 0.2]})
    return ["peaks", str(path)], "grid.npy"


def _peaks_tiny(i, w):
    return ["peaks", str(npy(i, "small.npy", GOOD[:20, :20]))], "small.npy"


def _option(args, culprit):
    def build(i, w):
        return ["analyze", str(npy(i, "topo.npy"))] + args, culprit
    return build


MOSTLY_NAN = GOOD.copy()
MOSTLY_NAN[:48] = np.nan
MIXED_BAD = GOOD.copy()
MIXED_BAD[:20] = np.inf
MIXED_BAD[20:40] = np.nan
MASK_80 = np.zeros((64, 64), bool)
MASK_80[:52] = True

CASES = {
    # files
    "missing file": lambda i, w: (["analyze", str(i / "nothing.npy")], "nothing.npy"),
    "directory as file": lambda i, w: ((i / "dir.npy").mkdir(), ["analyze", str(i / "dir.npy")])[1:] + ("dir.npy",),
    "empty file": lambda i, w: (["analyze", str(raw(i, "empty.npy", b""))], "empty.npy"),
    "symlink loop": _symlink_loop,
    "dangling symlink": _dangling,
    "named pipe": _fifo,
    "unknown extension": lambda i, w: (["analyze", str(raw(i, "scan.dat", GOOD.tobytes()))], "scan.dat"),
    "no extension": lambda i, w: (["analyze", str(raw(i, "scan", GOOD.tobytes()))], "scan"),
    "path under a file": lambda i, w: (["analyze", str(raw(i, "plain.npy", b"x") / "inner.npy")], "inner.npy"),
    "zarr that is a file": lambda i, w: (["analyze", str(raw(i, "store.zarr", b"x"))], "store.zarr"),
    # formats
    "truncated npy": _truncated_npy,
    "garbage npy": lambda i, w: (["analyze", str(raw(i, "junk.npy", b"\x00\x01garbage" * 50))], "junk.npy"),
    "pickled objects npy": _object_npy,
    "npz without arrays": _npz_empty,
    "npz missing array": _npz_missing,
    "inner name on npy": lambda i, w: (["analyze", str(npy(i, "one.npy")) + ":x"], "one.npy"),
    "text not numbers": _text("1 2 3\nfour five six\n"),
    "text ragged rows": _text("1 2 3\n4 5\n"),
    "text comments only": _text("# nothing\n# here\n", "c.csv"),
    "text not utf-8": _text(b"\xff\xfe\x00\x81" * 40, "bin.txt", encoding=False),
    "garbage tiff": lambda i, w: (["analyze", str(raw(i, "junk.tif", b"II*\x00garbage" * 20))], "junk.tif"),
    "rgb tiff": _tiff_rgb,
    "tiff pages of different sizes": _tiff_mixed_pages,
    "garbage hdf5": lambda i, w: (["analyze", str(raw(i, "junk.h5", b"not hdf5" * 40))], "junk.h5"),
    "hdf5 two datasets unnamed": _h5_two,
    "hdf5 missing dataset": _h5_missing,
    "empty zarr folder": _zarr_empty,
    # dtypes
    "complex npy": lambda i, w: (["analyze", str(npy(i, "c.npy", GOOD.astype(complex)))], "c.npy"),
    "string npy": lambda i, w: (["analyze", str(npy(i, "s.npy", np.full((64, 64), "a")))], "s.npy"),
    "structured npy": lambda i, w: (["analyze", str(npy(i, "st.npy", np.zeros((64, 64), dtype=[("a", "f4"), ("b", "i4")])))], "st.npy"),
    "datetime npy": lambda i, w: (["analyze", str(npy(i, "dt.npy", np.zeros((64, 64), dtype="datetime64[s]")))], "dt.npy"),
    "complex hdf5": _h5_complex,
    # shapes
    "1-D array": lambda i, w: (["analyze", str(npy(i, "line.npy", np.arange(64.0)))], "line.npy"),
    "4-D array": lambda i, w: (["analyze", str(npy(i, "cube.npy", np.zeros((2, 2, 64, 64))))], "cube.npy"),
    "0-D array": lambda i, w: (["analyze", str(npy(i, "scalar.npy", np.float64(3.0)))], "scalar.npy"),
    "zero rows": lambda i, w: (["analyze", str(npy(i, "zero.npy", np.zeros((0, 64))))], "zero.npy"),
    "16 x 16 image": lambda i, w: (["analyze", str(npy(i, "tiny.npy", GOOD[:16, :16]))], "tiny.npy"),
    "thin 64 x 8 image": lambda i, w: (["analyze", str(npy(i, "thin.npy", GOOD[:, :8]))], "thin.npy"),
    "3-D without energies": lambda i, w: (["analyze", str(npy(i, "g.npy", np.stack([GOOD, GOOD])))], "g.npy"),
    "3-D grid as topograph": lambda i, w: (["analyze", str(npy(i, "g3.npy", np.stack([GOOD, GOOD]), {"pixel_size_nm": 0.05, "energies_V": [0.1, 0.2]}))], "g3.npy"),
    # NaN and inf
    "all NaN": lambda i, w: (["analyze", str(npy(i, "nan.npy", np.full((64, 64), np.nan)))], "nan.npy"),
    "all inf": lambda i, w: (["analyze", str(npy(i, "inf.npy", np.full((64, 64), np.inf)))], "inf.npy"),
    "75% NaN": lambda i, w: (["analyze", str(npy(i, "mostly.npy", MOSTLY_NAN))], "mostly.npy"),
    "NaN and inf over 60%": lambda i, w: (["analyze", str(npy(i, "mixed.npy", MIXED_BAD))], "mixed.npy"),
    # sidecars
    "no pixel size anywhere": lambda i, w: (["analyze", str(npy(i, "nopix.npy", sidecar=None))], "nopix.npy"),
    "pixel size null": sidecar_case({"pixel_size_nm": None}),
    "pixel size 'abc'": sidecar_case({"pixel_size_nm": "abc"}),
    "pixel size '0.056 nm'": sidecar_case({"pixel_size_nm": "0.056 nm"}),
    "pixel size 'fast'": sidecar_case({"pixel_size_nm": "fast"}),
    "pixel size true": sidecar_case({"pixel_size_nm": True}),
    "pixel size 0": sidecar_case({"pixel_size_nm": 0}),
    "pixel size negative": sidecar_case({"pixel_size_nm": -0.05}),
    "pixel size three values": sidecar_case({"pixel_size_nm": [0.05, 0.05, 0.05]}),
    "pixel size nested": sidecar_case({"pixel_size_nm": [[0.05]]}),
    "pixel size as object": sidecar_case({"pixel_size_nm": {"x": 0.05}}),
    "pixel size NaN literal": sidecar_case('{"pixel_size_nm": NaN}'),
    "pixel size Infinity literal": sidecar_case('{"pixel_size_nm": Infinity}'),
    "malformed sidecar": sidecar_case('{"pixel_size_nm": '),
    "sidecar is a list": sidecar_case("[0.05]"),
    "channel unknown": sidecar_case({"pixel_size_nm": 0.05, "channel": "height"}),
    "bias 'high'": sidecar_case({"pixel_size_nm": 0.05, "bias_V": "high"}),
    "bias true": sidecar_case({"pixel_size_nm": 0.05, "bias_V": True}),
    "setpoint '1nA'": sidecar_case({"pixel_size_nm": 0.05, "setpoint_A": "1nA"}),
    "energies on a 2-D image": sidecar_case({"pixel_size_nm": 0.05, "energies_V": [0.1]}, "topo.npy"),
    "energies not numbers": sidecar_case({"pixel_size_nm": 0.05, "energies_V": ["a", "b"]}),
    "sidecar is a folder": lambda i, w: ((i / "sd.json").mkdir(), ["analyze", str(npy(i, "sd.npy", sidecar=None))])[1:] + ("sd.json",),
    "sidecar not utf-8": lambda i, w: ((i / "bin.json").write_bytes(b"\xff\xfe\x81"), ["analyze", str(npy(i, "bin.npy", sidecar=None))])[1:] + ("bin.json",),
    # masks
    "mask file missing": mask_case("absent.npy", culprit="absent.npy"),
    "mask wrong shape": mask_case(mask_array=np.zeros((32, 32), bool), culprit="topo.mask.npy"),
    "mask of floats": mask_case(mask_array=np.full((64, 64), 0.5), culprit="topo.mask.npy"),
    "mask of integers 0..2": mask_case(mask_array=np.full((64, 64), 2), culprit="topo.mask.npy"),
    "mask path a number": mask_case(7, culprit="topo.json"),
    "mask covers 80%": mask_case(mask_array=MASK_80, culprit="topo.npy"),
    "mask is a folder": lambda i, w: ((i / "mdir.npy").mkdir(), mask_case("mdir.npy", culprit="mdir.npy")(i, w))[1],
    # maps
    "map missing": lambda i, w: (["analyze", str(npy(i, "topo.npy")), "--map", str(i / "gone.npy")], "gone.npy"),
    "map without bias": map_case(map_sidecar={"pixel_size_nm": 0.05}),
    "two maps with one bias": map_case(second={"pixel_size_nm": 0.05, "bias_V": 0.2}),
    "map of another shape": map_case(map_array=GOOD[:48]),
    "map of another pixel size": map_case(map_sidecar={"pixel_size_nm": 0.06, "bias_V": 0.2}),
    "map is a grid": map_case(map_array=np.stack([GOOD, GOOD]),
                              map_sidecar={"pixel_size_nm": 0.05, "energies_V": [0.1, 0.2]}),
    "map all NaN": map_case(map_array=np.full((64, 64), np.nan)),
    # grids
    "grid is 2-D": grid_case(GOOD, {"pixel_size_nm": 0.05, "bias_V": 0.1}),
    "grid without energies": grid_case(np.stack([GOOD, GOOD]), PIXEL),
    "grid energies too few": grid_case(np.stack([GOOD, GOOD]), {"pixel_size_nm": 0.05, "energies_V": [0.1]}),
    "grid energies repeat": grid_case(np.stack([GOOD, GOOD]), {"pixel_size_nm": 0.05, "energies_V": [0.1, 0.1]}),
    "grid slices of another shape": grid_case(np.stack([GOOD[:48], GOOD[:48]]),
                                              {"pixel_size_nm": 0.05, "energies_V": [0.1, 0.2]}),
    "grid of another pixel size": grid_case(np.stack([GOOD, GOOD]), {"pixel_size_nm": 0.07, "energies_V": [0.1, 0.2]}),
    # configurations
    "config missing": lambda i, w: (["analyze", str(npy(i, "topo.npy")), "--config", str(i / "none.toml")], "none.toml"),
    "config is a folder": lambda i, w: ((i / "cfg.toml").mkdir(), ["analyze", str(npy(i, "topo.npy")), "--config", str(i / "cfg.toml")])[1:] + ("cfg.toml",),
    "config a link loop": _looping_config,
    "config not TOML": lambda i, w: topo_with_config(i, "sigma_nm = = 3\n"),
    "config unknown key": lambda i, w: topo_with_config(i, "sigma = 0.5\n"),
    "sigma as a string": lambda i, w: topo_with_config(i, 'sigma_nm = "0.5"\n'),
    "sigma negative": lambda i, w: topo_with_config(i, "sigma_nm = -1.0\n"),
    "sigma true": lambda i, w: topo_with_config(i, "sigma_nm = true\n"),
    "sigma larger than the frame": lambda i, w: topo_with_config(i, "sigma_nm = 50.0\n"),
    "drift sigma larger than the frame": lambda i, w: topo_with_config(i, "drift_sigma_nm = 5.0\n"),
    "q beyond Nyquist": lambda i, w: topo_with_config(i, "q_rad_per_nm = [[70.0, 0.0]]\n"),
    "q not pairs": lambda i, w: topo_with_config(i, "q_rad_per_nm = [1.0, 2.0, 3.0]\n"),
    "q with strings": lambda i, w: topo_with_config(i, 'q_rad_per_nm = [["a", 1.0]]\n'),
    "q zero": lambda i, w: topo_with_config(i, "q_rad_per_nm = [[0.0, 0.0]]\n"),
    "q empty": lambda i, w: topo_with_config(i, "q_rad_per_nm = []\n"),
    "superlattice unknown": lambda i, w: topo_with_config(i, 'superlattice = "3by3"\n'),
    "superlattice a number": lambda i, w: topo_with_config(i, "superlattice = 3\n"),
    "superlattice sqrt5": lambda i, w: topo_with_config(i, 'superlattice = "sqrt5xsqrt5R26.6"\n'),
    "sqrt3 on a square lattice": lambda i, w: topo_with_config(
        i, 'superlattice = "sqrt3xsqrt3R30"\n[lattice]\nkind = "square"\na_nm = 0.4\n'),
    "lattice without a_nm": lambda i, w: topo_with_config(i, '[lattice]\nkind = "hexagonal"\n'),
    "lattice unknown kind": lambda i, w: topo_with_config(i, '[lattice]\nkind = "kagome"\na_nm = 0.4\n'),
    "lattice unknown key": lambda i, w: topo_with_config(i, '[lattice]\nkind = "square"\na_nm = 0.4\nb_nm = 1\n'),
    "oblique lattice incomplete": lambda i, w: topo_with_config(i, '[lattice]\nkind = "oblique"\na_nm = 0.4\n'),
    "lattice finer than the pixels": lambda i, w: topo_with_config(i, '[lattice]\nkind = "hexagonal"\na_nm = 0.05\n'),
    "lattice a string": lambda i, w: topo_with_config(i, 'lattice = "hexagonal"\n'),
    "q and superlattice both": lambda i, w: topo_with_config(i, 'superlattice = "3x3"\nq_rad_per_nm = [[6.0, 0.0]]\n'),
    "leakage 2": lambda i, w: topo_with_config(i, "leakage = 2.0\n"),
    "false_alarm 0": lambda i, w: topo_with_config(i, "false_alarm = 0.0\n"),
    "confidence 1.5": lambda i, w: topo_with_config(i, "confidence = 1.5\n"),
    "order unknown": lambda i, w: topo_with_config(i, 'order = "diagonal"\n'),
    "drift 'yes'": lambda i, w: topo_with_config(i, 'drift = "yes"\n'),
    "level_order 1.5": lambda i, w: topo_with_config(i, "level_order = 1.5\n"),
    "line_method unknown": lambda i, w: topo_with_config(i, 'line_method = "spline"\n'),
    "analysis not a table": lambda i, w: topo_with_config(i, "analysis = 3\n"),
    # output locations
    "out exists without --overwrite": _out_case(_existing_out, "--out"),
    "out is a file": _out_case(_file_out, "--out", overwrite=True),
    "out under a file": _out_case(_under_file, "afile"),
    "out in /proc": _out_case(lambda i, w: Path("/proc/domains-test/out"), "/proc"),
    "out in /sys": _out_case(lambda i, w: Path("/sys/domains-test-out"), "/sys"),
    "out is '.'": _out_case(lambda i, w: Path("."), "--out"),
    "out a dangling link": _out_case(_dangling_out, "--out"),
    "out a link loop": _out_case(_looping_out, "link loop"),
    "default out exists": _default_out_exists,
    "demo out exists": _demo_existing,
    "demo out under a file": _demo_under_file,
    "scene over existing files": _scene_existing,
    "scene on a file": _scene_on_file,
    # options and commands
    "pixel size option 'abc'": _option(["--pixel-size", "abc"], "--pixel-size"),
    "pixel size option negative": _option(["--pixel-size=-0.1"], "--pixel-size"),
    "pixel size option nan": _option(["--pixel-size", "nan"], "--pixel-size"),
    "pixel size option 0": _option(["--pixel-size", "0"], "--pixel-size"),
    "unknown option": _option(["--colour", "red"], "--colour"),
    "peaks on a grid": _peaks_grid,
    "peaks on a tiny image": _peaks_tiny,
}


def _hashes(folder: Path) -> dict:
    """sha256 of every file under ``folder`` (links by their target, pipes by name)."""
    found = {}
    for path in sorted(folder.rglob("*")):
        key = str(path.relative_to(folder))
        if path.is_symlink():
            found[key] = "link:" + os.readlink(path)
        elif path.is_fifo():
            found[key] = "fifo"
        elif path.is_file():
            found[key] = hashlib.sha256(path.read_bytes()).hexdigest()
        else:
            found[key] = "dir"
    return found


def _listing(folder: Path) -> dict:
    return {str(p.relative_to(folder)): (p.is_dir(), p.is_symlink()) for p in sorted(folder.rglob("*"))}


@pytest.mark.parametrize("case", list(CASES))
def test_bad_input_exits_2_with_one_line_naming_the_culprit(case, tmp_path, monkeypatch, capsys, caplog):
    inputs, work = tmp_path / "in", tmp_path / "work"
    inputs.mkdir()
    work.mkdir()
    argv, culprit = CASES[case](inputs, work)
    if argv[0] == "analyze" and "--out" not in argv and case != "default out exists":
        argv = argv + ["--out", str(work / "out")]
    monkeypatch.chdir(work)
    before_inputs, before_work = _hashes(inputs), _listing(work)
    capsys.readouterr()

    status = main(argv)

    captured = capsys.readouterr()
    lines = [line for line in captured.err.splitlines() if line.strip()]
    assert status == 2, captured.err  # the contract: bad input or usage is exit 2 (common practice, no source)
    assert "Traceback" not in captured.err  # a message, not a crash (common practice, no source)
    assert len(lines) == 1, captured.err  # one line (common practice, no source)
    assert culprit in lines[0], lines[0]  # the message names the file or option at fault (common practice, no source)
    assert captured.out == ""  # no result printed for a failed run (common practice, no source)
    assert _hashes(inputs) == before_inputs  # inputs are never modified (common practice, no source)
    assert _listing(work) == before_work  # no bundle, temporary folder or lock left behind (common practice, no source)
    # A library's own log line would reach stderr as a second line outside pytest (common practice, no source)
    assert [r.getMessage() for r in caplog.records if r.levelno >= logging.WARNING] == []


def test_the_battery_is_large():
    # Issue 13 asks for at least 80 kinds of bad input (project requirement, no outside source).
    assert len(CASES) >= 80
