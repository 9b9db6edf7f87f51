"""``stabtool info``: gates, ranges, steps, units, shape, NaN fraction, quantity."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest
from _io_data import small_map

from stabtool.cli.main import main
from stabtool.io import save_map


@pytest.fixture()
def files(tmp_path):
    nc, csv = tmp_path / "a.nc", tmp_path / "b.csv"
    save_map(small_map(), nc)
    save_map(small_map(nan_tail=False), csv)
    return nc, csv


def test_text_report_shows_gates_ranges_steps_and_nan(files, capsys):
    nc, _ = files
    assert main(["info", str(nc)]) == 0
    out = capsys.readouterr().out
    assert "sensor (nA)" in out and "5 × 7 (y × x)" in out
    assert "PA     -10 → 20 mV (-0.01 → 0.02 V), 7 points, step 5 mV (0.005 V)" in out
    assert "PB     5 → -5 mV (0.005 → -0.005 V), 5 points, step -2.5 mV (-0.0025 V)" in out
    assert "NaN       8.6 %" in out  # 3 of 35 points


def test_json_report_and_bad_file_among_good_ones(files, capsys, tmp_path):
    nc, csv = files
    code = main(["info", "--json", str(nc), str(tmp_path / "gone.nc"), str(csv)])
    assert code == 2
    captured = capsys.readouterr()
    reports = json.loads(captured.out)
    assert [r.get("file") for r in reports] == [str(nc), str(tmp_path / "gone.nc"), str(csv)]
    good = reports[0]
    assert good["x"]["gate"] == "PA" and good["y"]["gate"] == "PB"
    assert good["x"]["step"] == pytest.approx(5.0, rel=1e-12)
    assert good["y"]["step_V"] == pytest.approx(-2.5e-3, rel=1e-9)
    assert good["shape"] == {"y": 5, "x": 7}
    assert good["nan_fraction"] == pytest.approx(3 / 35, rel=1e-12)
    assert reports[1]["error"] == "no such file"
    assert reports[2]["nan_fraction"] == 0.0
    assert captured.err.strip() == f"stabtool: error: {tmp_path / 'gone.nc'}: no such file"


def test_real_subprocess_exit_code_and_no_traceback(files, tmp_path):
    nc, _ = files
    bad = tmp_path / "bad.csv"
    bad.write_text("PA (mV),PB (mV),sensor (nA)\n0,0,1\n1,0,x\n")
    proc = subprocess.run(
        [sys.executable, "-m", "stabtool.cli.main", "info", str(nc), str(bad)],
        check=False, capture_output=True, text=True, timeout=120,
    )
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert proc.stderr.strip() == (
        f"stabtool: error: {bad}: line 3 (data row 2), column 'sensor (nA)': 'x' is not a number"
    )
    assert "PA" in proc.stdout


def test_gates_beyond_twenty_volts_get_a_note(tmp_path, capsys):
    # millivolts stored without a unit are read as volts: 250 "V" on a plunger is not a dot device's
    # gate voltage (common practice, no source), so the report says what to check
    import numpy as np
    import xarray as xr

    da = small_map(nan_tail=False)
    path = tmp_path / "no_unit.nc"
    xr.DataArray(np.asarray(da.values), dims=("PB", "PA"), name="sensor",
                 coords={"PA": np.linspace(0.0, 250.0, da.shape[1]), "PB": np.linspace(0.0, 5.0, da.shape[0])},
                 ).to_dataset().to_netcdf(path, engine="h5netcdf")
    assert main(["info", str(path)]) == 0
    out = capsys.readouterr().out
    assert "note      gate voltages read as volts: PA reaches 250 V" in out and "PB" not in out.split("note")[1]
    in_volts = tmp_path / "in_volts.nc"
    save_map(da, in_volts)
    assert main(["info", str(in_volts)]) == 0
    assert "note" not in capsys.readouterr().out
