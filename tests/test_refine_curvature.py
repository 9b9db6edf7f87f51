"""Sensor curvature in the global refinement (stabtool.fit.refine): tilted mixing of the state levels.

A charge sensor that sits at the *mean* charge reads ``g(d_V − κ·⟨N⟩)`` across
a thermally broadened transition; one that follows every charge switch reads
the probability-weighted mix of the states' levels, ``Σ p_N g(d_N)``. To second
order ``g(⟨d⟩) = ⟨g(d)⟩ − ½ g'' Var(d)`` (Taylor expansion about the mean;
standard, e.g. the delta method, from memory). These tests check the analytic
Jacobian of the tilted model; that on a map read at the mean charge through a
curved sensor the tilted fit loses the bias the linear mix leaves, and on a
state-averaged map the linear mix is unbiased; that the reported estimate is
half-way between the two with the truth inside its stated errors either way;
and that a linear read-out is left as it was.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.fit import refine as R

#: Quadratic sensor g(q) = q + A q² of the ideal charge read-out q = ⟨N1⟩ + 0.65 ⟨N2⟩
#: (the generator's "charge" read-out, weights = sensor couplings 0.6 and 0.39 mV over the larger).
A_QUAD = 0.1
KAPPA_RATIO = 1.0 / 0.65


def _problem_with_tilt():
    rng = np.random.default_rng(0)
    theta = np.array([0.12, 0.15, 0.02, 0.024, 0.003, 1.1, 0.001, 0.002, 6e-4])
    x, y = rng.uniform(0, 0.06, 3000), rng.uniform(0, 0.06, 3000)
    xn, yn = (x - x.mean()) / np.ptp(x), (y - y.mean()) / np.ptp(y)
    prob = R._Problem(x, y, np.zeros_like(x), np.zeros(x.size, int), (None, None), xn, yn)
    # a relative curvature that changes with the charge (linear and quadratic terms) and is clipped
    prob.tilt = R._Tilt(np.array([0.2, 0.1, -0.15]), 1.4, -0.3, 0.5, 12, 3.0)
    a, states = prob.design(theta)
    coef = rng.normal(size=a.shape[1])
    return prob, theta, a, states, coef


def test_tilted_design_matches_the_model():
    prob, theta, a, states, coef = _problem_with_tilt()
    pred, _, _ = R._model_and_jacobian(prob.px, prob.py, prob.phi, theta, coef, states, (None, None))
    np.testing.assert_allclose(pred, a @ coef, rtol=0, atol=1e-12 * np.max(np.abs(pred)))


def test_tilted_jacobian_matches_finite_differences():
    # central differences of the model at fixed linear coefficients (common practice, no source)
    prob, theta, _, states, coef = _problem_with_tilt()
    _, jac, _ = R._model_and_jacobian(prob.px, prob.py, prob.phi, theta, coef, states, (None, None), jac=True)
    for i in range(9):
        h = 1e-6 * max(abs(theta[i]), 1e-3)
        tp, tm = theta.copy(), theta.copy()
        tp[i] += h
        tm[i] -= h
        fp = R._model_and_jacobian(prob.px, prob.py, prob.phi, tp, coef, states, (None, None))[0]
        fm = R._model_and_jacobian(prob.px, prob.py, prob.phi, tm, coef, states, (None, None))[0]
        fd = (fp - fm) / (2 * h)
        scale = np.max(np.abs(jac[:, i]))
        # a pixel whose 9-state window switches within ±h differs at the 1e-5 level (also without tilt)
        np.testing.assert_allclose(jac[:, i], fd, rtol=0, atol=1e-4 * scale, err_msg=R.PARAM_NAMES[i])
        assert np.median(np.abs(jac[:, i] - fd)) < 1e-8 * scale, R.PARAM_NAMES[i]


def _truth_vector(tj):
    return np.array([tj["virtual_gate_matrix"][0][1], tj["virtual_gate_matrix"][1][0],
                     tj["addition_voltages_V"]["dot1"], tj["mutual_shifts_V"]["dot1"],
                     tj["addition_voltages_V"]["dot2"], tj["mutual_shifts_V"]["dot2"]])


@pytest.fixture(scope="module")
def read_outs():
    """The same generator map (lines ≈ 1 px broad) read linearly and through a quadratic sensor.

    ``curved``: the sensor at the mean charge, ``g(⟨q⟩)``; ``averaged``: the
    sensor's signal averaged over the charge states, ``Σ_s p_s g(q_s)``.
    """
    from stabtool.fit.model import fit_diagram
    from stabtool.lines import detect_lines
    from stabtool.simulate import quick_double_dot

    sm = quick_double_dot("gaas-double", shape=(112, 112), temperature_K=0.6, readout="charge", snr=None, rng=3)
    q = sm.data.values - float(np.mean(sm.data.values))
    offset = float(np.mean(sm.data.values))
    # the same read-out state by state: q of each charge state at the mixed pixels
    st = sm.states
    weights = np.array([1.0, 0.65])
    ground = sm.truth.charge_state.reshape(-1, 2)[st.pixels].astype(float)
    q_states = (ground[:, None, :] + st.moves[None, :, :]) @ weights - offset  # (P, K)
    averaged = q + A_QUAD * q * q
    averaged.reshape(-1)[st.pixels] = np.sum(st.probability * (q_states + A_QUAD * q_states**2), axis=1)
    noise = np.random.default_rng(1).normal(0.0, 0.003, q.shape)  # SNR ≈ 200 on the dot2 step
    out = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for name, z in (("linear", q + noise), ("curved", q + A_QUAD * q * q + noise), ("averaged", averaged + noise)):
            da = sm.data.copy(data=z)
            fit = fit_diagram(detect_lines(da), data=da)
            assert fit.ok, fit.quality.warnings
            out[name] = {flag: R.refine_model(da, fit, sensor_curvature=flag) for flag in (False, True)}
    return _truth_vector(sm.truth.to_json()), out


def _rel_errors(vec, truth):
    return vec[2:] / truth[2:] - 1  # ΔV1, δ1, ΔV2, δ2


def _mean_field_fit(ref):
    """(M12, M21, ΔV1, δ1, ΔV2, δ2) of the tilted (mean-charge) fit, from the hedged record."""
    half = ref.curvature["response"]["half_difference"]
    p = {k: ref.params[k] - half[k] for k in R.PARAM_NAMES}
    return np.array([p["M12"], p["M21"], p["addition_V1"], p["mutual_V1"], p["addition_V2"],
                     p["mutual_V1"] / p["alpha_ratio_22_11"]])


def test_states_of_the_generator_give_its_mean_occupation():
    # Σ_s p_s N_s over the stored state probabilities is the mean occupation the map was read from
    from stabtool.simulate import quick_double_dot

    sm = quick_double_dot("gaas-double", shape=(40, 40), temperature_K=0.6, readout="charge", snr=None, rng=3)
    st = sm.states
    assert st.pixels.size > 0
    np.testing.assert_allclose(st.probability.sum(axis=1), 1.0, atol=1e-12)
    ground = sm.truth.charge_state.reshape(-1, 2)[st.pixels].astype(float)
    mean = ground + st.probability @ st.moves
    np.testing.assert_allclose(mean @ np.array([1.0, 0.65]), sm.clean.reshape(-1)[st.pixels], atol=1e-12)


@pytest.mark.regression
def test_curved_sensor_bias_of_the_addition_voltages_is_removed_by_the_mean_field_fit(read_outs):
    truth, out = read_outs
    plain, tilted = out["curved"][False], out["curved"][True]
    assert plain.ok and tilted.ok, (plain.quality.warnings, tilted.quality.warnings)
    assert tilted.curvature is not None
    # the sensor's relative shift per electron κ1/κ2 (generator couplings 0.6 and 0.39 mV)
    assert tilted.curvature["kappa_ratio_12"] == pytest.approx(KAPPA_RATIO, rel=0.02)
    e_plain, e_tilt = _rel_errors(plain.vector()[0], truth), _rel_errors(_mean_field_fit(tilted), truth)
    # linear mixing: ΔV1 biased (measured on this map −0.064 %); tilted: an order less (−0.009 %)
    assert abs(e_plain[0]) > 3e-4
    assert abs(e_tilt[0]) < 0.3 * abs(e_plain[0])
    assert abs(e_tilt[0]) < 2e-4 and abs(e_tilt[2]) < 2e-4
    # mutual shifts (measured: δ1 −0.16 → +0.02 %, δ2 −0.20 → −0.07 %)
    assert abs(e_tilt[1]) < abs(e_plain[1]) and abs(e_tilt[1]) < 1e-3
    assert abs(e_tilt[3]) < abs(e_plain[3]) and abs(e_tilt[3]) < 1.5e-3
    # and the refined virtual gates stay within 0.001 of the truth
    np.testing.assert_allclose(_mean_field_fit(tilted)[:2], truth[:2], atol=1e-3)


@pytest.mark.regression
def test_state_averaged_sensor_is_fitted_by_linear_mixing(read_outs):
    truth, out = read_outs
    plain, tilted = out["averaged"][False], out["averaged"][True]
    assert plain.ok and tilted.ok, (plain.quality.warnings, tilted.quality.warnings)
    e_plain, e_tilt = _rel_errors(plain.vector()[0], truth), _rel_errors(_mean_field_fit(tilted), truth)
    # here the linear mix is the model: ΔV unbiased, and the tilt moves it the other way
    assert abs(e_plain[0]) < 2e-4 and abs(e_plain[2]) < 2e-4
    assert e_tilt[0] > 3e-4


@pytest.mark.regression
@pytest.mark.parametrize("read_out", ["curved", "averaged"])
def test_hedged_estimate_covers_either_sensor_response(read_outs, read_out):
    # the reported refinement is half-way between the two responses, their half difference in its
    # covariance: the truth lies within 2 stated σ whichever response the sensor has
    truth, out = read_outs
    ref = out[read_out][True]
    vec, cov = ref.vector()
    lin = out[read_out][False].vector()[0]
    # (δ2 = δ1/r is not linear in the parameters: half-way to within a millionth)
    np.testing.assert_allclose(vec, 0.5 * (lin + _mean_field_fit(ref)), rtol=1e-6, atol=1e-12)
    sig = np.sqrt(np.diag(cov))
    assert np.all(np.abs(vec - truth) <= 2 * sig), (vec - truth) / sig


@pytest.mark.regression
def test_linear_read_out_is_left_as_it_was(read_outs):
    truth, out = read_outs
    plain, tilted = out["linear"][False], out["linear"][True]
    assert plain.ok and tilted.ok
    if tilted.curvature is not None:
        lo, hi = tilted.curvature["relative_curvature_range"]
        assert max(abs(lo), abs(hi)) < 0.05  # a curved sensor here: −0.29…−0.08
    v0, _ = plain.vector()
    v1, _ = tilted.vector()
    # (the tilt is tiny here, and the hedged estimate half of it)
    np.testing.assert_allclose(v1[2:], v0[2:], rtol=2e-4)
    np.testing.assert_allclose(v1[:2], v0[:2], atol=2e-4)
    # both unbiased on a linear read-out (the constant-interaction model is exact there)
    np.testing.assert_allclose(v1[2:], truth[2:], rtol=1e-3)
