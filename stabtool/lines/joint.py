"""One slope for all parallel lines of a family, optionally with triple-point bending.

Parallel lines of one family share a slope in the constant-interaction model
(van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1), so the crossing points of all of them are
fitted together: one slope, one offset per line. Far more points fix the
slope than in any single segment, and the pixel-quantisation pattern of
sharp steps averages out between segments of different phase.

Interdot tunnel coupling ``t`` rounds each honeycomb vertex: the two
charge states joined by the interdot line hybridise, and the ground-state
energy drops by ``(√(ε² + 4t²) − |ε|)/2 ≈ t²/|ε|`` at detuning ε from the
interdot line (second-order perturbation theory; the anticrossing of
W. G. van der Wiel et al., same reference, Sec. II.C). A dot line therefore
moves by ∝ 1/(distance to the vertex) over its whole length, in opposite
directions at its two ends: a straight fit is rotated (several % at
t ≈ 30 µeV in GaAs). :func:`fit_family` can add, per line, the terms
``c_A/(τ − τ_A) + c_B/(τ − τ_B)``, τ_A and τ_B being the vertex positions
(intersections with the other dot family), and reports how much that
changes χ².
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy.special import fdtrc  # F survival function, = scipy.stats.f.sf(x, dfn, dfd)

__all__ = ["LinePoints", "JointFit", "fit_family", "bending_significance", "clustered_slope_variance"]


def _median(x: np.ndarray) -> np.float64:
    """``np.median`` of a 1-D float array, bit for bit, with less call overhead (one ``np.partition``).

    Like ``np.median``: the mean of the two middle values for even sizes,
    NaN when the array holds a NaN (NaN sorts last in the partition).
    """
    n = x.size
    if n == 0:
        return np.median(x)
    k = n // 2
    if n % 2:
        part = np.partition(x, (k, n - 1))
        m = part[k]
    else:
        part = np.partition(x, (k - 1, k, n - 1))
        m = (part[k - 1] + part[k]) / 2
    return part[n - 1] if np.isnan(part[n - 1]) else m


def _pinv(A: np.ndarray) -> np.ndarray:
    """``np.linalg.pinv(A)``; a 1×1 positive ``A`` of ordinary magnitude takes ``1/a`` directly.

    For such a matrix the SVD is ``a = 1 · a · 1`` and the pseudo-inverse is
    exactly ``1/a`` (checked bit for bit against ``np.linalg.pinv``, see
    tests/test_lines_family_kernels.py); other cases go to ``np.linalg.pinv``.
    """
    if A.shape == (1, 1):
        a = A[0, 0]
        if 1e-100 < a < 1e100:
            return np.array([[1.0 / a]])
    return np.linalg.pinv(A)


@dataclass(frozen=True)
class LinePoints:
    """Crossing points of one line, in volts.

    ``t`` is the coordinate along the line's slow direction (y for steep
    lines fitted as x(y), x for shallow lines fitted as y(x)); ``p`` the
    crossing position along the profile axis; ``sig`` its standard error.
    ``vertices`` holds the positions (in ``t``) of the honeycomb vertices at
    the line's ends, NaN where unknown.
    """

    t: np.ndarray
    p: np.ndarray
    sig: np.ndarray
    vertices: tuple[float, float] = (float("nan"), float("nan"))


@dataclass(frozen=True)
class JointFit:
    """Result of a joint fit of parallel lines.

    Attributes
    ----------
    slope, slope_stderr : float
        Shared dp/dt and its standard error: the larger of the weighted
        least-squares error scaled by √χ²_red when > 1 (Birge ratio) and the
        cluster-robust error with one cluster per line (:func:`clustered_slope_variance`).
    offsets : ndarray, shape (n_lines,)
        p of each line at its own mean t (NaN for lines left out).
    chi2_red : float
        χ² per degree of freedom of the accepted points.
    slope_stderr_iid : float
        The least-squares slope error for independent points (Birge-scaled),
        without the clustered part: the nested straight/bent comparison of
        :func:`stabtool.lines._family.family_fit` is made on it.
    n_points : int
        Accepted points.
    bend_terms : int
        Number of vertex-bending terms in the model (0: straight lines).
    """

    slope: float
    slope_stderr: float
    offsets: np.ndarray
    chi2_red: float
    n_points: int
    bend_terms: int
    chi2: float
    slope_stderr_iid: float = float("nan")


def _line_sums(lid: np.ndarray, w: np.ndarray, S: np.ndarray, n_lines: int) -> np.ndarray:
    """``Σ_{i ∈ line} w_i S_ic`` for every line and column: (n_lines, k) (one ``bincount`` per column)."""
    if S.shape[1] == 1:
        return np.bincount(lid, w * S[:, 0], minlength=n_lines)[:, None]
    return np.stack([np.bincount(lid, w * S[:, c], minlength=n_lines) for c in range(S.shape[1])], 1)


#: what :func:`_stack` returns: ``(cnt, t, y, sig, lid, tms)``
_Stacked = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]
#: what :func:`_design` returns: ``(S, y, sig, lid, tms, n_bend)``
_Design = tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray, int]


def _stack(lines: Sequence[LinePoints]) -> _Stacked | None:
    """The part of :func:`_design` that does not depend on the model: usable points stacked, line by line.

    Returns ``(cnt, t, y, sig, lid, tms)`` (points per line, then the usable
    points of the lines with at least three, their line index and each
    line's mean ``t``), or None when no line has three usable points.
    """
    n_lines = len(lines)
    if n_lines == 0:
        return None
    sizes = np.array([lp.t.size for lp in lines])
    T = np.concatenate([np.asarray(lp.t, float) for lp in lines])
    P = np.concatenate([np.asarray(lp.p, float) for lp in lines])
    SG = np.concatenate([np.asarray(lp.sig, float) for lp in lines])
    LID = np.repeat(np.arange(n_lines), sizes)
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(T) & np.isfinite(P) & np.isfinite(SG) & (SG > 0)
    cnt = np.bincount(LID[ok], minlength=n_lines)
    used = cnt >= 3
    pts = ok & used[LID]
    if not pts.any():
        return None
    t, lid = T[pts], LID[pts]
    tms = np.full(n_lines, np.nan)
    tms[used] = np.bincount(lid, t, minlength=n_lines)[used] / cnt[used]
    return cnt, t, P[pts], SG[pts], lid, tms


def _design(lines: Sequence[LinePoints], bend: bool, shared: bool,
            stacked: _Stacked | None = None) -> _Design | None:
    """Stacked points with the shared columns only (slope, bending terms) and the line index of each point.

    Lines with fewer than three usable points are left out; bending terms
    ``span/(t − τ)`` only for lines with at least eight. ``stacked``: the
    result of :func:`_stack` for the same ``lines``, when already made.
    """
    if stacked is None:
        stacked = _stack(lines)
        if stacked is None:
            return None
    n_lines = len(lines)
    cnt, t, y, sig, lid, tms = stacked
    cols = [t - tms[lid]]
    if bend:
        V = np.array([lp.vertices for lp in lines], float).reshape(n_lines, 2)
        V[cnt < 8] = np.nan
        hi = np.full(n_lines, -np.inf)
        lo = np.full(n_lines, np.inf)
        # lid is non-decreasing (lines stacked in order): per-line extremes over the runs of equal lid
        first = np.flatnonzero(np.concatenate(([True], lid[1:] != lid[:-1])))
        hi[lid[first]] = np.maximum.reduceat(t, first)
        lo[lid[first]] = np.minimum.reduceat(t, first)
        with np.errstate(invalid="ignore"):
            span = np.maximum(hi - lo, 1e-300)
        if shared:
            for end in (0, 1):
                has = np.isfinite(V[lid, end])
                with np.errstate(divide="ignore", invalid="ignore"):
                    cols.append(np.where(has, span[lid] / (t - V[lid, end]), 0.0))
        else:
            for k, end in zip(*np.nonzero(np.isfinite(V))):
                on = lid == k
                c = np.zeros(t.size)
                with np.errstate(divide="ignore"):
                    c[on] = span[k] / (t[on] - V[k, end])
                cols.append(c)
    S = np.stack(cols, 1)
    used_b = np.abs(S[:, 1:]).sum(0) > 0
    S = S[:, np.concatenate([[True], used_b])]
    return S, y, sig, lid, tms, int(used_b.sum())


def fit_family(
    lines: Sequence[LinePoints],
    *,
    bend: bool = False,
    shared_bend: bool = True,
    n_clip: float = 3.5,
) -> JointFit | None:
    """Weighted least-squares fit of parallel lines with one shared slope.

    Parameters
    ----------
    lines : sequence of LinePoints
    bend : bool
        Add the vertex-bending terms ``span/(t − τ)`` for every known vertex.
    shared_bend : bool
        One bending coefficient per end (lower / upper vertex) for the whole
        family (the vertices of one family are alike in the
        constant-interaction model), rather than one per vertex.
    n_clip : float
        Iterative clipping of points beyond ``n_clip`` robust σ.

    Returns
    -------
    JointFit or None
        None when fewer than two lines or too few points remain.

    Notes
    -----
    The per-line offsets are eliminated in closed form: every column and the
    data are centred on their weighted mean within each line, and the shared
    parameters follow from the small normal equations of the centred problem
    (Frisch–Waugh–Lovell theorem; R. Frisch and F. V. Waugh, Econometrica 1,
    387 (1933), doi:10.2307/1907330). Estimates and covariance equal those
    of the full design with one offset column per line, at the cost of a
    (1 + n_bend)² solve instead of one of size (1 + n_lines + n_bend)².
    """
    return _fit_family(lines, None, bend=bend, shared_bend=shared_bend, n_clip=n_clip)


def _fit_family(lines: Sequence[LinePoints], stacked: _Stacked | None, *, bend: bool = False,
                shared_bend: bool = True, n_clip: float = 3.5) -> JointFit | None:
    """:func:`fit_family` with the model-independent stacking of :func:`_stack` given (None: made here).

    The straight and the bent fit of one family's points share it.
    """
    des = _design(lines, bend, shared_bend, stacked)
    if des is None:
        return None
    S, y, s, lid, tms, n_bend = des
    n_lines = len(lines)
    n_used_lines = int(np.count_nonzero(np.bincount(lid, minlength=n_lines)))
    n_par = S.shape[1] + n_used_lines
    w_all = 1.0 / s**2
    keep = np.ones(y.size, bool)
    beta = cov = off = None
    for _ in range(8):
        if np.count_nonzero(keep) <= n_par + 2:
            return None
        w = np.where(keep, w_all, 0.0)
        sw = np.bincount(lid, w, minlength=n_lines)
        swn = np.where(sw > 0, sw, 1.0)
        ym = np.bincount(lid, w * y, minlength=n_lines) / swn
        Sm = _line_sums(lid, w, S, n_lines) / swn[:, None]
        Sc = S - Sm[lid]
        yc = y - ym[lid]
        ScTw = Sc.T * w
        A = ScTw @ Sc
        try:
            cov = _pinv(A)
        except np.linalg.LinAlgError:
            return None
        beta = cov @ (ScTw @ yc)
        off = ym - Sm @ beta
        res = y - off[lid] - S @ beta
        r = res / s
        rk = r[keep]
        scale = max(1.4826 * _median(np.abs(rk - _median(rk))), 1.0)
        new = np.abs(r) <= n_clip * scale
        if np.array_equal(new, keep):
            break
        keep = new
    # the loop runs at least once, and every pass that does not return sets beta, cov and off
    assert beta is not None and cov is not None and off is not None
    # (the residuals of the last iteration's beta and offsets: r and res are up to date)
    chi2 = float((r[keep] ** 2).sum())
    dof = max(int(keep.sum()) - n_par, 1)
    chi2r = chi2 / dof
    var_iid = float(cov[0, 0] * max(chi2r, 1.0))
    se = float(np.sqrt(max(var_iid, clustered_slope_variance(Sc, w, res, lid, cov, n_lines))))
    has = np.bincount(lid, keep.astype(float), minlength=n_lines) > 0
    offsets = np.where(np.isfinite(tms) & has, off, np.nan)
    return JointFit(slope=float(beta[0]), slope_stderr=se, offsets=offsets, chi2_red=float(chi2r),
                    n_points=int(keep.sum()), bend_terms=int(n_bend), chi2=chi2,
                    slope_stderr_iid=float(np.sqrt(var_iid)))


def clustered_slope_variance(Sc: np.ndarray, w: np.ndarray, r: np.ndarray, lid: np.ndarray, cov: np.ndarray,
                             n_lines: int) -> float:
    """Cluster-robust (one cluster per line) variance of the shared slope; 0 when it cannot be formed.

    ``Sc`` (n, k): the shared columns centred within each line; ``w`` (n,):
    weights (0 for rejected points); ``r`` (n,): residuals in data units;
    ``cov`` (k, k): inverse of the centred normal matrix. The sandwich
    ``cov · Σ_g u_g u_gᵀ · cov`` with ``u_g = Σ_{i∈g} w_i Sc_i r_i`` and the
    small-sample factor ``G/(G − 1) · (N − 1)/(N − K)`` (K.-Y. Liang and
    S. L. Zeger, Biometrika 73, 13 (1986), doi:10.1093/biomet/73.1.13;
    A. C. Cameron and D. L. Miller, J. Human Resources 50, 317 (2015),
    doi:10.3368/jhr.50.2.317): crossing points along one line share slow
    noise and pixel patterns, the lines are taken as independent. ``K`` is
    the shared columns plus one offset per line. Also serves the relocation's
    common slope (:func:`stabtool.fit.relocate.clustered_slope_error`).
    """
    on = w > 0
    n = int(on.sum())
    g_lines = int(np.count_nonzero(np.bincount(lid[on], minlength=n_lines)))
    k_par = Sc.shape[1] + g_lines
    if g_lines < 2 or n <= k_par:
        return 0.0
    wr = w * r
    u = _line_sums(lid, wr, Sc, n_lines)
    meat = u.T @ u * (g_lines / (g_lines - 1) * (n - 1) / (n - k_par))
    v = float((cov @ meat @ cov)[0, 0])
    return v if np.isfinite(v) and v > 0 else 0.0


def bending_significance(straight: JointFit, bent: JointFit) -> float:
    """p-value of the F test that the bending terms do not improve the fit."""
    df1 = bent.bend_terms
    if df1 <= 0:
        return 1.0
    dof2 = max(bent.n_points - (1 + df1) - 1, 1)
    # per-point χ² of the straight fit (clipping may keep slightly different points)
    c_s = straight.chi2 / max(straight.n_points, 1) * bent.n_points
    f = ((c_s - bent.chi2) / df1) / max(bent.chi2 / dof2, 1e-300)
    if not f > 0:
        return 1.0
    return float(fdtrc(df1, dof2, f))
