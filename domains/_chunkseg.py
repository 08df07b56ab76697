"""Domains, walls and phase defects of a chunked (dask) grid, equal to the in-memory segmentation.

:func:`segment_states_chunked` and :func:`phase_defects_chunked` compute what
:func:`domains.segment.segment_states` and :func:`domains.segment.phase_defects` compute, one chunk at
a time: only one chunk (with its overlap) and tables of a few numbers per connected region are held,
never the whole grid. Measured: an 8192^2 grid (int8 states, float32 confidence, read from zarr, results
written to zarr, two threads) peaked at 613 MiB resident with chunks of 512 samples and 777 MiB with
1024, imports (130 MiB) included.
"""

from __future__ import annotations

import math

import numpy as np
from skimage.measure import label as label_same_value
from skimage.segmentation import watershed

from ._errors import InputError
from ._scan import pixel_size_pair
from .segment import (Segmentation, _disc_dilation, _disc_erosion, _disc_fraction, _loop_geometry, _loop_test,
                      _merge_windings, _plaquette_windings, thin_walls)

__all__ = ["default_halo_px", "phase_defects_chunked", "segment_states_chunked"]

#: Smallest watershed halo (samples); see :func:`default_halo_px` for what was measured.
MIN_HALO_PX = 16


def default_halo_px(bridge_radius_px):
    """The watershed halo used when none is given: four bridge radii, at least ``MIN_HALO_PX`` samples.

    A chunk's watershed sees its chunk and this many samples around it; a pixel whose flood path from
    its seed is longer than that may be claimed differently than in one watershed of the whole grid.
    Measured on the order fields the pipeline computes for five synthetic scenes of 1024^2 input
    pixels (3x3 CDW, discommensurate, sqrt13, sqrt3, 2x1 stripes): the smallest halo with no
    differing sample was 1-4 samples on the default grid (103^2-512^2 samples, bridge radius 4-6,
    chunks of 32-384) and 4-32 samples on the full-resolution grid (1024^2, bridge radius 11-43,
    chunks of 256-512). Fields whose uncertain zones are much wider than the bridge (states of
    smoothed noise, correlation length 24 samples, bridge radius 4) needed 64 samples.

    Parameters
    ----------
    bridge_radius_px : int
        Radius of the closing disc (samples), 0 without a bridge.

    Returns
    -------
    int
        Halo in samples.

    References
    ----------
    .. [1] Measured here (no published source): domains.synth scenes through domains.pipeline.

    Examples
    --------
    >>> default_halo_px(0), default_halo_px(8)
    (16, 32)
    """
    return max(MIN_HALO_PX, 4 * int(bridge_radius_px))


def _as_dask(array, chunks):
    """``array`` as a dask array with ``chunks`` (a numpy array is wrapped, not copied)."""
    import dask.array as da

    if isinstance(array, da.Array):
        return array.rechunk(chunks) if array.chunks != chunks else array
    return da.from_array(np.asarray(array), chunks=chunks)


def _classes(state, confidence, ordered, trusted=None, *, threshold):
    """The state of each core pixel, -1 elsewhere (int32): cores as :func:`segment.segment_states` makes them."""
    core = state >= 0
    core &= ordered.astype(bool, copy=False)
    core &= confidence >= np.float64(threshold)   # NaN compares False, as -inf does in memory
    if trusted is not None:
        core &= trusted.astype(bool, copy=False)
    return np.where(core, state, -1).astype(np.int32, copy=False)


def _local_labels(classes):
    """Connected regions of one class (8-connected), numbered in raster order of their first pixel (int32)."""
    labels = label_same_value(classes, background=-1, connectivity=2).astype(np.int32, copy=False)
    return labels


def _block_table(classes, origin, n_cols):
    """Per-region table of one chunk: state, size, global raster index of the first pixel; the four edge strips."""
    labels = _local_labels(classes)
    flat = labels.ravel()
    count = int(flat.max(initial=0))
    # Regions are numbered in raster order of their first pixel (as scipy's and skimage's labelling do),
    # so the first pixels are where the running maximum rises.
    rises = np.flatnonzero(flat > np.maximum.accumulate(np.r_[np.int32(0), flat[:-1]]))
    if rises.size != count or not np.array_equal(flat[rises], np.arange(1, count + 1)):
        _, rises = np.unique(flat, return_index=True)
        rises = rises[1:] if flat[rises[0]] == 0 else rises
    rows, cols = np.divmod(rises, classes.shape[1])
    first = (rows + origin[0]).astype(np.int64) * n_cols + (cols + origin[1])
    sizes = np.bincount(flat, minlength=count + 1)[1:].astype(np.int64)
    states = classes.ravel()[rises].astype(np.int64)
    edges = (labels[0].copy(), labels[-1].copy(), labels[:, 0].copy(), labels[:, -1].copy())
    return count, states, sizes, first, edges


def _finite_min(confidence):
    finite = confidence[np.isfinite(confidence)]
    return finite.min(initial=0.0)


def _pass_one(classes_block, confidence_block, origin, n_cols):
    return _block_table(classes_block, origin, n_cols) + (_finite_min(confidence_block),)


def _seed_block(classes, lut):
    return np.take(lut, _local_labels(classes))


def _flood_order(confidence, fill):
    """``-confidence`` with ``fill`` where it is not finite (the in-memory flooding order)."""
    out = np.where(np.isfinite(confidence), confidence, fill)
    np.negative(out, out=out)
    return out


def _closing_block(ordered, radius):
    """Closing by the disc of ``radius`` with everything outside the block False (edge "zero")."""
    return _disc_erosion(_disc_dilation(ordered, radius), radius)


def _closing(ordered, radius, chunks):
    """:func:`segment.disc_closing` (edge "replicate") of a dask array, chunk by chunk, exactly.

    As in memory, the frame is first extended by ``radius`` samples repeating its edge
    (``dask.array.pad``) and closed with everything beyond False; a chunk's closing depends on
    the samples within two radii (dilation, then erosion), the overlap given to each chunk.
    """
    import dask.array as da

    padded = da.pad(ordered, radius, mode="edge")
    closed = da.map_overlap(_closing_block, padded, depth=2 * radius, boundary="none", dtype=bool, radius=radius)
    closed = closed[radius: radius + ordered.shape[0], radius: radius + ordered.shape[1]]
    return closed.rechunk(chunks)


def _watershed_block(flood, seeds, reach):
    if not seeds.any():
        return np.zeros(seeds.shape, np.int32)
    return watershed(flood, markers=seeds, mask=reach).astype(np.int32, copy=False)


def _overlap_map(func, arrays, depth, dtype, chunks, **kwargs):
    """``map_overlap`` with ``boundary="none"``, the result brought back to ``chunks``.

    dask enlarges chunks thinner than the overlap; the result is rechunked to the inputs' chunks.
    """
    import dask.array as da

    out = da.map_overlap(func, *arrays, depth=depth, boundary="none", dtype=dtype, trim=True, **kwargs)
    return out.rechunk(chunks) if out.chunks != chunks else out


def _border_pairs(strips_a, strips_b, state_of):
    """Pairs of region ids that touch (8-connected) across one border line, one state each."""
    pairs = []
    n = strips_a.size
    for shift in (-1, 0, 1):
        lo, hi = max(0, -shift), min(n, n - shift)
        a = strips_a[lo:hi]
        b = strips_b[lo + shift: hi + shift]
        both = (a > 0) & (b > 0)
        a, b = a[both], b[both]
        same = state_of[a] == state_of[b]
        pairs.append(np.stack([a[same], b[same]], axis=1))
    return np.concatenate(pairs) if pairs else np.zeros((0, 2), np.int64)


def segment_states_chunked(state, confidence, ordered, *, pixel_size_nm, min_area_nm2, confidence_threshold,
                           trusted=None, bridge_nm=0.0, halo_px=None):
    """:func:`domains.segment.segment_states` chunk by chunk: the same domains, label numbers and walls.

    1. Cores (confident, ordered, trusted pixels with a state) are labelled per chunk, 8-connected
       within one state. Regions that touch across a chunk border (8-connected, same state) are joined
       by a union-find over the border pairs (connected components of a small graph); each joined
       region's size is the sum of its pieces' sizes, its first raster pixel the smallest of theirs.
    2. Regions of at least ``min_area_nm2`` are numbered as in memory: state by state in increasing
       order, within a state by their first raster pixel (the order of ``scipy.ndimage.label``);
       the rest are islands.
    3. The gaps in ``ordered`` are closed with a disc of the bridge radius (``map_overlap`` with an
       overlap of two radii: exact). 4. The seeds grow by watershed on ``-confidence`` per chunk with a
       halo of ``halo_px`` samples: exact where the flood paths are shorter than the halo.
    5. One-pixel walls from an overlap of one sample (exact).

    Only one chunk with its overlap is in memory at a time (plus tables of a few numbers per core
    region and the chunks' edge rows and columns); the cores are labelled once to number the regions
    and again (per chunk) when the seeds are read.

    Parameters
    ----------
    state : (row, col) dask or numpy int array
        State of each sample (variant index, orientation), negative = none. Its chunks are the result's.
    confidence : (row, col) dask or numpy float array
        How sure that state is.
    ordered : (row, col) dask or numpy bool array
        Where any order is present.
    pixel_size_nm : float or (float, float)
        Sample spacing in nm.
    min_area_nm2 : float
        Smallest domain area kept.
    confidence_threshold : float
        Confidence needed for a domain core.
    trusted : (row, col) dask or numpy bool array, optional
        Where seeds may come from.
    bridge_nm : float
        Radius of the closing that bridges gaps in ``ordered`` (nm).
    halo_px : int, optional
        Samples of overlap for the watershed; default :func:`default_halo_px` of the bridge radius.

    Returns
    -------
    domains.segment.Segmentation
        ``labels``, ``grown`` (int32) and ``walls`` (bool) are dask arrays with the chunks of ``state``;
        ``state`` (label -> state) and ``islands`` are computed.

    References
    ----------
    .. [1] K. Wu, E. Otoo, K. Suzuki, "Optimizing two-pass connected-component labeling
       algorithms", Pattern Anal. Appl. 12, 117 (2009). doi:10.1007/s10044-008-0109-y
       (labels joined through a union-find of equivalences).
    .. [2] S. Beucher, F. Meyer, "The morphological approach to segmentation: the watershed
       transformation", in Mathematical Morphology in Image Processing, ed. E. R. Dougherty
       (Marcel Dekker, 1993), pp. 433-481.

    Examples
    --------
    >>> import dask.array as da
    >>> from domains.segment import segment_states
    >>> state = np.zeros((20, 20), int); state[:, 10:] = 1
    >>> conf = np.ones((20, 20)); conf[:, 9:11] = 0.2
    >>> args = dict(pixel_size_nm=0.1, min_area_nm2=0.1, confidence_threshold=0.5)
    >>> seg = segment_states_chunked(da.from_array(state, chunks=7), da.from_array(conf, chunks=7),
    ...                              da.ones((20, 20), bool, chunks=7), **args)
    >>> ref = segment_states(state, conf, np.ones((20, 20), bool), **args)
    >>> bool((seg.labels.compute() == ref.labels).all()), seg.state == ref.state
    (True, True)
    """
    import dask
    import dask.array as da
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    dy, dx = pixel_size_pair(pixel_size_nm)
    state = state if isinstance(state, da.Array) else da.from_array(np.asarray(state))
    if state.ndim != 2:
        raise InputError(f"state must be 2-D (row, col), got shape {state.shape}")
    chunks = state.chunks
    shapes = [np.shape(a) for a in (state, confidence, ordered)]
    if not (shapes[0] == shapes[1] == shapes[2]):
        raise InputError(f"state, confidence and ordered differ in shape: {shapes[0]}, {shapes[1]}, {shapes[2]}")
    if trusted is not None and np.shape(trusted) != shapes[0]:
        raise InputError(f"trusted has shape {np.shape(trusted)}, state {shapes[0]}")
    confidence = _as_dask(confidence, chunks)
    # As in memory: float32 confidence stays float32, anything else is float64.
    confidence = confidence.astype(np.float32 if confidence.dtype == np.float32 else np.float64)
    ordered = _as_dask(ordered, chunks).astype(bool)
    trusted = None if trusted is None else _as_dask(trusted, chunks).astype(bool)
    n_rows, n_cols = state.shape
    min_pixels = max(1, int(math.ceil(min_area_nm2 / (dy * dx))))
    halo = None if halo_px is None else int(halo_px)
    if halo is not None and halo < 0:
        raise InputError(f"halo_px must be >= 0, got {halo_px!r}")

    args = (state, confidence, ordered) + (() if trusted is None else (trusted,))
    classes = da.map_blocks(_classes, *args, threshold=confidence_threshold, dtype=np.int32)
    starts = [np.r_[0, np.cumsum(c)[:-1]] for c in chunks]
    blocks = classes.to_delayed()
    conf_blocks = confidence.to_delayed()
    tasks = [[dask.delayed(_pass_one)(blocks[i, j], conf_blocks[i, j], (int(starts[0][i]), int(starts[1][j])), n_cols)
              for j in range(len(chunks[1]))] for i in range(len(chunks[0]))]
    tables = dask.compute(tasks)[0]

    # Global ids: each chunk's regions after those of the chunks before it (raster order of chunks).
    counts = np.array([[t[0] for t in row] for row in tables], dtype=np.int64)
    offsets = np.r_[0, np.cumsum(counts.ravel())[:-1]].reshape(counts.shape)
    total = int(counts.sum())
    state_of = np.full(total + 1, -1, np.int64)
    size_of = np.zeros(total + 1, np.int64)
    first_of = np.zeros(total + 1, np.int64)
    fill = None
    for i, row in enumerate(tables):
        for j, (count, states, sizes, first, _, low) in enumerate(row):
            at = slice(1 + offsets[i, j], 1 + offsets[i, j] + count)
            state_of[at], size_of[at], first_of[at] = states, sizes, first
            fill = low if fill is None else min(fill, low)

    def globalise(strip, i, j):
        strip = strip.astype(np.int64)
        strip[strip > 0] += offsets[i, j]
        return strip

    # Border pairs: the last row of a chunk row against the first row of the next (full width, so the
    # corners' diagonal contacts are included), and likewise for columns.
    pairs = [np.zeros((0, 2), np.int64)]
    for i in range(len(chunks[0]) - 1):
        below = np.concatenate([globalise(tables[i][j][4][1], i, j) for j in range(len(chunks[1]))])
        above = np.concatenate([globalise(tables[i + 1][j][4][0], i + 1, j) for j in range(len(chunks[1]))])
        pairs.append(_border_pairs(below, above, state_of))
    for j in range(len(chunks[1]) - 1):
        right = np.concatenate([globalise(tables[i][j][4][3], i, j) for i in range(len(chunks[0]))])
        left = np.concatenate([globalise(tables[i][j + 1][4][2], i, j + 1) for i in range(len(chunks[0]))])
        pairs.append(_border_pairs(right, left, state_of))
    pairs = np.concatenate(pairs)
    graph = coo_matrix((np.ones(len(pairs), np.int8), (pairs[:, 0], pairs[:, 1])), shape=(total + 1, total + 1))
    n_joined, joined = connected_components(graph, directed=False)
    joined_size = np.bincount(joined[1:], weights=size_of[1:], minlength=n_joined).astype(np.int64)
    joined_first = np.full(n_joined, np.iinfo(np.int64).max)
    np.minimum.at(joined_first, joined[1:], first_of[1:])
    joined_state = np.full(n_joined, -1, np.int64)
    joined_state[joined[1:]] = state_of[1:]
    real = np.zeros(n_joined, bool)
    real[joined[1:]] = True                      # id 0 (background) is a component of its own
    keep = real & (joined_size >= min_pixels)
    islands = int(np.count_nonzero(real & ~keep))
    kept = np.flatnonzero(keep)
    # In-memory numbering: state by state (np.unique order), then by first raster pixel.
    kept = kept[np.lexsort((joined_first[kept], joined_state[kept]))]
    number = np.zeros(n_joined, np.int32)
    number[kept] = np.arange(1, kept.size + 1, dtype=np.int32)
    lut = number[joined]
    lut[0] = 0
    seed_state = {int(k): int(s) for k, s in zip(range(1, kept.size + 1), joined_state[kept])}
    del graph, pairs, joined, state_of, size_of, first_of

    if kept.size == 0:
        empty = da.zeros(state.shape, np.int32, chunks=chunks)
        return Segmentation(empty, empty, da.zeros(state.shape, bool, chunks=chunks), {}, islands,
                            {"min_area_nm2": min_area_nm2, "confidence_threshold": confidence_threshold})

    def seeds_of(i, j):
        # This chunk's slice of the numbering (its own regions only: each task carries a small table).
        own = np.r_[np.int32(0), lut[1 + offsets[i, j]: 1 + offsets[i, j] + counts[i, j]]]
        return da.from_delayed(dask.delayed(_seed_block)(blocks[i, j], own), shape=(chunks[0][i], chunks[1][j]),
                               dtype=np.int32)

    seeds = da.block([[seeds_of(i, j) for j in range(len(chunks[1]))] for i in range(len(chunks[0]))])
    fill = confidence.dtype.type(fill)
    flood = confidence.map_blocks(_flood_order, fill, dtype=confidence.dtype)
    reach = ordered
    radius = 0
    if bridge_nm > 0:
        radius = max(1, int(round(bridge_nm / min(dy, dx))))
        reach = ordered | _closing(ordered, radius, chunks)
    halo = default_halo_px(radius) if halo is None else halo
    if halo > 0:
        depth = {0: min(halo, n_rows), 1: min(halo, n_cols)}    # dask refuses an overlap beyond the frame
        grown = _overlap_map(_watershed_block, [flood, seeds, reach], depth, np.int32, chunks)
    else:
        grown = da.map_blocks(_watershed_block, flood, seeds, reach, dtype=np.int32)
    walls = _overlap_map(thin_walls, [grown], 1, bool, chunks)
    labels = da.where(walls, np.int32(0), grown).astype(np.int32)
    params = {"min_area_nm2": float(min_area_nm2), "confidence_threshold": float(confidence_threshold),
              "bridge_nm": float(bridge_nm)}
    return Segmentation(labels, grown, walls, seed_state, islands, params)


def _accepted_in_block(f, good, fraction, offsets, owned, origin, frame, min_ordered_fraction, threshold):
    """The plaquettes of one chunk that pass :func:`segment.phase_defects`' loop test (global coordinates).

    ``f``, ``good`` and ``fraction`` cover the chunk with its overlap, whose first sample is the frame's
    ``origin``; only plaquettes whose top-left sample lies in ``owned`` ((r0, r1), (c0, c1)) are tested.
    Returns rows, cols, loop windings and loop minima of |f|, in raster order.
    """
    n_rows, n_cols = frame
    (r0, r1), (c0, c1) = owned
    phi = np.angle(f)
    plaquette = _plaquette_windings(phi)
    rows, cols = np.nonzero(plaquette)
    wind = plaquette[rows, cols]
    rows, cols = rows + origin[0], cols + origin[1]
    mine = (rows >= r0) & (rows < r1) & (cols >= c0) & (cols < c1)
    rows, cols, wind = rows[mine], cols[mine], wind[mine]
    lr = rows[:, None] + offsets[:, 0]
    lc = cols[:, None] + offsets[:, 1]
    inside = np.all((lr >= 0) & (lr < n_rows) & (lc >= 0) & (lc < n_cols), axis=1)
    lr, lc = lr[inside] - origin[0], lc[inside] - origin[1]
    r, c, w = rows[inside] - origin[0], cols[inside] - origin[1], wind[inside]
    r, c, loop_wind, loop_min = _loop_test(f, phi, good, fraction, lr, lc, r, c, w, min_ordered_fraction, threshold)
    return r + origin[0], c + origin[1], loop_wind, loop_min


def _defect_block(f, ordered, threshold, offsets, owned, origin, frame, min_ordered_fraction, disc_radius):
    good = np.isfinite(f) & ordered & (np.abs(f) >= threshold)
    # The disc fractions of the block: exact integer counts within the overlap (it holds the disc).
    fraction = None if min_ordered_fraction is None else _disc_fraction(ordered, disc_radius)
    return _accepted_in_block(f, good, fraction, offsets, owned, origin, frame, min_ordered_fraction, threshold)


def phase_defects_chunked(fields, *, pixel_size_nm, ordered, sigma_nm, min_ordered_fraction=None,
                          amplitude_threshold=None, loop_radius_nm=None):
    """:func:`domains.segment.phase_defects` chunk by chunk: the same defects in the same order.

    Each chunk tests the plaquettes whose top-left sample it owns, reading its samples and an
    overlap of the loop radius plus two samples (the loop, the plaquette's second row and column,
    and the disc of ``min_ordered_fraction``), so every test sees what it sees in memory. The
    accepted plaquettes (a few numbers each) are gathered in raster order and grouped into defects
    by the in-memory rule (single linkage within the loop radius), so a defect whose plaquettes lie
    in several chunks is one defect, as in memory.

    Parameters
    ----------
    fields : (k, row, col) or (row, col) dask or numpy complex array
        Lock-in fields (one defect list per component).
    pixel_size_nm : float or (float, float)
        Sample spacing in nm.
    ordered : (row, col) or (k, row, col) dask or numpy bool array
        Where order is present.
    sigma_nm : float
        Lock-in width, nm.
    min_ordered_fraction : float, optional
        Fraction of ordered samples needed within the loop radius.
    amplitude_threshold : float or sequence of float, optional
        Smallest |field| allowed on the loop.
    loop_radius_nm : float, optional
        Radius of the test loop; default 2 sigma (at least 1.5 samples).

    Returns
    -------
    list of dict
        As :func:`domains.segment.phase_defects`.

    References
    ----------
    .. [1] A. Mesaros et al., "Topological defects coupling smectic modulations
       to intra-unit-cell nematicity in cuprates", Science 333, 426 (2011).
       doi:10.1126/science.1201082

    Examples
    --------
    >>> import dask.array as da
    >>> y, x = np.mgrid[:41, :41] * 0.1
    >>> vortex = np.exp(1j * np.arctan2(y - 2.05, x - 2.05))[None]
    >>> d = phase_defects_chunked(da.from_array(vortex, chunks=(1, 13, 17)), pixel_size_nm=0.1,
    ...                           ordered=np.ones((41, 41), bool), sigma_nm=0.3)
    >>> [(e["winding"], round(e["x_nm"], 2), round(e["y_nm"], 2)) for e in d]
    [(1, 2.05, 2.05)]
    """
    import dask
    import dask.array as da

    dy, dx = pixel_size_pair(pixel_size_nm)
    if not isinstance(fields, da.Array):
        fields = da.from_array(np.asarray(fields))
    if fields.ndim == 2:
        fields = fields[None]
    if fields.ndim != 3:
        raise InputError(f"fields must be (k, row, col) or (row, col), got shape {fields.shape}")
    k = fields.shape[0]
    frame = fields.shape[1:]
    if np.shape(ordered) == frame:
        per_component = False
    elif np.shape(ordered) == fields.shape:
        per_component = True
    else:
        raise InputError(f"ordered shape {np.shape(ordered)} differs from the fields' {frame} (or {fields.shape})")
    radius_nm, thresholds, offsets = _loop_geometry(dy, dx, sigma_nm, loop_radius_nm, amplitude_threshold, k)
    disc_radius = max(1, int(round(radius_nm / min(dy, dx))))
    reach = int(np.abs(offsets).max())
    if min_ordered_fraction is not None:
        reach = max(reach, disc_radius)
    depth = reach + 2
    chunks = fields.chunks[1:]
    if not isinstance(ordered, da.Array):
        ordered = da.from_array(np.asarray(ordered, dtype=bool), chunks=(((k,),) if per_component else ()) + chunks)
    ordered = ordered.astype(bool)
    starts = [np.r_[0, np.cumsum(c)] for c in chunks]
    tasks = []
    for j in range(k):
        f_j = fields[j]
        o_j = ordered[j] if per_component else ordered
        row = []
        for bi in range(len(chunks[0])):
            for bj in range(len(chunks[1])):
                r0, r1 = int(starts[0][bi]), int(starts[0][bi + 1])
                c0, c1 = int(starts[1][bj]), int(starts[1][bj + 1])
                # The chunk and its overlap, cut from the lazy arrays: one task reads only these samples.
                a0, a1 = max(0, r0 - depth), min(frame[0], r1 + depth)
                b0, b1 = max(0, c0 - depth), min(frame[1], c1 + depth)
                row.append(dask.delayed(_defect_block)(f_j[a0:a1, b0:b1], o_j[a0:a1, b0:b1], thresholds[j], offsets,
                                                      ((r0, r1), (c0, c1)), (a0, b0), frame, min_ordered_fraction,
                                                      disc_radius))
        tasks.append(row)
    found = dask.compute(tasks)[0]
    defects = []
    for j, pieces in enumerate(found):
        rows = np.concatenate([p[0] for p in pieces])
        cols = np.concatenate([p[1] for p in pieces])
        winds = np.concatenate([p[2] for p in pieces])
        lows = np.concatenate([p[3] for p in pieces])
        order = np.lexsort((cols, rows))       # raster order, as the in-memory list is built
        accepted = list(zip(rows[order], cols[order], winds[order], lows[order]))
        defects.extend(_merge_windings(accepted, j, radius_nm, dy, dx))
    return defects
