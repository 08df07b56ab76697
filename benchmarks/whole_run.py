"""One whole run of ``domains.pipeline.analyze`` in a fresh process: time, peak memory, step times.

The input is the package's synthetic √13×√13 scene with two conductance maps
(``domains.synth.real.real_scene("sqrt13", size=N, rng=41)``), cast to float32 as a
microscope writes it. It is generated once in a separate process and cached as a pickle, so
that neither the generator's memory nor its time counts.

Measured in this process, in this order:

1. the imports the run needs (every module of ``domains``, scipy, scikit-image, matplotlib,
   dask): the resident-memory baseline, ``ru_maxrss`` after them;
2. loading the inputs (topograph + 2 maps, float32) and ``analyze``: wall and CPU
   (``time.process_time``, every thread of the process) time, ``Analysis.timings`` (wall
   seconds per named step) and the peak resident memory above the baseline;
3. with ``--reference``, after the peak has been read: the textbook real-space lock-in at
   3 wavevectors of the same topograph (I cos and I sin through
   ``scipy.ndimage.gaussian_filter`` per q, sigma = 8 px), whose CPU time is the yardstick.

Prints one JSON object on the last line of stdout. Used by ``benchmarks/run.py``; run alone
with ``python benchmarks/whole_run.py --size 512 [--reference]``.
"""

from __future__ import annotations

import argparse
import json
import pickle
import resource
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # measure the checkout this file is in, not an installed copy
    sys.path.insert(0, str(ROOT))

SCENE, SEED = "sqrt13", 41
REFERENCE_SIGMA_PX = 8.0


def _maxrss_bytes():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024  # Linux: KiB


def scene_path(size, cache):
    return Path(cache) / f"{SCENE}-{size}-seed{SEED}-float32.pickle"


def make_scene(size, cache):
    """Generate and cache the inputs (topograph, 2 maps) as float32 Scans; return the path."""
    import numpy as np

    from domains.synth.real import real_scene

    path = scene_path(size, cache)
    if path.exists():
        return path
    scene = real_scene(SCENE, size=size, rng=SEED)
    f32 = lambda scan: scan.with_data(np.asarray(scan.data, dtype=np.float32))  # noqa: E731
    q_cdw = np.asarray(scene.truth["q_cdw_rad_per_nm"], dtype=float).reshape(-1, 2)
    payload = {"topography": f32(scene.topography), "maps": [f32(m) for m in scene.maps], "q_rad_per_nm": q_cdw}
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(".tmp")
    with open(tmp, "wb") as handle:
        pickle.dump(payload, handle, protocol=pickle.HIGHEST_PROTOCOL)
    tmp.replace(path)
    return path


def _import_everything():
    """Load what a run loads, so that the memory baseline holds the code and not the data."""
    import importlib
    import pkgutil

    import domains

    for info in pkgutil.walk_packages(domains.__path__, "domains."):
        importlib.import_module(info.name)
    for name in ("scipy.ndimage", "scipy.fft", "scipy.optimize", "scipy.interpolate", "skimage.measure",
                 "skimage.segmentation", "skimage.morphology", "matplotlib.pyplot", "dask.array", "zarr"):
        try:
            importlib.import_module(name)
        except ImportError:
            pass


def textbook_lockin(image, q_px, sigma_px, truncate=6.0):
    """The plain real-space lock-in: Gaussian-filter I cos and I sin for each q, divide by the filtered frame."""
    import numpy as np
    from scipy import ndimage

    y, x = np.mgrid[: image.shape[0], : image.shape[1]]
    norm = ndimage.gaussian_filter(np.ones(image.shape), sigma_px, truncate=truncate, mode="constant")
    out = []
    for qx, qy in q_px:
        arg = qx * x + qy * y
        re = ndimage.gaussian_filter(image * np.cos(arg), sigma_px, truncate=truncate, mode="constant")
        im = ndimage.gaussian_filter(image * np.sin(arg), sigma_px, truncate=truncate, mode="constant")
        out.append((re - 1j * im) / norm)
    return np.array(out)


def measure(size, cache, reference):
    _import_everything()
    import matplotlib

    matplotlib.use("Agg")
    import numpy as np

    from domains.pipeline import analyze

    baseline = _maxrss_bytes()
    with open(scene_path(size, cache), "rb") as handle:
        payload = pickle.load(handle)
    topo, maps = payload["topography"], payload["maps"]
    cpu, wall = time.process_time(), time.perf_counter()
    result = analyze(topo, maps=maps, progress=False)
    cpu, wall = time.process_time() - cpu, time.perf_counter() - wall
    peak = _maxrss_bytes()
    sigma = (result.choices.get("sigma_nm") or {}).get("value")
    out = {
        "size": size,
        "shape": list(topo.data.shape),
        "n_maps": len(maps),
        "input_bytes": int(topo.data.size * 4),
        "baseline_bytes": baseline,
        "peak_bytes": peak,
        "peak_above_baseline_bytes": peak - baseline,
        "wall_s": wall,
        "cpu_s": cpu,
        "timings": dict(result.timings),
        "sigma_px": None if sigma is None else float(sigma) / float(np.mean(topo.pixel_size_nm)),
        "order": result.summary.get("superlattice", {}).get("order"),
        "domains": result.summary.get("domains", {}).get("count"),
    }
    del result
    if reference:
        # Three wavevectors of the scene (its CDW star), in rad/px; the cost does not depend on them.
        q_px = (np.asarray(payload["q_rad_per_nm"])[:3] * np.asarray(topo.pixel_size_nm)[::-1]).tolist()
        while len(q_px) < 3:
            q_px.append([0.3 * (len(q_px) + 1), 0.1])
        ref_cpu, ref_wall = time.process_time(), time.perf_counter()
        textbook_lockin(np.asarray(topo.data), q_px, REFERENCE_SIGMA_PX)
        out["reference_cpu_s"] = time.process_time() - ref_cpu
        out["reference_wall_s"] = time.perf_counter() - ref_wall
        out["reference_sigma_px"] = REFERENCE_SIGMA_PX
    return out


def main():
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--size", type=int, required=True, help="columns (and rows) of the scene")
    parser.add_argument("--cache", default=str(ROOT / "bench-output" / "cache"), help="folder of cached scenes")
    parser.add_argument("--make-scene", action="store_true", help="only generate and cache the scene")
    parser.add_argument("--reference", action="store_true", help="also time the textbook 3-q lock-in")
    args = parser.parse_args()
    if args.make_scene:
        print(json.dumps({"scene": str(make_scene(args.size, args.cache))}))
        return
    if not scene_path(args.size, args.cache).exists():
        sys.exit(f"whole_run.py: no cached scene for size {args.size}: run with --make-scene first")
    print(json.dumps(measure(args.size, args.cache, args.reference)))


if __name__ == "__main__":
    main()
