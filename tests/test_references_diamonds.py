"""Coulomb-diamond energy reference (stabtool.fit.diamonds) against generator truth.

Truth: stabtool.simulate.coulomb_diamonds (sequential-tunnelling current of a
single dot). Bound from the specification: lever arm within 3 %; the charging
(addition) energy within 5 %.
"""

from __future__ import annotations

import numpy as np
import pytest

from stabtool.errors import InputError
from stabtool.fit.diamonds import fit_coulomb_diamonds
from stabtool.simulate import coulomb_diamonds


@pytest.mark.regression
@pytest.mark.parametrize(
    "caps, snr, seed",
    [
        ((10.0, 30.0, 40.0), None, 0),  # the worked example: m+ = 0.2, m- = -1/3, α = 0.125
        ((10.0, 30.0, 40.0), 5.0, 1),
        ((6.0, 50.0, 20.0), 10.0, 4),
        ((12.0, 20.0, 60.0), 8.0, 5),
    ],
)
def test_diamond_lever_arm_within_3_percent(caps, snr, seed):
    cg, cs, cd = caps
    width = 0.16022 / cg  # e/C_G in V
    dm = coulomb_diamonds(c_gate_aF=cg, c_source_aF=cs, c_drain_aF=cd, snr=snr, rng=seed,
                          gate_range_V=(0.0, 3.7 * width), shape=(101, 201))
    fit = fit_coulomb_diamonds(dm.data)
    t = dm.truth
    assert fit.quality.ok, fit.quality.warnings
    assert fit.lever_arm == pytest.approx(t.lever_arm, rel=0.03)
    assert fit.slope_plus == pytest.approx(t.slope_plus, rel=0.05)
    assert fit.slope_minus == pytest.approx(t.slope_minus, rel=0.05)
    assert fit.addition_voltage_V == pytest.approx(t.addition_voltage_V, rel=0.02)
    assert fit.addition_energy_meV == pytest.approx(t.charging_energy_meV, rel=0.05)
    # capacitances (aF) follow from slopes and ΔV_G
    assert fit.capacitances.gate_aF == pytest.approx(cg, rel=0.05)
    assert fit.capacitances.total_aF == pytest.approx(cg + cs + cd, rel=0.05)
    ratios = np.array([fit.capacitances.gate, fit.capacitances.source, fit.capacitances.drain])
    truth_ratios = np.array([cg, cs, cd]) / (cg + cs + cd)
    assert np.all(np.abs(ratios - truth_ratios) < 4 * np.array(fit.capacitance_ratio_stderr) + 1e-3)


@pytest.mark.regression
def test_quality_turns_false_before_the_error_exceeds_3_percent():
    """Sweep the SNR down: whenever the verdict is ok, the lever arm is within 3 %."""
    seen_false = False
    for snr in (10.0, 5.0, 3.0, 2.0, 1.5, 1.0):
        for seed in (0, 1):
            dm = coulomb_diamonds(snr=snr, rng=seed, shape=(101, 201))
            fit = fit_coulomb_diamonds(dm.data)
            if fit.quality.ok:
                assert fit.lever_arm == pytest.approx(dm.truth.lever_arm, rel=0.03), (snr, seed)
            else:
                seen_false = True
    assert seen_false, "the sweep never reached a doubtful verdict"


def test_no_diamond_gives_a_failed_result():
    dm = coulomb_diamonds(rng=0, shape=(41, 81))
    flat = dm.data * 0.0 + np.random.default_rng(0).normal(0, 1.0, dm.data.shape)
    fit = fit_coulomb_diamonds(flat)
    assert not fit and not fit.quality.ok


def test_bias_axis_must_span_zero():
    dm = coulomb_diamonds(bias_range_mV=(0.5, 3.0), shape=(21, 41))
    with pytest.raises(InputError, match="must span zero"):
        fit_coulomb_diamonds(dm.data)
