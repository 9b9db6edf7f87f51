"""Lever arms no device can have: an energy scale in the wrong unit is named, not reported.

In the constant-interaction model (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003);
conventions: α = Cdd⁻¹ Cdg) a dot's lever arms to all gates and leads add up to exactly 1, and
none is negative, so the lever arms to the two swept gates add up to at most 1 eV/V. An electron
temperature typed in mK where K is meant (500 for 0.5 K) makes every lever arm and charging
energy 1000 times too large: the result must be doubtful and say why, first.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.fit.scale_verdict import MAX_LEVER_ARM_SUM, impossible_lever_arms


def _ci_lever_arms(rng, n_dots: int, n_gates: int, n_leads: int = 2) -> tuple[np.ndarray, np.ndarray]:
    """α to the gates and to the leads of a random constant-interaction device (capacitances in aF)."""
    cg = rng.uniform(0.5, 20.0, (n_dots, n_gates))
    cl = rng.uniform(1.0, 60.0, (n_dots, n_leads))
    cm = np.triu(rng.uniform(0.0, 15.0, (n_dots, n_dots)), 1)
    cm = cm + cm.T
    # Maxwell capacitance matrix: C_Σ on the diagonal (every capacitance of the dot), −C_m off it
    cdd = np.diag(cg.sum(1) + cl.sum(1) + cm.sum(1)) - cm
    inv = np.linalg.inv(cdd)
    return inv @ cg, inv @ cl


def test_a_dots_lever_arms_to_every_gate_and_lead_add_up_to_one_and_none_is_negative():
    # the bound the check rests on, from the model's definition (not from the check itself)
    rng = np.random.default_rng(5)
    for n_dots, n_gates in ((2, 2), (2, 5), (4, 9)):
        a_gates, a_leads = _ci_lever_arms(rng, n_dots, n_gates)
        np.testing.assert_allclose(a_gates.sum(1) + a_leads.sum(1), 1.0, rtol=1e-12)
        assert np.all(a_gates > 0) and np.all(a_gates.sum(1) < MAX_LEVER_ARM_SUM)


def test_lever_arms_of_a_real_device_pass_and_a_thousandfold_scale_does_not():
    # GaAs double dot of the generator's preset (α11, α12, α21, α22 ≈ 0.070, 0.022, 0.018, 0.064)
    alpha = np.array([[0.070, 0.022], [0.018, 0.064]])
    err = 0.02 * alpha
    assert impossible_lever_arms(alpha, err, reference="electron_temperature", temperature_K=0.5).ok
    q = impossible_lever_arms(1000 * alpha, 1000 * err, reference="electron_temperature", temperature_K=500.0)
    assert not q.ok and len(q.warnings) == 1
    assert q.warnings[0].startswith("lever arms of dot 1 add up to 92 ± 1.5 eV/V; lever arms of dot 2 add up to 82")
    assert "is the electron temperature in kelvin? (500 K given)" in q.warnings[0]


def test_the_sum_is_judged_with_its_error_and_a_diagonal_alone_is_enough():
    # 1.05 ± 0.02: beyond 1 by 2.5σ only, not called impossible; 1.10 ± 0.02 (5σ) is
    assert impossible_lever_arms(np.array([[0.80, 0.25], [0.1, 0.1]]), np.full((2, 2), 0.02 / np.sqrt(2)),
                                 reference="lever_arm").ok
    q = impossible_lever_arms(np.array([[0.85, 0.25], [0.1, 0.1]]), np.full((2, 2), 0.02 / np.sqrt(2)),
                              reference="lever_arm")
    assert not q.ok and "dot 1" in q.warnings[0] and "check the energy reference (lever_arm)" in q.warnings[0]
    # only the diagonal known (no virtual-gate matrix): α22 = 3 alone is impossible; NaN is skipped
    q = impossible_lever_arms(np.array([np.nan, 3.0]), np.array([np.nan, 0.1]), reference="lever_arm_file")
    assert not q.ok and len(q.warnings) == 1
    assert q.warnings[0].startswith("lever arm α22 = 3 ± 0.1 eV/V: above 1 eV/V, impossible")


@pytest.mark.regression
def test_an_electron_temperature_in_millikelvin_makes_the_analysis_doubtful_and_says_why_first():
    from stabtool.analysis import Analyzer
    from stabtool.simulate.quick import quick_double_dot

    sm = quick_double_dot("gaas-double", shape=(100, 100), snr=30, temperature_K=0.5, rng=3, electrons=3.0)
    truth = np.asarray(sm.truth.quantities["lever_arm"], float)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        right = Analyzer(electron_temperature_K=0.5, refine=False, tunnel_coupling=False)(sm.data).to_json()
        slip = Analyzer(electron_temperature_K=500.0, refine=False, tunnel_coupling=False)(sm.data).to_json()
    # in kelvin: lever arms near the generator's (the fitter's 5 % bound), nothing called impossible
    assert np.allclose(np.diag(right["lever_arm"]), np.diag(truth), rtol=0.05)
    assert not any("add up to" in w for w in right["quality"]["warnings"])
    # in mK by mistake: 1000 times too large, doubtful, and the first warning says why
    assert np.diag(slip["lever_arm"]).min() > 10
    assert slip["quality"]["ok"] is False
    assert "(500 K given)" in slip["quality"]["warnings"][0]


def test_a_diamond_map_whose_bias_is_in_millivolts_read_as_volts_is_doubtful_and_says_why():
    # Coulomb diamonds of the references' worked example (α = C_G/C_Σ = 0.125, m₊ = 0.2, m₋ = −1/3):
    # the bias axis scaled by 1000 (a bias in mV stored without its unit) makes α 125 eV/V
    from stabtool.analysis import Analyzer
    from stabtool.errors import QualityWarning
    from stabtool.simulate.diamonds import coulomb_diamonds

    dm = coulomb_diamonds(snr=30, rng=0, shape=(101, 201))
    bias = dm.data.dims[0]
    right = Analyzer()(dm.data)
    assert right.quality.ok and right.fit.lever_arm == pytest.approx(0.125, rel=0.03)
    slip = dm.data.assign_coords({bias: dm.data[bias] * 1000}).assign_attrs(source="diamonds_PG.nc")
    with pytest.warns(QualityWarning, match=r"diamonds_PG\.nc: analysis doubtful: lever arm α11 = 12\d"):
        res = Analyzer()(slip)
    assert not res.quality.ok
    assert "is the bias axis in volts?" in res.quality.warnings[0]


def test_gate_voltages_in_millivolts_read_as_volts_below_the_loaders_limit_are_named():
    # plungers of 35–40 aF put the transitions 4–5 mV apart (ΔV = e/Cdg): four of them span under
    # 20 mV, so the same map read as volts stays below the loader's 20 V check; its capacitances are
    # 1000 times too small, below the 0.1 aF (1.6 V per electron) of any plunger (common practice,
    # no source)
    from _simulate import double_dot_charge_map

    from stabtool.analysis import Analyzer

    da = double_dot_charge_map([[40.0, 8.0], [6.0, 35.0]], [[120.0, -8.0], [-8.0, 110.0]], electrons=4.0,
                               shape=(100, 100), temperature_K=0.05).data
    slip = da.assign_coords({d: da[d] * 1000 for d in da.dims})
    assert max(float(abs(slip[d]).max()) for d in slip.dims) < 20.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        right = Analyzer(refine=False)(da).to_json()
        wrong = Analyzer(refine=False)(slip).to_json()
    named = [w for w in wrong["quality"]["warnings"] if "are the gate voltages in volts?" in w]
    assert wrong["quality"]["ok"] is False and len(named) == 2 and named[0].startswith("gate capacitance Cdg11")
    assert not any("are the gate voltages in volts?" in w for w in right["quality"]["warnings"])
    assert np.asarray(right["gate_capacitance_aF"], float)[0, 0] == pytest.approx(40.0, rel=0.02)
