"""Specification of how the refined (ΔV1, δ1, ΔV2, δ2) enter the adopted numbers.

When the global refinement is adopted (sound, agreeing with the lines), each of
ΔV1, δ1, ΔV2, δ2 is the generalised least-squares (best linear unbiased) mean of
the line-based value (at the refined M) and the refined value, with the two
estimates' correlation ``ADOPTION_CORRELATION`` (they read the same pixels), the
weight clipped to [0, 1], plus (for ΔV) the disagreement term
``DISAGREEMENT_SHARE · |refined − line-based|`` in the stated error.

Reference for the combination of two correlated estimates:
L. Lyons, D. Gibaut and P. Clifford, "How to combine correlated estimates of a
single physical quantity", Nucl. Instrum. Meth. A 270, 110 (1988),
doi:10.1016/0168-9002(88)90018-6 (from memory): weight
``(σ2² − ρσ1σ2)/(σ1² + σ2² − 2ρσ1σ2)`` on estimate 1, variance
``σ1²σ2²(1 − ρ²)/(σ1² + σ2² − 2ρσ1σ2)``.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.fit.refine import (
    ADOPTION_CORRELATION,
    DISAGREEMENT_SHARE,
    INCONSISTENT_Z,
    _combine_addition_mutual,
)


def _blue(s1, s2, rho):
    """Weight on estimate 2 and variance of the best linear unbiased mean (Lyons et al. 1988)."""
    den = s1**2 + s2**2 - 2 * rho * s1 * s2
    return (s1**2 - rho * s1 * s2) / den, s1**2 * s2**2 * (1 - rho**2) / den


def test_equal_values_are_combined_with_the_textbook_correlated_weights():
    s_line = np.array([1.0e-4, 2.0e-3, 1.2e-4, 2.5e-3])
    s_ref = np.array([0.8e-4, 1.0e-3, 1.0e-4, 1.0e-3])
    p = np.array([5e-3, 1e-3, 6e-3, 1.2e-3])
    value, cov, cov_m, term = _combine_addition_mutual(
        p, np.diag(s_line**2), np.zeros((2, 4)), p.copy(), np.diag(s_ref**2), np.zeros((2, 4)), mutual=True)
    w, var = _blue(s_line, s_ref, np.array(ADOPTION_CORRELATION))
    # where the textbook weight lies within [0, 1] the stated variance is the BLUE variance
    inside = (w >= 0) & (w <= 1)
    assert inside.any()
    np.testing.assert_allclose(np.diag(cov)[inside], var[inside], rtol=1e-12)
    # equal inputs: value unchanged, no disagreement term
    np.testing.assert_allclose(value, p, rtol=1e-12)
    np.testing.assert_allclose(term, 0.0, atol=0.0)
    np.testing.assert_allclose(cov_m, 0.0, atol=0.0)


def test_weight_is_clipped_so_the_better_estimate_is_never_overtaken():
    # ρσ_R > σ_L: the textbook weight on the refined value is negative (extrapolation past the line-based
    # value); clipped to 0 the adopted value is the line-based one and its variance σ_L², not less
    s_line = np.full(4, 1.0e-4)
    s_ref = np.full(4, 3.0e-4)
    p_line = np.array([5e-3, 1e-3, 6e-3, 1.2e-3])
    p_ref = p_line * 1.001
    value, cov, _, term = _combine_addition_mutual(
        p_line, np.diag(s_line**2), np.zeros((2, 4)), p_ref, np.diag(s_ref**2), np.zeros((2, 4)), mutual=True)
    np.testing.assert_allclose(value, p_line, rtol=1e-12)
    # the disagreement term enters the error of ΔV (indices 0, 2), not of δ
    want = DISAGREEMENT_SHARE * np.abs(p_ref - p_line) * np.array([1.0, 0.0, 1.0, 0.0])
    np.testing.assert_allclose(term, want, rtol=1e-12, atol=0.0)
    np.testing.assert_allclose(np.diag(cov), s_line**2 + want**2, rtol=1e-12)


def test_estimates_inconsistent_under_the_assumed_correlation_get_the_scale_factor():
    # Two estimates whose difference is z > INCONSISTENT_Z of its own standard error (with the assumed
    # correlation) cannot both be right: the combined error is multiplied by S = z, the scale factor of
    # an unconstrained average (Particle Data Group, Review of Particle Physics, "Introduction",
    # from memory: S = [χ²/(N − 1)]^½, here N = 2). Consistent elements keep their error.
    s_line = np.array([1.0e-4, 1.6e-4, 1.5e-4, 1.6e-4])
    s_ref = np.array([0.3e-4, 1.7e-4, 0.6e-4, 1.7e-4])
    p_line = np.array([38.0e-3, 1.00e-3, 49.0e-3, 2.15e-3])
    p_ref = p_line + np.array([0.3e-4, 0.5e-4, 0.0, 4.6e-4])  # δ2 apart by ≈ 6 of its σ_Δ
    rho = np.array(ADOPTION_CORRELATION)
    sd = np.sqrt(s_line**2 + s_ref**2 - 2 * rho * s_line * s_ref)
    z = np.abs(p_ref - p_line) / sd
    assert z[3] > INCONSISTENT_Z > z[:3].max()
    base = _combine_addition_mutual(p_line, np.diag(s_line**2), np.zeros((2, 4)), p_line, np.diag(s_ref**2),
                                     np.zeros((2, 4)), mutual=True)[1]
    value, cov, _, _ = _combine_addition_mutual(p_line, np.diag(s_line**2), np.zeros((2, 4)), p_ref,
                                                np.diag(s_ref**2), np.zeros((2, 4)), mutual=True)
    assert p_line[3] < value[3] < p_ref[3]
    assert np.sqrt(cov[3, 3]) == pytest.approx(z[3] * np.sqrt(base[3, 3]), rel=1e-9)
    term = DISAGREEMENT_SHARE * np.abs(p_ref - p_line)
    np.testing.assert_allclose(np.diag(cov)[[0, 2]], np.diag(base)[[0, 2]] + term[[0, 2]] ** 2, rtol=1e-9)
    np.testing.assert_allclose(cov[1, 1], base[1, 1], rtol=1e-12)


def test_unresolved_mutual_shifts_stay_line_based():
    s = np.full(4, 1.0e-4)
    p_line = np.array([5e-3, 1e-5, 6e-3, 1.2e-5])
    p_ref = np.array([5.001e-3, 3e-5, 6.001e-3, 3e-5])
    value, cov, _, term = _combine_addition_mutual(
        p_line, np.diag(s**2), np.zeros((2, 4)), p_ref, np.diag((0.9 * s) ** 2), np.zeros((2, 4)), mutual=False)
    assert value[1] == p_line[1] and value[3] == p_line[3]
    assert term[1] == 0.0 and term[3] == 0.0
    np.testing.assert_allclose(cov[[1, 3], [1, 3]], s[[1, 3]] ** 2, rtol=1e-12)
    # ΔV still combined: strictly between the two values
    assert p_line[0] < value[0] < p_ref[0]


@pytest.mark.regression
def test_adopted_addition_and_mutual_lie_between_the_estimates_and_cover_the_truth():
    # a noisy (SNR 10) bench map of 3–4 px broad lines where the refined mutual shifts carry weight:
    # each adopted value lies between the line-based (at the refined M) and the refined one, and the
    # generator truth lies within 3 stated errors (coverage of the stated covariance)
    from stabtool.bench.grid import BenchCase
    from stabtool.bench.maps import make_case_map
    from stabtool.fit.model import fit_diagram
    from stabtool.fit.refine import adopt_refinement, refine_model
    from stabtool.lines import detect_lines

    bm = make_case_map(BenchCase(index=0, snr=10.0, preset="si-sige-double", artefact="none", seed=12, size_px=112))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = fit_diagram(detect_lines(bm.data), data=bm.data)
        ref = refine_model(bm.data, fit)
    a = adopt_refinement(fit, ref)
    assert a.adopted
    assert np.any(a.weight_refined > 0.1)
    vec, _ = ref.vector()
    line_at_m = fit.params[2:] + fit.lattice.grad_m[[0, 1, 3, 4]] @ (vec[:2] - fit.params[:2])
    got = a.fit.params[2:]
    lo, hi = np.minimum(line_at_m, vec[2:]), np.maximum(line_at_m, vec[2:])
    assert np.all((got >= lo - 1e-15) & (got <= hi + 1e-15))
    t = bm.truth.to_json()
    truth = np.array([t["addition_voltages_V"]["dot1"], t["mutual_shifts_V"]["dot1"],
                      t["addition_voltages_V"]["dot2"], t["mutual_shifts_V"]["dot2"]])
    err = np.sqrt(np.diag(a.fit.param_cov)[2:])
    assert np.all(np.abs(got - truth) <= 3 * err), (got / truth - 1, err / truth)
