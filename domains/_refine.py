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

__all__ = ["TILE_PX", "domain_table_chunked", "loop_confirms", "tile_chunks", "to_input_grid", "trusted_on_grid"]


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

    ``score_at(rows, cols)`` returns the score and the state at those input pixels. Inside the band
    the seeds are, as in :func:`domains.segment.segment_states`, the pixels confident of their
    domain's own state (score >= ``confidence``), so the floods start from smooth contours and meet
    on the valley of the score, not on the staircase of the samples.

    The work is done tile by tile (:data:`TILE_PX`, aligned on the frame), each tile from a window
    :func:`_band_halo` input pixels wider on every side, so that memory stays a few tiles whatever
    the frame; the tiles are the same in memory and, with ``lazy``, as the chunks of the dask arrays
    returned then, so both give the same labels. (A flood can follow a wall further than the halo,
    so a frame larger than one tile may differ from a single whole-frame flood at a few pixels by
    the wall; the ids come from the decimated grid and are the same in every tile.)
    """
    from scipy import ndimage

    chunks = tile_chunks(grid_.shape)
    if grid_.step == 1:
        if not lazy:
            return seg.labels, seg.walls
        import dask.array as da

        return da.from_array(seg.labels, chunks=chunks), da.from_array(seg.walls, chunks=chunks)
    grown_c = seg.grown
    big = np.iinfo(np.int32).max
    footprint = np.ones((3, 3), bool)
    lo = ndimage.minimum_filter(np.where(grown_c > 0, grown_c, big), footprint=footprint)
    hi = ndimage.maximum_filter(grown_c, footprint=footprint)
    band_c = ndimage.binary_dilation((grown_c > 0) & (lo != hi) & (lo < big), footprint)
    has_c = (seg.labels > 0) | seg.walls
    own = np.full(int(grown_c.max()) + 1, -2, np.int64)
    for label, value in seg.state.items():
        own[label] = value

    halo = _band_halo(grid_.step)
    ny, nx = grid_.shape

    def tile(r0, r1, c0, c1):
        # Labels (walls as -1) of input rows r0:r1 and columns c0:c1, from a window around them.
        a, b, c, d = max(0, r0 - halo), min(ny, r1 + halo), max(0, c0 - halo), min(nx, c1 + halo)
        code = _refine_window(grid_, grown_c, band_c, has_c, own, score_at, confidence, a, b, c, d)
        return code[r0 - a:r1 - a, c0 - c:c1 - c]

    if not lazy:
        rows, cols = (np.cumsum((0,) + c) for c in chunks)
        if len(rows) == 2 and len(cols) == 2:
            code = tile(0, ny, 0, nx)  # one tile: no second frame-sized copy
        else:
            code = np.empty(grid_.shape, np.int32)
            for r0, r1 in zip(rows[:-1], rows[1:]):
                for c0, c1 in zip(cols[:-1], cols[1:]):
                    code[r0:r1, c0:c1] = tile(r0, r1, c0, c1)
        walls = code < 0
        return np.maximum(code, 0, out=code), walls
    import dask.array as da

    def block(template, block_info=None):
        (r0, r1), (c0, c1) = block_info[None]["array-location"]
        return tile(r0, r1, c0, c1)

    code = da.map_blocks(block, da.empty(grid_.shape, np.int8, chunks=chunks), dtype=np.int32,
                         meta=np.empty((0, 0), np.int32))
    return da.maximum(code, 0), code < 0


def _band_halo(step):
    """Input pixels of context around a chunk for the band refinement of :func:`to_input_grid`.

    The band reaches about two samples (2 step pixels) from a change of domain and the flood inside
    it starts from seeds at most that far away, but where the score is flat (untrusted margins) the
    flood crosses plateaus in the order of arrival, which reaches further: 32 samples, measured on a
    512^2 three-variant scene with 160-pixel tiles (16 of 262144 pixels differ from one whole-frame
    flood at 32 samples, 421 at 16, 865 at 8), plus the one pixel thin walls need.
    """
    return 32 * int(step) + 2


#: Band pixels scored per call of ``score_at`` in :func:`_refine_window`: the score of one pixel
#: holds every variant's template fit for a moment (about 1 KiB for a √13 star), so the pieces are
#: kept to a few tens of MiB.
SCORE_PIECE_PX = 2**15


def _refine_window(grid_, grown_c, band_c, has_c, own, score_at, confidence, r0, r1, c0, c1):
    """The input-grid labels of rows r0:r1, columns c0:c1 (walls as -1): see :func:`to_input_grid`.

    Only the band is flooded: every other pixel of the window is already labelled, so the watershed
    runs on the band's bounding box, on the band and its ring of labelled neighbours (the pixels the
    floods start from, besides the confident seeds inside the band). The labels are built in one
    int32 array, changed in place.
    """
    from scipy import ndimage
    from skimage.segmentation import watershed

    from .segment import thin_walls

    rows_i, cols_i = grid_.nearest(0, r0, r1), grid_.nearest(1, c0, c1)
    code = grown_c[rows_i[:, None], cols_i[None, :]].astype(np.int32, copy=False)
    band = band_c[rows_i[:, None], cols_i[None, :]]
    band &= code > 0
    hit_r, hit_c = np.flatnonzero(band.any(axis=1)), np.flatnonzero(band.any(axis=0))
    if hit_r.size:
        # The band's bounding box and one pixel more (its ring of neighbours).
        a, b = max(0, int(hit_r[0]) - 1), min(band.shape[0], int(hit_r[-1]) + 2)
        c, d = max(0, int(hit_c[0]) - 1), min(band.shape[1], int(hit_c[-1]) + 2)
        grown, inside = code[a:b, c:d], band[a:b, c:d]  # views: the flood writes into ``code``
        reach = ndimage.binary_dilation(inside, np.ones((3, 3), bool)) & (grown > 0)
        markers = np.where(reach & ~inside, grown, 0).astype(np.int32, copy=False)
        elevation = np.zeros(grown.shape, np.float32)
        rows, cols = np.nonzero(inside)
        for i in range(0, rows.size, SCORE_PIECE_PX):
            rr, cc = rows[i:i + SCORE_PIECE_PX], cols[i:i + SCORE_PIECE_PX]
            score, state = score_at(rr + (r0 + a), cc + (c0 + c))
            score = np.nan_to_num(np.asarray(score, float), nan=0.0, neginf=0.0)
            elevation[rr, cc] = -score
            here = grown[rr, cc]
            core = (score >= confidence) & (np.asarray(state) == own[here])
            markers[rr[core], cc[core]] = here[core]
        del rows, cols
        flooded = watershed(elevation, markers=markers, mask=reach)
        del elevation, markers, reach
        grown[inside] = flooded[inside]
        del flooded
    walls = thin_walls(code)
    code[~has_c[rows_i[:, None], cols_i[None, :]]] = 0
    code[walls] = -1
    return code


def trusted_on_grid(grid_, sigma_nm, pixel, mask):
    """The trusted samples of the decimated grid and the trusted fraction of the input grid.

    Without a mask, :func:`domains.trusted_mask` is the product of a row and a column condition (the
    nearest untrusted pixel is the padding ring, straight above, below or beside): computed so, on the
    samples only. With a mask, the same answer from distance transforms run only next to the masked
    pixels (:func:`domains.drift._trusted`): one full-size boolean array, no full-size distances.
    """
    ny, nx = grid_.shape
    if mask is not None:
        from .drift import _trusted

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
    import dask.array as da

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
