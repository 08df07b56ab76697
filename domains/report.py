"""Figures (PNG) and the one-page HTML report of an analysis."""

from __future__ import annotations

import html
import io as _io
import math

import numpy as np

from ._scan import pixel_size_pair


def _pyplot():
    import matplotlib

    # Render off screen: the core never needs a display.
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    return plt


#: Longest side (pixels) of the arrays a figure draws; a figure is about 600 pixels wide, so more is never seen.
FIGURE_MAX_PX = 1024


def _extent(shape, pixel_size_nm, factor=1):
    dy, dx = pixel_size_pair(pixel_size_nm)
    return (0, shape[1] * dx * factor, shape[0] * dy * factor, 0)


def _block_factor(shape, max_px):
    """The block side (and stride) that brings the longer side of ``shape`` to at most ``max_px`` pixels."""
    return max(1, math.ceil(max(shape) / max_px)) if len(shape) and max(shape) else 1


def _block_mode(blocks):
    """Most frequent value along the last axis (ties: the smallest value)."""
    ordered = np.sort(blocks, axis=-1)
    n = ordered.shape[-1]
    index = np.arange(n)
    start = np.ones(ordered.shape, bool)
    start[..., 1:] = ordered[..., 1:] != ordered[..., :-1]
    end = np.ones(ordered.shape, bool)
    end[..., :-1] = start[..., 1:]
    # For every position: where its run of equal values starts and ends, hence the run's length.
    first = np.maximum.accumulate(np.where(start, index, 0), axis=-1)
    last = np.flip(np.minimum.accumulate(np.flip(np.where(end, index, n - 1), axis=-1), axis=-1), axis=-1)
    best = np.argmax(last - first, axis=-1)
    return np.take_along_axis(ordered, best[..., None], axis=-1)[..., 0]


def downsample(array, *, how="mean", max_px=FIGURE_MAX_PX):
    """An image reduced by whole blocks so that its longer side is at most ``max_px``, for drawing.

    The same block factor f applies to both axes, so a reduced pixel covers f x f
    input pixels and the physical pixel size becomes f times the input's (a figure
    keeps its axes in nm with ``extent`` scaled by f). The last row and column of
    blocks may be partial; they are reduced over the pixels they hold.

    Parameters
    ----------
    array : (row, col) array
        The image.
    how : {"mean", "phase", "mode", "max"}
        "mean": block mean of the finite values (continuous data; NaN where a
        block has none). "phase": angle of the block mean of exp(i phi) (cyclic
        data in rad, no wrap-around artefact). "mode": most frequent value
        (labels; ties go to the smallest). "max": block maximum (walls and other
        masks, so a one-pixel wall stays one reduced pixel wide).
    max_px : int
        Longest side of the result.

    Returns
    -------
    (ndarray, int)
        The reduced image and the block factor f (1: the input, unchanged).

    References
    ----------
    Block averaging is the box-filter-then-decimate of common practice (no source);
    the circular mean for phases follows N. I. Fisher, *Statistical Analysis of
    Circular Data* (Cambridge University Press, 1993), §2.2.

    Examples
    --------
    >>> small, f = downsample(np.arange(16.0).reshape(4, 4), max_px=2)
    >>> f, small.tolist()
    (2, [[2.5, 4.5], [10.5, 12.5]])
    >>> downsample(np.array([[1, 1, 0], [1, 2, 2], [0, 0, 2]]), how="mode", max_px=2)[0].tolist()
    [[1, 0], [0, 2]]
    >>> downsample(np.eye(4, dtype=bool), how="max", max_px=2)[0].tolist()
    [[True, False], [False, True]]
    """
    if how not in ("mean", "phase", "mode", "max"):
        raise ValueError(f"how must be 'mean', 'phase', 'mode' or 'max', got {how!r}")
    array = np.asarray(array)
    if array.ndim != 2:
        raise ValueError(f"array: expected a 2-D image, got shape {array.shape}")
    f = _block_factor(array.shape, max_px)
    if f == 1:
        return array, 1
    rows, cols = (-(-n // f) for n in array.shape)
    pad = ((0, rows * f - array.shape[0]), (0, cols * f - array.shape[1]))
    if how in ("mean", "phase"):
        values = np.asarray(array, np.float64 if array.dtype == np.float64 else np.float32)
        if not pad[0][1] and not pad[1][1] and np.isfinite(values).all():
            # Whole blocks, no NaN (the usual case): plain block sums, no masks.
            if how == "mean":
                return values.reshape(rows, f, cols, f).mean(axis=(1, 3), dtype=np.float64).astype(values.dtype), f
            c = np.cos(values).reshape(rows, f, cols, f).sum(axis=(1, 3))
            s = np.sin(values).reshape(rows, f, cols, f).sum(axis=(1, 3))
            return np.arctan2(s, c).astype(values.dtype), f
        if how == "phase":
            values = np.exp(1j * values)
        finite = np.pad(np.isfinite(values), pad).reshape(rows, f, cols, f)
        values = np.pad(np.where(np.isfinite(values), values, 0), pad).reshape(rows, f, cols, f)
        total, count = values.sum(axis=(1, 3)), finite.sum(axis=(1, 3))
        if how == "phase":
            out = np.where(count > 0, np.angle(total), np.nan).astype(array.dtype if array.dtype.kind == "f" else float)
        else:
            with np.errstate(invalid="ignore", divide="ignore"):
                out = np.where(count > 0, total / np.maximum(count, 1), np.nan).astype(values.dtype)
        return out, f
    # Labels and masks: the padding repeats the edge, so a partial block holds no value it did not have.
    padded = np.pad(array, pad, mode="edge").reshape(rows, f, cols, f)
    if how == "max":
        return padded.max(axis=(1, 3)), f
    # Most blocks hold one label: their mode is any of their pixels. Only mixed blocks are sorted.
    out = padded[:, f // 2, :, f // 2].copy()
    mixed = np.nonzero(padded.min(axis=(1, 3)) != padded.max(axis=(1, 3)))
    if mixed[0].size:
        blocks = padded[mixed[0], :, mixed[1], :].reshape(-1, f * f)
        out[mixed] = _block_mode(blocks)
    return out, f


def _png(fig) -> bytes:
    buffer = _io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110, bbox_inches="tight")
    _pyplot().close(fig)
    return buffer.getvalue()


def _robust_limits(image, low=0.5, high=99.5):
    finite = np.asarray(image)[np.isfinite(image)]
    if finite.size == 0:
        return 0.0, 1.0
    lo, hi = np.percentile(finite, [low, high])
    return (float(lo), float(hi)) if hi > lo else (float(lo) - 0.5, float(lo) + 0.5)


#: Colour maps that are cyclic: an image drawn with one of them is a phase, reduced by circular means.
CYCLIC_CMAPS = ("twilight", "twilight_shifted", "hsv")


def _set_frame(ax, shape, pixel_size_nm):
    """Axes limits on the input's frame (a reduced image's last partial block may reach past it)."""
    extent = _extent(shape, pixel_size_nm)
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])


def image_figure(image, *, pixel_size_nm, title, units="", cmap="afmhot", limits=None, overlay=None, cyclic=None,
                 as_figure=False):
    """A map with physical axes (nm), a colour bar with units, robust colour limits.

    The image is drawn from :func:`downsample` (at most :data:`FIGURE_MAX_PX` per
    side: block means, or circular means for a cyclic map), on its physical frame.

    Parameters
    ----------
    image : (row, col) array
        The map.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    title : str
        Figure title.
    units : str
        Units of the values, shown on the colour bar.
    cmap : str
        Matplotlib colour map ("twilight" for phases: it is cyclic).
    limits : (float, float), optional
        Colour limits; default the 0.5 and 99.5 percentiles.
    overlay : callable, optional
        ``overlay(ax)`` draws on top (peaks, walls, defects), in nm.
    cyclic : bool, optional
        The values are phases in rad (reduced by circular means); default: the
        colour map is one of :data:`CYCLIC_CMAPS`.
    as_figure : bool
        Return the matplotlib Figure instead of PNG bytes (the caller closes it).

    Returns
    -------
    bytes or matplotlib.figure.Figure
        PNG (default).

    Examples
    --------
    >>> png = image_figure(np.random.default_rng(0).normal(size=(32, 32)), pixel_size_nm=0.1, title="noise")
    >>> png[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(5.2, 4.4))
    cyclic = cmap in CYCLIC_CMAPS if cyclic is None else cyclic
    shown_image, factor = downsample(image, how="phase" if cyclic else "mean")
    lo, hi = limits or _robust_limits(shown_image)
    shown = ax.imshow(shown_image, cmap=cmap, vmin=lo, vmax=hi,
                      extent=_extent(shown_image.shape, pixel_size_nm, factor), interpolation="nearest")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    ax.set_title(title)
    bar = fig.colorbar(shown, ax=ax, shrink=0.85)
    bar.set_label(units)
    if overlay is not None:
        overlay(ax)
    _set_frame(ax, np.shape(image), pixel_size_nm)
    return fig if as_figure else _png(fig)


def spectrum_figure(power, qx, qy, *, peaks=(), title="Power spectrum (Hann window)"):
    """Log power spectrum with physical axes (rad/nm) and the indexed peaks marked by role.

    Parameters
    ----------
    power : (row, col) array
        fftshifted power spectrum.
    qx, qy : 1-D arrays
        Axes in rad/nm.
    peaks : sequence of (qx, qy, role)
        Peaks to mark; role chooses the marker colour and the legend entry.
    title : str
        Figure title.

    Returns
    -------
    bytes
        PNG.

    Examples
    --------
    >>> q = np.linspace(-5, 5, 32)
    >>> spectrum_figure(np.ones((32, 32)), q, q, peaks=[(1.0, 0.0, "bragg")])[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(5.4, 4.8))
    qx, qy = np.asarray(qx, float), np.asarray(qy, float)
    lengths = [np.hypot(p[0], p[1]) for p in peaks]
    # Show the peaks with some room, and at least their first harmonics for a low-|q| pattern.
    qmax = max(1.35 * max(lengths), 3 * min(lengths)) if lengths else qx[-1]
    qmax = min(qmax, qx[-1], qy[-1])
    # Only the window shown is drawn, reduced by block maxima (a sharp peak keeps its height).
    cols = np.flatnonzero(np.abs(qx) <= qmax)
    rows = np.flatnonzero(np.abs(qy) <= qmax)
    if cols.size < 2 or rows.size < 2:
        cols, rows = np.arange(qx.size), np.arange(qy.size)
    window, factor = downsample(np.asarray(power, float)[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1], how="max")
    logp = np.log10(np.maximum(window, np.finfo(float).tiny))
    lo, hi = _robust_limits(logp, 20, 99.9)
    dqx = qx[1] - qx[0] if qx.size > 1 else 1.0
    dqy = qy[1] - qy[0] if qy.size > 1 else 1.0
    # Pixel edges: block (i, j) covers input pixels i*f ... i*f + f - 1 of the window.
    ax.imshow(logp, cmap="magma", vmin=lo, vmax=hi, origin="upper", interpolation="nearest",
              extent=(qx[cols[0]] - dqx / 2, qx[cols[0]] + (logp.shape[1] * factor - 0.5) * dqx,
                      qy[rows[0]] + (logp.shape[0] * factor - 0.5) * dqy, qy[rows[0]] - dqy / 2))
    colours = {"bragg": "#38d9f5", "superlattice": "#9cff57", "incommensurate": "#ffd24a", "moire": "#ff6ad5",
               "harmonic": "#bbbbbb"}
    seen = set()
    for px, py, role in peaks:
        for sign in (1, -1):
            ax.plot(sign * px, sign * py, "o", mfc="none", ms=11, mew=1.4, color=colours.get(role, "white"),
                    label=role if role not in seen else None)
            seen.add(role)
    ax.set_xlim(-qmax, qmax)
    ax.set_ylim(qmax, -qmax)
    ax.set_xlabel("qx (rad/nm)")
    ax.set_ylabel("qy (rad/nm)")
    ax.set_title(title)
    if seen:
        ax.legend(loc="upper right", fontsize=8, framealpha=0.6)
    return _png(fig)


def domain_label_positions(labels, *, pixel_size_nm=1.0) -> dict[int, tuple[float, float]]:
    """Where to write each domain's id: its centroid, or its most interior pixel if the centroid lies outside it.

    Parameters
    ----------
    labels : (row, col) int array
        Domain labels (0 = wall or unassigned).
    pixel_size_nm : float or (float, float)
        Pixel size in nm.

    Returns
    -------
    dict
        ``label -> (x_nm, y_nm)`` with x = col * dx, y = row * dy (pixel centres).

    Examples
    --------
    >>> lab = np.zeros((5, 8), int); lab[:, :4] = 1; lab[:, 4:] = 2
    >>> domain_label_positions(lab, pixel_size_nm=0.5)
    {1: (0.75, 1.0), 2: (2.75, 1.0)}
    """
    from scipy import ndimage

    labels = np.asarray(labels)
    dy, dx = pixel_size_pair(pixel_size_nm)
    ids = [int(v) for v in np.unique(labels[labels > 0])]
    if not ids:
        return {}
    # Centroids from per-row and per-column label counts (two small tables instead of index images).
    lut = np.zeros(ids[-1] + 1, np.int64)
    lut[ids] = np.arange(1, len(ids) + 1)
    code = lut[np.clip(labels, 0, ids[-1])]
    n = len(ids) + 1
    by_row = np.bincount((code + n * np.arange(labels.shape[0])[:, None]).ravel(),
                         minlength=n * labels.shape[0]).reshape(labels.shape[0], n)
    by_col = np.bincount((code + n * np.arange(labels.shape[1])[None, :]).ravel(),
                         minlength=n * labels.shape[1]).reshape(labels.shape[1], n)
    count = by_row.sum(axis=0)[1:]
    centres = zip(np.arange(labels.shape[0]) @ by_row[:, 1:] / count, np.arange(labels.shape[1]) @ by_col[:, 1:] / count)
    inside = None
    out = {}
    for label, (r, c) in zip(ids, centres):
        ri, ci = int(round(r)), int(round(c))
        if not (0 <= ri < labels.shape[0] and 0 <= ci < labels.shape[1] and labels[ri, ci] == label):
            if inside is None:
                # Distance to the nearest pixel of another label or to the frame: its maximum is the most
                # interior pixel (a text on the frame's edge would be cut).
                border = np.zeros(labels.shape, bool)
                border[[0, -1], :] = True
                border[:, [0, -1]] = True
                border[:, :-1] |= labels[:, :-1] != labels[:, 1:]
                border[:, 1:] |= labels[:, :-1] != labels[:, 1:]
                border[:-1, :] |= labels[:-1, :] != labels[1:, :]
                border[1:, :] |= labels[:-1, :] != labels[1:, :]
                inside = ndimage.distance_transform_edt(~border & (labels > 0))
            r, c = ndimage.maximum_position(inside, labels, label)
        out[label] = (float(c) * dx, float(r) * dy)
    return out


def domain_figure(topography, labels, walls, *, pixel_size_nm, defects=(), title="Domains over the topograph",
                  states=None, colours=None, ids=None, id_labels=None, positions=None, legend_title="domain",
                  as_figure=False):
    """Domains in colour over the grey topograph with their ids, walls in black, defects as markers.

    Each domain's id (the ``domain`` column of ``domains.csv``, equal to its
    label) is written at its centroid; neighbouring domains get different
    colours (:func:`domains._palette.label_colours`); a legend keys the colours
    to the ids (up to 24 domains; more are identified by their written id) and
    names the walls and the defects ("+1 winding", "-1 winding").

    Parameters
    ----------
    topography : (row, col) array
        Background image.
    labels : (row, col) int
        Domain labels (0 = wall or unassigned).
    walls : (row, col) bool
        Thin walls.
    pixel_size_nm : float or (float, float)
        Pixel size in nm.
    defects : sequence of dict
        With ``x_nm``, ``y_nm``, ``winding``.
    title : str
        Figure title.
    states : dict, optional
        ``domain id -> state name`` (the ``state`` column of ``domains.csv``), shown in the legend.
    colours : dict, optional
        ``label -> hex colour``; default :func:`domains._palette.label_colours` of ``labels``.
    ids : dict, optional
        ``label -> text`` written instead of the label's number.
    id_labels : (row, col) int array, optional
        Where the texts go: one per label of this image (default ``labels``). A map of
        electronic types writes each domain's type at each domain with the domain
        labels here and ``ids = {domain: "3: A"}``.
    positions : dict, optional
        ``label -> (x_nm, y_nm)`` where the texts go, when the labels drawn are reduced
        from larger ones (:func:`domain_label_positions` of the full labels); default
        computed from ``id_labels``.
    legend_title : str
        Title of the legend of colours.
    as_figure : bool
        Return the matplotlib Figure instead of PNG bytes (the caller closes it).

    Returns
    -------
    bytes or matplotlib.figure.Figure
        PNG (default).

    Examples
    --------
    >>> lab = np.ones((16, 16), int); lab[:, 8:] = 2
    >>> domain_figure(np.zeros((16, 16)), lab, lab == 0, pixel_size_nm=0.1)[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    from matplotlib.colors import ListedColormap
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from scipy import ndimage

    from ._palette import DEFECT_COLOURS, DEFECT_LABELS, DEFECT_MARKERS, WALL_COLOUR, label_colours, rgba

    labels = np.asarray(labels)
    fig, ax = plt.subplots(figsize=(6.6, 4.8))
    extent = _extent(np.shape(labels), pixel_size_nm)
    # Drawn from reduced arrays (block mean, mode, max); colours and ids come from the full labels,
    # so they are the viewer's (napari_plugin) and every domain gets one, however small.
    background, factor = downsample(topography, how="mean")
    lo, hi = _robust_limits(background)
    ax.imshow(background, cmap="gray", vmin=lo, vmax=hi, interpolation="nearest",
              extent=_extent(background.shape, pixel_size_nm, factor))
    colours = colours if colours is not None else (label_colours(labels) if labels.size else {})
    n = int(labels.max()) if labels.size else 0
    lut = np.zeros((max(n, 0) + 1, 4))
    for label, colour in colours.items():
        if 0 < label <= n:
            lut[label] = rgba(colour, 0.5)
    small, factor = downsample(labels, how="mode")
    ax.imshow(lut[np.clip(small, 0, n)], extent=_extent(small.shape, pixel_size_nm, factor), interpolation="nearest")
    # Walls are one pixel thin: kept by block maxima, then thickened for display only, so that they
    # survive matplotlib's resampling to the figure's few hundred pixels.
    thin, factor = downsample(np.asarray(walls, bool), how="max")
    shown = ndimage.binary_dilation(thin, iterations=max(1, min(thin.shape) // 400))
    ax.imshow(np.ma.masked_where(~shown, np.ones(shown.shape)), cmap=ListedColormap([WALL_COLOUR]),
              vmin=0, vmax=1, extent=_extent(shown.shape, pixel_size_nm, factor), interpolation="nearest")
    if positions is None:
        where = labels if id_labels is None else np.asarray(id_labels)
        positions = domain_label_positions(where, pixel_size_nm=pixel_size_nm)
    big = max(6.0, min(11.0, 140.0 / max(1.0, math.sqrt(len(positions)))))
    dy, dx = pixel_size_pair(pixel_size_nm)
    for label, (x, y) in positions.items():
        # The box's edge has the colour drawn under the text.
        under = int(labels[min(int(round(y / dy)), labels.shape[0] - 1), min(int(round(x / dx)), labels.shape[1] - 1)])
        ax.text(x, y, (ids or {}).get(label, str(label)), ha="center", va="center", fontsize=big, fontweight="bold",
                color="black", gid=f"domain-id-{label}",
                bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": colours.get(under, WALL_COLOUR), "lw": 1.5,
                      "alpha": 0.85})
    handles = []
    if 0 < len(colours) <= 24:
        for label, colour in colours.items():
            name = f"{label}" + (f": {states[label]}" if states and states.get(label) is not None else "")
            handles.append(Patch(facecolor=rgba(colour, 0.6), edgecolor=colour, label=name))
    if np.any(walls):
        handles.append(Line2D([], [], color=WALL_COLOUR, lw=2, label="wall"))
    for sign in (1, -1):
        mine = [d for d in defects if np.sign(d["winding"]) == sign]
        if mine:
            ax.plot([d["x_nm"] for d in mine], [d["y_nm"] for d in mine], ls="none", marker=DEFECT_MARKERS[sign],
                    ms=9, mec="white", mew=0.8, color=DEFECT_COLOURS[sign])
            handles.append(Line2D([], [], ls="none", marker=DEFECT_MARKERS[sign], ms=8, mec="white",
                                  color=DEFECT_COLOURS[sign], label=f"{DEFECT_LABELS[sign]} ({len(mine)})"))
    if handles:
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=7,
                  title=legend_title if colours else None, title_fontsize=8, frameon=False)
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    ax.set_title(title)
    return fig if as_figure else _png(fig)


def histogram_figure(values, *, xlabel, title, bins="auto", as_figure=False):
    """A histogram of a measured quantity (e.g. domain areas in nm^2), counts on integer ticks.

    Parameters
    ----------
    values : sequence of float
        The values; non-finite ones are left out.
    xlabel, title : str
        Axis label (with units) and title.
    bins : int, sequence or str
        As :func:`numpy.histogram`; values that are all integers get one bin per integer.
    as_figure : bool
        Return the matplotlib Figure instead of PNG bytes.

    Returns
    -------
    bytes or matplotlib.figure.Figure

    Examples
    --------
    >>> histogram_figure([1.0, 2.0, 2.5], xlabel="area (nm$^2$)", title="t")[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    from matplotlib.ticker import MaxNLocator

    fig, ax = plt.subplots(figsize=(5.0, 3.4))
    values = np.asarray(values, float)
    values = values[np.isfinite(values)]
    integer = values.size > 0 and np.all(values == np.round(values)) and np.ptp(values) <= 60
    if values.size:
        if integer:
            bins = np.arange(values.min() - 0.5, values.max() + 1.5)
        elif values.size <= 3:
            bins = max(values.size, 1)
        ax.hist(values, bins=bins, color="#4a7bb7", edgecolor="white")
    # Counts are whole numbers: no tick at 0.5 or 1.5.
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    if integer:
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel(xlabel)
    ax.set_ylabel("count")
    ax.set_title(title)
    return fig if as_figure else _png(fig)


def _numbers(values):
    return np.array([np.nan if v is None else v for v in values], dtype=float)


def differs_within_errors(curves, *, z=2.0) -> bool:
    """True if any two curves differ at a common abscissa by more than ``z`` combined standard errors.

    Parameters
    ----------
    curves : list of (label, x, y, yerr or None)
        As :func:`curves_figure`.
    z : float
        How many combined standard errors, sqrt(se_a^2 + se_b^2), make a
        difference (2: about 95 % for Gaussian errors).

    Returns
    -------
    bool
        False when every pair agrees within its errors at every shared x (the
        figure then shows nothing that differs). A curve without errors differs
        from another wherever their values are not equal. Fewer than two curves: False.

    Examples
    --------
    >>> same = [("a", [0, 1], [1.0, 2.0], [0.1, 0.1]), ("b", [0, 1], [1.1, 2.1], [0.1, 0.1])]
    >>> differs_within_errors(same)
    False
    >>> differs_within_errors(same + [("c", [0, 1], [1.0, 3.0], [0.1, 0.1])])
    True
    """
    points = []
    for _, x, y, yerr in curves:
        x, y = _numbers(x), _numbers(y)
        e = np.zeros_like(y) if yerr is None else np.abs(_numbers(yerr))
        points.append({float(xi): (yi, ei) for xi, yi, ei in zip(x, y, e) if np.isfinite(xi) and np.isfinite(yi)})
    for i in range(len(points)):
        for j in range(i + 1, len(points)):
            for xv in points[i].keys() & points[j].keys():
                (ya, ea), (yb, eb) = points[i][xv], points[j][xv]
                combined = math.hypot(ea if np.isfinite(ea) else 0.0, eb if np.isfinite(eb) else 0.0)
                if abs(ya - yb) > z * combined:
                    return True
    return False


#: Caption sentence for a figure whose curves all agree within their errors.
SAME_WITHIN_ERRORS = "All curves agree within two standard errors: nothing differs between them at this precision."


def curves_figure(curves, *, xlabel, ylabel, title, lines=True, reference=(), units=None, note_if_same=True,
                  colours=None, as_figure=False):
    """Several labelled curves with optional error bars: ``curves`` is a list of (label, x, y, yerr or None).

    Parameters
    ----------
    curves : list of (label, x, y, yerr or None)
        The curves; None values are gaps.
    xlabel, ylabel, title : str
        Axis labels and title.
    lines : bool
        False draws markers only.
    reference : sequence of float
        Values drawn as dotted horizontal lines.
    units : str, optional
        Units of y, appended to the axis label: ``ylabel (units)``.
    note_if_same : bool
        When :func:`differs_within_errors` is False for two or more curves, write
        :data:`SAME_WITHIN_ERRORS` in the figure (the curves are drawn anyway).
    colours : sequence of str or None, optional
        One colour per curve (None: matplotlib's cycle).
    as_figure : bool
        Return the matplotlib Figure instead of PNG bytes.

    Returns
    -------
    bytes or matplotlib.figure.Figure

    Examples
    --------
    >>> curves_figure([("a", [0, 1], [1, 2], None)], xlabel="V", ylabel="A", title="t")[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(5.6, 3.8))
    style = "o-" if lines else "o"
    for value in reference:
        ax.axhline(value, color="0.6", lw=0.8, ls=":")
    for n, (label, x, y, yerr) in enumerate(curves):
        x, y = _numbers(x), _numbers(y)
        colour = colours[n] if colours is not None and n < len(colours) else None
        if yerr is None:
            ax.plot(x, y, style, ms=3, label=label, color=colour)
        else:
            ax.errorbar(x, y, yerr=_numbers(yerr), fmt=style, ms=3, capsize=2, label=label, color=colour)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(f"{ylabel} ({units})" if units else ylabel)
    ax.set_title(title)
    if curves:
        ax.legend(fontsize=7, ncol=2)
    if note_if_same and len(curves) > 1 and not differs_within_errors(curves):
        ax.text(0.5, 0.02, "all curves agree within 2 standard errors", transform=ax.transAxes, ha="center",
                va="bottom", fontsize=8, color="#8a4b00", gid="same-within-errors")
    return fig if as_figure else _png(fig)


def electronic_type_map(summary, labels_entry):
    """The map of electronic types for ``maps.zarr``: 1 for type A, 2 for B, ... over each member domain.

    Built from the domain labels and ``summary["electronic_types"]["types"]`` (the
    member domains of each type), as the report's type figure is, so that the viewer
    (which colours it with :func:`domains._palette.label_colours`, as the figure
    does) shows each type in the report's colour.

    Parameters
    ----------
    summary : dict
        The analysis summary.
    labels_entry : (array, dict) or None
        ``maps["labels"]``: the domain labels (0 = wall or unassigned) and their attributes.

    Returns
    -------
    (ndarray, dict) or None
        int32 type map (0 on walls, unassigned pixels and domains of no type) and its
        attributes (those of the labels, ``units`` "label", ``type_names`` {"1": "A", ...});
        None when the summary has no types.

    Examples
    --------
    >>> lab = np.array([[1, 1, 0, 2], [3, 3, 0, 2]])
    >>> s = {"electronic_types": {"types": [{"type": "A", "domains": [1, 3]}, {"type": "B", "domains": [2]}]}}
    >>> types, attrs = electronic_type_map(s, (lab, {"pixel_size_nm": [0.1, 0.1], "units": "label"}))
    >>> types.tolist(), attrs["type_names"]
    ([[1, 1, 0, 2], [1, 1, 0, 2]], {'1': 'A', '2': 'B'})
    """
    block = (summary or {}).get("electronic_types")
    types = block.get("types") if isinstance(block, dict) else None
    if not types or labels_entry is None:
        return None
    labels, attrs = labels_entry
    labels = np.asarray(labels)
    lut = np.zeros(max(int(labels.max()) if labels.size else 0, 0) + 1, np.int32)
    for number, entry in enumerate(types, start=1):
        members = [int(d) for d in entry.get("domains", []) if 0 < int(d) < lut.size]
        lut[members] = number
    names = {str(number): str(entry.get("type")) for number, entry in enumerate(types, start=1)}
    return lut[np.clip(labels, 0, lut.size - 1)], {**attrs, "units": "label", "type_names": names}


def _signed(value, digits):
    return f"{value:.{digits}f}".replace("-", "\u2212")


def _pm_text(value, se):
    """'0.80 ± 0.10': the error to one or two significant digits, the value to the same decimals."""
    if not (math.isfinite(se) and se > 0):
        return _signed(value, 3)
    exp = math.floor(math.log10(se))
    digits = max(0, -exp + (1 if se / 10**exp < 3 else 0))
    return f"{_signed(value, digits)} ± {se:.{digits}f}"


def _bias_text(bias_V):
    return f"{bias_V:+.2f} V".replace("-", "\u2212")


def domain_contrast_tests(contrast, *, alpha=0.01, gain_tolerance=0.0):
    """Which domains differ from the frame in conductance, bias by bias, with a Šidák-corrected threshold.

    Parameters
    ----------
    contrast : domains.compare.ElectronicContrast
        Per-domain contrasts (``conductance.contrast`` and ``contrast_se``, shape
        (n_biases, n_domains)), ``domains``, ``biases_V``, ``units``.
    alpha : float
        Family-wise significance level over all domains and biases.
    gain_tolerance : float
        Relative allowance for a change of the tip's gain, added in quadrature to
        each error as ``gain_tolerance * |contrast|`` (as in
        :func:`domains.compare.electronic_types`).

    Returns
    -------
    dict
        ``z_threshold`` (two-sided Šidák threshold for n = domains x biases tests:
        Phi^-1(1 - a/2), a = 1 - (1 - alpha)^(1/n)), ``n_tests`` and ``differ``: a
        list of dicts (``domain``, ``bias_V``, ``value``, ``se``, ``z``), one per
        significant contrast.

    References
    ----------
    Z. Šidák, "Rectangular confidence regions for the means of multivariate normal
    distributions", J. Am. Stat. Assoc. 62, 626 (1967). doi:10.1080/01621459.1967.10482935

    Examples
    --------
    >>> from types import SimpleNamespace as NS
    >>> c = NS(domains=(1, 2), biases_V=(-0.3, 0.3), units="nS", conductance=NS(
    ...     contrast=np.array([[0.5, -0.5], [0.01, -0.01]]), contrast_se=np.full((2, 2), 0.05)))
    >>> found = domain_contrast_tests(c, alpha=0.01)
    >>> round(found["z_threshold"], 2), [(d["domain"], d["bias_V"]) for d in found["differ"]]
    (3.02, [(1, -0.3), (2, -0.3)])
    """
    from scipy import stats

    value = np.asarray(contrast.conductance.contrast, float)
    se = np.asarray(contrast.conductance.contrast_se, float)
    total = np.hypot(se, gain_tolerance * np.abs(value))
    n = int(np.sum(np.isfinite(value) & np.isfinite(total) & (total > 0)))
    a = 1 - (1 - alpha) ** (1 / max(n, 1))
    z_star = float(stats.norm.isf(a / 2))
    differ = []
    for i, d in enumerate(contrast.domains):
        for k, b in enumerate(contrast.biases_V):
            if np.isfinite(value[k, i]) and np.isfinite(total[k, i]) and total[k, i] > 0:
                z = value[k, i] / total[k, i]
                if abs(z) > z_star:
                    differ.append({"domain": int(d), "bias_V": float(b), "value": float(value[k, i]),
                                   "se": float(se[k, i]), "z": float(z)})
    return {"z_threshold": z_star, "n_tests": n, "differ": differ}


def conductance_caption(contrast, types=None, *, alpha=None, gain_tolerance=None):
    """The conductance figure's caption: what is plotted, which domains differ from the frame, and the types.

    Parameters
    ----------
    contrast : domains.compare.ElectronicContrast
    types : domains.compare.ElectronicTypes, optional
        Its sentences close the caption; its ``alpha`` and ``gain_tolerance`` are
        used for the per-domain tests unless given.
    alpha, gain_tolerance : float, optional
        As :func:`domain_contrast_tests` (default 0.01 and 0 without types).

    Returns
    -------
    str

    Examples
    --------
    >>> from types import SimpleNamespace as NS
    >>> c = NS(domains=(1, 2), biases_V=(-0.3, 0.3), units="nS", conductance=NS(
    ...     contrast=np.array([[0.5, -0.5], [0.01, -0.01]]), contrast_se=np.full((2, 2), 0.05)))
    >>> print(conductance_caption(c).split(". ")[1])
    Differing from the frame (|z| > 3.02, Šidák-corrected over 4 tests at α = 0.01): domain 1 brighter at −0.30 V by 0.50 ± 0.05 nS; domain 2 darker at −0.30 V by 0.50 ± 0.05 nS.
    """
    alpha = alpha if alpha is not None else getattr(types, "alpha", 0.01)
    gain_tolerance = gain_tolerance if gain_tolerance is not None else getattr(types, "gain_tolerance", 0.0)
    tests = domain_contrast_tests(contrast, alpha=alpha, gain_tolerance=gain_tolerance)
    unit = contrast.units
    words = [f"Conductance contrast of each domain to the frame at each bias ({unit}), free of scan-line "
             "offsets, with 1σ standard errors; 0 is the frame's area-weighted mean."]
    rule = (f"|z| > {tests['z_threshold']:.2f}, Šidák-corrected over {tests['n_tests']} tests at α = {alpha:g}"
            + (f", tip-gain allowance {gain_tolerance:.0%}" if gain_tolerance else ""))
    if tests["differ"]:
        parts = [f"domain {t['domain']} {'brighter' if t['value'] > 0 else 'darker'} at {_bias_text(t['bias_V'])} "
                 f"by {_pm_text(abs(t['value']), t['se'])} {unit}" for t in tests["differ"]]
        words.append(f"Differing from the frame ({rule}): " + "; ".join(parts) + ".")
        same = sorted(set(int(d) for d in contrast.domains) - {t["domain"] for t in tests["differ"]})
        if same:
            words.append(f"Domain{'s' if len(same) > 1 else ''} {', '.join(map(str, same))} "
                         "agree with the frame at every bias.")
    else:
        words.append(f"No domain differs from the frame at any bias ({rule}): the domains are equal within "
                     "their errors.")
    if types is not None:
        words += list(types.sentences())
    return " ".join(words)


def conductance_figure(contrast, *, colours=None, types=None, as_figure=False):
    """Each domain's conductance contrast to the frame against bias, with error bars, in the maps' units.

    The contrasts are the scan-line-offset-free ones of
    :func:`domains.compare.domain_electronic_contrast` (``conductance.contrast``, 1σ
    ``contrast_se``); a dotted line marks the frame (0). Domains are spread a little
    along the bias axis so their error bars do not hide each other.

    Parameters
    ----------
    contrast : domains.compare.ElectronicContrast
        ``units`` (the sidecar's, after normalisation) label the axis.
    colours : dict, optional
        ``domain -> hex colour``; the pipeline gives each domain its type's colour in
        the type map (domains of one type share a colour; each domain has its own marker).
    types : domains.compare.ElectronicTypes, optional
        Each legend entry names the domain's type; its ``alpha`` and
        ``gain_tolerance`` decide the note "no domain differs" (:func:`domain_contrast_tests`).
    as_figure : bool
        Return the matplotlib Figure instead of PNG bytes.

    Returns
    -------
    bytes or matplotlib.figure.Figure

    Examples
    --------
    >>> from types import SimpleNamespace as NS
    >>> c = NS(domains=(1, 2), biases_V=(-0.3, 0.3), units="nS", conductance=NS(
    ...     contrast=np.array([[0.5, -0.5], [0.01, -0.01]]), contrast_se=np.full((2, 2), 0.05)))
    >>> conductance_figure(c)[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    value = np.asarray(contrast.conductance.contrast, float)
    se = np.asarray(contrast.conductance.contrast_se, float)
    biases = np.asarray(contrast.biases_V, float)
    kind = types.type_of() if types is not None else {}
    n = len(contrast.domains)
    gaps = np.diff(np.sort(biases))
    spread = 0.25 * (gaps.min() if gaps.size else 0.1)
    fig, ax = plt.subplots(figsize=(5.8, 3.9))
    ax.axhline(0.0, color="0.55", lw=0.8, ls=":")
    markers = "os^vDPX*h<>p"
    for i, d in enumerate(contrast.domains):
        shift = spread * ((i - (n - 1) / 2) / max(n - 1, 1)) if n > 1 else 0.0
        label = f"domain {int(d)}" + (f" (type {kind[d]})" if d in kind else "")
        ax.errorbar(biases + shift, value[:, i], yerr=se[:, i], fmt=markers[i % len(markers)], ms=4.5,
                    capsize=2.5, lw=1.2, color=(colours or {}).get(int(d)), label=label)
    tests = domain_contrast_tests(contrast, alpha=getattr(types, "alpha", 0.01),
                                  gain_tolerance=getattr(types, "gain_tolerance", 0.0))
    if not tests["differ"]:
        ax.text(0.5, 0.02, "no domain differs from the frame beyond its errors", transform=ax.transAxes,
                ha="center", va="bottom", fontsize=8, color="#8a4b00", gid="no-difference")
    ax.set_xticks(biases)
    ax.set_xticklabels([f"{b:+.2f}" for b in biases])
    ax.set_xlabel("bias (V)")
    ax.set_ylabel(f"contrast to the frame ({contrast.units})")
    ax.set_title("Per-domain conductance contrast")
    ax.legend(fontsize=7, ncol=2 if n > 6 else 1, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    return fig if as_figure else _png(fig)


_WORDS = {"None": "–", "none": "–", "nan": "–", "NaN": "–", "True": "yes", "False": "no", "true": "yes",
          "false": "no", "": "–"}


def _number(value: float) -> str:
    if not math.isfinite(value):
        return "–"
    text = f"{value:.4g}"
    # A value that rounds to zero is shown without a sign: no "-0" or "-0.0000".
    return text[1:] if text.startswith("-") and float(text) == 0 else text


def _text(value: str) -> str:
    value = value.strip()
    if value in _WORDS:
        return _WORDS[value]
    if ";" in value:
        parts = [p.strip() for p in value.split(";")]
        try:
            return ", ".join(_number(float(p)) if p not in _WORDS else _WORDS[p] for p in parts)
        except ValueError:
            pass
    try:
        number = float(value)
    except ValueError:
        return value
    return _number(number) if number == 0 else value


def format_cell(value) -> str:
    """One table cell in human words (plain text, not yet HTML-escaped).

    None, NaN and the empty string become "–", booleans "yes"/"no", floats 4
    significant digits without a negative zero, lists "a, b, c"; strings packing
    numbers with ";" are shown as "a, b, c" too.

    Examples
    --------
    >>> [format_cell(v) for v in (None, True, False, -0.0, 1.23456, [1.8, -1.6, None], "1.8;-1.6;-0.4", "-0.0000", "")]
    ['–', 'yes', 'no', '0', '1.235', '1.8, -1.6, –', '1.8, -1.6, -0.4', '0', '–']
    """
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return _number(float(value))
    if isinstance(value, (list, tuple, np.ndarray)):
        return ", ".join(format_cell(v) for v in value)
    return _text(str(value))


def _format(value):
    return html.escape(format_cell(value))


#: Unit suffixes of column names (longest first), so a split column keeps its unit at the end of its name.
UNIT_SUFFIXES = ("rad_per_nm", "nm2", "nm", "deg", "rad", "nS", "pA", "pct", "percent", "V", "A")

#: Columns that hold one value per order component (q1, q2, ...) or a list of domain ids, and the names of
#: their split columns: ``{i}`` is the element's number (1, 2, ...), ``{xy}`` becomes ``_x``/``_y`` when
#: each element is a pair (qx, qy). Any other list column is named by :func:`split_column_name`'s rule.
LIST_COLUMNS = {
    "mean_phase_deg": "mean_phase_q{i}_deg",
    "phase_jump_deg": "phase_jump_q{i}_deg",
    "phase_jump_deg_err": "phase_jump_q{i}_deg_err",
    "delta_phi_deg": "delta_phi_q{i}_deg",
    "delta_phi_deg_se": "delta_phi_q{i}_deg_se",
    "q_rad_per_nm": "q{i}{xy}_rad_per_nm",
    "domains": "member_{i}",
}


def split_column_name(column, i, xy=""):
    """The name of element ``i`` (1, 2, ...) of a list column, the unit kept last.

    A column of :data:`LIST_COLUMNS` uses its pattern; any other ending in a unit of
    :data:`UNIT_SUFFIXES` (optionally followed by ``_se``) becomes
    ``stem_<i>[_x|_y]_unit[_se]``; a column without a unit becomes ``column_<i>``.

    Parameters
    ----------
    column : str
        The list column's name.
    i : int
        Element number, from 1.
    xy : str
        "", "x" or "y" (the component of a pair).

    Returns
    -------
    str

    Examples
    --------
    >>> split_column_name("mean_phase_deg", 2), split_column_name("q_rad_per_nm", 1, "x")
    ('mean_phase_q2_deg', 'q1_x_rad_per_nm')
    >>> split_column_name("shift_nm_se", 3), split_column_name("members", 1)
    ('shift_3_nm_se', 'members_1')
    """
    part = f"_{xy}" if xy else ""
    if column in LIST_COLUMNS:
        return LIST_COLUMNS[column].format(i=i, xy=part)
    stem, se = (column[:-3], "_se") if column.endswith("_se") else (column, "")
    for unit in UNIT_SUFFIXES:
        if stem.endswith("_" + unit) and len(stem) > len(unit) + 1:
            return f"{stem[:-len(unit) - 1]}_{i}{part}_{unit}{se}"
    return f"{column}_{i}{part}"


_EMPTY = ("", "–", "None", "none", "nan", "NaN")


def _as_list(value):
    """A list from a list/tuple/array or a ";"-packed string of numbers; None for anything else."""
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple)):
        return list(value)
    if isinstance(value, str) and ";" in value:
        parts = [p.strip() for p in value.split(";")]
        try:
            return [None if p in _EMPTY else (int(p) if p.lstrip("+-").isdigit() else float(p)) for p in parts]
        except ValueError:
            return None
    return None


def split_list_columns(columns, rows):
    """Columns holding lists (or ";"-packed numbers) split into one column per element: one value per cell.

    Every CSV of a bundle goes through here (``domains.pipeline.write_analysis``).
    A column is split when any row holds a list, or always when it is one of
    :data:`LIST_COLUMNS` (so a type with a single member still has ``member_1``).
    Elements that are pairs (qx, qy) give two columns each. Missing elements are
    None (an empty cell).

    Parameters
    ----------
    columns : list of str
        Column names.
    rows : list of dict
        Rows keyed by column.

    Returns
    -------
    (list of str, list of dict)
        Column ``c`` with lists of length up to k becomes k columns named by
        :func:`split_column_name`; other columns are unchanged.

    Examples
    --------
    >>> cols, rows = split_list_columns(["domain", "mean_phase_deg"],
    ...                                 [{"domain": 1, "mean_phase_deg": [1.8, -1.6, 0.4]},
    ...                                  {"domain": 2, "mean_phase_deg": "0.0;119.4;-119.8"}])
    >>> cols
    ['domain', 'mean_phase_q1_deg', 'mean_phase_q2_deg', 'mean_phase_q3_deg']
    >>> rows[1]
    {'domain': 2, 'mean_phase_q1_deg': 0.0, 'mean_phase_q2_deg': 119.4, 'mean_phase_q3_deg': -119.8}
    >>> split_list_columns(["type", "domains"], [{"type": "A", "domains": "4"}])
    (['type', 'member_1'], [{'type': 'A', 'member_1': 4}])
    """
    def elements(c, value):
        found = _as_list(value)
        if found is not None:
            return found
        if c in LIST_COLUMNS and value not in (None, "") and not (isinstance(value, float) and math.isnan(value)):
            # A single element written without a separator ("4").
            try:
                return [int(value) if str(value).lstrip("+-").isdigit() else float(value)]
            except (TypeError, ValueError):
                return [value]
        return []

    layout = {}
    for c in columns:
        lists = [elements(c, r.get(c)) for r in rows]
        if not (c in LIST_COLUMNS or any(_as_list(r.get(c)) is not None for r in rows)):
            continue
        width = max((len(v) for v in lists), default=0)
        pairs = any(isinstance(e, (list, tuple, np.ndarray)) for v in lists for e in v)
        if width == 0:
            continue  # no row has a value: nothing to split, the column stays (empty)
        layout[c] = [(i + 1, xy) for i in range(width) for xy in (("x", "y") if pairs else ("",))]
    out_columns = []
    for c in columns:
        out_columns += [split_column_name(c, i, xy) for i, xy in layout[c]] if c in layout else [c]
    out_rows = []
    for r in rows:
        new = {}
        for c in columns:
            if c not in layout:
                if c in r:
                    new[c] = r[c]
                continue
            values = elements(c, r.get(c))
            for i, xy in layout[c]:
                value = values[i - 1] if i <= len(values) else None
                if xy:
                    value = None if value is None else list(value)[0 if xy == "x" else 1]
                new[split_column_name(c, i, xy)] = value
        out_rows.append(new)
    return out_columns, out_rows


def html_table(columns, rows, *, limit=200):
    """An HTML table of rows (dicts), at most ``limit`` rows shown.

    Examples
    --------
    >>> "<td>1.5</td>" in html_table(["a"], [{"a": 1.5}])
    True
    """
    head = "".join(f"<th>{html.escape(c)}</th>" for c in columns)
    body = "".join("<tr>" + "".join(f"<td>{_format(r.get(c, ''))}</td>" for c in columns) + "</tr>"
                   for r in rows[:limit])
    more = f"<p class='note'>{len(rows) - limit} more rows in the CSV file.</p>" if len(rows) > limit else ""
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>{more}"


def _summary_lines(block, prefix=""):
    lines = []
    for key, value in block.items():
        if isinstance(value, dict):
            lines += _summary_lines(value, f"{prefix}{key}.")
        elif isinstance(value, list) and value and isinstance(value[0], (dict, list)):
            lines.append((f"{prefix}{key}", f"{len(value)} entries (see summary.json)"))
        else:
            lines.append((f"{prefix}{key}", value))
    return lines


def render_html(*, title, summary, sections, parameters, notes=(), headline=None):
    """The report page: summary, figure sections with captions, tables and every parameter used.

    Parameters
    ----------
    title : str
        Page title.
    summary : dict
        The summary.json content; shown as a key/value table.
    sections : list of (heading, list of (figure file name or None, caption or HTML))
        Figures are referenced as ``figures/NAME.png``.
    parameters : dict
        Every parameter and automatic choice (flattened into a table).
    notes : sequence of str
        Warnings and remarks shown at the top.
    headline : dict, optional
        The few numbers a reader wants first (shown above the figures); the whole
        summary follows the figures, folded.

    Returns
    -------
    str
        HTML.

    Examples
    --------
    >>> page = render_html(title="t", summary={"a": 1}, sections=[("S", [(None, "<p>x</p>")])], parameters={})
    >>> page.startswith("<!DOCTYPE html>")
    True
    """
    parts = [
        "<!DOCTYPE html><html><head><meta charset='utf-8'>",
        f"<title>{html.escape(title)}</title>",
        "<style>body{font-family:sans-serif;max-width:1150px;margin:2em auto;color:#222}"
        "figure{display:inline-block;margin:.5em;vertical-align:top;max-width:540px}"
        "figure img{max-width:100%;border:1px solid #ddd}figcaption{font-size:.85em;color:#444}"
        "table{border-collapse:collapse;font-size:.82em;margin:.5em 0}td,th{border:1px solid #ccc;padding:2px 6px}"
        "th{background:#f0f0f0}.note{color:#8a4b00}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
    ]
    for note in notes:
        parts.append(f"<p class='note'>{html.escape(note)}</p>")
    if headline:
        parts.append("<h2>Result</h2>" + html_table(["quantity", "value"],
                                                    [{"quantity": k, "value": v} for k, v in headline.items()]))
    for heading, items in sections:
        parts.append(f"<h2>{html.escape(heading)}</h2>")
        for figure, caption in items:
            if figure is None:
                parts.append(caption)
            else:
                parts.append(f"<figure><img src='figures/{html.escape(figure)}.png' alt='{html.escape(figure)}'>"
                             f"<figcaption>{html.escape(caption)}</figcaption></figure>")
    rows = [{"quantity": k, "value": v} for k, v in _summary_lines(summary)]
    parts.append("<details><summary><b>All numbers (summary.json)</b></summary>"
                 + html_table(["quantity", "value"], rows, limit=400) + "</details>")
    prows = [{"parameter": k, "value": v} for k, v in _summary_lines(parameters)]
    parts.append("<h2>Parameters and automatic choices</h2>" + html_table(["parameter", "value"], prows, limit=400))
    parts.append("<p class='note'>Provenance (command line, versions, input checksums): provenance.json.</p>")
    parts.append("</body></html>")
    return "\n".join(parts)
