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


def _extent(shape, pixel_size_nm):
    dy, dx = pixel_size_pair(pixel_size_nm)
    return (0, shape[1] * dx, shape[0] * dy, 0)


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


def image_figure(image, *, pixel_size_nm, title, units="", cmap="afmhot", limits=None, overlay=None):
    """A map with physical axes (nm), a colour bar with units, robust colour limits.

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
        ``overlay(ax)`` draws on top (peaks, walls, defects).

    Returns
    -------
    bytes
        PNG.

    Examples
    --------
    >>> png = image_figure(np.random.default_rng(0).normal(size=(32, 32)), pixel_size_nm=0.1, title="noise")
    >>> png[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(5.2, 4.4))
    lo, hi = limits or _robust_limits(image)
    shown = ax.imshow(np.asarray(image, dtype=float), cmap=cmap, vmin=lo, vmax=hi,
                      extent=_extent(np.shape(image), pixel_size_nm), interpolation="nearest")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    ax.set_title(title)
    bar = fig.colorbar(shown, ax=ax, shrink=0.85)
    bar.set_label(units)
    if overlay is not None:
        overlay(ax)
    return _png(fig)


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
    logp = np.log10(np.maximum(np.asarray(power, float), np.finfo(float).tiny))
    lengths = [np.hypot(p[0], p[1]) for p in peaks]
    # Show the peaks with some room, and at least their first harmonics for a low-|q| pattern.
    qmax = max(1.35 * max(lengths), 3 * min(lengths)) if lengths else qx[-1]
    qmax = min(qmax, qx[-1], qy[-1])
    inside = (np.abs(np.asarray(qx))[None, :] <= qmax) & (np.abs(np.asarray(qy))[:, None] <= qmax)
    lo, hi = _robust_limits(logp[inside], 20, 99.9)
    ax.imshow(logp, cmap="magma", vmin=lo, vmax=hi, origin="upper",
              extent=(qx[0], qx[-1], qy[-1], qy[0]), interpolation="nearest")
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


def domain_figure(topography, labels, walls, *, pixel_size_nm, defects=(), title="Domains over the topograph"):
    """Domain labels in colour over the grey topograph, walls in black, defects as +/- markers.

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

    Returns
    -------
    bytes
        PNG.

    Examples
    --------
    >>> lab = np.ones((16, 16), int); lab[:, 8:] = 2
    >>> domain_figure(np.zeros((16, 16)), lab, lab == 0, pixel_size_nm=0.1)[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    from matplotlib.colors import ListedColormap

    fig, ax = plt.subplots(figsize=(5.4, 4.6))
    extent = _extent(np.shape(labels), pixel_size_nm)
    lo, hi = _robust_limits(topography)
    ax.imshow(topography, cmap="gray", vmin=lo, vmax=hi, extent=extent, interpolation="nearest")
    n = int(np.max(labels)) if np.size(labels) else 0
    palette = plt.get_cmap("tab20")(np.arange(max(n, 1)) % 20)
    coloured = np.ma.masked_where(np.asarray(labels) <= 0, labels)
    ax.imshow(coloured, cmap=ListedColormap(palette), vmin=0.5, vmax=max(n, 1) + 0.5, alpha=0.45,
              extent=extent, interpolation="nearest")
    # Walls are one pixel thin: thicken them for display only, so they survive the downsampling.
    from scipy import ndimage

    shown = ndimage.binary_dilation(np.asarray(walls, bool), iterations=max(1, min(np.shape(walls)) // 400))
    ax.imshow(np.ma.masked_where(~shown, np.ones(np.shape(walls))), cmap=ListedColormap(["black"]),
              vmin=0, vmax=1, extent=extent, interpolation="nearest")
    for d in defects:
        ax.plot(d["x_nm"], d["y_nm"], marker="P" if d["winding"] > 0 else "X", ms=9, mec="black",
                color="#ffe14d" if d["winding"] > 0 else "#4dd2ff")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    ax.set_title(title)
    return _png(fig)


def histogram_figure(values, *, xlabel, title, bins="auto"):
    """A histogram of a measured quantity (e.g. domain areas in nm^2).

    Examples
    --------
    >>> histogram_figure([1.0, 2.0, 2.5], xlabel="area (nm$^2$)", title="t")[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(5.0, 3.4))
    values = np.asarray(values, float)
    values = values[np.isfinite(values)]
    if values.size:
        ax.hist(values, bins=bins if values.size > 3 else max(values.size, 1), color="#4a7bb7", edgecolor="white")
    ax.set_xlabel(xlabel)
    ax.set_ylabel("count")
    ax.set_title(title)
    return _png(fig)


def curves_figure(curves, *, xlabel, ylabel, title, lines=True, reference=()):
    """Several labelled curves with optional error bars: ``curves`` is a list of (label, x, y, yerr or None).

    ``lines=False`` draws markers only; ``reference`` values are drawn as dotted horizontal lines.

    Examples
    --------
    >>> curves_figure([("a", [0, 1], [1, 2], None)], xlabel="V", ylabel="A", title="t")[:4] == b"\\x89PNG"
    True
    """
    plt = _pyplot()
    fig, ax = plt.subplots(figsize=(5.6, 3.8))
    def numbers(values):
        return np.array([np.nan if v is None else v for v in values], dtype=float)

    style = "o-" if lines else "o"
    for value in reference:
        ax.axhline(value, color="0.6", lw=0.8, ls=":")
    for label, x, y, yerr in curves:
        x, y = numbers(x), numbers(y)
        if yerr is None:
            ax.plot(x, y, style, ms=3, label=label)
        else:
            ax.errorbar(x, y, yerr=numbers(yerr), fmt=style, ms=3, capsize=2, label=label)
    ax.set_xlabel(xlabel)
    ax.set_ylabel(ylabel)
    ax.set_title(title)
    if curves:
        ax.legend(fontsize=7, ncol=2)
    return _png(fig)


def _format(value):
    if isinstance(value, float):
        if not math.isfinite(value):
            return "–"
        return f"{value:.4g}"
    return html.escape(str(value))


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
