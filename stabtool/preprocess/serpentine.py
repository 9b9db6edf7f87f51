"""Alternate rows shifted along the fast axis: a serpentine (bidirectional) sweep with a lag.

A fast map is often swept back and forth, row after row. Anything that delays
the read-out — a low-pass filter, a lock-in time constant, a settling time —
then moves every feature of a forward row by ``+τ`` points along x and of a
backward row by ``−τ``: the transition lines zig-zag from row to row by
``s = 2τ``. Line fits average the zig-zag out, but it widens every step,
biases the Fermi widths and leaves sharp residual structure for the model fit.

Estimate. With ``f`` the unshifted map and parity ``σ_k = ±1`` (odd and even
rows shifted by ``±s/2``), the difference of a row from the mean of its two
neighbours (the other parity) is, to first order in ``s``,

``d_k(x) = v_k(x) − ½ (v_{k−1}(x) + v_{k+1}(x)) ≈ −σ_k s ∂f/∂x − ½ ∂²f/∂y² + o_k``

(``o_k`` a row offset, removed by an intercept per row; the curvature term does not
alternate and averages out). Each row gives ``s_k = −σ_k Σ_x d_k ∂f/∂x / Σ_x
(∂f/∂x)²`` with ``∂f/∂x`` from the neighbours' mean; ``s`` is the weighted
mean of the ``s_k`` (weights ``Σ (∂f/∂x)²``) and its error comes from their
scatter (rows as independent clusters), so slow-axis noise and model
imperfection are in it. This is the Lucas–Kanade least-squares shift (B. D.
Lucas and T. Kanade, Proc. 7th IJCAI, 674 (1981)), with the row parity as the
only unknown.

Correction. Odd rows are moved by ``−s/2`` and even rows by ``+s/2`` (linear
interpolation along x, missing points stay missing), which puts both
directions on their midpoint: the position a symmetric delay would leave.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["MIN_SHIFT_PX", "MIN_SHIFT_SIGMAS", "AlternateRowShift", "align_alternate_rows", "alternate_row_shift"]

#: Smallest alternate-row shift (pixels) that is corrected (a tenth of the 1/√12 px quantisation
#: of a sharp line's crossing is below any effect on the numbers).
MIN_SHIFT_PX = 0.15
#: The shift must also be this many standard errors.
MIN_SHIFT_SIGMAS = 5.0
#: Fewest rows with gradient weight for an estimate.
MIN_ROWS = 8


@dataclass(frozen=True)
class AlternateRowShift:
    """Shift of the odd rows relative to the even rows along x.

    Attributes
    ----------
    shift_px : float
        Odd rows' features lie ``shift_px`` pixels (x index) beyond the even rows'
        (NaN when not measurable).
    stderr_px : float
        Its standard error.
    n_rows : int
        Rows that entered the estimate.
    """

    shift_px: float
    stderr_px: float
    n_rows: int

    @property
    def significant(self) -> bool:
        """At least :data:`MIN_SHIFT_PX` and :data:`MIN_SHIFT_SIGMAS` standard errors."""
        s, e = self.shift_px, self.stderr_px
        return bool(np.isfinite(s) and np.isfinite(e) and abs(s) >= MIN_SHIFT_PX and abs(s) >= MIN_SHIFT_SIGMAS * e)


def alternate_row_shift(values: np.ndarray, *, max_iter: int = 6) -> AlternateRowShift:
    """Measure the shift of odd rows against even rows along x (axis 1) of a map (NaN-aware).

    The first-order estimate falls short once the shift is comparable with
    the width of the lines; it is repeated on the map aligned with the shift
    found so far (Lucas–Kanade iteration) until the increment is below
    0.01 px or ``max_iter`` steps.

    Parameters
    ----------
    values : ndarray, shape (ny, nx)
        The map, rows along the fast axis x.
    max_iter : int
        Largest number of estimates.

    Returns
    -------
    AlternateRowShift
    """
    v = np.asarray(values, float)
    r = _shift_once(v)
    if not np.isfinite(r.shift_px) or not r.significant:
        return r
    total = r.shift_px
    for _ in range(max_iter - 1):
        r = _shift_once(align_alternate_rows(v, total))
        if not np.isfinite(r.shift_px):
            break
        total += r.shift_px
        if abs(r.shift_px) < 0.01:
            break
    return AlternateRowShift(float(total), r.stderr_px, r.n_rows)


def _shift_once(v: np.ndarray) -> AlternateRowShift:
    """One first-order estimate of :func:`alternate_row_shift`."""
    ny, nx = v.shape
    nan = AlternateRowShift(float("nan"), float("nan"), 0)
    if ny < 3 or nx < 5:
        return nan
    mid = v[1:-1]
    pred = 0.5 * (v[:-2] + v[2:])  # the neighbours' mean: the other parity
    grad = np.full_like(pred, np.nan)
    grad[:, 1:-1] = 0.5 * (pred[:, 2:] - pred[:, :-2])
    d = mid - pred
    ok = np.isfinite(d) & np.isfinite(grad)
    with np.errstate(all="ignore"):
        # a regression with an intercept per row: the row's offset (slow-axis noise) drops out
        n_ok = ok.sum(1, keepdims=True)
        d = np.where(ok, d, 0.0)
        g = np.where(ok, grad, 0.0)
        d = np.where(ok, d - d.sum(1, keepdims=True) / n_ok, 0.0)
        g = np.where(ok, g - g.sum(1, keepdims=True) / n_ok, 0.0)
        sgg = (g * g).sum(1)
        sdg = (d * g).sum(1)
        parity = np.where(np.arange(1, ny - 1) % 2 == 1, 1.0, -1.0)
        s_k = -parity * sdg / sgg
    use = np.isfinite(s_k) & (sgg > 0)
    # rows whose gradient weight is a small fraction of the typical row carry only noise
    if use.sum() < MIN_ROWS:
        return nan
    wts = np.where(use, sgg, 0.0)
    use &= wts >= 0.05 * np.median(wts[use])
    if use.sum() < MIN_ROWS:
        return nan
    w, sk = wts[use], s_k[use]
    s = float((w * sk).sum() / w.sum())
    # rows as independent clusters: the weighted mean's error from the scatter of the rows' shifts
    n = sk.size
    var = float((w * w * (sk - s) ** 2).sum() / w.sum() ** 2 * n / (n - 1))
    return AlternateRowShift(s, float(np.sqrt(var)), int(n))


def align_alternate_rows(values: np.ndarray, shift_px: float) -> np.ndarray:
    """Move odd rows by ``−shift_px/2`` and even rows by ``+shift_px/2`` along x (linear interpolation).

    Points that would come from beyond the row's ends, or next to a missing
    point, are missing (NaN) in the result.
    """
    v = np.asarray(values, float)
    out = np.empty_like(v)
    out[0::2] = _moved(v[0::2], 0.5 * shift_px)
    out[1::2] = _moved(v[1::2], -0.5 * shift_px)
    return out


def _moved(rows: np.ndarray, move: float) -> np.ndarray:
    """``rows`` (k, nx) moved by ``move`` pixels along x: the value now at x was at x − move."""
    nx = rows.shape[1]
    src = np.arange(nx, dtype=float) - move
    i0 = np.floor(src).astype(int)
    t = src - i0
    inside = (i0 >= 0) & (i0 + 1 <= nx - 1)
    i0c = np.clip(i0, 0, nx - 2)
    val = (1 - t) * rows[:, i0c] + t * rows[:, i0c + 1]
    # a whole-pixel move takes the sample itself (also the last one, and beside a missing point)
    exact = np.isclose(t, 0.0) & (i0 >= 0) & (i0 <= nx - 1)
    val = np.where(exact, rows[:, np.clip(i0, 0, nx - 1)], val)
    return np.where(inside | exact, val, np.nan)
