"""Speed of the line-detection pipeline relative to bare scikit-image Canny + Hough.

Prints, for 256² and 1024² synthetic maps, the time of
``stabtool.lines.detect_lines`` divided by the time of
``skimage.feature.canny`` + ``skimage.transform.hough_line`` +
``hough_line_peaks`` on the same map (goal ≤ 3×). Ratios are measured in one
run; each time is the best of a few repeats.

Usage: python scripts/bench_lines.py [--repeats N] [--stages]

``--stages`` also prints the time of each pipeline step (mean over the
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
STAGES = ("_noise_core", "_row_offsets_core", "_jumps_core", "_edge_core", "_segments_core", "merge_collinear",
          "classify_lines", "refine_segments", "drop_duplicates", "family_fit", "assess_quality")


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


def best_time(fn, repeats):
    ts = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        ts.append(time.perf_counter() - t)
    return min(ts)


def timed_stages(da, repeats: int) -> dict[str, float]:
    """Mean time (s) of each pipeline step over ``repeats`` runs of detect_lines."""
    totals = dict.fromkeys(STAGES, 0.0)
    saved = {name: getattr(_detector, name) for name in STAGES}

    def wrap(name, fn):
        def inner(*a, **k):
            t = time.perf_counter()
            try:
                return fn(*a, **k)
            finally:
                totals[name] += time.perf_counter() - t
        return inner

    try:
        for name, fn in saved.items():
            setattr(_detector, name, wrap(name, fn))
        for _ in range(repeats):
            detect_lines(da)
    finally:
        for name, fn in saved.items():
            setattr(_detector, name, fn)
    return {k: v / repeats for k, v in totals.items()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--stages", action="store_true", help="also print the time of each pipeline step")
    args = ap.parse_args()
    print(f"{'size':>6} {'canny+hough (s)':>16} {'pipeline (s)':>13} {'ratio':>7}")
    for n in (256, 1024):
        da = synthetic_map(n)
        img = da.values

        def bare(img=img):
            e = canny(img, sigma=1.5)
            h, a, d = hough_line(e, theta=np.deg2rad(np.arange(-90, 90, 0.5)))
            hough_line_peaks(h, a, d, num_peaks=400)

        tb = best_time(bare, args.repeats)
        tp = best_time(lambda da=da: detect_lines(da), args.repeats)
        print(f"{n:>5}² {tb:>16.3f} {tp:>13.3f} {tp / tb:>7.2f}")
        if args.stages:
            for name, t in sorted(timed_stages(da, args.repeats).items(), key=lambda kv: -kv[1]):
                print(f"{'':>8}{name:<20} {1e3 * t:8.1f} ms")


if __name__ == "__main__":
    main()
