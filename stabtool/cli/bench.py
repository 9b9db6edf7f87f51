"""``stabtool bench``: accuracy versus noise, and speed, on synthetic maps.

Generates a grid of synthetic double-dot maps (SNR × device preset ×
artefact), runs the full analysis on each with the true electron temperature
as energy reference, compares every number with the generator truth and
writes ``bench.json``, PNG plots and a compact table.
"""

from __future__ import annotations

import argparse
import shlex
import sys
from pathlib import Path

__all__ = ["register", "run"]


def register(subparsers: argparse._SubParsersAction) -> None:
    """Add the ``bench`` sub-command."""
    from ..bench.grid import DEFAULT_SIZE_PX, FULL_GRID_SIZE, QUICK_CASES

    p = subparsers.add_parser(
        "bench",
        help="accuracy-versus-noise and speed benchmark on synthetic maps",
        description=(
            "Generate synthetic double-dot maps over SNR (1-30), device presets and artefacts, "
            "analyse each with the true electron temperature as energy reference, compare with "
            "the generator truth, and report coverage, error percentiles, silent failures "
            "(quality ok but an error beyond the fitter bounds) and speed relative to a bare "
            "scikit-image Canny + Hough step."
        ),
    )
    p.add_argument("--cases", type=int, default=None, metavar="N",
                   help=f"number of maps (default: the full grid, {FULL_GRID_SIZE}; "
                        f"with --quick {QUICK_CASES})")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="run seed (default 0)")
    p.add_argument("--out", type=Path, default=Path("bench_out"), metavar="DIR",
                   help="output folder for bench.json and the PNG plots (default: bench_out)")
    p.add_argument("--quick", action="store_true",
                   help=f"a quick set: {QUICK_CASES} maps (each SNR x artefact once), 96 px")
    p.add_argument("--workers", type=int, default=2, metavar="K",
                   help="worker processes (default 2)")
    p.add_argument("--size", type=int, default=None, metavar="PX",
                   help=f"pixels per map axis (default {DEFAULT_SIZE_PX}; 96 with --quick)")
    p.add_argument("--quiet", action="store_true", help="no progress line, no warnings")
    p.set_defaults(func=run)


def _command_line(args: argparse.Namespace) -> str:
    """The command that reproduces this run, options spelled out."""
    parts = ["stabtool", "bench"]
    if args.cases is not None:
        parts += ["--cases", str(args.cases)]
    parts += ["--seed", str(args.seed), "--out", str(args.out)]
    if args.quick:
        parts.append("--quick")
    if args.size is not None:
        parts += ["--size", str(args.size)]
    if args.workers != 2:
        parts += ["--workers", str(args.workers)]
    return " ".join(shlex.quote(p) for p in parts)


def run(args: argparse.Namespace) -> int:
    """Run the benchmark from parsed arguments; return the exit code."""
    from ..bench.grid import DEFAULT_SIZE_PX, build_grid
    from ..bench.report import format_table, write_report
    from ..bench.run import run_bench
    from ..errors import InputError

    size = args.size if args.size is not None else (96 if args.quick else DEFAULT_SIZE_PX)
    cases = build_grid(n_cases=args.cases, seed=args.seed, quick=args.quick, size_px=size)
    if args.workers < 1:
        raise InputError("--workers", f"at least 1 worker is needed, got {args.workers}")
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise InputError(out, "exists and is not a folder; give --out a folder")
    command = _command_line(args)

    done = [0]
    show = not args.quiet and sys.stderr.isatty()

    def progress(outcome) -> None:
        done[0] += 1
        if show:
            print(f"\rbench: {done[0]}/{len(cases)} maps", end="", file=sys.stderr, flush=True)

    run_ = run_bench(cases, workers=args.workers, progress=progress)
    if show:
        print(file=sys.stderr)
    settings = {"cases": len(cases), "size_px": size, "quick": bool(args.quick), "workers": args.workers}
    doc, paths = write_report(run_, out, command=command, seed=args.seed, settings=settings)
    print(format_table(doc["summary"]))
    print("wrote " + ", ".join(str(p) for p in paths))
    return 0
