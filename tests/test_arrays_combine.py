"""Combination of pairwise maps into the array's virtual-gate matrix.

Specification: each map of gates (x, y) gives M[dot(x), y] and M[dot(y), x];
an element measured by several maps is their inverse-variance weighted mean,
with χ², the Birge ratio sqrt(χ²/(n−1)) (R. T. Birge, Phys. Rev. 40, 207
(1932)) and the uncertainty scaled by the Birge ratio when it exceeds 1
(Particle Data Group scale factor, from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from stabtool.arrays import PairMeasurement, assemble_virtual_gates
from stabtool.errors import InputError
from stabtool.physics.ci import double_dot_slopes, lever_arm_matrix, virtual_gate_matrix
from stabtool.physics.virtual_gates import (
    element_from_x_dot_slope,
    element_from_y_dot_slope,
    inverse_variance_mean,
)


def _three_maps() -> list[PairMeasurement]:
    # Map "a" and "b" sweep P1 on x, map "c" sweeps P2 on x (swapped axes).
    return [
        PairMeasurement("P1", "P2", 0.30, 0.01, 0.42, 0.02, source="a"),
        PairMeasurement("P1", "P2", 0.33, 0.02, 0.38, 0.02, source="b"),
        # x = P2: m_xy is M[dot(P2), P1], m_yx is M[dot(P1), P2]
        PairMeasurement("P2", "P1", 0.40, 0.01, 0.28, 0.01, source="c"),
    ]


def test_hand_computed_combination() -> None:
    """Hand computation (exact fractions):

    M[P1-dot, P2] from 0.30±0.01 (a), 0.33±0.02 (b), 0.28±0.01 (c):
      w = 10000, 2500, 10000; Σw = 22500; Σwx = 3000 + 825 + 2800 = 6625
      mean = 6625/22500 = 53/180 = 0.294444...
      σ_int = 1/sqrt(22500) = 1/150
      deviations (×180): +1, +6.4, −2.6
      χ² = (10000·1 + 2500·40.96 + 10000·6.76)/180² = 180000/32400 = 50/9
      dof = 2, Birge ratio = sqrt(25/9) = 5/3, σ = (5/3)(1/150) = 1/90
      p = exp(−χ²/2) for 2 dof = exp(−25/9) = 0.062177
    M[P2-dot, P1] from 0.42±0.02 (a), 0.38±0.02 (b), 0.40±0.01 (c):
      w = 2500, 2500, 10000; Σw = 15000; Σwx = 1050 + 950 + 4000 = 6000
      mean = 0.4; χ² = 2500·0.0004·2 = 2; Birge ratio 1 → σ = 1/sqrt(15000)
    Overall: χ² = 50/9 + 2 = 68/9 for 4 dof.
    """
    vgm = assemble_virtual_gates(_three_maps())
    assert vgm.plungers == ("P1", "P2") and vgm.gates == ("P1", "P2")
    np.testing.assert_allclose(vgm.matrix, [[1.0, 53 / 180], [0.4, 1.0]], rtol=0, atol=1e-12)
    np.testing.assert_allclose(vgm.uncertainty_internal[0, 1], 1 / 150, rtol=1e-12)
    np.testing.assert_allclose(vgm.chi2[0, 1], 50 / 9, rtol=1e-12)
    assert vgm.dof[0, 1] == 2 and vgm.n_estimates[0, 1] == 3
    np.testing.assert_allclose(vgm.birge_ratio[0, 1], 5 / 3, rtol=1e-12)
    np.testing.assert_allclose(vgm.uncertainty[0, 1], 1 / 90, rtol=1e-12)
    np.testing.assert_allclose(vgm.p_value[0, 1], math.exp(-25 / 9), rtol=1e-9)
    np.testing.assert_allclose(vgm.p_value[0, 1], 0.062177, rtol=1e-4)

    np.testing.assert_allclose(vgm.chi2[1, 0], 2.0, rtol=1e-12)
    np.testing.assert_allclose(vgm.birge_ratio[1, 0], 1.0, rtol=1e-12)
    np.testing.assert_allclose(vgm.uncertainty[1, 0], 1 / math.sqrt(15000), rtol=1e-12)

    np.testing.assert_allclose(vgm.total_chi2, 68 / 9, rtol=1e-12)
    assert vgm.total_dof == 4
    np.testing.assert_allclose(vgm.overall_birge_ratio, math.sqrt(17 / 9), rtol=1e-12)
    # scipy.stats as the outside reference for the p-value
    np.testing.assert_allclose(vgm.overall_p_value, stats.chi2.sf(68 / 9, 4), rtol=1e-12)
    np.testing.assert_allclose(vgm.uncertainty[[0, 1], [0, 1]], 0.0)
    # p = 0.062 is not below the default 0.01: no inconsistency flagged, nothing unmeasured
    assert vgm.quality.ok, vgm.quality.warnings


def test_inconsistency_flag_names_element_and_maps() -> None:
    # two elements tested: each is flagged below p = 0.2/2 = 0.1 (Bonferroni); vP1<-P2 has
    # p = 0.062, vP2<-P1 p = exp(-1) = 0.37; the total χ² = 68/9 for 4 dof has p = 0.109 < 0.2
    vgm = assemble_virtual_gates(_three_maps(), inconsistency_p=0.2)
    assert not vgm.quality.ok
    elem = [w for w in vgm.quality.warnings if w.startswith("maps disagree beyond")]
    assert len(elem) == 1
    assert "vP1<-P2" in elem[0] and "a, b, c" in elem[0] and "Birge ratio 1.67" in elem[0]
    assert "vP2<-P1" not in elem[0]
    assert any(w.startswith("maps disagree overall") and "p=0.11" in w for w in vgm.quality.warnings)
    # with 0.1 the element threshold is 0.05 > 0.062: not flagged, the total (0.109) neither
    assert assemble_virtual_gates(_three_maps(), inconsistency_p=0.1).quality.ok


def test_weighted_mean_agrees_with_least_squares() -> None:
    """The weighted mean is the least-squares constant fit (numpy.linalg.lstsq as reference)."""
    rng = np.random.default_rng(4)
    x = rng.normal(0.3, 0.02, 7)
    s = rng.uniform(0.005, 0.03, 7)
    wm = inverse_variance_mean(x, s)
    a = (1 / s)[:, None]
    coef, res, *_ = np.linalg.lstsq(a, x / s, rcond=None)
    np.testing.assert_allclose(wm.mean, coef[0], rtol=1e-12)
    np.testing.assert_allclose(wm.chi2, res[0], rtol=1e-10)
    cov = np.linalg.inv(a.T @ a)
    np.testing.assert_allclose(wm.sigma_internal, math.sqrt(cov[0, 0]), rtol=1e-12)


def test_single_map_element_keeps_its_error_and_has_no_chi2() -> None:
    vgm = assemble_virtual_gates([PairMeasurement("P1", "P2", 0.3, 0.01, 0.4, 0.02, source="a")])
    np.testing.assert_allclose(vgm.uncertainty, [[0, 0.01], [0.02, 0]], atol=1e-15)
    assert np.all(np.isnan(vgm.chi2)) and vgm.total_dof == 0 and math.isnan(vgm.overall_birge_ratio)


def test_unmeasured_elements_are_zero_nan_and_named() -> None:
    maps = [
        PairMeasurement("P1", "P2", 0.3, 0.01, 0.4, 0.02, source="p12"),
        PairMeasurement("P2", "P3", 0.35, 0.01, 0.33, 0.02, source="p23"),
    ]
    vgm = assemble_virtual_gates(maps, plungers=["P1", "P2", "P3"])
    assert vgm.element("P1", "P3") == 0.0 and vgm.element("P3", "P1") == 0.0
    assert math.isnan(vgm.uncertainty[0, 2]) and math.isnan(vgm.uncertainty[2, 0])
    assert set(vgm.unmeasured) == {("P1", "P3"), ("P3", "P1")}
    assert not vgm.quality.ok
    assert any("vP1<-P3" in w and "vP3<-P1" in w for w in vgm.quality.warnings)


def test_doubtful_input_map_makes_result_doubtful() -> None:
    from stabtool.quality import Quality

    bad = PairMeasurement("P1", "P2", 0.3, 0.01, 0.4, 0.02, source="night.json",
                          quality=Quality(ok=False, warnings=("lines too faint",)))
    vgm = assemble_virtual_gates([bad])
    assert not vgm.quality.ok
    assert any("night.json" in w and "lines too faint" in w for w in vgm.quality.warnings)


def test_barrier_and_sensor_columns() -> None:
    """A plunger–barrier map gives the plunger's row only; a plunger–sensor map fills the sensor row."""
    maps = [
        PairMeasurement("P1", "B12", 0.5, 0.02, 0.9, 0.1, source="p1b12"),
        PairMeasurement("P1", "SG", 0.08, 0.01, 0.25, 0.01, source="p1sg"),
    ]
    vgm = assemble_virtual_gates(maps, plungers=["P1"], sensors=["SG"])
    assert vgm.plungers == ("P1", "SG") and vgm.gates == ("P1", "SG", "B12")
    assert vgm.virtual_gates == ("vP1", "vSG")
    np.testing.assert_allclose(vgm.matrix, [[1, 0.08, 0.5], [0.25, 1, 0]], atol=1e-15)
    comp = vgm.sensor_compensation()
    assert comp["P1"] == (-0.25, 0.01)
    assert any("not used" in w and "B12" in w for w in vgm.quality.warnings)


def test_elements_from_slopes_match_worked_example() -> None:
    """References file worked example [computed from the formulas]: Cdg = [[10, 3], [2.5, 9]] aF,
    C11 = C22 = 80 aF, Cm = 15 aF → slopes dot1 −2.2333, dot2 −0.45752; M = [[1, 0.44776], [0.45752, 1]]."""
    alpha = lever_arm_matrix(np.array([[10, 3], [2.5, 9]]), np.array([[80, -15], [-15, 80]]))
    s = double_dot_slopes(alpha)
    np.testing.assert_allclose([s.dot1, s.dot2], [-2.2333, -0.45752], rtol=2e-4)
    pm = PairMeasurement.from_slopes("P1", "P2", dot1_slope=s.dot1, dot1_slope_err=0.01,
                                     dot2_slope=s.dot2, dot2_slope_err=0.002)
    np.testing.assert_allclose([pm.m_xy, pm.m_yx], [0.44776, 0.45752], rtol=1e-4)
    np.testing.assert_allclose([[1, pm.m_xy], [pm.m_yx, 1]], virtual_gate_matrix(alpha), rtol=1e-12)


def test_slope_error_propagation_matches_finite_difference() -> None:
    s, ds = -2.5, 1e-6
    e = element_from_x_dot_slope(s, 0.04)
    deriv = (element_from_x_dot_slope(s + ds, 0).value - element_from_x_dot_slope(s - ds, 0).value) / (2 * ds)
    np.testing.assert_allclose(e.sigma, abs(deriv) * 0.04, rtol=1e-6)
    assert element_from_y_dot_slope(-0.4, 0.01).sigma == 0.01


def test_estimates_without_error_are_used_only_alone() -> None:
    maps = [
        PairMeasurement("P1", "P2", 0.30, float("nan"), 0.4, 0.02, source="noerr"),
        PairMeasurement("P1", "P2", 0.32, 0.01, float("nan"), float("nan"), source="good"),
    ]
    vgm = assemble_virtual_gates(maps)
    assert vgm.element("P1", "P2") == pytest.approx(0.32, abs=1e-12)
    assert any("noerr" in w for w in vgm.quality.warnings)


@pytest.mark.parametrize(
    "kwargs, fault",
    [
        ({"plungers": ["P1", "P1"]}, "listed twice"),
        ({"gates": ["P1"]}, "missing the plunger/sensor gate(s) P2"),
        ({"plungers": ["P1"], "gates": ["P1", "P3"]}, "P2 that are not in the gate list"),
        ({"sensors": ["P2"], "plungers": ["P1", "P2"]}, "both plunger and sensor"),
        ({"inconsistency_p": 1.5}, "must be in (0, 1)"),
    ],
)
def test_bad_parameters_raise_input_error(kwargs: dict, fault: str) -> None:
    with pytest.raises(InputError, match=fault.replace("(", r"\(").replace(")", r"\)")):
        assemble_virtual_gates([PairMeasurement("P1", "P2", 0.3, 0.01, 0.4, 0.02)], **kwargs)


def test_no_measurements_is_an_error() -> None:
    with pytest.raises(InputError, match="no pairwise measurement"):
        assemble_virtual_gates([])


def test_implausibly_large_coupling_is_flagged() -> None:
    """A dot couples most to its own plunger (common practice, no source): |M| >= 0.8 from a map
    means the lines were probably another dot's; the result is doubtful and names the map."""
    maps = [PairMeasurement("P2", "P4", 0.11, 0.01, 0.93, 0.01, source="p2p4.json")]
    vgm = assemble_virtual_gates(maps)
    assert not vgm.quality.ok
    assert any("implausible" in w and "vP4<-P2 = 0.93 from p2p4.json" in w for w in vgm.quality.warnings)
    assert assemble_virtual_gates([PairMeasurement("P2", "P4", 0.11, 0.01, 0.45, 0.01)]).quality.ok


def test_doubtful_map_is_left_out_where_an_ok_map_measured_the_same_element() -> None:
    """Hand-computed: the ok maps give 0.30 ± 0.01 and 0.32 ± 0.01 for vP1<-P2 → mean 0.31; the
    doubtful map's 0.50 is left out and listed, and the result stays ok."""
    from stabtool.quality import Quality

    maps = [
        PairMeasurement("P1", "P2", 0.30, 0.01, 0.40, 0.01, source="a"),
        PairMeasurement("P1", "P2", 0.32, 0.01, 0.40, 0.01, source="b"),
        PairMeasurement("P1", "P2", 0.50, 0.01, 0.40, 0.01, source="bad",
                        quality=Quality(ok=False, warnings=("charge jump",))),
    ]
    vgm = assemble_virtual_gates(maps)
    assert vgm.element("P1", "P2") == pytest.approx(0.31, abs=1e-12)
    assert vgm.n_estimates[0, 1] == 2
    assert sorted((r.estimate.source, r.reason) for r in vgm.rejected) == [("bad", "doubtful map"),
                                                                           ("bad", "doubtful map")]
    assert vgm.quality.ok, vgm.quality.warnings
    kept = assemble_virtual_gates(maps, reject_doubtful=False)
    assert kept.n_estimates[0, 1] == 3 and not kept.quality.ok


def test_implausible_estimate_is_left_out_of_the_mean() -> None:
    maps = [PairMeasurement("P2", "P4", 0.11, 0.01, 0.93, 0.01, source="x"),
            PairMeasurement("P2", "P4", 0.12, 0.01, 0.45, 0.01, source="y")]
    vgm = assemble_virtual_gates(maps)
    assert vgm.element("P4", "P2") == pytest.approx(0.45, abs=1e-12)
    assert [(str(r.estimate.value), r.reason) for r in vgm.rejected] == [("0.93", "implausible")]
    assert any("implausible" in w for w in vgm.quality.warnings)


def test_single_map_elements_take_the_overall_birge_ratio_when_the_maps_disagree() -> None:
    """Maps a, b, c (above: total χ² = 68/9 for 4 dof, p = 0.109, Birge ratio sqrt(17/9)) plus a
    map d that alone measures M[P2-dot, P3] = 0.35 ± 0.01 and M[P3-dot, P2] = 0.33 ± 0.02.
    Flagged at inconsistency_p = 0.2: d's errors, which no χ² can check, are scaled by
    sqrt(17/9) (hand computation); at the default 0.01 the total is not flagged and they stay."""
    d = PairMeasurement("P2", "P3", 0.35, 0.01, 0.33, 0.02, source="d")
    flagged = assemble_virtual_gates(_three_maps() + [d], inconsistency_p=0.2)
    b = math.sqrt(17 / 9)
    assert flagged.element("P2", "P3") == pytest.approx(0.35, abs=1e-15)
    np.testing.assert_allclose(flagged.uncertainty[1, 2], 0.01 * b, rtol=1e-12)
    np.testing.assert_allclose(flagged.uncertainty[2, 1], 0.02 * b, rtol=1e-12)
    np.testing.assert_allclose(flagged.uncertainty[0, 1], 1 / 90, rtol=1e-12)  # its own Birge ratio
    assert any("measured by one map only are scaled" in w for w in flagged.quality.warnings)
    calm = assemble_virtual_gates(_three_maps() + [d])
    np.testing.assert_allclose(calm.uncertainty[1, 2], 0.01, rtol=1e-12)
