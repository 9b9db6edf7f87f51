"""``stabtool batch`` end to end with the real analysis pipeline."""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from stabtool.analysis import Analyzer
from stabtool.batch import make_overnight_sample
from stabtool.cli.main import main
from stabtool.io import save_map
from stabtool.simulate import quick_double_dot


def _rows(out: Path) -> list[dict]:
    with open(out / "results.csv", newline="") as fh:
        return list(csv.DictReader(fh))


@pytest.fixture(scope="module")
def small_night(tmp_path_factory):
    folder = tmp_path_factory.mktemp("night")
    for k, suffix in enumerate([".nc", ".csv"]):
        sm = quick_double_dot(shape=(64, 64), snr=15.0, rng=k)
        sm.data.attrs["time"] = f"2026-11-30T22:{10 * k:02d}:00"
        save_map(sm.data, folder / f"kestrel-7_{k}{suffix}")
    (folder / "kestrel-7_corrupt.nc").write_bytes(b"\x89HDF\r\n\x1a\n" + b"\x00" * 64)
    return folder


def test_batch_over_a_folder_writes_table_plots_summary_and_exit_1_for_the_corrupt_file(
    small_night, tmp_path, capsys
):
    out = tmp_path / "out"
    code = main(["batch", str(small_night), "--out", str(out), "--workers", "1",
                 "--electron-temperature", "0.1"])
    assert code == 1  # one file failed
    err = capsys.readouterr().err
    assert "kestrel-7_corrupt.nc" in err and "Traceback" not in err
    rows = {Path(r["file"]).name: r for r in _rows(out)}
    assert set(rows) == {"kestrel-7_0.nc", "kestrel-7_1.csv", "kestrel-7_corrupt.nc"}
    bad = rows["kestrel-7_corrupt.nc"]
    assert bad["status"] == "failed" and bad["reason"] and bad["plot"] == ""
    for name in ("kestrel-7_0.nc", "kestrel-7_1.csv"):
        row = rows[name]
        assert row["status"] in ("ok", "doubtful")
        assert (out / row["plot"]).read_bytes()[:4] == b"\x89PNG"
        assert row["time"].startswith("2026-11-30T22:")
    for name in ("kestrel-7_1.csv",):
        row = rows[name]
        # the row holds exactly what `stabtool analyze --json` says for this map
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            ref = Analyzer(electron_temperature_K=0.1).analyze_file(row["file"]).to_json()
        assert row["x_gate"] == ref["x_gate"] == "PA" and row["y_gate"] == ref["y_gate"]
        for key, value in (("slopes.dot1", ref["slopes"]["dot1"]),
                           ("virtual_gate_matrix.0.1", ref["virtual_gate_matrix"][0][1])):
            if value is None:
                assert row[key] == ""
            else:
                assert float(row[key]) == pytest.approx(value, rel=1e-9)
        assert (row["status"] == "ok") == bool(ref["quality"]["ok"])
        assert row["warnings"] == " | ".join(ref["quality"]["warnings"])
    ds = xr.open_dataset(out / "results.nc", engine="h5netcdf")
    assert ds.sizes["map"] == 3
    page = (out / "summary.html").read_text()
    assert "Caution" in page and "lab" in page and "<script>" in page
    assert 'href="plots/' in page and "<table id=\"results\">" in page
    assert "http://" not in page and "https://" not in page  # self-contained
    # the table's key numbers start with the virtual-gate elements, as the row of the map has them
    head = page.split("<thead>")[1].split("</thead>")[0]
    assert head.index("<th>M12</th>") < head.index("<th>M21</th>") < head.index("<th>ΔV dot1 (mV)</th>")
    m12 = rows["kestrel-7_1.csv"]["virtual_gate_matrix.0.1"]
    assert m12 and f'data-v="{float(m12)!r}"' in page


def test_bad_usage_is_exit_2_with_one_line(tmp_path, capsys):
    assert main(["batch", str(tmp_path / "missing"), "--out", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "missing" in err[0] and "no such file" in err[0]
    with pytest.raises(SystemExit) as exc:
        main(["batch", str(tmp_path)])  # --out missing: argparse usage error
    assert exc.value.code == 2


def test_workers_must_be_positive(small_night, tmp_path, capsys):
    assert main(["batch", str(small_night), "--out", str(tmp_path / "o"), "--workers", "0"]) == 2
    assert "--workers" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()  # refused before anything is written


def test_time_limit_must_be_a_non_negative_number_of_seconds(small_night, tmp_path, capsys):
    for bad in ("-5", "soon", "inf"):
        with pytest.raises(SystemExit) as exc:
            main(["batch", str(small_night), "--out", str(tmp_path / "o"), "--time-limit", bad])
        assert exc.value.code == 2
        assert "--time-limit" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


@pytest.mark.slow
def test_sample_night_end_to_end_with_kill_and_resume(tmp_path):
    """The README command on the sample night, killed with SIGKILL, then resumed."""
    sample = make_overnight_sample(tmp_path / "sample", n_maps=10, shape=(72, 72))
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "stabtool.cli.main", "batch", str(tmp_path / "sample"), "--out",
           str(out), "--electron-temperature", "0.1", "--workers", "2", "--quiet"]
    proc = subprocess.Popen(cmd, start_new_session=True)
    records = out / ".records"
    deadline = time.monotonic() + 600
    while time.monotonic() < deadline and proc.poll() is None:
        done = [p for p in records.glob("[!.]*.json") if p.name != "batch.json"] if records.is_dir() else []
        if len(done) >= 3:
            break
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait(timeout=60)
    n_before = len([p for p in records.glob("[!.]*.json") if p.name != "batch.json"])
    assert 3 <= n_before < 10
    code = main(["batch", str(tmp_path / "sample"), "--out", str(out), "--electron-temperature", "0.1",
                 "--workers", "2", "--resume", "--quiet"])
    assert code == 0
    rows = _rows(out)
    assert sorted(Path(r["file"]).name for r in rows) == sorted(p.name for p in sample.files)
    assert len({r["hash"] for r in rows}) == 10
    drift = json.loads(next((out / "drift").glob("*.json")).read_text())
    assert len(drift["sweeps"]) == len(sample.repeated)
    got = np.array([[s["offset_x_mV"], s["offset_y_mV"]] for s in drift["sweeps"]])
    # half a step: one sweep of the sample carries random-telegraph noise
    np.testing.assert_allclose(got, sample.offsets_mV, atol=0.5 * max(sample.step_mV))
    assert "Drift of repeated sweeps" in (out / "summary.html").read_text()


def test_quiet_run_of_good_maps_prints_nothing_and_exits_0(small_night, tmp_path, capsys):
    code = main(["batch", str(small_night / "kestrel-7_0.nc"), "--out", str(tmp_path / "o"),
                 "--workers", "1", "--quiet"])
    assert code == 0
    captured = capsys.readouterr()
    assert captured.err == "" and captured.out == ""
    assert len(_rows(tmp_path / "o")) == 1
