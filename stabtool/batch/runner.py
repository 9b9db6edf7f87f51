"""Run one analysis over many map files: in-process, local processes or a dask cluster.

The runner is generic over the pipeline: any picklable object with
``analyze_file(path)`` (or a callable ``path -> result``) whose result has
``to_json()`` and ``save_plot(path)``; the CLI passes the same
:class:`stabtool.analysis.Analyzer` it uses for ``stabtool analyze``.

Flow: discover the files, hash them, skip those already recorded (resume),
send the rest to the workers a few at a time, and store each result the
moment it arrives (:class:`~stabtool.batch.store.ResultStore`). The tables
are rebuilt from the records every few seconds and at the end; the drift
analysis (on the same, still running worker pool) and the summary page are
written at the end.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import math
import multiprocessing
import os
import re
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Mapping, Sequence

from ..errors import InputError
from ..io.stacks import split_slice_ref
from .inputs import check_output_folder, discover_inputs
from .store import BatchRecord, ResultStore, content_hash
from .worker import DEFAULT_TIME_LIMIT_S, FileAnalyzer, analyze_one, one_line_reason

__all__ = ["BatchItem", "BatchReport", "run_batch", "default_workers"]

def default_workers() -> int:
    """Number of CPUs this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return max(1, os.cpu_count() or 1)


@dataclass(frozen=True)
class BatchItem:
    """One map to process: its file, content hash and input position."""

    path: str
    hash: str
    order: int

    @property
    def plot_name(self) -> str:
        file, isel = split_slice_ref(self.path)
        name = Path(file).stem + "".join(f"_{dim}{index}" for dim, index in (isel or {}).items())
        stem = re.sub(r"[^A-Za-z0-9._-]+", "_", name)[:60] or "map"
        return f"{stem}-{self.hash[:8]}.png"


@dataclass(frozen=True)
class BatchReport:
    """What a batch did.

    Attributes
    ----------
    out_dir : Path
        Output folder.
    records : tuple of BatchRecord
        Every record in the folder after the run, in input order.
    n_run : int
        Maps analysed in this run.
    n_resumed : int
        Maps skipped because an earlier run had finished them.
    n_duplicates : int
        Input files skipped because their content equals an earlier input.
    elapsed_s : float
        Wall time of the run, s.
    workers : int or str
        Local worker count, or the scheduler address.
    """

    out_dir: Path
    records: tuple[BatchRecord, ...]
    n_run: int
    n_resumed: int
    n_duplicates: int
    elapsed_s: float
    workers: int | str
    drift: Any = None
    notes: tuple[str, ...] = field(default_factory=tuple)

    def count(self, status: str) -> int:
        """Number of records with ``status``."""
        return sum(r.status == status for r in self.records)

    @property
    def n_ok(self) -> int:
        return self.count("ok")

    @property
    def n_doubtful(self) -> int:
        return self.count("doubtful")

    @property
    def n_failed(self) -> int:
        return self.count("failed")

    @property
    def exit_code(self) -> int:
        """0 when every map ran (ok or doubtful), 1 when any failed."""
        return 1 if self.n_failed else 0

    def summary_line(self) -> str:
        rate = self.n_run / self.elapsed_s if self.elapsed_s > 0 else float("nan")
        return (
            f"{len(self.records)} maps: {self.n_ok} ok, {self.n_doubtful} doubtful, "
            f"{self.n_failed} failed ({self.n_run} analysed now, {self.n_resumed} resumed, "
            f"{rate:.1f} maps/s) -> {self.out_dir}"
        )


# --------------------------------------------------------------------------- local workers
_WORKER_ANALYZER: Any = None


def _init_worker(analyzer: Any) -> None:
    global _WORKER_ANALYZER
    _WORKER_ANALYZER = analyzer
    try:
        import matplotlib

        matplotlib.use("Agg")
    except Exception:  # noqa: BLE001 - plotting is optional
        pass


def _pool_task(path: str, plot: bool, drift_feature: bool = False, time_limit_s: float | None = None) -> dict:
    return analyze_one(_WORKER_ANALYZER, path, plot=plot, drift_feature=drift_feature, time_limit_s=time_limit_s)


def _run_serial(
    analyzer: Any, items: Sequence[BatchItem], plot: bool, drift_feature: bool = False,
    time_limit_s: float | None = None,
) -> Iterator[tuple[BatchItem, dict]]:
    for item in items:
        yield item, analyze_one(analyzer, item.path, plot=plot, drift_feature=drift_feature,
                                time_limit_s=time_limit_s)


def _crashed(reason: str) -> dict:
    return {"status": "failed", "reason": reason, "result": None, "time": None,
            "elapsed_s": math.nan, "png": None, "info": None}


def _run_pool(
    analyzer: Any, items: Sequence[BatchItem], plot: bool, workers: int, keep: dict | None = None,
    drift_feature: bool = False, time_limit_s: float | None = None,
) -> Iterator[tuple[BatchItem, dict]]:
    """Local process pool with a bounded queue; survives worker crashes.

    When a worker process dies (a segfault in a library, the OOM killer),
    every map in flight is suspect: they are retried one at a time in a
    fresh pool, so only the map that kills a worker again is given up as
    failed. Workers come from :func:`_pool_context` (a warm fork server, or
    ``spawn``), never from a plain ``fork`` of this process: it may hold threads
    (progress bar, a dask client) that ``fork`` would copy in a broken state.
    With ``keep``, a healthy pool is left running in ``keep["pool"]`` at the
    end (its workers are started and warm) for the caller to reuse and shut down.
    """
    with _single_threaded_children():
        ctx = _pool_context()
        yield from _pool_loop(ctx, analyzer, items, plot, workers, keep, drift_feature, time_limit_s)


_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
#: Modules the fork server loads before it forks any worker: the libraries a worker imports for its
#: first map (SciPy, xarray and its file backends, scikit-image, matplotlib, Pillow). Not stabtool
#: itself: workers forked from a server holding stabtool gave last-bit different line fits (37 of
#: 40 bench maps, 1 verdict) than the same code imported in the worker — the analysis is sensitive
#: to the heap layout it runs on (array alignment in the BLAS kernels), so the workers import
#: stabtool as the single-process run does. ("__main__" is preloaded as ``spawn`` would load it: under
#: the ``stabtool`` console script that module imports ``stabtool.cli.main`` and so the package; the
#: CLI batch of 40 maps gave the same results.csv with 1 and 2 workers.) Missing packages are skipped.
FORKSERVER_PRELOAD = (
    "__main__", "numpy", "scipy.optimize", "scipy.sparse", "scipy.ndimage", "scipy.special", "scipy.stats",
    "scipy.interpolate", "scipy.spatial", "pandas", "xarray", "h5netcdf", "h5py", "dask.array", "skimage",
    "skimage.registration", "matplotlib", "matplotlib.figure", "matplotlib.backends.backend_agg",
    "matplotlib.colorbar", "matplotlib.legend", "PIL.Image", "PIL.PngImagePlugin",
)


def _pool_context() -> Any:
    """Start method of the local workers: ``forkserver`` with a warm preload where available, else ``spawn``.

    The fork server is a fresh single-threaded process (started on first use and kept for
    the life of this process) that imports :data:`FORKSERVER_PRELOAD` once; every worker
    is forked from it with SciPy, xarray and matplotlib already loaded, so N workers pay
    most of the import start-up once instead of N times. As with
    ``spawn``, the main module is loaded too (the same ``if __name__ == "__main__":``
    guard is needed). The server takes the environment of its start, which is inside
    :func:`_single_threaded_children`.
    """
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(list(FORKSERVER_PRELOAD))  # used when the server starts
        return ctx
    return multiprocessing.get_context("spawn")


@contextlib.contextmanager
def _single_threaded_children() -> Iterator[None]:
    """One BLAS/OpenMP thread per worker process (N workers use N cores, no oversubscription).

    Spawned children read these variables when they import numpy; a value the
    user set is kept.
    """
    added = [v for v in _THREAD_VARS if v not in os.environ]
    for v in added:
        os.environ[v] = "1"
    try:
        yield
    finally:
        for v in added:
            os.environ.pop(v, None)


def _pool_loop(
    ctx: Any, analyzer: Any, items: Sequence[BatchItem], plot: bool, workers: int, keep: dict | None = None,
    drift_feature: bool = False, time_limit_s: float | None = None,
) -> Iterator[tuple[BatchItem, dict]]:
    pending = list(reversed(items))  # pop() from the end keeps input order
    suspects: list[BatchItem] = []
    while pending or suspects:
        isolate = bool(suspects)
        queue = suspects if isolate else pending
        window = 1 if isolate else 2 * workers + 2
        pool = cf.ProcessPoolExecutor(
            max_workers=1 if isolate else workers, mp_context=ctx,
            initializer=_init_worker, initargs=(analyzer,),
        )
        in_flight: dict[cf.Future, BatchItem] = {}
        broken = False
        finished = False
        try:
            while (queue and not broken) or in_flight:
                while queue and len(in_flight) < window and not broken:
                    item = queue.pop()
                    try:
                        in_flight[pool.submit(_pool_task, item.path, plot, drift_feature, time_limit_s)] = item
                    except cf.process.BrokenProcessPool:
                        queue.append(item)
                        broken = True
                if not in_flight:
                    break
                done, _ = cf.wait(in_flight, return_when=cf.FIRST_COMPLETED)
                for fut in done:
                    item = in_flight.pop(fut)
                    try:
                        res = fut.result()
                    except cf.process.BrokenProcessPool:
                        broken = True
                        if isolate:
                            res = _crashed("the worker process died while analysing this map")
                        else:
                            suspects.append(item)
                            continue
                    except Exception as exc:  # noqa: BLE001 - e.g. an unpicklable result
                        res = _crashed(one_line_reason(exc))
                    yield item, res
            finished = not (queue or in_flight)
        finally:
            if keep is not None and finished and not broken and not isolate and not (pending or suspects):
                keep["pool"] = pool  # healthy and idle: the caller reuses it (drift) and shuts it down
            else:
                pool.shutdown(wait=True, cancel_futures=True)


# --------------------------------------------------------------------------- the batch
def _settings(analyzer: Any) -> dict:
    from .. import __version__

    text = repr(analyzer)
    return {"analyzer": None if " at 0x" in text else text, "stabtool": __version__}


def _item_hash(path: str | os.PathLike[str], file_hashes: dict[str, str]) -> str:
    """Content hash of a map file; of a stacked file's slice, the file's hash and the slice's position."""
    file, isel = split_slice_ref(path)
    if file not in file_hashes:
        file_hashes[file] = content_hash(file)
    key = file_hashes[file]
    if isel:
        key += "-" + "-".join(f"{re.sub(r'[^A-Za-z0-9]+', '', dim)[:12]}{index}" for dim, index in isel.items())
    return key


def _hash_items(paths: Sequence[Path]) -> tuple[list[BatchItem], list[BatchRecord], int, list[str]]:
    """Hash every file; unreadable files become failed records right away."""
    items: list[BatchItem] = []
    unreadable: list[BatchRecord] = []
    seen: dict[str, str] = {}
    notes: list[str] = []
    file_hashes: dict[str, str] = {}  # a stacked file is read once for all its slices
    for order, path in enumerate(paths):
        try:
            key = _item_hash(path, file_hashes)
        except InputError as exc:
            import hashlib

            key = "unreadable-" + hashlib.sha256(os.fsencode(str(path))).hexdigest()[:12]
            unreadable.append(BatchRecord(file=str(path), hash=key, status="failed",
                                          reason=exc.fault, order=order))
            continue
        if key in seen:
            notes.append(f"{path}: same content as {seen[key]}; analysed once")
            continue
        seen[key] = str(path)
        items.append(BatchItem(path=str(path), hash=key, order=order))
    return items, unreadable, len(paths) - len(items) - len(unreadable), notes


def run_batch(
    inputs: Sequence[str | os.PathLike[str]],
    analyzer: Callable[[str], Any] | Any,
    out_dir: str | os.PathLike[str],
    *,
    workers: int | None = None,
    scheduler: str | Any | None = None,
    resume: bool = False,
    retry_failed: bool = False,
    progress: bool = True,
    plots: bool = True,
    summary: bool = True,
    drift: bool = True,
    netcdf: bool = True,
    table_interval_s: float = 5.0,
    load_options: Mapping[str, Any] | None = None,
    time_limit_s: float | None = DEFAULT_TIME_LIMIT_S,
) -> BatchReport:
    """Analyse every map in ``inputs``; write the table, plots and summary to ``out_dir``.

    Parameters
    ----------
    inputs : sequence of str or path
        Files, folders or glob patterns (:func:`~stabtool.batch.inputs.discover_inputs`).
    analyzer : picklable pipeline
        Object with ``analyze_file(path)`` or a callable ``path -> result``;
        results provide ``to_json()`` and ``save_plot(path)``.
    out_dir : path
        Output folder; created if missing.
    workers : int, optional
        Local worker processes (default: the CPUs available). ``1`` runs in
        this process, without a pool. Workers are forked from a warm fork
        server (``spawn`` where there is none), which loads the main module
        as ``spawn`` does, so a script that calls this with ``workers > 1``
        needs the usual ``if __name__ == "__main__":`` guard.
    scheduler : str or dask.distributed.Client, optional
        Run on an existing dask.distributed cluster instead (its address, or
        a connected client). The workers must be able to read the input
        files; only this process writes to ``out_dir``.
    resume : bool
        Finish a batch in ``out_dir`` that was interrupted: maps already
        recorded (by content hash) are not analysed again.
    retry_failed : bool
        With ``resume``, analyse the maps that failed before once more.
    progress : bool
        Show a progress bar on stderr.
    plots, summary, drift, netcdf : bool
        Write the per-map plots, ``summary.html``, the drift analysis of
        repeated sweeps, and ``results.nc``.
    table_interval_s : float
        Rebuild ``results.csv`` at most this often while running, s (the
        records are written immediately whatever this is); less often when
        a rebuild takes more than 1/20 of it.
    load_options : mapping, optional
        ``var``, ``x``, ``y`` of :func:`stabtool.io.load` for every file (the
        measured quantity and the gates when a file holds several).
    time_limit_s : float or None
        A map whose analysis runs longer than this (s) is given up as failed
        with that reason, and the batch goes on (default
        :data:`~stabtool.batch.worker.DEFAULT_TIME_LIMIT_S`; None or 0: no
        limit). Applied in the local worker processes and with ``workers=1``
        when called from the main thread; not on a dask cluster, whose tasks
        run in worker threads. ``resume`` with ``retry_failed`` and a larger
        limit analyses such maps again.

    Returns
    -------
    BatchReport

    Raises
    ------
    InputError
        Bad inputs, or an ``out_dir`` holding another batch without
        ``resume``, or one started with different analysis settings.
    """
    t0 = time.perf_counter()
    if workers is not None and int(workers) < 1:
        raise InputError("--workers", f"must be at least 1, got {workers}")
    if time_limit_s is not None and not (time_limit_s >= 0 and math.isfinite(time_limit_s)):
        raise InputError("--time-limit", f"must be a number of seconds ≥ 0 (0: no limit), got {time_limit_s}")
    out = check_output_folder(out_dir, inputs)
    options = {k: v for k, v in (load_options or {}).items() if v is not None}
    paths = discover_inputs(inputs, exclude=[out], load_options=options)
    if options:
        analyzer = FileAnalyzer(analyzer, options)
    store = ResultStore(out)
    settings = _settings(analyzer)
    if store.has_records():
        if not resume:
            raise InputError(
                out,
                "already holds the results of a batch; add --resume to finish it, "
                "or choose another --out folder",
            )
        old = store.read_settings() or {}
        if old.get("analyzer") and settings["analyzer"] and old["analyzer"] != settings["analyzer"]:
            raise InputError(
                out,
                f"was started with other analysis settings ({old['analyzer']}); "
                f"resume with the same options or choose another --out folder",
            )
    store.create()
    store.write_settings(settings)

    items, unreadable, n_dup, notes = _hash_items(paths)
    records = store.load()
    for rec in unreadable:
        if rec.hash not in records:
            store.write(rec)
            records[rec.hash] = rec
    todo = [
        it for it in items
        if it.hash not in records or (retry_failed and records[it.hash].status == "failed")
    ]
    n_resumed = len(items) - len(todo)

    kept: dict[str, Any] = {}  # the local process pool, kept for the drift registrations
    if scheduler is not None:
        from .cluster import run_on_dask

        stream = run_on_dask(scheduler, analyzer, todo, plot=plots)
        workers_used: int | str = scheduler if isinstance(scheduler, str) else repr(scheduler)
    else:
        n = default_workers() if workers is None else int(workers)
        n = min(n, max(1, len(todo)))
        stream = (_run_serial(analyzer, todo, plots, drift, time_limit_s) if n == 1
                  else _run_pool(analyzer, todo, plots, n, kept, drift, time_limit_s))
        workers_used = n

    features: dict[str, Any] = {}  # path -> PreparedSweep (drift feature images saved by this run)
    bar = _progress_bar(len(todo), enabled=progress)
    counts = {"ok": 0, "doubtful": 0, "failed": 0}
    last_table = time.monotonic()
    interval = table_interval_s
    n_run = 0
    try:
        for item, res in stream:
            feat = res.pop("drift_feature", None)
            if feat is not None:  # kept on disk until the drift has run (the parent writes, as for plots)
                try:
                    features[item.path] = store.write_feature(item.hash, item.path, feat)
                except OSError:
                    pass
            plot_rel = None
            if res.get("png"):
                try:
                    plot_rel = store.write_plot(item.plot_name, res["png"])
                except OSError as exc:
                    res["reason"] = f"plot not written: {exc}"
            rec = BatchRecord(
                file=item.path, hash=item.hash, status=res["status"], reason=res.get("reason"),
                order=item.order, time=res.get("time"), plot=plot_rel,
                elapsed_s=float(res.get("elapsed_s") or math.nan), result=res.get("result"),
                info=res.get("info"),
            )
            # the durable point: after this the map is never redone (the workers send plain JSON)
            store.write(rec, plain_result=True)
            records[rec.hash] = rec
            n_run += 1
            counts[rec.status] += 1
            if bar is not None:
                bar.set_postfix_str(
                    f"ok {counts['ok']}, doubtful {counts['doubtful']}, failed {counts['failed']}",
                    refresh=False,
                )
                bar.update(1)
            if time.monotonic() - last_table > interval:
                t_tab = time.process_time()
                store.write_tables(records.values(), netcdf=False)
                last_table = time.monotonic()
                # the rebuild grows with the records: at most ~5 % of this process's time on it
                interval = max(table_interval_s, 20.0 * (time.process_time() - t_tab))
    finally:
        if bar is not None:
            bar.close()

    pool = kept.pop("pool", None)
    try:
        store.write_tables(records.values(), netcdf=netcdf)
        ordered = tuple(sorted(records.values(), key=lambda r: (r.order, r.file)))
        drift_result = None
        if drift:
            from .summary import drift_for_batch

            drift_result = drift_for_batch(ordered, out, executor=pool, prepared=features, load_options=options)
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
        store.clear_features()
    if summary:
        from .summary import write_summary

        write_summary(out, ordered, drift=drift_result, notes=notes)
    return BatchReport(
        out_dir=out, records=ordered, n_run=n_run, n_resumed=n_resumed, n_duplicates=n_dup,
        elapsed_s=time.perf_counter() - t0, workers=workers_used, drift=drift_result,
        notes=tuple(notes),
    )


def _progress_bar(total: int, *, enabled: bool):
    if not enabled or total == 0:
        return None
    from tqdm.auto import tqdm

    return tqdm(total=total, desc="stabtool batch", unit="map", file=sys.stderr,
                dynamic_ncols=True, smoothing=0.1)
