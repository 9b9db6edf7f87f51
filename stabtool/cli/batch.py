"""'stabtool batch INPUTS... --out DIR': analyse a night of maps into one table and a summary.

INPUTS are map files, folders (searched recursively) or glob patterns. Each
map is analysed exactly as 'stabtool analyze' would; DIR receives
'results.csv' and 'results.nc' (one row per map), one annotated PNG per
map under 'plots/', the drift of repeated sweeps under 'drift/', and
'summary.html'. Results are stored as they arrive; after an interruption
(even a kill) '--resume' finishes the rest without redoing finished maps.
A NetCDF file holding several sweeps (an extra dimension such as 'rep')
gives one row per sweep, named FILE[rep=0], FILE[rep=1], ...

Exit codes: 0 every map ran (some may be doubtful), 1 some maps failed (see
their rows), 2 bad usage or input.
"""

from __future__ import annotations

import argparse
import sys
from typing import Any

from ..batch.worker import DEFAULT_TIME_LIMIT_S
from ._options import READOUT_CHOICES, READOUT_HELP, add_load_options, load_options

__all__ = ["add_analysis_options", "make_analyzer", "register", "run"]


def add_analysis_options(p: argparse.ArgumentParser) -> None:
    """Options of the analysis pipeline, the same as ``stabtool analyze``'s."""
    from .analyze import _lever_arm, _temperature

    ref = p.add_mutually_exclusive_group()
    ref.add_argument("--electron-temperature", type=_temperature, default=None, metavar="K",
                     help="electron temperature: lever arms from the thermal line widths")
    ref.add_argument("--lever-arm", type=_lever_arm, default=None, metavar="A11[,A22]",
                     help="known lever arm(s) of the x (and y) gate, eV/V")
    ref.add_argument("--lever-arm-file", default=None, metavar="FILE",
                     help="lever-arm calibration file")
    p.add_argument("--no-refine", action="store_true", help="skip the global model fit to each map")
    p.add_argument("--readout", choices=READOUT_CHOICES, default="auto", help=READOUT_HELP)


def _seconds(text: str) -> float:
    try:
        t = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of seconds, got {text!r}") from None
    if not (t >= 0 and t < float("inf")):
        raise argparse.ArgumentTypeError(f"expected a number of seconds ≥ 0 (0: no limit), got {text!r}")
    return t


def make_analyzer(args: argparse.Namespace) -> Any:
    """The configured pipeline object, built exactly as ``stabtool analyze`` builds it."""
    from ..analysis import Analyzer

    return Analyzer(
        electron_temperature_K=args.electron_temperature,
        lever_arm=args.lever_arm,
        lever_arm_file=args.lever_arm_file,
        refine=not args.no_refine,
        readout=args.readout,
    )


def run(args: argparse.Namespace) -> int:
    """Run the batch; return 0, 1 (some maps failed) or 2 (bad usage)."""
    from ..batch import run_batch

    analyzer = make_analyzer(args)
    report = run_batch(
        args.inputs,
        analyzer,
        args.out,
        workers=args.workers,
        scheduler=args.scheduler,
        resume=args.resume,
        retry_failed=args.retry_failed,
        progress=not args.quiet,
        load_options=load_options(args),
        time_limit_s=args.time_limit,
    )
    if not args.quiet:
        print(report.summary_line(), file=sys.stderr)
        for note in report.notes:
            print(f"stabtool: note: {note}", file=sys.stderr)
    if report.n_failed and not args.quiet:
        for rec in report.records:
            if rec.status == "failed":
                print(f"stabtool: failed: {rec.file}: {rec.reason}", file=sys.stderr)
    return report.exit_code


def register(subparsers: Any) -> None:
    """Add the ``batch`` sub-command."""
    p = subparsers.add_parser(
        "batch",
        help="analyse many maps (files, folders, globs) into a table, plots and summary.html",
        description=__doc__.split("\n\n")[1] if __doc__ else None,
        epilog="Exit codes: 0 every map ran, 1 some maps failed, 2 bad usage or input. "
        "Results are estimates: check gate limits and your lab's procedures before applying "
        "any matrix to a device.",
    )
    p.add_argument("inputs", nargs="+", metavar="INPUT",
                   help="map files (.nc, .h5, .csv, .tsv, .npz), folders or glob patterns")
    p.add_argument("--out", required=True, metavar="DIR", help="output folder")
    p.add_argument("--workers", type=int, default=None, metavar="N",
                   help="local worker processes (default: the CPUs available; 1 runs in this process)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="run on an existing dask.distributed cluster (e.g. tcp://host:8786); "
                   "needs the extra 'cluster' and input paths readable by the workers")
    add_analysis_options(p)
    add_load_options(p)
    p.add_argument("--resume", action="store_true",
                   help="finish an interrupted batch in DIR; finished maps are not redone")
    p.add_argument("--retry-failed", action="store_true",
                   help="with --resume, analyse the maps that failed before once more")
    p.add_argument("--time-limit", type=_seconds, default=DEFAULT_TIME_LIMIT_S, metavar="S",
                   help=f"give a map up as failed when its analysis runs longer than S seconds and go on "
                   f"(default {DEFAULT_TIME_LIMIT_S:g}; 0: no limit; local workers only, not on a dask cluster)")
    p.add_argument("--quiet", action="store_true",
                   help="no progress bar, no summary line, no warnings (for cron jobs)")
    p.set_defaults(func=run)
