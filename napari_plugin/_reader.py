"""Reading scans and result bundles into napari layer data, with physical scale and units.

Everything here is plain Python: it turns what the ``domains`` core returns (a
:class:`domains.Scan`, the maps of an analysis or of a bundle) into napari
*layer data tuples* ``(data, add_kwargs, layer_type)``. No napari or Qt import
is needed to build them, so they can be tested and reused without a display.

Layer coordinates follow docs/methods.md (Conventions): data axes (row, col), world axes (y, x) in
nm, ``scale`` = pixel size in nm, origin at the centre of pixel (0, 0).

A scan file is read only when its pixel size is known, that is when a sidecar
``NAME.json`` with ``pixel_size_nm`` sits next to it: the analysis never guesses
a pixel size, so for a bare file :func:`get_reader` returns None (napari may
offer its own readers, which show the array in pixels) and says why: in the log
and in napari's notification area (:func:`missing_pixel_size_message`).
"""

from __future__ import annotations

import json
import logging
import math
import os
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from domains import _palette

logger = logging.getLogger(__name__)

__all__ = [
    "BUNDLE_LAZY_BYTES",
    "SCAN_SUFFIXES",
    "bundle_maps",
    "bundle_topography",
    "defects_layer_data",
    "domain_colormap",
    "get_reader",
    "is_bundle",
    "domain_ids_layer_data",
    "maps_layer_data",
    "missing_pixel_size_message",
    "read_bundle_layers",
    "read_scan_layers",
    "robust_limits",
    "scan_layer_data",
]

LayerData = tuple[Any, dict, str]

#: File suffixes read as scans (see :func:`domains.io.load_scan`).
SCAN_SUFFIXES = (".npy", ".npz", ".tif", ".tiff", ".h5", ".hdf5", ".zarr", ".txt", ".csv")

#: Bundle maps larger than this (bytes in memory) stay dask arrays backed by zarr;
#: smaller ones are read whole, which napari draws and scales faster.
BUNDLE_LAZY_BYTES = 256 * 2**20

#: Colour maps by channel; a name napari knows (matplotlib names are accepted).
CHANNEL_COLORMAPS = {"topography": "afmhot", "conductance": "viridis", "current": "gray"}

#: Defect markers: red for winding +1, blue for -1 (RGBA), the report's colours (``domains._palette``).
WINDING_COLORS = {sign: _palette.rgba(colour) for sign, colour in _palette.DEFECT_COLOURS.items()}

#: Opacity of the domain colours over the topograph: the topograph's contrast stays readable.
LABELS_OPACITY = 0.4

# Metadata key under which every layer made here keeps what the core needs back
# (pixel size, channel, bias, mask): widgets read it to rebuild a Scan.
META_KEY = "domains"


# --------------------------------------------------------------------------- small helpers


def _is_dask(array) -> bool:
    return type(array).__module__.startswith("dask")


def robust_limits(data, *, low=0.5, high=99.5, max_samples=512 * 512) -> tuple[float, float] | None:
    """Contrast limits from percentiles of the finite values, sampling large arrays.

    Parameters
    ----------
    data : array_like or dask array
        Image or stack. A dask array is sampled on a strided subgrid, so only a
        small part of it is computed.
    low, high : float
        Percentiles.
    max_samples : int
        Largest number of values looked at.

    Returns
    -------
    tuple of float or None
        (low, high) with high > low, or None when no value is finite.

    Examples
    --------
    >>> robust_limits(np.arange(100.0), low=0, high=100)
    (0.0, 99.0)
    >>> robust_limits(np.full((4, 4), 2.0))
    (2.0, 3.0)
    """
    shape = tuple(data.shape)
    size = int(np.prod(shape)) if shape else 1
    step = max(1, int(math.ceil((size / max_samples) ** (1 / max(len(shape[-2:]), 1)))))
    sample = data[(Ellipsis, slice(None, None, step), slice(None, None, step))] if len(shape) >= 2 else data
    if _is_dask(sample):
        sample = sample.compute()
    sample = np.asarray(sample, dtype=float)
    finite = sample[np.isfinite(sample)]
    if finite.size == 0:
        return None
    lo, hi = (float(v) for v in np.percentile(finite, [low, high]))
    if not hi > lo:
        hi = lo + 1.0
    return (lo, hi)


def _pixel_pair(value) -> tuple[float, float]:
    values = [float(v) for v in np.atleast_1d(np.asarray(value, dtype=float))]
    return (values[0], values[0]) if len(values) == 1 else (values[0], values[1])


def _spatial_kwargs(pixel_size_nm, translate=None) -> dict:
    dy, dx = _pixel_pair(pixel_size_nm)
    kwargs = {"scale": (dy, dx), "units": ("nm", "nm"), "axis_labels": ("y", "x")}
    if translate is not None:
        kwargs["translate"] = tuple(float(t) for t in translate)
    return kwargs


def _bias_text(bias_V) -> str:
    return f"{bias_V:+.3g} V"


# --------------------------------------------------------------------------- scans


def scan_layer_data(scan, *, name: str | None = None) -> LayerData:
    """One image layer for a :class:`domains.Scan`, in nm (grids: bias, y, x).

    Parameters
    ----------
    scan : domains.Scan
        Image (row, col) or grid (energy, row, col); a lazy scan stays a dask array.
    name : str, optional
        Layer name; default ``"<file stem> <channel> [<bias> V]"``.

    Returns
    -------
    tuple
        ``(data, add_kwargs, "image")`` with ``scale`` (pixel size in nm),
        ``units``, ``axis_labels``, ``colormap``, ``contrast_limits`` and
        ``metadata["domains"]`` holding channel, bias, pixel size, mask and source.

    Notes
    -----
    A grid gets the bias axis in V when its energies are evenly spaced; otherwise
    the bias axis counts slices (the energies are in the metadata).
    """
    stem = Path(str(scan.source)).stem if scan.source and scan.source != "<array>" else "scan"
    if name is None:
        # "topography.npy" of channel topography is "topography", not "topography topography".
        name = stem if scan.channel.lower() in stem.lower() else f"{stem} {scan.channel}"
        if scan.bias_V is not None and not scan.is_grid:
            name += f" {_bias_text(scan.bias_V)}"
    meta = {
        "kind": "scan",
        "channel": scan.channel,
        "bias_V": scan.bias_V,
        "energies_V": None if scan.energies_V is None else [float(e) for e in scan.energies_V],
        "setpoint_A": scan.setpoint_A,
        "pixel_size_nm": list(scan.pixel_size_nm),
        "source": str(scan.source),
        "mask": scan.mask,
        "units": scan.metadata.get("units"),
    }
    kwargs = {
        "name": name,
        "colormap": CHANNEL_COLORMAPS.get(scan.channel, "gray"),
        "metadata": {META_KEY: meta},
        **_spatial_kwargs(scan.pixel_size_nm),
    }
    if scan.is_grid:
        energies = np.asarray(scan.energies_V, dtype=float)
        steps = np.diff(energies)
        even = energies.size > 1 and np.all(steps != 0) and np.allclose(steps, steps[0], rtol=1e-6, atol=1e-12)
        if even:
            kwargs["scale"] = (float(steps[0]), *kwargs["scale"])
            kwargs["translate"] = (float(energies[0]), 0.0, 0.0)
            kwargs["units"] = ("V", "nm", "nm")
        else:
            kwargs["scale"] = (1.0, *kwargs["scale"])
            kwargs["units"] = ("pixel", "nm", "nm")
        kwargs["axis_labels"] = ("bias", "y", "x")
    limits = robust_limits(scan.data)
    if limits is not None:
        kwargs["contrast_limits"] = limits
    return (scan.data, kwargs, "image")


def read_scan_layers(path) -> list[LayerData]:
    """Load one scan file with :func:`domains.io.load_scan` and return its image layer.

    Raises
    ------
    domains.InputError
        With the core's message (missing pixel size, unreadable file, ...).
    """
    from domains.io import load_scan

    return [scan_layer_data(load_scan(path))]


def _has_pixel_size(file: Path) -> bool:
    sidecar = file.with_suffix(".json")
    try:
        content = json.loads(sidecar.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError):
        return False
    return isinstance(content, dict) and content.get("pixel_size_nm") is not None


# --------------------------------------------------------------------------- maps and bundles


def _map_title(path: str) -> tuple[str, str]:
    """(layer base name, role) for a map path of the bundle layout."""
    parts = path.split("/")
    if path == "labels":
        return "domains", "labels"
    if path == "walls":
        return "walls", "walls"
    if path == "electronic_types":
        return "electronic types", "types"
    if path == "topography":
        return "topography", "topography"
    if parts[0] in ("amplitude", "phase") and len(parts) == 2:
        # Short names, so the layer list does not cut them to look alike.
        return f"{'amp' if parts[0] == 'amplitude' else 'phase'} {parts[1]}", parts[0]
    if path == "twist_deg":
        return "twist angle", "twist"
    return path.replace("/", " "), "other"


def maps_layer_data(
    maps: Mapping[str, tuple[Any, Mapping]],
    *,
    suffix: str = "",
    translate: Sequence[float] | None = None,
) -> list[LayerData]:
    """Layers for the maps of an analysis or a bundle (``path -> (array, attrs)``).

    Parameters
    ----------
    maps : mapping
        Paths of the bundle layout (``labels``, ``walls``, ``amplitude/<name>``,
        ``phase/<name>``, ``displacement/ux`` and ``uy``, ``twist_deg``) to
        ``(array, attrs)``; attrs carry ``pixel_size_nm`` and ``units``.
    suffix : str
        Appended to every layer name (e.g. ``" (my scan)"``), so results of
        different inputs do not replace each other.
    translate : sequence of float, optional
        World offset (nm) of pixel (0, 0), to lie over the layer analysed.

    Returns
    -------
    list of tuple
        Bottom first: the topograph, the amplitude, phase, drift and other maps
        (hidden), then the domain labels, the electronic types (labels, hidden;
        each type's name is a feature shown on hover) and the walls on top. Phase
        maps use the cyclic colour map ``twilight`` on [-pi, pi].
    """
    bottom, images, overlays = [], [], []
    for path in sorted(maps):
        if path.startswith("displacement/"):
            continue
        array, attrs = maps[path]
        title, role = _map_title(path)
        meta = {META_KEY: {"kind": "map", "path": path, "units": attrs.get("units"),
                           "pixel_size_nm": list(_pixel_pair(attrs["pixel_size_nm"]))}}
        kwargs = {"name": title + suffix, "metadata": meta, **_spatial_kwargs(attrs["pixel_size_nm"], translate)}
        if role in ("labels", "types"):
            kwargs["opacity"] = LABELS_OPACITY
            # The report colours the type map with the same function: type A has one colour in both.
            kwargs["colormap"] = domain_colormap(array)
            if role == "types":
                kwargs["visible"] = False
                names = attrs.get("type_names") or {}
                if isinstance(names, Mapping) and names:
                    numbers = sorted(int(k) for k in names)
                    # Hovering a domain shows its type in the status bar ("type: A").
                    kwargs["features"] = {"index": np.array(numbers),
                                          "type": np.array([str(names[str(k)]) for k in numbers])}
            overlays.append((array, kwargs, "labels"))
        elif role == "walls":
            walls = array.astype(np.uint8) if _is_dask(array) else np.asarray(array).astype(np.uint8)
            kwargs["colormap"] = {0: "transparent", 1: _palette.WALL_COLOUR, None: "transparent"}
            kwargs["opacity"] = 1.0
            overlays.append((walls, kwargs, "labels"))
        elif role == "phase":
            kwargs.update(colormap="twilight", contrast_limits=(-math.pi, math.pi), visible=False)
            images.append((array, kwargs, "image"))
        else:
            if role == "topography":
                kwargs["colormap"] = "gray"
                meta[META_KEY].update(kind="scan", channel="topography")
            elif role == "amplitude":
                kwargs["colormap"] = "magma"
                kwargs["visible"] = False
            elif role == "twist":
                kwargs["colormap"] = "coolwarm"
            else:
                kwargs["visible"] = False
            limits = robust_limits(array)
            if limits is not None:
                kwargs["contrast_limits"] = limits
            (bottom if role == "topography" else images).append((array, kwargs, "image"))
    if "displacement/ux" in maps and "displacement/uy" in maps:
        (ux, attrs), (uy, _) = maps["displacement/ux"], maps["displacement/uy"]
        if _is_dask(ux) or _is_dask(uy):
            import dask.array as da

            magnitude = da.hypot(da.asarray(ux), da.asarray(uy))
        else:
            magnitude = np.hypot(np.asarray(ux), np.asarray(uy))
        kwargs = {
            "name": "drift |u|" + suffix, "colormap": "viridis", "visible": False,
            "metadata": {META_KEY: {"kind": "map", "path": "displacement", "units": attrs.get("units", "nm"),
                                    "pixel_size_nm": list(_pixel_pair(attrs["pixel_size_nm"]))}},
            **_spatial_kwargs(attrs["pixel_size_nm"], translate),
        }
        limits = robust_limits(magnitude)
        if limits is not None:
            kwargs["contrast_limits"] = limits
        images.insert(0, (magnitude, kwargs, "image"))
    # The topograph at the bottom, then the hidden images; over them the domains, the electronic types
    # (hidden) and the walls on top.
    rank = {"labels": 0, "electronic_types": 1, "walls": 2}
    overlays.sort(key=lambda layer: rank.get(layer[1]["metadata"][META_KEY]["path"], 1))
    return bottom + images + overlays


def domain_colormap(labels) -> dict:
    """A napari label colour map (dict) of the shared palette; neighbouring domains differ.

    Parameters
    ----------
    labels : (row, col) int array or dask array
        Domain labels (or the electronic-type map). An array in memory is coloured
        whole by :func:`domains._palette.label_colours`, exactly as the report
        colours it; a dask array (a map too large to read whole) is coloured from
        a strided sample (a few million pixels at most), which keeps the adjacency
        of domains larger than the stride.

    Returns
    -------
    dict
        ``label -> hex colour``, with 0 and None (every other label) transparent.

    Examples
    --------
    >>> cmap = domain_colormap(np.array([[1, 1, 2], [3, 3, 3]]))
    >>> cmap[0], len({cmap[1], cmap[2], cmap[3]})
    ('transparent', 3)
    """
    shape = tuple(labels.shape)
    # In memory: coloured whole, as the report colours it. Lazy (larger than BUNDLE_LAZY_BYTES): a sample.
    step = max(1, int(math.ceil(math.sqrt(int(np.prod(shape)) / 4e6)))) if shape and _is_dask(labels) else 1
    sample = labels[::step, ::step] if len(shape) == 2 else labels
    if _is_dask(sample):
        sample = sample.compute()
    colours = _palette.label_colours(np.asarray(sample)) if np.ndim(sample) == 2 else {}
    # A label too small to be in the sample still gets a colour.
    return {0: "transparent", None: "transparent" if step == 1 else _palette.DOMAIN_PALETTE[0], **colours}


def defects_layer_data(
    defects: Sequence[Mapping] | None,
    *,
    pixel_size_nm,
    name: str = "defects",
    translate: Sequence[float] | None = None,
    size: float = 8.0,
) -> LayerData | None:
    """A points layer of phase defects, red for winding +1, blue for -1 (as in the report).

    Parameters
    ----------
    defects : sequence of dict
        Entries with ``x_nm``, ``y_nm`` and ``winding`` (as in ``summary.json``,
        ``defects.list``); ``component`` is kept as a feature when present.
    pixel_size_nm : float or (float, float)
        Pixel size of the maps, so the points share their data coordinates.
    name : str
        Layer name.
    translate : sequence of float, optional
        World offset (nm) of pixel (0, 0).
    size : float
        Marker size in pixels of the map.

    Returns
    -------
    tuple or None
        ``(coordinates (row, col), add_kwargs, "points")``, or None when there
        is no defect.
    """
    defects = [d for d in (defects or []) if d.get("x_nm") is not None and d.get("y_nm") is not None]
    if not defects:
        return None
    dy, dx = _pixel_pair(pixel_size_nm)
    coords = np.array([[float(d["y_nm"]) / dy, float(d["x_nm"]) / dx] for d in defects])
    winding = np.array([int(d.get("winding") or 0) for d in defects])
    colors = np.array([WINDING_COLORS.get(int(np.sign(w)), (1.0, 1.0, 1.0, 1.0)) for w in winding])
    features = {"winding": winding}
    if all("component" in d for d in defects):
        features["component"] = np.array([int(d["component"]) for d in defects])
    kwargs = {
        "name": name, "features": features, "face_color": colors, "border_color": "white",
        "border_width": 0.1, "size": float(size), "symbol": "disc",
        "metadata": {META_KEY: {"kind": "defects", "pixel_size_nm": [dy, dx]}},
        **_spatial_kwargs((dy, dx), translate),
    }
    return (coords, kwargs, "points")


def is_bundle(path) -> bool:
    """True if ``path`` is a result-bundle folder (it holds ``summary.json`` and ``maps.zarr``)."""
    try:
        folder = Path(os.fspath(path))
        return folder.is_dir() and (folder / "summary.json").is_file() and (folder / "maps.zarr").is_dir()
    except (TypeError, OSError):
        return False


def bundle_maps(group, *, lazy_threshold_bytes: int = BUNDLE_LAZY_BYTES) -> dict:
    """The arrays of a bundle's ``maps.zarr`` group as ``path -> (array, attrs)``.

    Parameters
    ----------
    group : zarr.Group or None
        ``domains.io.read_bundle(path).maps``.
    lazy_threshold_bytes : int
        Arrays larger than this stay dask arrays over the zarr store (read chunk
        by chunk when drawn); smaller ones are read into memory.

    Returns
    -------
    dict
    """
    out: dict = {}
    if group is None:
        return out

    def walk(node, prefix):
        for key, member in sorted(node.members(), key=lambda kv: kv[0]):
            path = f"{prefix}{key}"
            if hasattr(member, "members"):
                walk(member, path + "/")
                continue
            attrs = dict(member.attrs)
            if "pixel_size_nm" not in attrs:
                continue  # not a map on the pixel grid; nothing to place it with
            nbytes = int(np.prod(member.shape)) * np.dtype(member.dtype).itemsize
            if nbytes > lazy_threshold_bytes:
                import dask.array as da

                array = da.from_array(member, chunks=member.chunks)
            else:
                array = np.asarray(member[...])
            out[path] = (array, attrs)

    walk(group, "")
    return out


def bundle_topography(bundle, shape=None):
    """The topograph under a bundle's maps, as a levelled :class:`domains.Scan`, and where it came from.

    Looked for in this order: a ``topography`` map in ``maps.zarr``; the input
    file named in ``summary.json`` (``input.source``) if it is still there with
    its pixel size; for a bundle of a built-in synthetic scene (``truth.scene``
    and ``truth.seed``), the scene made again (it is deterministic).

    Parameters
    ----------
    bundle : domains.io.Bundle
        As returned by :func:`domains.io.read_bundle`.
    shape : tuple of int, optional
        The maps' (row, col) shape: a topograph of another shape is not used.

    Returns
    -------
    (domains.Scan, str) or (None, str)
        The levelled topograph (plane and scan-line correction of
        :func:`domains.level.level`) and a sentence saying where it came from,
        or None and why there is none.
    """
    from domains import InputError
    from domains.level import level

    summary = bundle.summary if isinstance(bundle.summary, dict) else {}
    source = (summary.get("input") or {}).get("source") if isinstance(summary.get("input"), dict) else None
    scan, origin = None, ""
    if source and not str(source).startswith("<"):
        file = Path(str(source))
        if file.exists() and _has_pixel_size(file):
            from domains.io import load_scan

            try:
                scan, origin = load_scan(file), f"the input file {file.name}"
            except (InputError, OSError):
                scan = None
    truth = summary.get("truth") if isinstance(summary.get("truth"), dict) else {}
    if scan is None and truth.get("scene") and truth.get("seed") is not None:
        from domains.pipeline import make_scene

        try:
            scan = make_scene(str(truth["scene"]), seed=int(truth["seed"])).topography
            origin = f"the synthetic {truth['scene']} scene (seed {truth['seed']}) made again"
        except (InputError, ImportError, NotImplementedError, AttributeError):
            scan = None
    if scan is None:
        return None, "the bundle holds no topograph and its input file is not at hand"
    if scan.is_grid or (shape is not None and tuple(scan.shape) != tuple(shape)):
        return None, f"{origin} does not have the shape of the maps {shape}"
    return level(scan, order=1, lines="difference", warn=False), origin


def domain_ids_layer_data(labels, *, pixel_size_nm, name="domain ids", translate=None) -> LayerData | None:
    """A points layer writing each domain's id (the ``domain`` column of ``domains.csv``) inside it.

    Placed as in the report (:func:`domains.report.domain_label_positions`).

    Returns
    -------
    tuple or None
        ``(coordinates (row, col), add_kwargs, "points")``; None with no domain.
    """
    from domains.report import domain_label_positions

    array = labels.compute() if _is_dask(labels) else np.asarray(labels)
    dy, dx = _pixel_pair(pixel_size_nm)
    positions = domain_label_positions(array, pixel_size_nm=(dy, dx))
    if not positions:
        return None
    ids = np.array(list(positions), dtype=int)
    coords = np.array([[y / dy, x / dx] for x, y in positions.values()])
    kwargs = {
        "name": name, "features": {"domain": ids}, "size": 0.5, "face_color": "transparent",
        "border_color": "transparent", "text": {"string": "{domain}", "color": "white", "size": 11},
        "metadata": {META_KEY: {"kind": "domain_ids", "pixel_size_nm": [dy, dx]}},
        **_spatial_kwargs((dy, dx), translate),
    }
    return (coords, kwargs, "points")


def read_bundle_layers(path, *, lazy_threshold_bytes: int = BUNDLE_LAZY_BYTES) -> list[LayerData]:
    """Layers for a result bundle, ready to look at: topograph, domains, walls, defects on top.

    Parameters
    ----------
    path : str or path-like
        The bundle folder.
    lazy_threshold_bytes : int
        See :func:`bundle_maps`.

    Returns
    -------
    list of tuple
        Layer data tuples, bottom first: ``topography`` (visible, grey; see
        :func:`bundle_topography`), the amplitude (``amp <component>``), phase
        (``phase <component>``), drift and other maps (hidden), ``domains``
        (labels in the shared palette, translucent), ``electronic types`` (when
        the bundle has types: the type map, hidden, coloured as the report's
        type figure), ``walls`` (black),
        ``defects`` and ``domain ids``. Every layer's metadata holds the bundle
        folder and the lock-in width the analysis used
        (``metadata["domains"]["analysis_sigma_nm"]``); the domains layer holds
        the rows of ``domains.csv`` (``metadata["domains"]["table"]``).

    Raises
    ------
    domains.InputError
        If the folder is not a bundle.
    """
    from domains.io import read_bundle

    bundle = read_bundle(path)
    maps = bundle_maps(bundle.maps, lazy_threshold_bytes=lazy_threshold_bytes)
    summary = bundle.summary if isinstance(bundle.summary, dict) else {}
    layers = maps_layer_data(maps)
    pixel, shape = None, None
    if maps:
        # The input grid (labels, topograph): amplitude, phase and drift maps may sit on decimated grids.
        key = next((k for k in ("labels", "topography") if k in maps), next(iter(maps)))
        pixel = maps[key][1]["pixel_size_nm"]
        shape = tuple(maps[key][0].shape[-2:])
    elif isinstance(summary.get("input"), dict):
        pixel = summary["input"].get("pixel_size_nm")
    if "topography" not in maps:
        topo, origin = bundle_topography(bundle, shape)
        if topo is not None:
            data, kwargs, kind = scan_layer_data(topo, name="topography")
            kwargs["colormap"] = "gray"
            kwargs["metadata"][META_KEY]["origin"] = origin
            layers.insert(0, (data, kwargs, kind))
        else:
            _decline(f"cdw-domains: {Path(bundle.path).name}: no topograph under the domains ({origin}).")
    defects = summary.get("defects") or {}
    if pixel is not None and isinstance(defects, dict):
        # Markers about 1/40 of the frame, so they are seen when the whole map is in view.
        size = max(8.0, min(shape) / 40) if shape else 8.0
        points = defects_layer_data(defects.get("list"), pixel_size_nm=pixel, name="defects", size=size)
        if points is not None:
            layers.append(points)
    if pixel is not None and "labels" in maps:
        ids = domain_ids_layer_data(maps["labels"][0], pixel_size_nm=pixel)
        if ids is not None:
            layers.append(ids)
    sigma = summary.get("sigma_nm")
    for data, kwargs, kind in layers:
        meta = kwargs.setdefault("metadata", {}).setdefault(META_KEY, {})
        meta["bundle"] = str(bundle.path)
        if isinstance(sigma, (int, float)) and math.isfinite(sigma):
            meta["analysis_sigma_nm"] = float(sigma)
        if meta.get("path") == "labels" and "domains" in bundle.tables:
            meta["table"] = {"columns": list(bundle.columns.get("domains") or []), "rows": bundle.tables["domains"]}
    return layers


# --------------------------------------------------------------------------- the npe2 reader


def _single_path(path) -> str | None:
    if isinstance(path, (list, tuple)):
        if len(path) != 1:
            return None  # stacks of scans are not one scan; napari may try its own readers
        path = path[0]
    try:
        return os.fspath(path)
    except TypeError:
        return None


def get_reader(path) -> Callable[[Any], list[LayerData]] | None:
    """napari reader hook: a reader for a scan with a known pixel size or a result bundle, else None.

    Parameters
    ----------
    path : str or list of str
        What napari was asked to open.

    Returns
    -------
    callable or None
        A function ``path -> list of layer data tuples``. None (never an
        exception) for anything else: several paths at once, unknown suffixes,
        and scan files without a sidecar giving ``pixel_size_nm``, because the
        analysis needs the physical pixel size and never guesses it.

    Notes
    -----
    Accepted: ``*.npy, *.npz, *.tif, *.tiff, *.h5, *.hdf5, *.zarr, *.txt, *.csv``
    with a sidecar ``NAME.json``; a bundle folder (``summary.json`` and
    ``maps.zarr``), or the bundle's ``summary.json`` itself.
    """
    try:
        text = _single_path(path)
        if text is None:
            return None
        target = Path(text)
        if is_bundle(target):
            return _bundle_reader(target)
        if target.name == "summary.json" and is_bundle(target.parent):
            return _bundle_reader(target.parent)
        if target.suffix.lower() in SCAN_SUFFIXES and target.exists():
            if _has_pixel_size(target):
                return _scan_reader(target)
            _decline(missing_pixel_size_message(target))
    except Exception:  # a reader hook must not raise: napari would stop trying others
        return None
    return None


def missing_pixel_size_message(path) -> str:
    """What the reader says of a scan file whose pixel size is unknown.

    Examples
    --------
    >>> print(missing_pixel_size_message("scan.npy"))  # doctest: +NORMALIZE_WHITESPACE
    cdw-domains did not open scan.npy: its pixel size is missing (no sidecar scan.json with "pixel_size_nm").
    Write scan.json, e.g. {"pixel_size_nm": 0.05}, and open it again; any other reader shows it in pixels only.
    """
    file = Path(os.fspath(path))
    sidecar = file.with_suffix(".json").name
    return (f"cdw-domains did not open {file.name}: its pixel size is missing (no sidecar {sidecar} with "
            f'"pixel_size_nm").\nWrite {sidecar}, e.g. {{"pixel_size_nm": 0.05}}, and open it again; '
            "any other reader shows it in pixels only.")


def _decline(message: str) -> None:
    """Tell the user why something is not opened: the log, and napari's notification area when napari runs.

    A reader hook returns None for a path it does not read (napari then tries
    other readers), so the reason goes to napari's notification manager
    (``napari.utils.notifications.show_warning``), never raised.
    """
    logger.warning(message)
    try:
        from napari.utils.notifications import show_warning
    except ImportError:  # plain Python use: the log is enough
        return
    show_warning(message)


def _scan_reader(target: Path):
    def read(_path) -> list[LayerData]:
        return read_scan_layers(target)

    return read


def _bundle_reader(target: Path):
    def read(_path) -> list[LayerData]:
        return read_bundle_layers(target)

    return read
