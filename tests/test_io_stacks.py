"""Stacked NetCDF files (several sweeps along an extra dimension): slice references, times, batch and drift."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from stabtool.batch.inputs import discover_inputs
from stabtool.cli.main import main
from stabtool.errors import InputError
from stabtool.io import expand_stacks, load, save_map, slice_ref, split_slice_ref, stack_selections

sys.path.insert(0, str(Path(__file__).parent))
from test_drift_registration import sweep
from test_drift_series import JUMP_AT, JUMP_PX, night


def write_stack(path, maps, *, dim="rep", coord=None, coord_attrs=None, attrs=None):
    """``maps`` (2-D DataArrays of one window) stacked along ``dim`` into one NetCDF variable."""
    plain = [xr.DataArray(m.values, dims=m.dims, coords={d: m[d].values for d in m.dims}) for m in maps]
    stack = xr.concat(plain, dim=dim)
    if coord is not None:
        stack = stack.assign_coords({dim: xr.Variable(dim, np.asarray(coord), attrs=coord_attrs or {})})
    ds = stack.rename("sensor").to_dataset()
    ds.attrs.update(attrs or {})
    ds.to_netcdf(path, engine="h5netcdf")
    return path


@pytest.fixture(scope="module")
def three_sweeps():
    return [sweep((0.0, 0.0), seed=k) for k in range(3)]


def test_a_slice_reference_names_the_file_and_the_positions(tmp_path, three_sweeps):
    f = write_stack(tmp_path / "night.nc", three_sweeps)
    ref = slice_ref(f, {"rep": 2})
    assert ref == f"{f}[rep=2]"
    assert split_slice_ref(ref) == (str(f), {"rep": 2})
    assert split_slice_ref(f) == (str(f), None)
    assert split_slice_ref(tmp_path / "missing.nc[rep=2]") == (str(tmp_path / "missing.nc[rep=2]"), None)
    odd = tmp_path / "odd[rep=1]"  # a real file with brackets in its name is a file
    odd.write_text("x")
    assert split_slice_ref(odd) == (str(odd), None)


def test_a_stack_stands_for_one_map_per_position_in_storage_order(tmp_path, three_sweeps):
    f = write_stack(tmp_path / "night.nc", three_sweeps)
    assert stack_selections(f) == [{"rep": 0}, {"rep": 1}, {"rep": 2}]
    plain = tmp_path / "plain.nc"
    save_map(three_sweeps[0], plain)
    assert stack_selections(plain) == []
    csv = tmp_path / "plain.csv"
    save_map(three_sweeps[0], csv)
    assert stack_selections(csv) == []
    assert expand_stacks([str(plain), str(f)]) == [str(plain)] + [f"{f}[rep={k}]" for k in range(3)]
    # two extra dimensions: every combination, the last one fastest (C order); size-1 dimensions are no stack
    grid = xr.concat([xr.concat([xr.DataArray(m.values, dims=m.dims, coords={d: m[d].values for d in m.dims})
                                 for m in three_sweeps[:2]], dim="rep") for _ in range(3)], dim="field")
    grid.expand_dims(one=1).rename("sensor").to_dataset().to_netcdf(tmp_path / "grid.nc", engine="h5netcdf")
    sel = stack_selections(tmp_path / "grid.nc")
    assert sel[:3] == [{"field": 0, "rep": 0}, {"field": 0, "rep": 1}, {"field": 1, "rep": 0}] and len(sel) == 6


def test_loading_a_slice_reference_equals_loading_the_file_with_isel(tmp_path, three_sweeps):
    f = write_stack(tmp_path / "night.nc", three_sweeps)
    by_ref = load(f"{f}[rep=1]")
    by_isel = load(f, isel={"rep": 1})
    np.testing.assert_array_equal(by_ref.values, three_sweeps[1].values)
    np.testing.assert_array_equal(by_ref.values, by_isel.values)
    assert by_ref.attrs["source"] == f"{f}[rep=1]"
    assert by_ref.attrs["selection"] == "rep=1"
    with pytest.raises(InputError, match=r"night\.nc: isel: index 7 is out of range"):
        load(f"{f}[rep=7]")


def test_each_slice_gets_its_own_time_from_the_stack_coordinate(tmp_path, three_sweeps):
    # CF time units "<unit> since <date>" (NetCDF Climate and Forecast conventions, section 4.4)
    cf = write_stack(tmp_path / "cf.nc", three_sweeps, dim="time", coord=[0, 30, 90],
                     coord_attrs={"units": "minutes since 2026-11-30 22:00:00"})
    assert [load(f"{cf}[time={k}]").attrs["time"] for k in range(3)] == [
        "2026-11-30T22:00:00", "2026-11-30T22:30:00", "2026-11-30T23:30:00"]
    # elapsed seconds from the file's start time
    el = write_stack(tmp_path / "elapsed.nc", three_sweeps, coord=[0.0, 1800.0, 3600.0],
                     coord_attrs={"units": "s"}, attrs={"time": "2026-11-30T22:00:00"})
    assert load(f"{el}[rep=2]").attrs["time"] == "2026-11-30T23:00:00"
    # ISO text per slice
    iso = write_stack(tmp_path / "iso.nc", three_sweeps, coord=["2026-11-30T22:00:00", "2026-11-30T22:20:00",
                                                                "2026-11-30T22:40:00"])
    assert load(f"{iso}[rep=1]").attrs["time"] == "2026-11-30T22:20:00"
    # no time per slice: the file's one start time is not every slice's start
    none = write_stack(tmp_path / "none.nc", three_sweeps, attrs={"time": "2026-11-30T22:00:00"})
    attrs = load(f"{none}[rep=1]").attrs
    assert "time" not in attrs and attrs["stack_time"] == "2026-11-30T22:00:00"


def test_discovery_expands_stacks_and_accepts_a_slice_reference(tmp_path, three_sweeps):
    folder = tmp_path / "night"
    folder.mkdir()
    f = write_stack(folder / "b_stack.nc", three_sweeps)
    save_map(three_sweeps[0], folder / "a_single.nc")
    found = [str(p) for p in discover_inputs([folder])]
    assert found == [str(folder / "a_single.nc")] + [f"{f}[rep={k}]" for k in range(3)]
    assert [str(p) for p in discover_inputs([f"{f}[rep=1]"])] == [f"{f}[rep=1]"]
    assert [str(p) for p in discover_inputs([folder], stacks=False)] == [str(folder / "a_single.nc"), str(f)]


def test_batch_gives_one_row_and_plot_per_slice_and_resumes_by_slice(tmp_path, three_sweeps, capsys):
    f = write_stack(tmp_path / "night.nc", three_sweeps)
    out = tmp_path / "out"
    assert main(["batch", str(f), "--out", str(out), "--workers", "1", "--quiet"]) == 0
    rows = (out / "results.csv").read_text().splitlines()
    files = [r.split(",")[0] for r in rows[1:]]
    assert files == [f"{f}[rep={k}]" for k in range(3)]
    plots = sorted(p.name for p in (out / "plots").iterdir())
    assert len(plots) == 3 and [p.split("-")[0] for p in plots] == ["night_rep0", "night_rep1", "night_rep2"]
    # the slices are analysed as the same map saved alone would be
    alone = tmp_path / "alone.nc"
    save_map(three_sweeps[1], alone)
    main(["analyze", str(alone), "--json"])
    want = json.loads(capsys.readouterr().out)["virtual_gate_matrix"]
    got = json.loads((out / ".records" / f"{rows[2].split(',')[1]}.json").read_text())["result"]["virtual_gate_matrix"]
    assert got == want
    capsys.readouterr()
    assert main(["batch", str(f), "--out", str(out), "--workers", "1", "--resume"]) == 0
    assert "0 analysed now, 3 resumed" in capsys.readouterr().err


@pytest.mark.regression
def test_drift_of_one_stacked_file_orders_by_time_and_finds_the_jump(tmp_path, capsys):
    maps, truth, (sx, sy) = night(n=7, seed=300)
    order = [4, 0, 6, 2, 1, 5, 3]  # stored out of order: the time coordinate decides
    f = write_stack(tmp_path / "night.nc", [maps[k] for k in order], dim="time",
                    coord=[30 * k for k in order], coord_attrs={"units": "minutes since 2026-11-30 22:00:00"})
    assert main(["drift", str(f), "--out", str(tmp_path / "drift")]) == 0
    assert "7 sweeps of PA/PB" in capsys.readouterr().out
    data = json.loads((tmp_path / "drift" / "drift.json").read_text())
    assert [s["file"] for s in data["sweeps"]] == [f"{f}[time={order.index(k)}]" for k in range(7)]
    assert data["time_unit"] == "h"
    assert [s["t"] for s in data["sweeps"]] == pytest.approx(0.5 * np.arange(7))
    assert [j["index"] for j in data["jumps"]] == [JUMP_AT]
    assert data["jumps"][0]["size_x_mV"] == pytest.approx(1e3 * JUMP_PX[0] * sx, abs=1e3 * 0.4 * sx)
    last = data["sweeps"][-1]
    assert last["offset_x_mV"] == pytest.approx(1e3 * (truth[-1, 0] - truth[0, 0]), abs=1e3 * 0.25 * sx)
    assert last["offset_y_mV"] == pytest.approx(1e3 * (truth[-1, 1] - truth[0, 1]), abs=1e3 * 0.25 * sy)


def test_info_describes_the_first_slice_and_counts_the_stack(tmp_path, three_sweeps, capsys):
    f = write_stack(tmp_path / "night.nc", three_sweeps)
    assert main(["info", str(f)]) == 0
    assert "stack     3 sweeps (rep 3)" in capsys.readouterr().out
    assert main(["info", str(f), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)[0]
    assert report["stack"] == {"slices": 3, "dims": {"rep": 3}}
    assert main(["info", str(f), "--isel", "rep=2", "--json"]) == 0
    assert "stack" not in json.loads(capsys.readouterr().out)[0]
