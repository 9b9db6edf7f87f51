"""Every bad-input class gives one line naming the file and the fault, in the
API (InputError) and in the CLI (exit code 2, no traceback)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr
from _io_data import small_map

from stabtool.cli.main import main
from stabtool.errors import InputError
from stabtool.io import load, save_map


def _nc(path, data, dims, coords):
    xr.Dataset({"sensor": (dims, data)}, coords=coords).to_netcdf(path, engine="h5netcdf")


def missing(p):
    return p / "absent.csv"


def empty(p):
    (p / "empty.csv").write_text("")
    return p / "empty.csv"


def truncated_nc(p):
    save_map(small_map(nan_tail=False), p / "full.nc")
    raw = (p / "full.nc").read_bytes()
    (p / "cut.nc").write_bytes(raw[: len(raw) // 2])
    return p / "cut.nc"


def corrupt_nc(p):
    (p / "junk.nc").write_bytes(b"this is not netcdf at all" * 10)
    return p / "junk.nc"


def text_in_number(p):
    (p / "t.csv").write_text("PA (mV),PB (mV),sensor (nA)\n0,0,1\n1,0,2\n0,1,abc\n1,1,4\n")
    return p / "t.csv"


def ragged_rows(p):
    (p / "r.csv").write_text("PA (mV),PB (mV),sensor (nA)\n0,0,1\n1,0\n0,1,3\n1,1,4\n")
    return p / "r.csv"


def ragged_grid(p):
    # a point is missing in the middle of the sweep, not in the final line
    (p / "g.csv").write_text("PA (mV),PB (mV),sensor (nA)\n0,0,1\n1,0,2\n2,0,3\n0,1,4\n2,1,6\n0,2,7\n1,2,8\n2,2,9\n")
    return p / "g.csv"


def duplicated_point(p):
    (p / "d.csv").write_text("PA (mV),PB (mV),sensor (nA)\n0,0,1\n1,0,2\n0,1,3\n1,1,4\n1,1,5\n")
    return p / "d.csv"


def duplicated_grid_header(p):
    (p / "dg.csv").write_text("PB (mV) \\ PA (mV),0,1,1\n0,1,2,3\n1,4,5,6\n")
    return p / "dg.csv"


def non_monotonic(p):
    (p / "nm.csv").write_text("PB (mV) \\ PA (mV),0,2,1\n0,1,2,3\n1,4,5,6\n")
    return p / "nm.csv"


def one_d_csv(p):
    (p / "trace.csv").write_text("PA (mV),sensor (nA)\n0,1\n1,2\n")
    return p / "trace.csv"


def one_d_nc(p):
    xr.Dataset({"sensor": ("PA", [1.0, 2.0, 3.0])}, coords={"PA": [0.0, 1.0, 2.0]}).to_netcdf(
        p / "trace.nc", engine="h5netcdf")
    return p / "trace.nc"


def three_d_nc(p):
    _nc(p / "cube.nc", np.random.default_rng(0).normal(size=(2, 3, 4)), ("rep", "PB", "PA"),
        {"rep": [0, 1], "PB": [0.0, 1.0, 2.0], "PA": [0.0, 1.0, 2.0, 3.0]})
    return p / "cube.nc"


def binary_csv(p):
    (p / "bin.csv").write_bytes(bytes(range(256)) * 4)
    return p / "bin.csv"


def all_inf(p):
    (p / "inf.csv").write_text("PA (mV),PB (mV),sensor (nA)\n0,0,inf\n1,0,-inf\n0,1,inf\n1,1,inf\n")
    return p / "inf.csv"


def all_nan(p):
    (p / "nan.csv").write_text("PA (mV),PB (mV),sensor (nA)\n0,0,nan\n1,0,nan\n0,1,\n1,1,nan\n")
    return p / "nan.csv"


def constant(p):
    (p / "c.csv").write_text("PA (mV),PB (mV),sensor (nA)\n0,0,5\n1,0,5\n0,1,5\n1,1,5\n")
    return p / "c.csv"


def unknown_unit_csv(p):
    (p / "u.csv").write_text("PA (mA),PB (mV),sensor (nA)\n0,0,1\n1,0,2\n0,1,3\n1,1,4\n")
    return p / "u.csv"


def unknown_unit_nc(p):
    xr.Dataset({"sensor": (("PB", "PA"), [[1.0, 2.0], [3.0, 4.0]])},
               coords={"PA": ("PA", [0.0, 1.0], {"units": "furlong"}), "PB": [0.0, 1.0]}).to_netcdf(
        p / "u.nc", engine="h5netcdf")
    return p / "u.nc"


def saved_nc(p):
    save_map(small_map(), p / "v.nc")
    return p / "v.nc"


def text_variable(p):
    xr.Dataset({"sensor": (("PB", "PA"), np.array([["a", "b"], ["c", "d"]]))},
               coords={"PA": [0.0, 1.0], "PB": [0.0, 1.0]}).to_netcdf(p / "s.nc", engine="h5netcdf")
    return p / "s.nc"


def text_coordinate(p):
    xr.Dataset({"sensor": (("PB", "PA"), [[1.0, 2.0], [3.0, 4.0]])},
               coords={"PA": ["left", "right"], "PB": [0.0, 1.0]}).to_netcdf(p / "sc.nc", engine="h5netcdf")
    return p / "sc.nc"


def dates_as_gate_array(p):
    np.savez(p / "dt.npz", signal=np.arange(12.0).reshape(3, 4), x=np.arange(4).astype("datetime64[s]"),
             y=np.linspace(0.0, 0.01, 3))
    return p / "dt.npz"


def unknown_format(p):
    (p / "m.bin").write_bytes(bytes(range(256)) * 4)
    return p / "m.bin"


CASES = [
    (missing, {}, r"absent\.csv: no such file$"),
    (empty, {}, r"empty\.csv: the file is empty"),
    (truncated_nc, {}, r"cut\.nc: truncated or corrupt NetCDF"),
    (corrupt_nc, {}, r"junk\.nc: truncated or corrupt NetCDF"),
    (text_in_number, {}, r"t\.csv: line 4 \(data row 3\), column 'sensor \(nA\)': 'abc' is not a number"),
    (ragged_rows, {}, r"r\.csv: ragged table: line 3 \(data row 2\) has 2 cells, the header row has 3"),
    (ragged_grid, {}, r"g\.csv: ragged grid: 1 of 9 points .* not only in the final sweep line \(e\.g\. PA=1, PB=1\)"),
    (duplicated_point, {}, r"d\.csv: duplicated grid point PA=1, PB=1 in data rows 4 and 5"),
    (duplicated_grid_header, {}, r"dg\.csv: duplicated grid points: PA = 1 appears twice in the header row"),
    (non_monotonic, {}, r"nm\.csv: axis 'PA' is not monotonic"),
    (one_d_csv, {}, r"trace\.csv: 1-D data: the header has 2 column"),
    (one_d_nc, {}, r"trace\.nc: 1-D data"),
    (three_d_nc, {}, r"cube\.nc: 3-D data: variable 'sensor' has dims \('rep', 'PB', 'PA'\); select a 2-D slice with isel=\{'rep': 0\} \(stabtool analyze or info: --isel rep=0, or the name cube\.nc\[rep=0\]; batch and drift take every slice\)"),
    (all_nan, {}, r"nan\.csv: the map holds no finite values \(all NaN or infinite\)"),
    (all_inf, {}, r"inf\.csv: the map holds no finite values \(all NaN or infinite\)"),
    (constant, {}, r"c\.csv: the map is constant"),
    (unknown_unit_csv, {}, r"u\.csv: unknown unit 'mA' in gate column 'PA \(mA\)'; accepted voltage units: V, mV, uV"),
    (unknown_unit_nc, {}, r"u\.nc: unknown unit 'furlong' on coordinate 'PA'; accepted voltage units"),
    (text_variable, {}, r"s\.nc: variable 'sensor' holds text, not numbers$"),
    (text_coordinate, {}, r"sc\.nc: coordinate 'PA' holds text, not numbers$"),
    (dates_as_gate_array, {}, r"dt\.npz: gate array 'x' holds times or dates, not numbers$"),
    (unknown_format, {}, r"m\.bin: unknown format \(suffix '\.bin'\); accepted: \.nc"),
    (binary_csv, {}, r"bin\.csv: binary content in a \.csv file: not a text table"),
    (saved_nc, {"var": "sensr"},
     r"v\.nc: no variable named 'sensr'; did you mean 'sensor'\?"),
    (text_in_number, {"var": "sensro"}, r"t\.csv: no column named 'sensro'; did you mean 'sensor'\?"),
]
IDS = [c[0].__name__ for c in CASES]
IDS[-2:] = ["unknown_variable", "unknown_column"]


@pytest.mark.parametrize("make,kw,message", CASES, ids=IDS)
def test_api_message_names_file_and_fault(tmp_path, make, kw, message):
    path = make(tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        with pytest.raises(InputError) as info:
            load(path, **kw)
    text = str(info.value)
    assert "\n" not in text
    assert text.startswith(str(path))
    assert info.value.source == str(path)
    import re

    assert re.search(message, text), text


@pytest.mark.parametrize("make,kw,message", CASES, ids=IDS)
def test_cli_exit_2_without_traceback(tmp_path, capsys, make, kw, message):
    path = make(tmp_path)
    # (info shows the first sweep of a stacked file: analyze is the command that needs one map)
    command = "analyze" if make is three_d_nc else "info"
    argv = [command, str(path)] + (["--var", kw["var"]] if "var" in kw else [])
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    lines = [ln for ln in err.splitlines() if ln.startswith("stabtool: error:")]
    assert len(lines) == 1 and str(path) in lines[0]


def test_3d_with_selection_loads(tmp_path):
    da = load(three_d_nc(tmp_path), isel={"rep": 1})
    assert da.dims == ("PB", "PA") and da.shape == (3, 4)


def test_cli_isel_selects_a_slice(tmp_path, capsys):
    path = three_d_nc(tmp_path)
    assert main(["info", "--isel", "rep=1", str(path)]) == 0
    assert "3 × 4 (y × x)" in capsys.readouterr().out
    assert main(["info", "--isel", "rep", str(path)]) == 2
    assert "stabtool: error: --isel: expected DIM=INDEX" in capsys.readouterr().err


def test_bad_isel_is_explained(tmp_path):
    path = three_d_nc(tmp_path)
    with pytest.raises(InputError, match=r"cube\.nc: isel: index 5 is out of range for dimension 'rep' of size 2"):
        load(path, isel={"rep": 5})
    with pytest.raises(InputError, match=r"no dimension 'repp'"):
        load(path, isel={"repp": 0})


def test_a_complex_map_handed_to_the_analysis_is_refused_not_cut_to_its_real_part():
    # numpy drops the imaginary part of a complex array cast to float (with only a warning);
    # the analysis must say so instead (the file readers project I/Q maps before this point)
    from stabtool.analysis import Analyzer

    rng = np.random.default_rng(0)
    iq = rng.normal(size=(40, 40)) + 1j * rng.normal(size=(40, 40))
    da = xr.DataArray(iq, dims=("PB", "PA"), name="iq",
                      coords={"PB": np.linspace(0, 0.1, 40), "PA": np.linspace(0, 0.1, 40)})
    with pytest.raises(InputError, match=r"variable 'iq' holds complex values \(I \+ iQ\)"):
        Analyzer()(da)
