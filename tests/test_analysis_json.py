"""The JSON object of ``stabtool analyze --json`` follows the conventions file exactly."""

import json
import pickle

import numpy as np
import pytest

from stabtool.analysis import AnalysisResult, Analyzer, analyze
from stabtool.simulate import quick_double_dot

REQUIRED = {
    "x_gate", "y_gate", "slopes", "slope_errors", "virtual_gate_matrix", "addition_voltages_V",
    "mutual_shifts_V", "gate_capacitance_aF", "lever_arm", "charging_energy_meV", "energy_reference", "quality",
}


@pytest.fixture(scope="module")
def small_map():
    return quick_double_dot("gaas-double", shape=(128, 128), snr=None, rng=0).data


def _check_shape(j: dict, *, scaled: bool) -> None:
    assert REQUIRED <= set(j)
    assert isinstance(j["x_gate"], str) and isinstance(j["y_gate"], str)
    assert set(j["slopes"]) == set(j["slope_errors"]) == {"dot1", "dot2", "interdot"}
    assert np.shape(j["virtual_gate_matrix"]) == (2, 2)
    assert np.shape(j["gate_capacitance_aF"]) == (2, 2)
    assert set(j["addition_voltages_V"]) == set(j["mutual_shifts_V"]) == {"dot1", "dot2"}
    assert set(j["charging_energy_meV"]) == {"dot1", "dot2", "mutual"}
    assert set(j["quality"]) == {"ok", "warnings"}
    assert isinstance(j["quality"]["ok"], bool) and isinstance(j["quality"]["warnings"], list)
    if scaled:
        assert np.shape(j["lever_arm"]) == (2, 2)
        assert isinstance(j["energy_reference"], str)
    else:
        # without an energy reference lever arms and energies are null, not guessed
        assert j["lever_arm"] is None
        assert j["energy_reference"] is None
        assert all(v is None for v in j["charging_energy_meV"].values())
    json.dumps(j, allow_nan=False)  # strict JSON: no NaN anywhere


def test_keys_and_shapes_without_reference(small_map):
    res = Analyzer(refine=False)(small_map)
    assert isinstance(res, AnalysisResult)
    j = res.to_json()
    _check_shape(j, scaled=False)
    assert j["x_gate"] == "PA" and j["y_gate"] == "PB"
    assert "virtual_gate_matrix_error" in j and "gate_capacitance_aF_error" in j


def test_keys_and_shapes_with_lever_arm(small_map):
    res = analyze(small_map, lever_arm=(0.08, 0.07), refine=False)
    j = res.to_json()
    _check_shape(j, scaled=True)
    assert j["energy_reference"] == "lever_arm"
    # α = diag(α11, α22) · M, E_C1 = α11 ΔV1 (conventions file)
    m = np.array(j["virtual_gate_matrix"])
    np.testing.assert_allclose(j["lever_arm"], np.diag([0.08, 0.07]) @ m, rtol=1e-12)
    assert j["charging_energy_meV"]["dot1"] == pytest.approx(1e3 * 0.08 * j["addition_voltages_V"]["dot1"])


def test_doubtful_map_still_gives_the_full_object():
    # pure noise: no lines, never an exception, quality false with reasons
    rng = np.random.default_rng(0)
    from stabtool.mapdata import make_map

    da = make_map(rng.normal(size=(48, 48)), np.linspace(0, 0.1, 48), np.linspace(0, 0.1, 48),
                  x_gate="PA", y_gate="PB")
    res = Analyzer(refine=False)(da)
    j = res.to_json()
    assert j["quality"]["ok"] is False and j["quality"]["warnings"]
    assert REQUIRED <= set(j)


def test_analyzer_is_picklable_with_readable_repr():
    an = Analyzer(electron_temperature_K=0.1, refine=False)
    clone = pickle.loads(pickle.dumps(an))
    assert repr(clone) == repr(an)
    assert "electron_temperature_K=0.1" in repr(an)


def test_bad_options_name_the_parameter():
    from stabtool.errors import InputError

    with pytest.raises(InputError, match="lever_arm"):
        Analyzer(lever_arm=(0.1, 2.0))
    with pytest.raises(InputError, match="electron_temperature_K"):
        Analyzer(electron_temperature_K=-1)


def test_to_dataset_holds_map_and_results(small_map):
    ds = Analyzer(refine=False)(small_map).to_dataset()
    assert ds["gate_capacitance_aF"].shape == (2, 2)
    assert "analysis_json" in ds.attrs
    assert set(json.loads(ds.attrs["analysis_json"])) >= REQUIRED


def test_lever_arm_file_sets_the_scale(small_map, tmp_path):
    from stabtool.calibrate.result import user_lever_arm, write_lever_arm_file

    path = tmp_path / "pa.json"
    write_lever_arm_file(user_lever_arm(0.08, gate="PA", stderr=0.001), path)
    res = Analyzer(lever_arm_file=path, refine=False)(small_map)
    j = res.to_json()
    assert j["energy_reference"] == "lever_arm_file"
    if res.diagram.mutual_resolved:
        # α22 = α11 / (α11/α22) with α11/α22 = δ2/δ1 (conventions file)
        assert j["lever_arm"][1][1] == pytest.approx(0.08 / res.diagram.alpha_ratio, rel=1e-9)
    assert j["lever_arm"][0][0] == pytest.approx(0.08)
