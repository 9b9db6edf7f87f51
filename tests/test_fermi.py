"""Specification of the Fermi–Dirac step fit (stabtool.fit.fermi)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy import constants

from stabtool.errors import FitError, InputError
from stabtool.fit.fermi import FermiStepFit, estimate_noise, fit_fermi_step, fit_fermi_steps
from stabtool.physics.thermal import FERMI_FWHM_FACTOR, fermi_occupation
from stabtool.simulate.traces import TraceTruth, render_trace, simulate_trace


def test_fwhm_factor_is_4_ln_1_plus_sqrt2_and_matches_numerical_derivative():
    # Fermi-Dirac: -df/dE = sech²(E/2kT)/(4kT), FWHM = 4 ln(1+√2) kT = 3.5255 kT
    # (standard; references file "Thermal broadening").
    assert FERMI_FWHM_FACTOR == pytest.approx(3.5255, abs=5e-5)
    x = np.linspace(-10, 10, 200001)
    d = -np.gradient(fermi_occupation(x, 0.0, 1.0), x)
    above = x[d >= d.max() / 2]
    assert above[-1] - above[0] == pytest.approx(3.5255, abs=1e-3)


def test_noiseless_step_recovers_truth_exactly():
    truth = TraceTruth(lever_arm=0.1, bath_K=0.1, step=0.5, slope=40.0)
    v = np.linspace(truth.centre_V - 15 * truth.width_V, truth.centre_V + 15 * truth.width_V, 301)
    fit = fit_fermi_step(v, render_trace(v, truth))
    assert fit.success and fit.quality.ok
    assert fit.width_V == pytest.approx(truth.width_V, rel=1e-6)
    assert fit.centre_V == pytest.approx(truth.centre_V, abs=1e-6 * truth.width_V + 1e-12)
    assert fit.step_height == pytest.approx(0.5, rel=1e-6)
    assert fit.background[1] == pytest.approx(40.0, rel=1e-5)
    # width in volts from k_B T/(e α) with scipy.constants (CODATA)
    assert fit.width_V == pytest.approx(constants.k * 0.1 / (constants.e * 0.1), rel=1e-6)
    np.testing.assert_allclose(fit.model(v), render_trace(v, truth), atol=1e-9)


@pytest.mark.regression
@pytest.mark.parametrize("seed", [0, 1, 2, 3])
@pytest.mark.parametrize("step", [-0.4, 0.3])
def test_noisy_trace_width_within_its_error(seed, step):
    """Either polarity, linear or quadratic background, sweep up or down."""
    quadratic = seed % 2 == 1
    truth = TraceTruth(step=step, curvature=3e4 if quadratic else 0.0)
    tr = simulate_trace(truth, noise=0.02, rng=seed, descending=seed >= 2)
    fit = fit_fermi_step(tr.v, tr.signal, background="quadratic" if quadratic else "linear")
    assert fit, fit.reason
    assert np.sign(fit.step_height) == np.sign(step)
    # 4 standard errors and at most 15 % (SNR 15-20, 301 points)
    err = abs(fit.width_V - truth.width_V)
    assert err < 4 * fit.width_stderr_V
    assert err < 0.15 * truth.width_V
    assert abs(fit.centre_V - truth.centre_V) < 4 * fit.centre_stderr_V
    assert 0.6 < fit.reduced_chi2 < 1.6


@pytest.mark.regression
def test_standard_errors_are_calibrated_over_seeds():
    """The scatter of the width over 30 noise seeds matches the mean reported error (±35 %)."""
    truth = TraceTruth()
    widths, errs = [], []
    for seed in range(30):
        tr = simulate_trace(truth, noise=0.03, rng=100 + seed, n_points=201)
        f = fit_fermi_step(tr.v, tr.signal)
        widths.append(f.width_V)
        errs.append(f.width_stderr_V)
    assert np.std(widths, ddof=1) == pytest.approx(np.mean(errs), rel=0.35)


def test_flat_trace_is_rejected_as_no_transition():
    rng = np.random.default_rng(1)
    v = np.linspace(0, 1e-3, 300)
    fit = fit_fermi_step(v, 1 + 3 * v + rng.normal(0, 0.01, v.size))
    assert not fit
    assert fit.reason.startswith("no transition")
    assert not fit.quality.ok


def test_two_transitions_are_rejected():
    truth = TraceTruth()
    tr = simulate_trace(truth, noise=0.01, rng=2, span_widths=40)
    second = replace(truth, centre_V=truth.centre_V + 10 * truth.width_V, offset=0.0, slope=0.0)
    fit = fit_fermi_step(tr.v, tr.signal + render_trace(tr.v, second))
    assert not fit
    assert fit.reason.startswith("two transitions")


def test_unresolved_step_is_rejected():
    truth = TraceTruth()
    tr = simulate_trace(truth, noise=0.01, rng=2, span_widths=600, n_points=201)
    fit = fit_fermi_step(tr.v, tr.signal)
    assert not fit
    assert "at or below the sampling step" in fit.reason


def test_errors_raise_turns_a_failed_fit_into_fiterror():
    v = np.linspace(0, 1, 100)
    with pytest.raises(FitError, match="no transition"):
        fit_fermi_step(v, np.zeros(100) + np.random.default_rng(0).normal(0, 1, 100), errors="raise")


def test_failed_fit_is_a_falsy_value_with_nan_numbers():
    fit = FermiStepFit(success=False, reason="x")
    assert not fit and np.isnan(fit.width_V)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(v=np.arange(5.0), signal=np.arange(5.0)), "at least"),
        (dict(v=np.arange(20.0), signal=np.arange(21.0)), "equal length"),
        (dict(v=np.arange(20.0), signal=np.arange(20.0), background="cubic"), "quadratic"),
        (dict(v=np.arange(20.0), signal=np.arange(20.0), sigma=-1.0), "positive"),
    ],
)
def test_bad_input_gives_input_error(kwargs, match):
    v = kwargs.pop("v")
    s = kwargs.pop("signal")
    with pytest.raises(InputError, match=match):
        fit_fermi_step(v, s, **kwargs)


def test_noise_estimate_matches_white_noise_on_a_slope():
    rng = np.random.default_rng(3)
    x = np.linspace(0, 1, 5000)
    assert estimate_noise(5 * x + rng.normal(0, 0.2, x.size)) == pytest.approx(0.2, rel=0.05)


@pytest.mark.regression
def test_known_sigma_gives_unit_pulls_and_unit_reduced_chi2():
    """With the true noise σ given, (w − w_true)/σ_w has unit spread and χ²_red ≈ 1 (30 seeds)."""
    truth = TraceTruth()
    pulls, chi = [], []
    for seed in range(30):
        tr = simulate_trace(truth, noise=0.02, rng=seed)
        f = fit_fermi_step(tr.v, tr.signal, sigma=0.02)
        pulls.append((f.width_V - truth.width_V) / f.width_stderr_V)
        chi.append(f.reduced_chi2)
    assert np.std(pulls, ddof=1) == pytest.approx(1.0, abs=0.3)
    assert np.mean(chi) == pytest.approx(1.0, abs=0.05)


# ----------------------------------------------------------------------------- batched fits
@pytest.mark.regression
def test_batched_fits_equal_the_single_trace_fit():
    """fit_fermi_steps is fit_fermi_step (linear background) on many traces at once.

    Reference: the single-trace fit (scipy least_squares), same model and error definition.
    """
    traces = []
    for seed, step in enumerate([0.5, -0.3, 0.2, 0.4, -0.6]):
        truth = TraceTruth(step=step, slope=20.0 * (seed - 2))
        tr = simulate_trace(truth, noise=0.02, rng=seed, n_points=101 + 40 * seed, descending=seed % 2 == 1)
        traces.append((tr.v, tr.signal))
    batch = fit_fermi_steps([t[0] for t in traces], [t[1] for t in traces])
    assert len(batch) == 5
    for i, (v, sig) in enumerate(traces):
        one = fit_fermi_step(v, sig, background="linear")
        assert one and batch.success[i] and batch.converged[i]
        assert batch.width_V[i] == pytest.approx(one.width_V, rel=1e-5)
        assert batch.width_stderr_V[i] == pytest.approx(one.width_stderr_V, rel=1e-3)
        assert batch.centre_V[i] == pytest.approx(one.centre_V, abs=1e-5 * one.width_V)
        assert batch.step_height[i] == pytest.approx(one.step_height, rel=1e-5)
        assert batch.reduced_chi2[i] == pytest.approx(one.reduced_chi2, rel=1e-3)


def test_batched_fit_rejects_what_the_single_fit_rejects():
    rng = np.random.default_rng(1)
    v = np.linspace(0, 1e-3, 300)
    flat = 1 + 3 * v + rng.normal(0, 0.01, v.size)
    truth = TraceTruth()
    unresolved = simulate_trace(truth, noise=0.01, rng=2, span_widths=600, n_points=201)
    good = simulate_trace(truth, noise=0.01, rng=3)
    short = (good.v[:8], good.signal[:8])  # fewer than 10 points: not fitted
    batch = fit_fermi_steps([v, unresolved.v, good.v, short[0]], [flat, unresolved.signal, good.signal, short[1]])
    assert not fit_fermi_step(v, flat) and not fit_fermi_step(unresolved.v, unresolved.signal)
    np.testing.assert_array_equal(batch.success, [False, False, True, False])
    assert np.isnan(batch.width_V[3])
