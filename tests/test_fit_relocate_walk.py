"""The slope error of lines whose crossing points carry a random walk (a derivative map's sum).

Reference: the Wiener process — independent increments with variance proportional to the step,
covariance ``q min(c_j, c_k)`` (its definition; e.g. C. W. Gardiner, Handbook of Stochastic
Methods). The variance of a least-squares slope under a known covariance: common practice, no source.
"""

from __future__ import annotations

import numpy as np

from stabtool.fit.relocate import walk_slope_error


def _pooled_slope(lid, c, s):
    """Least-squares common slope of lines with one offset each."""
    n = lid.max() + 1
    cm = (np.bincount(lid, weights=c, minlength=n) / np.bincount(lid, minlength=n))[lid]
    sm = (np.bincount(lid, weights=s, minlength=n) / np.bincount(lid, minlength=n))[lid]
    d = c - cm
    b = float(np.sum(d * (s - sm)) / np.sum(d * d))
    r = (s - sm) - b * d
    iid = float(np.sqrt(np.sum(r * r) / (c.size - n - 1)) / np.sqrt(np.sum(d * d)))
    return b, iid


def test_the_error_is_the_least_squares_slopes_under_the_walks_covariance():
    # three lines of unequal, irregular sampling: q from the increments, then q Σ_jk d_j d_k min(c_j, c_k)
    g = np.random.default_rng(0)
    sizes = (7, 5, 9)
    lid = np.repeat(np.arange(3), sizes)
    c = np.concatenate([np.sort(g.uniform(lo, hi, n)) for n, (lo, hi) in zip(sizes, ((0, 10), (3, 8), (1, 20)))])
    s = np.cumsum(g.normal(size=c.size))
    b = 0.3
    shuffled = g.permutation(c.size)  # (the order of the points does not matter)
    got = walk_slope_error(lid[shuffled], c[shuffled], s[shuffled], b)
    v = sxx = 0.0
    inc = []
    for line in range(3):
        m = lid == line
        cc, ss = c[m], s[m]
        d = cc - cc.mean()
        v += float(np.sum(d[:, None] * d[None, :] * np.minimum(cc[:, None], cc[None, :])))
        sxx += float(np.sum(d * d))
        inc.append((np.diff(ss) - b * np.diff(cc)) ** 2 / np.diff(cc))
    inc = np.concatenate(inc)
    q = inc.sum() / (inc.size - 1)
    assert np.isclose(got, np.sqrt(q * v) / sxx, rtol=1e-12)


def test_on_random_walk_errors_the_stated_error_is_honest_where_the_scatter_is_not():
    # 4 lines of 40 points, each with its own walk: the common slope's pulls have unit rms with
    # the walk model's error; the error from the points' scatter (independent points) is several
    # times too small (the walk's neighbours share their error)
    g = np.random.default_rng(1)
    lid = np.repeat(np.arange(4), 40)
    c = np.tile(np.arange(40.0), 4) + np.repeat([0.0, 10.0, 20.0, 5.0], 40)
    walk_pulls, iid_pulls = [], []
    for _ in range(2000):
        w = np.cumsum(g.normal(0.0, 0.3, (4, 40)), axis=1).ravel()
        s = np.repeat(g.normal(0.0, 5.0, 4), 40) + 0.5 * c + w
        b, iid = _pooled_slope(lid, c, s)
        walk_pulls.append((b - 0.5) / walk_slope_error(lid, c, s, b))
        iid_pulls.append((b - 0.5) / iid)
    rms = float(np.sqrt(np.mean(np.square(walk_pulls))))
    assert 0.9 <= rms <= 1.1  # measured 1.00
    assert np.sqrt(np.mean(np.square(iid_pulls))) > 3.0  # measured 5.7


def test_on_independent_errors_the_walk_model_errs_on_the_safe_side():
    # white errors are what the scatter describes; read as a walk they give a larger error, never a smaller
    g = np.random.default_rng(2)
    lid = np.repeat(np.arange(3), 30)
    c = np.tile(np.arange(30.0), 3)
    for _ in range(20):
        s = np.repeat(g.normal(0.0, 5.0, 3), 30) - 0.2 * c + g.normal(0.0, 0.4, c.size)
        b, iid = _pooled_slope(lid, c, s)
        assert walk_slope_error(lid, c, s, b) > iid


def test_too_few_increments_give_no_error():
    lid = np.array([0, 0, 1, 1])
    c = np.array([0.0, 1.0, 0.0, 1.0])
    assert np.isnan(walk_slope_error(lid, c, c * 0.5, 0.5))
