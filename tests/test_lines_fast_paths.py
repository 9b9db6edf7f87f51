"""Shortcuts of the line-detection pipeline give the numbers of the plain library calls they replace.

numpy's percentile, nonzero and nanmedian, the one-line-at-a-time pixel
angle, the profile fit's solve of every system (against
scipy.optimize.least_squares for the fitted crossing) and the refit passes
of refine_segments, which are left out when no segment they would refit
can give a line, and the refit of a Hough run on the pixels it already
has. Inputs are seeded random arrays or small drawn maps.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import least_squares

import stabtool.lines.hough as hough_mod
import stabtool.lines.refine as refine_mod
from stabtool.lines._batchfit import fit_profiles
from stabtool.lines._merge import drop_duplicates
from stabtool.lines.edges import _percentile_linear
from stabtool.lines.families import _pixel_angles_deg, pixel_angle_deg
from stabtool.lines.hough import PixelSegment, _nonzero_2d
from stabtool.lines.result import TransitionLine
from stabtool.mapdata import make_map
from stabtool.preprocess._checks import check_map


def test_percentile_equals_numpy_percentile_bit_for_bit():
    rng = np.random.default_rng(21)
    for n in [1, 2, 3, 7, 20, 21, 100, 999, 1000, 1001, 24993]:
        for scale in (1e-3, 1.0, 1e3):
            x = np.abs(rng.normal(size=n)) * scale
            for q in (0.05, 0.5, 0.95, 0.99):
                assert _percentile_linear(x.copy(), q) == float(np.percentile(x, 100 * q))
    ties = np.round(rng.normal(size=500), 1)  # many equal values
    assert _percentile_linear(ties.copy(), 0.95) == float(np.percentile(ties, 95))


def test_nonzero_of_a_2d_mask_equals_numpy_nonzero():
    rng = np.random.default_rng(22)
    for shape in [(1, 1), (3, 4), (0, 5), (5, 0), (40, 360)]:
        for p in (0.0, 0.3, 1.0):
            m = rng.random(shape) < p
            want = np.nonzero(m)
            got = _nonzero_2d(m)
            for a, b in zip(got, want):
                np.testing.assert_array_equal(a, b)
                assert a.dtype == b.dtype


def test_pixel_angles_of_many_slopes_equal_the_angle_of_each_line():
    rng = np.random.default_rng(23)
    da = make_map(rng.normal(size=(30, 50)), np.linspace(0.0, -0.08, 50), np.linspace(0.1, 0.25, 30))
    axes = check_map(da)
    slopes = np.r_[rng.normal(size=300) * 10 ** rng.uniform(-3, 3, 300), np.inf, -np.inf, 0.0]
    want = [pixel_angle_deg(TransitionLine("dot1", 0.0, 0.0, float(s), 0.0, 0.0, (0.0, 0.0), (1.0, 1.0)), axes)
            for s in slopes]
    np.testing.assert_array_equal(_pixel_angles_deg(slopes, axes), want)


def _median_duplicates(lines, scale, max_distance_px=2.5):
    """Duplicate pairs by the plain rule: nanmedian of the 9 sample distances inside line j (≥ 3 of them)."""
    n = len(lines)
    sx, sy = abs(scale[0]), abs(scale[1])
    dup = np.zeros((n, n), bool)
    for i in range(n):
        for j in range(n):
            if lines[i].family != lines[j].family:
                continue
            a = np.array([lines[j].start[0] / sx, lines[j].start[1] / sy])
            b = np.array([lines[j].end[0] / sx, lines[j].end[1] / sy])
            L = np.hypot(*(b - a))
            if not L > 0:
                continue
            u = (b - a) / L
            p0 = np.array([lines[i].start[0] / sx, lines[i].start[1] / sy])
            p1 = np.array([lines[i].end[0] / sx, lines[i].end[1] / sy])
            d = []
            for t in np.linspace(0, 1, 9):
                rel = p0 + t * (p1 - p0) - a
                along = rel @ u
                if -1 <= along <= L + 1:
                    d.append(abs(-rel[0] * u[1] + rel[1] * u[0]))
            dup[i, j] = len(d) >= 3 and np.nanmedian(d) <= max_distance_px
    return dup


def test_drop_duplicates_equals_the_plain_median_rule():
    rng = np.random.default_rng(24)
    for _ in range(60):
        lines = []
        centres = rng.uniform(0, 40, size=(3, 2))
        for _ in range(int(rng.integers(2, 12))):
            c = centres[rng.integers(0, 3)] + rng.normal(scale=rng.choice([0.5, 3.0, 15.0]), size=2)
            ang = rng.choice([-1.2, -0.3, 0.7]) + rng.normal(scale=0.05)
            d = np.array([np.cos(ang), np.sin(ang)]) * rng.uniform(0, 25) / 2
            lines.append(TransitionLine(str(rng.choice(["dot1", "dot2"])), float(c[0]), float(c[1]),
                                        float(np.tan(ang)), float(rng.random()), 0.0,
                                        (float(c[0] - d[0]), float(c[1] - d[1])),
                                        (float(c[0] + d[0]), float(c[1] + d[1])), n_points=int(rng.integers(3, 80))))
        scale = (float(rng.uniform(0.5, 2.0)), float(rng.uniform(0.5, 2.0)))
        dup = _median_duplicates(lines, scale)
        # the same greedy choice as drop_duplicates: most crossing points first, then the smaller slope error
        kept: list[int] = []
        for i in sorted(range(len(lines)), key=lambda i: (-lines[i].n_points, lines[i].slope_stderr)):
            if not any(dup[i, j] for j in kept):
                kept.append(i)
        got = drop_duplicates(lines, scale)
        assert [id(x) for x in got] == [id(lines[i]) for i in sorted(kept)]


def test_profile_fit_with_converged_profiles_left_in_matches_least_squares():
    # a small batch keeps its converged profiles until all have converged and solves only the
    # others' systems: a slow profile among many quick ones still ends at the least-squares optimum
    rng = np.random.default_rng(25)
    u = np.arange(-6.0, 7.0)
    n = 40
    u0 = rng.uniform(-1.5, 1.5, n)
    w = np.where(np.arange(n) < 3, 1.6, 0.8)  # three broader steps converge more slowly
    y = 0.2 + 0.01 * u + 1.0 / (1.0 + np.exp(-(u - u0[:, None]) / w[:, None])) + rng.normal(0, 0.01, (n, 13))
    fit = fit_profiles(np.broadcast_to(u, y.shape), y, np.ones(y.shape, bool), kind="step", halfwidth=6)
    for i in (0, 1, 2, 10, 20):
        def res(q, i=i):
            return q[0] + q[1] * u + q[2] / (1.0 + np.exp(-(u - q[3]) / np.exp(q[4]))) - y[i]
        ref = least_squares(res, [0.2, 0.0, 1.0, u0[i], np.log(w[i])], xtol=1e-14, ftol=1e-14, gtol=1e-14)
        assert fit.ok[i]
        # (the iteration stops once a step moves the crossing by < 1e-3 px: within a few % of its error)
        assert fit.u0[i] == pytest.approx(ref.x[3], abs=0.05 * fit.u0_err[i])
        assert fit.width[i] == pytest.approx(np.exp(ref.x[4]), abs=0.05 * fit.width_err[i])


def test_refit_passes_are_left_out_when_no_segment_can_give_a_line(monkeypatch):
    # a segment with fewer than four profile rows fails at any window length: the wider refit
    # passes are not run for it alone, and the result is the one of running them
    rng = np.random.default_rng(26)
    ny, nx = 64, 64
    iy, ix = np.mgrid[0:ny, 0:nx].astype(float)
    values = 1.0 / (1.0 + np.exp(-(ix - 30.3 - 0.2 * iy) / 0.6)) + rng.normal(0, 0.02, (ny, nx))
    da = make_map(values, np.linspace(0, 0.063, nx), np.linspace(0, 0.063, ny))
    axes = check_map(da)
    line = PixelSegment(cx=30.3 + 0.2 * 32, cy=32.0, ux=0.2 / np.hypot(1, 0.2), uy=1 / np.hypot(1, 0.2),
                        t0=-25.0, t1=25.0, n_pixels=50, rms_px=0.3)
    stub = PixelSegment(cx=10.0, cy=20.0, ux=1.0, uy=0.0, t0=-3.0, t1=3.0, n_pixels=6, rms_px=0.3)  # 2 columns
    calls = []
    orig = refine_mod._refine_once

    def counting(*a, **k):
        calls.append(k["halfwidth_px"])
        return orig(*a, **k)

    monkeypatch.setattr(refine_mod, "_refine_once", counting)
    got = refine_mod.refine_segments([line, stub], values, axes, families=["dot1", "dot2"], along_x=[True, False])
    assert calls == [6]  # no refit pass
    assert got[0].refined and not got[1].refined
    # the passes that were left out would have given the same lines
    want = [orig([s], values, axes, families=[f], along_x=[a], halfwidth_px=hw, max_points=80,
                 shapes=("step",) if hw > 6 else ("step", "peak"), edges=None, end_trim=0.0)[0]
            for s, f, a, hw in ((line, "dot1", True, 6), (stub, "dot2", False, 24))]
    assert got[1].line == want[1].line and got[1].refined == want[1].refined
    assert got[0].line.slope == want[0].line.slope


def _peak_runs_always_refitted(xy, lfree, nloc, rloc, c, s, *, min_votes, max_gap_px, min_length_px, tolerance_px):
    """The plain rule of hough._peak_runs: every run is refitted on its re-collected pixels
    when they are at least as many (the shortcut skips the refit when they are the same pixels)."""
    rxy = np.take(xy, rloc, axis=1)
    t = xy[1][nloc] * c - xy[0][nloc] * s
    order = np.argsort(t)
    ts = t[order]
    br = np.nonzero(np.diff(ts) > max_gap_px)[0] + 1
    starts, ends = np.r_[0, br], np.r_[br, ts.size]
    good = (ends - starts >= min_votes) & (ts[ends - 1] - ts[starts] >= min_length_px - 2)
    for st, en in zip(starts[good].tolist(), ends[good].tolist()):
        sel = nloc[order[st:en]]
        cen, ux, uy, rms, d = hough_mod._tls_xy(np.take(xy, sel, axis=1))
        ts_ = d[0] * ux + d[1] * uy
        e = rxy - cen[:, None]
        tt, dd = e[0] * ux + e[1] * uy, e[1] * ux - e[0] * uy
        m2 = lfree[rloc] & (tt >= ts_.min() - 1) & (tt <= ts_.max() + 1) & (np.abs(dd) <= tolerance_px)
        if m2.sum() >= sel.size:
            sel = rloc[m2]
            cen, ux, uy, rms, d = hough_mod._tls_xy(np.take(xy, sel, axis=1))
        tt = d[0] * ux + d[1] * uy
        if tt.max() - tt.min() < min_length_px - 1:
            continue
        yield sel, cen[0], cen[1], ux, uy, tt.min(), tt.max(), rms


def test_segments_without_the_repeated_refit_equal_those_of_the_plain_rule(monkeypatch):
    # drawn edge maps: straight lines of both slopes with gaps and jitter, plus stray pixels
    rng = np.random.default_rng(27)
    for trial in range(4):
        edges = np.zeros((96, 120), bool)
        for _ in range(6):
            slope = rng.choice([-2.3, -0.4, 0.9]) * rng.uniform(0.8, 1.2)
            x0, y0 = rng.uniform(20, 100), rng.uniform(20, 76)
            for t in np.arange(-40, 40, 0.7):
                if rng.random() < 0.08:
                    continue  # a gap
                x = x0 + t / np.hypot(1, slope) + rng.normal(0, 0.3)
                y = y0 + slope * t / np.hypot(1, slope) + rng.normal(0, 0.3)
                if 0 <= round(y) < 96 and 0 <= round(x) < 120:
                    edges[round(y), round(x)] = True
        edges |= rng.random(edges.shape) < 0.01
        kw = dict(min_length_px=8.0, max_gap_px=3.0, tolerance_px=1.5, angle_step_deg=0.5, max_lines=400)
        got = hough_mod._segments_core(edges, **kw)
        monkeypatch.setattr(hough_mod, "_peak_runs", _peak_runs_always_refitted)
        want = hough_mod._segments_core(edges, **kw)
        monkeypatch.undo()
        assert len(got) == len(want) > 3
        for g, w in zip(got, want):
            assert g.n_pixels == w.n_pixels
            # (the same pixels summed in another order: the last bits only)
            np.testing.assert_allclose([g.cx, g.cy, g.ux, g.uy, g.t0, g.t1, g.rms_px],
                                       [w.cx, w.cy, w.ux, w.uy, w.t0, w.t1, w.rms_px], rtol=1e-12, atol=1e-12)
