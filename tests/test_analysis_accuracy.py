"""Closed-loop accuracy of the whole pipeline on generator maps (fixed seeds).

Truth: stabtool.simulate (constant-interaction model of van der Wiel et al.,
Rev. Mod. Phys. 75, 1 (2003)); tolerances from the project's goals.
"""

import warnings

import numpy as np
import pytest

from stabtool.analysis import Analyzer
from stabtool.physics import FERMI_FWHM_FACTOR
from stabtool.simulate import quick_double_dot

#: Promise of an ok verdict: virtual-gate elements within 0.02, Cdg within 2 %,
#: lever arms and charging energies within 5 %.
OK_BOUNDS = {"vg": 0.02, "cdg": 0.02, "alpha": 0.05, "ec": 0.05}


def _run(preset, *, snr, seed, temperature_K=None, **kw):
    sm = quick_double_dot(preset, snr=snr, rng=seed, temperature_K=temperature_K)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = Analyzer(**kw)(sm.data)
    return sm, res.to_json(), res


def _errors(j, truth):
    m = np.array(j["virtual_gate_matrix"], float)
    cdg = np.array(j["gate_capacitance_aF"], float)
    out = {
        "vg": float(np.max(np.abs(m - np.array(truth["virtual_gate_matrix"])))),
        # every element relative to itself (off-diagonal elements included)
        "cdg": float(np.max(np.abs(cdg / np.array(truth["gate_capacitance_aF"]) - 1))),
    }
    if j["lever_arm"] is not None:
        a, at = np.diag(np.array(j["lever_arm"], float)), np.diag(np.array(truth["lever_arm"]))
        out["alpha"] = float(np.max(np.abs(a / at - 1)))
        ec, ect = j["charging_energy_meV"], truth["charging_energy_meV"]
        out["ec"] = max(abs(ec[k] / ect[k] - 1) for k in ("dot1", "dot2"))
    return out


@pytest.mark.regression
@pytest.mark.parametrize("preset", ["gaas-double", "ge-double", "si-sige-double", "si-mos-double"])
def test_clean_maps(preset):
    sm, j, _ = _run(preset, snr=None, seed=0, refine=False)
    err = _errors(j, sm.truth.to_json())
    # goal 0.005 (measured 0.0003-0.0015 on seed 0)
    assert err["vg"] < 0.005
    assert err["cdg"] < 0.02
    if j["quality"]["ok"]:
        assert err["vg"] <= OK_BOUNDS["vg"]


@pytest.mark.regression
def test_clean_map_is_reported_ok():
    # the verdict is not always false: a clean Ge map passes every check (with the model fit to
    # the map, as by default; the line-based error alone is 0.0023 here, above 0.005/3)
    _, j, _ = _run("ge-double", snr=None, seed=1, refine=True)
    assert j["quality"]["ok"], j["quality"]["warnings"]


@pytest.mark.regression
def test_snr3_maps():
    # SNR 3 (step / noise std): the goal is 0.02 on the virtual-gate elements; maps where
    # the detector finds too few lines are (correctly) reported doubtful instead
    reached = 0
    for seed in (0, 1):
        sm, j, _ = _run("ge-double", snr=3.0, seed=seed, refine=False)
        err = _errors(j, sm.truth.to_json())
        if err["vg"] < 0.02 and err["cdg"] < 0.02:
            reached += 1
        elif j["quality"]["ok"]:
            pytest.fail(f"seed {seed}: ok verdict with errors {err}")
    assert reached >= 1


@pytest.mark.regression
def test_lever_arms_and_charging_energies_from_electron_temperature():
    # 3 K: Fermi width k_B T/(e α) = 2.6 mV ≈ 5 px FWHM on this map (thermal.py formula)
    sm, j, _res = _run("si-sige-double", snr=30.0, seed=2, temperature_K=3.0, refine=False,
                      electron_temperature_K=3.0)
    assert j["energy_reference"] == "electron_temperature"
    px = abs(float(np.median(np.diff(sm.data[sm.data.dims[-1]].values))))
    assert FERMI_FWHM_FACTOR * j["energy_reference_details"]["width_dot1_V"] / px >= 3
    err = _errors(j, sm.truth.to_json())
    # goal 5 % (measured ≈ 1 %)
    assert err["alpha"] < 0.05
    assert err["ec"] < 0.05


def test_without_reference_no_scale_is_guessed():
    _sm, j, _ = _run("ge-double", snr=None, seed=0, refine=False)
    assert j["lever_arm"] is None and j["energy_reference"] is None


@pytest.mark.slow
@pytest.mark.regression
def test_no_ok_result_beyond_bounds_while_snr_falls():
    """Sweep the SNR down: an ok verdict always keeps its promise, and the verdict turns false."""
    n_ok = 0
    for preset in ("gaas-double", "ge-double", "si-sige-double", "si-mos-double"):
        verdicts = []
        for snr in (None, 30.0, 10.0, 5.0, 3.0, 2.0, 1.0, 0.5):
            for seed in (0, 1):
                sm, j, _ = _run(preset, snr=snr, seed=seed, refine=True)
                err = _errors(j, sm.truth.to_json())
                verdicts.append(j["quality"]["ok"])
                if j["quality"]["ok"]:
                    n_ok += 1
                    for k, v in err.items():
                        # the goal on the virtual-gate elements is 0.005 on clean maps (SNR ≥ 10)
                        bound = 0.005 if k == "vg" and (snr is None or snr >= 10) else OK_BOUNDS[k]
                        assert v <= bound, (preset, snr, seed, k, v)
        assert not any(verdicts[-4:]), preset  # SNR ≤ 1: never ok
    assert n_ok >= 3  # the verdict is not always false


def test_sharp_lines_give_no_temperature_lever_arm():
    # 0.1 K on a 1 mV grid: k_B T/(e α) ≈ 0.09 mV, far below a pixel → no guess
    _sm, j, _ = _run("ge-double", snr=None, seed=1, refine=False, electron_temperature_K=0.1)
    assert j["lever_arm"] is None and j["charging_energy_meV"]["dot1"] is None
    # a null is not a doubtful number: the note says why, the verdict is about what is reported
    assert any("resolution-limited" in w for w in j["quality"]["warnings"])
