"""The grid step per energy slice against the per-map work of one image of the same size, in one process.

A spectroscopic grid (energy, row, col) of ``--energies`` slices is written once to a zarr
store (float32, ``--chunk`` energies per stored chunk) and opened as a dask array, as
``domains analyze --grid STORE.zarr`` opens it. Measured in this process:

1. **one image**: what the bias comparison does for one map of the same size, in memory:
   ``domain_contrast`` of that map (its lock-in at the order wavevectors and per-domain rows)
   and its electronic fields (the smoothed map and the order amplitude,
   ``compare._electronic_fields``) reduced by ``compare._contrast_set`` for both quantities;
   the geometry (interiors, wall bands, the line-offset model) is built beforehand, once, as
   the comparison builds it once for all its maps. CPU time (``time.process_time``).
2. **grid**: ``pipeline._grid_step`` on the dask grid (fingerprints, electronic contrast,
   types), CPU time divided by the number of slices: the per-slice cost, reading and
   decompressing the store included.

Both are repeated (``--repeat``), interleaved, and the best of each is kept. Then, with
``tracemalloc`` (which sees numpy's buffers), the peak of memory allocated during one grid
step and during one image's work, in units of one float32 slice (the grid itself is
``--energies`` slices).

The scene is ``domains.synth.electronic_types_scene`` (3×3 CDW, 0.05 nm pixels) at four
biases; slice e of the grid is its map e mod 4 times (1 + 0.02 e), so the order amplitude
changes with energy. Prints one JSON object on the last line of stdout. Used by
``benchmarks/run.py --only grid``; run alone with
``python benchmarks/grid_slices.py --size 512 --energies 16``.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import tracemalloc
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # measure the checkout this file is in, not an installed copy
    sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

SIGMA_NM = 0.5  # sigma |Q| = 3.6 for the scene's 3x3 CDW (|Q| = 7.2 rad/nm), as in tests/test_types.py
BIASES_V = (-0.3, -0.1, 0.1, 0.3)


def scene_and_store(size, energies, chunk, cache):
    """The scene's labels and order wavevectors, the grid's energies, and the grid as a dask array on a zarr store."""
    import dask.array as da
    import zarr

    from domains.synth import electronic_types_scene

    scene = electronic_types_scene(shape=(size, size), n_types=2, n_domains=8, biases_V=BIASES_V, tip_change=False,
                                   setpoint_ratio=1.0, rng=3)
    labels = scene.truth_maps["labels"].astype(np.int32)
    q = np.array(scene.truth["q_cdw_rad_per_nm"], float)
    energies_V = np.linspace(-0.3, 0.3, energies)
    path = Path(cache) / f"grid_{size}_{energies}_{chunk}.zarr"
    if not path.exists():
        store = zarr.open_array(str(path), mode="w", shape=(energies, size, size), chunks=(chunk, size, size),
                                dtype="float32")
        for e in range(energies):
            store[e] = (scene.maps[e % len(BIASES_V)].data * (1 + 0.02 * e)).astype(np.float32)
    grid = da.from_zarr(str(path))
    image = np.asarray(scene.maps[0].data, np.float32)
    return labels, q, energies_V, grid, image


def one_image(image, labels, q, geo, pixel):
    """The bias comparison's per-map work for one map (domain_contrast; electronic fields and their statistics)."""
    from domains import compare

    compare.domain_contrast({0.1: image}, labels, q, sigma_nm=SIGMA_NM, pixel_size_nm=pixel)
    bad = ~np.isfinite(image)
    smooth, amp = compare._electronic_fields(image, 1.0, bad, sigma_nm=SIGMA_NM, pixel=pixel, step=geo.step, q=q)
    compare._contrast_set("conductance", [smooth], geo)
    compare._contrast_set("amplitude", [amp], geo)


def grid_step(grid, energies_V, labels, q, pixel):
    from domains import pipeline
    from domains._scan import Scan

    scan = Scan(grid, pixel_size_nm=pixel, energies_V=energies_V, source="<benchmark grid>",
                metadata={"units": "nS"})
    summary, tables, views = {}, {}, {}
    pipeline._grid_step(summary, tables, views, scan, labels, q, SIGMA_NM, pixel, None)
    return summary


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--size", type=int, default=512)
    parser.add_argument("--energies", type=int, default=16)
    parser.add_argument("--chunk", type=int, default=4, help="energies per stored chunk (default 4)")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--cache", type=Path, default=ROOT / "bench-output" / "cache")
    args = parser.parse_args(argv)
    args.cache.mkdir(parents=True, exist_ok=True)

    from domains import compare

    labels, q, energies_V, grid, image = scene_and_store(args.size, args.energies, args.chunk, args.cache)
    pixel = (0.05, 0.05)
    geo = compare._contrast_geometry(labels.astype(np.int64), np.zeros(labels.shape, bool), sigma_nm=SIGMA_NM,
                                     pixel=pixel, margin_sigma=3.5, band_sigma=3.0)
    summary = grid_step(grid, energies_V, labels, q, pixel)  # warm-up (imports, caches)
    one_image(image, labels, q, geo, pixel)
    best_one, best_grid = float("inf"), float("inf")
    for _ in range(args.repeat):
        start = time.process_time()
        one_image(image, labels, q, geo, pixel)
        best_one = min(best_one, time.process_time() - start)
        start = time.process_time()
        grid_step(grid, energies_V, labels, q, pixel)
        best_grid = min(best_grid, time.process_time() - start)

    slice_bytes = args.size**2 * 4
    tracemalloc.start()
    base = tracemalloc.get_traced_memory()[0]
    grid_step(grid, energies_V, labels, q, pixel)
    grid_peak = tracemalloc.get_traced_memory()[1] - base
    tracemalloc.reset_peak()
    base = tracemalloc.get_traced_memory()[0]
    one_image(image, labels, q, geo, pixel)
    one_peak = tracemalloc.get_traced_memory()[1] - base
    tracemalloc.stop()
    types = summary["grid"].get("electronic_types", {})
    print(json.dumps({
        "size": args.size, "energies": args.energies, "chunk": args.chunk, "working_step_px": int(geo.step),
        "one_image_cpu_s": best_one, "grid_cpu_s": best_grid, "per_slice_cpu_s": best_grid / args.energies,
        "ratio": best_grid / args.energies / best_one,
        "grid_peak_bytes": grid_peak, "one_image_peak_bytes": one_peak, "slice_bytes": slice_bytes,
        "grid_peak_slices": grid_peak / slice_bytes, "one_image_peak_slices": one_peak / slice_bytes,
        "n_types": types.get("n_types"),
    }))


if __name__ == "__main__":
    main()
