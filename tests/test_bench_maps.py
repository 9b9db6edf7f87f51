"""Benchmark maps: the artefact of each case is really in the map, lines are resolved, no truth leaks."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import constants

from stabtool.bench.grid import ARTEFACTS, BenchCase
from stabtool.bench.maps import FWHM_RANGE_PX, make_case_map


def _case(artefact, *, preset="si-sige-double", snr=10.0, seed=4, size=64):
    return BenchCase(index=0, snr=snr, preset=preset, artefact=artefact, seed=seed, size_px=size)


@pytest.mark.parametrize("preset", ["gaas-double", "si-mos-double", "si-sige-double", "ge-double"])
def test_thermal_lines_span_three_to_five_pixels(preset):
    m = make_case_map(_case("none", preset=preset))
    t = m.truth.to_json()
    alpha = np.asarray(t["lever_arm"], float)
    da = m.data
    dx = abs(float(np.median(np.diff(da[da.dims[-1]].values))))
    dy = abs(float(np.median(np.diff(da[da.dims[0]].values))))
    # Fermi–Dirac: FWHM of −df/dV = 4 ln(1+√2) k_B T / (e α) (references file, "Thermal broadening");
    # constants from scipy.constants (CODATA).
    fwhm_v = 4 * np.log(1 + np.sqrt(2)) * constants.k * m.truth.temperature_K / constants.e
    px1 = fwhm_v / alpha[0, 0] / dx
    px2 = fwhm_v / alpha[1, 1] / dy
    lo, hi = FWHM_RANGE_PX
    assert lo - 1e-9 <= min(px1, px2) <= hi + 1e-9
    assert m.bench_info["fwhm_px_dot1_x"] == pytest.approx(px1, rel=1e-6)
    assert m.bench_info["temperature_K"] == m.truth.temperature_K


def test_truth_does_not_travel_with_the_map():
    m = make_case_map(_case("none"))
    assert "stabtool_truth" not in m.data.attrs
    assert m.truth.to_json()["virtual_gate_matrix"] is not None


def test_partial_sweep_loses_trailing_rows():
    da = make_case_map(_case("partial-sweep")).data
    rows_nan = np.isnan(da.values).all(axis=1)
    assert rows_nan[-1] and not rows_nan[0]
    assert rows_nan.mean() == pytest.approx(0.3, abs=0.03)


def test_decreasing_anisotropic_axes():
    da = make_case_map(_case("decreasing-anisotropic", size=64)).data
    x = da[da.dims[-1]].values
    y = da[da.dims[0]].values
    assert np.all(np.diff(x) < 0) and np.all(np.diff(y) < 0)
    assert da.shape == (48, 64)
    ratio = abs(np.diff(y).mean() / np.diff(x).mean())
    assert ratio != pytest.approx(1.0, abs=0.05)  # unequal steps


def test_cases_are_reproducible_and_artefacts_differ():
    a = make_case_map(_case("telegraph", seed=9)).data.values
    b = make_case_map(_case("telegraph", seed=9)).data.values
    np.testing.assert_array_equal(a, b)
    maps = {art: make_case_map(_case(art, seed=9)).truth.to_json()["artefacts"] for art in ARTEFACTS}
    assert maps["none"].get("row_noise", 0) == 0
    assert maps["one-over-f"]["row_noise"] == 0.3
    assert maps["telegraph"]["telegraph"] == 0.5
    assert maps["jump"]["charge_jumps"] == 1
