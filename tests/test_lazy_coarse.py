"""The chunked steps of a lazy run on the decimated grid (domains._coarse, measure.wall_table_chunked,
the chunked label means, the noise floor of a dask image) against their in-memory counterparts.

Reference for every comparison: the in-memory function of the same code on the same arrays (the
definition of the result), or numpy itself (the median); chunks are irregular and cut across every
structure. Labels, states and tables are compared exactly where the chunked result is the same
computation in another order; numbers to float32 precision where the lazy run stores float32.
"""

import dask.array as dask_array
import numpy as np
import pytest

from domains import _coarse, measure, order, report
from domains._scratch import Scratch
from domains.segment import thin_walls

CHUNKS = ((23, 40, 17, 48), (31, 9, 50, 38))  # a 128^2 grid in irregular chunks


def _voronoi(shape, n, rng):
    """Labels 1..n of the nearest of n random seeds (independent of the code under test)."""
    seeds = rng.uniform(0, 1, (n, 2)) * shape
    rows, cols = np.mgrid[:shape[0], :shape[1]]
    d = (rows[..., None] - seeds[:, 0]) ** 2 + (cols[..., None] - seeds[:, 1]) ** 2
    return (np.argmin(d, axis=-1) + 1).astype(np.int32)


@pytest.mark.parametrize("n_even", [False, True])
def test_median_chunked_equals_numpy_median(n_even):
    rng = np.random.default_rng(4)
    values = rng.rayleigh(0.3, (3, 128, 128)).astype(np.float32)
    values[1, 5, 7] = np.nan  # a non-finite sample of a later plane is not taken by `where` below
    where = rng.random((128, 128)) > 0.4
    where[5, 7] = False
    if (3 * where.sum()) % 2 != int(not n_even):
        where[np.flatnonzero(where.ravel())[0] // 128, np.flatnonzero(where.ravel())[0] % 128] = False
    assert (3 * where.sum()) % 2 == (0 if n_even else 1)
    lazy = dask_array.from_array(values, chunks=((3,),) + CHUNKS)
    # reference: numpy.median of the same float32 values (exact: the same order statistics)
    assert _coarse.median_chunked(lazy, where) == float(np.median(values[:, where]))


def test_noise_floor_of_a_dask_image_equals_in_memory():
    rng = np.random.default_rng(5)
    rows, cols = np.mgrid[:256, :256]
    image = rng.normal(size=(256, 256)) + 0.5 * np.cos(6.0 * cols * 0.1)  # one peak at q = (6, 0) rad/nm
    q = [[6.0, 0.0]]
    trusted = np.ones((128, 128), bool)
    trusted[:10] = False
    memory = order.noise_floor(image, q, sigma_nm=0.6, pixel_size_nm=0.1, trusted=trusted, step=2)
    with Scratch() as scratch:
        lazy = order.noise_floor(dask_array.from_array(image, chunks=(70, 100)), q, sigma_nm=0.6,
                                 pixel_size_nm=0.1, trusted=trusted, step=2, scratch=scratch)
    # reference: the in-memory noise floor; float32 amplitudes give the median to float32 precision
    np.testing.assert_allclose(lazy.rayleigh_scale, memory.rayleigh_scale, rtol=1e-6)
    np.testing.assert_allclose(lazy.threshold, memory.threshold, rtol=1e-6)


def _three_variant_fields(shape, rng):
    """Fields of a 3x3 CDW (coefficients 1/3 of the Bragg vectors) in Voronoi domains of its variants,
    with complex Gaussian noise, and the residual Bragg phases (a smooth drift left over)."""
    labels = _voronoi(shape, 6, rng)
    coefficients = np.array([[1 / 3, 0], [0, 1 / 3], [-1 / 3, -1 / 3]])
    variants = rng.integers(0, 3, 7)[labels]
    # the variant m shifts component j's phase by 2 pi (h_j m1 + k_j m2), here with m = (v, 0)
    phase = 2 * np.pi * coefficients[:, 0][:, None, None] * variants[None] + 0.4
    rows, cols = np.mgrid[:shape[0], :shape[1]]
    bragg = np.stack([0.3 * np.sin(rows / 40.0), 0.2 * np.cos(cols / 50.0)]).astype(np.float32)
    drift = coefficients[:, 0, None, None] * bragg[0] + coefficients[:, 1, None, None] * bragg[1]
    noise = 0.15 * (rng.normal(size=(3,) + shape) + 1j * rng.normal(size=(3,) + shape))
    fields = (np.exp(1j * (phase + drift)) + noise).astype(np.complex64)
    return fields, coefficients, bragg


@pytest.mark.parametrize("subsample", [None, 32 * 32])
def test_family_order_chunked_equals_whole_grid(subsample, monkeypatch):
    fields, coefficients, bragg = _three_variant_fields((128, 128), np.random.default_rng(7))
    trusted = np.ones((128, 128), bool)
    trusted[:6] = trusted[-6:] = False
    kw = dict(coefficients=coefficients, threshold=0.5, anisotropy_threshold=0.5)
    memory = order.family_order(fields, [[0, 1, 2]], bragg_phase=bragg, trusted=trusted, **kw)
    if subsample:
        monkeypatch.setattr(_coarse, "SUBSAMPLE_SAMPLES", subsample)
    with Scratch() as scratch:
        # bragg_phase is indexed on the input grid: here step 1, so the grid itself
        lazy = _coarse.family_order_chunked(dask_array.from_array(fields, chunks=((3,),) + CHUNKS), [[0, 1, 2]],
                                            step=1, bragg_phase=bragg, trusted=trusted, scratch=scratch, **kw)
        state, score = np.asarray(lazy.state), np.asarray(lazy.score)
        ordered, relative = np.asarray(lazy.ordered), np.asarray(lazy.fields)
    assert lazy.names == memory.names
    if subsample is None:
        # reference: the whole-grid call (the same offsets, then pixel by pixel): exactly the same states
        np.testing.assert_array_equal(state, memory.state)
        np.testing.assert_array_equal(ordered, memory.ordered)
        np.testing.assert_allclose(score, memory.score, rtol=0, atol=1e-6)
        np.testing.assert_allclose(relative, memory.fields, rtol=0, atol=1e-6)
        for a, b in zip(lazy.offsets_rad, memory.offsets_rad):
            np.testing.assert_allclose(a, b, atol=1e-12)
    else:
        # A 1 in 16 subsample: the offset is a circular mean over ~900 samples of phase noise
        # 0.15 * sqrt(2) / |A| ~ 0.2 rad, so its error is ~0.2 / sqrt(900) = 0.007 rad (derived);
        # 0.03 rad is four of those. States change only where the score sits that close to a boundary.
        for a, b in zip(lazy.offsets_rad, memory.offsets_rad):
            np.testing.assert_allclose(np.angle(np.exp(1j * (a - b))), 0, atol=0.03)
        assert np.mean(state != memory.state) < 0.01


def test_wall_table_chunked_equals_wall_table():
    rng = np.random.default_rng(11)
    grown = _voronoi((128, 128), 9, rng)
    walls = thin_walls(grown)
    fields, _, _ = _three_variant_fields((128, 128), rng)
    trusted = np.ones((128, 128), bool)
    trusted[:, :5] = False
    kw = dict(pixel_size_nm=0.2, sigma_nm=0.6)
    memory = measure.wall_table(grown, walls, fields=fields, trusted=trusted, **kw)
    lazy = measure.wall_table_chunked(dask_array.from_array(grown, chunks=CHUNKS),
                                      dask_array.from_array(walls, chunks=CHUNKS),
                                      fields=dask_array.from_array(fields, chunks=((3,),) + CHUNKS),
                                      trusted=trusted, **kw)
    # reference: the in-memory wall table of the same arrays (same segments, same windows): equal rows
    assert len(memory) >= 10
    assert _rows_equal_with_nan(lazy, memory)


def _rows_equal_with_nan(a, b):
    import math

    if len(a) != len(b):
        return False
    for x, y in zip(a, b):
        for key in x:
            u, v = x[key], y[key]
            if isinstance(u, float) and math.isnan(u):
                if not (isinstance(v, float) and math.isnan(v)):
                    return False
            elif u != v:
                return False
    return True


def test_label_means_of_dask_arrays_equal_in_memory():
    rng = np.random.default_rng(2)
    labels = _voronoi((128, 128), 7, rng)
    labels[rng.random(labels.shape) > 0.9] = 0
    fields, _, _ = _three_variant_fields((128, 128), rng)
    amp = 2 * np.abs(fields)
    amp[0, 3, 4] = np.nan
    memory = measure._label_means(labels, 8, amp, fields)
    lazy = measure._label_means(dask_array.from_array(labels, chunks=CHUNKS), 8,
                                dask_array.from_array(amp, chunks=((3,),) + CHUNKS),
                                dask_array.from_array(fields, chunks=((3,),) + CHUNKS))
    # reference: the in-memory bincounts; the same float64 sums in another order
    np.testing.assert_allclose(lazy[0], memory[0], rtol=1e-12)
    for a, b in zip(lazy[1], memory[1]):
        np.testing.assert_allclose(a, b, rtol=0, atol=1e-9)


@pytest.mark.parametrize("how", ["mean", "phase"])
def test_small_lazy_equals_report_downsample(how):
    rng = np.random.default_rng(3)
    x = rng.uniform(-3, 3, (2500, 1300))
    x[100:130, 200:260] = np.nan
    small, pixel = _coarse.small_lazy(dask_array.from_array(x, chunks=(700, 333)), (0.1, 0.2), how=how)
    # reference: domains.report.downsample of the whole array
    expected, f = report.downsample(x, how=how)
    assert pixel == pytest.approx((0.1 * f, 0.2 * f))
    np.testing.assert_allclose(small, expected, rtol=1e-12, atol=1e-12)


def test_loop_confirms_lazy_equals_whole_field():
    from domains._refine import loop_confirms

    y, x = np.mgrid[0:120, 0:150] + 0.5
    field = np.hypot(x - 70, y - 50).clip(max=4) * np.exp(1j * np.arctan2(y - 50, x - 70))
    defect = {"x_nm": 7.0, "y_nm": 5.0, "loop_radius_nm": 1.2, "winding": 1}
    lazy = dask_array.from_array(field, chunks=(37, 41))
    # reference: the check on the whole field; a wrong winding is refused by both
    for d in (defect, {**defect, "winding": -1}):
        assert _coarse.loop_confirms_lazy(lazy, d, (0.1, 0.1), 1.0) == loop_confirms(field, d, (0.1, 0.1), 1.0)
    assert _coarse.loop_confirms_lazy(lazy, defect, (0.1, 0.1), 1.0)


def test_tip_change_merge_of_a_lazy_segmentation_equals_in_memory():
    from domains import pipeline
    from domains.segment import Segmentation

    # Four domains: left and right of a vertical wall, above and below a tip-change row at 40. Both
    # boundaries along the row show the same change of variant, (1, 1): a tip jump; they merge.
    grown = np.ones((80, 60), np.int32)
    grown[:, 30:] = 2
    grown[40:, :30], grown[40:, 30:] = 3, 4
    walls = thin_walls(grown)
    names = ["3x3 m=(0,0)", "3x3 m=(1,0)", "3x3 m=(1,1)", "3x3 m=(2,1)"]
    seg = Segmentation(np.where(walls, 0, grown), grown, walls, {1: 0, 2: 1, 3: 2, 4: 3}, 0)
    memory, n_memory = pipeline._merge_across_tip_changes(seg, [40], 2.0, names)
    chunks = ((17, 30, 33), (25, 35))
    lazy_seg = Segmentation(*(dask_array.from_array(x, chunks=chunks) for x in (seg.labels, grown, walls)),
                            seg.state, 0)
    lazy, n_lazy = pipeline._merge_across_tip_changes(lazy_seg, [40], 2.0, names)
    # truth (set above): two merges, two domains left (the vertical wall stays)
    assert n_memory == n_lazy == 2 and sorted(memory.state) == [1, 2]
    # reference: the in-memory merge; exactly the same arrays and states
    assert lazy.state == memory.state
    for key in ("labels", "grown", "walls"):
        np.testing.assert_array_equal(np.asarray(getattr(lazy, key)), getattr(memory, key), err_msg=key)
