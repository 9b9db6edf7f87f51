"""Fast paths of the family fits give the same bits as the plain numpy code.

The joint family fit (stabtool.lines.joint) takes medians with one
``np.partition``, inverts a 1×1 normal matrix as ``1/a``, computes the
per-line extremes of ``t`` with ``reduceat`` and shares the stacked points
between the straight and the bent fit. Each is checked here against the
reference library call it replaces (numpy: ``np.median``,
``np.linalg.pinv``) or against the formula written out plainly.
"""

from __future__ import annotations

import numpy as np
import pytest

from stabtool.lines.joint import LinePoints, _design, _fit_family, _median, _pinv, _stack, fit_family


def _same(a, b) -> bool:
    """Equal bit for bit (NaN equal to NaN)."""
    a, b = np.asarray(a, float), np.asarray(b, float)
    return a.shape == b.shape and bool(np.all((a == b) | (np.isnan(a) & np.isnan(b))))


@pytest.mark.parametrize("n", [1, 2, 3, 4, 7, 10, 31, 64, 257])
def test_median_equals_numpy_median_bit_for_bit(n):
    g = np.random.default_rng(n)
    for trial in range(40):
        x = g.standard_normal(n) * 10.0 ** g.uniform(-30, 30)
        if trial % 4 == 1:
            x = np.round(x * 3) / 3  # ties
        if trial % 4 == 2:
            x[g.integers(0, n)] = np.nan
        ref, got = np.median(x), _median(x)
        assert _same(ref, got), (x, ref, got)
        assert isinstance(got, np.floating)


def test_median_leaves_its_input_unchanged():
    x = np.array([3.0, 1.0, 2.0, 5.0])
    _median(x)
    assert x.tolist() == [3.0, 1.0, 2.0, 5.0]


def test_pinv_of_a_positive_scalar_is_numpys_pinv_bit_for_bit():
    g = np.random.default_rng(7)
    a = np.abs(g.standard_normal(3000)) * 10.0 ** g.uniform(-99, 99, 3000)
    for v in a:
        A = np.array([[v]])
        assert _same(_pinv(A), np.linalg.pinv(A))


@pytest.mark.parametrize("A", [np.array([[0.0]]), np.array([[-2.5]]), np.array([[1e-200]]), np.array([[3e250]]),
                               np.array([[4.0, 1.0], [1.0, 3.0]]), np.diag([1.0, 2.0, 0.0])])
def test_pinv_other_matrices_go_to_numpy(A):
    assert _same(_pinv(A), np.linalg.pinv(A))


def _family(bend: float, *, seed: int = 0, n_lines: int = 5, n: int = 40):
    g = np.random.default_rng(seed)
    out = []
    for k in range(n_lines):
        t = np.sort(g.uniform(0.0, 1.0, n)) + 2.0 * k
        ta, tb = t[0] - 0.1, t[-1] + 0.1
        p = 0.7 * k - 0.3 * t + bend * (1 / (t - ta) + 1 / (t - tb)) + g.normal(0, 0.01, n)
        sig = np.full(n, 0.01)
        if k == 1:
            p[3] = np.nan  # an unusable point
        if k == 3:
            n_short = 6  # too short for bending terms (< 8 points)
            t, p, sig = t[:n_short], p[:n_short], sig[:n_short]
        out.append(LinePoints(t=t, p=p, sig=sig, vertices=(ta, tb if k != 2 else float("nan"))))
    out.append(LinePoints(t=np.array([9.0, 9.5]), p=np.array([1.0, 1.1]), sig=np.array([0.01, 0.01])))  # < 3 points
    return out


def test_bending_columns_are_span_over_distance_to_the_vertex():
    lines = _family(0.002)
    S, y, sig, lid, tms, n_bend = _design(lines, True, True)
    assert n_bend == 2
    for k, lp in enumerate(lines):
        on = lid == k
        ok = np.isfinite(lp.t) & np.isfinite(lp.p) & np.isfinite(lp.sig) & (lp.sig > 0)
        if ok.sum() < 3:
            assert not on.any()
            continue
        t = lp.t[ok]
        # slope column: t centred on the line's mean (sums in another order: last bits only)
        assert np.allclose(S[on, 0], t - t.mean(), rtol=0, atol=1e-12)
        span = t.max() - t.min()
        for end in (0, 1):
            v = lp.vertices[end]
            want = span / (t - v) if (np.isfinite(v) and ok.sum() >= 8) else np.zeros(t.size)
            assert _same(S[on, 1 + end], want)


@pytest.mark.parametrize("bend", [0.0, 0.003])
def test_shared_stack_gives_the_same_fit_as_the_plain_call(bend):
    lines = _family(bend, seed=3)
    st = _stack(lines)
    for b in (False, True):
        plain = fit_family(lines, bend=b)
        shared = _fit_family(lines, st, bend=b)
        for f in ("slope", "slope_stderr", "chi2_red", "chi2", "n_points", "bend_terms", "slope_stderr_iid"):
            assert _same(getattr(plain, f), getattr(shared, f)), f
        assert _same(plain.offsets, shared.offsets)


def test_no_usable_line_gives_no_stack_and_no_fit():
    lines = [LinePoints(t=np.array([0.0, 1.0]), p=np.array([0.0, 1.0]), sig=np.array([1.0, 1.0]))]
    assert _stack(lines) is None
    assert _stack([]) is None
    assert fit_family(lines) is None
