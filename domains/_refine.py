"""From the decimated analysis grid back to the input grid, and the chunked measurements of a lazy run.

The order, domains, walls and defects are computed on samples every ``step`` input pixels
(:mod:`domains._grid`, docs/methods.md §1). This module brings the labels back to the input grid with
the walls refined at full resolution (:func:`to_input_grid`), confirms windings on densely interpolated
loops (:func:`loop_confirms`), and measures lazy labels from per-chunk partial sums
(:func:`domain_table_chunked`).
"""

from __future__ import annotations

import math

import numpy as np

from ._scan import pixel_size_pair

__all__ = ["TILE_PX", "WindowedScore", "domain_table_chunked", "loop_confirms", "order_score_at", "tile_chunks", "to_input_grid",
           "trusted_on_grid"]


def loop_confirms(field, defect, pixel, threshold):
    """Whether a winding found on the decimated grid holds on a densely sampled loop.

    On samples sigma/2 apart a loop of radius 2 sigma has few points, and the phase step across a wall
    between two of them can exceed pi and count a false winding. The field is band-limited, so it is
    interpolated (cubic spline) at 16 points per sample of the loop's radius (at least 64); the winding
    must be the same and |field| above ``threshold`` all along, as the rule on the grid asks.
    """
    from scipy import ndimage

    dy, dx = pixel
    radius = defect["loop_radius_nm"]
    n = max(64, int(16 * math.ceil(radius / min(dy, dx))))
    t = np.linspace(0, 2 * math.pi, n, endpoint=False)
    rows = (defect["y_nm"] + radius * np.sin(t)) / dy
    cols = (defect["x_nm"] + radius * np.cos(t)) / dx
    values = (ndimage.map_coordinates(field.real, [rows, cols], order=3, mode="nearest")
              + 1j * ndimage.map_coordinates(field.imag, [rows, cols], order=3, mode="nearest"))
    steps = np.angle(np.roll(values, -1) * np.conj(values))
    winding = int(np.rint(steps.sum() / (2 * math.pi)))
    return winding == defect["winding"] and bool(np.abs(values).min() >= threshold)


#: Side of the tiles (input pixels, aligned on the frame) in which labels are brought back to the input
#: grid (:func:`to_input_grid`); the input-grid maps of a lazy run are chunked so.
TILE_PX = 2048


def tile_chunks(shape, tile=None):
    """Chunks of the input grid in tiles of :data:`TILE_PX` aligned on the frame."""
    tile = tile or TILE_PX
    return tuple(tuple(min(tile, n - a) for a in range(0, n, tile)) for n in shape)


def to_input_grid(grid_, seg, score_at, confidence, lazy=False):
    """Labels and one-pixel walls on the input grid from a segmentation on the decimated grid.

    Away from walls every input pixel takes the domain of its nearest sample. Near walls (within one
    sample of a change of domain) the boundary is refined at full resolution: the order's fields are
    interpolated there from the samples (they are band-limited), ``score_at(rows, cols)`` gives the
    state's score at those pixels, and the domains grow into the band by watershed on -score, as the
    segmentation does on its own grid. Walls are then drawn one input pixel thin; pixels whose sample
    carries no domain stay 0.

    ``score_at(rows, cols)`` returns the score and the state at those input pixels (see
    :func:`order_score_at`). Inside the band the seeds are, as in :func:`domains.segment.segment_states`,
    the pixels confident of their domain's own state (score >= ``confidence``), so the floods start from
    smooth contours and meet on the valley of the score, not on the staircase of the samples.

    The work is done tile by tile (:data:`TILE_PX`, aligned on the frame), each tile from a window
    :func:`_band_halo` input pixels wider on every side, so that memory stays a few tiles whatever
    the frame; the tiles are the same in memory and, with ``lazy``, as the chunks of the dask arrays
    returned then, so both give the same labels. Each window reads only its own part of the coarse
    segmentation (its samples and two more on every side, for the band), so ``seg.labels``,
    ``seg.grown`` and ``seg.walls`` may be dask arrays (any chunks): a window slices and computes its
    part, never the whole coarse grid. (A flood can follow a wall further than the halo, so a frame
    larger than one tile may differ from a single whole-frame flood at a few pixels by the wall; the
    ids come from the decimated grid and are the same in every tile.)

    Parameters
    ----------
    grid_ : domains._grid.Grid
        The input grid and its decimated grid.
    seg : domains.segment.Segmentation
        The segmentation on the decimated grid (``labels``, ``grown``, ``walls``: numpy or dask arrays;
        ``state``: label -> state index).
    score_at : callable
        ``score_at(rows, cols) -> (score, state)`` at input pixels (int arrays).
    confidence : float
        Score a band pixel needs to seed its own domain's flood.
    lazy : bool
        Return dask arrays chunked in tiles, computed tile by tile when read.

    Returns
    -------
    labels : (row, col) int32 ndarray or dask array
        Domain ids (0: no domain, and on the walls).
    walls : (row, col) bool ndarray or dask array
        One input pixel thin walls.

    References
    ----------
    .. [1] L. Vincent and P. Soille, IEEE Trans. Pattern Anal. Mach. Intell. 13, 583 (1991):
       watershed by immersion. doi:10.1109/34.87344

    Examples
    --------
    >>> from types import SimpleNamespace
    >>> from domains._grid import Grid
    >>> grown = np.ones((4, 4), np.int32); grown[:, 2:] = 2
    >>> seg = SimpleNamespace(labels=grown, grown=grown, walls=np.zeros((4, 4), bool), state={1: 0, 2: 1})
    >>> def score_at(rows, cols):   # state 0 left of column 6.5, state 1 right of it
    ...     return np.abs(cols - 6.5) / 8, (cols > 6.5).astype(int)
    >>> labels, walls = to_input_grid(Grid((16, 16), (0.1, 0.1), 4), seg, score_at, 0.1)
    >>> np.flatnonzero(walls[0]).tolist(), labels[0, [0, 6, 8, 15]].tolist()
    ([6], [1, 0, 2, 2])
    """
    chunks = tile_chunks(grid_.shape)
    if grid_.step == 1:
        labels, walls = seg.labels, seg.walls
        if not lazy:
            return np.asarray(labels), np.asarray(walls)
        import dask.array as da

        def as_tiles(x):
            return x.rechunk(chunks) if isinstance(x, da.Array) else da.from_array(x, chunks=chunks)

        return as_tiles(labels), as_tiles(walls)
    own = _own_states(seg.state)
    halo = _band_halo(grid_.step)
    ny, nx = grid_.shape
    rows, cols = (np.cumsum((0,) + c) for c in chunks)
    tiles = [[(r0, r1, c0, c1) for c0, c1 in zip(cols[:-1], cols[1:])] for r0, r1 in zip(rows[:-1], rows[1:])]

    def window(r0, r1, c0, c1):
        # The tile's window (input pixels) and the coarse slices it reads.
        a, b, c, d = max(0, r0 - halo), min(ny, r1 + halo), max(0, c0 - halo), min(nx, c1 + halo)
        return (a, b, c, d), (_coarse_span(grid_, 0, a, b), _coarse_span(grid_, 1, c, d))

    windowed = isinstance(score_at, WindowedScore)
    nyc, nxc = grid_.coarse_shape

    def code_of(coarse, r0, r1, c0, c1, fields=None):
        # Labels (walls as -1) of input rows r0:r1 and columns c0:c1 from their window; with a windowed
        # score, ``fields`` is (i_off, j_off, the fields' samples around the window).
        (a, b, c, d), spans = window(r0, r1, c0, c1)
        scorer = score_at if fields is None else score_at.local(fields[2], fields[0], fields[1])
        code = _refine_window(grid_, *coarse, spans, own, scorer, confidence, a, b, c, d)
        return code[r0 - a:r1 - a, c0 - c:c1 - c]

    def slab(spans):
        (i0, i1), (j0, j1) = spans
        return tuple(x[i0:i1, j0:j1] for x in (seg.grown, seg.labels, seg.walls))

    def fields_slab(spans):
        # The samples of the fields a tile's spline needs: its coarse window and SPLINE_MARGIN more.
        (i0, i1), (j0, j1) = spans
        a0, b0 = max(0, i0 - SPLINE_MARGIN), max(0, j0 - SPLINE_MARGIN)
        return a0, b0, score_at.fields[:, a0:min(nyc, i1 + SPLINE_MARGIN), b0:min(nxc, j1 + SPLINE_MARGIN)]

    if not lazy:
        def run(r0, r1, c0, c1):
            spans = window(r0, r1, c0, c1)[1]
            fields = None
            if windowed:
                i_off, j_off, part = fields_slab(spans)
                fields = (i_off, j_off, np.asarray(part))
            return code_of(_computed(slab(spans)), r0, r1, c0, c1, fields)

        if len(tiles) == 1 and len(tiles[0]) == 1:
            code = run(0, ny, 0, nx)  # one tile: no second frame-sized copy
        else:
            code = np.empty(grid_.shape, np.int32)
            for row in tiles:
                for r0, r1, c0, c1 in row:
                    code[r0:r1, c0:c1] = run(r0, r1, c0, c1)
        walls = code < 0
        return np.maximum(code, 0, out=code), walls
    import dask
    import dask.array as da

    def lazy_tile(r0, r1, c0, c1):
        # The coarse slices are arguments of the task: a dask coarse array is computed there, slice only.
        spans = window(r0, r1, c0, c1)[1]
        if windowed:
            i_off, j_off, part = fields_slab(spans)
            task = dask.delayed(lambda g, l, w, f: code_of((np.asarray(g), np.asarray(l), np.asarray(w)), r0, r1, c0,
                                                           c1, (i_off, j_off, np.asarray(f))), pure=False)
            out = task(*slab(spans), part)
        else:
            task = dask.delayed(lambda g, l, w: code_of((np.asarray(g), np.asarray(l), np.asarray(w)), r0, r1, c0, c1),
                                pure=False)
            out = task(*slab(spans))
        return da.from_delayed(out, shape=(r1 - r0, c1 - c0), dtype=np.int32, meta=np.empty((0, 0), np.int32))

    code = da.block([[lazy_tile(*t) for t in row] for row in tiles])
    return da.maximum(code, 0), code < 0


#: Samples of edge padding before the spline prefilter in :func:`order_score_at`: what
#: ``scipy.ndimage.map_coordinates(..., mode="nearest")`` pads itself, so the values are the same.
SPLINE_PAD = 12


def order_score_at(fields, step, *, groups, coefficients=None, threshold=None, anisotropy_threshold=0.5,
                   family_names=None, offsets_rad=None, bragg_residual=None):
    """``score_at(rows, cols)`` for :func:`to_input_grid`: the order's state and score at input pixels.

    The lock-in fields are band-limited, so their cubic spline through the samples gives them between
    samples; the spline's coefficients (the prefilter of ``scipy.ndimage.map_coordinates``, on the
    samples padded by their edge values) are computed once here, and each call only evaluates them at
    its pixels, with the values ``map_coordinates(field, ..., order=3, mode="nearest")`` gives. The
    state and score are then :func:`domains.order.family_order`'s with the run's offsets.

    Parameters
    ----------
    fields : (k, row, col) complex ndarray or dask array
        The lock-in fields on the decimated grid (sample (i, j) on input pixel (step i, step j)). Dask
        fields are never computed whole: the result is then a :class:`WindowedScore`, whose spline is
        built per tile of :func:`to_input_grid` from the tile's samples and :data:`SPLINE_MARGIN` more.
    step : int
        Decimation step in input pixels.
    groups, coefficients, threshold, anisotropy_threshold, family_names, offsets_rad
        As for :func:`domains.order.family_order` (``offsets_rad``: the offsets the run found).
    bragg_residual : indexable (2 or 3, row, col), optional
        The residual Bragg phase on the input grid (:attr:`domains.drift.DriftResult.residual_phase_points`),
        read over the bounding box of each call's pixels.

    Returns
    -------
    callable or WindowedScore
        ``score_at(rows, cols) -> (score, state)``, 1-D arrays like ``rows`` (for dask fields, per window).

    References
    ----------
    .. [1] M. Unser, IEEE Signal Process. Mag. 16(6), 22 (1999): splines, prefilter and evaluation.
       doi:10.1109/79.799930

    Examples
    --------
    >>> a = np.exp(1j * np.zeros((1, 8, 8)))     # one stripe component, variant m=(0,0) everywhere
    >>> score_at = order_score_at(a, 4, groups=[[0]], coefficients=[[0.5, 0.0]], offsets_rad=[np.zeros(1)])
    >>> score, state = score_at(np.array([5, 17]), np.array([9, 30]))
    >>> np.round(score, 6).tolist(), state.tolist()
    ([1.0, 1.0], [0, 0])
    """
    from scipy import ndimage

    from . import order

    def make(part_fields, i_off, j_off):
        # The spline of the fields on samples i_off.., j_off.. (the whole grid: 0, 0), evaluated at input pixels.
        # Each part's spline coefficients once, as map_coordinates would compute them on every call.
        splines = [ndimage.spline_filter(np.pad(part, SPLINE_PAD, mode="edge"), 3, output=np.float64, mode="nearest")
                   for c in part_fields for part in (c.real, c.imag)]

        def evaluate(spline, where):
            return ndimage.map_coordinates(spline, where, order=3, mode="nearest", prefilter=False)

        def score_at(rows, cols):
            where = np.array([rows / step - i_off, cols / step - j_off]) + SPLINE_PAD
            a_at = np.stack([evaluate(splines[2 * j], where) + 1j * evaluate(splines[2 * j + 1], where)
                             for j in range(len(part_fields))])[:, None, :]
            bp = None
            if bragg_residual is not None:
                # The residual Bragg phase over the pixels' bounding box (a separable evaluation of its
                # spline: matrix products), then at the pixels; scattered-point evaluation costs 30x more.
                r0, c0 = int(rows.min()), int(cols.min())
                box = bragg_residual[:, r0:int(rows.max()) + 1, c0:int(cols.max()) + 1]
                bp = np.nan_to_num(box[:, rows - r0, cols - c0])[:, None, :]
            at = order.family_order(a_at, groups, coefficients=coefficients, bragg_phase=bp, threshold=threshold,
                                    anisotropy_threshold=anisotropy_threshold, family_names=family_names,
                                    offsets_rad=offsets_rad)
            return at.score[0], at.state[0]

        return score_at

    if hasattr(fields, "dask"):
        # Dask fields (a lazy run): never in memory whole; each tile of to_input_grid builds the spline of its
        # own window of samples (WindowedScore.local).
        return WindowedScore(fields, make)
    return make(np.asarray(fields), 0, 0)


#: Samples of fields beyond a tile's own coarse window in :meth:`WindowedScore.local`: the cubic spline's
#: prefilter is recursive with pole 2 - sqrt(3) = -0.268, so what lies 16 samples away weighs at most
#: 0.268^16 = 7e-10 of a sample (Unser 1999): the window's spline equals the whole grid's to float32 precision.
SPLINE_MARGIN = 16


class WindowedScore:
    """:func:`order_score_at` of dask fields: ``local(window, i_off, j_off)`` gives the ``score_at`` of a window
    of samples starting at sample (i_off, j_off), which :func:`to_input_grid` builds per tile.

    Examples
    --------
    >>> import dask.array as da
    >>> a = da.from_array(np.exp(1j * np.zeros((1, 8, 8))), chunks=(1, 4, 4))
    >>> ws = order_score_at(a, 4, groups=[[0]], coefficients=[[0.5, 0.0]], offsets_rad=[np.zeros(1)])
    >>> score, state = ws.local(np.asarray(a[:, 2:8, 3:8]), 2, 3)(np.array([9, 17]), np.array([13, 30]))
    >>> np.round(score, 6).tolist(), state.tolist()
    ([1.0, 1.0], [0, 0])
    """

    def __init__(self, fields, make):
        self.fields, self._make = fields, make

    def local(self, window, i_off, j_off):
        return self._make(np.asarray(window), int(i_off), int(j_off))

    def __call__(self, rows, cols):
        raise TypeError("a windowed score is evaluated through local(window, i_off, j_off) (domains._refine.to_input_grid)")


def _computed(arrays):
    """numpy arrays from numpy or dask arrays (dask ones computed together)."""
    if any(hasattr(x, "dask") for x in arrays):
        import dask

        arrays = dask.compute(*arrays)
    return tuple(np.asarray(x) for x in arrays)


def _own_states(state):
    """own[label]: the state index of each domain label (-2 for a label without one, and for every
    label beyond the largest, which :func:`_refine_window` clips to the last entry)."""
    own = np.full(max(state, default=0) + 2, -2, np.int64)
    for label, value in state.items():
        own[label] = value
    return own


#: Coarse samples read beyond a window on every side: the band is where the 3 x 3 minimum and maximum of
#: the grown labels differ, dilated by one sample; two samples more make it exact at the window's edge.
BAND_MARGIN_SAMPLES = 2


def _coarse_span(grid_, axis, start, stop):
    """The coarse samples [i0, i1) that input pixels [start, stop) along ``axis`` read, with the band's margin."""
    n = grid_.coarse_shape[axis]
    near = grid_.nearest(axis, start, stop)
    return max(0, int(near[0]) - BAND_MARGIN_SAMPLES), min(n, int(near[-1]) + 1 + BAND_MARGIN_SAMPLES)


#: Samples of context around a tile for the band refinement (:func:`_band_halo`).
HALO_SAMPLES = 4


def _band_halo(step):
    """Input pixels of context around a tile for the band refinement of :func:`to_input_grid`.

    The band reaches two samples (2 step pixels) from a change of domain and the floods inside it
    start from its ring of labelled neighbours and from the confident seeds, all within the band's
    width of the pixels they reach, so :data:`HALO_SAMPLES` samples hold them, plus the one pixel thin
    walls need. Measured against one whole-frame flood (the labels of a single tile) on the scenes of
    :func:`domains.synth.real_scene` (seed 0) cut in small tiles: at 4 samples no pixel differs
    (discommensurate, √13, √3, 2×1 stripes at 1024^2 in 256-px tiles and at 2048^2 in 512-px tiles;
    the √13 benchmark scene at 4096^2 in 2048-px tiles against 32 samples),
    at 1 sample 3 pixels (discommensurate, 128-px tiles), with no halo 85 (√13). A flood can still
    follow a wall further where the score ties exactly (a plateau, or pixels mirrored across a
    straight wall): there the order of arrival decides, and a wall can move by a pixel near a tile's edge.
    """
    return HALO_SAMPLES * int(step) + 2


#: Band pixels scored per call of ``score_at`` in :func:`_refine_window`: the score of one pixel
#: holds every component's fields and phases for a moment (a few hundred bytes for a √13 star), so
#: the pieces are kept to a few tens of MiB.
SCORE_PIECE_PX = 2**15


def _refine_window(grid_, grown_s, labels_s, walls_s, spans, own, score_at, confidence, r0, r1, c0, c1):
    """The input-grid labels of rows r0:r1, columns c0:c1 (walls as -1): see :func:`to_input_grid`.

    ``grown_s``, ``labels_s`` and ``walls_s`` are the coarse samples ``spans`` ((i0, i1), (j0, j1)) of
    the segmentation, which cover the window and :data:`BAND_MARGIN_SAMPLES` more on every side. Only
    the band is flooded: every other pixel of the window is already labelled, so the watershed runs on
    the band's bounding box, on the band and its ring of labelled neighbours (the pixels the floods start
    from, besides the confident seeds inside the band). The labels are built in one int32 array, changed
    in place.
    """
    from scipy import ndimage
    from skimage.segmentation import watershed

    from .segment import thin_walls

    (i0, _), (j0, _) = spans
    big = np.iinfo(np.int32).max
    footprint = np.ones((3, 3), bool)
    # The band on the coarse samples, as on the whole coarse grid: the slab's edge is either the frame's
    # edge (the filters see what they see on the whole grid) or two samples beyond the window.
    lo = ndimage.minimum_filter(np.where(grown_s > 0, grown_s, big), footprint=footprint)
    hi = ndimage.maximum_filter(grown_s, footprint=footprint)
    band_s = ndimage.binary_dilation((grown_s > 0) & (lo != hi) & (lo < big), footprint)
    del lo, hi
    rows_i, cols_i = grid_.nearest(0, r0, r1) - i0, grid_.nearest(1, c0, c1) - j0
    code = grown_s[rows_i[:, None], cols_i[None, :]].astype(np.int32, copy=False)
    band = band_s[rows_i[:, None], cols_i[None, :]]
    band &= code > 0
    hit_r, hit_c = np.flatnonzero(band.any(axis=1)), np.flatnonzero(band.any(axis=0))
    if hit_r.size:
        # The band's bounding box and one pixel more (its ring of neighbours).
        a, b = max(0, int(hit_r[0]) - 1), min(band.shape[0], int(hit_r[-1]) + 2)
        c, d = max(0, int(hit_c[0]) - 1), min(band.shape[1], int(hit_c[-1]) + 2)
        grown, inside = code[a:b, c:d], band[a:b, c:d]  # views: the flood writes into ``code``
        reach = ndimage.binary_dilation(inside, footprint) & (grown > 0)
        markers = np.where(reach & ~inside, grown, 0).astype(np.int32, copy=False)
        elevation = np.zeros(grown.shape, np.float32)
        rows, cols = np.nonzero(inside)
        last = len(own) - 1
        for i in range(0, rows.size, SCORE_PIECE_PX):
            rr, cc = rows[i:i + SCORE_PIECE_PX], cols[i:i + SCORE_PIECE_PX]
            score, state = score_at(rr + (r0 + a), cc + (c0 + c))
            score = np.nan_to_num(np.asarray(score, float), nan=0.0, neginf=0.0)
            elevation[rr, cc] = -score
            here = grown[rr, cc]
            core = (score >= confidence) & (np.asarray(state) == own[np.minimum(here, last)])
            markers[rr[core], cc[core]] = here[core]
        del rows, cols
        flooded = watershed(elevation, markers=markers, mask=reach)
        del elevation, markers, reach
        grown[inside] = flooded[inside]
        del flooded
    walls = thin_walls(code)
    has = (labels_s > 0) | walls_s
    code[~has[rows_i[:, None], cols_i[None, :]]] = 0
    code[walls] = -1
    return code


def trusted_on_grid(grid_, sigma_nm, pixel, mask):
    """The trusted samples of the decimated grid and the trusted fraction of the input grid.

    Without a mask, :func:`domains.trusted_mask` is the product of a row and a column condition (the
    nearest untrusted pixel is the padding ring, straight above, below or beside): computed so, on the
    samples only. With a mask, the same answer from distance transforms run only next to the masked
    pixels (:func:`domains._lockin._trusted`): one full-size boolean array, no full-size distances.
    """
    ny, nx = grid_.shape
    if mask is not None:
        from ._lockin import _trusted

        trusted = _trusted(np.asarray(mask, bool), (ny, nx), sigma_nm, pixel)
        return grid_.sample(trusted), float(trusted.mean())
    dy, dx = pixel
    limit, half = 2.5 * float(sigma_nm), 0.5 * min(dy, dx)
    rows_ok = np.minimum(np.arange(1, ny + 1), np.arange(ny, 0, -1)) * dy - half >= limit
    cols_ok = np.minimum(np.arange(1, nx + 1), np.arange(nx, 0, -1)) * dx - half >= limit
    fraction = float(rows_ok.mean() * cols_ok.mean())
    return rows_ok[::grid_.step, None] & cols_ok[None, ::grid_.step], fraction


def domain_table_chunked(labels, walls, *, pixel_size_nm, state_names, amplitude, fields, sample_labels, every):
    """:func:`domains.measure.domain_table` of lazy labels from per-chunk partial sums (pixel counts and
    coordinate sums per label, combined exactly), and every ``every``-th pixel of the labels and walls
    (for the figure), in one pass over the labels.
    """
    import dask

    dy, dx = pixel_size_pair(pixel_size_nm)
    ny, nx = labels.shape
    # the largest sample label (dask's max takes no ``initial``)
    top = int(sample_labels.max()) if hasattr(sample_labels, "dask") else int(np.max(sample_labels, initial=0))
    n = max(top, 0) + 1
    starts = [np.cumsum((0,) + c[:-1]) for c in labels.chunks]

    def sums(block, r0, c0):
        block = np.asarray(block)
        flat = block.ravel()
        r, c = np.divmod(np.arange(flat.size), block.shape[1])
        size = max(n, int(flat.max(initial=0)) + 1)
        out = np.zeros((3, size))
        out[0] = np.bincount(flat, minlength=size)
        out[1] = np.bincount(flat, weights=r + r0, minlength=size)
        out[2] = np.bincount(flat, weights=c + c0, minlength=size)
        return out

    blocks = labels.to_delayed()
    parts = [dask.delayed(sums)(blocks[i, j], int(starts[0][i]), int(starts[1][j]))
             for i in range(blocks.shape[0]) for j in range(blocks.shape[1])]
    edges = [labels[0, :], labels[-1, :], labels[:, 0], labels[:, -1]]
    parts, edges, shown_labels, shown_walls = dask.compute(parts, edges, labels[::every, ::every],
                                                           walls[::every, ::every])
    size = max(p.shape[1] for p in parts)
    total = np.zeros((3, size))
    for p in parts:
        total[:, :p.shape[1]] += p
    touching = set(int(v) for e in edges for v in np.unique(e))
    # Amplitudes and phases from the samples, as measure.domain_table reads them.
    from .measure import _label_means

    m = max(size, top + 1)
    mean_amp, phases = _label_means(sample_labels, m, amplitude, fields)
    rows = []
    for lab in range(1, size):
        count = int(total[0, lab])
        if count == 0:
            continue
        rows.append({
            "domain": lab,
            "state": (state_names or {}).get(lab, ""),
            "area_nm2": float(count * dx * dy),
            "equivalent_diameter_nm": float(2 * math.sqrt(count * dx * dy / math.pi)),
            "centroid_x_nm": float(total[2, lab] / count * dx),
            "centroid_y_nm": float(total[1, lab] / count * dy),
            "mean_amplitude": float(mean_amp[lab]),
            "mean_phase_deg": ";".join(f"{p[lab]:.1f}" for p in phases),
            "touches_edge": lab in touching,
            "n_pixels": count,
        })
    return rows, shown_labels, shown_walls
