"""Speed of the synthetic generator (one run, ratios measured in the same run).

1. Two dots, 256×256, T_e = 100 mK, charge sensor: full ``simulate_map``
   (ground state, thermal occupations, sensor, truth and line list) and the
   render alone. Goal ≤ 30 ms.
2. Eight-dot linear array, 256×256: exact ground state of the map
   (row event scan + certificate) versus brute-force enumeration over the
   same charge window (the box spanned by the map's ground states). Goal
   ≥ 50× faster and < 1 s. The one-off computation of the Voronoi-relevant
   vectors (cached per device) is reported separately.

Usage: ``python scripts/bench_simulate.py [--repeat N]``
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from stabtool.simulate import presets, quick_double_dot, simulate_map
from stabtool.simulate.ground_state import _relevant_cached, brute_force_ground_state, relevant_vectors
from stabtool.simulate.quick import double_dot_window
from stabtool.simulate.render import _ground_map, _induced


def best_of(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times), float(np.median(times))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--repeat", type=int, default=7)
    args = ap.parse_args()

    # ---------------------------------------------------------------- 1
    dev = presets.get("si-sige-double")
    xr_, yr_ = double_dot_window(dev, x_gate="PA", y_gate="PB")
    kw = dict(x_gate="PA", y_gate="PB", x_range_V=xr_, y_range_V=yr_, shape=(256, 256), temperature_K=0.1)
    simulate_map(dev, **kw)  # warm-up (relevant vectors cached)
    best, med = best_of(lambda: simulate_map(dev, **kw), args.repeat)
    print(f"2 dots 256x256 T=0.1 K sensor, full simulate_map: best {best * 1e3:.1f} ms, median {med * 1e3:.1f} ms (goal <= 30 ms)")
    x = np.linspace(*xr_, 256)
    y = np.linspace(*yr_, 256)
    best_g, _ = best_of(lambda: _ground_map(dev, x, y, "PA", "PB", {"BC": 0.0}), args.repeat)
    print(f"   of which exact ground state: best {best_g * 1e3:.1f} ms")
    best_q, _ = best_of(lambda: quick_double_dot(shape=(256, 256), snr=10), args.repeat)
    print(f"   quick_double_dot 256x256 with noise: best {best_q * 1e3:.1f} ms")

    # ---------------------------------------------------------------- 2
    arr = presets.get("linear-array-8")
    xg, yg = "P4", "P5"
    axr, ayr = double_dot_window(arr, x_gate=xg, y_gate=yg, electrons=5.0)
    ax = np.linspace(*axr, 256)
    ay = np.linspace(*ayr, 256)
    fixed = {g: 0.0 for g in arr.gate_names if g not in (xg, yg)}
    _relevant_cached.cache_clear()
    t0 = time.perf_counter()
    rel = relevant_vectors(arr.ec_eV)
    t_rel = time.perf_counter() - t0
    g = _ground_map(arr, ax, ay, xg, yg, fixed)
    ours, ours_med = best_of(lambda: _ground_map(arr, ax, ay, xg, yg, fixed), args.repeat)
    lo, hi = g.reshape(-1, 8).min(axis=0), g.reshape(-1, 8).max(axis=0)
    n_states = int(np.prod(hi - lo + 1))
    n0 = _induced(arr, ax, ay, xg, yg, fixed)
    t0 = time.perf_counter()
    brute = brute_force_ground_state(n0, arr.ec_eV, lo, hi)
    t_brute = time.perf_counter() - t0
    agree = bool(np.array_equal(brute, g))
    print(
        f"8-dot array 256x256 ({xg}, {yg}): exact ground state best {ours * 1e3:.1f} ms (median {ours_med * 1e3:.1f} ms); "
        f"relevant vectors ({rel.shape[0]}) once per device {t_rel * 1e3:.0f} ms"
    )
    print(
        f"   brute force over the window {lo.tolist()}..{hi.tolist()} ({n_states} states): {t_brute:.2f} s; "
        f"ratio {t_brute / ours:.0f}x (goal >= 50x, < 1 s); incl. relevant vectors {t_brute / (ours + t_rel):.0f}x; "
        f"identical: {agree}"
    )


if __name__ == "__main__":
    main()
