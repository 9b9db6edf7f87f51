"""Fast paths of the fit kernels give the same numbers, bit for bit, as the plain formulation.

Each check compares a vectorised or shortened computation with the straightforward
one it replaces (NumPy's own reductions, a loop over lines, one more relocation pass),
with exact equality (``np.array_equal``), not a tolerance.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from stabtool.fit.fermi import (
    _batch_jac,
    _batch_jac_weighted,
    _batch_model,
    _row_nanmedian,
    fit_fermi_steps,
)
from stabtool.fit.linewidth import clear_of_lines
from stabtool.fit.relocate import relocate_family
from stabtool.lines.result import TransitionLine


@pytest.mark.parametrize("n", [1, 2, 7, 8, 599, 600, 601, 900])
def test_row_nanmedian_equals_numpy_nanmedian_bit_for_bit(n):
    rng = np.random.default_rng(n)
    a = rng.normal(size=(6, n)) * 1e-3
    a[1] = np.round(a[1], 4)  # ties
    a[2, : n // 2] = np.nan  # half missing
    a[3] = np.nan  # all missing: NaN, as numpy
    a[4, rng.random(n) < 0.3] = np.nan
    with np.errstate(all="ignore"), pytest.warns(RuntimeWarning):
        ref = np.nanmedian(a, axis=1)
    assert np.array_equal(_row_nanmedian(a), ref, equal_nan=True)


def test_weighted_jacobian_equals_jacobian_times_weights():
    rng = np.random.default_rng(1)
    k, n = 5, 40
    x = rng.uniform(-1, 1, (k, n))
    wt = (rng.random((k, n)) > 0.2).astype(float)
    p = np.column_stack([rng.uniform(-0.2, 0.2, k), np.log(rng.uniform(0.01, 0.3, k)), rng.normal(size=(k, 3))])
    _, f, q, w = _batch_model(x, p)
    ref = _batch_jac(x, p, f, q, w) * wt[:, None, :]
    assert np.array_equal(_batch_jac_weighted(x, p, f, q, w, wt, x * wt), ref)


def test_batched_fermi_fits_do_not_depend_on_which_traces_share_the_batch():
    # the fast path (views while every trace is still iterating) must not change any trace's numbers:
    # a trace fitted alone (all views) equals the same trace fitted among others that converge at
    # other iterations (gathered copies); equal lengths, so the padding is the same
    rng = np.random.default_rng(7)
    v = [np.linspace(-1e-3, 1e-3, 80) for i in range(4)]
    s = [0.5 * (1 + np.tanh((vi - 1e-4 * i) / (2 * (5e-5 + 2e-5 * i)))) + 0.05 * rng.normal(size=vi.size)
         for i, vi in enumerate(v)]
    both = fit_fermi_steps(v, s, centre_guess_V=0.0)
    for i in range(4):
        one = fit_fermi_steps([v[i]], [s[i]], centre_guess_V=0.0)
        for fld in dataclasses.fields(one):
            assert np.array_equal(getattr(one, fld.name)[0], getattr(both, fld.name)[i], equal_nan=True), fld.name


def _line(x0, y0, slope, start, end):
    return TransitionLine(family="dot2", x0=x0, y0=y0, slope=slope, slope_stderr=0.0, position_stderr=0.0, start=start, end=end)


def _clear_reference(cross, centre, *, half_V, other_lines, which, clearance_V):
    """The plain formulation: one other line at a time, with TransitionLine.x_at / y_at."""
    keep = np.ones(cross.size, bool)
    lo, hi = centre - half_V, centre + half_V
    for ln in other_lines:
        s0, s1 = sorted((ln.start[1], ln.end[1])) if which == 1 else sorted((ln.start[0], ln.end[0]))
        pos = ln.x_at if which == 1 else ln.y_at
        a = np.maximum(lo, s0 - half_V)
        b = np.minimum(hi, s1 + half_V)
        near = a <= b
        if not near.any():
            continue
        da = cross - np.asarray(pos(a), float)
        db = cross - np.asarray(pos(b), float)
        dmin = np.where(np.sign(da) != np.sign(db), 0.0, np.minimum(np.abs(da), np.abs(db)))
        keep &= ~(near & (dmin < clearance_V))
    return keep


@pytest.mark.parametrize("which", [0, 1])
def test_clear_of_lines_stacked_equals_line_by_line(which):
    rng = np.random.default_rng(3 + which)
    others = [_line(0.01 * i, 0.02 * i - 0.05, -3.0 + 0.1 * i, (0.01 * i - 0.02, 0.05), (0.01 * i + 0.02, -0.1))
              for i in range(6)]
    others.append(_line(0.03, 0.0, np.inf, (0.03, -0.05), (0.03, 0.05)))  # vertical line
    cross = rng.uniform(-0.1, 0.1, 300)
    centre = rng.uniform(-0.1, 0.1, 300)
    for clr in (1e-4, 3e-3, 2e-2):
        got = clear_of_lines(cross, centre, half_V=0.01, other_lines=others, which=which, clearance_V=clr)
        ref = _clear_reference(cross, centre, half_V=0.01, other_lines=others, which=which, clearance_V=clr)
        assert np.array_equal(got, ref)
        assert 0 < got.sum() < got.size  # the check exercises both outcomes
    assert clear_of_lines(cross, centre, half_V=0.01, other_lines=[], which=which, clearance_V=1e-3).all()


@pytest.mark.parametrize("which", [0, 1])
def test_two_relocation_passes_equal_one_pass_from_the_first_passes_result(which):
    # the second pass starts from the first pass's slope and line positions; only its own
    # statistics are reported (the first pass's errors and bend are not needed)
    from stabtool.lines.detector import detect_lines
    from stabtool.simulate import quick_double_dot

    m = quick_double_dot("si-sige-double", snr=20.0, shape=(120, 120), rng=3).data
    det = detect_lines(m)
    fam = det.families["dot1" if which == 0 else "dot2"]
    z = np.asarray(m.values, float)
    x, y = np.asarray(m[m.dims[1]].values, float), np.asarray(m[m.dims[0]].values, float)
    init = 1.0 / fam.slope if which == 0 else fam.slope
    kw = {"which": which, "noise": float(det.noise_level), "half_window_px": 5.0}
    first = relocate_family(z, x, y, fam.lines, initial=init, n_iter=1, **kw)
    assert first.ok
    two = relocate_family(z, x, y, fam.lines, initial=init, n_iter=2, **kw)
    again = relocate_family(z, x, y, first.lines, initial=first.inv_or_slope, n_iter=1, **kw)
    for fld in dataclasses.fields(two):
        if fld.name == "lines":
            continue
        a, b = getattr(two, fld.name), getattr(again, fld.name)
        assert np.array_equal(a, b, equal_nan=True), fld.name
    for la, lb in zip(two.lines, again.lines):
        ta = np.array([la.x0, la.y0, la.slope, la.position_stderr, la.n_points], float)
        tb = np.array([lb.x0, lb.y0, lb.slope, lb.position_stderr, lb.n_points], float)
        assert np.array_equal(ta, tb, equal_nan=True)
