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
reduced N, twice: scaled from the N-map run (which counts the once-per-batch
work at the end N times over), and from the marginal cost of a map (the
difference of 2-worker runs over N/2 and N maps) plus that work once.

CPU times (this process plus its worker processes) are printed next to the
wall times, with the load average: on a machine shared with other jobs the
wall times and the scaling ratio say more about the other jobs than about
the batch, while the CPU seconds per map do not depend on them.

The worker pool's start-up (the fork server importing SciPy, xarray and
matplotlib once, ``stabtool.batch.runner.FORKSERVER_PRELOAD``; each worker
then imports stabtool) is paid once per batch. It is
timed separately on a 2-map warm-up batch, so the timed 2-worker run is
steady state, and added once to the projection for 1000 maps (scaling the
start-up of a 40-map run by 25 overstated the projection). The workers are
children of the fork server, so their CPU is read from the server's
``/proc`` entry (it reaps them); the per-map PNG time is the CPU of
``save_plot`` in the bare loop.

Usage: python scripts/bench_batch.py [--n 1000] [--size 200] [--data DIR] [--no-plots]
"""

from __future__ import annotations

import os

# One BLAS/OpenMP thread in this process too, as in the batch's worker processes: the
# in-process runs (1 worker, bare) are then comparable with the pool, and idle BLAS
# threads do not burn CPU on these small matrices. A value set by the user is kept.
for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse
import resource
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


def _forkserver_cpu() -> float:
    """CPU seconds of the multiprocessing fork server and of the workers it has reaped (Linux).

    The batch forks its workers from a fork server (``stabtool.batch.runner._pool_context``):
    they are the server's children, not this process's, so ``RUSAGE_CHILDREN`` misses them.
    0 when there is no server (yet) or no ``/proc``.
    """
    try:
        from multiprocessing import forkserver

        pid = getattr(forkserver._forkserver, "_forkserver_pid", None)  # private; bench only
        if not pid:
            return 0.0
        with open(f"/proc/{pid}/stat") as fh:
            fields = fh.read().rsplit(")", 1)[1].split()
        utime, stime, cutime, cstime = (int(v) for v in fields[11:15])
        return (utime + stime + cutime + cstime) / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, AttributeError, ImportError):
        return 0.0


def cpu_now() -> float:
    """CPU seconds of this process, its reaped child processes, the fork server and its reaped workers."""
    own = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    time.sleep(0.2)  # let the fork server reap the workers of a pool just shut down
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime + _forkserver_cpu()


def bare(paths: list[Path], analyzer, plots: bool, scratch: Path) -> tuple[float, float]:
    """Wall time of analysis + plot of every map in a loop, and the CPU time of the plots alone."""
    t = time.perf_counter()
    plot_cpu = 0.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for p in paths:
            try:
                res = analyzer.analyze_file(p)
                if plots:
                    c = time.process_time()
                    res.save_plot(scratch / "bare.png")
                    plot_cpu += time.process_time() - c
            except Exception:  # noqa: BLE001 - count the time of failing maps too
                pass
    return time.perf_counter() - t, plot_cpu


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
        # the worker pool's one-time start-up (fork server with the warm imports), paid once per
        # batch process: timed here on two maps, so the timed 2-worker run below is steady state
        c, t = cpu_now(), time.perf_counter()
        run_batch(paths[:2], analyzer, tmp / "warm2", workers=2, progress=False, plots=plots)
        t_start, cpu_start = time.perf_counter() - t, cpu_now() - c
        times = {}
        cpus = {}
        parent = {}
        reports = {}
        load0 = os.getloadavg()[0]
        for workers in (1, 2):
            out = tmp / f"out{workers}"
            c = cpu_now()  # (it waits a moment for the fork server to reap: before the clock starts)
            t, p = time.perf_counter(), time.process_time()
            reports[workers] = run_batch(paths, analyzer, out, workers=workers, progress=False,
                                         plots=plots)
            times[workers] = time.perf_counter() - t
            parent[workers] = time.process_time() - p
            cpus[workers] = cpu_now() - c
        # the same with half the maps: the difference is the cost of n/2 more maps, without the
        # once-per-batch work at the end (NetCDF table, summary page, drift plots)
        half = max(args.n // 2, 1)
        c = cpu_now()
        t = time.perf_counter()
        run_batch(paths[:half], analyzer, tmp / "half2", workers=2, progress=False, plots=plots)
        t_half, cpu_half = time.perf_counter() - t, cpu_now() - c
        c = cpu_now()
        t_bare, plot_cpu = (None, None) if args.no_bare else bare(paths, analyzer, plots, tmp)
        cpu_bare = cpu_now() - c
        load1 = os.getloadavg()[0]
    finally:
        shutil.rmtree(tmp, ignore_errors=True)

    print(f"{'workers':>7} {'wall (s)':>9} {'maps/s':>8} {'CPU (s)':>8} {'CPU/map':>8} {'ok':>5} {'doubtful':>9} "
          f"{'failed':>7}")
    for w in (1, 2):
        r = reports[w]
        print(f"{w:>7} {times[w]:>9.1f} {args.n / times[w]:>8.2f} {cpus[w]:>8.1f} {cpus[w] / args.n:>8.3f} "
              f"{r.n_ok:>5} {r.n_doubtful:>9} {r.n_failed:>7}")
    ratio = times[1] / times[2]
    print(f"scaling ratio t(1)/t(2) = {ratio:.2f} (goal >= 1.8); CPU(2 workers)/CPU(1 worker) = "
          f"{cpus[2] / cpus[1]:.2f}; load average {load0:.1f} -> {load1:.1f} on {os.cpu_count()} CPUs")
    print(f"2 workers: the parent process (records, plots, tables, summary) used {parent[2]:.1f} s CPU "
          f"({1000 * parent[2] / args.n:.0f} ms per map), the workers {cpus[2] - parent[2]:.1f} s")
    if t_bare is not None:
        print(f"bare pipeline, no batch: {t_bare:.1f} s ({cpu_bare:.1f} s CPU); batch overhead "
              f"t(batch,1)/t(bare) = {times[1] / t_bare:.2f} (CPU {cpus[1] / cpu_bare:.2f})")
        if plots:
            print(f"per-map PNG (save_plot, in the bare loop): {1000 * plot_cpu / args.n:.0f} ms CPU per map")
    print(f"worker pool start-up, once per batch (fork server + imports, 2 maps included): {t_start:.1f} s wall, "
          f"{cpu_start:.1f} s CPU; the timed 2-worker run above started warm")
    per_map = times[2] / args.n
    print(f"with 2 workers: {per_map:.3f} s per map -> {1000 * per_map + t_start:.0f} s projected for 1000 maps "
          f"of {args.size}² incl. the start-up (goal <= 60 s)")
    print(f"from CPU time, on 2 otherwise idle cores: {1000 * cpus[2] / args.n / 2 + cpu_start / 2:.0f} s "
          f"for 1000 maps")
    if args.n - half >= 2:
        m_wall = (times[2] - t_half) / (args.n - half)
        m_cpu = (cpus[2] - cpu_half) / (args.n - half)
        fixed = times[2] - args.n * m_wall
        print(f"marginal cost of a map (2 workers, runs of {half} and {args.n} maps): {m_wall:.3f} s wall, "
              f"{m_cpu:.3f} s CPU; once-per-batch work (tables, summary, drift plots) {fixed:.1f} s wall "
              f"-> {1000 * m_wall + fixed + t_start:.0f} s projected for 1000 maps incl. start-up")


if __name__ == "__main__":
    main()
