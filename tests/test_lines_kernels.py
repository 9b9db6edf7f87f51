"""The vectorised kernels of line detection agree with the reference libraries.

Each batched or restricted computation of the pipeline (written for speed)
is checked against the plain library call it replaces: numpy's median and
linear solver, scipy.ndimage's maximum filter and label, scikit-image's
hysteresis threshold and Canny-style non-maximum suppression, numpy's
symmetric eigensolver, and scipy.optimize.least_squares for the profile
fits. Inputs are seeded random arrays (or small drawn maps).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from scipy.optimize import least_squares
from skimage.filters import apply_hysteresis_threshold

from stabtool.lines._batchfit import _gauss_solve, fit_profiles
from stabtool.lines.edges import _hysteresis, _nms_at
from stabtool.lines.hough import _max_filter5, _tls
from stabtool.lines.refine import _robust_line_fits, _row_median
from stabtool.preprocess.background import _row_offsets_core
from stabtool.preprocess.noise import MAD_TO_SIGMA, _noise_core


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
        assert fit.u0[i] == pytest.approx(ref.x[3], abs=1e-6)
        assert fit.width[i] == pytest.approx(ref.x[4], rel=1e-5)
        assert fit.height[i] == pytest.approx(ref.x[2], rel=1e-6)


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
