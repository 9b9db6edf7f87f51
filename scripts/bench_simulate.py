"""Speed of the synthetic generator (one run, ratios measured in the same run).

1. Two dots, 256×256, T_e = 100 mK, charge sensor: full ``simulate_map``
   (ground state, thermal occupations, sensor, truth and line list). Goal
   ≤ 30 ms. Wall and CPU time are printed (the machine is shared; CPU time
   is the robust one), with a breakdown by stage.
2. Eight-dot linear array, 256×256: exact ground state of the map (the
   cells of the plane, :mod:`stabtool.simulate.cells`) versus brute-force
   enumeration over the same charge window (the box spanned by the map's
   ground states) at the same pixels. The brute force is vectorised NumPy in
   two forms and the faster one is quoted: (a) ``brute_force_ground_state``
   (BLAS product of the induced charges with every state, in chunks), (b) the
   energies written as ``c_N − u·a_N − w·b_N`` (affine in the pixel indices),
   one row at a time. Goal ≥ 50× faster and < 1 s. The one-off computation
   of the Voronoi-relevant vectors (cached per device) is reported separately.

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


def timed(fn, repeat: int) -> tuple[float, float, float]:
    """(best wall, median wall, best CPU) in seconds."""
    wall, cpu = [], []
    for _ in range(repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        fn()
        wall.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    return min(wall), float(np.median(wall)), min(cpu)


def brute_force_plane(n0: np.ndarray, ec: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Brute force using the affine structure: U(N) + const = c_N − u·a_N − w·b_N."""
    ny, nx, nd = n0.shape
    axes = [np.arange(int(a), int(b) + 1) for a, b in zip(lo, hi)]
    states = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, nd)
    sf = states.astype(float)
    es = sf @ ec
    c = 0.5 * np.einsum("ki,ki->k", es, sf) - es @ n0[0, 0]
    a = es @ (n0[0, 1] - n0[0, 0])
    b = es @ (n0[1, 0] - n0[0, 0])
    u = np.arange(nx, dtype=float)
    out = np.empty((ny, nx), np.int64)
    for w in range(ny):
        e = (c - w * b)[None, :] - u[:, None] * a[None, :]
        out[w] = np.argmin(e, axis=1)
    return states[out]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--repeat", type=int, default=7)
    args = ap.parse_args()

    # ---------------------------------------------------------------- 1
    dev = presets.get("si-sige-double")
    xr_, yr_ = double_dot_window(dev, x_gate="PA", y_gate="PB")
    kw = dict(x_gate="PA", y_gate="PB", x_range_V=xr_, y_range_V=yr_, shape=(256, 256), temperature_K=0.1)
    simulate_map(dev, **kw)  # warm-up (relevant vectors cached)
    best, med, cpu = timed(lambda: simulate_map(dev, **kw), args.repeat)
    print(
        f"2 dots 256x256 T=0.1 K sensor, full simulate_map: wall best {best * 1e3:.1f} ms (median {med * 1e3:.1f} ms), "
        f"CPU best {cpu * 1e3:.1f} ms (goal <= 30 ms)"
    )
    x = np.linspace(*xr_, 256)
    y = np.linspace(*yr_, 256)
    best_g, _, cpu_g = timed(lambda: _ground_map(dev, x, y, "PA", "PB", {"BC": 0.0}), args.repeat)
    print(f"   of which exact ground state: wall best {best_g * 1e3:.1f} ms, CPU {cpu_g * 1e3:.1f} ms")
    best_q, _, cpu_q = timed(lambda: quick_double_dot(shape=(256, 256), snr=10), args.repeat)
    print(f"   quick_double_dot 256x256 with noise: wall best {best_q * 1e3:.1f} ms, CPU {cpu_q * 1e3:.1f} ms")

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
    ours, ours_med, ours_cpu = timed(lambda: _ground_map(arr, ax, ay, xg, yg, fixed), args.repeat)
    lo, hi = g.reshape(-1, 8).min(axis=0), g.reshape(-1, 8).max(axis=0)
    n_states = int(np.prod(hi - lo + 1))
    n0 = _induced(arr, ax, ay, xg, yg, fixed)
    brute_a = brute_force_ground_state(n0, arr.ec_eV, lo, hi)
    brute_b = brute_force_plane(n0, arr.ec_eV, lo, hi)
    reps = max(1, min(3, args.repeat))
    ta, _, ca = timed(lambda: brute_force_ground_state(n0, arr.ec_eV, lo, hi), reps)
    tb, _, cb = timed(lambda: brute_force_plane(n0, arr.ec_eV, lo, hi), reps)
    t_brute, c_brute = min(ta, tb), min(ca, cb)
    agree = bool(np.array_equal(brute_a, g) and np.array_equal(brute_b, g))
    print(
        f"8-dot array 256x256 ({xg}, {yg}): exact ground state wall best {ours * 1e3:.1f} ms (median "
        f"{ours_med * 1e3:.1f} ms), CPU {ours_cpu * 1e3:.1f} ms; relevant vectors ({rel.shape[0]}) once per "
        f"device {t_rel * 1e3:.0f} ms"
    )
    print(
        f"   brute force over the window {lo.tolist()}..{hi.tolist()} ({n_states} states), same pixels: "
        f"chunked BLAS {ta:.2f} s, affine rows {tb:.2f} s (wall); "
        f"ratio wall {t_brute / ours:.0f}x, CPU {c_brute / ours_cpu:.0f}x (goal >= 50x, < 1 s); "
        f"incl. relevant vectors {t_brute / (ours + t_rel):.1f}x; identical: {agree}"
    )


if __name__ == "__main__":
    main()
