"""``stabtool calibrate TRACES... --out lever.json``: lever arm from fine 1-D traces.

Each trace (a gate swept finely across one dot–reservoir transition) is fitted
with a Fermi–Dirac step; traces at three or more temperatures give the lever
arm and the saturated electron temperature, traces at one known electron
temperature give the lever arm directly. The result is written as a JSON file
that ``stabtool analyze --lever-arm-file`` reads.
"""

from __future__ import annotations

import argparse
import json
import sys
import warnings
from dataclasses import replace
from typing import Any

import numpy as np

from ..errors import InputError, QualityWarning

__all__ = ["register", "run"]


def register(subparsers: Any) -> None:
    """Add the ``calibrate`` sub-command."""
    p = subparsers.add_parser(
        "calibrate",
        help="lever arm of one gate from fine 1-D traces (temperature series or known T_e)",
        description=__doc__.split("\n\n")[1] if __doc__ else None,
    )
    p.add_argument("traces", nargs="+", metavar="TRACES", help="trace files (.csv, .nc, .npz)")
    src = p.add_mutually_exclusive_group()
    src.add_argument("--temperature", type=float, metavar="K",
                     help="electron temperature of every trace, K (overrides the files)")
    src.add_argument("--temperatures-from", metavar="SPEC",
                     help="where the files keep the temperature: attr:NAME, column:NAME or NAME")
    p.add_argument("--out", required=True, metavar="LEVER.json", help="calibration file to write")
    p.add_argument("--plot", metavar="OUT.png", help="write width vs temperature (or the traces) as PNG")
    p.add_argument("--background", choices=("linear", "quadratic", "none"), default="linear",
                   help="background polynomial under each step (default: linear)")
    p.add_argument("--no-shape-check", action="store_true",
                   help="skip the test for non-thermal (Lorentzian) broadening")
    p.add_argument("--gate", metavar="NAME", help="name of the swept gate (overrides the files)")
    p.add_argument("--device", metavar="NAME", help="device name (overrides the files)")
    p.add_argument("--json", action="store_true", help="print the calibration JSON on stdout")
    p.add_argument("--quiet", action="store_true", help="no warnings on stderr")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Run ``stabtool calibrate``; return the exit code."""
    from ..calibrate import Calibrator, write_lever_arm_file
    from ..calibrate.plot import plot_calibration
    from ..io.traces import load_traces

    if args.temperature is not None and not (np.isfinite(args.temperature) and args.temperature > 0):
        raise InputError("--temperature", f"expected a positive temperature in K, got {args.temperature}")
    from ..io.atomic import check_target

    for target in (args.out, args.plot):
        if target:  # an output over a trace file would lose it
            check_target(target, inputs=tuple(args.traces))
    traces = []
    for path in args.traces:
        for tr in load_traces(path, temperature_K=args.temperature, temperatures_from=args.temperatures_from):
            if args.gate:
                tr = replace(tr, gate=args.gate)
            if args.device:
                tr = replace(tr, device=args.device)
            traces.append(tr)
    cal = Calibrator(background=args.background, check_shape=not args.no_shape_check).run(traces)
    out = write_lever_arm_file(cal, args.out)
    if args.plot:
        plot_calibration(cal, args.plot, traces=traces)
    if not args.quiet:
        for w in cal.quality.warnings:
            warnings.warn(w, QualityWarning, stacklevel=2)
    if args.json:
        json.dump(cal.to_dict(), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        n_ok = sum(np.isfinite(r.width_V) for r in cal.traces)
        print(f"{cal.device or '(device unknown)'} gate {cal.gate}: {n_ok} of {len(cal.traces)} traces fitted")
        if cal:
            print(f"lever arm α = {cal.lever_arm:.5g} ± {cal.lever_arm_stderr:.2g} eV/V ({cal.method})")
            if cal.method == "temperature_series":
                print(f"saturated electron temperature T_sat = {cal.saturation_K * 1e3:.1f} ± "
                      f"{cal.saturation_stderr_K * 1e3:.1f} mK  [{cal.saturation_model}]")
        else:
            print("no lever arm: no trace could be fitted")
        print(f"quality: {'ok' if cal.quality.ok else 'DOUBTFUL'}; written {out}")
    return 0
