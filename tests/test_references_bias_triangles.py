"""Bias-triangle energy reference (stabtool.fit.bias_triangles) against generator truth.

Truth: stabtool.simulate transport read-out (series double dot, sequential
tunnelling, source/drain at ±eV_sd/2). The textbook relation
α_ii = |e V_sd|/δV_gi holds without cross-capacitances (van der Wiel et al.,
RMP 75, 1 (2003)); the general vertex form is checked against it.
"""

from __future__ import annotations

import numpy as np
import pytest

from stabtool.errors import InputError
from stabtool.fit.bias_triangles import fit_bias_triangles
from stabtool.physics.diamonds import lever_arm_from_bias_triangle, lever_arm_matrix_from_triangle

from _references import midpoint, preset_truth, window


def test_vertex_formula_reduces_to_van_der_wiel_without_cross_capacitance():
    # α = diag(0.1, 0.08), V_sd = 0.5 mV: legs δV_g1 = 5 mV along x, δV_g2 = 6.25 mV along y
    a = np.array([0.010, 0.020])
    b = a + np.array([0.0, -0.00625])  # A − B = α⁻¹ (0, V_sd)
    c = a + np.array([0.005, 0.0])  # C − A = α⁻¹ (V_sd, 0)
    alpha = lever_arm_matrix_from_triangle(a, b, c, 0.5e-3)
    np.testing.assert_allclose(alpha, [[0.1, 0.0], [0.0, 0.08]], atol=1e-12)
    assert lever_arm_from_bias_triangle(0.5e-3, 5e-3) == pytest.approx(alpha[0, 0])


def test_vertex_formula_inverts_a_general_lever_arm_matrix():
    alpha = np.array([[0.1, 0.032], [0.026, 0.092]])
    inv = np.linalg.inv(alpha)
    v = -0.4e-3  # negative bias: the same relation with the signed V_sd
    a = np.array([0.02, 0.03])
    c = a + inv @ [v, 0.0]
    b = a - inv @ [0.0, v]
    np.testing.assert_allclose(lever_arm_matrix_from_triangle(a, b, c, v), alpha, rtol=1e-12)


def _first_interdot_midpoint(truth):
    seg = next(s for s in truth.lines if s.family == "interdot")
    return np.array(midpoint(seg))


@pytest.mark.regression
@pytest.mark.parametrize("bias_mV, snr", [(0.5, None), (0.5, 8.0), (-0.5, 8.0)])
def test_generator_triangles_give_lever_arms_within_5_percent(bias_mV, snr):
    truth = preset_truth()
    alpha = np.array(truth.lever_arm)
    c = _first_interdot_midpoint(truth)
    # eV_sd = 0.5 meV < E_Cm ≈ 0.95 meV: the electron and hole triangles stay apart
    sm = window(truth, c, 8e-3, (121, 121), temperature_K=0.02, readout="transport", bias_mV=bias_mV, rng=1)
    data = sm.data
    if snr:
        noise = float(np.percentile(np.abs(sm.clean), 99)) / snr
        data = data + np.random.default_rng(2).normal(0, noise, data.shape)
    fit = fit_bias_triangles(data, bias_V=bias_mV * 1e-3, electron_temperature_K=0.02)
    assert len(fit.triangles) >= 1
    assert fit.quality.ok, fit.quality.warnings
    np.testing.assert_allclose(np.array(fit.lever_arm), alpha, rtol=0.05)


@pytest.mark.regression
def test_hot_electrons_small_bias_is_doubtful():
    truth = preset_truth()
    c = _first_interdot_midpoint(truth)
    sm = window(truth, c, 6e-3, (91, 91), temperature_K=0.1, readout="transport", bias_mV=0.3, rng=1)
    fit = fit_bias_triangles(sm.data, bias_V=0.3e-3, electron_temperature_K=0.1)
    assert not fit.quality.ok
    assert any("thermal rounding" in m for m in fit.quality.warnings)


def test_zero_bias_is_an_input_error():
    import xarray as xr

    da = xr.DataArray(np.zeros((5, 5)), coords={"PB": np.arange(5.0), "PA": np.arange(5.0)}, dims=("PB", "PA"))
    with pytest.raises(InputError, match="non-zero source-drain bias"):
        fit_bias_triangles(da, bias_V=0.0)
