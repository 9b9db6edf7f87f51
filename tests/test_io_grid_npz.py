"""Grid tables and NPZ: the header conventions and key names the loaders accept."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

from stabtool.errors import InputError, PartialSweepWarning
from stabtool.io import detect_format, load


def test_grid_with_corner_label_and_quantity_comment(tmp_path):
    p = tmp_path / "g.tsv"
    p.write_text("# quantity: sensor (pA)\nPB [V]\\PA [mV]\t1\t2\t3\n0.5\t1\t2\t3\n0.4\t4\t5\t6\n")
    da = load(p)
    assert da.dims == ("PB", "PA") and da.name == "sensor" and da.attrs["units"] == "pA"
    np.testing.assert_allclose(da["PA"].values, [1e-3, 2e-3, 3e-3], rtol=1e-12)
    np.testing.assert_allclose(da["PB"].values, [0.5, 0.4], rtol=1e-12)  # decreasing kept
    np.testing.assert_array_equal(da.values, [[1, 2, 3], [4, 5, 6]])


def test_grid_without_label_is_in_volts_with_gates_x_y(tmp_path):
    p = tmp_path / "g.csv"
    p.write_text(",0.1,0.2\n1.0,1,2\n2.0,3,4\n")
    da = load(p)
    assert da.dims == ("y", "x") and da["x"].attrs["original_units"] == "V"


def test_grid_short_final_row_is_padded_with_nan(tmp_path):
    p = tmp_path / "g.csv"
    p.write_text("PB (mV) \\ PA (mV),0,1,2\n0,1,2,3\n1,4\n")
    with pytest.warns(PartialSweepWarning, match="final row"):
        da = load(p)
    assert np.isnan(da.values[1, 1:]).all() and da.values[1, 0] == 4


def test_npz_plain_keys_and_units_in_key_names(tmp_path):
    sig = np.arange(6.0).reshape(2, 3)
    np.savez(tmp_path / "a.npz", PA_mV=np.array([0.0, 1.0, 2.0]), PB_mV=np.array([5.0, 6.0]), current=sig)
    da = load(tmp_path / "a.npz")
    assert da.dims == ("PB", "PA") and da.name == "current"
    np.testing.assert_allclose(da["PB"].values, [5e-3, 6e-3], rtol=1e-12)
    np.savez(tmp_path / "b.npz", x=np.array([0.0, 1.0]), y=np.array([0.0, 1.0, 2.0]), signal=sig.T,
             meta=np.array(json.dumps({"x_units": "uV", "units": "nA"})))
    db = load(tmp_path / "b.npz")
    assert db.dims == ("y", "x") and db.attrs["units"] == "nA"
    np.testing.assert_allclose(db["x"].values, [0.0, 1e-6], rtol=1e-12)


def test_npz_shape_mismatch_is_explained(tmp_path):
    np.savez(tmp_path / "t.npz", x=np.arange(3.0), y=np.arange(2.0), signal=np.arange(6.0).reshape(3, 2))
    with pytest.raises(InputError, match=r"t\.npz: gate array 'x' has shape \(3,\), expected \(2,\)"):
        load(tmp_path / "t.npz")


def test_npz_one_d_is_refused(tmp_path):
    np.savez(tmp_path / "t.npz", x=np.arange(3.0), signal=np.arange(3.0))
    with pytest.raises(InputError, match=r"t\.npz: 1-D data"):
        load(tmp_path / "t.npz")


def test_headerless_table_is_refused_with_the_conventions(tmp_path):
    (tmp_path / "h.csv").write_text("0,0,1\n1,0,2\n")
    with pytest.raises(InputError, match=r"h\.csv: the first row holds only numbers; a header row is needed"):
        load(tmp_path / "h.csv")


def test_format_is_found_from_content_not_suffix(tmp_path):
    from _io_data import small_map

    from stabtool.io import save_map

    save_map(small_map(nan_tail=False), tmp_path / "m.nc")
    (tmp_path / "m.nc").rename(tmp_path / "m.data")
    assert detect_format(tmp_path / "m.data") == "netcdf"
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert load(tmp_path / "m.data").name == "sensor"
