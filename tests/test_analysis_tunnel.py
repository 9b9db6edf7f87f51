"""Interdot tunnel coupling inside ``analyze`` (stabtool.fit.tunnel).

Truth: stabtool.simulate (tunnel-coupled two-level occupations, gap 2t,
Ω = √(ε² + 4t²); DiCarlo et al., Phys. Rev. Lett. 92, 226801 (2004), formula
from memory). Bound from the specification: t within 10 %.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.analysis import Analyzer
from stabtool.physics.polarisation import polarisation_fwhm_eV
from stabtool.simulate import quick_double_dot


def _analyse(*, t_ueV, snr, seed, temperature_K=0.1):
    sm = quick_double_dot("gaas-double", snr=snr, rng=seed, temperature_K=temperature_K,
                          tunnel_coupling_ueV=t_ueV, shape=(160, 160))
    a = np.array(sm.truth.lever_arm)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = Analyzer(electron_temperature_K=temperature_K, lever_arm=(a[0, 0], a[1, 1]), refine=False)(sm.data)
    return sm, res.to_json()


@pytest.mark.regression
def test_resolved_tunnel_coupling_within_10_percent():
    sm, j = _analyse(t_ueV=60.0, snr=None, seed=0)
    a = np.array(sm.truth.lever_arm)
    step = abs(float(np.diff(sm.data[sm.data.dims[-1]].values)[0]))
    # the polarisation line spans several pixels along the detuning gradient
    fwhm_V = polarisation_fwhm_eV(60e-6, 0.1) / np.hypot(*(a[0] - a[1]))
    assert fwhm_V / step > 3
    assert j["tunnel_coupling_ueV"] == pytest.approx(60.0, rel=0.10)
    assert j["tunnel_coupling_ueV_error"] > 0
    assert j["tunnel_coupling_upper_limit_ueV"] is None


@pytest.mark.regression
def test_thermally_broadened_interdot_line_gives_an_upper_limit_not_a_value():
    """t = 3 µeV at 100 mK (k_B T = 8.6 µeV, from scipy.constants): not resolvable."""
    _, j = _analyse(t_ueV=3.0, snr=10.0, seed=1)
    if j["tunnel_coupling_ueV"] is not None:  # a value is only acceptable if it is right
        assert j["tunnel_coupling_ueV"] == pytest.approx(3.0, rel=0.10)
    else:
        assert j["tunnel_coupling_upper_limit_ueV"] > 3.0
        assert any("not resolved" in w for w in j["quality"]["warnings"])


def test_no_temperature_means_no_tunnel_coupling():
    sm = quick_double_dot("gaas-double", snr=None, rng=0, shape=(96, 96))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer(lever_arm=0.07, refine=False)(sm.data).to_json()
    assert j["tunnel_coupling_ueV"] is None and j["tunnel_coupling_details"] is None


@pytest.mark.regression
def test_strong_tunnel_coupling_that_biases_the_virtual_gates_turns_quality_false():
    """t = 40 µeV, E_Cm = 0.32 meV: lines repelled near the triple points bias M by ≈ 0.009 (> 0.005)."""
    sm = quick_double_dot("gaas-double", snr=None, rng=0, temperature_K=0.1, tunnel_coupling_ueV=40.0,
                          shape=(160, 160))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer(refine=False)(sm.data).to_json()
    err = np.max(np.abs(np.array(j["virtual_gate_matrix"]) - np.array(sm.truth.virtual_gate_matrix)))
    ratio = 40e-3 / sm.truth.charging_energy_meV["mutual"]
    assert j["tunnel_to_mutual_ratio"]["value"] == pytest.approx(ratio, rel=0.25)
    if err > 0.005:
        assert not j["quality"]["ok"]
        assert any("broad interdot lines" in w for w in j["quality"]["warnings"])


@pytest.mark.regression
def test_sharp_interdot_lines_raise_no_coupling_warning():
    sm = quick_double_dot("ge-double", snr=None, rng=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer(refine=False)(sm.data).to_json()
    assert not any("broad interdot lines" in w for w in j["quality"]["warnings"])
    assert j["tunnel_to_mutual_ratio"]["value"] is None


@pytest.mark.parametrize("t_ueV, temperature_K", [(20.0, 0.1), (3.0, 0.5), (0.0, 0.1), (60.0, 0.05)])
def test_analytic_jacobian_of_the_polarisation_line_matches_finite_differences(t_ueV, temperature_K):
    """∂g/∂(s0, t, g0, δg, slope) of the fitted model against scipy's central differences."""
    from scipy.optimize._numdiff import approx_derivative

    from stabtool.fit.polarisation import _jacobian, _model

    s = np.linspace(-1.5e-3, 1.5e-3, 121)
    p = np.array([1.2e-4, t_ueV, 0.3, -0.8, 40.0])
    a_eps = 0.06
    jac = _jacobian(s, p, a_eps, temperature_K)
    # central differences with steps small against the line width (k_B T / a_eps ≈ 0.1 mV)
    num = approx_derivative(lambda q: _model(s, q, a_eps, temperature_K), p, method="3-point",
                            rel_step=np.array([1e-6, 1e-6, 1e-6, 1e-6, 1e-6]), abs_step=np.array([1e-9, 1e-5, 1e-7, 1e-7, 1e-5]))
    scale = np.max(np.abs(num), axis=0) + 1e-12
    np.testing.assert_allclose(jac / scale, num / scale, atol=1e-5)


@pytest.mark.regression
def test_hot_map_without_tunnel_coupling_gives_an_upper_limit_not_a_value():
    """t = 0 at 3 K (k_B T = 259 µeV, E_Cm = 0.95 meV ≈ 3.7 k_B T): the outer charge states are
    thermally populated near the interdot line and widen it beyond the two-level shape; that
    and the pixel interpolation must not be read as a tunnel coupling."""
    sm = quick_double_dot("si-sige-double", snr=30.0, rng=2, temperature_K=3.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer(electron_temperature_K=3.0, refine=False)(sm.data).to_json()
    assert j["tunnel_coupling_ueV"] is None
    assert j["tunnel_coupling_upper_limit_ueV"] > 0
    assert not any("broad interdot lines" in w for w in j["quality"]["warnings"])
    assert not any("interdot lines disagree" in w for w in j["quality"]["warnings"])


def test_four_state_model_is_the_polarisation_line_when_the_outer_states_are_empty():
    """E_Cm ≫ k_B T: ⟨N1 − N2⟩ = 1 − 2P(ε) with P = ½[1 + (ε/Ω) tanh(Ω/2kT)] read at the same
    points (DiCarlo et al., PRL 92, 226801 (2004), from memory; stabtool.physics.polarisation)."""
    from stabtool.fit.tunnel import _CutGeometry, _mean_charges
    from stabtool.physics.constants import KB_EV_PER_K
    from stabtool.physics.polarisation import polarisation

    temp, t_eV, a_eps = 0.1, 12e-6, 0.05
    s = np.linspace(-2e-3, 2e-3, 81)
    one = np.zeros((1, s.size, 4), int)
    one[0, :, 0] = np.arange(s.size)
    w = np.zeros((1, s.size, 4))
    w[0, :, 0] = 1.0  # every point is its own node
    geo = _CutGeometry(a_eps=a_eps, a_mean=0.01, b=0.02, e_cm=5e-3, kt=KB_EV_PER_K * temp,
                       node_s=s, node_o=np.zeros_like(s), idx=one, wts=w)
    n1, n2 = _mean_charges(1e-4, t_eV, geo)
    eps = -a_eps * (s - 1e-4)  # ε = μ1 − μ2 falls along the cut
    np.testing.assert_allclose(n1 - n2, 1 - 2 * polarisation(eps, t_eV, temp), atol=1e-9)
    np.testing.assert_allclose(n1 + n2, 1.0, atol=1e-9)


def test_segment_choice_ignores_rounding_noise_in_the_lengths():
    """Lattice segments have equal lengths; 1e-15 noise must not decide which are fitted."""
    from stabtool.fit.tunnel import _segment_order

    x = np.linspace(0, 1, 11)
    y = np.linspace(0, 1, 11)
    mids = np.array([[0.2, 0.2], [0.5, 0.45], [0.8, 0.8], [0.45, 0.5]])
    d = np.array([0.05, -0.05])
    segs = np.stack([mids - d, mids + d], axis=1)
    base = _segment_order(segs, x, y)
    rng = np.random.default_rng(0)
    for _ in range(5):
        noisy = segs + rng.normal(0, 1e-16, segs.shape)
        np.testing.assert_array_equal(_segment_order(noisy, x, y), base)
    assert set(base[:2]) == {1, 3}  # the central segments first


@pytest.mark.regression
@pytest.mark.parametrize(("preset", "t_ueV"), [("gaas-double", 0.0), ("gaas-double", 20.0), ("si-sige-double", 60.0)])
def test_tunnel_coupled_map_is_not_ok_beyond_the_clean_bound(preset, t_ueV):
    # The tunnel coupling pushes the dot lines apart near the triple points and biases the
    # virtual gates by ≈ 0.1 · t/E_Cm (beyond their statistical error). A clean map (SNR 30)
    # reported ok must still keep |ΔM| ≤ 0.005 (issue bound); the uncoupled map stays ok.
    sm = quick_double_dot(preset, tunnel_coupling_ueV=t_ueV, snr=30.0, shape=(160, 160), rng=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer()(sm.data).to_json()
    err = float(np.max(np.abs(np.array(j["virtual_gate_matrix"], float)
                              - np.array(sm.truth.to_json()["virtual_gate_matrix"]))))
    if j["quality"]["ok"]:
        assert err <= 0.005
    if t_ueV == 0.0:
        assert j["quality"]["ok"], j["quality"]["warnings"]
    elif any("interdot tunnel coupling t/(e α11)" in w for w in j["quality"]["warnings"]):
        # corrected: the model fit with the coupling was adopted (gaas-double 20 µeV: 0.0014 off)
        assert err <= 0.005
    else:
        # straight lines and the plain model fit are biased (0.0072 and 0.0061 seen): flagged
        assert not j["quality"]["ok"]
        assert any("tunnel" in w or "broad interdot" in w for w in j["quality"]["warnings"])


def test_a_detuning_cut_sampled_in_descending_order_does_not_break_the_analysis():
    # held-out probe map (scripts/probe_heldout.py seed 40, 40–90 px maps: 47×59, sech² sensor, SNR 8):
    # its interdot cut ran against the detuning axis and the polarisation fit raised out of the analysis
    from _probe import analysed, make_map

    pm = make_map(40, size=(40, 90))
    j = analysed(pm).to_json()
    assert j["quality"]["ok"] is False  # (a 47×59 map with a line labelling that failed)
    assert "tunnel_coupling_ueV" in j


@pytest.mark.regression
def test_tunnel_coupled_model_fit_is_not_left_in_a_local_minimum():
    # held-out probe map (scripts/probe_heldout.py seed 4, t = 25 µeV ≈ 2.1 line widths, a sech² sensor
    # that averages over the charge states, SNR 60): started at t = w1 only, the coupled model fit
    # stopped at t ≈ 1.3 w1 with δ1 13 % high and reported ok with M12 0.0088 off (stated 0.0020);
    # started also at 2 and 4 w1 it keeps the fit of least residual (M12 0.0019 off)
    from _probe import analysed, make_map

    pm = make_map(4, tunnel_coupling_ueV=25.0, response="states")
    j = analysed(pm).to_json()
    err = np.abs(np.array(j["virtual_gate_matrix"], float) - np.array(pm.truth["virtual_gate_matrix"], float))
    assert any("interdot tunnel coupling t/(e α11)" in w for w in j["quality"]["warnings"])
    assert float(err.max()) <= 0.005, err
    # the stated errors cover the truth (3σ)
    sig = np.array(j["virtual_gate_matrix_error"], float)
    off = ~np.eye(2, dtype=bool)
    assert np.all(err[off] <= 3 * sig[off]), (err, sig)
