"""Band refinement from the decimated grid to the input grid (domains._refine.to_input_grid) with numpy and
dask coarse segmentations, and the score interpolation it uses (domains._refine.order_score_at).

Scene: a Voronoi partition built here from its seeds (analytic, independent of the code under test); the
coarse segmentation is the partition at the samples, and the score at an input pixel is the distance
margin to the two nearest seeds (0 on the true wall, 1 well inside a cell, with a 5 % ripple), with the state of
the nearest seed. References: the in-memory result with numpy coarse arrays (the definition of the result) for the
dask cases, the true partition for where the walls go, scipy.ndimage.map_coordinates for the scores.
"""

import dask.array as da
import numpy as np
import pytest
from scipy import ndimage

from domains import _refine
from domains._grid import Grid
from domains.segment import thin_walls

SHAPE = (203, 232)   # not a multiple of the step nor of the tile
STEP = 4
TILE = 64            # several tiles, so windows and halos are exercised
SEEDS = np.array([[30.0, 40.0], [60.0, 170.0], [150.0, 60.0], [120.0, 130.0], [185.0, 210.0], [20.0, 120.0]])
STATES = {1: 0, 2: 1, 3: 2, 4: 0, 5: 1, 6: 2}
IRREGULAR = ((7, 20, 13, 11), (5, 30, 12, 11))   # coarse chunks, not aligned with the tiles' windows


def _nearest_two(rows, cols):
    d = np.hypot(rows[..., None] - SEEDS[:, 0], cols[..., None] - SEEDS[:, 1])
    order = np.argsort(d, axis=-1)
    d_sorted = np.take_along_axis(d, order, axis=-1)
    return order[..., 0] + 1, d_sorted[..., 0], d_sorted[..., 1]


def _score_at(rows, cols):
    rows, cols = np.asarray(rows, float), np.asarray(cols, float)
    label, d1, d2 = _nearest_two(rows, cols)
    state = np.array([STATES[int(v)] for v in label.ravel()]).reshape(label.shape)
    # A 5 % ripple, so that pixels mirrored across a straight wall do not score exactly alike: on exact
    # ties the flood's order of arrival decides, and that depends on where the window starts.
    ripple = 1 + 0.05 * np.sin(0.37 * rows + 0.23 * cols + 1)
    return np.minimum(1.0, (d2 - d1) / (2 * STEP) * ripple), state


class _Seg:
    def __init__(self, grown):
        walls = thin_walls(grown)
        self.grown, self.walls, self.labels, self.state = grown, walls, np.where(walls, 0, grown), dict(STATES)


def _coarse():
    grid = Grid(SHAPE, (0.1, 0.1), STEP)
    rows, cols = np.meshgrid(np.arange(grid.coarse_shape[0]) * STEP, np.arange(grid.coarse_shape[1]) * STEP,
                             indexing="ij")
    grown = _nearest_two(rows.astype(float), cols.astype(float))[0].astype(np.int32)
    return grid, _Seg(grown)


@pytest.fixture
def small_tiles(monkeypatch):
    monkeypatch.setattr(_refine, "TILE_PX", TILE)


def _as_dask(seg, chunks):
    out = _Seg(seg.grown)
    out.grown, out.labels, out.walls = (da.from_array(x, chunks=chunks) for x in (seg.grown, seg.labels, seg.walls))
    return out


def test_dask_coarse_arrays_give_the_numpy_result(small_tiles):
    grid, seg = _coarse()
    labels, walls = _refine.to_input_grid(grid, seg, _score_at, 0.5)
    assert len(_refine.tile_chunks(SHAPE)[0]) > 1   # several tiles, or the test proves nothing
    lazy_seg = _as_dask(seg, IRREGULAR)
    # reference: the in-memory result with numpy coarse arrays; exactly equal
    for lazy in (False, True):
        for s in (seg, lazy_seg):
            got_labels, got_walls = _refine.to_input_grid(grid, s, _score_at, 0.5, lazy=lazy)
            if lazy:
                assert isinstance(got_labels, da.Array)
                assert got_labels.chunks == _refine.tile_chunks(SHAPE)
            np.testing.assert_array_equal(np.asarray(got_labels), labels)
            np.testing.assert_array_equal(np.asarray(got_walls), walls)


def test_a_tile_reads_only_its_coarse_window(small_tiles):
    grid, seg = _coarse()
    touched = set()

    def record(block, block_info=None):
        touched.add(tuple(block_info[0]["chunk-location"]))
        return block

    chunks = ((10,) * 5 + (1,), (10,) * 5 + (8,))
    assert tuple(sum(c) for c in chunks) == grid.coarse_shape
    lazy_seg = _as_dask(seg, chunks)
    lazy_seg.grown = lazy_seg.grown.map_blocks(record, dtype=lazy_seg.grown.dtype)
    labels, _ = _refine.to_input_grid(grid, lazy_seg, _score_at, 0.5, lazy=True)
    first = np.asarray(labels.blocks[0, 0])
    # The first tile is input rows and columns 0:64; its window reaches halo = 4 samples * 4 + 2 = 18 pixels
    # further (to pixel 81), whose nearest sample is round(81 / 4) = 20, and the band needs 2 samples more:
    # coarse samples 0:23, i.e. chunks 0, 1 and 2 along each axis (derived from the rule in the docstring).
    assert touched == {(i, j) for i in range(3) for j in range(3)}
    # reference: the same tile of the in-memory result
    np.testing.assert_array_equal(first, _refine.to_input_grid(grid, seg, _score_at, 0.5)[0][:TILE, :TILE])


def test_tiles_equal_one_whole_frame_flood_and_walls_follow_the_score_valley(small_tiles, monkeypatch):
    grid, seg = _coarse()
    labels, walls = _refine.to_input_grid(grid, seg, _score_at, 0.5)
    monkeypatch.setattr(_refine, "TILE_PX", 4096)
    whole_labels, whole_walls = _refine.to_input_grid(grid, seg, _score_at, 0.5)
    # reference: one flood of the whole frame; the score here has no plateau and no exact ties, so the
    # 4-sample halo holds
    np.testing.assert_array_equal(labels, whole_labels)
    np.testing.assert_array_equal(walls, whole_walls)
    # Where the walls go: the score's valley is the true Voronoi boundary (analytic), and the flood meets
    # there to within a pixel (one-pixel walls sit on one side of the meeting line; diagonal steps add
    # sqrt(2)), while the nearest-sample staircase alone is off by up to step / 2 * sqrt(2) = 2.8 px.
    rows, cols = np.nonzero(walls)
    _, d1, d2 = _nearest_two(rows.astype(float), cols.astype(float))
    assert rows.size > 100
    assert np.max((d2 - d1) / 2) <= 1.5
    truth = _nearest_two(*np.indices(SHAPE).astype(float))[0]
    inside = (labels > 0) & ~ndimage.binary_dilation(walls, np.ones((5, 5), bool))
    np.testing.assert_array_equal(labels[inside], truth[inside])


def test_order_score_at_interpolates_as_map_coordinates():
    from domains import order

    rng = np.random.default_rng(3)
    step, n = 5, (23, 19)
    # two stripe components with smooth random phases (a band-limited field, built here)
    phase = ndimage.gaussian_filter(rng.normal(size=(2,) + n), 2.0) * 20
    fields = (1 + 0.1 * rng.normal(size=(2,) + n)) * np.exp(1j * phase)
    options = dict(groups=[[0], [1]], coefficients=[[0.5, 0.0], [0.0, 0.5]], threshold=0.1,
                   anisotropy_threshold=0.2, family_names=["a", "b"], offsets_rad=[np.zeros(1), np.zeros(1)])
    score_at = _refine.order_score_at(fields, step, **options)
    rows = rng.integers(0, n[0] * step - step + 1, 500)
    cols = rng.integers(0, n[1] * step - step + 1, 500)
    score, state = score_at(rows, cols)
    # reference: scipy.ndimage.map_coordinates (cubic spline, edge mode "nearest") and family_order
    where = np.array([rows / step, cols / step])
    a = np.stack([ndimage.map_coordinates(f.real, where, order=3, mode="nearest")
                  + 1j * ndimage.map_coordinates(f.imag, where, order=3, mode="nearest") for f in fields])
    expected = order.family_order(a[:, None, :], **options)
    np.testing.assert_array_equal(state, expected.state[0])
    np.testing.assert_allclose(score, expected.score[0], rtol=0, atol=1e-12)   # same arithmetic: float64 rounding
