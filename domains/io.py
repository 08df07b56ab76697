"""Reading scans from open file formats, writing them back, and writing the result bundle atomically.

Inputs are open formats only: ``.npy``, ``.npz``, ``.tif``/``.tiff``, ``.h5``/``.hdf5``,
``.zarr`` and plain text matrices (``.txt``, ``.csv``). Each may have a JSON sidecar
``NAME.json`` next to ``NAME.ext`` (see :func:`load_scan`). Arrays larger than
:data:`LAZY_THRESHOLD_BYTES` are opened lazily as dask arrays and never read whole.

The result bundle (:func:`write_bundle`, :func:`read_bundle`) is a folder holding
``summary.json``, ``provenance.json``, one CSV per table, ``maps.zarr``,
``figures/*.png`` and ``report.html``; it appears in its final place only once
it is complete.
"""

from __future__ import annotations

import contextlib
import csv
import dataclasses
import errno
import datetime as _dt
import hashlib
import json
import math
import os
import platform
import re
import secrets
import shutil
import stat
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

import numpy as np

from ._errors import InputError
from ._scan import CHANNELS, Scan, _is_dask, pixel_size_pair

#: Arrays whose size in memory (uncompressed) exceeds this many bytes are opened
#: lazily (memory map or chunked reads through dask) instead of being read whole.
LAZY_THRESHOLD_BYTES = 512 * 2**20

#: A lazily opened file laid out row by row on disk (.npy, an uncompressed TIFF, a contiguous
#: HDF5 dataset) is read in chunks of whole rows of about this many bytes: each chunk is one
#: contiguous read, and whole rows are what the levelling's per-row statistics need.
LAZY_CHUNK_BYTES = 16 * 2**20

#: Sidecar keys that fill fields of :class:`domains.Scan`; any other key is kept
#: in ``Scan.metadata`` under its own name.
SIDECAR_KEYS = ("pixel_size_nm", "channel", "bias_V", "setpoint_A", "energies_V", "mask")

#: Versions recorded in ``provenance.json`` (distribution names).
VERSION_PACKAGES = (
    "cdw-domains", "numpy", "scipy", "scikit-image", "dask", "zarr", "tifffile", "h5py", "matplotlib",
)

_FORMATS = {
    ".npy": "npy", ".npz": "npz", ".tif": "tiff", ".tiff": "tiff", ".h5": "hdf5",
    ".hdf5": "hdf5", ".zarr": "zarr", ".txt": "text", ".csv": "text",
}
# Formats that hold several arrays and accept "file.ext:inner/name".
_CONTAINER = re.compile(r"^(.*\.(?:npz|h5|hdf5|zarr)):(.*)$", re.IGNORECASE)
_NAME = re.compile(r"^[A-Za-z0-9_.\-]+$")
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
_BUNDLE_RESERVED = ("summary.json", "provenance.json", "maps.zarr", "report.html", "figures")


# --------------------------------------------------------------------------- loading


def _split_path(path) -> tuple[Path, str | None]:
    """Split ``file.h5:/dataset`` into the file and the inner name (None if absent)."""
    text = os.fspath(path)
    if not os.path.exists(text):
        match = _CONTAINER.match(text)
        if match:
            inner = match.group(2).strip("/")
            return Path(match.group(1)), inner or None
    return Path(text), None


def _check_exists(where: str, file: Path):
    """An InputError that says why ``file`` cannot be reached: missing, a symlink loop, a dangling link."""
    try:
        os.stat(file)
        return
    except OSError as err:
        if err.errno == errno.ELOOP:
            raise InputError(f"{where}: a symbolic link loop (the links point at each other); expected a file") from None
        if os.path.islink(file):
            raise InputError(f"{where}: a symbolic link to {os.readlink(file)!r}, which does not exist") from None
        if err.errno == errno.ENOTDIR:
            raise InputError(f"{where}: no such file (a part of the path is a file, not a folder)") from None
        if err.errno in (errno.EACCES, errno.EPERM):
            raise InputError(f"{where}: cannot be reached ({err.strerror})") from None
        raise InputError(f"{where}: no such file") from None


def _sidecar_path(file: Path) -> Path:
    return file.with_suffix(".json")


def _read_sidecar(where: str, file: Path) -> tuple[dict, Path | None]:
    sidecar = _sidecar_path(file)
    if not sidecar.exists():
        return {}, None
    if sidecar.is_dir():
        raise InputError(f"{where}: its sidecar {sidecar.name} is a folder; expected a JSON file")
    try:
        content = json.loads(sidecar.read_text(encoding="utf-8"), parse_constant=_no_constant)
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, ValueError) as err:
        raise InputError(f"{where}: cannot read its sidecar {sidecar}: {' '.join(str(err).split())}") from None
    if not isinstance(content, dict):
        raise InputError(f"{where}: its sidecar {sidecar} must hold a JSON object, got {type(content).__name__}")
    _check_sidecar(content, sidecar, where)
    return content, sidecar


def _no_constant(name):
    raise ValueError(f"{name} is not a number JSON allows; expected a finite number")


def _check_sidecar(content: dict, sidecar: Path, where: str):
    """Each known sidecar key holds what it should; the message names the image, the sidecar, the key and the value."""
    side = f"{where}: its sidecar {sidecar.name}:"
    if "pixel_size_nm" in content and content["pixel_size_nm"] is not None:
        pixel_size_pair(content["pixel_size_nm"], name=f"{side} pixel_size_nm")
    if "channel" in content and content["channel"] is not None and content["channel"] not in CHANNELS:
        raise InputError(f"{side} channel must be one of {', '.join(CHANNELS)}, got {content['channel']!r}")
    for key in ("bias_V", "setpoint_A"):
        value = content.get(key)
        if value is not None and (isinstance(value, bool) or not isinstance(value, (int, float))
                                  or not math.isfinite(value)):
            raise InputError(f"{side} {key} must be a finite number, got {value!r}")
    energies = content.get("energies_V")
    if energies is not None and (not isinstance(energies, list) or not energies or not all(
            isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) for v in energies)):
        raise InputError(f"{side} energies_V must be a list of finite numbers (V), one per slice, got {energies!r}")
    if energies is not None and len(set(energies)) != len(energies):
        raise InputError(f"{side} energies_V repeats a bias; each slice needs its own, got {energies!r}")


def _read_mask_file(where: str, sidecar: Path, relative) -> np.ndarray:
    if not isinstance(relative, str) or not relative:
        raise InputError(f"{where}: sidecar {sidecar}: mask must be a path to a .npy file, got {relative!r}")
    mask_path = sidecar.parent / relative
    try:
        mask = np.load(mask_path, allow_pickle=False)
    except (OSError, ValueError, EOFError) as err:
        raise InputError(f"{where}: cannot read the mask file {mask_path} named in {sidecar}: "
                         f"{' '.join(str(err).split())}") from None
    if not isinstance(mask, np.ndarray):
        raise InputError(f"{where}: mask file {mask_path} must hold one array, not an archive")
    if mask.dtype.kind != "b":
        if mask.dtype.kind not in "iu" or not np.all((mask == 0) | (mask == 1)):
            raise InputError(f"{where}: mask file {mask_path} must hold booleans (True = untrusted), got {mask.dtype}")
        mask = mask.astype(bool)
    return mask


class _LazyFile:
    """An array-like that reads only the requested slice from a file, for dask.

    It holds a path, not an open handle, so a dask graph built on it can be
    pickled (e.g. sent to a distributed cluster); the handle is opened on the
    first read and dropped when pickled.
    """

    def __init__(self, kind, path, inner, shape, dtype):
        self.kind, self.path, self.inner = kind, str(path), inner
        self.shape, self.dtype, self.ndim = tuple(shape), np.dtype(dtype), len(shape)
        self._handle = None

    def __dask_tokenize__(self):
        stat = os.stat(self.path)
        return ("domains.io._LazyFile", self.kind, self.path, self.inner, stat.st_mtime_ns, stat.st_size)

    def __getstate__(self):
        state = dict(self.__dict__)
        state["_handle"] = None
        return state

    def _open(self):
        if self._handle is None:
            if self.kind == "npy":
                self._handle = (np.load(self.path, mmap_mode="r", allow_pickle=False),)
            elif self.kind == "hdf5":
                import h5py

                file = h5py.File(self.path, "r")
                self._handle = (file[self.inner], file)
            elif self.kind == "tiff":
                import tifffile

                try:  # uncompressed, contiguous: a plain memory map is fastest
                    self._handle = (tifffile.memmap(self.path, mode="r"),)
                except ValueError:
                    import zarr

                    tif = tifffile.TiffFile(self.path)
                    store = tif.series[0].aszarr()
                    self._handle = (zarr.open_array(store, mode="r"), store, tif)
            else:  # pragma: no cover - guarded by the callers
                raise ValueError(self.kind)
        return self._handle[0]

    def __getitem__(self, key):
        return np.asarray(self._open()[key])

    def close(self):
        """Close the open file, if any; a later read opens it again."""
        handle, self._handle = self._handle, None
        for part in (handle or ())[1:]:
            close = getattr(part, "close", None)
            if close is not None:
                close()

    def __del__(self):
        # Close explicitly when the dask graph is dropped: tifffile warns about
        # files left to the garbage collector.
        try:
            self.close()
        except Exception:  # pragma: no cover - interpreter shutdown
            pass


def _row_chunks(shape, dtype):
    """Chunks of whole rows (one energy slice at a time for a grid) of about :data:`LAZY_CHUNK_BYTES`."""
    row_bytes = shape[-1] * np.dtype(dtype).itemsize
    rows = int(min(shape[-2], max(1, LAZY_CHUNK_BYTES // max(row_bytes, 1))))
    return (1,) * (len(shape) - 2) + (rows, shape[-1])


def _as_dask(source, chunks="auto", lock=False):
    import dask.array as da

    meta = np.empty((0,) * source.ndim, dtype=source.dtype)
    return da.from_array(source, chunks=chunks, lock=lock, meta=meta, asarray=False)


def _load_npy(where, file, inner, lazy_threshold):
    if inner is not None:
        raise InputError(f"{where}: a .npy file holds one array; drop ':{inner}'")
    try:
        mm = np.load(file, mmap_mode="r", allow_pickle=False)
    except (OSError, ValueError, EOFError) as err:
        raise InputError(f"{where}: not a readable .npy file ({err})") from None
    if mm.dtype.kind not in "biuf":
        raise InputError(f"{where}: expected real numbers, got dtype {mm.dtype}")
    if mm.nbytes > lazy_threshold:
        chunks = _row_chunks(mm.shape, mm.dtype) if not mm.flags.f_contiguous or mm.ndim < 2 else "auto"
        return _as_dask(_LazyFile("npy", file, None, mm.shape, mm.dtype), chunks=chunks)
    return np.array(mm)


def _load_npz(where, file, inner):
    try:
        with np.load(file, allow_pickle=False) as archive:
            names = list(archive.files)
            if not names:
                raise InputError(f"{where}: the .npz archive holds no arrays")
            name = inner if inner is not None else names[0]
            if name not in names:
                raise InputError(f"{where}: no array {name!r} in the archive; it holds {', '.join(names)}")
            return archive[name]
    except InputError:
        raise
    except (OSError, ValueError, EOFError, KeyError) as err:
        raise InputError(f"{where}: not a readable .npz archive ({err})") from None


@contextlib.contextmanager
def _quiet_logger(name):
    """Silence a reader's own log lines: its complaint is reported in our one-line error instead."""
    import logging

    logger = logging.getLogger(name)
    level = logger.level
    logger.setLevel(logging.CRITICAL + 1)
    try:
        yield
    finally:
        logger.setLevel(level)


def _load_tiff(where, file, lazy_threshold):
    import tifffile

    try:
        with _quiet_logger("tifffile"), tifffile.TiffFile(file) as tif:
            if not tif.series:
                raise InputError(f"{where}: the TIFF file holds no image")
            if len(tif.series) > 1:
                shapes = ", ".join("x".join(map(str, s.shape)) for s in tif.series[:6])
                raise InputError(
                    f"{where}: the TIFF holds {len(tif.series)} images of different sizes ({shapes}); "
                    "expected one image or a stack of equal pages; save the page to analyse as its own file"
                )
            series = tif.series[0]
            axes, shape, dtype = series.axes, series.shape, series.dtype
            if "S" in axes:
                raise InputError(
                    f"{where}: a colour (RGB) TIFF, axes {axes}; save the measured channel as a single-channel image"
                )
            nbytes = int(np.prod(shape)) * np.dtype(dtype).itemsize
            if nbytes <= lazy_threshold:
                return series.asarray()
            contiguous = getattr(series, "dataoffset", None) is not None  # uncompressed, one block: rows
    except InputError:
        raise
    except (OSError, ValueError, tifffile.TiffFileError) as err:
        raise InputError(f"{where}: not a readable TIFF file ({err})") from None
    if np.dtype(dtype).kind not in "biuf":
        raise InputError(f"{where}: expected real numbers, got dtype {dtype}")
    chunks = _row_chunks(shape, dtype) if contiguous else "auto"
    return _as_dask(_LazyFile("tiff", file, None, shape, dtype), chunks=chunks, lock=True)


def _h5_datasets(group) -> list[str]:
    import h5py

    names = []
    group.visititems(lambda name, obj: names.append(name) if isinstance(obj, h5py.Dataset) else None)
    return names


def _load_hdf5(where, file, inner, lazy_threshold):
    import h5py

    try:
        with h5py.File(file, "r") as h5:
            if inner is None:
                names = _h5_datasets(h5)
                if len(names) != 1:
                    listed = ", ".join("/" + n for n in names) or "none"
                    raise InputError(
                        f"{where}: name the dataset as FILE.h5:/path when the file does not hold exactly one; "
                        f"datasets: {listed}"
                    )
                inner = names[0]
            obj = h5.get(inner)
            if not isinstance(obj, h5py.Dataset):
                listed = ", ".join("/" + n for n in _h5_datasets(h5)) or "none"
                raise InputError(f"{where}: no dataset /{inner} in {file}; datasets: {listed}")
            if obj.dtype.kind not in "biuf":
                raise InputError(f"{where}: expected real numbers, got dtype {obj.dtype}")
            if obj.size * obj.dtype.itemsize <= lazy_threshold:
                return obj[()]
            shape, dtype = obj.shape, obj.dtype
            # a contiguous dataset is laid out row by row; a chunked one keeps dask's choice
            chunks = _row_chunks(shape, dtype) if obj.chunks is None else "auto"
    except InputError:
        raise
    except (OSError, ValueError, KeyError) as err:
        raise InputError(f"{where}: not a readable HDF5 file ({err})") from None
    # h5py serialises reads internally; the dask lock keeps one reader per file.
    return _as_dask(_LazyFile("hdf5", file, inner, shape, dtype), chunks=chunks, lock=True)


def _load_zarr(where, file, inner, lazy_threshold):
    import dask.array as da
    import zarr

    if not file.is_dir():
        raise InputError(f"{where}: expected a zarr store (a directory)")
    try:
        node = zarr.open(store=str(file), mode="r", path=inner or "")
        if isinstance(node, zarr.Group):
            arrays = [name for name, obj in node.members(max_depth=None) if isinstance(obj, zarr.Array)]
            if len(arrays) != 1:
                listed = ", ".join("/" + n for n in arrays) or "none"
                raise InputError(
                    f"{where}: name the array as STORE.zarr:/path when the store does not hold exactly one; "
                    f"arrays: {listed}"
                )
            node = node[arrays[0]]
        if node.dtype.kind not in "biuf":
            raise InputError(f"{where}: expected real numbers, got dtype {node.dtype}")
        if node.nbytes <= lazy_threshold:
            return node[...]
        return da.from_zarr(node)
    except InputError:
        raise
    except Exception as err:  # zarr raises several types for a missing or broken store
        raise InputError(f"{where}: not a readable zarr array ({type(err).__name__}: {err})") from None


def _load_text(where, file):
    try:
        text = file.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as err:
        raise InputError(f"{where}: cannot read as a text matrix ({err})") from None
    lines = [line for line in text.splitlines() if line.strip() and not line.lstrip().startswith("#")]
    if not lines:
        raise InputError(f"{where}: the file holds no numbers")
    delimiter = "," if "," in lines[0] else None
    try:
        return np.loadtxt(lines, delimiter=delimiter, dtype=float, ndmin=2)
    except ValueError as err:
        raise InputError(
            f"{where}: not a numeric matrix ({'comma' if delimiter else 'whitespace'} separated): {err}"
        ) from None


def load_scan(
    path,
    *,
    pixel_size_nm=None,
    channel=None,
    bias_V=None,
    setpoint_A=None,
    energies_V=None,
    lazy_threshold_bytes=LAZY_THRESHOLD_BYTES,
) -> Scan:
    """Read one image or spectroscopic grid from an open file format into a :class:`domains.Scan`.

    Parameters
    ----------
    path : str or path-like
        ``.npy``; ``.npz`` (the first array, or ``file.npz:name``); ``.tif``/``.tiff``
        (the first series); ``.h5``/``.hdf5`` (``file.h5:/dataset``, or the only
        dataset); ``.zarr`` (an array at the root, ``store.zarr:/path``, or the only
        array); ``.txt``/``.csv`` (a matrix, comma or whitespace separated, ``#``
        comments). Arrays are 2-D (row, col) or 3-D (energy, row, col).
    pixel_size_nm, channel, bias_V, setpoint_A, energies_V : optional
        Override the sidecar values (see Notes). None means "not given".
    lazy_threshold_bytes : int
        Arrays larger than this in memory are opened lazily as dask arrays.

    Returns
    -------
    Scan
        ``source`` is ``str(path)``; ``mask`` holds the sidecar mask combined with
        every pixel that is NaN or inf (in any slice of a grid); the data are not
        modified. ``metadata`` holds the sidecar keys this function does not use,
        under their own names, plus ``sidecar_path`` when a sidecar was read.

    Raises
    ------
    InputError
        For a missing file, a directory where a file was expected, an empty or
        unreadable file, non-numeric data, an array that is not 2-D or 3-D, an
        image with no finite pixel, a malformed sidecar or mask file, or a missing
        pixel size. The message starts with ``path``.

    Notes
    -----
    The sidecar is ``NAME.json`` next to ``NAME.ext`` (for ``file.h5:/dataset``,
    next to ``file.h5``), a JSON object with the keys ``pixel_size_nm`` (number or
    [row, col] in nm), ``channel`` ("topography", "conductance" or "current"),
    ``bias_V``, ``setpoint_A``, ``energies_V`` (grids) and ``mask`` (a ``.npy``
    boolean array, True = untrusted, its path relative to the sidecar). Keyword
    arguments override it. Without a pixel size from either, loading fails: the
    size is never guessed.

    A lazily opened scan (``scan.is_lazy``) is not scanned for NaN at load time,
    since that would read the whole file: its mask holds only the sidecar mask,
    and later steps treat NaN and inf pixels as masked.

    Examples
    --------
    >>> import json, pathlib, tempfile
    >>> import numpy as np
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> image = np.arange(12.0).reshape(3, 4)
    >>> image[0, 0] = np.nan
    >>> np.save(folder / "topo.npy", image)
    >>> _ = (folder / "topo.json").write_text(json.dumps({"pixel_size_nm": 0.05, "bias_V": 0.3}))
    >>> scan = load_scan(folder / "topo.npy")
    >>> scan.shape, scan.pixel_size_nm, scan.bias_V, int(scan.mask.sum())
    ((3, 4), (0.05, 0.05), 0.3, 1)
    >>> load_scan(folder / "topo.npy", pixel_size_nm=0.1).pixel_size_nm
    (0.1, 0.1)
    """
    where = os.fspath(path)
    file, inner = _split_path(path)
    try:
        lazy_threshold = int(lazy_threshold_bytes)
    except (TypeError, ValueError):
        raise InputError(f"lazy_threshold_bytes must be a number of bytes, got {lazy_threshold_bytes!r}") from None
    if lazy_threshold < 0:
        raise InputError(f"lazy_threshold_bytes must not be negative, got {lazy_threshold_bytes!r}")

    suffix = file.suffix.lower()
    kind = _FORMATS.get(suffix)
    if kind is None:
        raise InputError(
            f"{where}: unknown file type {suffix or '(no extension)'!r}; "
            "expected .npy, .npz, .tif, .tiff, .h5, .hdf5, .zarr, .txt or .csv"
        )
    _check_exists(where, file)
    if kind != "zarr":
        if file.is_dir():
            raise InputError(f"{where}: is a directory, expected a file")
        if not stat.S_ISREG(file.stat().st_mode):
            raise InputError(f"{where}: not a regular file (a pipe, socket or device); expected a {suffix} file")
        if file.stat().st_size == 0:
            raise InputError(f"{where}: the file is empty")
        try:
            with open(file, "rb"):
                pass
        except OSError as err:
            raise InputError(f"{where}: cannot be read ({err.strerror})") from None
    if inner is not None and kind not in ("npz", "hdf5", "zarr"):
        raise InputError(f"{where}: ':{inner}' names an array inside a container, but a {suffix} file holds one")

    sidecar, sidecar_file = _read_sidecar(where, file)

    if kind == "npy":
        data = _load_npy(where, file, inner, lazy_threshold)
    elif kind == "npz":
        data = _load_npz(where, file, inner)
    elif kind == "tiff":
        data = _load_tiff(where, file, lazy_threshold)
    elif kind == "hdf5":
        data = _load_hdf5(where, file, inner, lazy_threshold)
    elif kind == "zarr":
        data = _load_zarr(where, file, inner, lazy_threshold)
    else:
        data = _load_text(where, file)

    if data.dtype.kind not in "biuf":
        raise InputError(f"{where}: expected real numbers, got dtype {data.dtype}")
    if data.ndim not in (2, 3):
        raise InputError(
            f"{where}: expected a 2-D image (row, col) or a 3-D grid (energy, row, col), got shape {tuple(data.shape)}"
        )
    if data.size == 0:
        raise InputError(f"{where}: the array is empty, shape {tuple(data.shape)}")

    mask = None
    if "mask" in sidecar and sidecar["mask"] is not None:
        mask = _read_mask_file(where, sidecar_file, sidecar["mask"])
        if mask.shape != tuple(data.shape[-2:]):
            raise InputError(
                f"{where}: mask {sidecar_file.parent / sidecar['mask']} has shape {mask.shape}, "
                f"the image {tuple(data.shape[-2:])}"
            )
    if not _is_dask(data) and data.dtype.kind == "f":
        bad = ~np.isfinite(data)
        if data.ndim == 3:
            bad = bad.any(axis=0)
        if bad.all():
            where_bad = " in some slice" if data.ndim == 3 else ""
            raise InputError(f"{where}: no finite pixel (every pixel is NaN or inf{where_bad})")
        if bad.any():
            mask = bad if mask is None else (mask | bad)

    given = dict(
        pixel_size_nm=pixel_size_nm, channel=channel, bias_V=bias_V, setpoint_A=setpoint_A, energies_V=energies_V
    )
    fields = {key: sidecar.get(key) for key in given}
    fields.update({key: value for key, value in given.items() if value is not None})
    if fields["pixel_size_nm"] is None:
        raise InputError(
            f"{where}: no pixel size; give --pixel-size (pixel_size_nm=) or a sidecar "
            f"{_sidecar_path(file).name} with \"pixel_size_nm\""
        )
    if fields["channel"] is None:
        fields["channel"] = "topography"
    metadata = {key: value for key, value in sidecar.items() if key not in SIDECAR_KEYS}
    if sidecar_file is not None:
        metadata.setdefault("sidecar_path", str(sidecar_file))
    try:
        return Scan(data, mask=mask, source=where, metadata=metadata, **fields)
    except InputError as err:
        message = str(err)
        raise InputError(message if message.startswith(where) else f"{where}: {message}") from None


# --------------------------------------------------------------------------- saving a scan


def save_scan(scan: Scan, path, *, overwrite: bool = False) -> Path:
    """Write a scan as ``NAME.npy`` with its sidecar ``NAME.json`` (and ``NAME.mask.npy`` if masked).

    Parameters
    ----------
    scan : Scan
        The scan; a lazy scan is written chunk by chunk.
    path : str or path-like
        Target ``.npy`` path.
    overwrite : bool
        Replace existing files; by default an existing file is an error.

    Returns
    -------
    pathlib.Path
        The ``.npy`` path; :func:`load_scan` reads it back.

    Raises
    ------
    InputError
        If ``path`` does not end in ``.npy``, its folder does not exist, or a
        target file exists and ``overwrite`` is False.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> import numpy as np
    >>> from domains import Scan
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> scan = Scan(np.ones((4, 5)), pixel_size_nm=(0.05, 0.04), bias_V=-0.2)
    >>> saved = save_scan(scan, folder / "scene.npy")
    >>> again = load_scan(saved)
    >>> again.pixel_size_nm, again.bias_V
    ((0.05, 0.04), -0.2)
    """
    if not isinstance(scan, Scan):
        raise InputError(f"scan must be a domains.Scan, got {type(scan).__name__}")
    target = Path(path)
    if target.suffix.lower() != ".npy":
        raise InputError(f"{target}: save_scan writes .npy files; the path must end in .npy")
    if not target.parent.is_dir():
        raise InputError(f"{target}: the folder {target.parent} does not exist")
    sidecar = target.with_suffix(".json")
    mask_file = target.with_name(target.stem + ".mask.npy")
    targets = [target, sidecar] + ([mask_file] if scan.mask is not None else [])
    if not overwrite:
        for existing in targets:
            if existing.exists():
                raise InputError(f"{existing}: already exists; pass overwrite=True to replace it")

    dy, dx = scan.pixel_size_nm
    content: dict[str, Any] = {
        key: value
        for key, value in json_safe(scan.metadata).items()
        if key not in SIDECAR_KEYS and key != "sidecar_path"
    }
    content.update(pixel_size_nm=dy if dy == dx else [dy, dx], channel=scan.channel)
    for key in ("bias_V", "setpoint_A", "energies_V"):
        if getattr(scan, key) is not None:
            content[key] = json_safe(getattr(scan, key))
    if scan.mask is not None:
        content["mask"] = mask_file.name

    def _write(final: Path, writer):
        # Write beside the target and rename, so a failure never leaves half a file.
        temporary = final.with_name(f".{final.name}.tmp-{secrets.token_hex(4)}")
        try:
            writer(temporary)
            os.replace(temporary, final)
        finally:
            if temporary.exists():
                temporary.unlink()

    def _write_data(temporary: Path):
        if scan.is_lazy:
            import dask.array as da

            out = np.lib.format.open_memmap(temporary, mode="w+", dtype=scan.data.dtype, shape=scan.shape)
            da.store(scan.data, out, lock=False)
            out.flush()
            del out
        else:
            with open(temporary, "wb") as handle:
                np.save(handle, np.asarray(scan.data), allow_pickle=False)

    def _write_mask(temporary: Path):
        with open(temporary, "wb") as handle:
            np.save(handle, np.asarray(scan.mask, dtype=bool), allow_pickle=False)

    _write(target, _write_data)
    if scan.mask is not None:
        _write(mask_file, _write_mask)
    _write(sidecar, lambda temporary: temporary.write_text(json.dumps(content, indent=2, allow_nan=False) + "\n"))
    return target


# --------------------------------------------------------------------------- provenance


def json_safe(obj):
    """Convert numpy values (and paths, tuples, dataclasses) into plain JSON-ready Python.

    Parameters
    ----------
    obj : object
        Nested dicts, lists, tuples, numpy scalars and arrays, paths, dataclasses.

    Returns
    -------
    object
        The same structure with numpy arrays as (nested) lists, numpy scalars as
        Python numbers, tuples as lists, dict keys as strings, and NaN and
        infinities as None (JSON has no NaN).

    Raises
    ------
    TypeError
        For values with no JSON form (e.g. complex numbers, arbitrary objects).

    Examples
    --------
    >>> import numpy as np
    >>> json_safe({"a": np.float32(0.5), "b": np.array([1.0, np.nan]), "c": (np.int64(3), np.inf)})
    {'a': 0.5, 'b': [1.0, None], 'c': [3, None]}
    """
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        return value if math.isfinite(value) else None
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        if obj.dtype.kind not in "biuf":
            raise TypeError(f"json_safe: cannot convert an array of dtype {obj.dtype} to JSON")
        return json_safe(obj.tolist())
    if _is_dask(obj):
        return json_safe(np.asarray(obj.compute()))
    if isinstance(obj, Mapping):
        return {str(json_safe(k)) if not isinstance(k, str) else k: json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, (set, frozenset)):
        return [json_safe(v) for v in sorted(obj, key=repr)]
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return json_safe({f.name: getattr(obj, f.name) for f in dataclasses.fields(obj)})
    if isinstance(obj, (_dt.datetime, _dt.date)):
        return obj.isoformat()
    raise TypeError(f"json_safe: cannot convert an object of type {type(obj).__name__} to JSON")


def sha256_file(path) -> str:
    """SHA-256 of a file, or of a directory (e.g. a ``.zarr`` store) file by file.

    Parameters
    ----------
    path : str or path-like
        A file or a directory.

    Returns
    -------
    str
        Hex digest. For a directory: the SHA-256 of, for each file in the sorted
        order of its relative path (``/``-separated, UTF-8), the path, a NUL byte,
        the file size as 8 little-endian bytes, and the content.

    Raises
    ------
    InputError
        If the path does not exist.

    Examples
    --------
    >>> import hashlib, pathlib, tempfile
    >>> file = pathlib.Path(tempfile.mkdtemp()) / "a.bin"
    >>> _ = file.write_bytes(b"abc")
    >>> sha256_file(file) == hashlib.sha256(b"abc").hexdigest()
    True
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"{path}: no such file or directory")
    digest = hashlib.sha256()

    def _feed(file: Path):
        with open(file, "rb") as handle:
            for block in iter(lambda: handle.read(2**20), b""):
                digest.update(block)

    if path.is_dir():
        files = sorted((p for p in path.rglob("*") if p.is_file()), key=lambda p: p.relative_to(path).as_posix())
        for file in files:
            digest.update(file.relative_to(path).as_posix().encode("utf-8") + b"\0")
            digest.update(file.stat().st_size.to_bytes(8, "little"))
            _feed(file)
    else:
        _feed(path)
    return digest.hexdigest()


def _size_bytes(path: Path) -> int:
    if path.is_dir():
        return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())
    return path.stat().st_size


def package_versions() -> dict[str, str | None]:
    """Versions of Python and of the packages that shape the results (None if not installed).

    Returns
    -------
    dict
        ``{"python": "3.x.y", "cdw-domains": ..., "numpy": ..., ...}``.

    Examples
    --------
    >>> versions = package_versions()
    >>> sorted(versions)[:3]
    ['cdw-domains', 'dask', 'h5py']
    """
    versions: dict[str, str | None] = {"python": platform.python_version()}
    for name in VERSION_PACKAGES:
        try:
            versions[name] = version(name)
        except PackageNotFoundError:
            versions[name] = None
    return versions


def provenance(*, command_line, parameters, inputs) -> dict:
    """The provenance record: command line, parameters, versions, input hashes and a UTC time.

    Parameters
    ----------
    command_line : str or sequence of str
        How the analysis was started (e.g. ``sys.argv``).
    parameters : mapping
        Every parameter of the analysis; converted with :func:`json_safe`.
    inputs : sequence of str or path-like
        Input files; ``file.h5:/dataset`` names are accepted (the file is hashed).
        A sidecar ``NAME.json`` next to an input is hashed too.

    Returns
    -------
    dict
        ``command_line``, ``parameters``, ``versions`` (:func:`package_versions`),
        ``inputs`` (a list of ``{"path", "file", "sha256", "size_bytes", "sidecar"}``,
        ``sidecar`` being None or ``{"path", "sha256", "size_bytes"}``), ``platform``
        and ``created_utc`` (ISO 8601, e.g. ``2030-01-31T12:00:00Z``).

    Raises
    ------
    InputError
        If an input does not exist.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> file = pathlib.Path(tempfile.mkdtemp()) / "topo.txt"
    >>> _ = file.write_text("1 2\\n3 4\\n")
    >>> record = provenance(command_line=["domains", "peaks", str(file)], parameters={"sigma_nm": 1.5},
    ...                     inputs=[file])
    >>> record["inputs"][0]["size_bytes"], record["parameters"]
    (8, {'sigma_nm': 1.5})
    """
    if isinstance(command_line, (str, bytes)):
        command = command_line if isinstance(command_line, str) else command_line.decode()
    else:
        command = [os.fspath(part) if isinstance(part, os.PathLike) else str(part) for part in command_line]
    if isinstance(inputs, (str, os.PathLike)):
        inputs = [inputs]
    records = []
    for given in inputs:
        file, _ = _split_path(given)
        if not file.exists():
            raise InputError(f"{os.fspath(given)}: no such input file")
        sidecar = _sidecar_path(file)
        records.append({
            "path": os.fspath(given),
            "file": str(file),
            "sha256": sha256_file(file),
            "size_bytes": _size_bytes(file),
            "sidecar": (
                {"path": str(sidecar), "sha256": sha256_file(sidecar), "size_bytes": sidecar.stat().st_size}
                if sidecar.is_file() and sidecar != file else None
            ),
        })
    return {
        "command_line": command,
        "parameters": json_safe(dict(parameters) if parameters is not None else {}),
        "versions": package_versions(),
        "inputs": records,
        "platform": platform.platform(),
        "created_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
    }


# --------------------------------------------------------------------------- the result bundle


def _check_name(kind: str, name) -> str:
    if not isinstance(name, str) or not _NAME.match(name) or name in (".", ".."):
        raise InputError(f"{kind} name {name!r} must be letters, digits, '_', '-' or '.'")
    return name


def _check_relative(name) -> str:
    if not isinstance(name, str) or not name:
        raise InputError(f"extra_files: path {name!r} must be a non-empty string")
    parts = name.replace("\\", "/").split("/")
    if name.startswith(("/", "\\")) or any(part in ("", ".", "..") for part in parts) or ":" in name:
        raise InputError(f"extra_files: path {name!r} must be relative, inside the bundle")
    return "/".join(parts)


def _check_maps(maps) -> dict:
    checked = {}
    for key, value in maps.items():
        if not isinstance(key, str) or not key.strip("/"):
            raise InputError(f"maps: path {key!r} must be a non-empty string like 'labels' or 'amplitude/cdw_1'")
        parts = key.strip("/").split("/")
        for part in parts:
            _check_name("maps path part", part)
        if not isinstance(value, tuple) or len(value) != 2:
            raise InputError(f"maps[{key!r}] must be an (array, attrs) pair")
        array, attrs = value
        if not isinstance(attrs, Mapping):
            raise InputError(f"maps[{key!r}]: attrs must be a dict, got {type(attrs).__name__}")
        missing = [k for k in ("pixel_size_nm", "units") if k not in attrs]
        if missing:
            raise InputError(f"maps[{key!r}]: attrs must include {' and '.join(missing)}")
        dy, dx = pixel_size_pair(attrs["pixel_size_nm"], name=f"maps[{key!r}] pixel_size_nm")
        if not isinstance(attrs["units"], str):
            raise InputError(
                f"maps[{key!r}]: attrs units must be a string (e.g. 'nm', 'rad', ''), got {attrs['units']!r}"
            )
        if not _is_dask(array):
            array = np.asarray(array)
        if array.dtype.kind not in "biuf":
            raise InputError(f"maps[{key!r}]: dtype {array.dtype} cannot be stored; use bool, integer or float")
        attrs = json_safe(dict(attrs))
        attrs["pixel_size_nm"] = [dy, dx]
        checked["/".join(parts)] = (array, attrs)
    return checked


def _write_maps(folder: Path, maps: dict):
    import zarr

    root = zarr.open_group(str(folder), mode="w", zarr_format=3)
    for key, (array, attrs) in maps.items():
        *parents, name = key.split("/")
        group = root
        for part in parents:
            group = group.require_group(part)
        if _is_dask(array):
            import dask.array as da

            # One zarr chunk per dask chunk, so each task writes whole chunks and
            # parallel writes never touch the same chunk.
            chunks = tuple(max(c[0], 1) if c else 1 for c in array.chunks)
            array = array.rechunk(chunks)
            target = group.create_array(name, shape=array.shape, dtype=array.dtype, chunks=chunks, attributes=attrs)
            da.store(array, target, lock=False)
        else:
            target = group.create_array(name, shape=array.shape, dtype=array.dtype, attributes=attrs)
            target[...] = array


def _csv_value(value):
    if value is None:
        return ""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (np.integer, np.floating)):
        value = value.item()
    if isinstance(value, float) and math.isnan(value):
        return ""
    return value


def _write_table(file: Path, name: str, table):
    if not isinstance(table, tuple) or len(table) != 2:
        raise InputError(f"tables[{name!r}] must be a (columns, rows) pair")
    columns, rows = table
    columns = [str(c) for c in columns]
    if len(set(columns)) != len(columns):
        raise InputError(f"tables[{name!r}]: repeated column names in {columns}")
    with open(file, "w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=columns, restval="", extrasaction="raise", lineterminator="\n")
        writer.writeheader()
        for row in rows:
            extra = set(row) - set(columns)
            if extra:
                raise InputError(f"tables[{name!r}]: a row has keys not among the columns: {sorted(extra)}")
            writer.writerow({key: _csv_value(value) for key, value in row.items()})


def check_output_location(out_dir, *, overwrite=False, option="--out") -> Path:
    """Check, before any work, that a bundle can be written at ``out_dir``; raise InputError if not.

    The folder must have a name; if it exists it must be a folder and ``overwrite``
    must be set; the nearest existing parent must be a folder (not a file) in
    which a folder can be created (probed by creating and removing a hidden one).
    Nothing is left behind.

    Parameters
    ----------
    out_dir : str or path-like
        The bundle folder.
    overwrite : bool
        Whether an existing bundle may be replaced.
    option : str
        The command-line option named in messages.

    Returns
    -------
    pathlib.Path

    Raises
    ------
    InputError
        Naming ``option``, the path received and what is expected.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> folder = pathlib.Path(tempfile.mkdtemp())
    >>> check_output_location(folder / "new" / "bundle") == folder / "new" / "bundle"
    True
    >>> check_output_location(folder)  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    domains._errors.InputError: --out ...: already exists; give --overwrite to replace it, or choose another folder
    """
    target = Path(out_dir)
    if target.name in ("", ".", ".."):
        raise InputError(f"{option} {out_dir}: give a folder name for the bundle, not {str(out_dir)!r}")
    if target.is_symlink() and not target.exists():
        try:
            os.stat(target)
        except OSError as err:
            what = "a symbolic link loop" if err.errno == errno.ELOOP else "a symbolic link that leads nowhere"
            raise InputError(f"{option} {target}: {what}; expected a folder name") from None
    if target.exists():
        if not target.is_dir():
            raise InputError(f"{option} {target}: exists and is not a folder; a bundle will not replace a file")
        if not overwrite:
            raise InputError(f"{option} {target}: already exists; give --overwrite to replace it, "
                             "or choose another folder")
    ancestor = target.parent
    while True:
        try:
            os.stat(ancestor)
            break
        except OSError as err:
            if err.errno in (errno.ENOTDIR, errno.ELOOP):
                raise InputError(f"{option} {target}: a part of the path above it is a file or a link loop, "
                                 "not a folder") from None
            if ancestor == ancestor.parent:
                break
            ancestor = ancestor.parent
    if not ancestor.is_dir():
        raise InputError(f"{option} {target}: {ancestor} is a file, not a folder; the bundle needs a folder to live in")
    try:
        probe = _new_hidden_folder(ancestor, target.name, "probe")
        probe.rmdir()
    except OSError as err:
        raise InputError(f"{option} {target}: cannot create folders in {ancestor} ({err.strerror}); "
                         "choose a writable location") from None
    return target


#: Set by a test to pause :func:`write_bundle` just before its final rename: the path of a file that
#: must appear before the rename proceeds (``<path>.waiting`` is written while it waits).
BARRIER_ENV = "DOMAINS_TEST_WRITE_BARRIER"

_HELD_LOCKS: dict[str, list] = {}


def _lock_key(target: Path) -> str:
    return os.path.join(os.path.realpath(target.parent), target.name)


def lock_path(out_dir) -> Path:
    """The lock file of the bundle folder ``out_dir``: ``.NAME.lock`` beside it.

    Examples
    --------
    >>> lock_path("results/run1").name
    '.run1.lock'
    """
    target = Path(out_dir)
    return target.parent / f".{target.name}.lock"


def _remove_stale(target: Path) -> list[str]:
    """Remove temporary folders of runs that died while writing ``target`` (the caller holds its lock).

    A bundle moved aside (``.NAME.old-*``) by a run that died before putting the new one in
    place is moved back when ``target`` is missing.
    """
    notes = []
    parent = target.parent
    try:
        entries = sorted(parent.iterdir())
    except OSError:
        return notes
    for entry in entries:
        name = entry.name
        if not name.startswith(f".{target.name}.") or entry.is_symlink() or not entry.is_dir():
            continue
        tag = name[len(target.name) + 2:]
        if not re.fullmatch(r"(tmp|old)-[0-9a-f]{8}", tag):
            continue
        if tag.startswith("old") and not target.exists():
            os.rename(entry, target)
            notes.append(f"restored {target} from {entry.name}, left aside by a run that was interrupted")
            continue
        shutil.rmtree(entry, ignore_errors=True)
        notes.append(f"removed {entry}, the unfinished output of a run that was interrupted")
    return notes


@contextlib.contextmanager
def output_lock(out_dir):
    """Hold an exclusive lock on the bundle folder ``out_dir`` (re-entrant within one process).

    The lock is ``fcntl.flock`` on ``.NAME.lock`` beside the folder, which holds the
    process id of its owner; the operating system releases it when the owner
    dies, however it dies. Taking it removes the temporary folders of runs that
    died while writing the same bundle (nothing else can be writing them).

    Parameters
    ----------
    out_dir : str or path-like
        The bundle folder; missing parent folders are created (and removed again if
        no bundle was written).

    Yields
    ------
    list of str
        Notes naming the stale temporary folders removed (empty when re-entered).

    Raises
    ------
    InputError
        If another live process holds the lock; the message names its process id.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "bundle"
    >>> with output_lock(out) as notes:
    ...     lock_path(out).exists(), notes
    (True, [])
    >>> lock_path(out).exists()
    False
    """
    import fcntl

    target = Path(out_dir)
    key = _lock_key(target)
    if key in _HELD_LOCKS:
        _HELD_LOCKS[key][1] += 1
        try:
            yield []
        finally:
            _HELD_LOCKS[key][1] -= 1
        return
    created = []
    folder = target.parent
    while not folder.exists() and folder != folder.parent:
        created.append(folder)
        folder = folder.parent
    target.parent.mkdir(parents=True, exist_ok=True)
    lock = lock_path(target)
    while True:
        fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as err:
            if err.errno not in (errno.EAGAIN, errno.EACCES, errno.EWOULDBLOCK):
                os.close(fd)
                raise
            owner = os.pread(fd, 64, 0).decode("ascii", "replace").strip() or "unknown"
            os.close(fd)
            raise InputError(f"--out {target}: another run (pid {owner}) is writing this bundle; "
                             "wait for it to finish or choose another folder") from None
        try:
            same = os.stat(lock).st_ino == os.fstat(fd).st_ino
        except FileNotFoundError:
            same = False
        if same:
            break
        os.close(fd)  # the owner removed the file between our open and our lock: take the new one
    os.ftruncate(fd, 0)
    os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
    _HELD_LOCKS[key] = [fd, 1]
    try:
        notes = _remove_stale(target)
        yield notes
    finally:
        del _HELD_LOCKS[key]
        try:
            os.unlink(lock)
        except OSError:
            pass
        os.close(fd)
        if not target.exists():
            for folder in created:
                try:
                    folder.rmdir()
                except OSError:
                    break


def _wait_for_barrier(temporary: Path):
    barrier = os.environ.get(BARRIER_ENV)
    if not barrier:
        return
    Path(barrier + ".waiting").write_text(f"{os.getpid()} {temporary}\n")
    deadline = time.monotonic() + 120
    while not os.path.exists(barrier) and time.monotonic() < deadline:
        time.sleep(0.02)


def _new_hidden_folder(parent: Path, name: str, tag: str) -> Path:
    while True:
        candidate = parent / f".{name}.{tag}-{secrets.token_hex(4)}"
        try:
            candidate.mkdir()  # honours the umask, unlike tempfile.mkdtemp (mode 0700)
            return candidate
        except FileExistsError:
            continue


def write_bundle(
    out_dir,
    *,
    summary,
    provenance,
    tables=None,
    maps=None,
    figures=None,
    report_html=None,
    extra_files=None,
    overwrite: bool = False,
) -> Path:
    """Write the result bundle atomically: it appears at ``out_dir`` only once complete.

    Parameters
    ----------
    out_dir : str or path-like
        The bundle folder. Missing parent folders are created.
    summary : mapping
        Written to ``summary.json`` (through :func:`json_safe`: NaN and inf become null).
    provenance : mapping
        Written to ``provenance.json`` (see :func:`provenance`).
    tables : dict, optional
        ``name -> (columns, rows)``, rows a list of dicts keyed by column (missing
        keys are empty cells); written to ``NAME.csv`` with a header even with no
        rows. None and NaN become empty cells, booleans ``true``/``false``.
    maps : dict, optional
        ``path -> (array, attrs)`` with paths such as ``"labels"`` or
        ``"amplitude/cdw_1"``; numpy or dask arrays (dask written chunk by chunk)
        into the zarr v3 group ``maps.zarr``. ``attrs`` must include
        ``pixel_size_nm`` (stored as [row, col]) and ``units`` (a string).
    figures : dict, optional
        ``name -> PNG bytes``, written to ``figures/NAME.png``.
    report_html : str, optional
        Written to ``report.html``.
    extra_files : dict, optional
        Relative path -> bytes or str, for anything else.
    overwrite : bool
        Replace an existing bundle; the old one is removed only after the new one
        is in place.

    Returns
    -------
    pathlib.Path
        The bundle folder.

    Raises
    ------
    InputError
        If ``out_dir`` exists and ``overwrite`` is False, or if a part is invalid
        (a map without ``pixel_size_nm`` or ``units``, a bad name, a figure that is
        not PNG bytes). On any error no bundle and no temporary folder are left.

    Notes
    -----
    Everything is written to a hidden folder ``.NAME.tmp-XXXXXXXX`` next to the
    target and then renamed into place (a rename within one folder is atomic).
    The whole write holds :func:`output_lock` on the target: a second process
    writing the same bundle fails at once, naming the first one's process id,
    and temporary folders of processes that died while writing are removed
    (with a logged note). An existing bundle is replaced only with ``overwrite``,
    checked again just before the final rename.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> import numpy as np
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "result"
    >>> labels = np.zeros((4, 4), dtype=np.int32)
    >>> path = write_bundle(out, summary={"domains": {"count": 1}}, provenance={"command_line": "demo"},
    ...                     tables={"domains": (["label", "area_nm2"], [{"label": 1, "area_nm2": 0.04}])},
    ...                     maps={"labels": (labels, {"pixel_size_nm": 0.05, "units": ""})})
    >>> bundle = read_bundle(path)
    >>> bundle.summary, bundle.tables["domains"], bundle.maps["labels"].attrs["units"]
    ({'domains': {'count': 1}}, [{'label': 1, 'area_nm2': 0.04}], '')
    """
    target = Path(out_dir)
    if target.name in ("", ".", ".."):
        raise InputError(f"{out_dir}: give a folder name for the bundle")
    if target.exists() or target.is_symlink():
        if not overwrite:
            raise InputError(f"--out {target}: already exists; give --overwrite to replace it, "
                             "or choose another folder")
        if not target.is_dir():
            raise InputError(f"--out {target}: exists and is not a folder; it will not be replaced by a bundle")
    if not isinstance(summary, Mapping):
        raise InputError(f"summary must be a dict, got {type(summary).__name__}")
    if not isinstance(provenance, Mapping):
        raise InputError(f"provenance must be a dict, got {type(provenance).__name__}")
    tables = dict(tables or {})
    figures = dict(figures or {})
    extra_files = dict(extra_files or {})
    for name in tables:
        _check_name("table", name)
        if f"{name}.csv" in _BUNDLE_RESERVED:
            raise InputError(f"table name {name!r} clashes with a bundle file")
    checked_maps = _check_maps(dict(maps or {}))
    figure_names = {}
    for name in figures:
        stem = name[:-4] if isinstance(name, str) and name.lower().endswith(".png") else name
        figure_names[name] = _check_name("figure", stem) + ".png"
    taken = set(_BUNDLE_RESERVED) | {f"{name}.csv" for name in tables}
    extras = {}
    for name, content in extra_files.items():
        relative = _check_relative(name)
        if relative.split("/")[0] in taken:
            raise InputError(f"extra_files: {name!r} clashes with a bundle file")
        extras[relative] = content

    with output_lock(target) as notes:
        _log_notes(notes)
        return _write_bundle_locked(target, summary, provenance, tables, checked_maps, figures, figure_names,
                                    report_html, extras, overwrite)


def _log_notes(notes):
    """Tell the user what a run cleaned up (stderr by default; the ``domains`` logger)."""
    import logging

    for note in notes:
        logging.getLogger("domains").warning("note: %s", note)


def _write_bundle_locked(target, summary, provenance, tables, checked_maps, figures, figure_names, report_html,
                         extras, overwrite):
    if target.exists() and not overwrite:
        # Another run finished this bundle while we worked: never replace it silently.
        raise InputError(f"--out {target}: already exists (written while this run worked); "
                         "give --overwrite to replace it, or choose another folder")
    temporary = _new_hidden_folder(target.parent, target.name, "tmp")
    try:
        (temporary / "summary.json").write_text(
            json.dumps(json_safe(summary), indent=2, allow_nan=False) + "\n", encoding="utf-8")
        (temporary / "provenance.json").write_text(
            json.dumps(json_safe(provenance), indent=2, allow_nan=False) + "\n", encoding="utf-8")
        for name, table in tables.items():
            _write_table(temporary / f"{name}.csv", name, table)
        if checked_maps:
            _write_maps(temporary / "maps.zarr", checked_maps)
        if figures:
            (temporary / "figures").mkdir()
            for name, content in figures.items():
                if not isinstance(content, (bytes, bytearray, memoryview)):
                    raise InputError(f"figures[{name!r}] must be PNG bytes, got {type(content).__name__}")
                content = bytes(content)
                if not content.startswith(_PNG_SIGNATURE):
                    raise InputError(f"figures[{name!r}] is not a PNG image (no PNG signature)")
                (temporary / "figures" / figure_names[name]).write_bytes(content)
        if report_html is not None:
            if not isinstance(report_html, str):
                raise InputError(f"report_html must be a str, got {type(report_html).__name__}")
            (temporary / "report.html").write_text(report_html, encoding="utf-8")
        for relative, content in extras.items():
            file = temporary / relative
            file.parent.mkdir(parents=True, exist_ok=True)
            if isinstance(content, str):
                file.write_text(content, encoding="utf-8")
            elif isinstance(content, (bytes, bytearray, memoryview)):
                file.write_bytes(bytes(content))
            else:
                raise InputError(f"extra_files[{relative!r}] must be bytes or str, got {type(content).__name__}")

        _wait_for_barrier(temporary)
        if target.exists():
            if not overwrite:
                raise InputError(f"--out {target}: already exists; give --overwrite to replace it")
            old = _new_hidden_folder(target.parent, target.name, "old")
            old.rmdir()  # only the unique name is needed; rename wants it free
            os.rename(target, old)
            try:
                os.rename(temporary, target)
            except BaseException:
                os.rename(old, target)
                raise
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(temporary, target)
    except BaseException:
        shutil.rmtree(temporary, ignore_errors=True)
        raise
    return target


@dataclass
class Bundle:
    """A result bundle read back by :func:`read_bundle`.

    Attributes
    ----------
    path : pathlib.Path
        The bundle folder.
    summary, provenance : dict
        The parsed JSON files.
    tables : dict
        ``name -> list of dicts``, one per CSV row (cells parsed as int, float,
        bool or str; empty cells as None).
    columns : dict
        ``name -> list of column names``, kept also for tables with no rows.
    maps : zarr.Group or None
        ``maps.zarr`` opened read-only; arrays are read only when indexed.
    figures : dict
        ``name -> path`` of each PNG in ``figures/``.
    report_path : pathlib.Path or None
        ``report.html`` if present.
    """

    path: Path
    summary: dict
    provenance: dict
    tables: dict = field(default_factory=dict)
    columns: dict = field(default_factory=dict)
    maps: Any = None
    figures: dict = field(default_factory=dict)
    report_path: Path | None = None


def _parse_cell(text: str):
    if text == "":
        return None
    if text in ("true", "false"):
        return text == "true"
    try:
        return int(text)
    except ValueError:
        pass
    try:
        return float(text)
    except ValueError:
        return text


def read_bundle(path) -> Bundle:
    """Read a result bundle written by :func:`write_bundle` (maps stay lazy).

    Parameters
    ----------
    path : str or path-like
        The bundle folder.

    Returns
    -------
    Bundle

    Raises
    ------
    InputError
        If the folder does not exist or holds no ``summary.json``.

    Examples
    --------
    >>> import pathlib, tempfile
    >>> out = write_bundle(pathlib.Path(tempfile.mkdtemp()) / "b", summary={"x": 1}, provenance={})
    >>> read_bundle(out).summary
    {'x': 1}
    """
    import zarr

    folder = Path(path)
    if not folder.is_dir():
        raise InputError(f"{folder}: no such bundle folder")
    try:
        summary = json.loads((folder / "summary.json").read_text(encoding="utf-8"))
        prov_file = folder / "provenance.json"
        prov = json.loads(prov_file.read_text(encoding="utf-8")) if prov_file.exists() else {}
    except FileNotFoundError:
        raise InputError(f"{folder}: not a result bundle (no summary.json)") from None
    except (OSError, json.JSONDecodeError) as err:
        raise InputError(f"{folder}: cannot read the bundle's JSON ({err})") from None
    tables, columns = {}, {}
    for file in sorted(folder.glob("*.csv")):
        with open(file, newline="", encoding="utf-8") as handle:
            reader = csv.DictReader(handle)
            rows = [{key: _parse_cell(value) for key, value in row.items()} for row in reader]
            columns[file.stem] = list(reader.fieldnames or [])
        tables[file.stem] = rows
    maps = zarr.open_group(str(folder / "maps.zarr"), mode="r") if (folder / "maps.zarr").is_dir() else None
    figures = {file.stem: file for file in sorted((folder / "figures").glob("*.png"))}
    report = folder / "report.html"
    return Bundle(
        path=folder, summary=summary, provenance=prov, tables=tables, columns=columns, maps=maps,
        figures=figures, report_path=report if report.is_file() else None,
    )

