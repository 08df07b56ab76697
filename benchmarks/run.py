"""Benchmarks: each case is timed against a reference computation run in the same process.

Printed numbers are ratios (ours / reference), so that a shared, noisy machine still gives
comparable results from run to run. Run with `make bench`.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import ndimage

import domains
from domains.synth import cdw_scene


def best_of(fn, repeat):
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def reference_lockin(image, q, sigma_px, pixel):
    """The plain real-space lock-in: Gaussian-filter I cos and I sin separately for each q."""
    y, x = np.mgrid[: image.shape[0], : image.shape[1]] * pixel
    out = []
    for qx, qy in q:
        arg = qx * x + qy * y
        re = ndimage.gaussian_filter(image * np.cos(arg), sigma_px, truncate=6, mode="constant")
        im = ndimage.gaussian_filter(image * np.sin(arg), sigma_px, truncate=6, mode="constant")
        out.append(re - 1j * im)
    return np.array(out)


def main():
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--size", type=int, default=1024, help="image size in pixels (default 1024)")
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--kernel-size", type=int, default=4096,
                        help="image size of the lock-in kernel benchmark (default 4096; 0 skips it)")
    args = parser.parse_args()
    scene = cdw_scene(shape=(args.size, args.size), rng=0)
    image, pixel = scene.topography.data, scene.topography.pixel_size_nm[0]
    q = np.vstack([scene.truth["q_cdw_rad_per_nm"], scene.truth["lattice"]["q_bragg_rad_per_nm"]])
    sigma_nm = 0.8
    rows = []

    ours = best_of(lambda: domains.lockin(image, q, sigma_nm=sigma_nm, pixel_size_nm=pixel), args.repeat)
    ref = best_of(lambda: reference_lockin(image, q, sigma_nm / pixel, pixel), args.repeat)
    rows.append(("lock-in, 6 q, in memory vs scipy real-space filters", ours, ref))

    import dask
    import dask.array as da

    lazy = da.from_array(image, chunks=args.size // 4)
    with dask.config.set(scheduler="threads"):
        chunked = best_of(lambda: domains.lockin(lazy, q, sigma_nm=sigma_nm, pixel_size_nm=pixel).compute(),
                          args.repeat)
    rows.append(("lock-in, 6 q, dask 4x4 chunks vs in memory", chunked, ours))

    from domains.pipeline import analyze

    small = cdw_scene(rng=0)
    full = best_of(lambda: analyze(small.topography, maps=small.maps, progress=False), 1)
    one = best_of(lambda: domains.lockin(small.topography.data, q[:3], sigma_nm=sigma_nm,
                                         pixel_size_nm=small.topography.pixel_size_nm), args.repeat)
    rows.append(("whole analysis of the 512^2 demo scene vs one 3-q lock-in of it", full, one))

    notes = []
    if args.kernel_size:
        import lockin_kernel  # benchmarks/ is on sys.path when this file runs as a script

        kernel_rows, notes = lockin_kernel.run(size=args.kernel_size, repeat=args.repeat)
        rows.extend(kernel_rows)

    width = max(len(r[0]) for r in rows)
    print(f"{'case':<{width}}  {'ours (s)':>9}  {'ref (s)':>9}  {'ratio':>7}")
    for name, a, b in rows:
        print(f"{name:<{width}}  {a:9.3f}  {b:9.3f}  {a / b:7.2f}")
    for note in notes:
        print(note)


if __name__ == "__main__":
    main()
