"""Rendered maps against published formulas and worked numbers.

References (see each check):
* van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003): ΔV_g = e/C_g, the
  triple-point splitting e C_m/(C_g C_2) and the worked example
  (C_g = 10 aF, C_m = 20 aF, C_1 = C_2 = 80 aF → 16.022 mV, 4.005 mV).
* The conventions identity Cdg = e·[[ΔV1, δ1], [δ2, ΔV2]]⁻¹·M.
* Fermi–Dirac occupation: width k_B T/(e α), derivative FWHM 4 ln(1+√2) w
  = 3.5255 w; constants from scipy.constants (CODATA).
* Two-level polarisation P(ε) = ½[1 + (ε/Ω) tanh(Ω/2kT)], Ω = √(ε² + 4t²)
  (DiCarlo et al., Phys. Rev. Lett. 92, 226801 (2004), formula from memory).
* Coulomb-diamond edges m₊ = C_G/(C_G + C_D), m₋ = −C_G/C_S (standard, from memory).
"""

import numpy as np
import pytest
from scipy import constants, optimize

from stabtool.physics.ci import cdg_from_diagram
from stabtool.physics.polarisation import polarisation
from stabtool.simulate import Device, SensorModel, coulomb_diamonds, simulate_map
from stabtool.simulate.ground_state import ci_energy, induced_charge

E = constants.e * 1e18  # elementary charge in aC (so e/C[aF] is in V)


def vdw_device(cross=False):
    """The van der Wiel worked example (optionally with cross-capacitances)."""
    if cross:  # references: Cdg = [[10, 3], [2.5, 9]] aF, C11 = C22 = 80 aF, Cm = 15 aF
        return Device(cdg_aF=[[10, 3], [2.5, 9]], cdd_aF=[[80, -15], [-15, 80]], gate_names=["PA", "PB"], dot_names=["D1", "D2"])
    return Device(cdg_aF=[[10, 0], [0, 10]], cdd_aF=[[80, -20], [-20, 80]], gate_names=["PA", "PB"], dot_names=["D1", "D2"])


def fit_lines(cs, x, y, along):
    """Transitions of one dot seen along rows (along='x', dot 0) or columns (along='y', dot 1).

    Returns {(n_from, n_other): (intercept, slope)} of position = a + b · other-axis,
    fitted to the midpoints between the two pixels where the state changes.
    """
    dot, other = (0, 1) if along == "x" else (1, 0)
    c = cs if along == "x" else cs.transpose(1, 0, 2)
    pos, across = (x, y) if along == "x" else (y, x)
    a, b = c[:, :-1], c[:, 1:]
    step = (b[..., dot] - a[..., dot] == 1) & (a[..., other] == b[..., other])
    pts = {}
    for i, j in zip(*np.nonzero(step)):
        key = (int(a[i, j, dot]), int(a[i, j, other]))
        pts.setdefault(key, []).append((across[i], 0.5 * (pos[j] + pos[j + 1])))
    out = {}
    for key, p in pts.items():
        p = np.array(p)
        if len(p) >= 5:
            bb, aa = np.polyfit(p[:, 0], p[:, 1], 1)
            out[key] = (aa, bb)
    return out


def charge_map(dev, x, y):
    sm = simulate_map(dev, x_gate="PA", y_gate="PB", x_range_V=(x[0], x[-1]), y_range_V=(y[0], y[-1]),
                      shape=(y.size, x.size), temperature_K=0.0, readout="charge")
    return sm.truth.charge_state


def test_worked_example_addition_voltage_and_triple_point_splitting():
    dev = vdw_device()
    x = np.linspace(0.0, 0.045, 451)
    y = np.linspace(0.0, 0.045, 451)
    cs = charge_map(dev, x, y)
    lines = fit_lines(cs, x, y, "x")
    y0 = 0.02
    at = {k: a + b * y0 for k, (a, b) in lines.items()}
    # ΔV_g1 = e/C_g1 (van der Wiel et al. 2003): worked example 16.022 mV
    expected_dv = E / 10.0
    assert expected_dv == pytest.approx(16.022e-3, abs=1e-6)
    assert at[(1, 1)] - at[(0, 1)] == pytest.approx(expected_dv, abs=2e-5)
    # triple-point splitting e Cm/(C_g1 C2): worked example 4.005 mV
    expected_split = E * 20.0 / (10.0 * 80.0)
    assert expected_split == pytest.approx(4.005e-3, abs=1e-6)
    assert at[(0, 1)] - at[(0, 0)] == pytest.approx(expected_split, abs=2e-5)


def test_conventions_identity_recovers_cdg_from_a_rendered_map():
    dev = vdw_device(cross=True)
    x = np.linspace(0.0, 0.04, 401)
    y = np.linspace(0.0, 0.04, 401)
    cs = charge_map(dev, x, y)
    d1 = fit_lines(cs, x, y, "x")  # x = a + b y for dot1 lines
    d2 = fit_lines(cs, x, y, "y")  # y = a + b x for dot2 lines
    y0, x0 = 0.02, 0.02
    dv1 = (d1[(1, 1)][0] + d1[(1, 1)][1] * y0) - (d1[(0, 1)][0] + d1[(0, 1)][1] * y0)
    dm1 = (d1[(0, 1)][0] + d1[(0, 1)][1] * y0) - (d1[(0, 0)][0] + d1[(0, 0)][1] * y0)
    dv2 = (d2[(1, 1)][0] + d2[(1, 1)][1] * x0) - (d2[(0, 1)][0] + d2[(0, 1)][1] * x0)
    dm2 = (d2[(0, 1)][0] + d2[(0, 1)][1] * x0) - (d2[(0, 0)][0] + d2[(0, 0)][1] * x0)
    s1 = 1.0 / d1[(0, 1)][1]  # dV_y/dV_x of dot1 lines
    s2 = d2[(0, 1)][1]
    m = np.array([[1.0, -1.0 / s1], [-s2, 1.0]])
    # worked numbers of the references: slopes −2.2333 and −0.45752, ΔV1 = 15.304 mV, ΔV2 = 16.755 mV
    assert s1 == pytest.approx(-2.2333, rel=5e-3)
    assert s2 == pytest.approx(-0.45752, rel=5e-3)
    assert dv1 == pytest.approx(15.304e-3, rel=3e-3)
    assert dv2 == pytest.approx(16.755e-3, rel=3e-3)
    cdg = cdg_from_diagram(np.array([dv1, dv2]), np.array([dm1, dm2]), m)
    np.testing.assert_allclose(cdg, dev.cdg, rtol=0.02, atol=0.05)


def fermi(v, v0, w, lo, hi):
    return lo + (hi - lo) / (1.0 + np.exp(-(v - v0) / w))


@pytest.mark.parametrize("temperature", [0.05, 0.2])
def test_thermal_line_has_the_fermi_width_of_the_lever_arm(temperature):
    dev = vdw_device(cross=True)
    alpha11 = dev.lever_arm[0, 0]
    w_expected = constants.k * temperature / (constants.e * alpha11)  # k_B T/(e α11), CODATA
    # a dot1 line crossed along x in the N2 = 0 band (rows at y = 4 mV): locate it, then zoom in
    kw = dict(x_gate="PA", y_gate="PB", y_range_V=(0.004, 0.0041), temperature_K=temperature,
              readout="charge", sensor=SensorModel(coupling_mV=(1.0, 0.0)))
    coarse = simulate_map(dev, x_range_V=(0.0, 0.014), shape=(2, 701), **kw)
    x0 = float(coarse.data["PA"].values[np.argmin(np.abs(coarse.data.values[0] - 0.5))])
    sm = simulate_map(dev, x_range_V=(x0 - 15 * w_expected, x0 + 15 * w_expected), shape=(2, 1501), **kw)
    v = sm.data["PA"].values
    n1 = sm.data.values[0]
    p, _ = optimize.curve_fit(fermi, v, n1, p0=[x0, w_expected * 1.3, 0, 1])
    assert p[1] == pytest.approx(w_expected, rel=2e-3)
    # FWHM of the derivative = 4 ln(1 + √2) w = 3.5255 w (Fermi–Dirac)
    d = np.gradient(n1, v)
    half = d >= 0.5 * d.max()
    i = np.nonzero(half)[0]
    left = np.interp(0.5 * d.max(), [d[i[0] - 1], d[i[0]]], [v[i[0] - 1], v[i[0]]])
    right = np.interp(0.5 * d.max(), [d[i[-1] + 1], d[i[-1]]], [v[i[-1] + 1], v[i[-1]]])
    assert (right - left) / w_expected == pytest.approx(4 * np.log(1 + np.sqrt(2)), rel=1e-2)
    assert 4 * np.log(1 + np.sqrt(2)) == pytest.approx(3.5255, abs=1e-4)


def test_hot_occupations_are_the_boltzmann_average_over_every_charge_state():
    # Grand-canonical ensemble of the constant-interaction energies (dots exchanging electrons with
    # leads at μ = 0; van der Wiel et al. 2003): ⟨N⟩ = Σ_N N e^{−U(N)/kT} / Σ_N e^{−U(N)/kT}, summed
    # here by brute force over N1, N2 = 0…7. At 1 K (kT = 86 µeV) the mutual charging energy
    # (0.39 meV) is only 4.5 kT: at a triple point a fourth state (one electron more or less on
    # each dot) holds about 1 % of the weight (a generator that averaged over ±e_i and e_i − e_j
    # only was off by up to 0.0022 electrons on 16 % of these pixels), while states two electrons
    # away (≥ 2 meV, 23 kT) weigh < 1e-9.
    dev = vdw_device(cross=True)
    temperature = 1.0
    kT = constants.k * temperature / constants.e  # eV
    x, y = np.linspace(0.0, 0.03, 61), np.linspace(0.0, 0.03, 57)
    mean = []
    for coupling in ((1.0, 0.0), (0.0, 1.0)):  # a linear read-out of one dot's charge
        sm = simulate_map(dev, x_gate="PA", y_gate="PB", x_range_V=(x[0], x[-1]), y_range_V=(y[0], y[-1]),
                          shape=(y.size, x.size), temperature_K=temperature, readout="charge",
                          sensor=SensorModel(coupling_mV=coupling))
        mean.append(sm.data.values)
    X, Y = np.meshgrid(x, y)
    n0 = induced_charge(dev.cdg, np.stack([X.ravel(), Y.ravel()], axis=1), dev.offsets)
    states = np.array([(a, b) for a in range(8) for b in range(8)], float)
    u = np.stack([ci_energy(s, n0, dev.ec_eV) for s in states])  # (64, pixels)
    w = np.exp(-(u - u.min(axis=0)) / kT)
    p = w / w.sum(axis=0)
    assert n0.max() < 6.0  # the box of states holds every state within 20 kT of each pixel's lowest
    for i in range(2):
        np.testing.assert_allclose(mean[i].ravel(), states[:, i] @ p, atol=1e-6)
    # (the check has teeth: at a triple point, beside its three degenerate states, a fourth carries
    # more than 0.5 % of the weight)
    assert np.sort(p, axis=0)[-4].max() > 0.005


@pytest.mark.parametrize("t_ueV,temperature", [(10.0, 0.05), (20.0, 0.1), (10.0, 0.0)])
def test_interdot_polarisation_follows_the_two_level_formula(t_ueV, temperature):
    dev = vdw_device(cross=True)
    coarse = simulate_map(dev, x_gate="PA", y_gate="PB", x_range_V=(0.0, 0.03), y_range_V=(0.0, 0.03),
                          shape=(60, 60), temperature_K=0.0, readout="charge")
    seg = max(coarse.truth.lines_of("interdot"), key=lambda s: s.length_V)
    xm, ym = 0.5 * (seg.start[0] + seg.end[0]), 0.5 * (seg.start[1] + seg.end[1])
    sm = simulate_map(dev, x_gate="PA", y_gate="PB", x_range_V=(xm - 1.6e-3, xm + 1.6e-3), y_range_V=(ym, ym + 1e-7),
                      shape=(2, 801), temperature_K=temperature, tunnel_coupling_ueV=t_ueV, readout="charge",
                      sensor=SensorModel(coupling_mV=(1.0, 0.0)))
    a, b = (np.array(s) for s in seg.states)
    if a[0] < b[0]:
        a, b = b, a  # a holds the extra electron on dot1
    v = np.stack([sm.data["PA"].values, np.full(801, ym)], axis=1)
    n0 = induced_charge(dev.cdg, v, dev.offsets)
    eps = ci_energy(b, n0, dev.ec_eV) - ci_energy(a, n0, dev.ec_eV)  # eV, > 0 favours a
    p_rendered = sm.data.values[0] - b[0]
    p_formula = polarisation(eps, t_ueV * 1e-6, temperature)
    assert np.ptp(eps) > 10 * max(t_ueV * 1e-6, constants.k * max(temperature, 1e-3) / constants.e)
    # the rendered map diagonalises every nearby charge state; the other states
    # of the tunnel chain shift the two levels by ~t²/E_C, hence atol 2e-3
    np.testing.assert_allclose(p_rendered, p_formula, atol=2e-3)


def test_coulomb_diamond_edges_follow_the_capacitance_slopes():
    # worked example of the references: C_G = 10, C_S = 30, C_D = 40 aF →
    # m₊ = 0.2, m₋ = −0.333, α = 0.125, E_C = 2.003 meV, ΔV_G = 16.02 mV
    dm = coulomb_diamonds(c_gate_aF=10, c_source_aF=30, c_drain_aF=40, gate_range_V=(0.0, 0.04),
                          bias_range_mV=(-3, 3), shape=(1201, 81), temperature_K=0.05)
    t = dm.truth
    assert t.slope_plus == pytest.approx(0.2)
    assert t.slope_minus == pytest.approx(-1 / 3)
    assert t.lever_arm == pytest.approx(0.125)
    assert t.charging_energy_meV == pytest.approx(2.003, abs=1e-3)
    assert t.addition_voltage_V == pytest.approx(16.02e-3, abs=1e-5)
    # measured: at 4 mV above a degeneracy, current sets in at V_sd = m₊·4 mV and m₋·4 mV
    vdeg = t.degeneracy_V[0]
    gate = dm.data["PG"].values
    j = int(np.argmin(np.abs(gate - (vdeg + 4e-3))))
    dv = gate[j] - vdeg
    bias = dm.data["VSD"].values
    cur = np.abs(dm.clean[:, j])
    on = cur > 0.5 * np.max(np.abs(dm.clean)) * 0.02
    pos = bias[(bias > 0) & on].min()
    neg = bias[(bias < 0) & on].max()
    tol = 1e-4  # a few k_B T/e at 50 mK plus the 5 µV bias step
    assert pos == pytest.approx(t.slope_plus * dv, abs=tol)
    assert neg == pytest.approx(t.slope_minus * dv, abs=tol)


def test_double_dot_transport_needs_bias_and_triple_points():
    dev = vdw_device(cross=True)
    kw = dict(x_gate="PA", y_gate="PB", x_range_V=(0.0, 0.03), y_range_V=(0.0, 0.03), shape=(90, 90),
              temperature_K=0.1, readout="transport")
    zero = simulate_map(dev, bias_mV=0.0, **kw)
    biased = simulate_map(dev, bias_mV=0.3, **kw)
    # detailed balance: no current at zero bias
    assert np.max(np.abs(zero.clean)) < 1e-9 * max(1.0, np.max(np.abs(biased.clean)))
    # at finite bias current flows only in small regions (bias triangles at the triple points)
    i = np.abs(biased.clean)
    assert i.max() > 0
    assert np.mean(i > 0.05 * i.max()) < 0.1
