"""A profile whose fit did not converge carries no position information.

The profile fits of the line refinement (:mod:`stabtool.lines._batchfit`)
stop after a fixed number of Levenberg–Marquardt steps. A profile that has
not met the stopping test by then (a peak shape fitted to a step, a width
crawling towards the window's length, steps rejected on a flat minimum)
sits wherever the last step left it; if it entered the line fit, the
detector's output would follow the iteration cap and the data's last
digits. Specification of the rule (``REQUIRE_CONVERGED``, off by default
until it passes the accuracy gate; common practice for iterative
estimators, no source): a usable fit has converged, or its crossing has
settled (moved by at most SETTLE_SIGMA of its standard error over the last
SETTLE_ITER steps), or it is an unresolved step (w < 0.7 px: its crossing
is only the sample interval); what is usable then depends little on the
cap. Independent of the rule: rows without a step do not move the refined
line. Inputs are seeded Fermi steps and peaks
(:func:`stabtool.physics.thermal.fermi_occupation`) with noise.
"""

from __future__ import annotations

import numpy as np
import pytest

import stabtool.lines._batchfit as batchfit
from stabtool.lines._batchfit import SETTLE_ITER, SETTLE_SIGMA, fit_profiles
from stabtool.lines.hough import PixelSegment
from stabtool.lines.refine import refine_segment
from stabtool.mapdata import make_map
from stabtool.physics.thermal import fermi_occupation
from stabtool.preprocess._checks import check_map

HW = 6  # profile half-length, samples


@pytest.fixture
def convergence_rule(monkeypatch):
    """The usability rule switched on (``REQUIRE_CONVERGED``; off by default, see its comment)."""
    monkeypatch.setattr(batchfit, "REQUIRE_CONVERGED", True)


def _profiles(seed: int, n: int, *, no_step: int = 0):
    """``n`` profiles (n, 2·HW+1): Fermi steps of width 0.2–2.5 px, crossing within ±3 px, height ±1,
    noise σ 0.05–1, a weakly curved background; the first ``no_step`` are white noise only."""
    g = np.random.default_rng(seed)
    u = np.arange(-HW, HW + 1, dtype=float)
    U = np.broadcast_to(u, (n, u.size)).copy()
    u0 = g.uniform(-3.0, 3.0, n)
    w = np.exp(g.uniform(np.log(0.2), np.log(2.5), n))
    h = g.choice([-1.0, 1.0], n)
    h[:no_step] = 0.0
    sigma = np.exp(-g.uniform(0.0, np.log(20.0), n))
    curv = g.normal(0.0, 0.003, n)
    curv[:no_step] = 0.0
    Y = curv[:, None] * U**2 + h[:, None] * (1 - fermi_occupation(U, u0[:, None], w[:, None]))
    Y += sigma[:, None] * g.standard_normal(U.shape)
    return U, Y, np.ones(U.shape, bool)


@pytest.mark.parametrize("kind", ["step", "peak"])
def test_a_fit_still_moving_its_crossing_at_the_cap_is_not_usable(kind, convergence_rule):
    # the peak shape fitted to steps is the degenerate case the refinement meets on every line
    # whose step fit is poor: many of those fits never meet the stopping test
    U, Y, M = _profiles(3, 1500)
    at20 = fit_profiles(U, Y, M, kind=kind, halfwidth=HW, n_iter=20)
    at16 = fit_profiles(U, Y, M, kind=kind, halfwidth=HW, n_iter=16)  # the same iteration, 4 steps earlier
    assert (~at20.converged).sum() > 100  # the case under test occurs
    resolved = at20.ok & (at20.width >= 0.7)  # (unresolved steps: their sample interval is the result)
    assert resolved.sum() > 30
    moving = np.abs(at20.u0 - at16.u0) > SETTLE_SIGMA * at20.u0_err
    assert not (resolved & ~at20.converged & moving).any()
    # what is usable then depends little on the cap: iterated to the end, at most 1 % of the
    # usable fits become unusable or move by more than half their standard error
    at300 = fit_profiles(U, Y, M, kind=kind, halfwidth=HW, n_iter=300)
    changed = ~at300.ok | (np.abs(at20.u0 - at300.u0) > 0.5 * at20.u0_err)
    assert (resolved & changed).sum() <= 0.01 * resolved.sum()


def test_usable_fits_are_converged_settled_or_unresolved_steps(convergence_rule):
    U, Y, M = _profiles(4, 600)
    for n_iter in (1, 3, 20):
        fit = fit_profiles(U, Y, M, kind="peak", halfwidth=HW, n_iter=n_iter)
        loose = fit.ok & ~fit.converged & (fit.width >= 0.7)
        if n_iter < SETTLE_ITER:
            assert not loose.any()
        else:
            earlier = fit_profiles(U, Y, M, kind="peak", halfwidth=HW, n_iter=n_iter - SETTLE_ITER)
            assert (np.abs(fit.u0 - earlier.u0)[loose] <= SETTLE_SIGMA * fit.u0_err[loose]).all()
    # one damped step from the start grid converges almost nothing: almost nothing usable
    first = fit_profiles(U, Y, M, kind="step", halfwidth=HW, n_iter=1)
    full = fit_profiles(U, Y, M, kind="step", halfwidth=HW, n_iter=20)
    assert (first.ok & (first.width >= 0.7)).sum() < 0.2 * (full.ok & (full.width >= 0.7)).sum()


@pytest.mark.parametrize("kind", ["step", "peak"])
@pytest.mark.xfail(strict=True, reason="the 3σ height test is not corrected for the free crossing and width: "
                   "on white noise about 3 % of step fits (unresolved steps) and 4 % of peak fits pass")
def test_profiles_of_white_noise_are_rarely_usable(kind):
    # a 3σ significance test should let through a few per mille of pure-noise profiles
    # (one-sided normal tail 0.13 %, common practice, no source); 1 % leaves room for the
    # choice of crossing and width among the start grid's
    U, Y, M = _profiles(5, 2000, no_step=2000)
    fit = fit_profiles(U, Y, M, kind=kind, halfwidth=HW)
    assert fit.ok.mean() <= 0.01


def test_rows_without_a_step_do_not_move_the_refined_line():
    # a straight sharp step line x = 30 + 0.25 (y − 40) on a 80×60 map, noise σ = 0.05 of the
    # height; in the second map rows 20–39 carry no step (background and noise only): their
    # profiles give no crossing, so the line is the one the other rows give, which the map
    # with those rows missing (NaN) gives too
    g = np.random.default_rng(6)
    ny, nx = 80, 60
    iy, ix = np.mgrid[0:ny, 0:nx].astype(float)
    x_line = 30.0 + 0.25 * (iy - 40.0)
    clean = 1.0 - fermi_occupation(ix, x_line, 0.6)
    noise = 0.05 * g.standard_normal((ny, nx))
    with_band = clean + noise
    with_band[20:40] = 0.5 + noise[20:40]
    missing = clean + noise
    missing[20:40] = np.nan
    v_x, v_y = np.linspace(0.0, 0.059, nx), np.linspace(0.0, 0.079, ny)  # 1 mV per pixel both ways
    n = np.hypot(0.25, 1.0)
    seg = PixelSegment(cx=30.0, cy=40.0, ux=0.25 / n, uy=1.0 / n, t0=-38.0 * n, t1=38.0 * n,
                       n_pixels=77, rms_px=0.3)
    lines = []
    for values in (with_band, missing):
        axes = check_map(make_map(values, v_x, v_y))
        r = refine_segment(seg, values, axes, family="dot1", along_x=True, shapes=("step",))
        assert r.refined
        lines.append(r.line)
    band, gap = lines
    # true slope dV_y/dV_x = 1/0.25 = 4; both within 3σ of it
    for ln in lines:
        assert abs(ln.slope - 4.0) <= 3 * ln.slope_stderr
    np.testing.assert_allclose(band.slope, gap.slope, rtol=1e-9)
    assert band.n_points == gap.n_points
