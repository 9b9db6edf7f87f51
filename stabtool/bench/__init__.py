"""Regression benchmark: accuracy versus noise, and speed, on synthetic maps.

* :func:`build_grid` — the cases: SNR × device preset × artefact, seeded;
* :func:`make_case_map` — a case's synthetic map and truth (the generator);
* :func:`run_bench` / :func:`run_case` — analyse every map (a process pool),
  compare with the truth (:func:`compare_with_truth`), apply the
  silent-failure rule (:func:`silent_failure`, bounds in
  :data:`FITTER_BOUNDS`), time each stage and the bare Canny + Hough step;
* :func:`pulls_of` / :func:`summarise_pulls` — (estimate − truth)/stated σ
  per element and their rms per group (honest errors: ≈ 1);
* :func:`write_report` / :func:`format_table` — ``bench.json``, PNG plots
  and a compact table.

The command ``stabtool bench`` runs all of it.
"""

from .bounds import BOUNDS_SOURCE, FITTER_BOUNDS, FitterBounds
from .compare import GROUPS, Comparison, GroupError, compare_with_truth
from .grid import ARTEFACTS, PRESETS, SNRS, BenchCase, build_grid
from .maps import BenchMap, make_case_map
from .pulls import PullSummary, pulls_of, stated_errors, summarise_pulls
from .report import format_table, summarise, write_report
from .run import BenchRun, CaseOutcome, canny_hough_seconds, run_bench, run_case
from .stats import ErrorStats, SilentVerdict, error_stats, nan_percentile, silent_failure

__all__ = [
    "ARTEFACTS",
    "BOUNDS_SOURCE",
    "FITTER_BOUNDS",
    "GROUPS",
    "PRESETS",
    "SNRS",
    "BenchCase",
    "BenchMap",
    "BenchRun",
    "CaseOutcome",
    "Comparison",
    "ErrorStats",
    "FitterBounds",
    "GroupError",
    "PullSummary",
    "SilentVerdict",
    "build_grid",
    "canny_hough_seconds",
    "compare_with_truth",
    "error_stats",
    "format_table",
    "make_case_map",
    "nan_percentile",
    "pulls_of",
    "run_bench",
    "run_case",
    "silent_failure",
    "stated_errors",
    "summarise",
    "summarise_pulls",
    "write_report",
]
