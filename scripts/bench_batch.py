"""Throughput and scaling of ``stabtool batch``: N maps of S² with 1 and 2 workers.

Writes N synthetic double-dot maps (``quick_double_dot``, NetCDF, cached in
``--data``), then runs the full batch (analysis, plots, records, tables,
summary) over them with 1 worker and with 2 workers, each into a fresh
output folder, and prints the wall times, the throughput, and the scaling
ratio t(1 worker) / t(2 workers) (goal ≥ 1.8) measured in this one run. It
also times the bare pipeline (``Analyzer.analyze_file`` + ``save_plot`` in a
loop, no batch machinery) on the same maps, so the batch overhead shows as
t(batch, 1 worker) / t(bare). The goal for the full size is N=1000, S=200
in ≤ 60 s with 2 workers; the projected time for N=1000 is printed for a
reduced N.

Usage: python scripts/bench_batch.py [--n 1000] [--size 200] [--data DIR] [--no-plots]
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
import time
import warnings
from pathlib import Path


def make_maps(folder: Path, n: int, size: int) -> list[Path]:
    from stabtool.io import save_map
    from stabtool.simulate import quick_double_dot

    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for k in range(n):
        p = folder / f"bench_{size}_{k:04d}.nc"
        if not p.exists():
            sm = quick_double_dot(shape=(size, size), snr=10.0, rng=k)
            save_map(sm.data, p)
        paths.append(p)
    return paths


def bare(paths: list[Path], analyzer, plots: bool, scratch: Path) -> float:
    t = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for p in paths:
            try:
                res = analyzer.analyze_file(p)
                if plots:
                    res.save_plot(scratch / "bare.png")
            except Exception:  # noqa: BLE001 - count the time of failing maps too
                pass
    return time.perf_counter() - t


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1000, help="number of maps (default 1000)")
    ap.add_argument("--size", type=int, default=200, help="map side in pixels (default 200)")
    ap.add_argument("--data", default=None, help="folder for the generated maps (kept; default: temporary)")
    ap.add_argument("--no-plots", action="store_true", help="skip the per-map PNGs")
    ap.add_argument("--no-bare", action="store_true", help="skip the bare-pipeline timing")
    args = ap.parse_args()

    from stabtool.analysis import Analyzer
    from stabtool.batch import run_batch

    tmp = Path(tempfile.mkdtemp(prefix="stabtool-bench-"))
    data = Path(args.data) if args.data else tmp / "maps"
    t = time.perf_counter()
    paths = make_maps(data, args.n, args.size)
    print(f"{args.n} maps of {args.size}² ready in {time.perf_counter() - t:.1f} s ({data})")
    analyzer = Analyzer(electron_temperature_K=0.1)
    plots = not args.no_plots
    try:
        # warm the file cache and this process's imports, so both runs start alike
        run_batch(paths[:1], analyzer, tmp / "warm", workers=1, progress=False, plots=plots)
        times = {}
        reports = {}
        for workers in (1, 2):
            out = tmp / f"out{workers}"
            t = time.perf_counter()
            reports[workers] = run_batch(paths, analyzer, out, workers=workers, progress=False,
                                         plots=plots)
            times[workers] = time.perf_counter() - t
        t_bare = None if args.no_bare else bare(paths, analyzer, plots, tmp)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)

    print(f"{'workers':>7} {'wall (s)':>9} {'maps/s':>8} {'ok':>5} {'doubtful':>9} {'failed':>7}")
    for w in (1, 2):
        r = reports[w]
        print(f"{w:>7} {times[w]:>9.1f} {args.n / times[w]:>8.2f} {r.n_ok:>5} {r.n_doubtful:>9} "
              f"{r.n_failed:>7}")
    ratio = times[1] / times[2]
    print(f"scaling ratio t(1)/t(2) = {ratio:.2f} (goal >= 1.8)")
    if t_bare is not None:
        print(f"bare pipeline, no batch: {t_bare:.1f} s; batch overhead t(batch,1)/t(bare) = "
              f"{times[1] / t_bare:.2f}")
    per_map = times[2] / args.n
    print(f"with 2 workers: {per_map:.3f} s per map -> {1000 * per_map:.0f} s projected for 1000 maps "
          f"of {args.size}² (goal <= 60 s)")


if __name__ == "__main__":
    main()
