"""The `domains` command: demo, analyze, peaks, scene."""

from __future__ import annotations

import argparse
import json
import os
import signal
import sys
import traceback
from pathlib import Path

from ._errors import InputError

SCENES = ("cdw", "cdw2x2", "stripes", "moire", "plain")


class _Parser(argparse.ArgumentParser):
    """argparse with usage errors on one line (exit 2), like every other input error."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {' '.join(message.split())} (see {self.prog} --help)\n")


class _Version(argparse.Action):
    """``--version``: the installed version, read only when asked (importlib.metadata is slow to load)."""

    def __init__(self, option_strings, dest=argparse.SUPPRESS, default=argparse.SUPPRESS, help=None):
        super().__init__(option_strings, dest=dest, default=default, nargs=0, help=help)

    def __call__(self, parser, namespace, values, option_string=None):
        from . import __version__

        print(f"{parser.prog} {__version__}")  # on stdout, as argparse's own version action
        parser.exit()


def _pixel_size(text):
    from ._checks import number

    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a pixel size in nm (a positive number), got {text!r}") from None
    try:
        return number(value, "--pixel-size", low=0, where="--pixel-size")
    except InputError:
        raise argparse.ArgumentTypeError(f"expected a positive, finite pixel size in nm, got {text!r}") from None


def _scheduler(text):
    from ._cluster import parse_scheduler  # light: dask.distributed is imported only when the run starts

    try:
        parse_scheduler(text, option="--scheduler")
    except InputError as err:
        raise argparse.ArgumentTypeError(str(err).removeprefix("--scheduler: ")) from None
    return text


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="domains",
        description="Domains, walls, drift, twist angle and bias contrast of periodic electronic order "
        "in STM topographs, dI/dV maps and spectroscopic grids.",
    )
    parser.add_argument("--version", action=_Version, help="show the version and exit")
    parser.add_argument("--debug", action="store_true",
                        help="show the full traceback of any error (accepted anywhere on the line)")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND", parser_class=_Parser)

    demo = sub.add_parser("demo", help="analyse a built-in synthetic scene and write a report")
    demo.add_argument("--out", type=Path, default=Path("demo-output"), help="bundle folder (default: demo-output)")
    demo.add_argument("--scene", choices=("cdw", "stripes", "moire"), default="cdw",
                      help="which built-in scene (default: cdw)")
    demo.add_argument("--seed", type=int, default=7, help="random seed of the scene")
    demo.add_argument("--overwrite", action="store_true", help="replace an existing bundle")

    analyze = sub.add_parser("analyze", help="the whole analysis of a topograph (and maps, and a grid)")
    analyze.add_argument("topo", metavar="TOPO", help="topograph file (.npy .npz .tif .h5[:/dataset] .zarr .txt .csv)")
    analyze.add_argument("--map", dest="maps", action="append", default=[], metavar="FILE",
                         help="conductance map at one bias (repeat for several biases)")
    analyze.add_argument("--grid", metavar="FILE", help="spectroscopic grid (energy, row, col) with energies_V")
    analyze.add_argument("--pixel-size", type=_pixel_size, metavar="NM",
                         help="pixel size in nm (overrides the sidecar)")
    analyze.add_argument("--config", type=Path, metavar="FILE.toml", help="analysis parameters")
    analyze.add_argument("--out", type=Path, default=None, metavar="DIR",
                         help="bundle folder (default: TOPO's name + '-domains')")
    analyze.add_argument("--scheduler", type=_scheduler, metavar="ADDRESS",
                         help="run the dask graphs on a dask.distributed cluster: a scheduler's address "
                              "(tcp://HOST:PORT), or local:N to start N worker processes on this machine for the run")
    analyze.add_argument("--overwrite", action="store_true", help="replace an existing bundle")

    peaks = sub.add_parser("peaks", help="the indexed peak table of an image")
    peaks.add_argument("file", metavar="FILE")
    peaks.add_argument("--pixel-size", type=_pixel_size, metavar="NM",
                       help="pixel size in nm (overrides the sidecar)")
    peaks.add_argument("--json", action="store_true", help="print JSON instead of a table")

    scene = sub.add_parser("scene", help="write a synthetic scene (input files + truth) for trying the tool")
    scene.add_argument("kind", choices=SCENES, metavar="KIND", help="one of: " + ", ".join(SCENES))
    scene.add_argument("--out", type=Path, required=True, metavar="DIR")
    scene.add_argument("--seed", type=int, default=7)
    scene.add_argument("--overwrite", action="store_true", help="replace existing files")
    return parser


def _demo(args, command_line):
    from .pipeline import run_demo

    report = run_demo(args.out, scene=args.scene, seed=args.seed, overwrite=args.overwrite, command_line=command_line)
    print(report)


def _analyze(args, command_line):
    from .pipeline import analyze_files

    out = args.out if args.out is not None else Path(Path(args.topo.split(":")[0]).stem + "-domains")
    bundle = analyze_files(args.topo, maps=args.maps, grid=args.grid, pixel_size_nm=args.pixel_size,
                           config=args.config, out=out, scheduler=args.scheduler, overwrite=args.overwrite,
                           command_line=command_line)
    print(Path(bundle) / "report.html")


def _peaks(args, command_line):
    from .fourier import format_peak_table
    from .io import json_safe, load_scan
    from .pipeline import find_order

    from ._checks import usable_image

    scan = load_scan(args.file, pixel_size_nm=args.pixel_size)
    if scan.is_grid:
        raise InputError(f"{args.file}: 'peaks' takes a 2-D image; this is a 3-D grid")
    usable_image(scan)
    if scan.is_lazy:
        scan = scan.with_data(scan.data.compute())
    found = find_order(scan)
    spec = found["spec"]
    verdict = {"order_kind": spec["order_kind"], "superlattice": spec["superlattice_summary"]["order"],
               "drift_corrected": found["drift"] is not None, "notes": found["notes"]}
    if args.json:
        print(json.dumps(json_safe({**spec["result"].to_dict(), "verdict": verdict}), indent=2))
    else:
        print(format_peak_table(spec["result"]))
        print(f"\norder: {verdict['order_kind']}; superlattice: {verdict['superlattice']}"
              + ("; indexed on the drift-corrected image" if verdict["drift_corrected"] else ""))
        for note in found["notes"]:
            print(f"note: {note}")


def _scene(args, command_line):
    from .pipeline import write_scene

    for path in write_scene(args.kind, args.out, seed=args.seed, overwrite=args.overwrite):
        print(path)


def _close_progress_bars():
    """Close any progress bar still drawn, so that a message starts on a line of its own."""
    try:
        from tqdm import tqdm
    except ImportError:  # pragma: no cover - tqdm is a dependency
        return
    for bar in list(getattr(tqdm, "_instances", ())):
        try:
            bar.close()
        except Exception:  # noqa: BLE001 - a broken bar must not hide the message
            pass


def _say(text):
    _close_progress_bars()
    sys.stderr.flush()
    print(" ".join(str(text).split()), file=sys.stderr, flush=True)


def main(argv=None) -> int:
    """Run the command line; returns the exit status (0 ok, 2 bad input or usage, 1 internal error, 130 Ctrl-C).

    ``--debug`` (anywhere on the line) prints the full traceback of an error.
    Every error is one line on stderr naming the file or option.

    Parameters
    ----------
    argv : list of str, optional
        Arguments (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        Exit status.

    Examples
    --------
    >>> main(["scene", "nonsense", "--out", "x"])  # argparse explains on stderr
    2
    """
    try:
        return _main(argv)
    except KeyboardInterrupt:
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # a second Ctrl-C must not interrupt the message
        _say("domains: interrupted (Ctrl-C); no bundle was written or replaced")
        return 130


def _main(argv) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    # --debug is accepted anywhere on the line (before "--", after which everything is a name).
    end = argv.index("--") if "--" in argv else len(argv)
    debug = "--debug" in argv[:end]
    argv = [a for a in argv[:end] if a != "--debug"] + argv[end:]
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as stop:  # argparse exits 2 on usage errors, 0 on --help/--version
        return int(stop.code or 0)
    command_line = ["domains"] + argv + (["--debug"] if debug else [])
    handlers = {"demo": _demo, "analyze": _analyze, "peaks": _peaks, "scene": _scene}
    try:
        handlers[args.command](args, command_line)
    except InputError as err:
        if debug:
            _close_progress_bars()
            traceback.print_exc()
        _say(f"domains {args.command}: error: {err}")
        return 2
    except KeyboardInterrupt:
        raise
    except BrokenPipeError:
        # The reader of our output went away (``domains peaks FILE | head``): not an error of ours.
        try:
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - silence the interpreter's flush at exit
        except OSError:
            pass
        return 0
    except Exception as err:  # noqa: BLE001 - the last line of defence: say what happened, exit 1
        if debug:
            _close_progress_bars()
            traceback.print_exc()
        _say(f"domains {args.command}: internal error: {type(err).__name__}: {err} "
             "(run again with --debug for the traceback, and please report it)")
        return 1
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
