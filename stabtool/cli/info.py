"""``stabtool info FILE... [--json]``: what a map file holds.

For each file: gates, ranges and steps (in the file's units and in V), shape,
NaN fraction and the measured quantity. A file that cannot be read gives a
one-line error on stderr; the other files are still reported and the exit
code is 2 (3 if a file hit an internal error).
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from typing import Any

import numpy as np
import xarray as xr

from ..errors import InputError, StabtoolWarning
from ..mapdata import implausible_gate_voltages
from ..units import from_volts
from ._options import ISEL_HELP, add_load_options, parse_isel

__all__ = ["describe", "register", "run"]


def _axis(da: xr.DataArray, dim: str) -> dict[str, Any]:
    v = np.asarray(da[dim].values, dtype=np.float64)
    unit = str(da[dim].attrs.get("original_units", "V"))
    try:
        scale_in = from_volts(np.array([1.0]), unit)[0]
    except KeyError:
        unit, scale_in = "V", 1.0
    steps = np.diff(v)
    step = float(np.median(steps))
    uniform = bool(np.allclose(steps, step, rtol=1e-3, atol=0.0))
    return {
        "gate": dim,
        "units": unit,
        "points": int(v.size),
        "start": float(v[0] * scale_in),
        "stop": float(v[-1] * scale_in),
        "step": step * scale_in,
        "start_V": float(v[0]),
        "stop_V": float(v[-1]),
        "step_V": step,
        "uniform_step": uniform,
        "min_step_V": float(np.min(np.abs(steps))),
        "max_step_V": float(np.max(np.abs(steps))),
    }


def describe(da: xr.DataArray) -> dict[str, Any]:
    """Summary of a map as a JSON-ready dict (see module notes)."""
    ydim, xdim = (str(d) for d in da.dims)
    values = np.asarray(da.values, dtype=np.float64)
    return {
        "file": da.attrs.get("source"),
        "format": da.attrs.get("source_format"),
        "quantity": str(da.name),
        "quantity_units": str(da.attrs.get("units", "a.u.")),
        "shape": {"y": int(values.shape[0]), "x": int(values.shape[1])},
        "x": _axis(da, xdim),
        "y": _axis(da, ydim),
        "nan_fraction": float(np.mean(~np.isfinite(values))),
        "signal_min": float(np.nanmin(values)),
        "signal_max": float(np.nanmax(values)),
        "attrs": sorted(k for k in da.attrs if k not in ("source", "source_format", "units")),
        "note": implausible_gate_voltages(da),
    }


def _text(info: dict[str, Any]) -> str:
    lines = [f"{info['file']}  ({info['format']})"]
    lines.append(f"  quantity  {info['quantity']} ({info['quantity_units']}), "
                 f"range {info['signal_min']:.6g} … {info['signal_max']:.6g}")
    lines.append(f"  shape     {info['shape']['y']} × {info['shape']['x']} (y × x)")
    for axis in ("x", "y"):
        a = info[axis]
        step = f"step {a['step']:.6g} {a['units']} ({a['step_V']:.6g} V)"
        if not a["uniform_step"]:
            step += f", unequal: {a['min_step_V']:.3g} … {a['max_step_V']:.3g} V"
        lines.append(
            f"  {axis}  {a['gate']:<6} {a['start']:.6g} → {a['stop']:.6g} {a['units']} "
            f"({a['start_V']:.6g} → {a['stop_V']:.6g} V), {a['points']} points, {step}"
        )
    lines.append(f"  NaN       {100 * info['nan_fraction']:.1f} %")
    if info["attrs"]:
        lines.append(f"  attrs     {', '.join(info['attrs'])}")
    if info.get("stack"):
        dims = ", ".join(f"{d} {n}" for d, n in info["stack"]["dims"].items())
        lines.append(f"  stack     {info['stack']['slices']} sweeps ({dims}); shown: the first; "
                     "batch and drift take every one")
    if info.get("note"):
        lines.append(f"  note      {info['note']}")
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    """Report each file; return 0, or 2 if any file could not be read."""
    from ..io import dumps, load, stack_selections

    reports: list[dict[str, Any]] = []
    failed = 0
    crashed = 0
    for path in args.files:
        try:
            isel = parse_isel(args.isel)
            # a stacked file (several sweeps) without --isel: its first slice, and how many there are
            stack = stack_selections(path, var=args.var, x=args.x, y=args.y) if not isel else []
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", StabtoolWarning)  # the NaN fraction is reported
                da = load(path, var=args.var, x=args.x, y=args.y, isel=isel or (stack[0] if stack else None))
        except InputError as exc:
            failed += 1
            print(f"stabtool: error: {exc}", file=sys.stderr)
            if args.json:
                reports.append({"file": path, "error": exc.fault})
            continue
        except Exception as exc:
            if os.environ.get("STABTOOL_DEBUG"):
                raise
            crashed += 1
            reason = f"{type(exc).__name__}: {' '.join(str(exc).split())}"
            print(f"stabtool: internal error: {path}: {reason} (set STABTOOL_DEBUG=1 "
                  "and report it)", file=sys.stderr)
            if args.json:
                reports.append({"file": path, "error": f"internal error: {reason}"})
            continue
        info = describe(da)
        if stack:
            info["stack"] = {"slices": len(stack), "dims": {d: 1 + max(sel[d] for sel in stack) for d in stack[0]}}
        reports.append(info)
        if not args.json:
            print(_text(info))
    if args.json:
        print(dumps(reports))
    return 3 if crashed else 2 if failed else 0


def register(subparsers: Any) -> None:
    """Add the ``info`` sub-command."""
    p = subparsers.add_parser(
        "info",
        help="show gates, ranges, steps, units, shape and NaN fraction of map files",
        description=__doc__.split("\n\n")[1] if __doc__ else None,
    )
    p.add_argument("files", nargs="+", metavar="FILE", help="map files (.nc, .h5, .csv, .tsv, .txt, .npz)")
    p.add_argument("--json", action="store_true", help="one JSON list on stdout, one object per file")
    add_load_options(p)
    p.add_argument("--isel", action="append", metavar="DIM=INDEX",
                   help=ISEL_HELP)
    p.set_defaults(func=run)
