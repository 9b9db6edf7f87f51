"""Run the benchmark: generate each map, analyse it, compare with the truth, time it.

Each case runs in a worker process (a pool of ``workers``, default 2): the
map is generated there from its :class:`~stabtool.bench.grid.BenchCase`, the
analysis gets the true electron temperature as its energy reference, and the
outcome (errors, verdict, timings) comes back as a small picklable record.

Speed reference
---------------
On every map the bare scikit-image edge + line step is timed as well:
``skimage.feature.canny`` (σ = 1.5 px, default thresholds, on the map scaled
to [0, 1]) followed by ``skimage.transform.hough_line`` (0.5° angle bins) and
``hough_line_peaks`` (up to 400 peaks) — the edge smoothing and angle
resolution of the line detector's defaults, as in ``scripts/bench_lines.py``. The pipeline time divided by this time is the speed
ratio the reports quote; both are measured in the same process on the same
map, so the ratio is far less sensitive to a busy machine than either time.
The ratio uses CPU times of the worker process (``time.process_time``), which
other processes on shared cores barely change; the wall-time ratio is kept
as well.

References
----------
J. Canny, "A computational approach to edge detection", IEEE Trans. Pattern
Anal. Mach. Intell. 8, 679 (1986), doi:10.1109/TPAMI.1986.4767851.
R. O. Duda and P. E. Hart, "Use of the Hough transformation to detect lines
and curves in pictures", Commun. ACM 15, 11 (1972), doi:10.1145/361237.361242.
"""

from __future__ import annotations

import json
import math
import multiprocessing
import os
import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import numpy as np
import xarray as xr

from ..errors import InputError
from .compare import Comparison, compare_with_truth
from .grid import BenchCase
from .pulls import pulls_of
from .stats import SilentVerdict, silent_failure

__all__ = [
    "BenchRun",
    "CaseOutcome",
    "canny_hough_seconds",
    "default_analyzer_factory",
    "run_bench",
    "run_case",
]

#: Gaussian σ (pixels) of the reference Canny step (the line detector's default).
REFERENCE_SIGMA_PX = 1.5
#: Angle bin (degrees) of the reference Hough step (the line detector's default).
REFERENCE_ANGLE_STEP_DEG = 0.5

AnalyzerFactory = Callable[[BenchCase, Any], Callable[[xr.DataArray], Any]]
MapFactory = Callable[[BenchCase], Any]


@dataclass(frozen=True)
class CaseOutcome:
    """What one benchmark map gave.

    Attributes
    ----------
    case : BenchCase
    ran : bool
        The analysis returned a result (no exception).
    ok : bool
        Its quality verdict (False when it did not run).
    message : str
        Why it did not run (exception type and text), else ``""``.
    warnings : tuple of str
        The result's quality warnings.
    comparison : Comparison
        Errors against the truth.
    silent : SilentVerdict
        The silent-failure rule applied to this map.
    timings : dict
        Seconds: ``simulate``, ``pipeline`` (the whole analysis call),
        ``canny_hough`` (the bare reference step, best of 3) as wall times;
        ``pipeline_cpu`` and ``canny_hough_cpu`` the same as CPU times of
        the worker; ``stage:<name>`` for every stage time the analysis
        reported.
    cpu_seconds : float
        CPU time of the whole case in its worker (generation included).
    info : dict
        Facts about the map (temperature, thermal line width in pixels, ...).
    pulls : dict
        ``{group: {element: (estimate − truth)/stated σ}}``
        (:func:`stabtool.bench.pulls.pulls_of`; NaN where not reported).
    """

    case: BenchCase
    ran: bool
    ok: bool
    message: str
    warnings: tuple[str, ...]
    comparison: Comparison
    silent: SilentVerdict
    timings: dict[str, float] = field(default_factory=dict)
    cpu_seconds: float = math.nan
    info: dict[str, Any] = field(default_factory=dict)
    pulls: dict[str, dict[str, float]] = field(default_factory=dict)

    @property
    def speed_ratio(self) -> float:
        """Pipeline CPU time / bare Canny + Hough CPU time on the same map.

        CPU times of the worker process, so other load on shared cores
        hardly changes the ratio; see :attr:`speed_ratio_wall` for wall time.
        """
        p, r = self.timings.get("pipeline_cpu", math.nan), self.timings.get("canny_hough_cpu", math.nan)
        return p / r if r > 0 else math.nan

    @property
    def speed_ratio_wall(self) -> float:
        """Pipeline wall time / bare Canny + Hough wall time on the same map."""
        p, r = self.timings.get("pipeline", math.nan), self.timings.get("canny_hough", math.nan)
        return p / r if r > 0 else math.nan


@dataclass(frozen=True)
class BenchRun:
    """All outcomes of one benchmark run, plus how long it took.

    Attributes
    ----------
    outcomes : tuple of CaseOutcome
        In case order.
    wall_seconds : float
        Wall time of the whole run (pool start-up included).
    workers : int
        Worker processes used.
    started_utc : str
        ISO-8601 start time.
    """

    outcomes: tuple[CaseOutcome, ...]
    wall_seconds: float
    workers: int
    started_utc: str

    @property
    def cpu_seconds(self) -> float:
        """Sum of the per-case CPU times."""
        return float(sum(o.cpu_seconds for o in self.outcomes if math.isfinite(o.cpu_seconds)))


def _scaled(data: np.ndarray) -> np.ndarray:
    img = np.asarray(data, dtype=float)
    finite = np.isfinite(img)
    if not finite.all():
        img = np.where(finite, img, np.nanmedian(img) if finite.any() else 0.0)
    lo, hi = float(img.min()), float(img.max())
    return (img - lo) / (hi - lo) if hi > lo else np.zeros_like(img)


def canny_hough_seconds(data: np.ndarray, *, repeats: int = 3, clock: str = "wall") -> float:
    """Time of the bare scikit-image Canny + Hough step on ``data`` (best of ``repeats``), s.

    Parameters
    ----------
    data : ndarray, shape (ny, nx)
        The map's values (NaN replaced by the median before the step).
    repeats : int
        Runs; the fastest is returned (the least disturbed by other load).
    clock : {"wall", "cpu"}
        Wall-clock time (``time.perf_counter``) or CPU time of this process
        (``time.process_time``, insensitive to other processes sharing the cores).

    Notes
    -----
    ``canny(image, sigma=1.5)`` on the map scaled to [0, 1], then
    ``hough_line(edges)`` over 360 angles (0.5° bins) and
    ``hough_line_peaks(..., num_peaks=400)`` (Canny 1986; Duda & Hart 1972).
    """
    if clock not in ("wall", "cpu"):
        raise InputError("clock", f"must be 'wall' or 'cpu', got {clock!r}")
    wall, cpu = _canny_hough_times(data, repeats=repeats)
    return wall if clock == "wall" else cpu


def _canny_hough_times(data: np.ndarray, *, repeats: int = 3) -> tuple[float, float]:
    """Best wall and best CPU time of the bare Canny + Hough step, s."""
    from skimage.feature import canny
    from skimage.transform import hough_line, hough_line_peaks

    img = _scaled(data)
    theta = np.deg2rad(np.arange(-90.0, 90.0, REFERENCE_ANGLE_STEP_DEG))
    best_wall = best_cpu = math.inf
    for _ in range(max(1, int(repeats))):
        c0, t0 = time.process_time(), time.perf_counter()
        edges = canny(img, sigma=REFERENCE_SIGMA_PX)
        hspace, angles, dists = hough_line(edges, theta=theta)
        hough_line_peaks(hspace, angles, dists, num_peaks=400)
        best_wall = min(best_wall, time.perf_counter() - t0)
        best_cpu = min(best_cpu, time.process_time() - c0)
    return best_wall, best_cpu


def default_analyzer_factory(case: BenchCase, synthetic: Any) -> Callable[[xr.DataArray], Any]:
    """The full analysis, given the map's true electron temperature as energy reference."""
    from ..analysis import Analyzer

    return Analyzer(electron_temperature_K=float(synthetic.truth.temperature_K))


def _default_map_factory(case: BenchCase) -> Any:
    from .maps import make_case_map

    return make_case_map(case)


def _result_json(result: Any) -> dict:
    out = result.to_json() if hasattr(result, "to_json") else result
    if isinstance(out, (str, bytes)):
        out = json.loads(out)
    if not isinstance(out, Mapping):
        raise TypeError(f"analysis result JSON is a {type(out).__name__}, not an object")
    return dict(out)


def _result_ok(result: Any, js: Mapping[str, Any]) -> tuple[bool, tuple[str, ...]]:
    quality = getattr(result, "quality", None)
    if quality is not None and hasattr(quality, "ok"):
        return bool(quality.ok), tuple(str(w) for w in getattr(quality, "warnings", ()))
    q = js.get("quality") or {}
    return bool(q.get("ok", False)), tuple(str(w) for w in q.get("warnings", []) or [])


def _stage_times(result: Any, js: Mapping[str, Any]) -> dict[str, float]:
    raw = js.get("timings_s", js.get("timings"))
    if raw is None:
        raw = getattr(result, "timings_s", getattr(result, "timings", None))
    if hasattr(raw, "to_dict"):
        raw = raw.to_dict()
    out: dict[str, float] = {}

    def walk(prefix: str, obj: Any) -> None:
        if isinstance(obj, Mapping):
            for k, v in obj.items():
                walk(f"{prefix}{k}" if not prefix else f"{prefix}.{k}", v)
        elif isinstance(obj, (int, float)) and not isinstance(obj, bool) and math.isfinite(obj):
            out[f"stage:{prefix}"] = float(obj)

    if isinstance(raw, Mapping):
        walk("", raw)
    return out


def _truth_json(synthetic: Any) -> dict:
    truth = synthetic.truth
    js = truth.to_json() if hasattr(truth, "to_json") else truth
    if isinstance(js, (str, bytes)):
        js = json.loads(js)
    return dict(js)


def run_case(
    case: BenchCase,
    *,
    analyzer_factory: AnalyzerFactory | None = None,
    map_factory: MapFactory | None = None,
) -> CaseOutcome:
    """Generate, analyse, compare and time one case.

    Parameters
    ----------
    case : BenchCase
    analyzer_factory : callable ``(case, synthetic) -> analyze``, optional
        Builds the analysis callable for this map (it may read the true
        temperature from ``synthetic.truth`` as the energy reference, never
        the answers). ``analyze(data)`` returns an object with ``to_json()``
        and ``quality.ok``. Default :func:`default_analyzer_factory`.
    map_factory : callable ``(case) -> synthetic``, optional
        Makes the synthetic map (``.data`` DataArray, ``.truth`` with
        ``to_json()`` and ``temperature_K``); default
        :func:`stabtool.bench.maps.make_case_map`.

    Returns
    -------
    CaseOutcome
        Never raises for a failing analysis: the failure is recorded.
    """
    make = map_factory or _default_map_factory
    build = analyzer_factory or default_analyzer_factory
    cpu0 = time.process_time()
    t0 = time.perf_counter()
    synthetic = make(case)
    t_sim = time.perf_counter() - t0
    truth = _truth_json(synthetic)
    info = dict(getattr(synthetic, "bench_info", {}) or {})
    timings: dict[str, float] = {"simulate": t_sim}
    result_js: dict | None = None
    ok = False
    qwarn: tuple[str, ...] = ()
    message = ""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            analyze = build(case, synthetic)
            c1, t1 = time.process_time(), time.perf_counter()
            result = analyze(synthetic.data)
            timings["pipeline"] = time.perf_counter() - t1
            timings["pipeline_cpu"] = time.process_time() - c1
            result_js = _result_json(result)
            ok, qwarn = _result_ok(result, result_js)
            timings.update(_stage_times(result, result_js))
        except Exception as exc:  # noqa: BLE001 - a crash is an outcome of the benchmark
            message = f"{type(exc).__name__}: {' '.join(str(exc).split())}"[:300]
            result_js = None
            ok = False
        timings["canny_hough"], timings["canny_hough_cpu"] = _canny_hough_times(
            np.asarray(synthetic.data.values))
    comparison = compare_with_truth(result_js, truth)
    pulls = pulls_of(result_js, truth)
    verdict = silent_failure(comparison, ok=ok, snr=case.snr)
    return CaseOutcome(
        case=case,
        ran=result_js is not None,
        ok=ok,
        message=message,
        warnings=qwarn,
        comparison=comparison,
        silent=verdict,
        timings=timings,
        cpu_seconds=time.process_time() - cpu0,
        info=info,
        pulls=pulls,
    )


def _single_thread_env() -> dict[str, str | None]:
    keys = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
    old = {k: os.environ.get(k) for k in keys}
    for k in keys:
        os.environ[k] = "1"
    return old


def _restore_env(old: Mapping[str, str | None]) -> None:
    for k, v in old.items():
        if v is None:
            os.environ.pop(k, None)
        else:
            os.environ[k] = v


def run_bench(
    cases: Sequence[BenchCase],
    *,
    workers: int = 2,
    analyzer_factory: AnalyzerFactory | None = None,
    map_factory: MapFactory | None = None,
    progress: Callable[[CaseOutcome], None] | None = None,
) -> BenchRun:
    """Run every case, in a pool of ``workers`` processes (1: in this process).

    Parameters
    ----------
    cases : sequence of BenchCase
    workers : int
        Worker processes (default 2, the cores of the reference machine).
        Workers are started with ``spawn`` and one BLAS/OpenMP thread each,
        so two workers use two cores.
    analyzer_factory, map_factory : callable
        See :func:`run_case`; with ``workers > 1`` they must be picklable
        (module-level functions or instances of module-level classes).
    progress : callable, optional
        Called with each outcome as it arrives (in completion order).

    Notes
    -----
    Workers are started with ``spawn`` (fresh interpreters, no inherited
    thread pools), so a script that calls this with ``workers > 1`` needs
    the usual ``if __name__ == "__main__":`` guard (see :mod:`multiprocessing`).

    Returns
    -------
    BenchRun
        Outcomes in case order.
    """
    if int(workers) < 1:
        raise InputError("--workers", f"at least 1 worker is needed, got {workers}")
    started = datetime.now(timezone.utc).isoformat(timespec="seconds")
    t0 = time.perf_counter()
    outcomes: list[CaseOutcome] = []
    if int(workers) == 1 or len(cases) <= 1:
        for case in cases:
            out = run_case(case, analyzer_factory=analyzer_factory, map_factory=map_factory)
            outcomes.append(out)
            if progress:
                progress(out)
        n_workers = 1
    else:
        n_workers = min(int(workers), len(cases))
        old = _single_thread_env()
        try:
            ctx = multiprocessing.get_context("spawn")
            with ProcessPoolExecutor(max_workers=n_workers, mp_context=ctx) as pool:
                futures = [
                    pool.submit(run_case, c, analyzer_factory=analyzer_factory, map_factory=map_factory)
                    for c in cases
                ]
                for fut in as_completed(futures):
                    out = fut.result()
                    outcomes.append(out)
                    if progress:
                        progress(out)
        finally:
            _restore_env(old)
    outcomes.sort(key=lambda o: o.case.index)
    return BenchRun(
        outcomes=tuple(outcomes),
        wall_seconds=time.perf_counter() - t0,
        workers=n_workers,
        started_utc=started,
    )

