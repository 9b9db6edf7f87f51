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


def test_infinite_or_missing_temperature_is_a_usage_error(map_file, capsys):
    for text in ("inf", "nan", "-0.1"):
        with pytest.raises(SystemExit) as exc:
            main(["analyze", str(map_file), "--electron-temperature", text])
        assert exc.value.code == 2
        assert "expected a positive temperature in K" in capsys.readouterr().err


@pytest.mark.parametrize("option", ["--save", "--plot"])
def test_an_output_onto_the_input_map_or_a_folder_is_refused_before_the_analysis(map_file, tmp_path, capsys,
                                                                                  monkeypatch, option):
    import shutil

    import stabtool.analysis

    def no_analysis(*args, **kwargs):
        raise AssertionError("the analysis ran although its output path was bad")

    monkeypatch.setattr(stabtool.analysis.Analyzer, "__call__", no_analysis)
    measured = tmp_path / "measured.nc"
    shutil.copy(map_file, measured)
    before = measured.read_bytes()
    folder = tmp_path / "results.nc"
    folder.mkdir()
    for target, fault in ((measured, "is an input of this run"), (folder, "cannot write: it is a folder, not a file"),
                          (tmp_path / "absent" / "r.nc", "does not exist")):
        assert main(["analyze", str(measured), option, str(target)]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and err.startswith(f"stabtool: error: {target}: ") and fault in err
    # the measurement is untouched and nothing was left beside it
    assert measured.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["measured.nc", "results.nc"]
    assert not any(folder.iterdir())


def _saved(tmp_path, name, values, x=None, y=None):
    import numpy as np
    import xarray as xr

    ny, nx = values.shape
    x = np.linspace(0.0, 0.05, nx) if x is None else x
    y = np.linspace(0.0, 0.04, ny) if y is None else y
    path = tmp_path / name
    xr.DataArray(values, dims=("PB", "PA"), coords={"PA": x, "PB": y}, name="signal").to_dataset().to_netcdf(
        path, engine="h5netcdf")
    return path


def _run_cli(*args):
    """``python -m stabtool.cli.main ARGS`` as a user runs it: (exit code, stdout, stderr)."""
    import subprocess
    import sys

    p = subprocess.run([sys.executable, "-m", "stabtool.cli.main", *map(str, args)], capture_output=True,
                       text=True, timeout=300, check=False)
    return p.returncode, p.stdout, p.stderr


def test_infinite_points_are_missing_points_and_the_plot_is_written(map_file, tmp_path):
    # an instrument writes ±inf for an overflowed read-out: those points are missing, the map is
    # analysed and plotted (the colour scale once came out infinite and the plot raised)
    import numpy as np
    import xarray as xr

    with xr.open_dataset(map_file, engine="h5netcdf") as ds:
        name = next(iter(ds.data_vars))
        da = ds[name].load()
    v = np.asarray(da.values, float).copy()
    v[np.random.default_rng(0).random(v.shape) < 0.05] = np.inf
    path = _saved(tmp_path, "overflowed.nc", v, x=da[da.dims[1]].values, y=da[da.dims[0]].values)
    png = tmp_path / "overflowed.png"
    code, out, err = _run_cli("analyze", path, "--json", "--no-refine", "--plot", png)
    assert code == 0, err
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "infinite" in err and "treated as missing" in err and "Traceback" not in err
    assert json.loads(out)["virtual_gate_matrix"] is not None


def test_a_map_with_no_lines_gives_no_numeric_noise_on_stderr(tmp_path):
    # a bare ramp: the doubtful verdict is the one message (no numpy floating-point notes, no
    # empty-legend note from the plot)
    import numpy as np

    path = _saved(tmp_path, "ramp.nc", np.add.outer(np.arange(40.0), np.arange(50.0)))
    code, _, err = _run_cli("analyze", path, "--plot", tmp_path / "ramp.png")
    lines = [ln for ln in err.splitlines() if ln]
    assert code == 0 and len(lines) == 1 and "analysis doubtful" in lines[0], err


def test_all_infinite_map_is_bad_input(tmp_path, capsys):
    import numpy as np

    path = _saved(tmp_path, "dead.nc", np.full((20, 30), np.inf))
    assert main(["analyze", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "dead.nc" in err and "no finite values" in err


def test_missing_rows_give_only_the_missing_points_note_and_the_verdict_on_stderr(map_file, tmp_path):
    # a sweep that lost 15 rows in the middle (a paused instrument): numpy's "All-NaN slice"
    # note from the row medians of the pickup search once reached the user as a warning
    import numpy as np
    import xarray as xr

    with xr.open_dataset(map_file, engine="h5netcdf") as ds:
        da = ds[next(iter(ds.data_vars))].load()
    v = np.asarray(da.values, float).copy()
    v[40:55] = np.nan
    path = _saved(tmp_path, "paused.nc", v, x=da[da.dims[1]].values, y=da[da.dims[0]].values)
    code, out, err = _run_cli("analyze", path, "--json", "--no-refine")
    assert code == 0, err
    assert json.loads(out)["slopes"]["dot1"] is not None
    assert "All-NaN" not in err and "Traceback" not in err
    assert all(("missing" in ln) or ("analysis doubtful" in ln) for ln in err.splitlines() if ln), err


def test_gate_voltages_in_mv_without_a_unit_make_the_analysis_doubtful(map_file, tmp_path, capsys):
    # coordinates 18–250 with no units attribute are read as volts; a dot device's gates stay within
    # a few volts (common practice, no source), so the capacitances would be 1000× off: not ok
    import numpy as np
    import xarray as xr

    with xr.open_dataset(map_file, engine="h5netcdf") as ds:
        da = ds[next(iter(ds.data_vars))].load()
    x, y = 1e3 * da[da.dims[1]].values, 1e3 * da[da.dims[0]].values
    path = _saved(tmp_path, "millivolts.nc", np.asarray(da.values, float), x=x, y=y)
    assert main(["analyze", str(path), "--json", "--no-refine", "--quiet"]) == 0
    j = json.loads(capsys.readouterr().out)
    assert not j["quality"]["ok"]
    assert j["quality"]["warnings"][0].startswith("gate voltages read as volts: PB reaches")
    assert main(["analyze", str(map_file), "--json", "--no-refine", "--quiet"]) == 0
    same = json.loads(capsys.readouterr().out)
    assert j["slopes"]["dot1"] == pytest.approx(same["slopes"]["dot1"], rel=1e-9)


def test_a_stack_of_repeats_is_analysed_one_slice_at_a_time_with_isel(tmp_path, capsys):
    # a NetCDF variable with an extra dimension (two repeats of one sweep): the error names the
    # option to choose a slice, and that option exists on analyze and gives the slice's own analysis
    import numpy as np
    import xarray as xr

    first = quick_double_dot("si-sige-double", shape=(72, 72), snr=30.0, rng=3).data
    again = first.copy(data=first.values + np.random.default_rng(4).normal(0.0, 0.01, first.shape))
    maps = [first, again]  # the same window swept twice (other noise)
    stack = xr.concat(maps, dim="rep", join="exact").assign_coords(rep=[0, 1])
    path, single = tmp_path / "kestrel7_repeats.nc", tmp_path / "kestrel7_rep1.nc"
    stack.to_dataset(name="sensor").to_netcdf(path, engine="h5netcdf")
    save_map(maps[1], single)
    assert main(["analyze", str(path), "--json", "--no-refine", "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "--isel rep=0" in err
    assert main(["analyze", str(path), "--isel", "rep=1", "--json", "--no-refine", "--quiet"]) == 0
    sliced = json.loads(capsys.readouterr().out)
    assert main(["analyze", str(single), "--json", "--no-refine", "--quiet"]) == 0
    direct = json.loads(capsys.readouterr().out)
    assert direct["virtual_gate_matrix"][0][1] is not None
    assert sliced["virtual_gate_matrix"] == direct["virtual_gate_matrix"]
    assert sliced["slopes"] == direct["slopes"]
    assert main(["analyze", str(path), "--isel", "rep"]) == 2
    assert "expected DIM=INDEX" in capsys.readouterr().err


def test_a_single_infinite_point_is_counted_not_rounded_away():
    # one overflowed point of 4096 once read "0.0 % of the points are infinite"
    import numpy as np

    from stabtool.mapdata import share_of_points

    one = np.zeros((64, 64), bool)
    one[3, 4] = True
    assert share_of_points(one) == "1 of 4096 points (0.024 %)"
    assert share_of_points(np.ones((10, 10), bool)) == "100 of 100 points (100.0 %)"
