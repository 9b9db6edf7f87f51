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


def _design(lines: Sequence[LinePoints], bend: bool, shared: bool):
    """Stacked points with the shared columns only (slope, bending terms) and the line index of each point.

    Lines with fewer than three usable points are left out; bending terms
    ``span/(t − τ)`` only for lines with at least eight.
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
    cols = [t - tms[lid]]
    if bend:
        V = np.array([lp.vertices for lp in lines], float).reshape(n_lines, 2)
        V[cnt < 8] = np.nan
        hi = np.full(n_lines, -np.inf)
        lo = np.full(n_lines, np.inf)
        np.maximum.at(hi, lid, t)
        np.minimum.at(lo, lid, t)
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
    return S, P[pts], SG[pts], lid, tms, int(used_b.sum())


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
    des = _design(lines, bend, shared_bend)
    if des is None:
        return None
    S, y, s, lid, tms, n_bend = des
    n_lines = len(lines)
    n_used_lines = int(np.unique(lid).size)
    n_par = S.shape[1] + n_used_lines
    w_all = 1.0 / s**2
    keep = np.ones(y.size, bool)
    beta = cov = off = None
    for _ in range(8):
        if keep.sum() <= n_par + 2:
            return None
        w = np.where(keep, w_all, 0.0)
        sw = np.bincount(lid, w, minlength=n_lines)
        swn = np.where(sw > 0, sw, 1.0)
        ym = np.bincount(lid, w * y, minlength=n_lines) / swn
        Sm = np.stack([np.bincount(lid, w * S[:, c], minlength=n_lines) for c in range(S.shape[1])], 1) / swn[:, None]
        Sc = S - Sm[lid]
        yc = y - ym[lid]
        A = (Sc.T * w) @ Sc
        try:
            cov = np.linalg.pinv(A)
        except np.linalg.LinAlgError:
            return None
        beta = cov @ ((Sc.T * w) @ yc)
        off = ym - Sm @ beta
        r = (y - off[lid] - S @ beta) / s
        rk = r[keep]
        scale = max(1.4826 * np.median(np.abs(rk - np.median(rk))), 1.0)
        new = np.abs(r) <= n_clip * scale
        if np.array_equal(new, keep):
            break
        keep = new
    r = (y - off[lid] - S @ beta) / s
    chi2 = float((r[keep] ** 2).sum())
    dof = max(int(keep.sum()) - n_par, 1)
    chi2r = chi2 / dof
    var_iid = float(cov[0, 0] * max(chi2r, 1.0))
    se = float(np.sqrt(max(var_iid, clustered_slope_variance(Sc, w, y - off[lid] - S @ beta, lid, cov, n_lines))))
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
    g_lines = int(np.unique(lid[on]).size)
    k_par = Sc.shape[1] + g_lines
    if g_lines < 2 or n <= k_par:
        return 0.0
    wr = w * r
    u = np.stack([np.bincount(lid, wr * Sc[:, c], minlength=n_lines) for c in range(Sc.shape[1])], 1)
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
