"""One whole run of ``domains.pipeline.analyze`` in a fresh process: time, peak memory, step times.

The input is the package's synthetic √13×√13 scene with two conductance maps
(``domains.synth.real.real_scene("sqrt13", size=N, rng=41)``), cast to float32 as a
microscope writes it. It is generated once in a separate process and cached as a pickle, so
that neither the generator's memory nor its time counts.

Measured in this process, in this order:

1. the imports the run needs (every module of ``domains``, scipy, scikit-image, matplotlib,
   dask): the resident-memory baseline, the peak resident size after them;
2. loading the inputs (topograph + 2 maps, float32) and ``analyze``: wall and CPU
   (``time.process_time``, every thread of the process) time, ``Analysis.timings`` (wall
   seconds per named step) and the peak resident memory above the baseline (see
   :func:`peak_rss_bytes`);
3. with ``--reference``, after the peak has been read: the textbook real-space lock-in at
   3 wavevectors of the same topograph (I cos and I sin through
   ``scipy.ndimage.gaussian_filter`` per q), whose CPU time is the yardstick: at sigma = 8 px
   (fixed, as in the kernel case, so the yardstick does not move with the run's choices) and
   at the sigma the run chose (the textbook cost grows with sigma).

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


def peak_rss_bytes():
    """The peak resident memory of this process so far.

    ``VmHWM`` of /proc/self/status where there is one: the high-water mark of this address
    space. ``getrusage(RUSAGE_SELF).ru_maxrss`` is the same number for a process that was not
    started by a large one, but Linux carries the parent's resident size at the fork over
    ``execve`` into it (kernel ``exec_mmap`` keeps the old address space's high-water mark), so a
    worker started by a parent that had just held the 4096^2 kernel case would report that
    parent's peak as its own. ``ru_maxrss`` is the fallback elsewhere.
    """
    try:
        with open("/proc/self/status") as handle:
            for line in handle:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    scale = 1 if sys.platform == "darwin" else 1024  # bytes on macOS, KiB on Linux
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * scale


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


def measure(size, cache, reference):
    _import_everything()
    import matplotlib

    matplotlib.use("Agg")
    import numpy as np

    from domains.pipeline import analyze
    from domains.present import present

    baseline = peak_rss_bytes()
    with open(scene_path(size, cache), "rb") as handle:
        payload = pickle.load(handle)
    topo, maps = payload["topography"], payload["maps"]
    cpu, wall = time.process_time(), time.perf_counter()
    result = analyze(topo, maps=maps, progress=False)
    # The figures are drawn after the analysis (as `domains analyze` does when it writes the bundle): counted.
    drawn = time.perf_counter()
    present(result)
    figures_s = time.perf_counter() - drawn
    cpu, wall = time.process_time() - cpu, time.perf_counter() - wall
    peak = peak_rss_bytes()
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
        "timings": {**result.timings, "figures": figures_s},
        "sigma_px": None if sigma is None else float(sigma) / float(np.mean(topo.pixel_size_nm)),
        "order": result.summary.get("superlattice", {}).get("order"),
        "domains": result.summary.get("domains", {}).get("count"),
    }
    del result
    if reference:
        # The same textbook lock-in as the kernel case (benchmarks/ is on sys.path when this file runs).
        from lockin_kernel import textbook_lockin

        # Three wavevectors of the scene (its CDW star), in rad/px; the cost does not depend on them.
        q_px = (np.asarray(payload["q_rad_per_nm"])[:3] * np.asarray(topo.pixel_size_nm)[::-1]).tolist()
        while len(q_px) < 3:
            q_px.append([0.3 * (len(q_px) + 1), 0.1])
        for key, sigma_px in (("reference", REFERENCE_SIGMA_PX), ("reference_own_sigma", out["sigma_px"])):
            if sigma_px is None or sigma_px > min(topo.data.shape) / 2:
                continue
            ref_cpu, ref_wall = time.process_time(), time.perf_counter()
            textbook_lockin(np.asarray(topo.data), q_px, sigma_px)
            out[f"{key}_cpu_s"] = time.process_time() - ref_cpu
            out[f"{key}_wall_s"] = time.perf_counter() - ref_wall
            out[f"{key}_sigma_px"] = sigma_px
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
