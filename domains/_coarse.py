"""The decimated analysis grid of a lazy run, chunk by chunk (issue 11).

In a lazy run the lock-in fields on the decimated grid (docs/methods.md §1) are dask arrays
stored once in the run's scratch folder (:mod:`domains._scratch`); the order, its noise floor,
the walls, the per-domain means and the maps are then computed from them chunk by chunk, from
per-chunk partial results combined exactly, or from small crops. What needs the whole grid at
once (the global variant offsets) is taken from a bounded subsample.

The segmentation of the decimated grid itself and its phase defects are
:func:`domains._chunkseg.segment_states_chunked` and :func:`domains._chunkseg.phase_defects_chunked`.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["SUBSAMPLE_SAMPLES", "family_order_chunked", "loop_confirms_lazy", "median_chunked", "order_fields",
           "small_lazy"]

#: Largest number of decimated-grid samples the global variant offsets of :func:`family_order_chunked`
#: are computed from (a strided subsample beyond it).
SUBSAMPLE_SAMPLES = 2048 * 2048


def order_fields(image, q, *, sigma_nm, pixel_size_nm, mask, step, scratch):
    """The lock-in fields on the decimated grid, complex64, computed once into the scratch folder.

    Parameters
    ----------
    image : (row, col) dask.array.Array
        The straightened image (NaN filled).
    q : (k, 2) array_like
        Wavevectors in rad/nm.
    sigma_nm : float
        Lock-in width in nm.
    pixel_size_nm : (float, float)
        Input pixel size in nm.
    mask : ndarray of bool or None
        Untrusted input pixels.
    step : int
        Decimation step (input pixels).
    scratch : domains._scratch.Scratch
        The run's scratch folder.

    Returns
    -------
    (k, row', col') dask.array.Array
        complex64 (float32 precision, the precision the lazy run promises), read from the scratch store.

    References
    ----------
    M. J. Lawler et al., Nature 466, 347 (2010) for the lock-in; :func:`domains.lockin`.

    Examples
    --------
    >>> import dask.array as da
    >>> from domains._scratch import Scratch
    >>> x = np.cos(2 * np.pi * np.arange(64) / 8)[None, :] * np.ones((64, 1))
    >>> with Scratch() as s:
    ...     a = order_fields(da.from_array(x, chunks=32), [[2 * np.pi / 0.8, 0]], sigma_nm=0.8,
    ...                      pixel_size_nm=(0.1, 0.1), mask=None, step=2, scratch=s)
    ...     a.dtype.name, a.shape, round(float(abs(a[0, 16, 16].compute())), 2)
    ('complex64', (1, 32, 32), 0.5)
    """
    from ._lockin import lockin
    from ._scratch import checkpoint

    a = lockin(image, np.atleast_2d(q), sigma_nm=sigma_nm, pixel_size_nm=pixel_size_nm, mask=mask, step=step)
    return checkpoint(a.astype(np.complex64), scratch, "order_fields")


def median_chunked(values, where):
    """The exact median of ``values[:, where]`` from per-chunk partial histograms, without the values
    in memory: two passes over the chunks.

    Non-negative float32 values sort as their bit patterns (IEEE 754), so the first pass counts them
    by their upper 16 bits (65536 bins, exact ordering); the second keeps only the values of the one
    or two bins holding the middle ranks, which are then sorted.

    Parameters
    ----------
    values : (m, row, col) dask.array.Array
        Non-negative values (amplitudes); computed as float32.
    where : (row, col) ndarray or dask array of bool
        The samples to take (the same for every plane).

    Returns
    -------
    float
        The median (mean of the two middle values for an even count), as :func:`numpy.median` of the
        float32 values; NaN when nothing is taken.

    References
    ----------
    IEEE 754 (2008) §5.10: the ordering of non-negative floats is that of their bit patterns.
    Selection by counting is common practice (no source).

    Examples
    --------
    >>> import dask.array as da
    >>> v = np.random.default_rng(0).rayleigh(size=(3, 50, 40)).astype(np.float32)
    >>> w = np.random.default_rng(1).random((50, 40)) > 0.3
    >>> median_chunked(da.from_array(v, chunks=(3, 17, 23)), w) == float(np.median(v[:, w]))
    True
    """
    import dask
    import dask.array as da

    values = values.astype(np.float32)
    where = where if isinstance(where, da.Array) else da.from_array(np.asarray(where, bool), chunks=values.chunks[1:])
    where = where.rechunk(values.chunks[1:])
    v_blocks, w_blocks = values.to_delayed()[0], where.to_delayed()

    def keys(v, w):
        return v[:, w].view(np.uint32) >> 16

    def counts(v, w):
        return np.bincount(keys(v, w).ravel(), minlength=1 << 16)

    pairs = [(v_blocks[i, j], w_blocks[i, j]) for i in range(v_blocks.shape[0]) for j in range(v_blocks.shape[1])]
    hist = sum(dask.compute(*[dask.delayed(counts)(v, w) for v, w in pairs]))
    n = int(hist.sum())
    if n == 0:
        return math.nan
    cum = np.cumsum(hist)
    ranks = ((n - 1) // 2, n // 2)
    bins = [int(np.searchsorted(cum, r, side="right")) for r in ranks]
    lo, hi = bins[0], bins[1]

    def kept(v, w):
        k = keys(v, w)
        return v[:, w][(k >= lo) & (k <= hi)]

    middle = np.sort(np.concatenate(dask.compute(*[dask.delayed(kept)(v, w) for v, w in pairs])))
    below = int(cum[lo - 1]) if lo > 0 else 0
    x = middle[[ranks[0] - below, ranks[1] - below]].astype(np.float64)
    # as numpy.median of float32 values: the mean of the two middle values in float32
    return float(np.float32(x.mean()) if ranks[0] != ranks[1] else np.float32(x[0]))


def family_order_chunked(a, groups, *, step, coefficients=None, bragg_phase=None, threshold=None, trusted=None,
                         anisotropy_threshold=0.5, family_names=None, scratch=None):
    """:func:`domains.order.family_order` of dask fields, chunk by chunk, stored in the scratch folder.

    The global offset of each commensurate family (a mean over the whole grid) comes from the
    whole grid when it has at most :data:`SUBSAMPLE_SAMPLES` samples, from every s-th row and
    column otherwise (s the smallest stride that brings it below); every chunk is then classified
    with those offsets (``offsets_rad``), pixel by pixel, as the whole-grid call does.

    Parameters
    ----------
    a : (k, row', col') dask.array.Array
        The lock-in fields on the decimated grid.
    groups, coefficients, threshold, anisotropy_threshold, family_names
        As :func:`domains.order.family_order`.
    step : int
        The decimated grid's step (input pixels per sample).
    bragg_phase : object indexable as ``[:, rows, cols]`` on the input grid, optional
        The residual Bragg phases on the input grid (``DriftResult.residual_phase_points``): sampled
        per chunk at the chunk's samples.
    trusted : (row', col') ndarray of bool, optional
        Samples used for the offsets.
    scratch : domains._scratch.Scratch
        Where the state, score, ordered mask and fields are stored.

    Returns
    -------
    domains.order.FamilyOrder
        ``state`` (int8, or int16 beyond 127 states), ``score`` (float32), ``ordered`` (bool) and
        ``fields`` (complex64) as dask arrays read from the scratch folder; ``family`` is None;
        ``names`` and ``offsets_rad`` as the whole-grid call gives them.

    References
    ----------
    :func:`domains.order.family_order` (docs/methods.md §5-6).

    Examples
    --------
    >>> import dask.array as da
    >>> from domains._scratch import Scratch
    >>> from domains.order import family_order
    >>> z = np.exp(1j * np.random.default_rng(0).uniform(0, 0.3, (2, 30, 40))).astype(np.complex64)
    >>> with Scratch() as s:
    ...     fo = family_order_chunked(da.from_array(z, chunks=(2, 13, 17)), [[0], [1]], step=1,
    ...                               coefficients=[[0.5, 0], [0, 0.5]], scratch=s)
    ...     bool((np.asarray(fo.state) == family_order(z, [[0], [1]], coefficients=[[0.5, 0], [0, 0.5]]).state).all())
    True
    """
    import dask.array as da

    from ._scratch import checkpoint_many
    from .order import family_order

    k, ny, nx = a.shape
    stride = 1
    while math.ceil(ny / stride) * math.ceil(nx / stride) > SUBSAMPLE_SAMPLES:
        stride += 1

    def phase_at(r0, r1, c0, c1, s=1):
        if bragg_phase is None:
            return None
        return np.nan_to_num(bragg_phase[:, r0 * step:r1 * step:step * s, c0 * step:c1 * step:step * s])

    sub = np.asarray(a[:, ::stride, ::stride])
    whole = family_order(sub, groups, coefficients=coefficients, bragg_phase=phase_at(0, ny, 0, nx, stride),
                         threshold=threshold, trusted=None if trusted is None else np.asarray(trusted)[::stride, ::stride],
                         anisotropy_threshold=anisotropy_threshold, family_names=family_names)
    names, offsets = whole.names, whole.offsets_rad
    del sub, whole
    state_type = np.int8 if len(names) < 128 else np.int16
    starts = [np.cumsum((0,) + c[:-1]) for c in a.chunks[1:]]

    def block(fields, block_info=None):
        loc = block_info[0]["chunk-location"]
        r0, c0 = int(starts[0][loc[1]]), int(starts[1][loc[2]])
        r1, c1 = r0 + fields.shape[1], c0 + fields.shape[2]
        fo = family_order(fields, groups, coefficients=coefficients, bragg_phase=phase_at(r0, r1, c0, c1),
                          threshold=threshold, anisotropy_threshold=anisotropy_threshold, family_names=family_names,
                          offsets_rad=offsets)
        # One float32 stack per chunk: state, score, ordered, then the fields' real and imaginary parts.
        return np.concatenate([fo.state[None].astype(np.float32), fo.score[None].astype(np.float32),
                               fo.ordered[None].astype(np.float32), fo.fields.real.astype(np.float32),
                               fo.fields.imag.astype(np.float32)])

    packed = da.map_blocks(block, a, dtype=np.float32, chunks=((3 + 2 * k,),) + a.chunks[1:],
                           meta=np.empty((0, 0, 0), np.float32))
    stored = checkpoint_many({"order_state": packed[0].astype(state_type), "order_score": packed[1],
                              "order_ordered": packed[2] > 0,
                              "order_relative": (packed[3:3 + k] + 1j * packed[3 + k:]).astype(np.complex64)},
                             scratch)
    from .order import FamilyOrder

    return FamilyOrder(stored["order_state"], stored["order_score"], stored["order_ordered"], names,
                       stored["order_relative"], None, offsets)




def loop_confirms_lazy(field, defect, pixel, threshold, margin=24):
    """:func:`domains._refine.loop_confirms` of a dask field, on a crop around the defect's loop.

    The cubic spline's prefilter reaches beyond the crop with a weight |z1|^n = 0.268^n after n
    samples (z1 = sqrt(3) - 2, the pole of the cubic B-spline; Unser, IEEE Signal Process. Mag. 16,
    22 (1999)): ``margin`` samples more than the loop make the crop's values those of the whole field
    to 1e-13.

    Parameters
    ----------
    field : (row, col) dask array
        One component's field.
    defect : dict
        A defect of :func:`domains.segment.phase_defects` (``x_nm``, ``y_nm``, ``loop_radius_nm``).
    pixel : (float, float)
        The field's pixel size in nm.
    threshold : float
        As :func:`domains._refine.loop_confirms`.
    margin : int
        Samples around the loop.

    Returns
    -------
    bool

    References
    ----------
    M. Unser, IEEE Signal Process. Mag. 16, 22 (1999).

    Examples
    --------
    >>> import dask.array as da
    >>> y, x = np.mgrid[-40:40, -40:40] + 0.5
    >>> f = np.hypot(x, y).clip(max=3) * np.exp(1j * np.arctan2(y, x))
    >>> d = {"x_nm": 4.0, "y_nm": 4.0, "loop_radius_nm": 1.0, "winding": 1}
    >>> loop_confirms_lazy(da.from_array(f, chunks=30), d, (0.1, 0.1), 1.0)
    True
    """
    from ._refine import loop_confirms

    dy, dx = pixel
    radius = defect["loop_radius_nm"]
    ny, nx = field.shape
    r0 = max(0, int(math.floor((defect["y_nm"] - radius) / dy)) - margin)
    r1 = min(ny, int(math.ceil((defect["y_nm"] + radius) / dy)) + margin + 1)
    c0 = max(0, int(math.floor((defect["x_nm"] - radius) / dx)) - margin)
    c1 = min(nx, int(math.ceil((defect["x_nm"] + radius) / dx)) + margin + 1)
    crop = np.asarray(field[r0:r1, c0:c1])
    return loop_confirms(crop, {**defect, "y_nm": defect["y_nm"] - r0 * dy, "x_nm": defect["x_nm"] - c0 * dx},
                         pixel, threshold)


def small_lazy(array, pixel, how="mean"):
    """:func:`domains.report.downsample` of a dask image (``how`` "mean" or "phase"), chunk by chunk,
    and the reduced pixel size: the blocks' sums and counts of finite values.

    Parameters
    ----------
    array : (row, col) dask array
        The image (float; phases in rad for "phase").
    pixel : (float, float)
        Its pixel size in nm.
    how : {"mean", "phase"}
        As :func:`domains.report.downsample`.

    Returns
    -------
    (ndarray, (float, float))
        The reduced image and its pixel size.

    References
    ----------
    :func:`domains.report.downsample`.

    Examples
    --------
    >>> import dask.array as da
    >>> from domains import report
    >>> x = np.random.default_rng(0).random((2100, 1100))
    >>> np.allclose(small_lazy(da.from_array(x, chunks=700), (1, 1))[0], report.downsample(x)[0])
    True
    """
    import dask.array as da

    from . import report

    f = report._block_factor(array.shape, report.FIGURE_MAX_PX)
    if f == 1:
        return report.downsample(np.asarray(array), how=how)[0], tuple(pixel)
    values = array.astype(np.float32 if array.dtype == np.float32 else np.float64)
    if how == "phase":
        values = da.exp(1j * values)
    # Chunks of whole blocks (the last one partial).
    values = values.rechunk(tuple(max(f, (c[0] // f) * f) for c in values.chunks))

    def reduce(b):
        rows, cols = -(-b.shape[0] // f), -(-b.shape[1] // f)
        pad = ((0, rows * f - b.shape[0]), (0, cols * f - b.shape[1]))
        finite = np.pad(np.isfinite(b), pad).reshape(rows, f, cols, f).sum(axis=(1, 3))
        total = np.pad(np.where(np.isfinite(b), b, 0), pad).reshape(rows, f, cols, f).sum(axis=(1, 3))
        return np.stack([total, finite.astype(total.dtype)])

    out_chunks = ((2,),) + tuple(tuple(-(-c // f) for c in axis) for axis in values.chunks)
    total, count = da.map_blocks(reduce, values, new_axis=0, chunks=out_chunks, dtype=values.dtype).compute()
    if how == "phase":
        out = np.where(count.real > 0, np.angle(total), np.nan).astype(array.dtype if array.dtype.kind == "f" else float)
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            out = np.where(count > 0, total / np.maximum(count, 1), np.nan).astype(values.dtype)
    return out, (pixel[0] * f, pixel[1] * f)
