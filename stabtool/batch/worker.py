"""What a worker does with one map: analyse it, render its plot, report back.

Runs in a worker process (local pool or dask worker). It loads its own file,
so the parent never holds the maps; it returns only a small dict (numbers,
the one-line failure reason, and the PNG bytes), so the parent is the only
writer of the output folder and the workers need no access to it.
"""

from __future__ import annotations

import contextlib
import math
import os
import signal
import tempfile
import threading
import time
import warnings
from dataclasses import dataclass
from typing import Any, Callable, Iterator, Mapping

from ..errors import InputError
from ..io.stacks import TIME_KEYS
from .store import _jsonable

__all__ = ["DEFAULT_TIME_LIMIT_S", "FileAnalyzer", "MapTimeLimit", "analyze_one", "one_line_reason", "sweep_time",
           "map_info", "time_limit"]

#: Default wall-clock limit of one map's analysis in a batch, s. Maps of the held-out probe (120–260
#: px a side) take about 0.5–10 s alone (median ≈ 3 s) and up to 70–80 s with other runs sharing the
#: machine; a map still running after ten minutes has met a case the analysis does not bound, and
#: holding the night's queue for it helps nobody.
DEFAULT_TIME_LIMIT_S = 600.0


class MapTimeLimit(BaseException):
    """Raised inside an analysis that ran past its time limit.

    A ``BaseException`` (as ``KeyboardInterrupt``), so that the analysis' own
    ``except Exception`` fallbacks cannot swallow it and carry on.
    """


@contextlib.contextmanager
def time_limit(seconds: float | None) -> Iterator[bool]:
    """Raise :class:`MapTimeLimit` in this thread when the block runs longer than ``seconds``.

    Uses the process' real-time interval timer (``SIGALRM``), so it works only
    in the main thread of a process on a platform that has it (the local
    worker processes and a ``--workers 1`` run); elsewhere (threads of a dask
    worker, Windows) the block runs without a limit. A long call inside a
    compiled library is interrupted when it returns to Python.

    Yields
    ------
    bool
        Whether the limit is armed.
    """
    armed = (seconds is not None and seconds > 0 and hasattr(signal, "SIGALRM")
             and threading.current_thread() is threading.main_thread())
    if not armed:
        yield False
        return

    def _expired(signum: int, frame: Any) -> None:
        raise MapTimeLimit()

    previous = signal.signal(signal.SIGALRM, _expired)
    signal.setitimer(signal.ITIMER_REAL, float(seconds))  # type: ignore[arg-type]
    try:
        yield True
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0.0)
        signal.signal(signal.SIGALRM, previous if previous is not None else signal.SIG_DFL)


@dataclass(frozen=True)
class FileAnalyzer:
    """A pipeline that reads every file with the same load options (``var``, ``x``, ``y``).

    Picklable when the pipeline is; its ``repr`` (kept by a batch to refuse
    a resume with other settings) names the options.
    """

    analyzer: Any
    load_options: Mapping[str, Any]

    def analyze_file(self, path: str) -> Any:
        """``analyzer.analyze_file(path, **load_options)``."""
        run = getattr(self.analyzer, "analyze_file", None)
        if run is None:
            raise TypeError("load options need a pipeline with analyze_file(path, **load_options)")
        return run(path, **self.load_options)

    def __repr__(self) -> str:
        return f"{self.analyzer!r} reading {dict(self.load_options)!r}"



def one_line_reason(exc: BaseException) -> str:
    """A one-line description of why a map failed."""
    if isinstance(exc, InputError):
        return exc.fault
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def sweep_time(result: Any, payload: Mapping[str, Any]) -> str | None:
    """Start time of the sweep, when the result or its map attributes say it."""
    sources: list[Mapping[str, Any]] = [payload]
    for attr in ("attrs", "map_attrs", "metadata"):
        value = getattr(result, attr, None)
        if isinstance(value, Mapping):
            sources.append(value)
    data = _result_map(result)
    if data is not None:
        sources.append(data.attrs)
    for src in sources:
        for key in TIME_KEYS:
            value = src.get(key)
            if value not in (None, ""):
                return str(value)
    return None


def _result_map(result: Any) -> Any:
    """The analysed map held by a result (``.data`` or ``.map``), or None."""
    for attr in ("data", "map"):
        value = getattr(result, attr, None)
        if value is not None and hasattr(value, "dims") and isinstance(getattr(value, "attrs", None), Mapping):
            return value
    return None


def map_info(result: Any) -> dict[str, Any] | None:
    """Device, gates, voltage window and shape of the analysed map (for grouping sweeps)."""
    da = _result_map(result)
    if da is None or getattr(da, "ndim", 0) != 2:
        return None
    try:
        import numpy as np

        y, x = (np.asarray(da[d].values, dtype=float) for d in da.dims)
        return {
            "device": str(da.attrs.get("device", "")),
            "x_gate": str(da.dims[1]),
            "y_gate": str(da.dims[0]),
            "window_V": [float(x.min()), float(x.max()), float(y.min()), float(y.max())],
            "shape": [int(da.shape[0]), int(da.shape[1])],
        }
    except Exception:  # noqa: BLE001 - the info is optional
        return None


def _status(payload: Mapping[str, Any]) -> str:
    quality = payload.get("quality")
    if isinstance(quality, Mapping) and quality.get("ok") is True:
        return "ok"
    return "doubtful"


def _drift_feature(result: Any) -> Any:
    """The drift feature image of the analysed map, or None (no 2-D map, or it cannot be made)."""
    da = _result_map(result)
    if da is None or getattr(da, "ndim", 0) != 2:
        return None
    try:
        from .drift import feature_of

        return feature_of(da)
    except Exception:  # noqa: BLE001 - the drift then loads the file itself
        return None


def _render_plot(result: Any) -> bytes:
    from ..analysis import AnalysisResult

    if type(result) is AnalysisResult:  # straight to bytes (no temporary file)
        from ..report.plot import render_png

        return render_png(result)
    fd, tmp = tempfile.mkstemp(prefix="stabtool-plot-", suffix=".png")
    os.close(fd)
    try:
        result.save_plot(tmp)
        with open(tmp, "rb") as fh:
            return fh.read()
    finally:
        try:
            os.unlink(tmp)
        except OSError:
            pass


def analyze_one(
    analyzer: Callable[[str], Any] | Any, path: str, *, plot: bool = True, drift_feature: bool = False,
    time_limit_s: float | None = None,
) -> dict[str, Any]:
    """Analyse one file; never raise for a bad map.

    Parameters
    ----------
    analyzer : object with ``analyze_file(path)``, or a callable ``path -> result``
        The configured pipeline. Its result must provide ``to_json()`` (the
        JSON of ``stabtool analyze --json``) and ``save_plot(path)``.
    path : str
        Map file.
    plot : bool
        Render the annotated plot.
    drift_feature : bool
        Also compute the map's drift feature image
        (:func:`stabtool.batch.drift.feature_of`) while the map is in memory,
        so the drift analysis need not load the file again.
    time_limit_s : float, optional
        Give the map up as failed when its analysis runs longer than this,
        s (:func:`time_limit`; not applied outside a process' main thread).
        None or 0: no limit.

    Returns
    -------
    dict
        ``status`` ("ok", "doubtful", "failed"), ``reason`` (one line or
        None), ``result`` (plain-JSON dict or None), ``time`` (str or None),
        ``elapsed_s`` (float), ``png`` (bytes or None), ``info`` and, with
        ``drift_feature``, ``drift_feature`` (SweepFeature or None).
    """
    t0 = time.perf_counter()
    out: dict[str, Any] = {
        "status": "failed",
        "reason": None,
        "result": None,
        "time": None,
        "elapsed_s": math.nan,
        "png": None,
        "info": None,
    }
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # verdicts travel in quality.warnings, not on stderr
        try:
            run = getattr(analyzer, "analyze_file", None) or analyzer
            with time_limit(time_limit_s):
                result = run(path)
            payload = _jsonable(dict(result.to_json()))
        except MapTimeLimit:
            out["reason"] = (f"analysis stopped after the time limit of {time_limit_s:g} s "
                             "(--time-limit); the map is left unanalysed")
            out["elapsed_s"] = time.perf_counter() - t0
            return out
        except Exception as exc:  # noqa: BLE001 - a bad map is a failed row, never a crash
            out["reason"] = one_line_reason(exc)
            out["elapsed_s"] = time.perf_counter() - t0
            return out
        out["result"] = payload
        out["status"] = _status(payload)
        if not isinstance(payload.get("quality"), Mapping):
            out["reason"] = "the analysis gave no quality verdict"
        out["time"] = sweep_time(result, payload)
        out["info"] = map_info(result)
        if drift_feature:
            out["drift_feature"] = _drift_feature(result)
        if plot:
            try:
                out["png"] = _render_plot(result)
            except Exception as exc:  # noqa: BLE001 - a plot failure keeps the numbers
                out["reason"] = f"plot not written: {one_line_reason(exc)}"
    out["elapsed_s"] = time.perf_counter() - t0
    return out
