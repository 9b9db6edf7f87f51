"""``stabtool analyze FILE``: lines, virtual gates, capacitances, lever arms, charge states.

Runs the :class:`~stabtool.analysis.Analyzer` on one map and prints a text
summary, or with ``--json`` the JSON object of the project's conventions.
``--plot`` writes a PNG, ``--save`` the map and all results as NetCDF (both
written atomically). Exit 0 whenever the analysis ran, even when its quality
verdict is false; exit 2 with one line for input that cannot be read.
"""

from __future__ import annotations

import argparse
import math
from typing import Any

from ..report.caution import MATRIX_CAUTION
from ._options import ISEL_HELP, READOUT_CHOICES, READOUT_HELP, add_load_options, parse_isel

__all__ = ["register", "run"]


def _lever_arm(text: str) -> tuple[float, ...]:
    try:
        vals = tuple(float(t) for t in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected A11 or A11,A22 (numbers in eV/V), got {text!r}") from None
    if not 1 <= len(vals) <= 2 or not all(0 < v <= 1 for v in vals):
        raise argparse.ArgumentTypeError(f"expected one or two lever arms in (0, 1] eV/V, got {text!r}")
    return vals


def _temperature(text: str) -> float:
    try:
        t = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a temperature in K, got {text!r}") from None
    if not (math.isfinite(t) and t > 0):
        raise argparse.ArgumentTypeError(f"expected a positive temperature in K, got {text!r}")
    return t


def run(args: argparse.Namespace) -> int:
    """Analyse ``args.file``; return the exit code."""
    from ..analysis import Analyzer
    from ..io import dumps, load
    from ..io.atomic import check_target
    from ..io.stacks import split_slice_ref

    source = split_slice_ref(args.file)[0]
    for target in (args.plot, args.save):
        if target:  # before the analysis: a bad output path should not cost its run
            check_target(target, inputs=(source,))
    da = load(args.file, var=args.var, x=args.x, y=args.y, isel=parse_isel(args.isel))
    analyzer = Analyzer(
        electron_temperature_K=args.electron_temperature,
        lever_arm=args.lever_arm,
        lever_arm_file=args.lever_arm_file,
        refine=not args.no_refine,
        bias_mV=args.bias_mV,
        mode=args.mode,
        readout=args.readout,
    )
    res = analyzer(da)
    out = res.to_json()
    matrix = out.get("virtual_gate_matrix")
    caution = MATRIX_CAUTION if matrix is not None and any(v is not None for row in matrix for v in row) else None
    if args.plot:
        res.save_plot(args.plot)
    if args.save:
        from ..io import save_map

        ds = res.to_dataset()
        if caution is not None:
            ds.attrs["caution"] = caution
        save_map(ds, args.save)
    if args.json:
        # (the conventions' object, plus the caution with a matrix: it may go to a device)
        print(dumps(out if caution is None else {**out, "caution": caution}))
    else:
        print(res.summary())
    return 0


def register(subparsers: Any) -> None:
    """Add the ``analyze`` sub-command."""
    p = subparsers.add_parser(
        "analyze",
        help="virtual gates, gate capacitances, lever arms, charging energies and charge states of one map",
        description=__doc__.split("\n\n")[1] if __doc__ else None,
    )
    p.add_argument("file", metavar="FILE", help="map file (.nc, .h5, .csv, .tsv, .txt, .npz)")
    add_load_options(p)
    p.add_argument("--isel", action="append", metavar="DIM=INDEX", help=ISEL_HELP)
    # several references may be given together: they are compared (disagreement ⇒ quality false)
    ref = p.add_argument_group("energy references")
    ref.add_argument("--electron-temperature", type=_temperature, default=None, metavar="K",
                     help="electron temperature: lever arms from the thermal line widths")
    ref.add_argument("--lever-arm", type=_lever_arm, default=None, metavar="A11[,A22]",
                     help="known lever arm(s) of the x (and y) gate, eV/V")
    ref.add_argument("--lever-arm-file", default=None, metavar="FILE", help="lever-arm calibration file")
    ref.add_argument("--bias-mV", type=float, default=None, metavar="MV",
                     help="source-drain bias of a double-dot transport map: lever arms from the bias triangles")
    p.add_argument("--mode", choices=("auto", "stability", "diamonds"), default="auto",
                   help="map kind; 'auto' treats a map whose y axis is named like a bias (bias, sd, vsd) "
                        "as Coulomb diamonds")
    p.add_argument("--readout", choices=READOUT_CHOICES, default="auto", help=READOUT_HELP)
    p.add_argument("--json", action="store_true", help="print the result as one JSON object")
    p.add_argument("--plot", default=None, metavar="OUT.png", help="write a figure of the analysis")
    p.add_argument("--save", default=None, metavar="OUT.nc", help="write the map and all results (NetCDF)")
    p.add_argument("--no-refine", action="store_true", help="skip the global model fit to the map")
    p.add_argument("--quiet", action="store_true", help="do not print warnings")
    p.set_defaults(func=run)
