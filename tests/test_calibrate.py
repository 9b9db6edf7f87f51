"""Lever-arm calibration from 1-D traces (stabtool.calibrate) against generator truth.

The truth comes from stabtool.simulate.traces (Fermi–Dirac occupation with
w = k_B T_e/(e α), scipy.constants) with white noise, a sloped sensor
background and either step polarity.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy import constants

from stabtool.calibrate import (
    Calibrator,
    fit_temperature_series,
    lever_arm_from_trace,
)
from stabtool.errors import InputError
from stabtool.io.traces import Trace1D
from stabtool.physics.thermal import FERMI_FWHM_FACTOR, saturated_temperature
from stabtool.simulate.traces import TraceTruth, simulate_trace


def _trace(sim, temperature_K, label="sensor", gate="PA"):
    return Trace1D(sim.v, sim.signal, gate, "sensor", "nA", temperature_K, "user", "kestrel-7", "mem", label)


def _series(truth, temps, *, seed, noise=0.01, n_points=301, span_widths=30):
    rng = np.random.default_rng(seed)
    out = []
    for i, t in enumerate(temps):
        tr = replace(truth, bath_K=t, slope=truth.slope + 5 * i)
        sim = simulate_trace(tr, noise=noise, rng=rng, n_points=n_points, span_widths=span_widths,
                             descending=bool(i % 2))
        out.append(_trace(sim, t, label=f"{t} K"))
    return out


@pytest.mark.regression
@pytest.mark.parametrize("seed, step", [(11, -0.4), (12, 0.3), (13, -0.3)])
def test_series_in_linear_regime_gives_lever_arm_within_2_percent(seed, step):
    """Six temperatures, 801 points per trace, SNR 30-40 (rms error 0.8 % over 20 seeds)."""
    truth = TraceTruth(lever_arm=0.085, saturation_K=0.02, step=step, slope=-25.0, curvature=2e3)
    temps = [0.1, 0.15, 0.2, 0.25, 0.3, 0.35]  # all ≥ 5 T_sat: linear regime
    traces = _series(truth, temps, seed=seed, n_points=801)
    cal = Calibrator(background="quadratic", check_shape=False).run(traces)
    assert cal.method == "temperature_series"
    assert cal.lever_arm == pytest.approx(0.085, rel=0.02)
    assert abs(cal.lever_arm - 0.085) < 4 * cal.lever_arm_stderr
    assert cal.quality.ok, cal.quality.warnings
    assert cal.gate == "PA" and cal.device == "kestrel-7"


@pytest.mark.regression
def test_series_with_saturation_recovers_lever_arm_and_saturated_temperature():
    truth = TraceTruth(lever_arm=0.06, saturation_K=0.05, step=-0.5, slope=10.0)
    temps = [0.015, 0.03, 0.06, 0.1, 0.15, 0.2, 0.3, 0.45]
    cal = Calibrator(check_shape=False).run(_series(truth, temps, seed=5, noise=0.01))
    assert cal.lever_arm == pytest.approx(0.06, rel=0.02)
    assert cal.saturation_K == pytest.approx(0.05, rel=0.15)
    assert abs(cal.saturation_K - 0.05) < 4 * cal.saturation_stderr_K
    assert "common practice, no source" in cal.saturation_model


def test_series_fit_on_exact_widths():
    """Exact model widths give back α and T_sat to rounding (k_B/e from scipy.constants)."""
    t = np.array([0.02, 0.04, 0.08, 0.16, 0.32])
    w = constants.k * saturated_temperature(t, 0.06) / (constants.e * 0.1)
    fit = fit_temperature_series(t, w, 1e-3 * w)
    assert fit.lever_arm == pytest.approx(0.1, rel=1e-6)
    assert fit.saturation_K == pytest.approx(0.06, rel=1e-5)
    np.testing.assert_allclose(fit.width_model_V(t), w, rtol=1e-6)


def test_series_needs_three_temperatures():
    with pytest.raises(InputError, match="at least 3 distinct temperatures"):
        fit_temperature_series([0.1, 0.1, 0.2], [1e-4, 1e-4, 2e-4], [1e-6] * 3)


def test_series_scatter_beyond_errors_is_doubtful():
    t = np.array([0.05, 0.1, 0.15, 0.2, 0.25, 0.3])
    w = constants.k * t / (constants.e * 0.1) * np.array([1.0, 1.3, 0.8, 1.25, 0.85, 1.2])
    fit = fit_temperature_series(t, w, 0.01 * w)
    assert not fit.quality.ok
    assert any("scatter" in m for m in fit.quality.warnings)


@pytest.mark.regression
@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_single_trace_at_known_electron_temperature_within_5_percent(seed):
    truth = TraceTruth(lever_arm=0.12, bath_K=0.08, step=0.4 if seed % 2 else -0.4, slope=-20.0)
    n = int(round(30 * 10 / FERMI_FWHM_FACTOR)) + 1  # 10 points across the FWHM, 30 widths swept
    sim = simulate_trace(truth, noise=0.004, rng=seed, n_points=n, span_widths=30)
    cal = lever_arm_from_trace(sim.v, sim.signal, electron_temperature_K=truth.electron_K)
    assert cal.method == "known_electron_temperature"
    assert cal.lever_arm == pytest.approx(0.12, rel=0.05)
    assert abs(cal.lever_arm - 0.12) < 4 * cal.lever_arm_stderr
    # α = k_B T_e/(e w): the fitted width is consistent with scipy.constants
    rec = cal.traces[0]
    assert cal.lever_arm == pytest.approx(constants.k * 0.08 / (constants.e * rec.width_V), rel=1e-9)


@pytest.mark.regression
def test_lorentzian_broadening_is_reported_not_folded():
    """γ = 10 µeV against k_B·100 mK = 8.6 µeV: the Fermi width is ~60 % too wide."""
    truth = TraceTruth(lever_arm=0.08, bath_K=0.1, gamma_ueV=10.0)
    sim = simulate_trace(truth, noise=0.003, rng=1, n_points=601, span_widths=60)
    cal = lever_arm_from_trace(sim.v, sim.signal, electron_temperature_K=0.1)
    assert not cal.quality.ok
    assert any("non-thermal broadening" in m for m in cal.quality.warnings)
    # the same trace without broadening passes the shape test
    clean = simulate_trace(replace(truth, gamma_ueV=0.0), noise=0.003, rng=1, n_points=601, span_widths=60)
    cal0 = lever_arm_from_trace(clean.v, clean.signal, electron_temperature_K=0.1)
    assert not any("non-thermal" in m for m in cal0.quality.warnings)
    assert cal0.lever_arm == pytest.approx(0.08, rel=0.03)


def test_rejected_traces_are_listed_and_the_rest_used():
    truth = TraceTruth(lever_arm=0.1, bath_K=0.1)
    good = simulate_trace(truth, noise=0.004, rng=3)
    flat = Trace1D(good.v, np.random.default_rng(0).normal(0, 0.01, good.v.size), "PA", "s", "", 0.1,
                   "user", None, "flat.csv", "flat")
    cal = Calibrator(check_shape=False).run([_trace(good, 0.1), flat])
    assert cal.lever_arm == pytest.approx(0.1, rel=0.05)
    bad = [r for r in cal.traces if not r.ok]
    assert len(bad) == 1 and bad[0].reason.startswith("no transition")
    assert any("flat.csv" in m and "rejected" in m for m in cal.quality.warnings)


def test_no_usable_trace_gives_a_null_lever_arm_and_doubtful_quality():
    v = np.linspace(0, 1e-3, 200)
    flat = Trace1D(v, np.random.default_rng(0).normal(0, 0.01, v.size), "PA", "s", "", 0.1, "user", None, "f", "f")
    cal = Calibrator().run([flat])
    assert not cal and np.isnan(cal.lever_arm)
    assert not cal.quality.ok
    assert cal.to_dict()["lever_arm"] is None


def test_traces_without_temperature_are_an_input_error():
    sim = simulate_trace(TraceTruth(), rng=0)
    with pytest.raises(InputError, match="has no temperature"):
        Calibrator().run([_trace(sim, float("nan"))])


def test_traces_of_different_gates_are_an_input_error():
    sim = simulate_trace(TraceTruth(), rng=0)
    with pytest.raises(InputError, match="different gates"):
        Calibrator().run([_trace(sim, 0.1, gate="PA"), _trace(sim, 0.1, gate="PB")])
