"""Interdot tunnel coupling from the polarisation line (stabtool.fit.polarisation).

Truth: stabtool.simulate (tunnel-coupled two-level occupations from its own
Hamiltonian, Ω = √(ε² + 4t²), charge read-out). Bound from the
specification: t within 10 %.
"""

from __future__ import annotations

import numpy as np
import pytest

from stabtool.fit.polarisation import detuning_profile, fit_polarisation_line
from stabtool.physics.polarisation import detuning_lever_arm, polarisation

from _references import longest_segment, midpoint, preset_truth, window


@pytest.fixture(scope="module")
def interdot():
    truth = preset_truth()
    seg = longest_segment(truth, "interdot")
    d = np.subtract(seg.end, seg.start)
    u = np.array([-d[1], d[0]]) / np.hypot(*d)  # across the interdot line
    return truth, midpoint(seg), u, detuning_lever_arm(np.array(truth.lever_arm), u)


def _profile(truth, centre, u, *, t_ueV, temp, noise, seed):
    sm = window(truth, centre, 2.0e-3, (81, 81), temperature_K=temp, tunnel_coupling_ueV=t_ueV,
                readout="charge", rng=seed)
    data = sm.data + np.random.default_rng(seed).normal(0.0, noise, sm.data.shape)
    return detuning_profile(data, through=centre, direction=u, half_length_V=1.5e-3,
                            half_width_V=1.2e-3, n_points=61, n_average=25)


def test_detuning_lever_arm_is_perpendicular_projection():
    # ε = μ1 − μ2 changes by (α1 − α2)·u per volt; along the interdot line it does not change
    alpha = np.array([[0.1, 0.03], [0.02, 0.09]])
    diff = np.array([0.1 - 0.02, 0.03 - 0.09])  # α1 − α2 = (0.08, −0.06)
    along = np.array([-diff[1], diff[0]])  # perpendicular to α1 − α2: the interdot line
    assert detuning_lever_arm(alpha, along) == pytest.approx(0.0, abs=1e-15)
    assert detuning_lever_arm(alpha, [1.0, 0.0]) == pytest.approx(0.08)


@pytest.mark.regression
def test_noiseless_generator_line_gives_t_within_2_percent(interdot):
    truth, centre, u, a_eps = interdot
    prof = _profile(truth, centre, u, t_ueV=20.0, temp=0.05, noise=0.0, seed=1)
    fit = fit_polarisation_line(prof.s_V, prof.signal, electron_temperature_K=0.05, detuning_lever_arm=a_eps)
    assert fit.tunnel_coupling_ueV == pytest.approx(20.0, rel=0.02)


@pytest.mark.regression
@pytest.mark.parametrize("t_ueV, temp, seed", [(20.0, 0.05, 2), (12.0, 0.03, 3)])
def test_noisy_generator_line_gives_t_within_10_percent(interdot, t_ueV, temp, seed):
    truth, centre, u, a_eps = interdot
    prof = _profile(truth, centre, u, t_ueV=t_ueV, temp=temp, noise=0.03, seed=seed)
    fit = fit_polarisation_line(prof.s_V, prof.signal, electron_temperature_K=temp, detuning_lever_arm=a_eps)
    assert fit.quality.ok, fit.quality.warnings
    assert fit.tunnel_coupling_ueV == pytest.approx(t_ueV, rel=0.10)
    assert abs(fit.tunnel_coupling_ueV - t_ueV) < 4 * fit.tunnel_coupling_stderr_ueV


def test_thermally_broadened_line_gives_an_upper_limit_and_a_doubtful_verdict():
    """t = 1 µeV at 150 mK (k_B T = 12.9 µeV): only an upper limit is meaningful."""
    rng = np.random.default_rng(4)
    s = np.linspace(-2e-3, 2e-3, 121)
    a_eps = 0.08
    g = 0.2 + 0.5 * polarisation(a_eps * s, 1e-6, 0.15) + rng.normal(0, 0.01, s.size)
    fit = fit_polarisation_line(s, g, electron_temperature_K=0.15, detuning_lever_arm=a_eps)
    assert not fit.quality.ok
    msg = next(m for m in fit.quality.warnings if "not resolved" in m)
    upper = float(msg.split("t < ")[1].split(" µeV")[0])
    assert 1.0 < upper < 30.0


def test_detuning_profile_recovers_a_linear_ramp():
    import xarray as xr

    x = np.linspace(0, 1e-3, 51)
    y = np.linspace(0, 2e-3, 41)
    da = xr.DataArray(3 * x[None, :] + 5 * y[:, None], coords={"PB": y, "PA": x}, dims=("PB", "PA"))
    prof = detuning_profile(da, through=(5e-4, 1e-3), direction=(3.0, 4.0), half_length_V=2e-4, n_points=11)
    np.testing.assert_allclose(prof.signal, 3 * 5e-4 + 5e-3 + prof.s_V * (3 * 0.6 + 5 * 0.8), rtol=1e-9)
