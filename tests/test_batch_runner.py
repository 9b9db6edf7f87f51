"""The batch runner: isolation of bad files, resume after a kill, workers and dask.

These tests drive the runner with a stand-in pipeline (tests/_batch.py) so
they check the machinery itself; the end-to-end tests with the real analysis
are in test_batch_cli.py.
"""

from __future__ import annotations

import csv
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from stabtool.batch import run_batch
from stabtool.errors import InputError

sys.path.insert(0, str(Path(__file__).parent))
from _batch import StandInAnalyzer, write_plain_maps

TESTS = Path(__file__).parent


def _rows(out: Path) -> list[dict]:
    with open(out / "results.csv", newline="") as fh:
        return list(csv.DictReader(fh))


@pytest.fixture()
def night(tmp_path):
    """Six readable maps in four formats, one corrupt file, one truncated NetCDF."""
    folder = tmp_path / "night"
    paths = write_plain_maps(folder, 6)
    (folder / "corrupt.csv").write_text("PA (mV),PB (mV),I (nA)\n0,0,1\n1,abc,2\n")
    nc = paths[0].read_bytes()
    (folder / "truncated.nc").write_bytes(nc[: len(nc) // 3])
    return folder


def test_bad_files_become_failed_rows_and_the_batch_goes_on(night, tmp_path):
    out = tmp_path / "out"
    report = run_batch([night], StandInAnalyzer(), out, workers=1, progress=False)
    rows = {Path(r["file"]).name: r for r in _rows(out)}
    assert len(rows) == 8
    assert rows["corrupt.csv"]["status"] == "failed"
    assert "abc" in rows["corrupt.csv"]["reason"]  # the loader's one-line fault
    assert rows["truncated.nc"]["status"] == "failed"
    assert all("\n" not in r["reason"] for r in rows.values())
    good = [r for n, r in rows.items() if n.startswith("map")]
    assert all(r["status"] == "ok" and r["plot"].startswith("plots/") for r in good)
    assert all((out / r["plot"]).stat().st_size > 0 for r in good)
    assert report.n_failed == 2 and report.n_ok == 6 and report.exit_code == 1
    assert (out / "summary.html").is_file() and (out / "results.nc").is_file()


def test_numbers_in_the_table_are_those_of_the_pipeline(night, tmp_path):
    from stabtool.io import load

    out = tmp_path / "out"
    run_batch([night / "map001.csv", night / "map002.npz"], StandInAnalyzer(), out,
              workers=1, progress=False)
    for row in _rows(out):
        expected = float(np.nanmean(load(row["file"]).values))  # reference: numpy on the loaded map
        assert float(row["signal_mean"]) == pytest.approx(expected, rel=1e-12)
        assert float(row["virtual_gate_matrix.0.1"]) == 0.5
        assert row["x_gate"] == "PA" and row["y_gate"] == "PB"


def test_all_good_files_give_exit_code_zero_and_doubtful_is_not_failed(tmp_path):
    from stabtool.io import load, save_map

    paths = write_plain_maps(tmp_path / "in", 2)
    da = load(paths[0])
    da.values[:10, :] = np.nan  # an interrupted sweep: the stand-in calls it doubtful
    save_map(da, tmp_path / "in" / "interrupted.nc")
    report = run_batch([tmp_path / "in"], StandInAnalyzer(), tmp_path / "out", workers=1,
                       progress=False)
    statuses = {Path(r.file).name: r.status for r in report.records}
    assert statuses["interrupted.nc"] == "doubtful"
    assert report.exit_code == 0


def test_a_finished_folder_is_not_overwritten_without_resume(night, tmp_path):
    out = tmp_path / "out"
    run_batch([night / "map000.nc"], StandInAnalyzer(), out, workers=1, progress=False)
    with pytest.raises(InputError, match="--resume"):
        run_batch([night], StandInAnalyzer(), out, workers=1, progress=False)


def test_resume_with_other_analysis_settings_is_refused(night, tmp_path):
    out = tmp_path / "out"
    run_batch([night / "map000.nc"], StandInAnalyzer(), out, workers=1, progress=False)
    with pytest.raises(InputError, match="other analysis settings"):
        run_batch([night], StandInAnalyzer(delay_s=0.01), out, workers=1, progress=False,
                  resume=True)


def test_resume_analyses_only_what_is_missing_and_duplicates_run_once(night, tmp_path):
    out = tmp_path / "out"
    first = run_batch([night / "map000.nc", night / "map001.csv"], StandInAnalyzer(), out,
                      workers=1, progress=False)
    assert first.n_run == 2
    (night / "copy_of_map000.nc").write_bytes((night / "map000.nc").read_bytes())
    again = run_batch([night], StandInAnalyzer(), out, workers=1, progress=False, resume=True)
    assert again.n_resumed == 2 and again.n_run == 6 and again.n_duplicates == 1
    rows = _rows(out)
    assert len(rows) == 8 and len({r["hash"] for r in rows}) == 8
    assert any("same content" in n for n in again.notes)


def test_retry_failed_reruns_only_failed_maps(night, tmp_path):
    out = tmp_path / "out"
    run_batch([night], StandInAnalyzer(), out, workers=1, progress=False)
    (night / "corrupt.csv").unlink()  # gone: still failed, with a new reason
    again = run_batch([night], StandInAnalyzer(), out, workers=1, progress=False, resume=True,
                      retry_failed=True)
    assert again.n_run == 1  # truncated.nc only; the corrupt file is no longer an input


@pytest.mark.parametrize("workers", [1, 2])
def test_a_map_past_the_time_limit_is_given_up_and_the_batch_goes_on(night, tmp_path, workers):
    # the stand-in runs two minutes on map002 and swallows every Exception on the way: only a
    # limit that raises something an `except Exception` cannot catch stops it
    out = tmp_path / "out"
    t0 = time.monotonic()
    report = run_batch([night], StandInAnalyzer(hang_on="map002"), out, workers=workers,
                       progress=False, time_limit_s=0.5)
    rows = {Path(r["file"]).name: r for r in _rows(out)}
    hung = rows["map002.npz"]
    assert hung["status"] == "failed" and "time limit of 0.5 s" in hung["reason"]
    assert all(r["status"] == "ok" for n, r in rows.items() if n.startswith("map") and n != "map002.npz")
    assert report.n_ok == 5 and report.exit_code == 1
    assert time.monotonic() - t0 < 60  # far less than the two minutes the map would have taken


def test_a_negative_time_limit_is_refused(night, tmp_path):
    with pytest.raises(InputError, match="--time-limit"):
        run_batch([night], StandInAnalyzer(), tmp_path / "out", workers=1, progress=False, time_limit_s=-1)
    assert not (tmp_path / "out").exists()


@pytest.mark.slow
def test_local_process_pool_gives_the_same_table_and_survives_a_dying_worker(night, tmp_path):
    serial = run_batch([night], StandInAnalyzer(), tmp_path / "serial", workers=1, progress=False)
    pooled = run_batch([night], StandInAnalyzer(crash_on="map003"), tmp_path / "pool", workers=2,
                       progress=False)
    a = {r.hash: r for r in serial.records}
    b = {r.hash: r for r in pooled.records}
    assert set(a) == set(b)
    for key, rec in b.items():
        if Path(rec.file).name.startswith("map003"):
            assert rec.status == "failed" and "worker process died" in rec.reason
        else:
            assert (rec.status, rec.result) == (a[key].status, a[key].result)


def test_dask_local_cluster_gives_the_same_table_as_the_local_run(night, tmp_path):
    distributed = pytest.importorskip("distributed")
    local = run_batch([night], StandInAnalyzer(), tmp_path / "local", workers=1, progress=False)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False,
                                  dashboard_address=None) as cluster:
        remote = run_batch([night], StandInAnalyzer(), tmp_path / "dask",
                           scheduler=cluster.scheduler_address, progress=False)
    assert [(r.file, r.hash, r.status, r.reason, r.result) for r in remote.records] == [
        (r.file, r.hash, r.status, r.reason, r.result) for r in local.records
    ]
    assert all((tmp_path / "dask" / r.plot).is_file() for r in remote.records if r.status != "failed")


_KILL_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
from _batch import StandInAnalyzer
from stabtool.batch import run_batch
run_batch([{src!r}], StandInAnalyzer(delay_s=0.2), {out!r}, workers=1, progress=False,
          table_interval_s=0.0)
"""


def _finished(records: Path) -> list[Path]:
    """Record files of finished maps (not the settings, not a temporary being written)."""
    return [p for p in records.glob("*.json") if p.name != "batch.json" and not p.name.startswith(".")]


def test_sigkill_mid_batch_then_resume_finishes_without_loss_or_duplicates(tmp_path):
    src = tmp_path / "in"
    paths = write_plain_maps(src, 10)
    out = tmp_path / "out"
    script = _KILL_SCRIPT.format(tests=str(TESTS), src=str(src), out=str(out))
    proc = subprocess.Popen([sys.executable, "-c", script], start_new_session=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    records = out / ".records"
    deadline = time.monotonic() + 120
    try:
        while time.monotonic() < deadline:
            done = _finished(records) if records.is_dir() else []
            if len(done) >= 4 or proc.poll() is not None:
                break
            time.sleep(0.02)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)  # the whole run, as a power cut would
        proc.wait(timeout=30)
    assert proc.returncode == -signal.SIGKILL, proc.stderr.read().decode()[-2000:]
    before = {p.name: p.read_bytes() for p in _finished(records)}
    assert 4 <= len(before) < len(paths), "the kill must land mid-batch"

    report = run_batch([src], StandInAnalyzer(delay_s=0.2), out, workers=1, progress=False,
                       resume=True)
    assert report.n_resumed == len(before)
    assert report.n_run == len(paths) - len(before)
    after = {p.name: p.read_bytes() for p in _finished(records)}
    assert all(after[name] == data for name, data in before.items())  # finished maps untouched
    rows = _rows(out)
    assert sorted(Path(r["file"]).name for r in rows) == sorted(p.name for p in paths)
    assert len({r["hash"] for r in rows}) == len(paths)
    assert all(r["status"] == "ok" for r in rows)
    ds = xr.open_dataset(out / "results.nc", engine="h5netcdf")
    assert ds.sizes["map"] == len(paths)
    assert not list(out.rglob(".tmp-*"))
