"""``stabtool analyze``: exit codes, JSON on stdout, plot and NetCDF outputs."""

import json

import pytest

from stabtool.cli.main import main
from stabtool.io import save_map
from stabtool.simulate import quick_double_dot


@pytest.fixture(scope="module")
def map_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("analyze") / "kestrel7_PA_PB.nc"
    save_map(quick_double_dot("si-sige-double", shape=(96, 96), snr=30.0, rng=2).data, path)
    return path


def test_json_output_and_exit_zero(map_file, capsys):
    code = main(["analyze", str(map_file), "--json", "--no-refine", "--quiet"])
    out = capsys.readouterr().out
    assert code == 0
    j = json.loads(out)
    assert j["x_gate"] == "PA" and "quality" in j and "virtual_gate_matrix" in j


def test_text_summary(map_file, capsys):
    assert main(["analyze", str(map_file), "--no-refine", "--quiet", "--lever-arm", "0.1,0.09"]) == 0
    out = capsys.readouterr().out
    assert "virtual-gate matrix" in out and "quality:" in out and "lever_arm" in out


def test_plot_and_save(map_file, tmp_path, capsys):
    png, nc = tmp_path / "a.png", tmp_path / "a.nc"
    assert main(["analyze", str(map_file), "--no-refine", "--quiet", "--plot", str(png), "--save", str(nc)]) == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    import xarray as xr

    with xr.open_dataset(nc, engine="h5netcdf") as ds:
        assert "gate_capacitance_aF" in ds


def test_unreadable_input_exits_2_with_one_line(tmp_path, capsys):
    bad = tmp_path / "broken.csv"
    bad.write_text("PA,PB,signal\n1,2,abc\n")
    code = main(["analyze", str(bad)])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "broken.csv" in err and "Traceback" not in err


def test_bad_lever_arm_option_is_a_usage_error(map_file, capsys):
    with pytest.raises(SystemExit) as exc:
        main(["analyze", str(map_file), "--lever-arm", "abc"])
    assert exc.value.code == 2
