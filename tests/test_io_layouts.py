"""File layouts other than the canonical ones: the same map comes out.

NetCDF with gate voltages on other dimensions (``sensor(y, x)`` with
``PA(x)``), as set-point grids (``PA(y, x)``), or every point listed along
one dimension (a sweep log); plain HDF5 arrays without dimension scales; an
.npz point list; text tables with decimal commas. These are what
measurement software and spreadsheets write besides the canonical form
(common practice, no source). Each must load to the map the canonical file
gives, or say which choice it needs.
"""

from __future__ import annotations

import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from stabtool.errors import InputError, PartialSweepWarning
from stabtool.io import load

sys.path.insert(0, str(Path(__file__).parent))
from _io_data import small_map


@pytest.fixture()
def canonical():
    """A 5 × 7 map in volts, y decreasing, no missing points."""
    return small_map(nan_tail=False)


def _same_map(got, want):
    assert got.dims == want.dims
    np.testing.assert_allclose(got["PA"].values, want["PA"].values, rtol=0, atol=1e-12)
    np.testing.assert_allclose(got["PB"].values, want["PB"].values, rtol=0, atol=1e-12)
    np.testing.assert_array_equal(got.values, want.values)


def _raw(m):
    """Values and gate axes of a map, in V."""
    return m.values, m["PA"].values, m["PB"].values


def _gates_as(tmp_path, name, canonical, make, *, as_coords):
    """``sensor(y, x)`` with the gates ``make(x, y) -> (PA, PB)`` (each a (dims, values) pair) saved to ``name``."""
    v, x, y = _raw(canonical)
    pa, pb = make(x, y)
    gates = {"PA": pa, "PB": pb}
    ds = (xr.Dataset({"sensor": (("y", "x"), v)}, coords=gates) if as_coords
          else xr.Dataset({"PA": pa, "sensor": (("y", "x"), v), "PB": pb}))  # (the map between the gates)
    ds.to_netcdf(tmp_path / name, engine="h5netcdf")
    return tmp_path / name


def _axes(x, y):
    return ("x", x), ("y", y)


def _mesh(x, y, *, skew=0.0):
    X, Y = np.meshgrid(x, y)
    return (("y", "x"), X + skew * Y), (("y", "x"), Y)


@pytest.mark.parametrize("as_coords", [True, False], ids=["coordinates", "variables"])
def test_gate_voltages_on_other_dimensions(tmp_path, canonical, as_coords):
    _same_map(load(_gates_as(tmp_path, "axes.nc", canonical, _axes, as_coords=as_coords)), canonical)


@pytest.mark.parametrize("as_coords", [True, False], ids=["coordinates", "variables"])
def test_set_point_grids_are_reduced_to_their_axes(tmp_path, canonical, as_coords):
    # as data variables beside the map, they are no second map
    _same_map(load(_gates_as(tmp_path, "mesh.nc", canonical, _mesh, as_coords=as_coords)), canonical)


def test_a_grid_that_is_not_rectilinear_is_no_gate_axis(tmp_path, canonical):
    skew = _gates_as(tmp_path, "skew.nc", canonical, lambda x, y: _mesh(x, y, skew=0.1), as_coords=True)
    with pytest.raises(InputError, match="dimension 'x' of variable 'sensor' has no coordinate variable"):
        load(skew)


def test_several_candidates_are_named_and_x_or_units_choose(tmp_path, canonical):
    v, x, y = _raw(canonical)
    ds = xr.Dataset({"sensor": (("y", "x"), v), "PA": ("x", x), "PA_readback": ("x", x + 1e-6), "PB": ("y", y)})
    ds.to_netcdf(tmp_path / "two.nc", engine="h5netcdf")
    with pytest.raises(InputError, match=r"several gate-voltage candidates \(PA, PA_readback\)"):
        load(tmp_path / "two.nc")
    _same_map(load(tmp_path / "two.nc", x="PA"), canonical)
    ds["PA"].attrs["units"] = "V"
    ds.to_netcdf(tmp_path / "units.nc", engine="h5netcdf")
    _same_map(load(tmp_path / "units.nc"), canonical)


def _flat(canonical, *, serpentine=False, jitter=0.0, fast="x", cut=0):
    v, x, y = _raw(canonical)
    X, Y = np.meshgrid(x, y)
    V = v.copy()
    if serpentine:
        X[1::2], V[1::2] = X[1::2, ::-1], V[1::2, ::-1]
    if fast == "y":
        X, Y, V = X.T, Y.T, V.T
    xs, ys, vs = X.ravel(), Y.ravel(), V.ravel()
    if jitter:
        xs = xs + np.random.default_rng(0).normal(0, jitter, xs.size)
    n = xs.size - cut
    return xs[:n], ys[:n], vs[:n]


@pytest.mark.parametrize("serpentine,fast", [(False, "x"), (True, "x"), (False, "y")])
def test_a_flat_point_list_is_put_back_on_its_grid(tmp_path, canonical, serpentine, fast):
    xs, ys, vs = _flat(canonical, serpentine=serpentine, fast=fast)
    xr.Dataset({"PA": ("point", xs), "PB": ("point", ys), "sensor": ("point", vs)}).to_netcdf(
        tmp_path / "flat.nc", engine="h5netcdf")
    got = load(tmp_path / "flat.nc")
    assert got.dims == ("PB", "PA")
    order_y = np.argsort(got["PB"].values)
    want_y = np.argsort(canonical["PB"].values)
    np.testing.assert_array_equal(got.values[order_y], canonical.values[want_y])


def test_a_flat_list_in_millivolts_with_jittered_read_back_and_named_units(tmp_path, canonical):
    xs, ys, vs = _flat(canonical, serpentine=True, jitter=1e-7)
    xr.Dataset({"current": ("n", vs, {"units": "nA"}), "PA": ("n", 1e3 * xs, {"units": "mV"}),
                "PB": ("n", 1e3 * ys, {"units": "mV"})}).to_netcdf(tmp_path / "log.nc", engine="h5netcdf")
    got = load(tmp_path / "log.nc")
    assert got.name == "current" and got.attrs["units"] == "nA"
    assert got.dims == ("PB", "PA")  # the gates by their voltage units, although listed after the signal
    np.testing.assert_allclose(got["PA"].values, canonical["PA"].values, atol=1e-6)
    np.testing.assert_array_equal(got.values, canonical.values)
    assert got["PA"].attrs["original_units"] == "mV"


def test_a_flat_list_with_two_measured_variables_needs_var(tmp_path, canonical):
    xs, ys, vs = _flat(canonical)
    xr.Dataset({"PA": ("n", xs), "PB": ("n", ys), "sensor": ("n", vs), "phase": ("n", -vs)}).to_netcdf(
        tmp_path / "two.nc", engine="h5netcdf")
    with pytest.raises(InputError, match=r"several measured variables along the point list \(sensor, phase\)"):
        load(tmp_path / "two.nc")
    np.testing.assert_array_equal(load(tmp_path / "two.nc", var="phase").values, -canonical.values)


def test_an_interrupted_flat_list_keeps_the_missing_points_as_nan(tmp_path, canonical):
    xs, ys, vs = _flat(canonical, cut=3)
    xr.Dataset({"PA": ("n", xs), "PB": ("n", ys), "sensor": ("n", vs)}).to_netcdf(tmp_path / "cut.nc", engine="h5netcdf")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        got = load(tmp_path / "cut.nc")
    assert any(issubclass(w.category, PartialSweepWarning) for w in caught)
    assert int(np.isnan(got.values).sum()) == 3


def test_a_one_dimensional_trace_is_still_refused(tmp_path, canonical):
    xs, _, vs = _flat(canonical)
    xr.Dataset({"PA": ("n", xs), "sensor": ("n", vs)}).to_netcdf(tmp_path / "trace.nc", engine="h5netcdf")
    with pytest.raises(InputError, match="1-D data"):
        load(tmp_path / "trace.nc")


def test_the_analysis_of_another_layout_equals_the_canonical_one(tmp_path, capsys):
    import json

    from stabtool.cli.main import main

    src = Path(__file__).parents[1] / "sample_data" / "overnight" / "kestrel-7_repeat_17_0350.nc"
    m = load(src)
    v, x, y = m.values, m["PA"].values, m["PB"].values
    xr.Dataset({"sensor": (("y", "x"), v)}, coords={"PA": ("x", x), "PB": ("y", y)},
               attrs={"temperature_K": 0.1}).to_netcdf(tmp_path / "layout.nc", engine="h5netcdf")
    results = []
    for f in (src, tmp_path / "layout.nc"):
        assert main(["analyze", str(f), "--json", "--quiet"]) == 0
        results.append(json.loads(capsys.readouterr().out))
    for key in ("slopes", "virtual_gate_matrix", "addition_voltages_V", "gate_capacitance_aF"):
        assert results[0][key] == results[1][key], key


def test_plain_hdf5_arrays_are_matched_to_the_map_by_length(tmp_path, canonical):
    h5py = pytest.importorskip("h5py")
    v, x, y = _raw(canonical)  # 5 × 7: the lengths say which array is which
    with h5py.File(tmp_path / "plain.h5", "w") as f:
        f["PA"], f["PB"], f["sensor"] = x, y, v
    _same_map(load(tmp_path / "plain.h5"), canonical)


def test_plain_hdf5_of_a_square_map_needs_the_gates_named(tmp_path):
    h5py = pytest.importorskip("h5py")
    x, y = np.linspace(0.0, 0.1, 6), np.linspace(0.2, 0.3, 6)
    v = np.add.outer(np.arange(6.0), 10 * np.arange(6.0))
    with h5py.File(tmp_path / "square.h5", "w") as f:
        f["PA"], f["PB"], f["sensor"] = x, y, v
    with pytest.raises(InputError, match=r"several gate-voltage candidates \(PA, PB\); choose with x= and y="):
        load(tmp_path / "square.h5")
    got = load(tmp_path / "square.h5", x="PB", y="PA")
    assert got.dims == ("PA", "PB")
    np.testing.assert_array_equal(got["PB"].values, y)
    np.testing.assert_array_equal(got.values, v)
    with h5py.File(tmp_path / "xy.h5", "w") as f:  # arrays named x and y say it themselves
        f["x"], f["y"], f["signal"] = x, y, v
    got = load(tmp_path / "xy.h5")
    np.testing.assert_array_equal(got["x"].values, x)
    np.testing.assert_array_equal(got["y"].values, y)


def test_an_npz_point_list_is_put_back_on_its_grid(tmp_path, canonical):
    xs, ys, vs = _flat(canonical, serpentine=True)
    np.savez(tmp_path / "log.npz", PA_mV=1e3 * xs, PB_mV=1e3 * ys, sensor=vs)
    got = load(tmp_path / "log.npz")
    assert got.dims == ("PB", "PA") and got["PA"].attrs["original_units"] == "mV"
    np.testing.assert_allclose(got["PA"].values, canonical["PA"].values, atol=1e-12)
    np.testing.assert_array_equal(got.values, canonical.values)


def test_text_tables_with_decimal_commas(tmp_path, canonical):
    from stabtool.io import save_map

    for layout, name in (("long", "map.csv"), ("grid", "map.tsv")):
        plain = tmp_path / name
        save_map(canonical, plain, layout=layout)
        text = plain.read_text().splitlines()
        # semicolons between cells when the commas become decimal marks (a spreadsheet's export)
        body = [line if line.startswith("#") else line.replace(",", ";").replace(".", ",") for line in text]
        comma = tmp_path / f"comma_{name}"
        comma.write_text("\n".join(body) + "\n")
        _same_map(load(comma), load(plain))


@pytest.mark.filterwarnings("ignore:You are writing invalid netcdf features")
def test_a_complex_iq_map_is_read_along_its_principal_axis(tmp_path, capsys):
    import json

    from stabtool.cli.main import main

    src = Path(__file__).parents[1] / "sample_data" / "overnight" / "kestrel-7_repeat_17_0350.nc"
    m = load(src)
    v = m.values
    rng = np.random.default_rng(1)
    phase = np.deg2rad(40.0)
    # a resonator's response moved along one I/Q direction by the charge, with a little noise across it
    z = (0.3 + 0.2j) + (v - v.mean()) * np.exp(1j * phase) + 1e-3 * rng.normal(size=v.shape) * np.exp(1j * (phase + np.pi / 2))
    np.savez(tmp_path / "iq.npz", PA=m["PA"].values, PB=m["PB"].values, signal=z)
    got = load(tmp_path / "iq.npz")
    assert got.attrs["iq_projection_deg"] % 180 == pytest.approx(40.0, abs=0.1)
    assert abs(np.corrcoef(got.values.ravel(), v.ravel())[0, 1]) > 0.9999
    xr.Dataset({"s21": (("PB", "PA"), z)}, coords={"PA": m["PA"].values, "PB": m["PB"].values}).to_netcdf(
        tmp_path / "iq.nc", engine="h5netcdf", invalid_netcdf=True)
    assert load(tmp_path / "iq.nc").attrs["iq_projection_deg"] % 180 == pytest.approx(40.0, abs=0.1)
    # I and Q stored as two real variables: the same map
    xr.Dataset({"s21_I": (("PB", "PA"), z.real), "s21_Q": (("PB", "PA"), z.imag)},
               coords={"PA": m["PA"].values, "PB": m["PB"].values}).to_netcdf(tmp_path / "i_q.nc", engine="h5netcdf")
    pair = load(tmp_path / "i_q.nc")
    assert pair.name == "s21"
    np.testing.assert_allclose(pair.values, load(tmp_path / "iq.nc").values, atol=1e-12)
    assert load(tmp_path / "i_q.nc", var="s21_Q").name == "s21_Q"  # one of them, as asked
    results = []
    for f in (src, tmp_path / "iq.nc"):
        assert main(["analyze", str(f), "--json", "--quiet", "--no-refine"]) == 0
        results.append(json.loads(capsys.readouterr().out))
    np.testing.assert_allclose(np.array(results[1]["virtual_gate_matrix"], float),
                               np.array(results[0]["virtual_gate_matrix"], float), atol=2e-3)


def test_voltage_units_spelled_out():
    from stabtool.units import voltage_scale

    assert voltage_scale("millivolts") == 1e-3 and voltage_scale("microvolt") == 1e-6
