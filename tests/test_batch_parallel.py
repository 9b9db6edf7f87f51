"""Parallel paths of the batch: drift registered in chunks on a pool gives the serial result.

The reference is the serial computation of the same function (the parallel
path must not change a number); the drift itself is checked against known
offsets in test_drift_series.py.
"""

from __future__ import annotations

import concurrent.futures as cf
import json
import sys
from pathlib import Path

import numpy as np
import pytest

from stabtool.batch import run_batch
from stabtool.batch.drift import measure_drift
from stabtool.io import save_map

sys.path.insert(0, str(Path(__file__).parent))
from _batch import StandInAnalyzer
from test_drift_series import night


def _same_drift(a, b) -> None:
    for name in ("offset_x_V", "offset_y_V", "match", "overlap", "t"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name), err_msg=name)
    assert a.files == b.files and a.times == b.times
    assert a.jumps == b.jumps
    assert a.quality == b.quality
    np.testing.assert_array_equal([a.rate_x_V, a.rate_y_V, a.residual_rms_V], [b.rate_x_V, b.rate_y_V, b.residual_rms_V])


def test_drift_registered_in_chunks_on_an_executor_equals_the_serial_result():
    # 12 sweeps → at least 4 chunks: chunks after the first start with their predecessor
    maps, _truth, _steps = night(n=12)
    serial = measure_drift(maps)
    with cf.ThreadPoolExecutor(max_workers=2) as ex:
        chunked = measure_drift(maps, executor=ex)
    _same_drift(serial, chunked)
    assert len(serial.jumps) == 1  # the night's planted jump is still found (test_drift_series)


@pytest.mark.slow
def test_a_two_worker_batch_registers_its_drift_on_the_worker_pool(tmp_path, monkeypatch):
    from stabtool.batch import drift, summary

    monkeypatch.setattr(summary, "PARALLEL_DRIFT_MIN", 3)  # this short series goes to the pool
    executors = []

    def spy(paths, **kw):
        executors.append(kw.get("executor"))
        return measure_drift(paths, **kw)

    monkeypatch.setattr(drift, "measure_drift", spy)
    maps, _truth, _steps = night(n=6)
    folder = tmp_path / "night"
    folder.mkdir()
    for da in maps:
        save_map(da, folder / da.attrs["source"])
    runs = {}
    for workers in (1, 2):
        out = tmp_path / f"out{workers}"
        run_batch([folder], StandInAnalyzer(), out, workers=workers, progress=False, plots=False)
        runs[workers] = json.loads(next((out / "drift").glob("*.json")).read_text())
    assert runs[1]["sweeps"] == runs[2]["sweeps"]
    assert len(runs[2]["sweeps"]) == 6
    # serial run: no executor; two workers: their (still running) process pool
    assert executors[0] is None and isinstance(executors[1], cf.ProcessPoolExecutor)
