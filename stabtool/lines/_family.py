"""Family slopes from joint fits of the crossing points of all members (private)."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from ..mapdata import MapAxes
from ._geometry import steps
from .joint import JointFit, LinePoints, _fit_family, _median, _stack, bending_significance
from .refine import RefinedLine
from .result import TransitionLine

#: F-test p-value below which the vertex-bending terms count as detected.
BEND_P = 1e-3
#: points this close to a vertex (px, or fraction of the segment) are left out of the joint fits
VERTEX_GAP_PX = 2.0
VERTEX_GAP_FRAC = 0.03
#: points within this many thermal widths (detuning k_B T_e of the third charge state) of a vertex are
#: left out too: the thermal rounding of the triple point (see :func:`thermal_vertex_gap`)
VERTEX_GAP_WIDTHS = 4.0
#: straight and bent family slopes differing by more than this many σ of their difference: bending detected
BEND_Z = 3.0


@dataclass(frozen=True)
class FamilyFit:
    """Slope of one dot family (dV_y/dV_x) with its error and the bending diagnosis."""

    slope: float
    slope_stderr: float
    straight_slope: float
    bend_p: float
    bend_used: bool
    n_lines: int
    bent_slope: float = float("nan")
    bent_stderr: float = float("nan")
    bend_z: float = float("nan")


def _points(r: RefinedLine) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``r.points`` of a line known to have them (callers keep only lines with points)."""
    assert r.points is not None
    return r.points


def _point_dir(lines: Sequence[TransitionLine]) -> tuple[np.ndarray, np.ndarray]:
    s = np.array([l.slope for l in lines], float)
    p = np.array([[l.x0, l.y0] for l in lines], float).reshape(-1, 2)
    d = np.where(np.isinf(s)[:, None], np.array([0.0, 1.0]), np.stack([np.ones_like(s), np.where(np.isinf(s), 0.0, s)], 1))
    return p, d


def vertex_positions(r: RefinedLine, others: Sequence[TransitionLine], axes: MapAxes) -> tuple[float, float]:
    """Positions (in the line's t coordinate, V) of the honeycomb vertices at both ends of ``r``.

    A vertex is where the line meets a line of the other dot family whose
    segment ends close by (within 30 % of this segment's length + 4 px);
    NaN when no such line is found.
    """
    if r.points is None or not others:
        return float("nan"), float("nan")
    tab = _others_table(others, axes)
    return _vertex_positions(r, tab)


def _others_table(others: Sequence[TransitionLine], axes: MapAxes) -> dict:
    """What :func:`vertex_positions` needs of the other family's lines, computed once."""
    sx, sy = (abs(v) for v in steps(axes))
    pb, db = _point_dir(others)
    a = np.array([[o.start[0] / sx, o.start[1] / sy] for o in others])
    b = np.array([[o.end[0] / sx, o.end[1] / sy] for o in others])
    d = b - a
    return {"sx": sx, "sy": sy, "pb": pb, "db": db, "a": a, "d": d,
            "L2": np.maximum((d * d).sum(1), 1e-300), "scale": np.array([sx, sy])}


def _vertex_positions(r: RefinedLine, tab: dict) -> tuple[float, float]:
    if r.points is None:
        return float("nan"), float("nan")
    t = r.points[0]
    sx, sy = tab["sx"], tab["sy"]
    tstep = sy if r.along_x else sx
    lo, hi = float(t.min()), float(t.max())
    span = hi - lo
    pa, da = _point_dir([r.line])
    pb, db = tab["pb"], tab["db"]
    cross = da[0, 0] * db[:, 1] - da[0, 1] * db[:, 0]
    w = pb - pa
    with np.errstate(divide="ignore", invalid="ignore"):
        u = (w[:, 0] * db[:, 1] - w[:, 1] * db[:, 0]) / cross
    P = pa + u[:, None] * da  # intersections (x, y), V
    tau = P[:, 1] if r.along_x else P[:, 0]
    # distance (pixel frame) from each intersection to the other segment
    a, d, L2 = tab["a"], tab["d"], tab["L2"]
    q = P / tab["scale"]
    lam = np.clip(((q - a) * d).sum(1) / L2, 0.0, 1.0)
    dist = np.hypot(*(q - a - lam[:, None] * d).T)
    near = np.isfinite(tau) & (dist <= 0.3 * span / tstep + 4)
    below = near & (tau >= lo - 0.5 * span) & (tau <= lo + 0.05 * span)
    above = near & (tau >= hi - 0.05 * span) & (tau <= hi + 0.5 * span) & ~below
    va = float(tau[below][np.argmin(np.abs(lo - tau[below]))]) if below.any() else float("nan")
    vb = float(tau[above][np.argmin(np.abs(tau[above] - hi))]) if above.any() else float("nan")
    return va, vb


def _vertex_positions_all(rs: Sequence[RefinedLine], tab: dict, lo: np.ndarray | None = None,
                          hi: np.ndarray | None = None) -> np.ndarray:
    """:func:`_vertex_positions` of many refined lines (all with points) at once: (m, 2) array.

    ``lo``, ``hi`` (m,): the smallest and largest ``t`` of each line, when already known.
    """
    m = len(rs)
    out = np.full((m, 2), np.nan)
    if m == 0:
        return out
    sx, sy = tab["sx"], tab["sy"]
    alx = np.array([r.along_x for r in rs], bool)
    tstep = np.where(alx, sy, sx)
    if lo is None or hi is None:
        lo = np.array([float(_points(r)[0].min()) for r in rs])
        hi = np.array([float(_points(r)[0].max()) for r in rs])
    span = hi - lo
    pa, da = _point_dir([r.line for r in rs])  # (m, 2)
    pb, db = tab["pb"], tab["db"]  # (o, 2)
    cross = da[:, None, 0] * db[None, :, 1] - da[:, None, 1] * db[None, :, 0]
    w = pb[None, :, :] - pa[:, None, :]  # (m, o, 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        u = (w[..., 0] * db[None, :, 1] - w[..., 1] * db[None, :, 0]) / cross
        P = pa[:, None, :] + u[..., None] * da[:, None, :]  # intersections (x, y), V
        tau = np.where(alx[:, None], P[..., 1], P[..., 0])
        a, d, L2 = tab["a"], tab["d"], tab["L2"]
        q = P / tab["scale"]
        lam = np.clip(((q - a[None]) * d[None]).sum(-1) / L2[None], 0.0, 1.0)
        rr = q - a[None] - lam[..., None] * d[None]
        dist = np.hypot(rr[..., 0], rr[..., 1])
        near = np.isfinite(tau) & (dist <= (0.3 * span / tstep + 4)[:, None])
        below = near & (tau >= (lo - 0.5 * span)[:, None]) & (tau <= (lo + 0.05 * span)[:, None])
        above = near & (tau >= (hi - 0.05 * span)[:, None]) & (tau <= (hi + 0.5 * span)[:, None]) & ~below
        db_ = np.where(below, np.abs(lo[:, None] - tau), np.inf)
        da_ = np.where(above, np.abs(tau - hi[:, None]), np.inf)
    rows = np.arange(m)
    ib, ia = db_.argmin(1), da_.argmin(1)
    out[:, 0] = np.where(below.any(1), tau[rows, ib], np.nan)
    out[:, 1] = np.where(above.any(1), tau[rows, ia], np.nan)
    return out


def thermal_vertex_gap(members: Sequence[RefinedLine], others: Sequence[TransitionLine], *, steep: bool,
                       n_widths: float | None = None) -> float:
    """Distance along the lines (in their ``t`` coordinate, V) over which a vertex is thermally rounded.

    Parameters
    ----------
    members : sequence of RefinedLine
        The family's lines.
    others : sequence of TransitionLine
        The other dot family's lines, with their fitted Fermi widths
        ``width_V`` (along their own gate).
    steep : bool
        True when ``members`` are the dot1 (steep) lines.
    n_widths : float, optional
        Thermal widths to leave out (default :data:`VERTEX_GAP_WIDTHS`).

    Returns
    -------
    float
        ``n_widths · w_o / |1 − s2/s1|`` in V along ``t`` (0 when the other
        family has no measured width).

    Notes
    -----
    Along a dot-i line the two charge states it separates are degenerate;
    the third state of the triple point at its end (one electron more or less
    on the other dot) lies ``ε`` above them, ε growing linearly with the
    distance from the vertex. Its thermal occupation ``∝ exp(−ε / k_B T_e)``
    rounds the corner and moves the measured crossing (by ``k_B T_e ln 2``
    at the vertex itself, in energy), which a vertex-bending term reads as
    tunnel coupling when the lines are a few pixels wide. In units of the
    other family's Fermi width ``w_o = k_B T_e / (e α_oo)`` (measured along
    that family's own gate), ε/k_B T_e equals the distance from the point to
    the other family's line through the vertex along that gate, which is
    ``|t − τ| · |1 − s2/s1|`` for both families (s1, s2 the dot1 and dot2
    slopes dV_y/dV_x). Beyond ``n_widths = 4`` the shift is below
    ``k_B T_e · e^{−4}``, 2 % of a width, while the ``t²/ε`` tail of a real
    tunnel coupling reaches much farther (W. G. van der Wiel et al., Rev. Mod.
    Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1, Sec. II; Fermi–Dirac
    occupation of the three states).
    """
    k = VERTEX_GAP_WIDTHS if n_widths is None else float(n_widths)
    w_o = np.array([o.width_V for o in others], float)
    w_o = w_o[np.isfinite(w_o) & (w_o > 0)]
    if k <= 0 or w_o.size == 0:
        return 0.0
    s_m = np.array([r.line.slope for r in members], float)
    s_o = np.array([o.slope for o in others], float)
    s_m, s_o = s_m[np.isfinite(s_m)], s_o[np.isfinite(s_o)]
    if s_m.size == 0 or s_o.size == 0:
        return 0.0
    s1, s2 = (float(_median(s_m)), float(_median(s_o))) if steep else (float(_median(s_o)), float(_median(s_m)))
    if s1 == 0 or not np.isfinite(s1):
        return 0.0
    f = abs(1.0 - s2 / s1)
    if f < 0.05:
        return 0.0
    return float(k * _median(w_o) / f)


def family_fit(members: Sequence[RefinedLine], others: Sequence[TransitionLine], axes: MapAxes, *,
               steep: bool) -> FamilyFit | None:
    """Joint slope of a dot family; adds vertex-bending terms when they are significant.

    Points within ``max(VERTEX_GAP_PX, VERTEX_GAP_FRAC of the segment,
    VERTEX_GAP_WIDTHS thermal widths)`` of a vertex are left out of the
    bending test (the 1/ε form of the bending holds away from the
    anticrossing itself, and the thermally rounded corner is not tunnel
    coupling: :func:`thermal_vertex_gap`).
    """
    rs = [r for r in members if r.refined and r.points is not None and r.points[0].size >= 4]
    if len(rs) < 2:
        return None
    along = rs[0].along_x
    rs = [r for r in rs if r.along_x == along]
    if len(rs) < 2:
        return None
    # lines whose own slope is far from the others' (a misassigned or broken
    # segment) are left out, as in family_slope: 4 robust σ
    if len(rs) >= 4:
        s_l = np.array([r.line.slope for r in rs])
        e_l = np.array([r.line.slope_stderr for r in rs])
        v, ve = (1.0 / s_l, e_l / s_l**2) if steep else (s_l, e_l)
        med = _median(v)
        rsig = 1.4826 * _median(np.abs(v - med))
        keep = np.abs(v - med) <= 4 * max(rsig, 1e-12) + 2 * ve
        if keep.sum() >= 3:
            rs = [r for r, k in zip(rs, keep) if k]
    sx, sy = (abs(v) for v in steps(axes))
    tstep = sy if along else sx
    lps, full = [], []
    tab = _others_table(others, axes) if others else None
    # smallest and largest t of every line (exact: min/max over the runs of the stacked t)
    ts = [_points(r)[0] for r in rs]  # (rs: only lines with points, see the filter above)
    first = np.cumsum([0] + [t.size for t in ts[:-1]])
    t_all = np.concatenate(ts).astype(float, copy=False)
    lo_a, hi_a = np.minimum.reduceat(t_all, first), np.maximum.reduceat(t_all, first)
    lo, hi = lo_a.tolist(), hi_a.tolist()
    verts = _vertex_positions_all(rs, tab, lo_a, hi_a) if tab is not None else np.full((len(rs), 2), np.nan)
    gap_th = thermal_vertex_gap(rs, others, steep=steep)
    gap_px = VERTEX_GAP_PX * tstep
    for r, (va, vb), t_lo, t_hi in zip(rs, verts, lo, hi):
        pts = _points(r)
        t, p, sg = pts
        fin_a, fin_b = va == va, vb == vb  # not NaN (vertex positions are finite or NaN)
        if fin_a or fin_b:
            ptp = (t_hi - t_lo) if t.dtype == np.float64 else np.ptp(t)  # (= np.ptp(t) for float64 t)
            gap = max(gap_px, VERTEX_GAP_FRAC * ptp, gap_th)
            if fin_a and fin_b:
                ok = (np.abs(t - va) >= gap) & (np.abs(t - vb) >= gap)
            else:
                ok = np.abs(t - (va if fin_a else vb)) >= gap
            n_ok = int(np.count_nonzero(ok))
            if n_ok < 4:
                va = vb = float("nan")
            elif n_ok < t.size:
                t, p, sg = t[ok], p[ok], sg[ok]
        lps.append(LinePoints(t=t, p=p, sig=sg, vertices=(va, vb)))
        full.append(LinePoints(t=pts[0], p=pts[1], sig=pts[2]))
    st_full = _stack(full)
    straight_all = _fit_family(full, st_full, bend=False) if st_full is not None else None
    # with no point near a vertex left out, the two straight fits see the same points (and the same stack)
    trimmed = any(lp.t.size != f.t.size for lp, f in zip(lps, full))
    st = _stack(lps) if trimmed else st_full
    straight = (_fit_family(lps, st, bend=False) if st is not None else None) if trimmed else straight_all
    if straight is None or straight_all is None:
        return None
    bent = _fit_family(lps, st, bend=True)
    pval = bending_significance(straight, bent) if bent is not None else 1.0
    z = float("nan")
    if bent is not None and bent.bend_terms > 0:
        # the straight fit is nested in the bent one: σ of the difference is √(σ_b² − σ_s²) for independent
        # points (the clustered errors are not nested: a bend is itself a per-line correlated residual)
        sb2, ss2 = bent.slope_stderr_iid**2, straight.slope_stderr_iid**2
        z = abs(bent.slope - straight.slope) / np.sqrt(max(sb2 - ss2, 1e-3 * sb2))
    use = bent is not None and bent.bend_terms > 0 and (pval < BEND_P or z > BEND_Z)
    # the straight slope from the points clear of the (thermally or tunnel-) rounded corners
    chosen: JointFit = bent if use else straight  # type: ignore[assignment]

    def conv(f: JointFit) -> tuple[float, float]:
        C, sC = f.slope, f.slope_stderr
        if along:  # x(y): dV_y/dV_x = 1/C
            return (1.0 / C if C != 0 else np.inf), (sC / C**2 if C != 0 else np.inf)
        return C, sC

    s, se = conv(chosen)
    s0, _ = conv(straight_all)
    sb, sbe = conv(bent) if bent is not None and bent.bend_terms > 0 else (float("nan"), float("nan"))
    return FamilyFit(slope=float(s), slope_stderr=float(se), straight_slope=float(s0), bend_p=float(pval),
                     bend_used=bool(use), n_lines=len(rs), bent_slope=float(sb), bent_stderr=float(sbe), bend_z=float(z))
