"""Speed of the line-detection pipeline relative to bare scikit-image Canny + Hough.

Prints, for 256² and 1024² synthetic maps, the time of
``stabtool.lines.detect_lines`` divided by the time of
``skimage.feature.canny`` + ``skimage.transform.hough_line`` +
``hough_line_peaks`` on the same map (goal ≤ 3×), and the slope errors of
the two dot families against the map's known slopes (−2.2 and −0.45).
Ratios are measured in one run, the two timed alternately; each time is the
best of a few repeats. The quoted ratio uses CPU time (``process_time``,
all threads counted), which a shared machine disturbs far less than wall
time; the wall-time ratio is printed beside it.

Usage: python scripts/bench_lines.py [--repeats N] [--stages]

``--stages`` also prints the CPU time of each pipeline step (best over the
repeats), to see where the time goes. On a shared machine the ratios vary
by ±30 % from run to run.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import ndimage as ndi
from skimage.feature import canny
from skimage.transform import hough_line, hough_line_peaks

import stabtool.lines.detector as _detector
from stabtool.lines import detect_lines
from stabtool.mapdata import make_map

#: pipeline steps timed by --stages (names in stabtool.lines.detector)
#: (not nested in one another; names missing from the detector are skipped)
STAGES = ("_noise_core", "_row_offsets_core", "_jumps_core", "_edge_core", "_select_edges", "_offsets_clear_of_lines",
          "_segments_core",
          "merge_collinear", "classify_lines", "refine_segments", "drop_duplicates", "family_fit", "assess_quality")


def synthetic_map(n: int, rng: int = 0):
    """A honeycomb-like map from two families of steps (slopes −2.2 and −0.45 in index units)."""
    g = np.random.default_rng(rng)
    iy, ix = np.mgrid[0:n, 0:n].astype(float)
    period = n / 8
    n1 = np.floor((ix + iy / 2.2) / period)
    n2 = np.floor((iy + 0.45 * ix) / period)
    occ = ndi.gaussian_filter(0.6 * n1 + 0.4 * n2, 0.7)
    sig = 1 / (1 + (occ - occ.mean()) ** 2 / 4)
    step = np.median(np.abs(np.diff(sig, axis=1))[np.diff(n1, axis=1) > 0])
    v = np.linspace(0, 0.1, n)
    return make_map(sig + g.normal(0, step / 10, sig.shape), v, v)


def best_times(fns, repeats):
    """Best CPU and wall time (s) of each callable, the callables run alternately."""
    cpu = [[] for _ in fns]
    wall = [[] for _ in fns]
    for _ in range(repeats):
        for k, fn in enumerate(fns):
            c, t = time.process_time(), time.perf_counter()
            fn()
            cpu[k].append(time.process_time() - c)
            wall[k].append(time.perf_counter() - t)
    return [(min(c), min(w)) for c, w in zip(cpu, wall)]


def timed_stages(da, repeats: int) -> dict[str, float]:
    """Best CPU time (s) of each pipeline step over ``repeats`` runs of detect_lines (and of the rest)."""
    stages = [name for name in STAGES if hasattr(_detector, name)]
    totals = dict.fromkeys(stages, 0.0)
    best = dict.fromkeys(stages, np.inf)
    saved = {name: getattr(_detector, name) for name in stages}

    def wrap(name, fn):
        def inner(*a, **k):
            t = time.process_time()
            try:
                return fn(*a, **k)
            finally:
                totals[name] += time.process_time() - t
        return inner

    try:
        for name, fn in saved.items():
            setattr(_detector, name, wrap(name, fn))
        rest = np.inf
        for _ in range(repeats):
            for name in totals:
                totals[name] = 0.0
            t0 = time.process_time()
            detect_lines(da)
            rest = min(rest, time.process_time() - t0 - sum(totals.values()))
            for name, t in totals.items():
                best[name] = min(best[name], t)
        best["(the rest)"] = rest
    finally:
        for name, fn in saved.items():
            setattr(_detector, name, fn)
    return best


#: slopes (dV_y/dV_x) of the two step families of :func:`synthetic_map` (equal axes)
TRUE_SLOPES = {"dot1": -2.2, "dot2": -0.45}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--stages", action="store_true", help="also print the CPU time of each pipeline step")
    args = ap.parse_args()
    print(f"{'size':>6} {'canny+hough (ms)':>17} {'pipeline (ms)':>14} {'ratio':>6} {'wall ratio':>11}   "
          "slope errors dot1, dot2 (lines), verdict")
    for n in (256, 1024):
        da = synthetic_map(n)
        img = da.values

        def bare(img=img):
            e = canny(img, sigma=1.5)
            h, a, d = hough_line(e, theta=np.deg2rad(np.arange(-90, 90, 0.5)))
            hough_line_peaks(h, a, d, num_peaks=400)

        res = detect_lines(da)  # also warms up
        (cb, wb), (cp, wp) = best_times([bare, lambda da=da: detect_lines(da)], args.repeats)
        acc = ", ".join(f"{100 * abs(res.family(f).slope / TRUE_SLOPES[f] - 1):.2f} % ({len(res.family(f))})"
                        for f in ("dot1", "dot2"))
        verdict = "ok" if res.quality.ok else "doubtful"
        print(f"{n:>5}² {1e3 * cb:>17.1f} {1e3 * cp:>14.1f} {cp / cb:>6.2f} {wp / wb:>11.2f}   {acc}, {verdict}")
        if args.stages:
            st = timed_stages(da, args.repeats)
            for name, t in sorted(st.items(), key=lambda kv: -kv[1]):
                if t == 0.0 and name != "(the rest)":
                    continue  # a step this detector configuration does not run
                print(f"{'':>8}{name:<20} {1e3 * t:8.1f} ms")


if __name__ == "__main__":
    main()
