"""A topograph larger than memory, analysed from a zarr store: peak memory and time per pixel (issue 11).

The store holds a 3×3 CDW on a hexagonal lattice (a = 0.35 nm, pixel 0.1 nm) in Voronoi
domains of the three translational variants (phases from
``domains.synth.cdw.cdw_variant_phases``), plus white noise, float32. It is written block by
block with dask (global coordinates, so blocks join without seams): generating it never needs
the whole image in memory. It is cached under bench-output/cache.

The analysis is the command a user runs, ``domains analyze STORE --pixel-size 0.1`` (default
configuration: the drift correction runs chunk by chunk too; ``--no-drift`` adds a configuration
with ``drift = false``), in a child process watched every 0.2 s: its resident memory (summed over its own children) is
sampled, and it is stopped when it passes ``--memory-limit`` or ``--timeout`` (the row then
says where it was: the last step its progress bar named). A child that finishes also writes
its own high-water mark (``VmHWM``) at exit, which catches a peak shorter than the sampling.
The last task count the bar drew (``37/120 tasks``) is kept as well: where a stopped run was
inside its step.

With ``--scheduler local:N`` the dask work runs in N worker processes started by the run; the
high-water mark (``VmHWM``) of every process under the child is read at each sample, so the
peak of each worker is known as well as the sum.

A store below the lazy threshold (4096^2 float32 is 64 MiB) is read whole: the same command
on it is the in-memory reference for the time per pixel.

Used by ``benchmarks/run.py --only store`` (and ``--only cluster``); alone:
``python benchmarks/large_store.py --size 16384 [--scheduler local:2]``.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

A_NM, PIXEL_NM, CHUNK = 0.35, 0.1, 2048
DOMAIN_PX = 1500  # typical domain size: one Voronoi seed per DOMAIN_PX^2 pixels
NOISE = 0.3


def store_path(size, cache):
    return Path(cache) / f"cdw3x3-{size}-float32.zarr"


def _block(rows, cols, seeds, variants):
    """The image on rows x cols (1-D pixel index arrays), in global coordinates."""
    import numpy as np
    from scipy.spatial import cKDTree

    from domains.synth.cdw import cdw_variant_phases

    g = 4 * np.pi / (np.sqrt(3) * A_NM)
    angles = np.deg2rad([0.0, 120.0, 240.0]) + np.deg2rad(7.0)
    G = g * np.stack([np.cos(angles), np.sin(angles)], axis=1)  # three vectors summing to zero
    y = (rows[:, None] * PIXEL_NM).astype(np.float64)
    x = (cols[None, :] * PIXEL_NM).astype(np.float64)
    rr, cc = np.meshgrid(rows, cols, indexing="ij")
    _, nearest = cKDTree(seeds).query(np.column_stack([rr.ravel(), cc.ravel()]))
    label = variants[nearest].reshape(rr.shape)
    phases = np.array([cdw_variant_phases(3, m, 0) for m in range(3)])  # (variant, component)
    image = np.zeros(rr.shape, np.float32)
    for j, (gx, gy) in enumerate(G):
        image += np.cos(gx * x + gy * y).astype(np.float32)
        image += (0.5 * np.cos((gx * x + gy * y) / 3 + phases[label, j])).astype(np.float32)
    rng = np.random.default_rng([int(rows[0]), int(cols[0]), 7])
    image += rng.normal(scale=NOISE, size=image.shape).astype(np.float32)
    return image


def make_store(size, cache):
    """Write (once) the size x size float32 store, chunk by chunk; return its path."""
    import dask
    import dask.array as da
    import numpy as np

    path = store_path(size, cache)
    if path.exists():
        return path
    rng = np.random.default_rng(11)
    n_seeds = max(4, round(size * size / DOMAIN_PX**2))
    seeds = rng.uniform(0, size, size=(n_seeds, 2))
    variants = rng.integers(0, 3, size=n_seeds)

    def block(block_info=None):
        (r0, r1), (c0, c1) = block_info[None]["array-location"]
        return _block(np.arange(r0, r1), np.arange(c0, c1), seeds, variants)

    lazy = da.map_blocks(block, chunks=((CHUNK,) * (size // CHUNK) + ((size % CHUNK,) if size % CHUNK else ()),) * 2,
                         dtype=np.float32)
    tmp = path.with_name(path.name + ".tmp")
    path.parent.mkdir(parents=True, exist_ok=True)
    with dask.config.set(scheduler="threads", num_workers=2):
        lazy.to_zarr(str(tmp), overwrite=True)
    tmp.rename(path)
    return path


def _children(pid):
    """Child processes of ``pid``, started from any of its threads (a local cluster starts its
    workers from its event-loop thread, so the main thread's list alone misses them)."""
    found = []
    for task in Path(f"/proc/{pid}/task").glob("*"):
        try:
            found.extend(int(c) for c in (task / "children").read_text().split())
        except OSError:
            continue
    return found


def _tree_rss(pid):
    """Resident bytes of a process and its descendants (Linux /proc)."""
    total, todo = 0, [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/status") as handle:
                for line in handle:
                    if line.startswith("VmRSS:"):
                        total += int(line.split()[1]) * 1024
            todo.extend(_children(p))
        except (FileNotFoundError, ProcessLookupError, PermissionError):
            continue
    return total


def _tree_peaks(pid, peaks):
    """Update ``peaks[pid] = (name, VmHWM bytes)`` for each process under ``pid`` (``pid`` itself included)."""
    todo = [pid]
    while todo:
        p = todo.pop()
        try:
            with open(f"/proc/{p}/status") as handle:
                hwm = next((int(line.split()[1]) * 1024 for line in handle if line.startswith("VmHWM:")), 0)
            with open(f"/proc/{p}/cmdline", "rb") as handle:
                name = handle.read().replace(b"\0", b" ").decode(errors="replace")[:120]
            todo.extend(_children(p))
        except (FileNotFoundError, ProcessLookupError, PermissionError):
            continue
        peaks[p] = (name, max(hwm, peaks.get(p, ("", 0))[1]))


#: The configuration of the store runs with ``--no-drift``.
NO_DRIFT_CONFIG = "drift = false\n"


def analyse_store(path, size, memory_limit, timeout, work, extra=()):
    """Run ``domains analyze`` on the store in a watched child; return the measurements.

    The bundle goes to ``work``/bundle and is removed afterwards; the child's stderr stays in
    ``work``/stderr.txt.
    """
    out = Path(work)
    shutil.rmtree(out, ignore_errors=True)
    out.mkdir(parents=True)
    hwm = out / "hwm.txt"
    # The command a user runs, plus an exit hook that writes this process's VmHWM line.
    code = ("import atexit, sys\n"
            f"def _hwm(path={str(hwm)!r}):\n"
            "    with open('/proc/self/status') as s, open(path, 'w') as f:\n"
            "        f.write(''.join(line for line in s if line.startswith('VmHWM:')))\n"
            "atexit.register(_hwm)\n"
            "from domains.cli import main\nsys.exit(main())")
    command = [sys.executable, "-c", code,
               "analyze", str(path), "--pixel-size", str(PIXEL_NM), "--out", str(out / "bundle"), *extra]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    log = out / "stderr.txt"
    peak, status, start, peaks = 0, "finished", time.perf_counter(), {}
    with open(log, "wb") as err:
        child = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=err, env=env, start_new_session=True)
        while child.poll() is None:
            peak = max(peak, _tree_rss(child.pid))
            _tree_peaks(child.pid, peaks)
            elapsed = time.perf_counter() - start
            if peak > memory_limit or elapsed > timeout:
                status = (f"stopped at {peak / 2**30:.2f} GiB resident" if peak > memory_limit
                          else f"stopped after {elapsed:.0f} s")
                os.killpg(child.pid, 9)  # the child's own session: it and its workers, nothing else
                child.wait()
                break
            time.sleep(0.2)
    wall = time.perf_counter() - start
    shutil.rmtree(out / "bundle", ignore_errors=True)
    if hwm.exists() and hwm.read_text().split():
        peak = max(peak, int(hwm.read_text().split()[1]) * 1024)
    text = log.read_text(errors="replace")
    steps = re.findall(r"domains: ([^:\r\n]+):", text)
    counts = re.findall(r"(\d+/\d+ tasks)\]", text)
    # Processes under the child other than the child itself: dask.distributed workers (a local
    # cluster's worker processes and their helpers), by their own high-water mark.
    others = sorted(((hwm, name) for p, (name, hwm) in peaks.items() if p != child.pid), reverse=True)
    if status == "finished" and child.returncode != 0:
        status = f"failed (exit {child.returncode}): {text.strip().splitlines()[-1] if text.strip() else ''}"
    return {"size": size, "status": status, "wall_s": wall, "peak_bytes": peak,
            "last_step": steps[-1] if steps else None, "last_tasks": counts[-1] if counts else None,
            "main_peak_bytes": peaks.get(child.pid, ("", 0))[1],
            "worker_peak_bytes": [hwm for hwm, name in others if "spawn_main" in name],
            "others": [[name, hwm] for hwm, name in others][:8], "extra": list(extra), "log": str(log)}


def main():
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--size", type=int, default=16384)
    parser.add_argument("--cache", default=str(ROOT / "bench-output" / "cache"))
    parser.add_argument("--memory-limit-gib", type=float, default=6.0)
    parser.add_argument("--timeout", type=float, default=1800)
    parser.add_argument("--scheduler", default=None, help="passed to domains analyze (e.g. local:2)")
    parser.add_argument("--no-drift", action="store_true", help="run with drift = false")
    args = parser.parse_args()
    path = make_store(args.size, args.cache)
    extra = ["--scheduler", args.scheduler] if args.scheduler else []
    if args.no_drift:
        extra += ["--config", str(Path(args.cache).parent / "no-drift.toml")]
        Path(args.cache).parent.joinpath("no-drift.toml").write_text(NO_DRIFT_CONFIG)
    tag = f"-{args.scheduler.replace(':', '')}" if args.scheduler else ""
    work = Path(args.cache).parent / f"store-run-{args.size}{tag}"
    print(json.dumps(analyse_store(path, args.size, args.memory_limit_gib * 2**30, args.timeout, work, extra)))


if __name__ == "__main__":
    main()
