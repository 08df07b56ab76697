"""Benchmarks of cdw-domains (``make bench``): each case is a ratio against a reference measured alongside.

Ratios (ours / reference), not seconds, are what carry from one machine or one load to the
next; the seconds are printed too. Nothing here is a test: no case fails the build, the
targets (issue 10 and 11) are printed beside the values.

Cases (``--only`` picks some, comma separated):

startup  ``domains --help`` and ``import domains`` vs ``python -c "import numpy"``: best of 5
         fresh interpreters each, interleaved; target <= 3.
kernel   ``domains.lockin``, 3 q, 4096^2 float32, sigma 8 px, vs the textbook real-space
         lock-in, the full-resolution FFT floor, one rfft2 and the decimated floor; amplitude
         agreement with the textbook away from the edges (benchmarks/lockin_kernel.py).
run      ``domains.pipeline.analyze`` of a 2048^2 topograph with two maps (the package's
         √13×√13 scene, float32) in a fresh process: CPU time as a multiple of the textbook
         3-q lock-in of the same image in the same process (target <= 10), peak memory
         above the imports as a multiple of the float32 input (target <= 8x + 400 MiB), and
         the wall time of each step (``Analysis.timings``) (benchmarks/whole_run.py).
scaling  the same whole run for each of ``--sizes`` (default 512,1024,2048,4096), each in a
         fresh process: time and peak memory versus N, and the exponent p of CPU time ~ pixels^p
         (N log N gives p just above 1).
store    16384^2 and 32768^2 float32 zarr stores (1 and 4 GiB) through ``domains analyze``
         (default configuration, drift corrected chunk by chunk), watched: peak
         resident memory (targets 1.5 and 2 GiB) and time per pixel against the same command
         on a 4096^2 store of the same scene, which is read whole (in memory) (target <= 2x)
         (benchmarks/large_store.py). The 32768^2 run is stopped at the memory limit today
         (and would take hours on 2 cores): BENCH_SKIP_32768=1 in the environment leaves it out.
cluster  (not in the default set) an 8192^2 store through ``domains analyze --scheduler local:2``:
         the peak resident memory of each worker process and of the main process.
grid     the grid step (``pipeline._grid_step``: fingerprints, electronic contrast, types) on a
         zarr grid of ``--grid-energies`` float32 slices of each of ``--grid-sizes``, per slice,
         against the per-map work of the bias comparison on one image of the same size, in one
         fresh process per size: CPU ratio (target <= 1.5) and the peak memory of the step in
         slices (benchmarks/grid_slices.py).

Writes bench-output/bench.md (and bench.json) and prints the table; ``--update-readme``
also puts it in the "Benchmarks" section of README.md. Examples::

    python benchmarks/run.py                        # all but cluster; hours on 2 cores (the stores)
    BENCH_SKIP_32768=1 python benchmarks/run.py     # without the 32768^2 store
    python benchmarks/run.py --only kernel --kernel-size 1024
    python benchmarks/run.py --only run,scaling --sizes 512,1024 --run-size 1024
    python benchmarks/run.py --only store --store-sizes 16384
    python benchmarks/run.py --only cluster
    python benchmarks/run.py --only grid --grid-sizes 512,1024 --grid-energies 32
"""

from __future__ import annotations

import argparse
import datetime
import json
import math
import os
import platform
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
sys.path.insert(0, str(ROOT))  # measure this checkout (benchmarks/ itself is sys.path[0])

CASES = ("startup", "kernel", "run", "scaling", "store", "cluster", "grid")
DEFAULT_CASES = ("startup", "kernel", "run", "scaling", "store", "grid")
#: The in-memory reference of the store case: a store of the same scene small enough to be read whole.
STORE_REFERENCE_SIZE = 4096
#: Set (to anything but "" or "0") to leave the 32768^2 store out of the store case.
SKIP_HUGE_ENV = "BENCH_SKIP_32768"
README_BEGIN = "<!-- bench:begin (written by `python benchmarks/run.py --update-readme`) -->"
README_END = "<!-- bench:end -->"
MIB = 2**20


def _env():
    return {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}


def _say(text):
    print(f"[bench {time.strftime('%H:%M:%S')}] {text}", file=sys.stderr, flush=True)


# ------------------------------------------------------------------------------------------ machine


def machine():
    """What the numbers were measured on."""
    import numpy as np
    import scipy

    cpu = platform.processor() or platform.machine()
    try:
        with open("/proc/cpuinfo") as handle:
            names = [line.split(":", 1)[1].strip() for line in handle if line.startswith("model name")]
        cpu = names[0] if names else cpu
    except OSError:
        pass
    memory = None
    try:
        with open("/proc/meminfo") as handle:
            for line in handle:
                if line.startswith("MemTotal:"):
                    memory = int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        cores = len(os.sched_getaffinity(0))
    except AttributeError:
        cores = os.cpu_count()
    try:
        commit = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "--short", "HEAD"], capture_output=True,
                                text=True, timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        commit = ""
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else None
    return {"nproc": cores, "load_1min": load, "memory_gib": None if memory is None else memory / 2**30, "cpu": cpu,
            "python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
            "commit": commit, "date": datetime.date.today().isoformat()}


# ------------------------------------------------------------------------------------------ startup


def startup(repeat=5):
    """Best-of-``repeat`` wall time of fresh interpreters: numpy, ``import domains``, ``domains --help``."""
    commands = {
        "numpy": [sys.executable, "-c", "import numpy"],
        "import domains": [sys.executable, "-c", "import domains"],
        # What the installed `domains` script runs.
        "domains --help": [sys.executable, "-c", "import sys; from domains.cli import main; sys.exit(main())",
                           "--help"],
    }
    best = {name: math.inf for name in commands}
    env = _env()
    for name, command in commands.items():  # warm the file cache once
        subprocess.run(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env, check=True)
    for _ in range(repeat):
        for name, command in commands.items():
            start = time.perf_counter()
            subprocess.run(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, env=env, check=True)
            best[name] = min(best[name], time.perf_counter() - start)
    heavy = ("numpy", "scipy", "matplotlib", "napari", "distributed", "skimage", "dask", "zarr")
    probe = ("import contextlib, io, sys\nfrom domains.cli import main\n"
             "with contextlib.redirect_stdout(io.StringIO()):\n    main(['--help'])\n"
             f"print(' '.join(m for m in {heavy!r} if m in sys.modules))")
    loaded = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, env=env).stdout.strip()
    rows = [
        ("`domains --help` vs `python -c \"import numpy\"` (best of 5 fresh interpreters)",
         best["domains --help"], best["numpy"], 3.0),
        ("`import domains` vs `python -c \"import numpy\"`", best["import domains"], best["numpy"], None),
    ]
    notes = [f"packages loaded by `domains --help` among {', '.join(heavy)}: {loaded or 'none'}"]
    return rows, notes


# ------------------------------------------------------------------------------------------ whole runs


def _worker(args, timeout, memory_limit):
    """Run benchmarks/whole_run.py in a fresh interpreter, watched; its JSON, or {"error": ...}.

    The worker is stopped (its own process group) past ``timeout`` seconds or ``memory_limit``
    resident bytes, so that a size too large for today's code does not take the machine down.
    """
    import tempfile

    from large_store import _tree_rss

    command = [sys.executable, str(HERE / "whole_run.py"), *args]
    with tempfile.TemporaryFile("w+") as out, tempfile.TemporaryFile("w+") as err:
        child = subprocess.Popen(command, stdout=out, stderr=err, text=True, env=_env(), start_new_session=True)
        start, peak, stopped = time.perf_counter(), 0, None
        while child.poll() is None:
            peak = max(peak, _tree_rss(child.pid))
            if peak > memory_limit:
                stopped = f"stopped at {peak / 2**30:.2f} GiB resident (limit {memory_limit / 2**30:.2f} GiB)"
            elif time.perf_counter() - start > timeout:
                stopped = f"did not finish in {timeout:.0f} s"
            if stopped:
                os.killpg(child.pid, 9)
                child.wait()
                return {"error": stopped}
            time.sleep(0.25)
        out.seek(0)
        err.seek(0)
        stdout, stderr = out.read(), err.read()
    if child.returncode != 0:
        last = (stderr.strip().splitlines() or ["?"])[-1]
        return {"error": f"exit {child.returncode}: {last}"}
    return json.loads(stdout.strip().splitlines()[-1])


def whole_runs(sizes, reference_sizes, cache, timeout, memory_limit):
    """One fresh process per size (smallest first); stops at the first size that fails or times out."""
    results = {}
    for size in sorted(sizes):
        _say(f"whole run {size}^2: generating the scene (cached)")
        made = _worker(["--size", str(size), "--cache", str(cache), "--make-scene"], timeout, memory_limit)
        if "error" in made:
            results[size] = made
            break
        _say(f"whole run {size}^2: analyze in a fresh process")
        start = time.perf_counter()
        extra = ["--reference"] if size in reference_sizes else []
        results[size] = _worker(["--size", str(size), "--cache", str(cache), *extra], timeout, memory_limit)
        _say(f"whole run {size}^2: {time.perf_counter() - start:.0f} s")
        if "error" in results[size]:
            break
    return results


def fit_exponent(sizes, seconds):
    """p of seconds ~ pixels^p (least squares in log-log), and the p that N log N would give."""
    import numpy as np

    pixels = np.asarray(sizes, float) ** 2
    p = float(np.polyfit(np.log(pixels), np.log(seconds), 1)[0])
    p_nlogn = float(np.polyfit(np.log(pixels), np.log(pixels * np.log(pixels)), 1)[0])
    return p, p_nlogn


# ------------------------------------------------------------------------------------------ store


def store(sizes, cache, memory_limit_gib, timeout, scheduler=None):
    results = {}
    for size in sizes:
        _say(f"store {size}^2: writing the zarr store (cached) and running `domains analyze` on it"
             + (f" --scheduler {scheduler}" if scheduler else ""))
        command = [sys.executable, str(HERE / "large_store.py"), "--size", str(size), "--cache", str(cache),
                   "--memory-limit-gib", str(memory_limit_gib), "--timeout", str(timeout)]
        if scheduler:
            command += ["--scheduler", scheduler]
        done = subprocess.run(command, capture_output=True, text=True, env=_env())
        if done.returncode != 0:
            results[size] = {"status": "error: " + (done.stderr.strip().splitlines() or ["?"])[-1]}
        else:
            results[size] = json.loads(done.stdout.strip().splitlines()[-1])
    return results


# ------------------------------------------------------------------------------------------ grid


def grid_slices(sizes, energies, cache, repeat=3):
    """The grid step per slice against one image's per-map work, one fresh process per size
    (benchmarks/grid_slices.py); table rows and notes."""
    rows, notes, results = [], [], {}
    for size in sizes:
        _say(f"grid: {energies} slices of {size}^2 (zarr, written once) in a fresh process")
        command = [sys.executable, str(HERE / "grid_slices.py"), "--size", str(size), "--energies", str(energies),
                   "--cache", str(cache), "--repeat", str(repeat)]
        done = subprocess.run(command, capture_output=True, text=True, env=_env())
        if done.returncode != 0:
            notes.append(f"grid {size}²: error: " + (done.stderr.strip().splitlines() or ["?"])[-1])
            continue
        r = json.loads(done.stdout.strip().splitlines()[-1])
        results[size] = r
        rows.append((f"grid step per slice, {energies} × {size}² float32 zarr grid (chunks of {r['chunk']} "
                     f"energies), CPU vs the bias comparison's per-map work on one {size}² image",
                     r["per_slice_cpu_s"], r["one_image_cpu_s"], 1.5))
        notes.append(f"grid {size}²: peak memory of the grid step {r['grid_peak_bytes'] / MIB:.0f} MiB = "
                     f"{r['grid_peak_slices']:.1f} float32 slices (the grid holds {energies}); one image's work "
                     f"{r['one_image_peak_slices']:.1f} slices (tracemalloc)")
    return rows, notes, results


# ------------------------------------------------------------------------------------------ report


def _s(x):
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "–"
    return f"{x:.3g}" if x < 100 else f"{x:.0f}"


def _ratio(a, b):
    return a / b if a is not None and b else None


def _mark(value, target):
    if value is None or target is None:
        return ""
    return " ✓" if value <= target else " ✗"


def _cell(text):
    return str(text).replace("|", "\\|")  # a pipe inside a cell would end it


def markdown(data):
    m = data["machine"]
    memory = "?" if m["memory_gib"] is None else f"{m['memory_gib']:.1f} GiB"
    lines = [
        f"Measured {m['date']} at commit `{m['commit']}` on {m['nproc']} cores, {memory}, {m['cpu']}; "
        f"Python {m['python']}, numpy {m['numpy']}, scipy {m['scipy']}."
        + ("" if m.get("load_1min") is None else
           f" Load average when it started: {m['load_1min']:.1f} (other work on the machine lengthens wall "
           "times; CPU times and ratios suffer less)."),
    ]
    if data["rows"]:
        lines += ["", "| case | ours (s) | reference (s) | ratio | target |", "|---|---:|---:|---:|---:|"]
    for name, ours, ref, target in data["rows"]:
        ratio = _ratio(ours, ref)
        lines.append(f"| {_cell(name)} | {_s(ours)} | {_s(ref)} | {_s(ratio)}{_mark(ratio, target)} | "
                     f"{'' if target is None else f'≤ {target:g}'} |")
    if data["checks"]:
        lines += ["", "| check | value | target |", "|---|---:|---:|"]
        for name, value, target in data["checks"]:
            lines.append(f"| {_cell(name)} | {value:.2g}{_mark(value, target)} | ≤ {target:g} |")
    runs = data.get("runs") or {}
    run_size = data.get("run_size")
    if run_size in runs and "timings" in runs[run_size]:
        r = runs[run_size]
        total = sum(r["timings"].values())
        lines += ["", f"Steps of the whole run at {run_size}² (wall seconds, `Analysis.timings`; "
                      f"{r['n_maps']} maps, σ = {_s(r['sigma_px'])} px):", "",
                  "| step | wall (s) | share |", "|---|---:|---:|"]
        for step, seconds in sorted(r["timings"].items(), key=lambda kv: -kv[1]):
            lines.append(f"| {step} | {_s(seconds)} | {100 * seconds / total:.0f} % |")
    scaling = [(n, r) for n, r in sorted(runs.items()) if n in data.get("scaling_sizes", ())]
    if scaling:
        lines += ["", "Whole run versus size (each in a fresh process; memory is the peak resident set above "
                      "the imports, inputs included: the topograph and 2 maps, float32):", "",
                  "| N | wall (s) | CPU (s) | CPU × textbook 3-q lock-in | peak above imports (MiB) | "
                  "× float32 topograph | target (MiB) |",
                  "|---:|---:|---:|---:|---:|---:|---:|"]
        for n, r in scaling:
            if "error" in r:
                lines.append(f"| {n} | {r['error']} | | | | | |")
                continue
            peak = r["peak_above_baseline_bytes"]
            target = 8 * r["input_bytes"] + 400 * MIB
            lines.append(f"| {n} | {_s(r['wall_s'])} | {_s(r['cpu_s'])} | "
                         f"{_s(_ratio(r['cpu_s'], r.get('reference_cpu_s')))} | {peak / MIB:.0f}{_mark(peak, target)} | "
                         f"{_s(peak / r['input_bytes'])} | ≤ {target / MIB:.0f} |")
        fit = data.get("exponent")
        if fit:
            lines += ["", f"CPU time ~ pixels^p with p = {fit[0]:.2f} over N = "
                          f"{', '.join(str(n) for n, r in scaling if 'error' not in r)} "
                          f"(N log N would give p = {fit[1]:.2f}).{_mark(fit[0], fit[1] + 0.05)}"]
            top = data.get("exponent_top")
            if top and len(scaling) > 2:
                lines[-1] += (f" Between the two largest, {top[0]} and {top[1]}, where fixed costs weigh least: "
                              f"p = {top[2]:.2f} (N log N: {top[3]:.2f}).{_mark(top[2], top[3] + 0.05)}")
    stores = data.get("store") or {}
    reference = data.get("store_reference")
    if stores or reference:
        lines += ["", "Larger than memory: `domains analyze STORE.zarr` (default configuration; float32 3×3 CDW "
                      "scene, drift corrected chunk by chunk), watched; the "
                      f"{STORE_REFERENCE_SIZE}² store of the same scene is read whole (in memory) and is the "
                      "reference of the time per pixel:", "",
                  "| N | store | status | wall (s) | µs per pixel | peak resident (GiB) | target (GiB) | "
                  f"time per pixel × in-memory {STORE_REFERENCE_SIZE}² |",
                  "|---:|---|---|---:|---:|---:|---:|---:|"]
        ok = reference and reference.get("status") == "finished"
        per_pixel = reference["wall_s"] / STORE_REFERENCE_SIZE**2 if ok else None
        rows = ([(STORE_REFERENCE_SIZE, reference, "in memory")] if reference else []) + \
               [(n, r, "lazy") for n, r in sorted(stores.items())]
        for n, r, how in rows:
            target = None if how == "in memory" else (1.5 if n <= 16384 else 2.0)
            peak = r.get("peak_bytes", 0) / 2**30
            status = r.get("status", "?")
            if r.get("status") != "finished" and r.get("last_step"):
                status += f" (in: {r['last_step']}" + (f", {r['last_tasks']}" if r.get("last_tasks") else "") + ")"
            finished = r.get("status") == "finished"
            ratio = r["wall_s"] / n**2 / per_pixel if per_pixel and finished and how == "lazy" else None
            # A run stopped early reached at least this peak: a lower bound, failed only if above the target.
            shown = (f"{peak:.2f}{_mark(peak, target)}" if finished
                     else f"≥ {peak:.2f}{' ✗' if target and peak > target else ''}")
            us = f"{1e6 * r['wall_s'] / n**2:.3g}" if finished else "–"
            lines.append(f"| {n} | {n * n * 4 / 2**30:.3g} GiB, {how} | {_cell(status)} | {_s(r.get('wall_s'))} | "
                         f"{us} | {shown} | {'' if target is None else f'≤ {target:g}'} | "
                         f"{_s(ratio)}{_mark(ratio, 2.0)} |")
    clusters = data.get("cluster") or {}
    for n, r in sorted(clusters.items()):
        workers = r.get("worker_peak_bytes") or []
        lines += ["", f"`domains analyze` of the {n}² store with `--scheduler local:2` (two worker processes "
                      "started for the run): " + _cell(r.get("status", "?"))
                  + (f" (in: {r['last_step']})" if r.get("status") != "finished" and r.get("last_step") else "")
                  + f", wall {_s(r.get('wall_s'))} s; peak resident memory (each process's own high-water mark): "
                  + ", ".join(f"worker {i + 1} {w / 2**30:.2f} GiB" for i, w in enumerate(workers))
                  + f"; main process {r.get('main_peak_bytes', 0) / 2**30:.2f} GiB; the largest sum at one "
                    f"sampling {r.get('peak_bytes', 0) / 2**30:.2f} GiB."]
    if data["notes"]:
        lines += [""] + [f"- {note}" for note in data["notes"]]
    return "\n".join(lines) + "\n"


def update_readme(table):
    readme = ROOT / "README.md"
    text = readme.read_text()
    if README_BEGIN not in text or README_END not in text:
        raise SystemExit(f"{readme}: no benchmark markers ({README_BEGIN} ... {README_END}) to write between")
    head, rest = text.split(README_BEGIN, 1)
    _, tail = rest.split(README_END, 1)
    readme.write_text(head + README_BEGIN + "\n" + table + README_END + tail)


# ------------------------------------------------------------------------------------------ main


def _sizes(text):
    try:
        sizes = [int(s) for s in text.split(",") if s.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected sizes like 512,1024, got {text!r}") from None
    if not sizes or min(sizes) < 64:
        raise argparse.ArgumentTypeError(f"expected sizes of at least 64 pixels, got {text!r}")
    return sizes


def _cases(text):
    cases = [c.strip() for c in text.split(",") if c.strip()]
    unknown = [c for c in cases if c not in CASES]
    if unknown or not cases:
        raise argparse.ArgumentTypeError(f"unknown case(s) {', '.join(unknown) or text!r}; known: {', '.join(CASES)}")
    return cases


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--only", type=_cases, default=list(DEFAULT_CASES), metavar="CASES",
                        help=f"comma-separated cases among {', '.join(CASES)} (default: {','.join(DEFAULT_CASES)})")
    parser.add_argument("--sizes", type=_sizes, default=[512, 1024, 2048, 4096], metavar="N,N,...",
                        help="image sizes of the scaling case (default 512,1024,2048,4096)")
    parser.add_argument("--large", action="store_true", help="add 4096 to --sizes (it is in the default sizes)")
    parser.add_argument("--run-size", type=int, default=2048, help="size of the whole-run case (default 2048)")
    parser.add_argument("--kernel-size", type=int, default=4096, help="size of the kernel case (default 4096)")
    skip_huge = os.environ.get(SKIP_HUGE_ENV, "") not in ("", "0")
    parser.add_argument("--store-sizes", type=_sizes, default=[16384] if skip_huge else [16384, 32768],
                        metavar="N,N,...", help=f"sizes of the zarr store case (default 16384,32768; 16384 "
                                               f"alone with {SKIP_HUGE_ENV}=1 in the environment)")
    parser.add_argument("--store-timeout", type=float, default=7200,
                        help="seconds allowed to one store run (default 7200)")
    parser.add_argument("--cluster-size", type=int, default=8192, help="size of the cluster case's store (default 8192)")
    parser.add_argument("--store-memory-limit-gib", type=float, default=8.0,
                        help="stop a store run above this resident memory (default 8)")
    parser.add_argument("--repeat", type=int, default=3, help="best of this many runs for the kernel (default 3)")
    parser.add_argument("--grid-sizes", type=_sizes, default=[512, 1024], metavar="N,N,...",
                        help="slice sizes of the grid case (default 512,1024)")
    parser.add_argument("--grid-energies", type=int, default=32, help="slices of the grid case (default 32)")
    parser.add_argument("--timeout", type=float, default=1500, help="seconds allowed to one whole run (default 1500)")
    parser.add_argument("--memory-limit-gib", type=float, default=None,
                        help="stop a whole run above this resident memory (default 60%% of the machine's)")
    parser.add_argument("--out", type=Path, default=ROOT / "bench-output", help="output folder (default bench-output)")
    parser.add_argument("--update-readme", action="store_true", help="write the table into README.md too")
    parser.add_argument("--render", type=Path, metavar="BENCH.json",
                        help="only rewrite the table from a bench.json of an earlier run (no measuring)")
    args = parser.parse_args(argv)
    if args.render:
        data = json.loads(args.render.read_text())
        for key in ("runs", "store", "cluster"):  # JSON turned the sizes into strings
            data[key] = {int(n): r for n, r in (data.get(key) or {}).items()}
        table = markdown(data)
        print(table)
        if args.update_readme:
            update_readme(table)
        return
    cache = args.out / "cache"
    sizes = sorted(set(args.sizes + ([4096] if args.large else [])))

    data = {"machine": machine(), "rows": [], "checks": [], "notes": [], "cases": args.only}
    if "startup" in args.only:
        _say("startup: fresh interpreters")
        rows, notes = startup()
        data["rows"] += rows
        data["notes"] += notes
    if "kernel" in args.only:
        _say(f"kernel: {args.kernel_size}^2 (the textbook reference takes a while)")
        import lockin_kernel  # benchmarks/ is sys.path[1]

        rows, checks, notes = lockin_kernel.run(size=args.kernel_size, repeat=args.repeat)
        data["rows"] += rows
        data["checks"] += checks
        data["notes"] += notes
    wanted = set()
    if "run" in args.only:
        wanted.add(args.run_size)
        data["run_size"] = args.run_size
    if "scaling" in args.only:
        wanted.update(sizes)
        data["scaling_sizes"] = sizes
    if wanted:
        limit = args.memory_limit_gib * 2**30 if args.memory_limit_gib else 0.6 * (data["machine"]["memory_gib"] or 8) * 2**30
        runs = whole_runs(wanted, wanted, cache, args.timeout, limit)
        data["runs"] = runs
        r = runs.get(args.run_size)
        if "run" in args.only and r:
            if "error" in r:
                data["notes"].append(f"whole run {args.run_size}²: {r['error']}")
            else:
                n = args.run_size
                data["rows"].append((f"whole `analyze`, {n}² topograph + {r['n_maps']} maps, CPU time vs the "
                                     f"textbook 3-q lock-in (σ {r['reference_sigma_px']:g} px) of the same image",
                                     r["cpu_s"], r["reference_cpu_s"], 10.0))
                if "reference_own_sigma_cpu_s" in r:
                    data["rows"].append((f"the same, vs the textbook 3-q lock-in at the run's own σ "
                                         f"({r['reference_own_sigma_sigma_px']:.3g} px; its cost grows with σ)",
                                         r["cpu_s"], r["reference_own_sigma_cpu_s"], None))
                data["notes"].append(f"whole run {n}²: wall {r['wall_s']:.1f} s for {r['cpu_s']:.1f} s CPU; found "
                                     f"{r['order']}, {r['domains']} domains; the run's own σ was "
                                     f"{_s(r['sigma_px'])} px")
        done = [n for n in sizes if n in runs and "error" not in runs[n]]
        if "scaling" in args.only and len(done) >= 2:
            data["exponent"] = fit_exponent(done, [runs[n]["cpu_s"] for n in done])
            data["exponent_top"] = (done[-2], done[-1], *fit_exponent(done[-2:], [runs[n]["cpu_s"] for n in done[-2:]]))
    if "store" in args.only:
        reference = store([STORE_REFERENCE_SIZE], cache, args.store_memory_limit_gib, args.store_timeout)
        data["store_reference"] = reference[STORE_REFERENCE_SIZE]
        data["store"] = store(args.store_sizes, cache, args.store_memory_limit_gib, args.store_timeout)
    if "grid" in args.only:
        rows, notes, data["grid"] = grid_slices(args.grid_sizes, args.grid_energies, cache, repeat=args.repeat)
        data["rows"] += rows
        data["notes"] += notes
    if "cluster" in args.only:
        data["cluster"] = store([args.cluster_size], cache, args.store_memory_limit_gib, args.store_timeout,
                                scheduler="local:2")

    table = markdown(data)
    args.out.mkdir(parents=True, exist_ok=True)
    (args.out / "bench.md").write_text(table)
    (args.out / "bench.json").write_text(json.dumps(data, indent=1, default=str))
    print(table)
    if args.update_readme:
        update_readme(table)
        _say("README.md: Benchmarks section updated")


if __name__ == "__main__":
    main()
