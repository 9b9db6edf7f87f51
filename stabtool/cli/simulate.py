"""``stabtool simulate``: write a synthetic charge-stability map with its truth.

A device file (JSON or TOML, see :class:`stabtool.simulate.Device`) or a
preset is swept over two gates; the map is written in the format chosen by
the output suffix (.nc keeps the truth attribute; text and .npz files carry
it too where the format allows) and, with ``--truth``, the truth as JSON.
Without ``--x-range``/``--y-range`` a window holding about five lines of each
dot family is chosen.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from typing import Any

from ..errors import InputError

__all__ = ["register", "run"]


def _fixed(items: list[str] | None) -> dict[str, float]:
    out: dict[str, float] = {}
    for item in items or []:
        if "=" not in item:
            raise InputError("--fix", f"expected GATE=VOLTS, got {item!r}")
        gate, value = item.split("=", 1)
        try:
            out[gate.strip()] = float(value)
        except ValueError:
            raise InputError("--fix", f"{value!r} in {item!r} is not a number (volts)") from None
    return out


def _direction(text: str | None, flag: str) -> dict[str, float] | None:
    """``"P1=1,P2=-0.3"`` → {"P1": 1.0, "P2": -0.3}."""
    if text is None:
        return None
    out: dict[str, float] = {}
    for item in text.split(","):
        if "=" not in item:
            raise InputError(flag, f"expected GATE=COEFF[,GATE=COEFF...], got {text!r}")
        gate, value = item.split("=", 1)
        try:
            out[gate.strip()] = float(value)
        except ValueError:
            raise InputError(flag, f"{value!r} in {text!r} is not a number") from None
    return out


def run(args: argparse.Namespace) -> int:
    """Build the device, render, write; return 0."""
    from ..io import save_map
    from ..io.atomic import atomic_write_text, check_target
    from ..simulate import Artefacts, Device, SensorModel, presets, simulate_map
    from ..simulate.quick import double_dot_window

    if args.list_presets:
        for name in presets.names():
            inf = presets.info(name)
            dev = presets.get(name)
            print(f"{name:16s} {dev.n_dots} dots, gates {', '.join(dev.gate_names)}; T_e {inf.temperature_K} K; {inf.source}")
        return 0
    if args.out is None:
        raise InputError("--out", "an output path is required (e.g. --out map.nc)")
    if args.device is not None:
        dev = Device.load(args.device)
        default_x, default_y = dev.gate_names[0], dev.gate_names[min(1, dev.n_gates - 1)]
        temperature = 0.1
    else:
        dev = presets.get(args.preset)
        inf = presets.info(args.preset)
        default_x, default_y, temperature = inf.x_gate, inf.y_gate, inf.temperature_K
    if args.temperature is not None:
        temperature = args.temperature
    x_dir = _direction(getattr(args, "x_virtual", None), "--x-virtual")
    y_dir = _direction(getattr(args, "y_virtual", None), "--y-virtual")
    xg = args.x or ("vx" if x_dir else default_x)
    yg = args.y or ("vy" if y_dir else default_y)
    fixed = _fixed(args.fix)
    window_dev = dev
    virtual = {n: d for n, d in ((xg, x_dir), (yg, y_dir)) if d is not None}
    if virtual:
        window_dev = dev.with_virtual_gates(virtual)
    scale = 1e-3 if args.units == "mV" else 1.0
    if args.x_range is None or args.y_range is None:
        if dev.n_dots < 2:
            raise InputError("--x-range", "a single-dot device needs explicit --x-range and --y-range")
        auto_x, auto_y = double_dot_window(window_dev, x_gate=xg, y_gate=yg, electrons=args.electrons, fixed_V=fixed)
    xr_ = tuple(v * scale for v in args.x_range) if args.x_range else auto_x
    yr_ = tuple(v * scale for v in args.y_range) if args.y_range else auto_y
    art = Artefacts(
        snr=args.snr,
        row_noise=args.row_noise,
        telegraph=args.telegraph,
        charge_jumps=args.jumps,
        drift_e=args.drift,
        charge_noise_e=args.charge_noise,
        latching=args.latching,
        sensitivity_loss=args.sensitivity_loss,
        interrupted=args.interrupted,
        decreasing_x=args.decreasing_x,
        decreasing_y=args.decreasing_y,
    )
    sm = simulate_map(
        dev,
        x_gate=xg,
        y_gate=yg,
        x_range_V=xr_,  # type: ignore[arg-type]
        y_range_V=yr_,  # type: ignore[arg-type]
        shape=(args.shape[0], args.shape[1]),
        temperature_K=temperature,
        tunnel_coupling_ueV=args.tunnel,
        readout=args.readout,
        sensor=SensorModel(compensation=args.compensation, response=args.sensor_response),
        artefacts=art,
        fixed_V=fixed,
        bias_mV=args.bias,
        x_direction=x_dir,
        y_direction=y_dir,
        lockin=args.lockin,
        rng=args.seed,
    )
    for target in (args.out, args.truth):
        if target:
            check_target(target)
            if os.path.exists(target) and not args.overwrite:
                # a synthetic map written over a file may destroy a measurement
                raise InputError(target, "exists; simulate replaces a file only with --overwrite")
    save_map(sm.data, args.out)
    truth = sm.truth.to_json()
    if args.truth:
        atomic_write_text(args.truth, json.dumps(truth, indent=2) + "\n")
    if args.json:
        print(json.dumps(truth))
    else:
        ny, nx = sm.data.shape
        n_lines = {f: len(sm.truth.lines_of(f)) for f in ("dot1", "dot2", "interdot", "other")}
        print(
            f"wrote {args.out}: {dev.name}, {yg} × {xg} = {ny} × {nx}, readout {args.readout}"
            f"{' through a lock-in on ' + (xg if args.lockin == 'x' else yg) if args.lockin else ''}, "
            f"T_e {temperature} K; segments dot1 {n_lines['dot1']}, dot2 {n_lines['dot2']}, "
            f"interdot {n_lines['interdot']}, other {n_lines['other']}",
            file=sys.stderr,
        )
    return 0


def register(subparsers: Any) -> None:
    """Add the ``simulate`` sub-command."""
    p = subparsers.add_parser(
        "simulate",
        help="write a synthetic charge-stability map with known truth",
        description=(__doc__ or "").split("\n\n")[1] if __doc__ else None,
    )
    src = p.add_mutually_exclusive_group()
    src.add_argument("--device", metavar="FILE", help="device file (.json or .toml)")
    src.add_argument("--preset", default="si-sige-double", help="preset device (see --list-presets)")
    p.add_argument("--list-presets", action="store_true", help="list the presets and exit")
    p.add_argument("--out", metavar="PATH", help="output map (.nc, .csv, .tsv, .npz)")
    p.add_argument("--truth", metavar="PATH", help="also write the truth as JSON")
    p.add_argument("--overwrite", action="store_true", help="replace --out and --truth files that exist")
    p.add_argument("--json", action="store_true", help="print the truth as JSON on stdout")
    p.add_argument("--x", metavar="GATE", help="gate on x (fast axis)")
    p.add_argument("--y", metavar="GATE", help="gate on y (slow axis)")
    p.add_argument("--x-virtual", metavar="GATE=C,...", help="sweep a virtual gate on x: physical gates and "
                   "coefficients, e.g. P1=1,P2=-0.3 (--x names it; default vx)")
    p.add_argument("--y-virtual", metavar="GATE=C,...", help="sweep a virtual gate on y (--y names it; default vy)")
    p.add_argument("--x-range", nargs=2, type=float, metavar=("START", "STOP"), help="x sweep range")
    p.add_argument("--y-range", nargs=2, type=float, metavar=("START", "STOP"), help="y sweep range")
    p.add_argument("--units", choices=("V", "mV"), default="V", help="unit of the ranges (default V)")
    p.add_argument("--electrons", type=float, default=5.0, help="lines per dot family of the automatic window")
    p.add_argument("--shape", nargs=2, type=int, default=(128, 128), metavar=("NY", "NX"), help="pixels")
    p.add_argument("--fix", action="append", metavar="GATE=VOLTS", help="hold another gate (repeatable)")
    p.add_argument("--temperature", type=float, metavar="K", help="electron temperature (default: preset's)")
    p.add_argument("--tunnel", type=float, default=0.0, metavar="UEV", help="interdot tunnel coupling t, µeV")
    p.add_argument("--readout", choices=("sensor", "charge", "transport"), default="sensor")
    p.add_argument("--lockin", choices=("x", "y"), default=None,
                   help="read through a lock-in on the x (y) gate: the map is the read-out's derivative along it "
                        "(lines as peaks; --snr is then the median peak height over the noise)")
    p.add_argument("--bias-mV", "--bias", dest="bias", type=float, default=0.0, metavar="MV",
                   help="source-drain bias for transport, mV (the name analyze takes too)")
    p.add_argument("--compensation", type=float, default=0.0, help="sensor crosstalk compensation 0..1")
    p.add_argument("--sensor-response", choices=("mean", "states"), default="mean",
                   help="how the sensor reads a fluctuating charge: at the mean charge (default) or averaged "
                        "over the charge states (a sensor that follows every switch)")
    p.add_argument("--snr", type=float, default=None, help="white noise: charge-step height / noise std")
    p.add_argument("--row-noise", type=float, default=0.0, help="1/f row offsets, std in step heights")
    p.add_argument("--telegraph", type=float, default=0.0, help="telegraph trap amplitude in step heights")
    p.add_argument("--jumps", type=int, default=0, help="number of sudden charge-offset jumps")
    p.add_argument("--drift", type=float, default=0.0, metavar="E", help="offset-charge drift over the sweep, e")
    p.add_argument("--charge-noise", type=float, default=0.0, metavar="E",
                   help="1/f offset-charge noise on both dots in measurement time, rms e")
    p.add_argument("--latching", type=float, default=0.0, help="per-pixel catch-up probability of dot2 (0 off)")
    p.add_argument("--sensitivity-loss", type=float, default=0.0, help="fraction of columns with a weak sensor")
    p.add_argument("--interrupted", type=float, default=0.0, help="fraction of trailing rows lost (NaN)")
    p.add_argument("--decreasing-x", action="store_true", help="sweep x from high to low")
    p.add_argument("--decreasing-y", action="store_true", help="sweep y from high to low")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.set_defaults(func=run)
