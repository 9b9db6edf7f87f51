"""Formulas of stabtool.physics checked against published worked numbers.

Each worked number is recomputed from the formula and its inputs, then
compared with the value written in the literature (or in the references
list, where the value is marked "from memory").
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import constants

from stabtool.physics import (
    E_AC,
    KB_EV_PER_K,
    addition_energy_meV,
    addition_voltages,
    broadened_occupation,
    cdg_from_diagram,
    charging_energy_matrix_meV,
    diamond_capacitances,
    diamond_lever_arm,
    diamond_lever_arm_stderr,
    diamond_slopes,
    double_dot_slopes,
    fermi_occupation,
    ghz_to_ueV,
    lever_arm_from_bias_triangle,
    lever_arm_from_fwhm,
    lever_arm_matrix,
    mutual_shift_from_staircase,
    mutual_shifts,
    polarisation,
    polarisation_derivative,
    polarisation_fwhm_eV,
    saturated_temperature,
    simple_double_dot,
    staircase_mean_element,
    thermal_fwhm_V,
    ueV_to_ghz,
    virtual_gate_matrix,
    ZERO_T_FWHM_FACTOR,
)

# ---------------------------------------------------------------------------------------------
# van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003): double dot without cross-capacitances.
# Worked example: C_g = 10 aF, Cm = 20 aF, C1 = C2 = 80 aF →
# ΔV_g1 = 16.022 mV, ΔV_g1^m = 4.005 mV, E_C1 = 2.136 meV, E_Cm = 0.534 meV.
# ---------------------------------------------------------------------------------------------


def test_simple_double_dot_matches_van_der_wiel_example():
    dd = simple_double_dot(10.0, 10.0, 20.0, 80.0, 80.0)
    assert dd.addition_V1 * 1e3 == pytest.approx(16.022, abs=5e-4)
    assert dd.splitting_V1 * 1e3 == pytest.approx(4.005, abs=5e-4)
    assert dd.ec1_meV == pytest.approx(2.136, abs=5e-4)
    assert dd.ecm_meV == pytest.approx(0.534, abs=5e-4)
    # E_Cm/E_C1 = Cm/C2 = 0.25
    assert dd.ecm_meV / dd.ec1_meV == pytest.approx(0.25, rel=1e-12)
    # ΔV_g1 = |e|/C_g1 with e from scipy.constants
    assert dd.addition_V1 == pytest.approx(constants.e / 10e-18, rel=1e-12)


def test_general_ci_formulas_reduce_to_van_der_wiel_example():
    cdg = np.array([[10.0, 0.0], [0.0, 10.0]])
    cdd = np.array([[80.0, -20.0], [-20.0, 80.0]])
    ec = charging_energy_matrix_meV(cdd)
    alpha = lever_arm_matrix(cdg, cdd)
    dd = simple_double_dot(10.0, 10.0, 20.0, 80.0, 80.0)
    assert ec[0, 0] == pytest.approx(dd.ec1_meV, rel=1e-12)
    assert ec[0, 1] == pytest.approx(dd.ecm_meV, rel=1e-12)
    assert ec[0, 0] == pytest.approx(2.136, abs=5e-4)
    assert ec[0, 1] == pytest.approx(0.534, abs=5e-4)
    dv = addition_voltages(ec, alpha)
    dm = mutual_shifts(ec, alpha)
    # ΔV1 = E_C1/(e α11) = |e|/C_g1 and δ1 = ΔV_g1^m
    assert dv[0] * 1e3 == pytest.approx(16.022, abs=5e-4)
    assert dm[0] * 1e3 == pytest.approx(4.005, abs=5e-4)
    # identity Cdg = e D⁻¹ M recovers the gate capacitances
    np.testing.assert_allclose(cdg_from_diagram(dv, dm, virtual_gate_matrix(alpha)), cdg, atol=1e-9)


# ---------------------------------------------------------------------------------------------
# Virtual gates (Hensgens et al., Nature 548, 70 (2017); Volk et al., npj Quantum Inf. 5, 29
# (2019)); worked example computed from the CI formulas: Cdg = [[10, 3], [2.5, 9]] aF,
# C11 = C22 = 80 aF, Cm = 15 aF.
# ---------------------------------------------------------------------------------------------


def test_virtual_gate_worked_example():
    cdg = np.array([[10.0, 3.0], [2.5, 9.0]])
    cdd = np.array([[80.0, -15.0], [-15.0, 80.0]])
    alpha = lever_arm_matrix(cdg, cdd)
    np.testing.assert_allclose(alpha, [[0.13563, 0.06073], [0.05668, 0.12389]], atol=6e-6)
    s = double_dot_slopes(alpha)
    assert s.dot1 == pytest.approx(-2.2333, abs=6e-5)
    assert s.dot2 == pytest.approx(-0.45752, abs=6e-6)
    assert s.interdot == pytest.approx(1.2500, abs=6e-5)
    m = virtual_gate_matrix(alpha)
    np.testing.assert_allclose(m, [[1, 0.44776], [0.45752, 1]], atol=6e-6)
    ec = charging_energy_matrix_meV(cdd)
    dv = addition_voltages(ec, alpha)
    np.testing.assert_allclose(dv * 1e3, [15.304, 16.755], atol=6e-4)
    # M = [[1, −1/s1], [−s2, 1]] (conventions)
    assert m[0, 1] == pytest.approx(-1 / s.dot1, rel=1e-12)
    assert m[1, 0] == pytest.approx(-s.dot2, rel=1e-12)
    np.testing.assert_allclose(cdg_from_diagram(dv, mutual_shifts(ec, alpha), m), cdg, atol=1e-9)


# ---------------------------------------------------------------------------------------------
# Coulomb diamonds (standard; slopes from memory, Kouwenhoven et al., Rep. Prog. Phys. 64, 701
# (2001)): C_G = 10, C_S = 30, C_D = 40 aF → m₊ = 0.2, m₋ = −0.333, α = 0.125, E_C = 2.003 meV,
# ΔV_G = 16.02 mV.
# ---------------------------------------------------------------------------------------------


def test_a_straight_line_through_a_staircase_has_the_bare_gate_capacitance_ratio():
    # the virtual-gate worked example's device (Cdg = [[10, 3], [2.5, 9]] aF, C11 = C22 = 80 aF,
    # Cm = 15 aF): the mean of a dot-i line over the other dot's steps is Q_i = Σ_j Cdg_ij V_j = const,
    # so its element of M is Cdg_ij/Cdg_ii, from the identity Cdg = e D⁻¹ M of the CI model
    cdg = np.array([[10.0, 3.0], [2.5, 9.0]])
    cdd = np.array([[80.0, -15.0], [-15.0, 80.0]])
    ec = charging_energy_matrix_meV(cdd)
    alpha = lever_arm_matrix(cdg, cdd)
    m = virtual_gate_matrix(alpha)
    dv, dm = addition_voltages(ec, alpha), mutual_shifts(ec, alpha)
    straight12 = staircase_mean_element(m[0, 1], m[1, 0], dv[1], dm[0])
    straight21 = staircase_mean_element(m[1, 0], m[0, 1], dv[0], dm[1])
    assert straight12 == pytest.approx(cdg[0, 1] / cdg[0, 0], rel=1e-12)
    assert straight21 == pytest.approx(cdg[1, 0] / cdg[1, 1], rel=1e-12)
    assert abs(straight12 - m[0, 1]) > 0.01  # (the lines' own element differs: δ1 is not small)
    # and the band pieces' element with the straight line's gives the mutual shift back
    assert mutual_shift_from_staircase(m[0, 1], straight12, m[1, 0], dv[1]) == pytest.approx(dm[0], rel=1e-12)
    assert mutual_shift_from_staircase(m[1, 0], straight21, m[0, 1], dv[0]) == pytest.approx(dm[1], rel=1e-12)


def test_coulomb_diamond_example_from_memory():
    m = diamond_slopes(10.0, 30.0, 40.0)
    assert m.plus == pytest.approx(0.2, abs=5e-4)
    assert m.minus == pytest.approx(-0.333, abs=5e-4)
    alpha = diamond_lever_arm(m.plus, m.minus)
    assert alpha == pytest.approx(0.125, abs=5e-4)
    assert alpha == pytest.approx(10.0 / 80.0, rel=1e-12)  # α = C_G/C_Σ
    width = E_AC / 10.0  # ΔV_G = e/C_G
    assert width * 1e3 == pytest.approx(16.02, abs=5e-3)
    e_add = addition_energy_meV(alpha, width)
    assert e_add == pytest.approx(2.003, abs=5e-4)
    assert e_add == pytest.approx(1e3 * constants.e / 80e-18, rel=1e-12)  # e²/C_Σ in meV
    caps = diamond_capacitances(m.plus, m.minus, width_V=width)
    assert (caps.gate_aF, caps.source_aF, caps.drain_aF) == pytest.approx((10.0, 30.0, 40.0), rel=1e-12)
    assert caps.total_aF == pytest.approx(80.0, rel=1e-12)


def test_diamond_lever_arm_error_matches_finite_differences():
    mp, mm, ep, em = 0.2, -1 / 3, 0.004, 0.006
    h = 1e-7
    dp = (diamond_lever_arm(mp + h, mm) - diamond_lever_arm(mp - h, mm)) / (2 * h)
    dm = (diamond_lever_arm(mp, mm - h) - diamond_lever_arm(mp, mm + h)) / (2 * h)
    expected = np.hypot(dp * ep, dm * em)
    assert diamond_lever_arm_stderr(mp, mm, ep, em) == pytest.approx(expected, rel=1e-6)


def test_bias_triangle_lever_arm_van_der_wiel():
    # α1 = C_g1/C1 = |e| V_sd/δV_g1 (van der Wiel et al. 2003): with C_g1 = 10 aF, C1 = 80 aF a
    # triangle at V_sd = 0.5 mV spans δV_g1 = V_sd C1/C_g1 = 4 mV.
    assert lever_arm_from_bias_triangle(-0.5e-3, 4e-3) == pytest.approx(10.0 / 80.0, rel=1e-12)


# ---------------------------------------------------------------------------------------------
# Thermal broadening (standard Fermi–Dirac): FWHM 3.5255 kT; α = 0.1, T_e = 100 mK →
# FWHM = 0.3038 mV. Constants from scipy.constants.
# ---------------------------------------------------------------------------------------------


def test_fermi_fwhm_worked_example():
    fwhm = thermal_fwhm_V(0.1, 0.1)
    assert fwhm * 1e3 == pytest.approx(0.3038, abs=5e-5)
    assert fwhm == pytest.approx(4 * np.log(1 + np.sqrt(2)) * constants.k * 0.1 / constants.e / 0.1, rel=1e-12)
    assert lever_arm_from_fwhm(fwhm, 0.1) == pytest.approx(0.1, rel=1e-12)
    assert KB_EV_PER_K == pytest.approx(constants.physical_constants["Boltzmann constant in eV/K"][0], rel=1e-12)


def test_lorentzian_broadened_occupation_limits():
    v = np.linspace(-1e-3, 1e-3, 41)
    np.testing.assert_allclose(broadened_occupation(v, 0, 1e-4, 1e-12), fermi_occupation(v, 0, 1e-4), atol=1e-7)
    np.testing.assert_allclose(broadened_occupation(v, 0, 1e-9, 2e-4), 0.5 - np.arctan(v / 2e-4) / np.pi, atol=1e-5)
    # numerical convolution of the Fermi function with a Lorentzian (independent check)
    e = np.linspace(-0.05, 0.05, 400001)
    lor = (2e-4 / np.pi) / (e**2 + 2e-4**2)
    v0 = 1.5e-4
    num = np.trapezoid(lor * fermi_occupation(v0 - e, 0.0, 1e-4), e)
    assert broadened_occupation(np.array([v0]), 0.0, 1e-4, 2e-4)[0] == pytest.approx(num, abs=2e-3)


def test_saturation_model_limits():
    # T_e = sqrt(T² + T_sat²) (common practice, no source): plateau and linear regime
    assert saturated_temperature(0.0, 0.05) == pytest.approx(0.05)
    assert saturated_temperature(1.0, 0.05) == pytest.approx(1.0, rel=2e-3)
    assert saturated_temperature(0.05, 0.05) == pytest.approx(0.05 * np.sqrt(2))


# ---------------------------------------------------------------------------------------------
# Interdot polarisation line (DiCarlo et al., PRL 92, 226801 (2004), formula from memory),
# Ω = √(ε² + 4t²). FWHM of dP/dε: (t = 0, 100 mK) → 30.38 µeV; (10 µeV, 0) → 30.66 µeV;
# (10 µeV, 50 mK) → 31.58 µeV; (20 µeV, 100 mK) → 63.16 µeV. 1 GHz = 4.136 µeV.
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "t_ueV, temp_K, fwhm_ueV",
    [(0.0, 0.1, 30.38), (10.0, 0.0, 30.66), (10.0, 0.05, 31.58), (20.0, 0.1, 63.16)],
)
def test_polarisation_line_fwhm_check_values(t_ueV, temp_K, fwhm_ueV):
    assert polarisation_fwhm_eV(t_ueV * 1e-6, temp_K) * 1e6 == pytest.approx(fwhm_ueV, abs=0.006)


def test_polarisation_zero_temperature_fwhm_factor_and_limits():
    # the references list writes 3.0656 (truncated; 4√(2^(2/3) − 1) = 3.06568)
    assert ZERO_T_FWHM_FACTOR == pytest.approx(3.0656, abs=1e-4)
    eps = np.linspace(-200e-6, 200e-6, 401)
    # t = 0 reduces to a Fermi function of width kT (P rises with ε)
    np.testing.assert_allclose(polarisation(eps, 0.0, 0.1), 1 - fermi_occupation(eps, 0.0, KB_EV_PER_K * 0.1), atol=1e-12)
    # derivative is the numerical gradient
    p = polarisation(eps, 15e-6, 0.06)
    np.testing.assert_allclose(polarisation_derivative(eps, 15e-6, 0.06), np.gradient(p, eps), rtol=2e-3, atol=20)


def test_ghz_to_ueV_uses_planck_constant():
    assert ghz_to_ueV(1.0) == pytest.approx(4.136, abs=5e-4)
    assert ghz_to_ueV(1.0) == pytest.approx(constants.h * 1e9 / constants.e * 1e6, rel=1e-12)
    assert ueV_to_ghz(ghz_to_ueV(7.3)) == pytest.approx(7.3, rel=1e-12)
