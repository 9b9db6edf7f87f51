"""Trace files, the lever-arm file and the ``stabtool calibrate`` command."""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr

from stabtool.calibrate import LeverArmCalibration, read_lever_arm_file, user_lever_arm, write_lever_arm_file
from stabtool.cli.main import main
from stabtool.errors import InputError
from stabtool.io.traces import load_traces
from stabtool.simulate.traces import TraceTruth, render_trace, write_sample_calibration


@pytest.fixture(scope="module")
def sample(tmp_path_factory):
    folder = tmp_path_factory.mktemp("kestrel")
    return write_sample_calibration(folder)


# ------------------------------------------------------------------------------------ loader


def test_csv_header_units_and_metadata(sample):
    (tr,) = load_traces(sample[0])
    assert tr.gate == "PA" and tr.device == "kestrel-7"
    assert tr.signal_name == "sensor" and tr.signal_units == "nA"
    assert tr.temperature_K == pytest.approx(0.02)
    assert tr.v[0] == pytest.approx(-0.3165)  # mV column converted to V
    assert tr.v.size == 801


def test_netcdf_series_gives_one_trace_per_temperature(sample):
    traces = load_traces(sample[-1])
    assert [t.temperature_K for t in traces] == pytest.approx([0.02, 0.05, 0.1, 0.15, 0.2, 0.3, 0.4])
    assert all(t.gate == "PA" and t.device == "kestrel-7" for t in traces)
    csv_100mK = load_traces(sample[2])[0]
    np.testing.assert_allclose(traces[2].signal, csv_100mK.signal, atol=1e-6)


def test_csv_with_temperature_column_and_two_signals(tmp_path):
    truth = TraceTruth()
    v = np.linspace(-0.301, -0.299, 50)
    lines = ["PA (V),T (mK),sensor (nA),sensor2 (nA)"]
    for t in (50, 100):
        for vi in v:
            s = render_trace(np.array([vi]), truth)[0]
            lines.append(f"{vi},{t},{s},{-s}")
    path = tmp_path / "two.csv"
    path.write_text("\n".join(lines) + "\n")
    traces = load_traces(path)
    assert len(traces) == 4
    assert sorted({t.temperature_K for t in traces}) == pytest.approx([0.05, 0.1])
    assert {t.signal_name for t in traces} == {"sensor", "sensor2"}
    assert all(t.temperature_source == "column T (mK)" for t in traces)


def test_netcdf_one_dimensional_variable_with_attribute(tmp_path):
    v = np.linspace(-1, 1, 30)
    ds = xr.Dataset({"current": (("PB",), np.tanh(v), {"units": "pA", "fridge_temperature": 0.07})},
                    coords={"PB": ("PB", v, {"units": "mV"})})
    path = tmp_path / "one.nc"
    ds.to_netcdf(path, engine="h5netcdf")
    (tr,) = load_traces(path, temperatures_from="attr:fridge_temperature")
    assert tr.gate == "PB" and tr.temperature_K == pytest.approx(0.07)
    assert tr.v[-1] == pytest.approx(1e-3)


def test_npz_traces(tmp_path):
    v = np.linspace(0, 1, 20)
    path = tmp_path / "t.npz"
    np.savez(path, PA_mV=v, sensor=np.stack([v, 2 * v]), temperature_K=np.array([0.1, 0.2]), device="kestrel-7")
    traces = load_traces(path)
    assert [t.temperature_K for t in traces] == pytest.approx([0.1, 0.2])
    assert traces[0].gate == "PA" and traces[0].v[-1] == pytest.approx(1e-3)


def test_user_temperature_overrides_the_file(sample):
    (tr,) = load_traces(sample[0], temperature_K=0.123)
    assert tr.temperature_K == 0.123 and tr.temperature_source == "user"


@pytest.mark.parametrize(
    "content, match",
    [
        ("", "no header line"),
        ("PA (mV)\n1\n2\n", "at least one signal column"),
        ("PA (mV),s (nA)\n1,2\n3,abc\n", "'abc' in column 's \\(nA\\)' is not a number"),
        ("PA (mV),s (nA)\n1,2\n3\n", "data row 3 has 1 fields"),
        ("PA (parsec),s (nA)\n1,2\n3,4\n", "unknown voltage unit"),
    ],
)
def test_bad_csv_gives_one_line_input_error_naming_the_file(tmp_path, content, match):
    path = tmp_path / "bad.csv"
    path.write_text(content)
    with pytest.raises(InputError, match=match) as info:
        load_traces(path)
    assert str(info.value).startswith(str(path)) and "\n" not in str(info.value)


def test_missing_and_unknown_files(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        load_traces(tmp_path / "nope.csv")
    p = tmp_path / "x.xyz"
    p.write_text("1")
    with pytest.raises(InputError, match="unknown trace format"):
        load_traces(p)
    q = tmp_path / "x.nc"
    q.write_text("not netcdf")
    with pytest.raises(InputError, match="cannot be read as NetCDF"):
        load_traces(q)


def test_named_temperature_column_missing(sample):
    with pytest.raises(InputError, match="no column 'T_mc'"):
        load_traces(sample[0], temperatures_from="column:T_mc")


# -------------------------------------------------------------------------------- lever file


def test_lever_arm_file_round_trip(tmp_path):
    cal = user_lever_arm(0.083, gate="PA", stderr=0.002, device="kestrel-7")
    path = write_lever_arm_file(cal, tmp_path / "sub" / "lever.json")
    back = read_lever_arm_file(path)
    assert isinstance(back, LeverArmCalibration)
    assert (back.lever_arm, back.lever_arm_stderr, back.gate, back.device) == (0.083, 0.002, "PA", "kestrel-7")
    assert back.path == str(path) and back.method == "user"


@pytest.mark.parametrize(
    "payload, match",
    [
        ("{", "invalid JSON"),
        ('{"format": "other"}', "not a lever-arm calibration"),
        ('{"format": "stabtool-lever-arm", "format_version": 1, "lever_arm": null, '
         '"quality": {"ok": false, "warnings": ["no trace"]}}', "holds no lever arm"),
        ('{"format": "stabtool-lever-arm", "format_version": 1, "lever_arm": -1, "method": "user", '
         '"gate": "PA"}', "not a positive number"),
        ('{"format": "stabtool-lever-arm", "format_version": 1, "lever_arm": 0.1, "method": "user"}',
         "no gate name"),
    ],
)
def test_bad_lever_arm_files(tmp_path, payload, match):
    path = tmp_path / "lever.json"
    path.write_text(payload)
    with pytest.raises(InputError, match=match) as info:
        read_lever_arm_file(path)
    assert str(info.value).startswith(str(path))


# ------------------------------------------------------------------------------------- CLI


@pytest.mark.regression
def test_cli_calibrate_sample_series(sample, tmp_path, capsys):
    out = tmp_path / "lever.json"
    png = tmp_path / "cal.png"
    code = main(["calibrate", *map(str, sample[:-1]), "--out", str(out), "--plot", str(png), "--quiet", "--no-shape-check"])
    assert code == 0
    data = json.loads(out.read_text())
    assert data["gate"] == "PA" and data["device"] == "kestrel-7"
    assert data["method"] == "temperature_series"
    # truth of the sample generator: α = 0.074, T_sat = 45 mK
    assert data["lever_arm"] == pytest.approx(0.074, rel=0.02)
    assert data["saturation_temperature_K"] == pytest.approx(0.045, rel=0.15)
    assert len(data["source_files"]) == 7 and data["quality"]["ok"]
    assert png.stat().st_size > 10_000
    assert read_lever_arm_file(out).lever_arm == data["lever_arm"]
    assert "lever arm" in capsys.readouterr().out


def test_cli_bad_trace_file_exits_2_with_one_line(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("PA (mV),s (nA)\n1,2\n3,abc\n")
    code = main(["calibrate", str(bad), "--temperature", "0.1", "--out", str(tmp_path / "l.json")])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and str(bad) in err and "not a number" in err


@pytest.mark.parametrize("option", ["--out", "--plot"])
def test_cli_output_onto_a_trace_file_is_refused_and_the_trace_kept(tmp_path, capsys, option):
    v = np.linspace(-0.3015, -0.2985, 200)
    path = tmp_path / "t.csv"
    path.write_text("PA (V),s (nA)\n" + "\n".join(f"{a},{b}" for a, b in zip(v, render_trace(v, TraceTruth()))))
    before = path.read_text()
    args = ["calibrate", str(path), "--temperature", "0.1", "--out", str(tmp_path / "l.json"), option, str(path)]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"{path}: is an input of this run" in err
    assert path.read_text() == before


def test_cli_needs_a_temperature(tmp_path, capsys):
    v = np.linspace(-0.3015, -0.2985, 200)
    path = tmp_path / "t.csv"
    path.write_text("PA (V),s (nA)\n" + "\n".join(f"{a},{b}" for a, b in zip(v, render_trace(v, TraceTruth()))))
    code = main(["calibrate", str(path), "--out", str(tmp_path / "l.json")])
    assert code == 2 and "has no temperature" in capsys.readouterr().err


def test_cli_too_short_trace_names_the_file(tmp_path, capsys):
    path = tmp_path / "short.csv"
    path.write_text("PA (mV),sensor (nA)\n1,2\n2,3\n3,4\n")
    code = main(["calibrate", str(path), "--temperature", "0.1", "--out", str(tmp_path / "l.json")])
    err = capsys.readouterr().err
    assert code == 2 and str(path) in err and "at least" in err and err.count("\n") == 1
