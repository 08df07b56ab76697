"""What the widgets compute, without Qt: spectra, picked wavevectors, lock-in and analysis layers.

The dock widgets in :mod:`napari_plugin._qt` only read values from their
controls, call these functions and put the returned layer data tuples into a
viewer. Everything physical is done by the ``domains`` core; this module only
converts between layer coordinates and physical units:

- real-space layers: data axes (row, col), world (y, x) in nm, ``scale`` = pixel size;
- the spectrum layer: data axes (row, col) of the ``fftshift`` layout, world
  (qy, qx) in rad/nm, so row <-> qy and col <-> qx, ``scale`` = (dqy, dqx) and
  ``translate`` = (qy[0], qx[0]) (the most negative wavevector of each axis).

A wavevector is always returned as (qx, qy), the order the core uses.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import TYPE_CHECKING, Any

import numpy as np

from ._reader import META_KEY, LayerData, defects_layer_data, maps_layer_data, robust_limits

if TYPE_CHECKING:
    import napari.layers

__all__ = [
    "PEAK_ROLE_COLORS",
    "SUPERLATTICE_CHOICES",
    "analysis_config",
    "analysis_layer_data",
    "auto_sigma",
    "default_q",
    "layer_pixel_size",
    "lockin_layer_data",
    "peaks_layer_data",
    "points_to_q",
    "q_to_points",
    "scan_from_layer",
    "spectrum_layer_data",
    "summary_text",
]

#: Colours of detected peaks by role (RGBA); unknown roles are grey.
PEAK_ROLE_COLORS = {
    "bragg": (1.0, 1.0, 1.0, 1.0),
    "superlattice": (1.0, 0.55, 0.0, 1.0),
    "incommensurate": (1.0, 0.85, 0.0, 1.0),
    "moire": (0.2, 0.9, 0.9, 1.0),
    "second_lattice": (0.7, 0.7, 1.0, 1.0),
    "harmonic": (0.6, 0.6, 0.6, 1.0),
    "unindexed": (0.5, 0.5, 0.5, 1.0),
}

#: Roles of peaks that count as neighbours when choosing the lock-in width.
_NEIGHBOUR_ROLES = ("bragg", "superlattice", "incommensurate", "moire", "second_lattice")


# --------------------------------------------------------------------------- layers as scans


def layer_pixel_size(layer: "napari.layers.Layer") -> tuple[float, float]:
    """Pixel size (dy, dx) in nm of a real-space layer.

    Taken from ``layer.metadata["domains"]["pixel_size_nm"]`` (set by this
    plugin's reader and samples), else from ``layer.scale`` when the layer's
    units are nanometres.

    Raises
    ------
    domains.InputError
        If neither gives a size in nm (a layer in pixels has no physical size).
    """
    from domains import InputError, pixel_size_pair

    meta = (layer.metadata or {}).get(META_KEY) or {}
    if meta.get("pixel_size_nm") is not None:
        return pixel_size_pair(meta["pixel_size_nm"])
    units = [str(u) for u in (getattr(layer, "units", None) or ())][-2:]
    if units == ["nanometer", "nanometer"]:
        return pixel_size_pair(tuple(float(s) for s in layer.scale[-2:]))
    raise InputError(
        f"layer {layer.name!r} has no pixel size in nm: open the file with the cdw-domains reader "
        "(a sidecar NAME.json with pixel_size_nm) or give the layer a scale in nm"
    )


def scan_from_layer(layer: "napari.layers.Layer", *, channel: str | None = None):
    """A :class:`domains.Scan` of a 2-D image layer (data, pixel size, channel, bias, mask).

    Parameters
    ----------
    layer : napari.layers.Image
        A 2-D image layer; its metadata (set by this plugin's reader) supply
        channel, bias, set point and mask.
    channel : str, optional
        Override of the channel.

    Returns
    -------
    domains.Scan
        The layer's data as they are (a dask array stays lazy).
    """
    from domains import InputError, Scan

    if getattr(layer, "rgb", False) or np.ndim(layer.data) != 2:
        raise InputError(f"layer {layer.name!r}: the analysis needs a 2-D image, got shape {tuple(layer.data.shape)}")
    meta = (layer.metadata or {}).get(META_KEY) or {}
    return Scan(
        layer.data,
        pixel_size_nm=layer_pixel_size(layer),
        channel=channel or meta.get("channel") or "topography",
        bias_V=meta.get("bias_V"),
        setpoint_A=meta.get("setpoint_A"),
        mask=meta.get("mask"),
        source=str(meta.get("source") or layer.name),
        metadata={"units": meta["units"]} if meta.get("units") else {},
    )


# --------------------------------------------------------------------------- the spectrum


def spectrum_layer_data(image, *, pixel_size_nm, mask=None, name: str = "spectrum") -> LayerData:
    """The log10 power spectrum of an image as an image layer in rad/nm.

    Parameters
    ----------
    image : (row, col) array_like
        The real-space image.
    pixel_size_nm : float or (float, float)
        Its pixel size in nm.
    mask : (row, col) bool array, optional
        Untrusted pixels (filled before the transform by the core).
    name : str
        Layer name.

    Returns
    -------
    tuple
        ``(log10 power, add_kwargs, "image")``; ``scale`` = (dqy, dqx) and
        ``translate`` = (qy[0], qx[0]) in rad/nm, so world coordinates are
        (qy, qx) in rad/nm.

    Examples
    --------
    >>> n, d = 64, 0.1
    >>> y, x = np.mgrid[:n, :n] * d
    >>> q = 2 * np.pi * 8 / (n * d)
    >>> data, kw, kind = spectrum_layer_data(np.cos(q * x), pixel_size_nm=d)
    >>> row, col = np.unravel_index(np.argmax(data), data.shape)
    >>> qy, qx = np.array([row, col]) * kw["scale"] + kw["translate"]
    >>> bool(np.isclose(abs(qx), q) and np.isclose(qy, 0))
    True
    """
    from domains.fourier import power_spectrum

    power, qx, qy = power_spectrum(np.asarray(image), pixel_size_nm=pixel_size_nm, mask=mask)
    positive = power[power > 0]
    # A floor far below the noise keeps log10 finite where the plane fit left exact zeros.
    floor = float(positive.min()) if positive.size else 1.0
    log_power = np.log10(np.maximum(power, floor)).astype(np.float32)
    scale = (float(qy[1] - qy[0]), float(qx[1] - qx[0]))
    kwargs = {
        "name": name,
        "scale": scale,
        "translate": (float(qy[0]), float(qx[0])),
        "units": ("rad/nm", "rad/nm"),
        "axis_labels": ("qy", "qx"),
        "colormap": "inferno",
        "metadata": {META_KEY: {"kind": "spectrum", "quantity": "log10 power (image units squared)"}},
    }
    limits = robust_limits(log_power, low=50.0, high=99.995)
    if limits is not None:
        kwargs["contrast_limits"] = limits
    return (log_power, kwargs, "image")


def q_to_points(q, *, scale, translate) -> np.ndarray:
    """Data coordinates (row, col) on the spectrum layer of wavevectors (qx, qy) in rad/nm.

    Examples
    --------
    >>> q_to_points([[1.0, 2.0]], scale=(0.5, 0.25), translate=(-4.0, -4.0))
    array([[12., 20.]])
    """
    q = np.asarray(q, dtype=float).reshape(-1, 2)
    world = q[:, ::-1]  # (qx, qy) -> (qy, qx) = (row axis, col axis)
    return (world - np.asarray(translate, dtype=float)) / np.asarray(scale, dtype=float)


def points_to_q(points, *, scale, translate) -> np.ndarray:
    """Wavevectors (qx, qy) in rad/nm of points (row, col) on the spectrum layer.

    Examples
    --------
    >>> points_to_q([[12.0, 20.0]], scale=(0.5, 0.25), translate=(-4.0, -4.0))
    array([[1., 2.]])
    """
    points = np.asarray(points, dtype=float).reshape(-1, 2)
    world = points * np.asarray(scale, dtype=float) + np.asarray(translate, dtype=float)
    return world[:, ::-1].copy()


def peaks_layer_data(result, *, scale, translate, name: str = "detected peaks") -> LayerData:
    """Detected peaks (+q and -q) as hollow markers coloured by role, on the spectrum layer.

    Parameters
    ----------
    result : domains.fourier.SpectrumResult
        From :func:`domains.fourier.analyze_spectrum`.
    scale, translate : sequence of float
        Those of the spectrum layer.
    name : str
        Layer name.

    Returns
    -------
    tuple
        ``(points (row, col), add_kwargs, "points")`` with features ``role``,
        ``qx_rad_per_nm``, ``qy_rad_per_nm`` and ``period_nm``.
    """
    qs, roles = [], []
    for peak in result.peaks:
        for sign in (1.0, -1.0):
            qs.append(sign * np.asarray(peak.q, dtype=float))
            roles.append(peak.role or "unindexed")
    q = np.array(qs, dtype=float).reshape(-1, 2)
    colors = np.array([PEAK_ROLE_COLORS.get(r, PEAK_ROLE_COLORS["unindexed"]) for r in roles]).reshape(-1, 4)
    with np.errstate(divide="ignore"):
        period = 2 * np.pi / np.hypot(q[:, 0], q[:, 1])
    kwargs = {
        "name": name,
        "scale": tuple(scale),
        "translate": tuple(translate),
        "units": ("rad/nm", "rad/nm"),
        "axis_labels": ("qy", "qx"),
        "features": {"role": np.array(roles, dtype=object), "qx_rad_per_nm": q[:, 0], "qy_rad_per_nm": q[:, 1],
                     "period_nm": period},
        "face_color": "transparent",
        "border_color": colors if len(colors) else "white",
        "border_width": 0.15,
        "size": 7.0,
        "symbol": "ring",
        "metadata": {META_KEY: {"kind": "detected_peaks"}},
    }
    return (q_to_points(q, scale=scale, translate=translate), kwargs, "points")


def default_q(result) -> np.ndarray:
    """The wavevectors to demodulate first: the superlattice's, else the moiré's, else none.

    Returns
    -------
    ndarray, shape (k, 2)
        (qx, qy) in rad/nm.
    """
    sup = getattr(result, "superlattice", None)
    if sup is not None and np.asarray(sup.q).size:
        return np.asarray(sup.q, dtype=float).reshape(-1, 2)
    moire = np.asarray(getattr(result, "moire_q", np.zeros((0, 2))), dtype=float).reshape(-1, 2)
    return moire


def auto_sigma(q, *, other_q=(), pixel_size_nm, shape, leakage: float = 0.01) -> float:
    """Automatic lock-in width for the picked wavevectors, from :func:`domains.choose_sigma`.

    The picked q and the other peaks of the spectrum (their +/- pairs and the
    origin) are the neighbours whose leakage must stay below ``leakage``. A
    detected peak within two frequency bins of a picked one is the same peak
    and is left out. The width is kept between 1.5 pixels and a quarter of the
    frame (the core refuses more than half).

    Parameters
    ----------
    q : (k, 2) array_like
        Picked wavevectors (qx, qy), rad/nm.
    other_q : (m, 2) array_like
        Other peaks of the image, rad/nm.
    pixel_size_nm : float or (float, float)
        Pixel size (dy, dx) in nm.
    shape : tuple of int
        Image shape (row, col).
    leakage : float
        Largest leakage of a neighbouring peak.

    Returns
    -------
    float
        sigma in nm.
    """
    from domains import choose_sigma, pixel_size_pair

    dy, dx = pixel_size_pair(pixel_size_nm)
    q = np.asarray(q, dtype=float).reshape(-1, 2)
    others = np.asarray(other_q, dtype=float).reshape(-1, 2)
    bin_size = 2 * math.pi / min(shape[0] * dy, shape[1] * dx)
    if len(others) and len(q):
        both = np.concatenate([q, -q])
        distance = np.hypot(*(others[:, None, :] - both[None, :, :]).transpose(2, 0, 1)).min(axis=1)
        others = others[distance > 2 * bin_size]
    sigma, _ = choose_sigma(np.concatenate([q, others]) if len(others) else q, leakage=leakage)
    low = 1.5 * max(dy, dx)
    high = 0.25 * min(shape[0] * dy, shape[1] * dx)
    return float(min(max(sigma, low), high))


def lockin_layer_data(
    image,
    q,
    *,
    sigma_nm: float,
    pixel_size_nm,
    mask=None,
    source: str = "image",
    translate: Sequence[float] | None = None,
) -> list[LayerData]:
    """Amplitude and phase layers of the lock-in at each q (one pair per wavevector).

    Parameters
    ----------
    image : (row, col) array_like or dask array
        The real-space image.
    q : (k, 2) array_like
        Wavevectors (qx, qy) in rad/nm.
    sigma_nm : float
        Lock-in width in nm.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    mask : (row, col) bool array, optional
        Untrusted pixels.
    source : str
        Name of the image, used in the layer names
        ``"amplitude q1 (<source>)"`` and ``"phase q1 (<source>)"``.
    translate : sequence of float, optional
        World offset (nm) of the image layer, so the maps lie over it.

    Returns
    -------
    list of tuple
        For q_j, j = 1..k: an amplitude image ``domains.amplitude(A_j)``
        (colour map magma) and a phase image ``domains.phase(A_j)`` (cyclic
        colour map twilight on [-pi, pi]), both with the image's pixel size.
    """
    import domains

    q = np.asarray(q, dtype=float).reshape(-1, 2)
    fields = domains.lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=pixel_size_nm, mask=mask)
    pixel = domains.pixel_size_pair(pixel_size_nm)
    layers = []
    for j, (qj, a_j) in enumerate(zip(q, fields), start=1):
        info = {"kind": "lockin", "q_rad_per_nm": [float(qj[0]), float(qj[1])], "sigma_nm": float(sigma_nm),
                "period_nm": float(2 * math.pi / np.hypot(*qj)), "pixel_size_nm": list(pixel), "source": source}
        common = {"scale": pixel, "units": ("nm", "nm"), "axis_labels": ("y", "x")}
        if translate is not None:
            common["translate"] = tuple(float(t) for t in translate)
        amp = domains.amplitude(a_j)
        amp_kwargs = {"name": f"amplitude q{j} ({source})", "colormap": "magma",
                      "metadata": {META_KEY: {**info, "quantity": "amplitude 2|A|"}}, **common}
        limits = None if type(amp).__module__.startswith("dask") else robust_limits(amp, low=0.0, high=99.8)
        if limits is not None:
            amp_kwargs["contrast_limits"] = (0.0, limits[1])
        phase_kwargs = {"name": f"phase q{j} ({source})", "colormap": "twilight",
                        "contrast_limits": (-math.pi, math.pi), "visible": False,
                        "metadata": {META_KEY: {**info, "quantity": "phase arg A (rad)"}}, **common}
        layers.append((amp, amp_kwargs, "image"))
        layers.append((domains.phase(a_j), phase_kwargs, "image"))
    return layers


# --------------------------------------------------------------------------- the whole analysis

#: Superlattice overrides offered by the analysis widget ("auto" lets the core decide).
SUPERLATTICE_CHOICES = ("auto", "3x3", "2x2", "4x1", "sqrt3xsqrt3R30", "none")


def analysis_config(*, order: str = "auto", superlattice: str = "auto", sigma_nm: float | None = None):
    """A validated :class:`domains.pipeline.Config` from the widget's overrides.

    Parameters
    ----------
    order : str
        One of ``domains.pipeline.ORDER_KINDS``.
    superlattice : str
        "auto" (the core decides) or an override such as "3x3".
    sigma_nm : float or None
        Lock-in width; None or 0 for the automatic choice.

    Returns
    -------
    domains.pipeline.Config

    Raises
    ------
    domains.InputError
        For contradictory or invalid values (the core's message).

    Examples
    --------
    >>> cfg = analysis_config(superlattice="3x3", sigma_nm=0)
    >>> cfg.superlattice, cfg.sigma_nm, cfg.order
    ('3x3', None, 'auto')
    """
    from domains.pipeline import Config

    return Config(
        order=order,
        superlattice=None if superlattice in (None, "", "auto") else superlattice,
        sigma_nm=float(sigma_nm) if sigma_nm else None,
    ).validate("analysis widget")



def analysis_layer_data(analysis, *, source: str = "", translate: Sequence[float] | None = None) -> list[LayerData]:
    """Layers of a :class:`domains.pipeline.Analysis`: maps, domain labels, walls and defects.

    Parameters
    ----------
    analysis : domains.pipeline.Analysis
        The result of :func:`domains.pipeline.analyze`.
    source : str
        Name of the analysed layer; layer names end in ``" (<source>)"``.
    translate : sequence of float, optional
        World offset (nm) of the analysed layer.

    Returns
    -------
    list of tuple
    """
    from domains.report import electronic_type_map, split_list_columns

    suffix = f" ({source})" if source else ""

    maps = dict(analysis.maps)
    # The bundle's type map (domains.pipeline.write_analysis), made here for an analysis run in the viewer.
    types = electronic_type_map(analysis.summary, maps.get("labels"))
    if types is not None and "electronic_types" not in maps:
        maps["electronic_types"] = types
    layers = maps_layer_data(maps, suffix=suffix, translate=translate)
    pixel = None
    if analysis.maps:
        pixel = next(iter(analysis.maps.values()))[1]["pixel_size_nm"]
    elif isinstance(analysis.summary.get("input"), Mapping):
        pixel = analysis.summary["input"].get("pixel_size_nm")
    defects = analysis.summary.get("defects") or {}
    if pixel is not None and isinstance(defects, Mapping):
        points = defects_layer_data(defects.get("list"), pixel_size_nm=pixel, name="defects" + suffix,
                                    translate=translate)
        if points is not None:
            layers.append(points)
    table = (analysis.tables or {}).get("domains")
    sigma = analysis.summary.get("sigma_nm")
    for _, kwargs, _ in layers:
        meta = kwargs.setdefault("metadata", {}).setdefault(META_KEY, {})
        if isinstance(sigma, (int, float)) and math.isfinite(sigma):
            meta["analysis_sigma_nm"] = float(sigma)
        if meta.get("path") == "labels" and table:
            # The columns of domains.csv: one value per cell, as the bundle writes them.
            columns, rows = split_list_columns(*table)
            meta["table"] = {"columns": list(columns), "rows": list(rows)}
    return layers


def _fmt(value, spec=".3g") -> str:
    try:
        return format(float(value), spec)
    except (TypeError, ValueError):
        return "?"


def summary_text(summary: Mapping[str, Any]) -> str:
    """A few lines for the widget: order, lattice, domain count and sizes, defects, sigma.

    Examples
    --------
    >>> print(summary_text({"superlattice": {"order": "3x3"}, "domains": {"count": 4, "area_nm2_mean": 51.2},
    ...                     "defects": {"count": 2, "positive": 1, "negative": 1}, "sigma_nm": 0.42}))
    order: 3x3
    4 domains, mean area 51.2 nm²
    2 defects (+1: 1, -1: 1)
    σ = 0.42 nm
    """
    lines = []
    sup = summary.get("superlattice") or {}
    order = sup.get("order") if isinstance(sup, Mapping) else None
    moire = summary.get("moire")
    if order:
        lines.append(f"order: {order}")
    elif isinstance(moire, Mapping):
        lines.append(f"moiré: period {_fmt(moire.get('period_nm'))} nm, twist {_fmt(moire.get('twist_deg'))}°")
    else:
        lines.append(f"order: {summary.get('order_kind') or 'none found'}")
    lattice = summary.get("lattice")
    if isinstance(lattice, Mapping) and lattice.get("a_nm") is not None:
        lines.append(f"lattice: {lattice.get('kind', '?')}, a = {_fmt(lattice.get('a_nm'), '.4g')} nm")
    dom = summary.get("domains")
    if isinstance(dom, Mapping):
        text = f"{dom.get('count', 0)} domains"
        if dom.get("area_nm2_mean") is not None:
            text += f", mean area {_fmt(dom['area_nm2_mean'])} nm²"
        lines.append(text)
    else:
        lines.append("no domains")
    defects = summary.get("defects")
    if isinstance(defects, Mapping):
        lines.append(f"{defects.get('count', 0)} defects (+1: {defects.get('positive', 0)}, "
                     f"-1: {defects.get('negative', 0)})")
    if summary.get("sigma_nm") is not None:
        lines.append(f"σ = {_fmt(summary['sigma_nm'])} nm")
    return "\n".join(lines)
