"""Global constant-interaction fit to the map (stabtool.fit.refine) and line re-measurement."""

import warnings

import numpy as np
import pytest
from _fit import WORKED, truth_from_capacitances

from stabtool.fit.charge_states import ground_state_labels
from stabtool.fit.refine import model_occupations


def test_cold_limit_is_the_ground_state():
    # as w → 0 the Boltzmann average tends to the CI ground state (van der Wiel et al. 2003)
    t = truth_from_capacitances(**WORKED)
    rng = np.random.default_rng(0)
    x, y = rng.uniform(0, 0.06, 4000), rng.uniform(0, 0.06, 4000)
    r = t.alpha[1, 1] / t.alpha[0, 0]
    theta = np.array([t.m[0, 1], t.m[1, 0], *t.addition_V, t.mutual_V[0], r, 0.0, 0.0, 1e-7])
    o1, o2 = model_occupations(x, y, theta, n_min=(0, 0))
    lab = ground_state_labels(x + t.m[0, 1] * y, t.m[1, 0] * x + y, addition_V=t.addition_V,
                              mutual_V=t.mutual_V, offsets_V=np.zeros(2), n_min=(0, 0))
    assert np.mean((np.rint(o1) == lab[:, 0]) & (np.rint(o2) == lab[:, 1])) > 0.999


def test_thermal_step_is_fermi_dirac():
    # far from other lines ⟨N1⟩ across a dot1 line is 1 − f with f = 1/(1+exp((V−V0)/w))
    # (thermal.py; standard Fermi–Dirac statistics)
    from stabtool.physics import fermi_occupation

    theta = np.array([0.0, 0.0, 0.02, 0.02, 0.002, 1.0, 0.0, 0.0, 4e-4])
    x = np.linspace(0.004, 0.016, 200)
    y = np.full_like(x, 0.0)
    o1, _ = model_occupations(x, y, theta)
    # dot1 line N1 = 0 → 1 at V'1 = ΔV1/2 = 10 mV
    np.testing.assert_allclose(o1 - np.floor(o1.min()), 1 - fermi_occupation(x, 0.010, 4e-4), atol=1e-6)


@pytest.mark.regression
def test_refinement_on_a_generator_map():
    from stabtool.analysis import Analyzer
    from stabtool.simulate import quick_double_dot

    sm = quick_double_dot("si-sige-double", snr=30.0, rng=2, temperature_K=3.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = Analyzer(refine=True)(sm.data)
    ref = res.refinement
    assert ref is not None
    tr = sm.truth.to_json()
    p = ref.params
    assert p["addition_V1"] == pytest.approx(tr["addition_voltages_V"]["dot1"], rel=0.01)
    assert p["addition_V2"] == pytest.approx(tr["addition_voltages_V"]["dot2"], rel=0.01)
    assert ref.residual_ratio < 3.0


def test_relocation_recovers_a_common_slope():
    from stabtool.fit.relocate import relocate_family
    from stabtool.lines.result import TransitionLine

    # three parallel sharp steps x = x_k + b y on a 1 mV grid, b = 0.3 (dx/dy), white noise
    x = np.linspace(0, 0.1, 101)
    y = np.linspace(0, 0.06, 61)
    xx, yy = np.meshgrid(x, y)
    b = 0.3
    z = sum((xx > xk + b * yy).astype(float) for xk in (0.02, 0.045, 0.07))
    z = z + np.random.default_rng(1).normal(0, 0.1, z.shape)
    lines = [TransitionLine(family="dot1", x0=xk + b * 0.03 + 0.0007, y0=0.03, slope=1 / 0.33, slope_stderr=0.1,
                            position_stderr=1e-4, start=(xk, 0.0), end=(xk + b * 0.06, 0.06)) for xk in (0.02, 0.045, 0.07)]
    rel = relocate_family(z, x, y, lines, which=0, initial=0.33, noise=0.1)
    assert rel.ok
    assert rel.inv_or_slope == pytest.approx(b, abs=3 * rel.stderr + 1e-3)
    assert rel.stderr < 0.01


def _bench_map(preset, snr, seed, size=112):
    from stabtool.bench.grid import BenchCase
    from stabtool.bench.maps import make_case_map

    return make_case_map(BenchCase(index=0, snr=snr, preset=preset, artefact="none", seed=seed, size_px=size))


@pytest.mark.regression
def test_refined_parameters_agree_with_the_truth_within_their_errors():
    # generator truth (stabtool.simulate); thermally broadened lines 3-4 px wide
    from stabtool.fit.model import fit_diagram
    from stabtool.fit.refine import refine_model
    from stabtool.lines import detect_lines

    bm = _bench_map("ge-double", 30.0, 21)
    fit = fit_diagram(detect_lines(bm.data), data=bm.data)
    assert fit.ok
    ref = refine_model(bm.data, fit)
    assert ref.converged and ref.ok, ref.quality.warnings
    tr = bm.truth.to_json()
    vec, cov = ref.vector()
    truth = np.array([tr["virtual_gate_matrix"][0][1], tr["virtual_gate_matrix"][1][0],
                      tr["addition_voltages_V"]["dot1"], tr["mutual_shifts_V"]["dot1"],
                      tr["addition_voltages_V"]["dot2"], tr["mutual_shifts_V"]["dot2"]])
    # the issue bounds: |ΔM| ≤ 0.005 on a clean map; ΔV (→ E_C) within 5 %
    np.testing.assert_allclose(vec[:2], truth[:2], atol=0.005)
    np.testing.assert_allclose(vec[[2, 4]], truth[[2, 4]], rtol=0.01)
    np.testing.assert_allclose(vec[[3, 5]], truth[[3, 5]], rtol=0.05)
    # the residual is at the noise level when the model describes the map
    assert ref.residual_ratio < 1.5
    # thermal width along x: w1 = k_B T_e / (e α11) (Fermi–Dirac; conventions file)
    from stabtool.physics.constants import KB_OVER_E

    w_true = KB_OVER_E * bm.truth.temperature_K / tr["lever_arm"][0][0]
    assert ref.params["width_V1"] == pytest.approx(w_true, rel=0.05)


@pytest.mark.regression
def test_refinement_converges_on_sharp_lines():
    # lines far sharper than a pixel (the presets' typical temperature): the width is unresolved,
    # yet the positions converge and the virtual gates stay within the clean-map bound of the issue
    from stabtool.fit.model import fit_diagram
    from stabtool.fit.refine import refine_model
    from stabtool.lines import detect_lines
    from stabtool.simulate import quick_double_dot

    sm = quick_double_dot("gaas-double", snr=30.0, rng=1)
    fit = fit_diagram(detect_lines(sm.data), data=sm.data)
    ref = refine_model(sm.data, fit)
    assert ref.converged and ref.ok
    assert not ref.width_resolved
    mt = np.array(sm.truth.to_json()["virtual_gate_matrix"])
    for key, truth in (("M12", mt[0, 1]), ("M21", mt[1, 0])):
        assert ref.params[key] == pytest.approx(truth, abs=0.005)
        assert abs(ref.params[key] - truth) <= 4 * ref.errors[key]


@pytest.mark.regression
def test_refinement_is_adopted_only_when_it_agrees_with_the_lines():
    from dataclasses import replace

    from stabtool.fit.model import fit_diagram
    from stabtool.fit.refine import adopt_refinement, refine_model
    from stabtool.lines import detect_lines

    bm = _bench_map("si-sige-double", 30.0, 22)
    fit = fit_diagram(detect_lines(bm.data), data=bm.data)
    ref = refine_model(bm.data, fit)
    good = adopt_refinement(fit, ref)
    assert good.adopted
    assert good.fit.vg_matrix[0, 1] == pytest.approx(ref.params["M12"], abs=1e-12)
    # Cdg is recomputed from the refined numbers: Cdg = e D⁻¹ M (conventions file identity)
    from stabtool.physics.constants import E_AC

    d = good.fit.diagram_matrix
    np.testing.assert_allclose(good.fit.cdg_aF, E_AC * np.linalg.inv(d) @ good.fit.vg_matrix, rtol=1e-9)
    # a line-based estimate 20 of its standard errors away is not overridden
    p = fit.params.copy()
    p[0] += 20 * np.sqrt(fit.param_cov[0, 0] + ref.cov[0, 0])
    far = replace(fit, params=p)
    bad = adopt_refinement(far, ref)
    assert not bad.adopted
    assert bad.fit is far
    assert not bad.quality.ok and "M12" in bad.quality.warnings[0]


def test_clustered_covariance_matches_the_scatter_of_estimates():
    # straight-line least squares with one random offset per row (correlated residuals):
    # the sandwich standard error must match the Monte Carlo scatter of the estimates
    # (Liang & Zeger, Biometrika 1986), where the plain χ²-scaled error is far too small
    from stabtool.fit.refine import clustered_covariance

    rng = np.random.default_rng(3)
    rows, per = 40, 30
    cl = np.repeat(np.arange(rows), per)
    x = rng.uniform(-1, 1, rows)[cl] + 0.05 * rng.normal(size=cl.size)  # x nearly constant in a row
    a = np.column_stack([np.ones_like(x), x])
    est, stated, plain = [], [], []
    for _ in range(300):
        yv = 1.0 + 2.0 * x + rng.normal(0, 1.0, rows)[cl] + rng.normal(0, 0.3, cl.size)
        coef, *_ = np.linalg.lstsq(a, yv, rcond=None)
        res = yv - a @ coef
        est.append(coef[1])
        stated.append(np.sqrt(clustered_covariance(a, res, cl, dof=cl.size - 2)[1, 1]))
        plain.append(np.sqrt(np.linalg.inv(a.T @ a)[1, 1] * (res @ res) / (cl.size - 2)))
    scatter = np.std(est)
    assert np.median(stated) == pytest.approx(scatter, rel=0.2)
    assert np.median(plain) < 0.5 * scatter
