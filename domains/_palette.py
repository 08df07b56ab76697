"""The colours shared by the report and the viewer, and the colouring of domain labels.

One place for "the same colours for the same things": the report
(:mod:`domains.report`) and the napari plugin both import from here. No
matplotlib, Qt or napari import: colours are hex strings and RGBA tuples.

- Domains: a qualitative palette; neighbouring domains get different colours
  through a greedy colouring of the label adjacency graph
  (:func:`label_colours`).
- Walls: black. Phase defects: red for winding +1, blue for winding -1.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "DEFECT_COLOURS",
    "DEFECT_LABELS",
    "DEFECT_MARKERS",
    "DOMAIN_PALETTE",
    "WALL_COLOUR",
    "greedy_colouring",
    "label_adjacency",
    "label_colours",
    "rgba",
]

#: Qualitative palette of domain colours: twelve hues of similar weight, chosen to be told
#: apart over a grey or warm topograph (hex, no transparency).
DOMAIN_PALETTE = (
    "#3b75d9",  # blue
    "#f28e1c",  # orange
    "#2ca05a",  # green
    "#d63a8c",  # magenta
    "#8c5fd3",  # violet
    "#17b5c4",  # cyan
    "#c9b01a",  # mustard
    "#a0522d",  # brown
    "#7fd13b",  # lime
    "#e8584f",  # coral
    "#5a6fa8",  # slate
    "#b08fe0",  # lilac
)

#: Domain walls (one pixel thin) in both report and viewer.
WALL_COLOUR = "#000000"

#: Phase defects by the sign of their winding number.
DEFECT_COLOURS = {1: "#e0201b", -1: "#1f5bd6"}

#: Legend words of the defects.
DEFECT_LABELS = {1: "+1 winding", -1: "\u22121 winding"}

#: Matplotlib marker of each winding sign (filled plus, filled cross).
DEFECT_MARKERS = {1: "P", -1: "X"}


def rgba(colour, alpha: float = 1.0) -> tuple[float, float, float, float]:
    """An RGBA tuple in [0, 1] from a hex colour ``#rrggbb``.

    Examples
    --------
    >>> rgba("#ff8000", 0.5)
    (1.0, 0.5019607843137255, 0.0, 0.5)
    """
    text = colour.lstrip("#")
    r, g, b = (int(text[i: i + 2], 16) / 255 for i in (0, 2, 4))
    return (r, g, b, float(alpha))


def label_adjacency(labels) -> dict[int, set[int]]:
    """Which domain labels touch, across walls and unassigned pixels (label 0).

    Every unlabelled pixel is first given the label of its nearest labelled
    pixel (chessboard distance transform: four times faster than the Euclidean
    one at 2048², and for thin walls the same neighbours), so two domains
    separated by a wall count as neighbours; then labels meeting across a pixel
    edge (4-connectivity) are neighbours.

    Parameters
    ----------
    labels : (row, col) int array
        Domain labels; 0 (and negative values) are walls or unassigned pixels.

    Returns
    -------
    dict
        ``label -> set of neighbouring labels``, one entry per positive label.

    Examples
    --------
    >>> lab = np.array([[1, 1, 0, 2, 2], [1, 1, 0, 2, 2], [3, 3, 3, 3, 3]])
    >>> {k: sorted(v) for k, v in label_adjacency(lab).items()}
    {1: [2, 3], 2: [1, 3], 3: [1, 2]}
    """
    labels = np.asarray(labels)
    if labels.ndim != 2:
        raise ValueError(f"labels: expected a 2-D label image, got shape {labels.shape}")
    top = int(labels.max()) if labels.size else 0
    # bincount is a few times faster than unique on a large frame with few labels.
    present = (np.flatnonzero(np.bincount(labels[labels > 0].ravel(), minlength=top + 1))
               if 0 < top <= 4 * labels.size else np.unique(labels[labels > 0]))
    graph: dict[int, set[int]] = {int(v): set() for v in present}
    if present.size < 2:
        return graph
    filled = labels
    if np.any(labels <= 0):
        from scipy import ndimage

        rows, cols = ndimage.distance_transform_cdt(labels <= 0, metric="chessboard", return_distances=False,
                                                    return_indices=True)
        filled = labels[rows, cols]
    for a, b in ((filled[:, :-1], filled[:, 1:]), (filled[:-1, :], filled[1:, :])):
        cut = a != b
        if not cut.any():
            continue
        # Each pair as one integer a * (top + 1) + b: a 1-D unique is much faster than unique(axis=0).
        codes = np.unique(a[cut].astype(np.int64) * (top + 1) + b[cut])
        for p, q in zip(*np.divmod(codes, top + 1)):
            graph[int(p)].add(int(q))
            graph[int(q)].add(int(p))
    return graph


def greedy_colouring(graph: dict[int, set[int]]) -> dict[int, int]:
    """A colour index per node, different for every pair of neighbours (greedy, largest degree first).

    Parameters
    ----------
    graph : dict
        ``node -> set of neighbours`` (symmetric).

    Returns
    -------
    dict
        ``node -> colour index`` (0, 1, ...): the smallest index that no
        already-coloured neighbour has. At most (largest degree + 1) indices.

    References
    ----------
    D. J. A. Welsh and M. B. Powell, "An upper bound for the chromatic number of a graph and its
    application to timetabling problems", The Computer Journal 10, 85 (1967).

    Examples
    --------
    >>> greedy_colouring({1: {2, 3}, 2: {1, 3}, 3: {1, 2}, 4: set()})
    {1: 0, 2: 1, 3: 2, 4: 0}
    """
    order = sorted(graph, key=lambda n: (-len(graph[n]), n))
    colour: dict[int, int] = {}
    for node in order:
        taken = {colour[m] for m in graph[node] if m in colour}
        index = 0
        while index in taken:
            index += 1
        colour[node] = index
    return {n: colour[n] for n in sorted(colour)}


def label_colours(labels, palette=DOMAIN_PALETTE) -> dict[int, str]:
    """A palette colour per domain label, neighbours always different when the palette is long enough.

    Parameters
    ----------
    labels : (row, col) int array
        Domain labels (0 = wall or unassigned, not coloured).
    palette : sequence of str
        Hex colours; the default :data:`DOMAIN_PALETTE` has twelve, more than a
        greedy colouring of a map of domains needs in practice.

    Returns
    -------
    dict
        ``label -> hex colour``. If the colouring needs more colours than the
        palette has, the palette repeats (then two neighbours may share one).

    Examples
    --------
    >>> lab = np.array([[1, 1, 2, 2], [3, 3, 3, 3]])
    >>> cols = label_colours(lab)
    >>> len({cols[1], cols[2], cols[3]})
    3
    """
    colouring = greedy_colouring(label_adjacency(labels))
    return {label: palette[index % len(palette)] for label, index in colouring.items()}
