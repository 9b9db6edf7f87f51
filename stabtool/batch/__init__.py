"""Overnight batches: many maps into one table, plots and a summary; drift across sweeps.

* :func:`run_batch` — analyse files/folders/globs with one pipeline object,
  locally or on a dask cluster, resumable after any interruption;
* :class:`ResultStore` — the atomic, content-hash keyed records behind it;
* :func:`measure_drift` — pattern offset, jumps and slow drift of repeated sweeps;
* :func:`make_overnight_sample` — an invented overnight run for demos and tests.
"""

from .drift import DriftJump, DriftResult, Registration, measure_drift, order_sweeps, register_maps
from .inputs import SUPPORTED_SUFFIXES, discover_inputs
from .sample import OvernightSample, make_overnight_sample
from .runner import BatchItem, BatchReport, default_workers, run_batch
from .store import BatchRecord, ResultStore, content_hash, flatten_result
from .summary import write_summary

__all__ = [
    "run_batch",
    "BatchReport",
    "BatchItem",
    "BatchRecord",
    "ResultStore",
    "content_hash",
    "flatten_result",
    "discover_inputs",
    "SUPPORTED_SUFFIXES",
    "default_workers",
    "write_summary",
    "measure_drift",
    "register_maps",
    "order_sweeps",
    "DriftResult",
    "DriftJump",
    "Registration",
    "make_overnight_sample",
    "OvernightSample",
]
