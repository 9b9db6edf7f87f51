"""CSV long format: header styles, column choice, any sweep order, jitter, partial sweeps."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from _io_data import write_long

from stabtool.errors import PartialSweepWarning
from stabtool.io import load

X = np.array([-2.0, -1.0, 0.0, 1.0])  # mV
Y = np.array([10.0, 20.0, 30.0])  # mV


def f(x, y):
    return 100 * y + x  # distinct value per point: misplaced points are seen


def rows(order="raster_x", *, jitter=0.0, rng=None):
    out = []
    if order == "raster_x":
        for y in Y:
            for x in X:
                out.append((x, y))
    elif order == "raster_y":
        for x in X:
            for y in Y:
                out.append((x, y))
    elif order == "serpentine_x":
        for i, y in enumerate(Y):
            for x in (X if i % 2 == 0 else X[::-1]):
                out.append((x, y))
    elif order == "down":
        for y in Y[::-1]:
            for x in X[::-1]:
                out.append((x, y))
    elif order == "shuffled":
        out = [(x, y) for y in Y for x in X]
        out = [out[i] for i in np.random.default_rng(1).permutation(len(out))]
    res = []
    for x, y in out:
        jx, jy = (rng.uniform(-jitter, jitter, 2) if rng is not None else (0.0, 0.0))
        res.append((repr(float(x + jx)), repr(float(y + jy)), float(f(x, y))))
    return res


@pytest.mark.parametrize("order", ["raster_x", "raster_y", "serpentine_x", "shuffled"])
def test_grid_is_rebuilt_whatever_the_order(tmp_path, order):
    da = load(write_long(tmp_path / "m.csv", rows(order)))
    if order == "shuffled":  # no measured direction to keep: compare in increasing order
        da = da.sortby(["PA", "PB"])
    assert da.dims == ("PB", "PA")
    np.testing.assert_allclose(da["PA"].values, X * 1e-3, rtol=1e-12)
    np.testing.assert_allclose(da["PB"].values, Y * 1e-3, rtol=1e-12)
    np.testing.assert_array_equal(da.values, f(X[None, :], Y[:, None]))


def test_decreasing_sweep_is_kept_as_measured(tmp_path):
    da = load(write_long(tmp_path / "m.csv", rows("down")))
    np.testing.assert_allclose(da["PA"].values, X[::-1] * 1e-3, rtol=1e-12)
    np.testing.assert_allclose(da["PB"].values, Y[::-1] * 1e-3, rtol=1e-12)
    np.testing.assert_array_equal(da.values, f(X[None, ::-1], Y[::-1, None]))


def test_jittered_setpoints_snap_to_the_grid(tmp_path):
    rng = np.random.default_rng(3)
    da = load(write_long(tmp_path / "m.csv", rows("serpentine_x", jitter=0.01, rng=rng)))
    assert da.shape == (3, 4)
    # cluster centres are medians of the read-backs: within the jitter of the set-points
    np.testing.assert_allclose(da["PA"].values, X * 1e-3, rtol=0, atol=0.01e-3)
    np.testing.assert_array_equal(da.values, f(X[None, :], Y[:, None]))
    assert da.attrs["setpoints_snapped"] == 1


def test_final_incomplete_sweep_line_is_nan_with_warning(tmp_path):
    r = rows("serpentine_x")[:-2]
    with pytest.warns(PartialSweepWarning, match=r"m.csv: the sweep is incomplete: 2 of 12"):
        da = load(write_long(tmp_path / "m.csv", r))
    assert np.isnan(da.values).sum() == 2
    # the serpentine's third line runs upwards in x again, so the two largest x are missing
    assert np.isnan(da.values[2, 2:]).all() and np.isfinite(da.values[:2]).all()


@pytest.mark.parametrize(
    "header",
    ["PA (mV),PB (mV),sensor (nA)", "PA [mV],PB [mV],sensor [nA]", "PA_mV,PB_mV,sensor_nA",
     "PA / mV;PB / mV;sensor / nA", "PA (mV)\tPB (mV)\tsensor (nA)", "PA (mV) PB (mV) sensor (nA)"],
)
def test_header_styles_and_delimiters(tmp_path, header):
    delim = ";" if ";" in header else "\t" if "\t" in header else " " if ") P" in header else ","
    text = header + "\n" + "\n".join(delim.join(map(str, r)) for r in rows()) + "\n"
    (tmp_path / "m.txt").write_text(text)
    da = load(tmp_path / "m.txt")
    assert da.dims == ("PB", "PA") and da.name == "sensor" and da.attrs["units"] == "nA"
    assert da["PA"].attrs["original_units"] == "mV"
    np.testing.assert_allclose(da["PA"].values, X * 1e-3, rtol=1e-12)


def test_volts_without_unit_and_columns_chosen_by_name(tmp_path):
    body = [(y * 1e-3, 7.0, x * 1e-3, v) for x, y, v in ((float(a), float(b), c) for a, b, c in rows())]
    path = tmp_path / "m.csv"
    path.write_text("PB,phase (deg),PA,sensor (nA)\n" + "\n".join(",".join(map(repr, r)) for r in body))
    da = load(path, x="PA", y="PB", var="sensor")
    assert da.dims == ("PB", "PA")
    assert da["PA"].attrs["original_units"] == "V"
    np.testing.assert_array_equal(da.values, f(X[None, :], Y[:, None]))


def test_unequal_steps_kept(tmp_path):
    xs = np.array([0.0, 1.0, 3.0, 7.0])
    path = tmp_path / "m.csv"
    path.write_text("PA (mV),PB (mV),s\n" + "\n".join(f"{x},{y},{x * y + 1}" for y in (1.0, 2.0) for x in xs))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        da = load(path)
    np.testing.assert_allclose(da["PA"].values, xs * 1e-3, rtol=1e-12)
    assert da.attrs["units"] == "a.u."


def test_final_text_line_cut_short_counts_as_not_measured(tmp_path):
    text = "PA (mV),PB (mV),s\n0,0,1\n1,0,2\n0,1,3\n1,"
    (tmp_path / "cut.csv").write_text(text)
    with pytest.warns(PartialSweepWarning) as record:
        da = load(tmp_path / "cut.csv")
    messages = [str(w.message) for w in record]
    assert any("cut.csv: the final line 5 is cut short" in m for m in messages), messages
    assert da.shape == (2, 2) and np.isnan(da.values[1, 1]) and da.values[1, 0] == 3


def test_jitter_comparable_to_the_step_is_refused(tmp_path):
    from stabtool.errors import InputError

    rng = np.random.default_rng(5)
    r = rows("raster_x", jitter=0.45, rng=rng)  # x step is 1 mV
    with pytest.raises(InputError, match=r"m\.csv: .*(do not (fall on|form) a (clean )?grid|scatter by up to)"):
        load(write_long(tmp_path / "m.csv", r))
