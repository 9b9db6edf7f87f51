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


# --- thermal rounding of the vertices is not tunnel coupling -----------------------------------
#
# Three charge states meet at a triple point. Along a dot1 line the states A = (N1, N2) and
# B = (N1 + 1, N2) are degenerate; the third state C (one electron more or less on dot2) lies
# ε_C = k_B T_e · c above them, c growing linearly with the distance from the vertex. The
# half-occupation point ⟨N1⟩ = ½ solves e^{-E_B} = e^{-E_A} + e^{-E_C} (Boltzmann weights of the
# three states, Fermi–Dirac statistics of a single level; van der Wiel et al., Rev. Mod. Phys. 75,
# 1 (2003)): the line moves by w1 · ln(1 + e^{-c}) along x (w1 = k_B T_e/(e α11)), k_B T_e ln 2 at
# the vertex itself, and towards opposite sides at the two ends of a segment.

S1, S2 = -4.0, -0.25  # dot1 and dot2 slopes dV_y/dV_x
STEP = 1e-3  # V per pixel on both axes
W = 1.0e-3  # Fermi width of both families, V (FWHM 3.5 px: hot, broad lines)


def _honeycomb_family(*, tunnel_px=0.0, sigma_px=0.02, rng=0):
    """Dot1 segments (25 px long) with thermally rounded ends, and the dot2 segments meeting them."""
    from stabtool.lines.refine import RefinedLine
    from stabtool.lines.result import TransitionLine
    from stabtool.mapdata import MapAxes

    g = np.random.default_rng(rng)
    length = 25 * STEP
    members, others = [], []
    for k in range(5):
        xk = 30 * STEP * k
        y_lo, y_hi = 0.0, length
        t = np.arange(1, 25) * STEP  # rows along the segment
        x_line = xk + (t - 0.5 * length) / S1
        c_lo = np.abs(t - y_lo) * (1 - S2 / S1) / W
        c_hi = np.abs(t - y_hi) * (1 - S2 / S1) / W
        p = x_line + W * (np.log1p(np.exp(-c_lo)) - np.log1p(np.exp(-c_hi)))
        if tunnel_px:
            # the t²/ε shift of an anticrossing, opposite at the two ends
            p = p + tunnel_px * STEP * (length / (t - y_lo) - length / (y_hi - t)) / 25
        p = p + g.normal(0, sigma_px * STEP, t.size)
        ends = [(xk + (y - 0.5 * length) / S1, y) for y in (y_lo, y_hi)]
        line = TransitionLine(family="dot1", x0=xk, y0=0.5 * length, slope=S1, slope_stderr=0.01,
                              position_stderr=1e-5, start=ends[0], end=ends[1], width_V=W)
        members.append(RefinedLine(line=line, step_height=1.0, refined=True, shape="step",
                                   points=(t, p, np.full(t.size, sigma_px * STEP)), along_x=True))
        for (xv, yv), side in zip(ends, (-1, 1)):
            # a dot2 segment ending at each vertex (20 px long, away from the segment)
            xo = xv + side * 20 * STEP
            others.append(TransitionLine(family="dot2", x0=0.5 * (xv + xo), y0=yv + S2 * 0.5 * (xo - xv), slope=S2,
                                         slope_stderr=0.001, position_stderr=1e-5, start=(xv, yv),
                                         end=(xo, yv + S2 * (xo - xv)), width_V=W))
    axes = MapAxes(x=np.arange(-40, 160) * STEP, y=np.arange(-40, 80) * STEP, x_gate="PA", y_gate="PB")
    return members, others, axes


def test_thermal_gap_is_four_widths_of_detuning_from_the_vertex():
    from stabtool.lines._family import thermal_vertex_gap

    members, others, _ = _honeycomb_family()
    # ε_C/k_B T_e = |t − τ| · |1 − s2/s1| / w2 (distance along y to the dot2 line through the vertex)
    assert thermal_vertex_gap(members, others, steep=True) == pytest.approx(4 * W / (1 - S2 / S1), rel=1e-12)
    assert thermal_vertex_gap(members, others, steep=True, n_widths=0.0) == 0.0


def test_a_t0_family_with_thermally_rounded_vertices_shows_no_bending(monkeypatch):
    import stabtool.lines._family as fam

    members, others, axes = _honeycomb_family()
    fit = fam.family_fit(members, others, axes, steep=True)
    assert not fit.bend_used
    # the rounded corners tilt a straight fit of whole segments (≈ 2 % here); the slope from the
    # points clear of them is the CI slope
    assert fit.slope == pytest.approx(S1, rel=0.002)
    assert abs(fit.straight_slope / S1 - 1) > 0.01
    # without the thermal gap the rounded corners read as bending (the test can fail)
    monkeypatch.setattr(fam, "VERTEX_GAP_WIDTHS", 0.0)
    assert fam.family_fit(members, others, axes, steep=True).bend_used


def test_tunnel_bending_beyond_the_thermal_corner_is_still_detected():
    import stabtool.lines._family as fam

    # t²/ε shift of 1 px one pixel from each vertex (0.25 px at the edge of the thermal gap), on top
    # of the thermal rounding: flagged, and the bent fit recovers the CI slope
    members, others, axes = _honeycomb_family(tunnel_px=1.0)
    fit = fam.family_fit(members, others, axes, steep=True)
    assert fit.bend_used
    assert fit.slope == pytest.approx(S1, rel=0.01)


def _correlated_lines(slope, *, n_lines, n, white, walk, rng):
    """Lines whose points share a random walk along each line (slow noise), on top of white noise."""
    g = np.random.default_rng(rng)
    out = []
    for k in range(n_lines):
        t = np.linspace(0.0, 1.0, n) + 2.0 * k
        slow = np.cumsum(g.normal(0, walk, n))
        p = 0.7 * k + slope * (t - t.mean()) + slow + g.normal(0, white, n)
        out.append(LinePoints(t=t, p=p, sig=np.full(n, white)))
    return out


def _pull_rms(walk, *, n_rep=300):
    pulls = []
    for rep in range(n_rep):
        fit = fit_family(_correlated_lines(-0.3, n_lines=8, n=40, white=0.01, walk=walk, rng=rep), bend=False)
        pulls.append((fit.slope + 0.3) / fit.slope_stderr)
    return float(np.sqrt(np.mean(np.square(pulls))))


def test_stated_slope_error_is_honest_for_white_noise():
    # independent points: (estimate − truth)/σ has rms 1 (pull distribution, L. Lyons, Statistics for
    # nuclear and particle physicists, CUP 1986, ch. 4); the per-line cluster error must not inflate it
    # much (the fit states the larger of the two, so slightly below 1)
    assert 0.8 <= _pull_rms(0.0) <= 1.15


def test_stated_slope_error_covers_noise_correlated_along_each_line():
    # a random walk along every line (slow noise) correlates its points: the independent-point error
    # is several times too small (pull rms ≫ 1); the per-line clustered sandwich error (Liang & Zeger,
    # Biometrika 73, 13 (1986)) restores pulls of rms ≈ 1 for independent lines
    rms = _pull_rms(0.004)
    assert 0.8 <= rms <= 1.3
    naive = []
    for rep in range(100):
        lines = _correlated_lines(-0.3, n_lines=8, n=40, white=0.01, walk=0.004, rng=rep)
        fit = fit_family(lines, bend=False)
        # the independent-point error of the same fit (Birge-scaled): 0.01/√(Σ(t − t̄)²) · √χ²_red
        sxx = sum(float(np.sum((lp.t - lp.t.mean()) ** 2)) for lp in lines)
        naive.append((fit.slope + 0.3) / (0.01 / np.sqrt(sxx) * np.sqrt(max(fit.chi2_red, 1.0))))
    assert np.sqrt(np.mean(np.square(naive))) > 1.5
