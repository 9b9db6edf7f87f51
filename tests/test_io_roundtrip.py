"""Each format round-trips load → save → load with coordinates, units, NaN and attrs."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr
from _io_data import small_map

import stabtool
from stabtool.errors import PartialSweepWarning
from stabtool.io import load, load_dataset, save_map

CASES = [("map.nc", "long"), ("map.h5", "long"), ("map.csv", "long"), ("map.tsv", "long"),
         ("grid.csv", "grid"), ("grid.tsv", "grid"), ("map.npz", "long")]


def _quiet_load(path, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PartialSweepWarning)
        return load(path, **kw)


@pytest.mark.parametrize("name,layout", CASES)
def test_round_trip_keeps_coordinates_units_nan_and_attrs(tmp_path, name, layout):
    da = small_map()
    first = tmp_path / ("first_" + name)
    save_map(da, first, layout=layout)
    once = _quiet_load(first)
    second = tmp_path / ("second_" + name)
    save_map(once, second, layout=layout)
    twice = _quiet_load(second)
    for got in (once, twice):
        assert got.dims == ("PB", "PA")
        assert got.name == "sensor" and got.attrs["units"] == "nA"
        for dim in ("PA", "PB"):
            np.testing.assert_allclose(got[dim].values, da[dim].values, rtol=1e-12, atol=0)
            assert got[dim].attrs == {"units": "V", "original_units": "mV"}
            assert got[dim].dtype == np.float64
        np.testing.assert_array_equal(np.isnan(got.values), np.isnan(da.values))
        np.testing.assert_allclose(got.values, da.values, rtol=1e-15, atol=0, equal_nan=True)
        assert got.attrs["device"] == "kestrel-7"
        assert got.attrs["stabtool_truth"] == da.attrs["stabtool_truth"]
    assert twice.attrs["source"] == str(second)


def test_partial_map_warns_on_load(tmp_path):
    save_map(small_map(), tmp_path / "m.nc")
    with pytest.warns(PartialSweepWarning, match="missing"):
        load(tmp_path / "m.nc")


def test_top_level_names_are_the_io_functions():
    assert stabtool.load is load and stabtool.save_map is save_map


def test_dict_attrs_survive_netcdf(tmp_path):
    da = small_map(nan_tail=False)
    da.attrs["results"] = {"slopes": {"dot1": -3.2, "dot2": None}, "ok": False}
    save_map(da, tmp_path / "r.nc")
    got = load(tmp_path / "r.nc")
    assert got.attrs["results"] == {"slopes": {"dot1": -3.2, "dot2": None}, "ok": False}


def test_dataset_with_result_variables_round_trips(tmp_path):
    da = small_map(nan_tail=False)
    ds = da.to_dataset()
    ds["virtual_gate_matrix"] = (("row", "col"), np.array([[1.0, 0.3], [0.2, 1.0]]))
    ds.attrs["stabtool_map_variable"] = "sensor"
    save_map(ds, tmp_path / "res.nc")
    got = load(tmp_path / "res.nc")
    assert got.name == "sensor" and got.dims == ("PB", "PA")
    back = load_dataset(tmp_path / "res.nc")
    np.testing.assert_array_equal(back["virtual_gate_matrix"].values, [[1.0, 0.3], [0.2, 1.0]])


def test_map_variable_is_found_among_result_variables(tmp_path):
    """Without the map attribute, the real-valued gate-coordinate map is chosen:
    integer maps (charge states) and label-dimension matrices are results."""
    da = small_map(nan_tail=False)
    ds = da.to_dataset()
    ds["n1"] = (("PB", "PA"), np.arange(da.size, dtype=np.int32).reshape(da.shape))
    ds["lever_arm"] = (("dot", "gate"), np.eye(2))
    ds = ds.assign_coords(dot=["dot1", "dot2"], gate=["PA", "PB"])
    save_map(ds, tmp_path / "res.nc")
    assert load(tmp_path / "res.nc").name == "sensor"
    assert load(tmp_path / "res.nc", var="n1").name == "n1"


def test_save_is_atomic_and_keeps_old_file_on_failure(tmp_path):
    target = tmp_path / "keep.nc"
    save_map(small_map(nan_tail=False), target)
    before = target.read_bytes()
    bad = small_map(nan_tail=False)
    bad.attrs["unwritable"] = object()  # cannot be encoded
    with pytest.raises(TypeError):
        save_map(bad, target)
    assert target.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["keep.nc"]  # no temp file left


def test_save_json_converts_numpy_and_nan(tmp_path):
    from stabtool.errors import InputError
    from stabtool.io import load_json
    from stabtool.quality import Quality

    path = tmp_path / "r.json"
    stabtool.save_json({"m": np.eye(2), "a": np.float32(0.5), "e": float("nan"),
                        "q": Quality(ok=False, warnings=("few lines",))}, path)
    assert load_json(path) == {"m": [[1.0, 0.0], [0.0, 1.0]], "a": 0.5, "e": None,
                               "q": {"ok": False, "warnings": ["few lines"]}}
    with pytest.raises(TypeError):
        stabtool.save_json({"x": object()}, path)
    assert load_json(path)["a"] == 0.5  # the earlier file is intact
    (tmp_path / "bad.json").write_text('{"a": 1,,}')
    with pytest.raises(InputError, match=r"bad.json: not valid JSON.*line 1"):
        load_json(tmp_path / "bad.json")


def test_netcdf_coordinate_units_are_honoured(tmp_path):
    ds = xr.Dataset(
        {"current": (("SG", "PB", "PA"), np.random.default_rng(0).normal(size=(2, 3, 4)),
                     {"units": "pA"})},
        coords={"PA": ("PA", [1.0, 2.0, 3.0, 4.0], {"units": "µV"}),
                "PB": ("PB", [-1.0, 0.0, 1.0], {"units": "uV"}),
                "SG": ("SG", [0.1, 0.2], {"units": "V"})},
        attrs={"stabtool_truth": '{"k": 1}'},
    )
    ds.to_netcdf(tmp_path / "c.nc", engine="h5netcdf")
    got = load(tmp_path / "c.nc", isel={"SG": 1})
    np.testing.assert_allclose(got["PA"].values, [1e-6, 2e-6, 3e-6, 4e-6], rtol=1e-12)
    assert got["PA"].attrs["original_units"] == "µV" and got["PB"].attrs["original_units"] == "uV"
    assert got.attrs["units"] == "pA" and got.attrs["stabtool_truth"] == '{"k": 1}'
    assert got.attrs["selection"] == "SG=1"
    swapped = load(tmp_path / "c.nc", isel={"SG": 0}, x="PB")
    assert swapped.dims == ("PA", "PB")


def test_netcdf3_classic_is_read(tmp_path):
    da = small_map(nan_tail=False)
    da.to_dataset().to_netcdf(tmp_path / "classic.nc", engine="scipy")
    got = load(tmp_path / "classic.nc")
    np.testing.assert_allclose(got.values, da.values, rtol=0, atol=0)
