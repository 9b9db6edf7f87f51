"""``stabtool virtual-gates``: the array's virtual-gate matrix from pairwise maps.

Inputs are JSON files written by ``stabtool analyze --json`` or maps (which
are analysed first); a single saved matrix JSON (written by ``--out``) can be
given instead to convert a sweep or check limits with it.

Exit codes: 0 when the matrix was produced (even with ``quality.ok`` false),
1 when a ``--sweep`` violates a ``--limits`` range, 2 for bad input.
"""

from __future__ import annotations

import argparse
import csv
import json
import re
import sys
from pathlib import Path
from typing import Any

import numpy as np

from ..arrays import (
    CAUTION,
    PairMeasurement,
    VirtualGateMatrix,
    assemble_virtual_gates,
    check_limits,
    matrix_to_dict,
    pair_from_analysis,
    pair_from_map,
    virtual_sweep,
    write_matrix_csv,
    write_matrix_json,
)
from ..arrays.export import KIND, matrix_from_dict
from ..errors import InputError
from ..units import voltage_scale

_VOLT_RE = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([A-Za-zµμ]*)\s*$")


def register(subparsers: Any) -> None:
    """Add the ``virtual-gates`` sub-command."""
    p = subparsers.add_parser(
        "virtual-gates",
        help="assemble an array's virtual-gate matrix from pairwise maps",
        description="Assemble the N×M virtual-gate matrix of a dot array from analysed two-gate maps "
        "(JSON from 'stabtool analyze --json', or maps, which are analysed first). Elements measured "
        "in several maps are combined weighted by their uncertainties; the disagreement is reported "
        "(chi2, Birge ratio). Optionally convert a virtual sweep to physical corner voltages and "
        "check them against gate limits. Voltages accept a unit suffix (V, mV, uV; default V).",
        epilog="Exit codes: 0 matrix produced (check quality.ok), 1 a sweep violates --limits, "
        "2 bad input.",
    )
    p.add_argument("inputs", nargs="+", metavar="MAP_OR_JSON",
                   help="analysis JSON files or maps of gate pairs; or one saved matrix JSON")
    p.add_argument("--plungers", metavar="G1,G2,...",
                   help="plunger gates, one per dot, in row order (default: every gate seen, "
                   "in order of first appearance, except sensor gates)")
    p.add_argument("--sensor", action="append", default=[], metavar="GATE",
                   help="a charge-sensor gate (its sensor dot becomes a row after the dots); repeatable")
    p.add_argument("--gates", metavar="G1,G2,...",
                   help="physical gates in column order (default: plungers, sensors, then others seen)")
    p.add_argument("--out", metavar="MATRIX.json", help="write the matrix and its statistics as JSON")
    p.add_argument("--csv", metavar="OUT.csv", help="write the matrix in long CSV form (one element per row)")
    p.add_argument("--json", action="store_true", help="print the matrix JSON on stdout instead of a table")
    p.add_argument("--sweep", action="append", default=[], metavar="VNAME=LO:HI[:N]",
                   help="a swept virtual gate (e.g. vP2=-10mV:10mV:101), offsets from --origin; "
                   "give one or two")
    p.add_argument("--origin", action="append", default=[], metavar="GATE=V",
                   help="physical operating point of a gate for --sweep (default 0 V); repeatable")
    p.add_argument("--limits", action="append", default=[], metavar="GATE=LO:HI",
                   help="allowed physical range of a gate; the sweep corners are checked; repeatable")
    p.add_argument("--sweep-csv", metavar="OUT.csv",
                   help="write the physical voltages of every point of the --sweep (long CSV)")
    p.add_argument("--axis", action="append", default=[], metavar="NAME=G1:C1,G2:C2",
                   help="a tilted sweep axis of the inputs: axis NAME stepped gate G1 by C1 and G2 by C2 "
                   "per volt (e.g. P1_tilt_P8=P1:1,P8:0.23); maps on such axes are converted to the physical "
                   "gates; repeatable")
    p.add_argument("--x", dest="x_gate", metavar="GATE", help="for map inputs: gate on x")
    p.add_argument("--y", dest="y_gate", metavar="GATE", help="for map inputs: gate on y")
    p.add_argument("--var", metavar="NAME", help="for map inputs: measured variable")
    p.add_argument("--quiet", action="store_true", help="suppress warnings")
    p.set_defaults(func=run)


# ---------------------------------------------------------------- parsing
def _volts(text: str, param: str) -> float:
    m = _VOLT_RE.match(text)
    if not m:
        raise InputError(param, f"{text!r} is not a voltage (a number with an optional unit V/mV/uV)")
    try:
        return float(m.group(1)) * voltage_scale(m.group(2) or None)
    except KeyError as exc:
        raise InputError(param, str(exc.args[0])) from None


def _split(spec: str, param: str) -> tuple[str, str]:
    if "=" not in spec:
        raise InputError(param, f"{spec!r}: expected NAME=VALUE")
    name, _, value = spec.partition("=")
    if not name.strip():
        raise InputError(param, f"{spec!r}: missing the name before '='")
    return name.strip(), value.strip()


def _parse_range(spec: str, param: str) -> tuple[str, float, float, int]:
    name, value = _split(spec, param)
    parts = value.split(":")
    if len(parts) not in (2, 3):
        raise InputError(param, f"{spec!r}: expected {name}=LO:HI or {name}=LO:HI:N")
    lo, hi = _volts(parts[0], param), _volts(parts[1], param)
    n = 2
    if len(parts) == 3:
        try:
            n = int(parts[2])
        except ValueError:
            raise InputError(param, f"{spec!r}: N={parts[2]!r} is not an integer") from None
        if n < 2:
            raise InputError(param, f"{spec!r}: N must be at least 2")
    if not lo < hi:
        raise InputError(param, f"{spec!r}: LO must be below HI")
    return name, lo, hi, n


def _parse_axes(specs: list[str]) -> dict[str, dict[str, float]]:
    """``NAME=G1:C1,G2:C2`` → ``{NAME: {G1: C1, G2: C2}}``."""
    out: dict[str, dict[str, float]] = {}
    for spec in specs:
        name, value = _split(spec, "--axis")
        comb: dict[str, float] = {}
        for part in (t.strip() for t in value.split(",") if t.strip()):
            gate, sep, coef = part.partition(":")
            try:
                c = float(coef)
            except ValueError:
                c = float("nan")
            if not sep or not gate.strip() or not np.isfinite(c):
                raise InputError("--axis", f"{spec!r}: expected {name}=GATE:COEFFICIENT[,GATE:COEFFICIENT]")
            comb[gate.strip()] = c
        if not comb:
            raise InputError("--axis", f"{spec!r}: no gate given")
        out[name] = comb
    return out


def _names(text: str | None) -> list[str] | None:
    return None if text is None else [t.strip() for t in text.split(",") if t.strip()]


# ---------------------------------------------------------------- inputs
def _load_json(path: Path) -> Any:
    try:
        return json.loads(path.read_text())
    except FileNotFoundError:
        raise InputError(path, "file not found") from None
    except UnicodeDecodeError:
        raise InputError(path, "not a UTF-8 text file") from None
    except json.JSONDecodeError as exc:
        raise InputError(path, f"not valid JSON (line {exc.lineno}: {exc.msg})") from None


def _analyse_map(path: Path, args: argparse.Namespace) -> PairMeasurement:
    """Load a map and run the analysis pipeline on it."""
    from ..io import load

    kwargs = {k: v for k, v in (("x", args.x_gate), ("y", args.y_gate), ("var", args.var)) if v}
    da = load(path, **kwargs)
    return pair_from_map(da, source=str(path), directions=_parse_axes(args.axis) or None)


def _read_inputs(args: argparse.Namespace) -> VirtualGateMatrix:
    pairs: list[PairMeasurement] = []
    saved: VirtualGateMatrix | None = None
    for name in args.inputs:
        path = Path(name)
        if not path.exists():
            raise InputError(path, "file not found")
        if path.suffix.lower() == ".json":
            obj = _load_json(path)
            if isinstance(obj, dict) and obj.get("kind") == KIND:
                if len(args.inputs) > 1:
                    raise InputError(path, "a saved matrix must be the only input (it is used as is)")
                saved = matrix_from_dict(obj, source=str(path))
                continue
            pairs.append(pair_from_analysis(obj, source=str(path), directions=_parse_axes(args.axis) or None))
        else:
            pairs.append(_analyse_map(path, args))
    if saved is not None:
        return saved
    return assemble_virtual_gates(
        pairs,
        plungers=_names(args.plungers),
        sensors=args.sensor,
        gates=_names(args.gates),
    )


# ---------------------------------------------------------------- output
def _fmt(v: float, s: float, measured: bool = True) -> str:
    if not measured:
        return "0 (unmeasured)"
    if not np.isfinite(s):
        return f"{v:+.4f}±?"
    if s == 0:
        return f"{v:+.4f}"
    return f"{v:+.4f}±{s:.4f}"


def _table(vgm: VirtualGateMatrix) -> str:
    w = 17
    cols = vgm.plunger_columns
    lines = ["virtual-gate matrix  V_virtual = M · V_physical  (rows virtual gates, columns physical gates)"]
    lines.append(" " * 8 + "".join(f"{g:>{w}}" for g in vgm.gates))
    for i, name in enumerate(vgm.virtual_gates):
        cells = [_fmt(vgm.matrix[i, j], vgm.uncertainty[i, j], j == cols[i] or vgm.n_estimates[i, j] > 0)
                 for j in range(len(vgm.gates))]
        lines.append(f"{name:<8}" + "".join(f"{c:>{w}}" for c in cells))
    lines.append(f"maps used: {len(vgm.maps)}")
    if vgm.total_dof:
        lines.append(f"consistency between maps: chi2 = {vgm.total_chi2:.3g} for {vgm.total_dof} dof, "
                     f"Birge ratio {vgm.overall_birge_ratio:.3g}, p = {vgm.overall_p_value:.3g}")
    else:
        lines.append("consistency between maps: no element measured twice")
    if vgm.rejected:
        lines.append("left out of the combination: " + "; ".join(str(r) for r in vgm.rejected))
    if vgm.unmeasured:
        lines.append("unmeasured (set to 0): " + ", ".join(f"v{p}<-{g}" for p, g in vgm.unmeasured))
    for s in vgm.sensor_gates:
        comp = vgm.sensor_compensation(s)
        i = vgm.plungers.index(s)
        known = {g: ve for g, ve in comp.items() if vgm.n_estimates[i, vgm.gates.index(g)] > 0}
        lines.append(f"sensor compensation ({s} step per volt on each gate): "
                     + (", ".join(f"{g} {v:+.4f}" + (f"±{e:.4f}" if np.isfinite(e) else "±?")
                                  for g, (v, e) in known.items()) or "none measured")
                     + ("; unmeasured: " + ", ".join(g for g in comp if g not in known)
                        if len(known) < len(comp) else ""))
    lines.append(f"quality: {'ok' if vgm.quality.ok else 'DOUBTFUL'}")
    lines += [f"  - {w_}" for w_ in vgm.quality.warnings]
    return "\n".join(lines)


def _write_sweep_csv(sweep: Any, path: str) -> None:
    da = sweep.physical
    gates = da["gate"].values.tolist()
    swept = [d for d in da.dims if d != "gate"][::-1]  # x first, then y
    flat = da.transpose(*swept, "gate").values.reshape(-1, len(gates))
    grids = np.meshgrid(*[da[d].values for d in swept], indexing="ij")
    try:
        with open(path, "w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow([f"{d} offset (V)" for d in swept] + [f"{g} (V)" for g in gates])
            for k in range(flat.shape[0]):
                w.writerow([repr(float(g.ravel()[k])) for g in grids] + [repr(float(v)) for v in flat[k]])
    except OSError as exc:
        raise InputError(path, f"cannot write ({exc.strerror or exc})") from None


def _sweep(vgm: VirtualGateMatrix, args: argparse.Namespace, out: Any) -> int:
    if len(args.sweep) > 2:
        raise InputError("--sweep", "give one or two swept virtual gates")
    specs = [_parse_range(s, "--sweep") for s in args.sweep]
    origin = {g: 0.0 for g in vgm.gates}
    for spec in args.origin:
        g, v = _split(spec, "--origin")
        if g not in origin:
            raise InputError("--origin", f"unknown gate {g!r}; gates: {', '.join(vgm.gates)}")
        origin[g] = _volts(v, "--origin")
    limits = {}
    for spec in args.limits:
        g, lo, hi, _ = _parse_range(spec + (":2" if spec.count(":") == 1 else ""), "--limits")
        limits[g] = (lo, hi)
    axes = [(name, np.linspace(lo, hi, n)) for name, lo, hi, n in specs]
    sw = virtual_sweep(vgm, x=axes[0], y=axes[1] if len(axes) > 1 else None, origin=origin)
    print("physical voltages at the sweep corners (V, ± from the matrix uncertainty):", file=out)
    for c in sw.corners:
        where = ", ".join(f"{k}={v:+.6g}" for k, v in c.virtual.items())
        vals = ", ".join(f"{g}={c.physical[g]:.6g}" + (f"±{c.sigma[g]:.2g}" if c.sigma[g] > 0 else "")
                         for g in vgm.gates)
        print(f"  [{where}]  {vals}", file=out)
    if args.sweep_csv:
        _write_sweep_csv(sw, args.sweep_csv)
        print(f"wrote {args.sweep_csv}", file=sys.stderr)
    if not limits:
        return 0
    check = check_limits(sw, limits)
    if check.message():
        print(check.message(), file=sys.stderr)
    if not check.ok:
        print("stabtool: the sweep violates gate limits; do not run it as is", file=sys.stderr)
        return 1
    print(f"limits checked at the corners: all within range ({', '.join(limits)})", file=out)
    return 0


def run(args: argparse.Namespace) -> int:
    """Run the command; return the exit code."""
    if (args.origin or args.limits or args.sweep_csv) and not args.sweep:
        raise InputError("--sweep", "--origin, --limits and --sweep-csv need a --sweep")
    from ..io.atomic import check_target
    from ..io.stacks import split_slice_ref

    sources = tuple(split_slice_ref(item)[0] for item in args.inputs)
    for target in (args.out, args.csv, args.sweep_csv):
        if target:  # an output over an input (an analysis JSON, a map) would lose it
            check_target(target, inputs=sources)
    vgm = _read_inputs(args)
    if args.out:
        write_matrix_json(vgm, args.out)
    if args.csv:
        write_matrix_csv(vgm, args.csv)
    out = sys.stderr if args.json else sys.stdout
    if args.json:
        print(json.dumps(matrix_to_dict(vgm), indent=2))
    else:
        print(_table(vgm))
    if args.out:
        print(f"wrote {args.out}", file=sys.stderr)
    if args.csv:
        print(f"wrote {args.csv}", file=sys.stderr)
    code = _sweep(vgm, args, out) if args.sweep else 0
    print(f"caution: {CAUTION}", file=sys.stderr)
    return code
