"""The lazy run (a dask-backed topograph, issue 11) against the in-memory run of the same analysis.

Reference for every comparison: the in-memory run of the same code on the same image (the definition
of the result); the lazy run must reproduce it. Labels are compared exactly; numbers to float32
precision (relative 1e-6: the lock-in's float32/float64 blocks and the order of partial sums are
the only differences). Truth for the domain layout comes from domains.synth (set analytically).
The labels are brought back to the input grid in tiles; ``TILE_PX`` is set small here so that a
512^2 frame holds several tiles and the input chunks (irregular) cut across them.
"""

import dask.array as dask_array
import numpy as np
import pytest
from scipy import ndimage

from domains import _refine, pipeline
from domains.io import read_bundle
from domains.synth import cdw_scene

CHUNKS = ((100, 200, 212), (300, 137, 75))  # irregular, not aligned with the tiles or the grid step
TILE = 160


@pytest.fixture(scope="module")
def runs():
    scene = cdw_scene(shape=(512, 512), n_domains=4, rng=3)
    topo = scene.topography
    # The default analysis, drift correction included (chunk by chunk in the lazy run).
    config = pipeline.Config()
    saved = _refine.TILE_PX
    _refine.TILE_PX = TILE
    try:
        memory = pipeline.analyze(topo, config=config, progress=False)
        lazy_topo = topo.with_data(dask_array.from_array(np.asarray(topo.data), chunks=CHUNKS))
        lazy = pipeline.analyze(lazy_topo, config=config, progress=False)
    finally:
        _refine.TILE_PX = saved
    return scene, memory, lazy


def test_lazy_maps_stay_dask_and_labels_equal_in_memory(runs):
    _, memory, lazy = runs
    coarse = [k for k in lazy.maps if k.startswith(("amplitude/", "phase/"))]
    assert coarse  # the order's maps on the decimated grid, streamed to the bundle too
    for name in ["labels", "walls", "topography"] + coarse:
        assert isinstance(lazy.maps[name][0], dask_array.Array), name
    # reference: the in-memory run; labels and walls exactly
    np.testing.assert_array_equal(np.asarray(lazy.maps["labels"][0]), memory.maps["labels"][0])
    np.testing.assert_array_equal(np.asarray(lazy.maps["walls"][0]), memory.maps["walls"][0])
    # the levelled topograph to float32 precision (same levelling, float32 map)
    np.testing.assert_allclose(np.asarray(lazy.maps["topography"][0]), memory.maps["topography"][0],
                               rtol=1e-6, atol=1e-6 * float(np.abs(memory.maps["topography"][0]).max()))


def test_lazy_numbers_equal_in_memory(runs):
    _, memory, lazy = runs
    m, z = memory.summary, lazy.summary
    # reference: the in-memory run
    assert z["order_kind"] == m["order_kind"] and z["superlattice"]["order"] == m["superlattice"]["order"]
    assert z["domains"]["count"] == m["domains"]["count"] >= 2
    assert z["defects"]["count"] == m["defects"]["count"]
    assert z["lattice"]["kind"] == m["lattice"]["kind"]
    np.testing.assert_allclose(z["lattice"]["a_nm"], m["lattice"]["a_nm"], rtol=1e-6)
    np.testing.assert_allclose(z["superlattice"]["q_rad_per_nm"], m["superlattice"]["q_rad_per_nm"], rtol=1e-6)
    np.testing.assert_allclose(z["sigma_nm"], m["sigma_nm"], rtol=1e-6)
    np.testing.assert_allclose(z["trusted_fraction"], m["trusted_fraction"], rtol=1e-12)
    np.testing.assert_allclose(z["choices"]["order_threshold"]["value"], m["choices"]["order_threshold"]["value"],
                               rtol=1e-6)
    rows_m, rows_z = memory.tables["domains"][1], lazy.tables["domains"][1]
    assert [r["domain"] for r in rows_z] == [r["domain"] for r in rows_m]
    for a, b in zip(rows_z, rows_m):
        assert a["n_pixels"] == b["n_pixels"] and a["touches_edge"] == b["touches_edge"]
        assert a["state"] == b["state"] and a["mean_phase_deg"] == b["mean_phase_deg"]
        for key in ("area_nm2", "centroid_x_nm", "centroid_y_nm", "mean_amplitude", "equivalent_diameter_nm"):
            np.testing.assert_allclose(a[key], b[key], rtol=1e-6, err_msg=key)
    for key in memory.maps:
        if key.startswith(("amplitude/", "phase/")):
            scale = float(np.abs(memory.maps[key][0]).max())
            np.testing.assert_allclose(np.asarray(lazy.maps[key][0]), memory.maps[key][0], rtol=0,
                                       atol=1e-5 * scale, err_msg=key)


def test_domain_crossing_chunks_keeps_one_id(runs):
    scene, _, lazy = runs
    labels = np.asarray(lazy.maps["labels"][0])
    truth = scene.truth_maps["variant"]
    borders = np.cumsum(CHUNKS[0])[:-1], np.cumsum(CHUNKS[1])[:-1]
    crossing = 0
    for lab in np.unique(labels[labels > 0]):
        where = labels == lab
        rows, cols = np.nonzero(where)
        spans = any(rows.min() < b <= rows.max() for b in borders[0]) or any(
            cols.min() < b <= cols.max() for b in borders[1])
        if where.sum() < 5000 or not spans:
            continue
        crossing += 1
        # one id, one connected region (4-connectivity: the walls are 4-connected cuts)
        assert ndimage.label(where)[1] == 1, lab
        # and it covers one true domain: the truth's variant is the same over >= 95 % of it
        # (the rest: the lock-in's resolution at the walls; common practice, no source)
        values, counts = np.unique(truth[where], return_counts=True)
        assert counts.max() >= 0.95 * where.sum(), (lab, values, counts)
    assert crossing >= 2


def test_lazy_bundle_streams_maps_to_zarr(runs, tmp_path):
    _, memory, lazy = runs
    out = pipeline.write_analysis(lazy, tmp_path / "lazy", command_line=["test"], inputs=[])
    bundle = read_bundle(out)
    # reference: the in-memory run's maps
    np.testing.assert_array_equal(bundle.maps["labels"][...], memory.maps["labels"][0])
    np.testing.assert_array_equal(bundle.maps["walls"][...], memory.maps["walls"][0])
    assert bundle.maps["labels"].chunks == (TILE, TILE)
    assert bundle.summary["domains"]["count"] == memory.summary["domains"]["count"]
    # figures come from an overview of at most 1024 pixels per side (here the whole 512^2 frame)
    from domains.present import present

    assert set(bundle.figures) == set(present(memory).figures)


@pytest.mark.parametrize("with_mask", [False, True])
def test_trusted_on_grid_equals_trusted_mask_sampled(with_mask):
    from domains._grid import Grid
    from domains._lockin import trusted_mask

    shape, pixel, sigma = (300, 257), (0.1, 0.12), 0.5
    mask = np.random.default_rng(1).random(shape) > 0.999 if with_mask else None
    grid = Grid(shape, pixel, 3)
    trusted_c, fraction = _refine.trusted_on_grid(grid, sigma, pixel, mask)
    # reference: domains.trusted_mask on the full grid (Euclidean distance transform), sampled
    full = trusted_mask(shape, sigma_nm=sigma, pixel_size_nm=pixel, mask=mask)
    np.testing.assert_array_equal(trusted_c, grid.sample(full))
    assert fraction == pytest.approx(full.mean(), rel=1e-12)


def _numbers_agree(memory, lazy, path="summary"):
    """Every number of ``lazy`` equals ``memory``'s to float32 precision; strings and flags exactly.

    Returns the paths where they differ (empty when all agree)."""
    import math

    if isinstance(memory, dict):
        if set(memory) != set(lazy):
            return [f"{path}: keys {sorted(set(memory) ^ set(lazy))}"]
        return [d for k in memory for d in _numbers_agree(memory[k], lazy[k], f"{path}/{k}")]
    if isinstance(memory, (list, tuple)):
        if len(memory) != len(lazy):
            return [f"{path}: length {len(memory)} != {len(lazy)}"]
        return [d for i, (a, b) in enumerate(zip(memory, lazy)) for d in _numbers_agree(a, b, f"{path}[{i}]")]
    if isinstance(memory, float) or isinstance(lazy, float):
        same = (math.isnan(memory) and math.isnan(lazy)) if memory is not None and lazy is not None and (
            math.isnan(memory) or math.isnan(lazy)) else math.isclose(memory, lazy, rel_tol=1e-5, abs_tol=1e-9)
        return [] if same else [f"{path}: {memory} != {lazy}"]
    return [] if memory == lazy else [f"{path}: {memory!r} != {lazy!r}"]


def test_every_number_of_the_summary_equals_in_memory(runs):
    from domains.io import json_safe

    _, memory, lazy = runs
    m, z = json_safe(memory.summary), json_safe(lazy.summary)
    # The notes say how each run read the image (the lazy one adds its own); every other entry is a result.
    m.pop("notes"), z.pop("notes")
    # reference: the in-memory run of the same analysis (float32 precision: relative 1e-5)
    assert _numbers_agree(m, z) == []
    for name in ("domains", "walls"):
        assert _numbers_agree(memory.tables[name], lazy.tables[name], name) == []
