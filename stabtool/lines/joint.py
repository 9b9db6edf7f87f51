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
from scipy import stats

__all__ = ["LinePoints", "JointFit", "fit_family", "bending_significance"]


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
        Shared dp/dt and its standard error (scaled by √χ²_red when > 1).
    offsets : ndarray, shape (n_lines,)
        p of each line at its own mean t (NaN for lines left out).
    chi2_red : float
        χ² per degree of freedom of the accepted points.
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


def _design(lines: Sequence[LinePoints], bend: bool, shared: bool):
    n_lines = len(lines)
    bend_cols: list[tuple[int, float, float]] = []  # (line, tau, scale)
    keep_pts = []
    for k, lp in enumerate(lines):
        ok = np.isfinite(lp.t) & np.isfinite(lp.p) & np.isfinite(lp.sig) & (lp.sig > 0)
        keep_pts.append(ok)
        if bend and ok.sum() >= 8:
            span = max(np.ptp(lp.t[ok]), 1e-300)
            for end, tau in enumerate(lp.vertices):
                if np.isfinite(tau):
                    bend_cols.append((k, tau, span, end))
    n_bend = 2 if shared else len(bend_cols)
    n_par = 1 + n_lines + n_bend
    X_rows, y, s, lid = [], [], [], []
    tms = np.full(n_lines, np.nan)
    for k, lp in enumerate(lines):
        ok = keep_pts[k]
        if ok.sum() < 3:
            continue
        t, p, sg = lp.t[ok], lp.p[ok], lp.sig[ok]
        tm = float(t.mean())
        tms[k] = tm
        X = np.zeros((t.size, n_par))
        X[:, 0] = t - tm
        X[:, 1 + k] = 1.0
        for j, (kk, tau, span, end) in enumerate(bend_cols):
            if kk == k:
                X[:, 1 + n_lines + (end if shared else j)] = span / (t - tau)
        X_rows.append(X)
        y.append(p)
        s.append(sg)
        lid.append(np.full(t.size, k))
    if not X_rows:
        return None
    X = np.vstack(X_rows)
    used = np.abs(X).sum(0) > 0
    return X[:, used], np.concatenate(y), np.concatenate(s), np.concatenate(lid), tms, used, int(used[1 + n_lines:].sum())


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
    """
    des = _design(lines, bend, shared_bend)
    if des is None:
        return None
    X, y, s, lid, tms, used, n_bend = des
    keep = np.ones(y.size, bool)
    beta = cov = None
    for _ in range(8):
        if keep.sum() <= X.shape[1] + 2:
            return None
        w = 1.0 / s[keep] ** 2
        Xk = X[keep]
        A = (Xk.T * w) @ Xk
        try:
            cov = np.linalg.pinv(A)
        except np.linalg.LinAlgError:
            return None
        beta = cov @ ((Xk.T * w) @ y[keep])
        r = (y - X @ beta) / s
        rk = r[keep]
        scale = max(1.4826 * np.median(np.abs(rk - np.median(rk))), 1.0)
        new = np.abs(r) <= n_clip * scale
        if np.array_equal(new, keep):
            break
        keep = new
    r = (y - X @ beta) / s
    chi2 = float((r[keep] ** 2).sum())
    dof = max(int(keep.sum()) - X.shape[1], 1)
    chi2r = chi2 / dof
    se = float(np.sqrt(cov[0, 0] * max(chi2r, 1.0)))
    offsets = np.full(len(lines), np.nan)
    idx = np.nonzero(used)[0]
    for j, col in enumerate(idx):
        if 1 <= col <= len(lines):
            offsets[col - 1] = beta[j]
    return JointFit(slope=float(beta[0]), slope_stderr=se, offsets=offsets, chi2_red=float(chi2r),
                    n_points=int(keep.sum()), bend_terms=int(n_bend), chi2=chi2)


def bending_significance(straight: JointFit, bent: JointFit) -> float:
    """p-value of the F test that the bending terms do not improve the fit."""
    df1 = bent.bend_terms
    if df1 <= 0:
        return 1.0
    dof2 = max(bent.n_points - (1 + df1) - 1, 1)
    # per-point χ² of the straight fit (clipping may keep slightly different points)
    c_s = straight.chi2 / max(straight.n_points, 1) * bent.n_points
    f = ((c_s - bent.chi2) / df1) / max(bent.chi2 / dof2, 1e-300)
    return float(stats.f.sf(f, df1, dof2)) if f > 0 else 1.0
