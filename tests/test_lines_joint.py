"""Joint family fits: one shared slope for parallel lines, and triple-point bending.

Parallel lines of one family share a slope in the constant-interaction model
(van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)). Interdot tunnel coupling
t shifts a dot line near a triple point by the second-order energy shift
t²/ε (ε the detuning from the interdot line; two-level anticrossing, same
reference, Sec. II.C), i.e. ∝ 1/(distance to the vertex).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.lines import detect_lines
from stabtool.lines.joint import LinePoints, bending_significance, fit_family
from stabtool.simulate import quick_double_dot


def _lines(slope, *, bend=0.0, n_lines=5, n=40, sigma=0.01, rng=0):
    g = np.random.default_rng(rng)
    out = []
    for k in range(n_lines):
        t = np.linspace(0.0, 1.0, n) + 2.0 * k
        ta, tb = t[0] - 0.1, t[-1] + 0.1
        p = 0.7 * k + slope * (t - t.mean()) + bend * (1 / (t - ta) + 1 / (t - tb)) + g.normal(0, sigma, n)
        out.append(LinePoints(t=t, p=p, sig=np.full(n, sigma), vertices=(ta, tb)))
    return out


def test_shared_slope_recovered_within_its_error():
    fit = fit_family(_lines(-0.3), bend=False)
    # 5 lines x 40 points, σ = 0.01 over a unit span: σ_slope ≈ 0.01/√(200/12) ≈ 2.4e-3
    assert fit.slope == pytest.approx(-0.3, abs=4 * fit.slope_stderr)
    assert fit.slope_stderr == pytest.approx(0.01 / np.sqrt(200 / 12), rel=0.15)
    assert np.allclose(fit.offsets, 0.7 * np.arange(5), atol=0.01)


def test_bending_is_detected_and_removed():
    pts = _lines(-0.3, bend=0.01, sigma=0.005)
    straight, bent = fit_family(pts, bend=False), fit_family(pts, bend=True)
    # the 1/distance terms rotate a straight fit; the bent model removes the bias
    assert abs(straight.slope + 0.3) > 5 * straight.slope_stderr
    assert bent.slope == pytest.approx(-0.3, abs=4 * bent.slope_stderr)
    assert bending_significance(straight, bent) < 1e-6


def test_straight_lines_show_no_bending():
    pts = _lines(-0.3, bend=0.0, sigma=0.005, rng=3)
    straight, bent = fit_family(pts, bend=False), fit_family(pts, bend=True)
    assert bending_significance(straight, bent) > 1e-3


def _gaas(tc, seed):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sm = quick_double_dot(preset="gaas-double", shape=(256, 256), snr=10.0, rng=seed, tunnel_coupling_ueV=tc)
    truth = sm.truth.to_json()["slopes"]
    res = detect_lines(sm.data)
    errs = np.array([abs(res.family(f).slope / truth[f] - 1) for f in ("dot1", "dot2")])
    return res, errs


@pytest.mark.regression
def test_strong_tunnel_coupling_is_flagged_not_silently_biased():
    # t = 40 µeV rounds the honeycomb vertices; a straight fit of the lines is
    # biased by 3-6 % (generator truth: the uncoupled CI slopes)
    for seed in (0, 1):
        res, errs = _gaas(40.0, seed)
        if errs.max() > 0.005:
            assert not res.quality.ok
            assert any("bend towards the triple points" in w for w in res.quality.warnings)


@pytest.mark.regression
def test_uncoupled_lines_are_not_called_bent():
    res, errs = _gaas(0.0, 0)
    assert not any("bend towards" in w for w in res.quality.warnings)
    assert np.all(errs <= 0.005)


def test_closed_form_offsets_match_the_full_design_least_squares():
    # reference: numpy.linalg.lstsq on the full weighted design (one offset column
    # per line, shared slope and bending columns); eliminating the offsets by
    # within-line centring (Frisch–Waugh–Lovell) must give the same slope and
    # offsets, and the slope variance (X^T W X)^-1_00
    pts = _lines(-0.3, bend=0.004, sigma=0.01, rng=7)
    fit = fit_family(pts, bend=True, n_clip=1e9)
    rows, y, w = [], [], []
    for k, lp in enumerate(pts):
        X = np.zeros((lp.t.size, 1 + len(pts) + 2))
        X[:, 0] = lp.t - lp.t.mean()
        X[:, 1 + k] = 1.0
        span = np.ptp(lp.t)
        X[:, -2] = span / (lp.t - lp.vertices[0])
        X[:, -1] = span / (lp.t - lp.vertices[1])
        rows.append(X)
        y.append(lp.p)
        w.append(1 / lp.sig**2)
    X, y, w = np.vstack(rows), np.concatenate(y), np.concatenate(w)
    sw = np.sqrt(w)
    beta = np.linalg.lstsq(X * sw[:, None], y * sw, rcond=None)[0]
    cov = np.linalg.inv((X.T * w) @ X)
    r = (y - X @ beta) * sw
    chi2r = (r @ r) / (y.size - X.shape[1])
    assert fit.slope == pytest.approx(beta[0], rel=1e-9, abs=1e-12)
    assert np.allclose(fit.offsets, beta[1 : 1 + len(pts)], rtol=1e-9, atol=1e-12)
    assert fit.slope_stderr == pytest.approx(np.sqrt(cov[0, 0] * max(chi2r, 1.0)), rel=1e-6)
