"""The vectorised kernels of line detection agree with the reference libraries.

Each batched or restricted computation of the pipeline (written for speed)
is checked against the plain library call it replaces: numpy's median and
linear solver, scipy.ndimage's maximum filter and label, scikit-image's
hysteresis threshold and Canny-style non-maximum suppression, numpy's
symmetric eigensolver, and scipy.optimize.least_squares for the profile
fits (and numpy.linalg.lstsq for their closed-form start), scipy's
RegularGridInterpolator for the interpolated block median, and plain loops
for the joint-fit design, duplicate removal, vertex bounds and the profile
cut at other lines. Inputs are seeded random arrays (or small drawn maps).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from scipy.interpolate import RegularGridInterpolator
from scipy.optimize import least_squares
from skimage.filters import apply_hysteresis_threshold

from stabtool.lines._batchfit import _gauss_solve, _grid_start, _normal_equations, fit_profiles
from stabtool.lines._merge import drop_duplicates
from stabtool.lines.edges import _block_median, _hysteresis, _nms_at
from stabtool.lines.hough import PixelSegment, _max_filter5, _tls
from stabtool.lines.joint import LinePoints, _design
from stabtool.lines.refine import VERTEX_MARGIN_PX, _all_profiles, _robust_line_fits, _row_median, _vertex_bounds
from stabtool.lines.result import TransitionLine
from stabtool.preprocess.background import _row_offsets_core
from stabtool.preprocess.noise import BRACKET_MIN_SIZE, MAD_TO_SIGMA, _median_inplace, _noise_core


def test_row_median_equals_numpy_median_over_the_valid_entries():
    rng = np.random.default_rng(1)
    v = rng.normal(size=(40, 17))
    valid = rng.random((40, 17)) < 0.6
    valid[3] = False  # an empty row gives NaN
    got = _row_median(v, valid)
    for i in range(40):
        want = np.median(v[i][valid[i]]) if valid[i].any() else np.nan
        np.testing.assert_allclose(got[i], want, rtol=0, atol=0)


def test_noise_and_row_offsets_equal_the_numpy_median_formulas():
    rng = np.random.default_rng(2)
    for shape in [(64, 64), (33, 47)]:
        v = rng.normal(size=shape) + np.arange(shape[0])[:, None]
        d = np.diff(v, axis=1)
        want = MAD_TO_SIGMA * np.median(np.abs(d - np.median(d))) / np.sqrt(2)
        assert _noise_core(v) == pytest.approx(want, rel=1e-15)
        steps = np.r_[0.0, np.median(np.diff(v, axis=0), axis=1)]
        off = np.cumsum(steps)
        np.testing.assert_allclose(_row_offsets_core(v), off - np.median(off), rtol=0, atol=1e-12)


def test_batched_elimination_solves_like_numpy_linalg():
    rng = np.random.default_rng(3)
    for n in (10, 600):  # LAPACK path and written-out elimination
        M = rng.normal(size=(5, 9, n))
        A = np.einsum("ikn,jkn->ijn", M, M) + 0.1 * np.eye(5)[:, :, None]
        B = rng.normal(size=(5, 2, n))
        want = np.linalg.solve(A.transpose(2, 0, 1), B.transpose(2, 0, 1)).transpose(1, 2, 0)
        np.testing.assert_allclose(_gauss_solve(A, B), want, rtol=1e-9, atol=1e-12)


def test_profile_fit_matches_scipy_least_squares_on_a_resolved_step():
    # y = a + b u + h F((u − u0)/w): a resolved Fermi step, 2 % noise
    rng = np.random.default_rng(4)
    u = np.arange(-8, 9, dtype=float)
    truth = (0.3, 0.01, 1.0, 0.37, 1.4)

    def model(p, u):
        a, b, h, u0, w = p
        return a + b * u + h * 0.5 * (1 + np.tanh((u - u0) / (2 * w)))

    rows = np.stack([model(truth, u) + rng.normal(0, 0.02, u.size) for _ in range(6)])
    U = np.broadcast_to(u, rows.shape)
    fit = fit_profiles(U, rows, np.ones(rows.shape, bool), kind="step", halfwidth=8)
    for i, y in enumerate(rows):
        ref = least_squares(lambda p: model(p, u) - y, x0=[0, 0, 1, 0, 1], method="lm", xtol=1e-12, ftol=1e-12)
        assert fit.ok[i]
        # converged to within 0.1 % of the stated statistical errors (the fit stops once
        # its steps are that small; scipy is run to 1e-12)
        assert fit.u0[i] == pytest.approx(ref.x[3], abs=1e-3 * fit.u0_err[i])
        assert fit.width[i] == pytest.approx(ref.x[4], abs=1e-3 * fit.width_err[i])
        assert fit.height[i] == pytest.approx(ref.x[2], abs=1e-3 * fit.height_err[i])


def test_robust_line_fits_equal_weighted_least_squares_without_outliers():
    rng = np.random.default_rng(5)
    t = np.sort(rng.uniform(0, 10, (3, 30)), axis=1)
    sig = rng.uniform(0.05, 0.1, t.shape)
    p = 2.0 - 0.3 * t + sig * rng.normal(size=t.shape)
    valid = np.ones(t.shape, bool)
    valid[2, 20:] = False
    beta, cov, keep, tm, ok = _robust_line_fits(t, p, sig, valid)
    assert ok.all()
    for i in range(3):
        k = keep[i]
        X = np.stack([np.ones(k.sum()), t[i][k] - tm[i]], 1)
        w = 1 / sig[i][k] ** 2
        want = np.linalg.solve((X.T * w) @ X, (X.T * w) @ p[i][k])
        np.testing.assert_allclose(beta[i], want, rtol=1e-10)


def test_robust_line_fits_clip_a_far_outlier():
    t = np.arange(20.0)[None]
    p = 1.0 + 0.5 * t
    p[0, 7] += 50.0
    beta, _, keep, tm, ok = _robust_line_fits(t, p, np.full(t.shape, 0.1), np.ones(t.shape, bool))
    assert ok[0] and not keep[0, 7] and keep[0].sum() == 19
    assert beta[0, 1] == pytest.approx(0.5, abs=1e-9)


def test_max_filter_equals_scipy_maximum_filter():
    rng = np.random.default_rng(6)
    for shape in [(7, 9), (60, 364), (2, 3)]:
        a = rng.integers(0, 100, shape).astype(np.int32)
        np.testing.assert_array_equal(_max_filter5(a), ndi.maximum_filter(a, size=(5, 5), mode="constant"))


def test_tls_equals_the_eigenvector_of_the_scatter_matrix():
    rng = np.random.default_rng(7)
    for _ in range(50):
        n = int(rng.integers(3, 40))
        ang = rng.uniform(0, np.pi)
        s = rng.uniform(-15, 15, n)
        px = np.round(30 + s * np.cos(ang) + rng.normal(0, 0.4, n))
        py = np.round(30 + s * np.sin(ang) + rng.normal(0, 0.4, n))
        cx, cy, u, rms = _tls(px, py)
        C = np.cov(np.stack([px, py]), bias=True)
        evals, evecs = np.linalg.eigh(C)
        assert abs(abs(u @ evecs[:, 1]) - 1) < 1e-12
        assert rms == pytest.approx(np.sqrt(max(evals[0], 0)), abs=1e-7)
        assert (cx, cy) == pytest.approx((px.mean(), py.mean()), abs=1e-12)


def _full_nms(gx, gy):
    """Canny non-maximum suppression over the whole image (4 directions), plain numpy."""
    mag = np.hypot(gx, gy)
    q = np.floor((np.mod(np.arctan2(gy, gx), np.pi) + np.pi / 8) / (np.pi / 4)).astype(int) % 4
    p = np.pad(mag, 1)
    c = p[1:-1, 1:-1]
    nb = {0: (p[1:-1, 2:], p[1:-1, :-2]), 1: (p[2:, 2:], p[:-2, :-2]),
          2: (p[2:, 1:-1], p[:-2, 1:-1]), 3: (p[2:, :-2], p[:-2, 2:])}
    keep = np.zeros(mag.shape, bool)
    for k, (a, b) in nb.items():
        keep |= (q == k) & (c >= a) & (c > b)
    keep[[0, -1]] = keep[:, [0, -1]] = False
    return keep, mag


def test_nms_and_hysteresis_at_candidates_equal_the_full_image_versions():
    rng = np.random.default_rng(8)
    img = ndi.gaussian_filter(rng.normal(size=(80, 90)), 1.5)
    img[:, 45:] += 0.5  # a step edge
    gx, gy = ndi.sobel(img, axis=1), ndi.sobel(img, axis=0)
    gx, gy = gx / gx.std(), gy / gy.std()
    keep, mag = _full_nms(gx, gy)
    low, high = 1.0, 2.5
    want = apply_hysteresis_threshold(np.where(keep, mag, 0.0), low, high)
    g2 = (gx * gx + gy * gy).ravel()
    inner = np.zeros(img.shape, bool)
    inner[1:-1, 1:-1] = True
    ci = np.flatnonzero(inner & (np.hypot(gx, gy) > low))
    mc = np.sqrt(g2[ci])
    k = _nms_at(ci, gx.ravel()[ci], gy.ravel()[ci], mc, lambda i: np.sqrt(g2[i]), img.shape[1])
    got = _hysteresis(ci[k], mc[k], low, high, img.shape)
    # (hypot and √(x² + y²) may differ in the last bit, which could only
    # matter for an exact tie; none occurs here)
    np.testing.assert_array_equal(got, want)
    assert want.sum() > 50


def test_grid_start_linear_parameters_equal_numpy_lstsq():
    # the closed-form projection of the baseline gives the least-squares (a, b, h) and SSR
    rng = np.random.default_rng(8)
    u = np.arange(-6, 7, dtype=float)
    n = 7
    y = 0.2 + 0.03 * u[None, :] + np.where(u[None, :] > rng.uniform(-1, 1, (n, 1)), 1.0, 0.0)
    y = y + rng.normal(0, 0.05, y.shape)
    mask = rng.random(y.shape) > 0.1
    uT, yT, mT = u[:, None] * np.ones((1, n)), np.where(mask, y, 0.0).T, mask.T.astype(float)
    c0 = {"m": mT.sum(0), "mu": (mT * uT).sum(0), "muu": (mT * uT * uT).sum(0),
          "my": (mT * yT).sum(0), "muy": (mT * uT * yT).sum(0)}
    best = _grid_start(uT, yT, mT, c0, "step")
    for i in range(n):
        m = mask[i]
        phi = 0.5 * (1 + np.tanh((u - best[3, i]) / (2 * np.exp(best[4, i]))))
        X = np.stack([np.ones(u.size), u, phi], 1)[m]
        coef, res, *_ = np.linalg.lstsq(X, y[i][m], rcond=None)
        np.testing.assert_allclose(best[:3, i], coef, rtol=1e-8, atol=1e-10)
        assert best[5, i] == pytest.approx(float(res[0]), rel=1e-8, abs=1e-12)


def test_block_median_is_the_bilinear_interpolation_of_the_tile_medians():
    rng = np.random.default_rng(9)
    a = rng.normal(size=(96, 130))
    block = 32
    got = _block_median(a.copy(), block)
    by, bx = 96 // block, 130 // block
    med = np.median(a[: by * block, : bx * block].reshape(by, block, bx, block), axis=(1, 3))
    cy = (np.arange(by) + 0.5) * block - 0.5
    cx = (np.arange(bx) + 0.5) * block - 0.5
    yy, xx = np.meshgrid(np.clip(np.arange(96), cy[0], cy[-1]), np.clip(np.arange(130), cx[0], cx[-1]), indexing="ij")
    want = RegularGridInterpolator((cy, cx), med)(np.stack([yy, xx], -1))
    np.testing.assert_allclose(got, want, rtol=1e-12, atol=1e-12)


def _line(family, x0, y0, slope, half, n_points):
    d = np.array([1.0, slope]) / np.hypot(1.0, slope) * half
    return TransitionLine(family=family, x0=x0, y0=y0, slope=slope, slope_stderr=0.01, position_stderr=0.01,
                          start=(x0 - d[0], y0 - d[1]), end=(x0 + d[0], y0 + d[1]), n_points=n_points)


def test_drop_duplicates_keeps_the_better_of_two_retraced_lines_only():
    lines = [
        _line("dot1", 10.0, 10.0, -3.0, 8.0, 20),
        _line("dot1", 10.8, 10.0, -3.0, 8.0, 12),  # 0.8 px beside the first: a double edge
        _line("dot1", 30.0, 10.0, -3.0, 8.0, 15),  # a parallel neighbour 20 px away
        _line("dot2", 10.5, 10.0, -0.3, 8.0, 30),  # crosses, other family
    ]
    kept = drop_duplicates(lines, (1.0, 1.0))
    assert [l.n_points for l in kept] == [20, 15, 30]


def test_joint_design_equals_the_per_line_construction():
    rng = np.random.default_rng(10)
    lines = []
    for k in range(5):
        t = np.sort(rng.uniform(0, 1, 12))
        sig = rng.uniform(0.1, 1, 12)
        sig[3] = np.nan if k == 2 else sig[3]
        lines.append(LinePoints(t=t, p=rng.normal(size=12), sig=sig, vertices=(-0.2, 1.3) if k % 2 else (np.nan, 1.2)))
    lines.append(LinePoints(t=np.array([0.1, 0.2]), p=np.zeros(2), sig=np.ones(2)))  # too few points: left out
    S, _y, _s, lid, _tms, nb = _design(lines, True, True)
    assert nb == 2 and set(lid) == set(range(5))
    for k in range(5):
        lp = lines[k]
        ok = np.isfinite(lp.sig)
        t = lp.t[ok]
        np.testing.assert_allclose(S[lid == k, 0], t - t.mean(), rtol=1e-12)
        span = np.ptp(t)
        for end in (0, 1):
            want = span / (t - lp.vertices[end]) if np.isfinite(lp.vertices[end]) else np.zeros(t.size)
            np.testing.assert_allclose(S[lid == k, 1 + end], want, rtol=1e-12)


def _seg(x0, y0, x1, y1):
    c = np.array([(x0 + x1) / 2, (y0 + y1) / 2])
    d = np.array([x1 - x0, y1 - y0])
    L = float(np.hypot(*d))
    u = d / L
    if u[0] < 0:
        u = -u
    return PixelSegment(float(c[0]), float(c[1]), float(u[0]), float(u[1]), -L / 2, L / 2, int(L), 0.3)


def test_vertex_bounds_put_the_profile_rows_a_margin_inside_the_intersection():
    # a steep dot1 segment x = 50 − (y − 20)/3 for y in [23, 50] (3 rows short of its vertex at
    # y = 20) and a shallow dot2 segment y = 20 − 0.3 (x − 50) ending 2 px from the same vertex
    def x_of(y):
        return 50.0 - (y - 20.0) / 3.0

    dot1 = _seg(x_of(23.0), 23.0, x_of(50.0), 50.0)
    dot2 = _seg(20.0, 20.0 + 0.3 * 30.0, 48.0, 20.0 + 0.3 * 2.0)
    far = _seg(90.0, 60.0, 110.0, 54.0)  # another dot2 segment, nowhere near dot1's ends
    b = _vertex_bounds([dot1, dot2, far], ["dot1", "dot2", "dot2"], [True, False, False])
    assert b[0, 0] == pytest.approx(20.0 + VERTEX_MARGIN_PX, abs=1e-9)  # rows counted from the vertex
    assert np.isnan(b[0, 1])  # no vertex at the upper end: the segment's own end stays
    # dot2 (profiles along y, range in columns): its right end meets dot1 at x = 50
    assert b[1, 1] == pytest.approx(50.0 - VERTEX_MARGIN_PX, abs=1e-9)
    assert np.isnan(b[1, 0]) and np.isnan(b[2]).all()


def test_profile_cut_at_other_lines_equals_a_direct_loop():
    # every profile stops CUT_MARGIN_PX before the nearest crossing of another segment's
    # (extended) line on each side; checked against a plain loop over profiles and segments
    from stabtool.lines.refine import CUT_EXTEND_PX, CUT_MARGIN_PX, _clear_of_other_lines

    rng = np.random.default_rng(11)
    segs = []
    for _ in range(12):
        x0, y0 = rng.uniform(0, 60, 2)
        ang = rng.uniform(-np.pi / 2, np.pi / 2)
        L = rng.uniform(8, 30)
        segs.append(_seg(x0, y0, x0 + L * np.cos(ang), y0 + L * np.sin(ang)))
    offs = np.arange(-6, 7)
    # profiles across their own segment, up to 6 px beyond its ends (as the vertex bounds allow)
    seg_id = rng.integers(0, 12, 300)
    alx = np.array([abs(segs[k].uy) > abs(segs[k].ux) for k in seg_id])
    tt = np.array([rng.uniform(segs[k].t0 - 6, segs[k].t1 + 6) for k in seg_id])
    px = np.array([segs[k].cx + t * segs[k].ux for k, t in zip(seg_id, tt)])
    py = np.array([segs[k].cy + t * segs[k].uy for k, t in zip(seg_id, tt)])
    rows = np.round(np.where(alx, py, px)).astype(int)
    centre = np.round(np.where(alx, px, py)).astype(int) + rng.integers(-1, 2, 300)

    def loop(seg_id, rows, centre, alx):
        out = []
        for i in range(rows.size):
            right, left = np.inf, -np.inf
            for j, sg in enumerate(segs):
                if j == seg_id[i]:
                    continue
                u_par, c_par = (sg.uy, sg.cy) if alx[i] else (sg.ux, sg.cx)
                u_pos, c_pos = (sg.ux, sg.cx) if alx[i] else (sg.uy, sg.cy)
                if u_par == 0:
                    continue
                t = (rows[i] - c_par) / u_par
                d = c_pos + t * u_pos - centre[i]
                if sg.t0 - CUT_EXTEND_PX <= t <= sg.t1 + CUT_EXTEND_PX and abs(d) <= offs[-1] + CUT_MARGIN_PX:
                    if d > 0:
                        right = min(right, d)
                    else:
                        left = max(left, d)
            out.append((offs < right - CUT_MARGIN_PX) & (offs > left + CUT_MARGIN_PX))
        return np.array(out)

    got = _clear_of_other_lines(segs, seg_id, rows, centre, alx, offs)
    np.testing.assert_array_equal(got, loop(seg_id, rows, centre, alx))
    # profiles in blocks per segment with rising rows (as the pipeline makes them) take the
    # pairs within each other segment's row span only: the same masks
    order = np.lexsort((rows, seg_id))
    first = np.r_[True, (np.diff(seg_id[order]) != 0) | (np.diff(rows[order]) != 0)]
    o = order[first]
    got = _clear_of_other_lines(segs, seg_id[o], rows[o], centre[o], alx[o], offs)
    np.testing.assert_array_equal(got, loop(seg_id[o], rows[o], centre[o], alx[o]))
    assert (~got).any(1).sum() > 20  # many profiles are cut


def _reference_hough_peaks(h, angles, dists, min_votes, max_peaks):
    """Accumulator peaks with scipy.ndimage's 5×5 maximum filter on the θ-wrapped accumulator."""
    h = h.astype(np.int64)
    hp = np.concatenate([h[::-1, -2:], h, h[::-1, :2]], axis=1)  # θ = ±90° wraps with ρ → −ρ
    mx = ndi.maximum_filter(hp, size=(5, 5), mode="constant")[:, 2:-2]
    cand = np.nonzero((h >= mx) & (h >= min_votes))
    order = np.argsort(-h[cand], kind="stable")[: 2 * max_peaks]
    return angles[cand[1][order]], dists[cand[0][order]]


def test_hough_peaks_equal_the_scipy_maximum_filter_on_the_wrapped_accumulator():
    from skimage.draw import line as draw_line
    from skimage.transform import hough_line

    from stabtool.lines.hough import _hough_peaks

    rng = np.random.default_rng(12)
    img = rng.random((90, 120)) < 0.02
    for _ in range(6):
        r0, c0, r1, c1 = rng.integers(0, 90), rng.integers(0, 120), rng.integers(0, 90), rng.integers(0, 120)
        img[draw_line(int(r0), int(c0), int(r1), int(c1))] = True
    img[draw_line(40, 5, 41, 115)] = True  # nearly horizontal: its peak straddles θ = ±90°
    h, a, d = hough_line(img, theta=np.deg2rad(np.arange(-90, 90, 0.5)))
    # vote counts below 2⁸ (uint8 path), below 2¹⁶ (uint16) and above (int64)
    for scale in (1, 200, 5000):
        got = _hough_peaks(h * scale, a, d, 4 * scale, 50)
        want = _reference_hough_peaks(h * scale, a, d, 4 * scale, 50)
        assert got[0].size == want[0].size > 0
        np.testing.assert_array_equal(got[0], want[0])
        np.testing.assert_array_equal(got[1], want[1])


def test_batched_segment_conversion_equals_segment_to_line():
    from stabtool.lines.hough import _segments_to_lines, segment_to_line
    from stabtool.mapdata import MapAxes

    rng = np.random.default_rng(13)
    segs = []
    for _ in range(40):
        x0, y0 = rng.uniform(-3, 70, 2)  # some ends outside the map (linear extrapolation)
        ang = rng.uniform(-np.pi / 2, np.pi / 2)
        L = rng.uniform(3, 40)
        segs.append(_seg(x0, y0, x0 + L * np.cos(ang), y0 + L * np.sin(ang)))
    segs.append(PixelSegment(10.0, 20.0, 0.0, 1.0, -5.0, 5.0, 10, 0.2))  # vertical: infinite slope
    fams = [("dot1", "dot2", "interdot")[k % 3] for k in range(len(segs))]
    # decreasing y axis, anisotropic steps
    axes = MapAxes(x=np.linspace(-0.2, -0.1, 64), y=np.linspace(0.35, 0.3, 64), x_gate="PA", y_gate="PB")
    got = _segments_to_lines(segs, axes, fams)
    for s, f, g in zip(segs, fams, got):
        w = segment_to_line(s, axes, family=f)
        assert g.family == w.family and g.n_points == w.n_points
        for name in ("x0", "y0", "slope", "slope_stderr", "position_stderr"):
            assert getattr(g, name) == pytest.approx(getattr(w, name), rel=1e-12, abs=0), name
        np.testing.assert_allclose(g.start + g.end, w.start + w.end, rtol=1e-13, atol=0)


def test_normal_equations_equal_the_finite_difference_jacobian():
    # JᵀJ and Jᵀr of the step model a + b u + h F((u − u0)/w), log w the fifth parameter,
    # against a central-difference Jacobian (common practice, no source); masked samples count zero
    rng = np.random.default_rng(10)
    u = np.arange(-6, 7, dtype=float)
    n = 5
    p = np.stack([rng.normal(0, 0.2, n), rng.normal(0, 0.02, n), rng.uniform(0.5, 2, n),
                  rng.uniform(-1.5, 1.5, n), np.log(rng.uniform(0.4, 2.0, n))])
    mask = rng.random((u.size, n)) > 0.15
    y = rng.normal(0, 1, (u.size, n))

    def model(q):
        return q[0] + q[1] * u[:, None] + q[2] * 0.5 * (1 + np.tanh((u[:, None] - q[3]) / (2 * np.exp(q[4]))))

    J = np.empty((5, u.size, n))
    for i in range(5):
        dq = np.zeros((5, 1))
        dq[i] = 1e-6
        J[i] = (model(p + dq) - model(p - dq)) / 2e-6 * mask
    r = (y - model(p)) * mask
    uT, mT, yT = np.repeat(u[:, None], n, 1), mask.astype(float), np.where(mask, y, 0.0)
    c = {"m": mT.sum(0), "mu": (mT * uT).sum(0), "muu": (mT * uT * uT).sum(0)}
    JTJ, g = _normal_equations(p, uT, yT, mT, "step", c)
    np.testing.assert_allclose(JTJ, np.einsum("ikn,jkn->ijn", J, J), rtol=1e-6, atol=1e-7)
    np.testing.assert_allclose(g, np.einsum("ikn,kn->in", J, r), rtol=1e-6, atol=1e-7)


def test_grid_start_table_equals_the_trials_profile_by_profile():
    # profiles sharing their offsets take the tabulated trials; one profile with other
    # offsets makes the batch take the per-profile trials: the same starts either way
    rng = np.random.default_rng(11)
    u = np.arange(-6, 7, dtype=float)
    n = 9
    y = np.where(u[:, None] > rng.uniform(-2, 2, n), 1.0, 0.0) + rng.normal(0, 0.1, (u.size, n))
    mask = rng.random(y.shape) > 0.1

    def starts(uT, yv, mv):
        yT, mT = np.where(mv, yv, 0.0), mv.astype(float)
        c0 = {"m": mT.sum(0), "mu": (mT * uT).sum(0), "muu": (mT * uT * uT).sum(0),
              "my": (mT * yT).sum(0), "muy": (mT * uT * yT).sum(0)}
        with np.errstate(all="ignore"):
            return _grid_start(uT, yT, mT, c0, "step")

    shared = starts(np.repeat(u[:, None], n, 1), y, mask)
    odd_u = np.concatenate([np.repeat(u[:, None], n, 1), (u + 0.5)[:, None]], 1)
    mixed = starts(odd_u, np.concatenate([y, y[:, :1]], 1), np.concatenate([mask, mask[:, :1]], 1))
    np.testing.assert_allclose(mixed[:, :n], shared, rtol=1e-10, atol=1e-12)


def test_profile_rows_of_a_long_segment_are_spread_like_linspace():
    # more rows than max_points: evenly spaced rows, np.linspace(0, count − 1, max_points) rounded
    values = np.zeros((100, 300))
    seg = PixelSegment(cx=150.0, cy=50.0, ux=0.0, uy=1.0, t0=-45.0, t1=45.0, n_pixels=90, rms_px=0.3)
    short = PixelSegment(cx=40.0, cy=50.0, ux=0.0, uy=1.0, t0=-10.0, t1=10.0, n_pixels=20, rms_px=0.3)
    seg_id, rows, *_ = _all_profiles(values, [seg, short], [True, True], 6, 80, [2.0, 2.0])
    want_long = 7 + np.linspace(0, 86, 80).round().astype(int)  # rows 7…93 (2 px trimmed at each end)
    np.testing.assert_array_equal(rows[seg_id == 0], want_long)
    np.testing.assert_array_equal(rows[seg_id == 1], np.arange(42, 59))


def test_bracketed_median_equals_numpy_median_on_large_arrays():
    # large arrays select the middle values inside a bracket from a sample; ties, sorted
    # input, heavy tails and both parities must give numpy's median exactly

    rng = np.random.default_rng(12)
    n0 = BRACKET_MIN_SIZE
    cases = [rng.normal(size=n0), rng.normal(size=n0 + 1), rng.integers(0, 4, 3 * n0).astype(float),
             np.sort(rng.normal(size=5 * n0 + 1)), rng.standard_cauchy(4 * n0), np.full(2 * n0, 0.25)]
    for x in cases:
        assert _median_inplace(x.copy()) == np.median(x)


def test_otsu_split_equals_the_loop_over_split_points():
    # the between-class split of the angle histogram (Otsu 1979), written as the plain loop
    from stabtool.lines.families import _otsu_split

    def loop(a, w):
        o = np.argsort(a)
        a, w = a[o], w[o]
        best, thr = -1.0, float("nan")
        W = w.sum()
        for k in range(1, a.size):
            w0, w1 = w[:k].sum(), w[k:].sum()
            if w0 < 0.05 * W or w1 < 0.05 * W:
                continue
            m0, m1 = (w[:k] * a[:k]).sum() / w0, (w[k:] * a[k:]).sum() / w1
            v0 = (w[:k] * (a[:k] - m0) ** 2).sum() / w0
            v1 = (w[k:] * (a[k:] - m1) ** 2).sum() / w1
            score = abs(m1 - m0) / np.sqrt(0.5 * (v0 + v1) + 1.0)
            if score > best:
                best, thr = score, 0.5 * (a[k - 1] + a[k])
        return thr, best

    rng = np.random.default_rng(5)
    for _ in range(200):
        a = np.concatenate([rng.normal(70, 3, rng.integers(1, 40)), rng.normal(15, 2, rng.integers(0, 30))])
        w = rng.integers(5, 100, a.size).astype(float)
        (t0, s0), (t1, s1) = loop(a, w), _otsu_split(a, w)
        if np.isnan(t0):
            assert np.isnan(t1)
        else:
            assert t1 == t0
            assert s1 == pytest.approx(s0, rel=1e-9)


def test_nms_direction_by_comparisons_equals_the_quantised_angle():
    from stabtool.lines.edges import _TAN_22, _TAN_67

    rng = np.random.default_rng(6)
    ax, ay = rng.normal(size=20000), rng.normal(size=20000)
    ax[:100], ay[100:200] = 0.0, 0.0
    nx = 97
    ang = np.mod(np.arctan2(ay, ax), np.pi)
    q = np.floor((ang + np.pi / 8) / (np.pi / 4)).astype(int) % 4
    want = np.array([1, nx + 1, nx, nx - 1])[q]
    bx, by = np.abs(ax), np.abs(ay)
    got = np.where(by <= _TAN_22 * bx, 1, np.where(by >= _TAN_67 * bx, nx, np.where((ax > 0) == (ay > 0), nx + 1, nx - 1)))
    np.testing.assert_array_equal(got, want)


def test_sobel_by_array_slices_equals_scipy_sobel():
    # the same operations as scipy's 3-tap correlations, hence bit for bit
    from stabtool.lines.edges import _sobel

    rng = np.random.default_rng(21)
    for shape in [(64, 80), (3, 7), (9, 3)]:
        img = ndi.gaussian_filter(rng.normal(size=shape), 1.0)
        for axis in (0, 1):
            np.testing.assert_array_equal(_sobel(img, axis), ndi.sobel(img, axis=axis))


def test_in_place_block_median_subtraction_equals_the_interpolated_median():
    from stabtool.lines.edges import _subtract_block_median

    rng = np.random.default_rng(22)
    for shape, block in [((128, 96), 32), ((100, 130), 48)]:
        a = rng.normal(size=shape) + np.linspace(0.0, 3.0, shape[1])
        got = a.copy()
        _subtract_block_median(got, block)
        np.testing.assert_array_equal(got, a - _block_median(a, block))


def test_dilation_by_shifted_ors_equals_two_scipy_moving_maxima():
    from stabtool.lines.detector import _within

    rng = np.random.default_rng(23)
    for shape, r in [((60, 70), 3), ((20, 9), 6), ((4, 5), 4)]:
        e = rng.random(shape) < 0.03
        want = ndi.maximum_filter1d(ndi.maximum_filter1d(e.astype(np.uint8), 2 * r + 1, axis=0), 2 * r + 1,
                                    axis=1).astype(bool)
        np.testing.assert_array_equal(_within(_within(e, r, axis=0), r, axis=1), want)


def test_band_members_equal_the_thresholded_distance_matrix():
    # pixels within reach of each Hough line, as the full (lines × pixels) distance matrix gives them
    from stabtool.lines import hough

    rng = np.random.default_rng(24)
    edges = rng.random((90, 110)) < 0.08
    rows, cols = np.nonzero(edges)
    px, py = cols.astype(float), rows.astype(float)
    key = rows.astype(np.int64) * edges.shape[1] + cols
    ang = np.deg2rad(rng.choice(np.arange(-90.0, 90.0, 0.5), 40))
    ang[:3] = np.deg2rad([-90.0, 0.0, 45.0])  # axis-parallel and diagonal lines
    ca, sa = np.cos(ang), np.sin(ang)
    dist = rng.uniform(-60, 130, ang.size)
    dd = np.abs(np.multiply.outer(ca, px) + np.multiply.outer(sa, py) - dist[:, None])
    want_line, want_pix = np.nonzero(dd <= 6.5)
    saved = hough.DENSE_MAX_PAIRS
    try:
        hough.DENSE_MAX_PAIRS = 0  # the row-interval search, not the dense fallback
        line, pix, d = hough._band_members(px, py, key, edges.shape[1], ca, sa, dist, 6.5)
    finally:
        hough.DENSE_MAX_PAIRS = saved
    np.testing.assert_array_equal(line, want_line)
    np.testing.assert_array_equal(pix, want_pix)
    np.testing.assert_array_equal(d, dd[want_line, want_pix])
    assert line.size > 500


def test_tls_of_stacked_points_equals_tls():
    from stabtool.lines.hough import _tls_xy

    rng = np.random.default_rng(25)
    for n in (5, 40, 333):
        xy = np.ascontiguousarray(np.stack([rng.uniform(0, 50, n), rng.uniform(0, 50, n)]))
        cx, cy, u, rms = _tls(xy[0], xy[1])
        cen, ux, uy, rms2, d = _tls_xy(xy)
        assert (cen[0], cen[1], ux, uy, rms2) == (cx, cy, u[0], u[1], rms)
        np.testing.assert_array_equal(d, xy - cen[:, None])


def test_one_right_hand_side_and_the_inverse_diagonal_equal_the_general_elimination():
    from stabtool.lines._batchfit import _inverse_diagonal, _solve_vector

    rng = np.random.default_rng(26)
    for n in (10, 600):  # LAPACK path and written-out elimination
        M = rng.normal(size=(5, 9, n))
        A = np.einsum("ikn,jkn->ijn", M, M) + 0.1 * np.eye(5)[:, :, None]
        b = rng.normal(size=(5, n))
        want = _gauss_solve(A, b[:, None])[:, 0]
        np.testing.assert_array_equal(_solve_vector(A.copy(), b.copy()), want)
        eye = np.broadcast_to(np.eye(5)[:, :, None], A.shape)
        np.testing.assert_array_equal(_inverse_diagonal(A), np.einsum("iin->in", _gauss_solve(A, eye)))
        np.testing.assert_allclose(_inverse_diagonal(A), np.einsum("nii->in", np.linalg.inv(A.transpose(2, 0, 1))),
                                   rtol=1e-9)
