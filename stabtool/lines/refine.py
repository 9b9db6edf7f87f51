"""Sub-pixel refinement of a line from step (Fermi) profiles across it."""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Sequence

import numpy as np

from ..mapdata import MapAxes
from ._batchfit import BatchFit, fit_profiles
from ._geometry import idx_to_volts, steps
from .hough import PixelSegment, _segments_to_lines
from .result import TransitionLine

__all__ = ["RefinedLine", "refine_segment", "refine_segments"]


@dataclass(frozen=True)
class RefinedLine:
    """A refined line plus the quantities used by the quality verdict."""

    line: TransitionLine
    step_height: float  # median |h| of the profile fits, signal units (NaN if not refined)
    refined: bool
    shape: str  # "step", "peak" or "none"
    #: accepted crossing points (t, p, σ) in volts: t along the line's slow
    #: coordinate (y when ``along_x``), p the crossing along the profile axis
    points: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
    along_x: bool = True


def _all_profiles(values: np.ndarray, segs, along_x, halfwidth: int, max_points: int, trims,
                  edges: np.ndarray | None = None, bounds: np.ndarray | None = None):
    """Profiles across every segment at once, one per row (along_x) or column of each.

    Returns ``(seg_id, rows, centre, u, y, mask)`` with one entry (row) per
    profile, segments in order, or None when no segment has a profile.
    """
    ny, nx = values.shape
    if len(segs) == 0:
        return None
    a0, a1, b0, b1, r0, r1, use = _row_ranges(segs, along_x, values.shape, trims, bounds)
    if not use.any():
        return None
    ks = np.nonzero(use)[0]
    cnt = (r1 - r0 + 1)[ks]
    # every row of a segment, or max_points of them evenly spaced
    # (np.linspace(0, cnt − 1, max_points) rounded, for all segments at once)
    sizes = np.minimum(cnt, max_points)
    i = np.arange(int(sizes.sum())) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    step = np.where(cnt > max_points, (cnt - 1) / max(max_points - 1, 1), 1.0)
    rows = np.repeat(r0[ks], sizes) + np.round(i * np.repeat(step, sizes)).astype(int)
    seg_id = np.repeat(ks, sizes)
    with np.errstate(divide="ignore", invalid="ignore"):
        gs = (b1 - b0) / (a1 - a0)
    a0v, b0v, gv = a0[seg_id], b0[seg_id], gs[seg_id]
    alx = np.asarray(along_x, bool)[seg_id]
    pred = b0v + (rows - a0v) * gv
    centre = np.round(pred).astype(int)
    offs = np.arange(-halfwidth, halfwidth + 1)
    pos = centre[:, None] + offs[None, :]
    n_pos = (ny + (nx - ny) * alx.astype(int))[:, None]  # nx along x, else ny
    inside = (pos >= 0) & (pos < n_pos)
    posc = np.clip(pos, 0, n_pos - 1)
    flat = np.where(alx[:, None], rows[:, None] * nx + posc, posc * nx + rows[:, None])
    y = values.ravel()[flat]
    mask = inside & np.isfinite(y)
    if edges is not None:
        # a profile must cross one line only: samples beyond ±2 px that hit
        # another edge (a neighbouring line, a triple point) are left out
        e = edges.ravel()[flat]
        far = np.abs(offs)[None, :] > 2
        hit = e & far & inside
        # cut the profile at the first foreign edge on each side
        left = np.where(hit & (offs[None, :] < 0), offs[None, :], -10**6).max(1)
        right = np.where(hit & (offs[None, :] > 0), offs[None, :], 10**6).min(1)
        mask &= (offs[None, :] > left[:, None] + 1) & (offs[None, :] < right[:, None] - 1)
    if CUT_AT_OTHER_LINES and len(segs) > 1:
        mask &= _clear_of_other_lines(segs, seg_id, rows, centre, alx, offs)
    u = np.broadcast_to(offs[None, :].astype(float), y.shape)
    return seg_id, rows, centre, u, y, mask


def _row_ranges(segs, along_x, shape: tuple[int, int], trims, bounds: np.ndarray | None = None):
    """The rows (along x) or columns of each segment that :func:`_all_profiles` takes profiles at.

    Returns ``(a0, a1, b0, b1, r0, r1, use)`` per segment: the end points'
    coordinates along the profile rows (``a``) and across them (``b``), the
    first and last row ``r0, r1`` and whether the segment has any (``use``).
    They do not depend on the profiles' half-length.
    """
    ny, nx = shape
    # per-segment quantities as arrays (the same arithmetic as one segment at a time)
    cx = np.array([q.cx for q in segs]); cy = np.array([q.cy for q in segs])
    ux = np.array([q.ux for q in segs]); uy = np.array([q.uy for q in segs])
    t0 = np.array([q.t0 for q in segs]); t1 = np.array([q.t1 for q in segs])
    sx, sy, ex, ey = cx + t0 * ux, cy + t0 * uy, cx + t1 * ux, cy + t1 * uy
    alx_s = np.asarray(along_x, bool)
    a0, a1 = np.where(alx_s, sy, sx), np.where(alx_s, ey, ex)  # param = row (along x) or column
    b0, b1 = np.where(alx_s, sx, sy), np.where(alx_s, ex, ey)  # position across
    n_par = np.where(alx_s, ny, nx)
    tr = np.asarray(trims, float)
    lo, hi = np.minimum(a0, a1) + tr, np.maximum(a0, a1) - tr
    if bounds is not None:
        # rows fixed by the vertices (see _vertex_bounds), where known and
        # not far from the segment's own (else the vertex is doubtful: a
        # broken segment or a wrong intersection)
        b_lo, b_hi = bounds[:, 0], bounds[:, 1]
        with np.errstate(invalid="ignore"):
            d_lo, d_hi = b_lo - lo, b_hi - hi
            lo = np.where((-VERTEX_MAX_EXTEND_PX <= d_lo) & (d_lo <= VERTEX_MAX_SHRINK_PX), b_lo, lo)
            hi = np.where((-VERTEX_MAX_SHRINK_PX <= d_hi) & (d_hi <= VERTEX_MAX_EXTEND_PX), b_hi, hi)
    r0 = np.maximum(np.ceil(lo), 0).astype(int)
    r1 = np.minimum(np.floor(hi), n_par - 1).astype(int)
    use = (a1 != a0) & (r1 >= r0)
    return a0, a1, b0, b1, r0, r1, use


#: cut each profile where another segment's line (extended by CUT_EXTEND_PX) crosses it
CUT_AT_OTHER_LINES = True
CUT_EXTEND_PX = 4.0
CUT_MARGIN_PX = 1.0


def _clear_of_other_lines(segs, seg_id, rows, centre, alx, offs) -> np.ndarray:
    """(n_profiles, n_samples) mask of the samples on the own side of every other segment's line.

    Near a honeycomb vertex the other family's line passes through the
    profile window, often within the ±2 px that the edge cut leaves alone,
    and its step then sits in the baseline of the profile fit, pulling the
    crossing towards it (with a strongly nonlinear sensor this made straight
    lines read as bending towards the triple points). Each other segment,
    extended by ``CUT_EXTEND_PX`` beyond its ends (segments stop a few
    pixels short of the vertex), is intersected with the profile's row (or
    column); samples from ``CUT_MARGIN_PX`` before that crossing outwards
    are left out, and a profile left without its centre samples is dropped
    by the caller. All other segments count, not only the other dot
    family's: interdot and unsorted segments are steps too (24 maps of a
    sensor biased at its peak top, 128² and 200², SNR 10, t = 0: false
    bending warnings 7 without the cut, 5 cutting at the other dot family
    only, 3 cutting at all segments).
    """
    cx = np.array([s.cx for s in segs]); cy = np.array([s.cy for s in segs])
    ux = np.array([s.ux for s in segs]); uy = np.array([s.uy for s in segs])
    t0 = np.array([s.t0 for s in segs]) - CUT_EXTEND_PX
    t1 = np.array([s.t1 for s in segs]) + CUT_EXTEND_PX
    n_prof = rows.size
    right = np.full(n_prof, np.inf)
    left = np.full(n_prof, -np.inf)
    # only pairs of segments whose extended bounding boxes come within a profile's reach (a
    # profile runs ±offs[-1] from its own line, at most VERTEX_MAX_EXTEND_PX beyond the segment)
    reach = offs[-1] + CUT_MARGIN_PX + VERTEX_MAX_EXTEND_PX + 2.0
    xa, xb = cx + t0 * ux, cx + t1 * ux
    ya, yb = cy + t0 * uy, cy + t1 * uy
    x_lo, x_hi = np.minimum(xa, xb) - reach, np.maximum(xa, xb) + reach
    y_lo, y_hi = np.minimum(ya, yb) - reach, np.maximum(ya, yb) + reach
    close = ((x_lo[:, None] <= x_hi[None, :]) & (x_lo[None, :] <= x_hi[:, None])
             & (y_lo[:, None] <= y_hi[None, :]) & (y_lo[None, :] <= y_hi[:, None]))
    np.fill_diagonal(close, False)
    pi, j = _profile_segment_pairs(close, seg_id, rows, alx, cx, cy, ux, uy, t0, t1)
    if pi.size:
        a = alx[pi]
        r = rows[pi].astype(float)
        # along x: the other line at y = row gives x; along y: at x = column gives y
        with np.errstate(divide="ignore", invalid="ignore"):
            t = (r - np.where(a, cy[j], cx[j])) / np.where(a, uy[j], ux[j])
            d = np.where(a, cx[j], cy[j]) + t * np.where(a, ux[j], uy[j]) - centre[pi]
            hit = np.isfinite(d) & (t >= t0[j]) & (t <= t1[j]) & (np.abs(d) <= offs[-1] + CUT_MARGIN_PX)
        pos, neg = hit & (d > 0), hit & (d <= 0)
        np.minimum.at(right, pi[pos], d[pos])
        np.maximum.at(left, pi[neg], d[neg])
    o = offs[None, :]
    return (o < right[:, None] - CUT_MARGIN_PX) & (o > left[:, None] + CUT_MARGIN_PX)


def _profile_segment_pairs(close, seg_id, rows, alx, cx, cy, ux, uy, t0, t1):
    """(profile, other segment) pairs to test in :func:`_clear_of_other_lines`: ``(pi, j)``.

    Every pair of a profile with the segments ``close`` to its own. When the
    profiles come in blocks per segment with rising rows (as
    :func:`_all_profiles` makes them), only the rows where the other
    segment's (extended) line can cross the profile's row are taken: its
    parameter range ``[t0, t1]`` maps to a row interval, widened by 1 row
    (the exact test follows); the pairs left out could never hit.
    """
    n_prof = rows.size
    ncand = close.sum(1)
    cand = np.nonzero(close)  # (segment, other) pairs, row-major
    new_blk = np.diff(seg_id) > 0
    ordered = (n_prof > 0 and bool(np.all(np.diff(seg_id) >= 0)) and bool(np.all((np.diff(rows) > 0) | new_blk))
               and bool(np.all((alx[1:] == alx[:-1]) | new_blk)))
    if not ordered or not ncand.any():
        start = np.concatenate([[0], np.cumsum(ncand)[:-1]])
        cnt = ncand[seg_id]
        pi = np.repeat(np.arange(n_prof), cnt)
        k = np.arange(pi.size) - np.repeat(np.cumsum(cnt) - cnt, cnt)
        return pi, cand[1][start[seg_id[pi]] + k]
    si, sj = cand
    # the profiles of segment si: a contiguous block; its along-x flag from the block's first profile
    first = np.searchsorted(seg_id, si, side="left")
    last = np.searchsorted(seg_id, si, side="right")
    has = first < last
    a = alx[np.minimum(first, n_prof - 1)]
    q = np.where(a, uy[sj], ux[sj])
    p0 = np.where(a, cy[sj], cx[sj])
    with np.errstate(invalid="ignore"):
        ra, rb = p0 + q * t0[sj], p0 + q * t1[sj]
        r_lo = np.floor(np.minimum(ra, rb)) - 1.0
        r_hi = np.ceil(np.maximum(ra, rb)) + 1.0
    ok = has & (q != 0) & np.isfinite(r_lo) & np.isfinite(r_hi)
    # (segment, row) as one ascending integer key; the interval's ends clipped to the rows' span
    rmin, rmax = int(rows.min()), int(rows.max())
    span = rmax - rmin + 4
    key = seg_id.astype(np.int64) * span + (rows - rmin + 1)
    base = si.astype(np.int64) * span - rmin + 1
    r_lo = np.where(ok, np.clip(r_lo, rmin - 1, rmax + 1), 0).astype(np.int64)
    r_hi = np.where(ok, np.clip(r_hi, rmin - 1, rmax + 1), 0).astype(np.int64)
    lo = np.searchsorted(key, base + r_lo, side="left")
    hi = np.searchsorted(key, base + r_hi, side="right")
    lo = np.maximum(lo, first)
    hi = np.minimum(hi, last)
    n = np.where(ok, np.maximum(hi - lo, 0), 0)
    pj = np.repeat(sj, n)
    pi = np.repeat(lo, n) + (np.arange(pj.size) - np.repeat(np.cumsum(n) - n, n))
    return pi, pj


#: profile rows of a dot line end this far (px) from its vertices with the other dot family
VERTEX_MARGIN_PX = 2.0
#: largest extension / shortening of a segment's row range by its vertices, px
VERTEX_MAX_EXTEND_PX = 6.0
VERTEX_MAX_SHRINK_PX = 3.0
#: a vertex: the other segment ends within this distance (px) of the intersection, which lies
#: within twice it beyond this segment's end (or 1 px inside)
VERTEX_REACH_PX = 4.0
VERTEX_BOUNDS = True


def _vertex_bounds(segs, families, along_x, *, margin_px: float | None = None) -> np.ndarray:
    """Row (or column) range of each dot line's profiles from its vertices: (n, 2), NaN where none.

    A segment's own ends come from where its edge pixels stop, and near a
    honeycomb vertex that depends on how the line falls on the pixel grid:
    the rows next to the ends are kept or lost together with the sign of
    their pixel-quantisation error, which on short segments (128² maps,
    10–15 rows) rotates the fitted line by ~1 %. The vertices, intersections
    with the other dot family's lines (fitted over many pixels), do not
    depend on that phase; the profiles run from ``margin_px`` inside one
    vertex to ``margin_px`` inside the other. A vertex counts when the
    other segment ends within ``VERTEX_REACH_PX`` of the intersection and
    the intersection lies between twice that beyond this segment's end and
    1 px inside it (both segments stop a few pixels short of a true vertex;
    looser rules let long, merged or artefact segments reach across a
    vertex into the next cell). :func:`_all_profiles` uses a bound only
    when it lengthens the segment's range by at most
    ``VERTEX_MAX_EXTEND_PX`` or shortens it by at most
    ``VERTEX_MAX_SHRINK_PX``.
    """
    m = VERTEX_MARGIN_PX if margin_px is None else float(margin_px)
    n = len(segs)
    out = np.full((n, 2), np.nan)
    fam = np.array([str(f) for f in families])
    if n < 2 or not ((fam == "dot1").any() and (fam == "dot2").any()):
        return out
    cx = np.array([s.cx for s in segs]); cy = np.array([s.cy for s in segs])
    ux = np.array([s.ux for s in segs]); uy = np.array([s.uy for s in segs])
    t0 = np.array([s.t0 for s in segs]); t1 = np.array([s.t1 for s in segs])
    alx = np.asarray(along_x, bool)
    # intersections of every pair of lines (pixel frame): c_i + s u_i = c_j + r u_j
    cross = ux[:, None] * uy[None, :] - uy[:, None] * ux[None, :]
    dx, dy = cx[None, :] - cx[:, None], cy[None, :] - cy[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        s_i = (dx * uy[None, :] - dy * ux[None, :]) / cross  # along line i
        s_j = (dx * uy[:, None] - dy * ux[:, None]) / cross  # along line j
    # the other segment ends near the intersection
    gap_j = np.maximum(np.maximum(t0[None, :] - s_j, s_j - t1[None, :]), 0.0)
    other = ((fam[:, None] == "dot1") & (fam[None, :] == "dot2")) | ((fam[:, None] == "dot2") & (fam[None, :] == "dot1"))
    with np.errstate(invalid="ignore"):
        near = other & np.isfinite(s_i) & (gap_j <= VERTEX_REACH_PX)
        low = near & (s_i >= (t0 - 2 * VERTEX_REACH_PX)[:, None]) & (s_i <= (t0 + 1.0)[:, None])
        high = near & (s_i >= (t1 - 1.0)[:, None]) & (s_i <= (t1 + 2 * VERTEX_REACH_PX)[:, None]) & ~low
    # the vertex nearest to each end, in the segment's profile-row coordinate
    idx = np.arange(n)
    drow = np.where(alx, uy, ux)  # d(row)/ds along the segment
    c_row = np.where(alx, cy, cx)
    ok_seg = ((fam == "dot1") | (fam == "dot2")) & (np.abs(drow) >= 1e-9)
    for sel, t_end in ((low, t0), (high, t1)):
        j = np.where(sel, np.abs(s_i - t_end[:, None]), np.inf).argmin(1)
        has = sel.any(1) & ok_seg
        r = c_row + s_i[idx, j] * drow
        # each vertex bounds the row range on its own side (the end it is nearest to), inside by the margin
        r_lo_seg = c_row + np.minimum(t0 * drow, t1 * drow)
        r_hi_seg = c_row + np.maximum(t0 * drow, t1 * drow)
        with np.errstate(invalid="ignore"):
            at_lo = np.abs(r - r_lo_seg) <= np.abs(r - r_hi_seg)
        out[:, 0] = np.where(has & at_lo, r + m, out[:, 0])
        out[:, 1] = np.where(has & ~at_lo, r - m, out[:, 1])
    return out


def _row_median(v: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Median of each row of ``v`` (m, p) over the entries marked ``valid`` (NaN for an empty row)."""
    s = np.sort(np.where(valid, v, np.inf), axis=1)
    c = valid.sum(1)
    lo = np.clip((c - 1) // 2, 0, None)
    hi = np.clip(c // 2, 0, v.shape[1] - 1)
    r = np.arange(v.shape[0])
    with np.errstate(invalid="ignore"):
        med = (s[r, lo] + s[r, hi]) / 2
    return np.where(c > 0, med, np.nan)


def _robust_line_fits(t: np.ndarray, p: np.ndarray, sig: np.ndarray, valid: np.ndarray, n_clip: float = 3.5):
    """Weighted fits ``p = A + C (t − t̄)`` of many point sets with iterative clipping.

    ``t``, ``p``, ``sig`` (m, q) hold one point set per row, ``valid`` marks
    its points. Per row: 3.5 robust σ clipping (scale at least 1, i.e. the
    stated errors) until the kept set no longer changes (at most 6 passes);
    the covariance is scaled by ``max(χ²_red, 1)``.

    Returns ``(beta (m, 2), cov (m, 2, 2), keep (m, q), t̄ (m,), ok (m,))``;
    rows with fewer than four kept points are not ``ok``.
    """
    with np.errstate(invalid="ignore"):
        fin = valid & np.isfinite(t) & np.isfinite(p)
        keep = fin & np.isfinite(sig) & (sig > 0)
    m = t.shape[0]
    cnt0 = keep.sum(1)
    tm = np.where(cnt0 > 0, np.where(keep, t, 0.0).sum(1) / np.maximum(cnt0, 1), 0.0)
    x = np.where(fin, t - tm[:, None], 0.0)
    pz = np.where(fin, p, 0.0)
    sz = np.where(keep, sig, 1.0)
    inv_s2 = 1.0 / sz**2
    alive = np.ones(m, bool)
    ok = np.ones(m, bool)
    beta = np.full((m, 2), np.nan)
    cov = np.full((m, 2, 2), np.nan)
    res_keep = keep.copy()
    for _ in range(6):
        cnt = keep.sum(1)
        small = alive & (cnt < 4)
        ok &= ~small
        alive &= ~small
        if not alive.any():
            break
        w = np.where(keep, inv_s2, 0.0)
        S0, S1, S2 = w.sum(1), (w * x).sum(1), (w * x * x).sum(1)
        B0, B1 = (w * pz).sum(1), (w * x * pz).sum(1)
        with np.errstate(all="ignore"):
            det = S0 * S2 - S1 * S1
            c00, c01, c11 = S2 / det, -S1 / det, S0 / det
            b0 = c00 * B0 + c01 * B1
            b1 = c01 * B0 + c11 * B1
            r = (pz - b0[:, None] - b1[:, None] * x) / sz
        med = _row_median(r, keep)
        mad = _row_median(np.abs(r - med[:, None]), keep)
        scale = np.maximum(1.4826 * mad, 1.0)
        with np.errstate(invalid="ignore"):
            new = keep & (np.abs(r) <= n_clip * scale[:, None]) & fin
        beta[alive] = np.stack([b0, b1], 1)[alive]
        cov[alive] = np.stack([np.stack([c00, c01], 1), np.stack([c01, c11], 1)], 1)[alive]
        res_keep[alive] = new[alive]
        same = (new == keep).all(1)
        alive &= ~same
        keep = np.where(alive[:, None], new, keep)
    cnt = res_keep.sum(1)
    ok &= cnt >= 4
    w = np.where(res_keep, inv_s2, 0.0)
    with np.errstate(all="ignore"):
        r = pz - beta[:, :1] - beta[:, 1:] * x
        chi2r = (w * r * r).sum(1) / np.maximum(cnt - 2, 1)
    cov = cov * np.maximum(chi2r, 1.0)[:, None, None]
    return beta, cov, res_keep, tm, ok


def _bend_chi2s(t: np.ndarray, p: np.ndarray, sig: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """Drop of χ² when quadratic and cubic terms join a straight-line fit (2 dof), per row.

    ``t`` is centred; rows with fewer than 8 kept points give NaN.
    """
    m = t.shape[0]
    out = np.full(m, np.nan)
    cnt = keep.sum(1)
    rows = np.nonzero(cnt >= 8)[0]
    if rows.size == 0:
        return out
    t, p, sig, keep = t[rows], p[rows], sig[rows], keep[rows]
    span = np.where(keep, t, -np.inf).max(1) - np.where(keep, t, np.inf).min(1)
    x = np.where(keep, t, 0.0) / np.maximum(span, 1e-300)[:, None]
    w = np.where(keep, 1.0 / np.where(keep, sig, 1.0) ** 2, 0.0)
    pz = np.where(keep, p, 0.0)

    def chi2(deg: int) -> np.ndarray:
        X = np.stack([x**k for k in range(deg + 1)], 1)  # (r, deg+1, q)
        XW = X * w[:, None, :]
        A = XW @ X.transpose(0, 2, 1)
        b = (XW @ pz[:, :, None])[..., 0]
        try:
            beta = np.linalg.solve(A, b[..., None])[..., 0]
        except np.linalg.LinAlgError:
            beta = np.stack([np.linalg.lstsq(A[i], b[i], rcond=None)[0] for i in range(A.shape[0])])
        r = pz - (beta[:, :, None] * X).sum(1)
        return (w * r * r).sum(1)

    out[rows] = np.maximum(chi2(1) - chi2(3), 0.0)
    return out


def refine_segment(
    seg: PixelSegment,
    values: np.ndarray,
    axes: MapAxes,
    *,
    family: str,
    along_x: bool,
    halfwidth_px: int = 6,
    max_points: int = 80,
    shapes: tuple[str, ...] = ("step", "peak"),
) -> RefinedLine:
    """Refine one segment by fitting Fermi step (or peak) profiles across it.

    Parameters
    ----------
    seg : PixelSegment
    values : ndarray, shape (ny, nx)
        Map values (row offsets removed; NaN allowed).
    axes : MapAxes
    family : str
        Family name written into the result.
    along_x : bool
        Profiles along x (one per row; dot1 and other steep lines) or along y
        (one per column; dot2 and other shallow lines).
    halfwidth_px : int
        Half-length of each profile, pixels.
    max_points : int
        Most profiles per line (evenly spaced).
    shapes : tuple of {"step", "peak"}
        Line shapes tried; the one with the lower median residual wins.

    Returns
    -------
    RefinedLine
        ``refined`` False (and the Hough/TLS line kept) when fewer than four
        profiles gave a significant step.

    Notes
    -----
    Each profile is fitted with ``a + b u + h [1 − f(u)]``, ``f`` the Fermi
    occupation with width ``w`` (or the peak ``4 f (1 − f)``); the crossing
    points ``u0`` are then fitted by a straight line (position along the
    profile axis as a function of the other coordinate, so steep lines are
    fitted as x(y)) with iterative 3.5-σ clipping; standard errors are scaled
    by √χ²_red when it exceeds one.
    """
    return refine_segments([seg], values, axes, families=[family], along_x=[along_x],
                           halfwidth_px=halfwidth_px, max_points=max_points, shapes=shapes)[0]



def refine_segments(
    segs: Sequence[PixelSegment],
    values: np.ndarray,
    axes: MapAxes,
    *,
    families: Sequence[str],
    along_x: Sequence[bool],
    halfwidth_px: int = 6,
    max_points: int = 80,
    shapes: tuple[str, ...] = ("step", "peak"),
    edges: np.ndarray | None = None,
    end_trim: float = 0.0,
    widen: int = 2,
) -> list[RefinedLine]:
    """:func:`refine_segment` for many segments, with all profiles fitted in one batch.

    ``edges`` (the edge map, optional) lets each profile stop short of a
    neighbouring line. Segments whose profiles do not give a line are fitted
    again with profiles ``widen`` times longer (up to two more passes): a
    thermally broadened step (Fermi width ≳ 1 px, i.e. a 10–90 % rise over
    ≳ 4 px) cannot be told from the linear baseline ``a + b u`` inside a short
    window, so its height, and with it the significance test, is lost. The
    longer window still stops at a neighbouring line's edge. Only segments
    that fail at the fine window are refitted (coarse-to-fine fallback,
    common practice, no source), so sharp lines keep their first-pass
    result unchanged; the refits use the step shape only, because the peak
    shape fitted to a broad step gives crossings on its flanks and lines of
    the wrong slope sign.
    """
    hw = int(halfwidth_px)
    # vertices from all segments at once (a refit of a few segments still sees all the others)
    bounds = _vertex_bounds(segs, families, along_x) if VERTEX_BOUNDS else None
    out = _refine_once(segs, values, axes, families=families, along_x=along_x, halfwidth_px=hw,
                       max_points=max_points, shapes=shapes, edges=edges, end_trim=end_trim, bounds=bounds)
    n = len(segs)
    head, extra = out[:n], out[n:]
    can = np.ones(n, bool)
    if widen > 1 and not all(r.refined for r in head):
        # a segment with fewer profile rows than a line needs fails at any window length (its
        # rows do not depend on it); a pass that could only refit such segments is left out
        # (they still take part in a pass with others: their lines cut the others' profiles)
        _, _, _, _, r0, r1, use = _row_ranges(segs, along_x, values.shape, _end_trims(segs, end_trim), bounds)
        can = use & (np.minimum(r1 - r0 + 1, max_points) >= MIN_LINE_PROFILES)
    for _ in range(2 if widen > 1 else 0):
        redo = [k for k in range(n) if not head[k].refined]
        if not redo or not can[redo].any():
            break
        hw *= int(widen)
        again = _refine_once([segs[k] for k in redo], values, axes, families=[families[k] for k in redo],
                             along_x=[along_x[k] for k in redo], halfwidth_px=hw, max_points=max_points,
                             shapes=("step",), edges=edges, end_trim=end_trim,
                             bounds=None if bounds is None else bounds[redo])
        for j, k in enumerate(redo):
            head[k] = again[j]
        extra = extra + again[len(redo):]
    return head + extra


#: fewest usable profiles (rows with the line's centre samples on the map) a segment is fitted with
MIN_LINE_PROFILES = 4
#: A line's crossings are read as quantised when at least this share of them lies within
#: :data:`QUANTISED_BAND` of the midpoint between two samples (a fifth of them would by chance):
#: a step sharper than a sample, sampled at points, is located only to within the pixel, and its
#: crossing falls midway between the two samples around it whatever its true position.
QUANTISED_SHARE = 0.5
#: Half-width of the band around the midpoint between two samples, samples.
QUANTISED_BAND = 0.1
#: A line of quantised crossings that moves on by fewer than this many samples along its length
#: fixes its slope only to about ±1 sample over that length: its slope error is floored at the rms
#: of that range, 1/(length·√3) samples per unit length. With more, the sample steps are many and
#: spread along the line, and the digital straight line fixes the slope well (A. Rosenfeld, IEEE
#: Trans. Comput. C-23, 1264 (1974), doi:10.1109/T-C.1974.223845). Also used by the fitter's
#: re-measurement (``stabtool.fit.relocate``).
QUANTISED_MAX_STEPS = 2.0


def pixel_slope_error(run: np.ndarray | float, step: float) -> np.ndarray | float:
    """Slope error of a line of quantised crossings that moves on by under a sample along ``run``.

    Such a line bounds its slope (across per along) to ``±step/run``: the rms
    of that uniform range, ``|step|/(run·√3)`` (``run`` along the line and
    ``step`` across it, in the same units as the slope's).
    """
    return np.abs(step) / (np.asarray(run, float) * np.sqrt(3.0))


def midway(idx: np.ndarray) -> np.ndarray:
    """True where a crossing (fractional sample index) lies within :data:`QUANTISED_BAND` of a midpoint."""
    idx = np.asarray(idx, float)
    with np.errstate(invalid="ignore"):
        return np.abs(idx - np.floor(idx) - 0.5) < QUANTISED_BAND


def _end_trims(segs, end_trim: float) -> list[float]:
    """Rows (px) left out at each end of every segment: ``max(2, end_trim · length)``."""
    return [max(2.0, end_trim * s.length_px) for s in segs]


def _refine_once(segs, values, axes, *, families, along_x, halfwidth_px, max_points, shapes, edges, end_trim,
                 bounds=None):
    hw = int(halfwidth_px)
    # the segments that give no line keep their Hough/TLS line (made at the end, for those only)
    out: list[RefinedLine | None] = [None] * len(segs)
    extra: list[RefinedLine] = []
    trims = _end_trims(segs, end_trim)
    ext = _all_profiles(values, segs, along_x, hw, max_points, trims, edges, bounds)
    if ext is None:
        return _with_unrefined(out, segs, axes, families, along_x)
    seg_id, rows, centre, U, Y, M = ext
    okrows = (M.sum(1) >= hw + 2) & M[:, hw - 1 : hw + 2].all(1)
    enough = np.bincount(seg_id[okrows], minlength=len(segs)) >= MIN_LINE_PROFILES
    sel = okrows & enough[seg_id]
    if not sel.any():
        return _with_unrefined(out, segs, axes, families, along_x)
    seg_id, rows, centre, U, Y, M = seg_id[sel], rows[sel], centre[sel], U[sel], Y[sel], M[sel]
    # one block of consecutive profiles per segment
    blk_seg, starts = np.unique(seg_id, return_index=True)
    nb = blk_seg.size
    blk = np.searchsorted(blk_seg, seg_id)
    pos = np.arange(seg_id.size) - starts[blk]
    width_max = int(pos.max()) + 1
    n_prof = np.bincount(blk, minlength=nb)
    fits = {shapes[0]: fit_profiles(U, Y, M, kind=shapes[0], halfwidth=hw)}
    if shapes[0] == "step":
        fits["step"] = _interpolated_crossings(fits["step"], U, Y, M, hw)
    if len(shapes) > 1:
        # other shapes only for lines the first one fits poorly (fewer than 70 % usable profiles)
        poor = (np.bincount(blk, weights=fits[shapes[0]].ok, minlength=nb) / n_prof < 0.7)[blk]
        for kind in shapes[1:]:
            if poor.any():
                sub = fit_profiles(U[poor], Y[poor], M[poor], kind=kind, halfwidth=hw)
                full = {f: np.full(U.shape[0], np.nan) for f in ("u0", "u0_err", "width", "width_err", "height", "height_err")}
                ssr = np.full(U.shape[0], np.inf)
                ok = np.zeros(U.shape[0], bool)
                for f, arr in full.items():
                    arr[poor] = getattr(sub, f)
                ssr[poor] = sub.ssr
                ok[poor] = sub.ok
                fits[kind] = BatchFit(ssr=ssr, ok=ok, **full)

    def pad(v, fill):
        a = np.full((nb, width_max), fill, dtype=np.asarray(v).dtype)
        a[blk, pos] = v
        return a

    # per block: the shape with (many more) usable profiles or, with about as many, the lower median residual
    kinds = list(fits)
    best_k = np.zeros(nb, int)
    best_s = np.full(nb, np.inf)
    best_n = np.zeros(nb)
    for i, kind in enumerate(kinds):
        f = fits[kind]
        nok = np.bincount(blk, weights=f.ok, minlength=nb)
        score = np.where(nok >= 4, _row_median(pad(f.ssr, np.inf), pad(f.ok, False)), np.inf)
        better = ((nok >= 0.8 * best_n) & (score < best_s)) | (nok > 1.25 * best_n) if i else np.ones(nb, bool)
        best_k = np.where(better, i, best_k)
        best_s = np.where(better, score, best_s)
        best_n = np.where(better, nok, best_n)
    kp = best_k[blk]

    def chosen(field):
        vals = [getattr(fits[k], field) for k in kinds]
        if field == "interpolated":
            vals = [v if v is not None else np.zeros(U.shape[0], bool) for v in vals]
        return np.choose(kp, vals) if len(vals) > 1 else vals[0]

    ok, u0, u0e = chosen("ok"), chosen("u0"), chosen("u0_err")
    width, height, interp = chosen("width"), chosen("height"), chosen("interpolated")
    # crossing points in volts (see _line_from_crossings in the Notes of refine_segment)
    alx = np.asarray(along_x, bool)[seg_id]
    sx_, sy_ = steps(axes)
    pstep = np.where(alx, sx_, sy_)
    # an unresolved step lies somewhere between the two samples around it; the
    # midpoint makes the crossings a digital straight line, whose slope is
    # fixed far better than by noise-jittered centres (A. Rosenfeld, IEEE
    # Trans. Comput. C-23, 1264 (1974), doi:10.1109/T-C.1974.223845)
    with np.errstate(invalid="ignore"):
        sharp = (width < 0.7) & ~interp
        u0 = np.where(sharp, np.floor(u0) + 0.5, u0)
    cu = centre + u0
    rf = rows.astype(float)
    p_v = np.where(alx, idx_to_volts(cu, axes.x), idx_to_volts(cu, axes.y))
    t_v = np.where(alx, idx_to_volts(rf, axes.y), idx_to_volts(rf, axes.x))
    # an unresolved step (w below ~0.7 px) fixes its crossing only to within the
    # pixel: floor the error at the quantisation rms 1/√12 px (common practice, no source)
    floor = np.where(sharp, 1.0 / np.sqrt(12.0), np.where(interp, 0.1, 0.05))
    sig_v = np.maximum(u0e, floor) * np.abs(pstep)
    ok = ok & np.isfinite(u0)
    if MIN_SIDE_PX > 0:
        # profiles that the map's border (or missing data) cuts short of a plateau are dropped;
        # reach from the segment's median fitted width (a single profile's is noisy at low SNR)
        w_seg = _row_median(pad(width, np.nan), pad(ok & np.isfinite(width), False))[blk]
        n_pos = np.where(alx, values.shape[1], values.shape[0])[:, None]
        at = centre[:, None] + U
        avail = (at >= 0) & (at < n_pos) & np.isfinite(Y)
        ok &= _plateaus_on_both_sides(U, avail, u0, w_seg)
    T, P, S, V = pad(t_v, np.nan), pad(p_v, np.nan), pad(sig_v, np.nan), pad(ok, False)
    nok = V.sum(1)
    beta, cov, keep, tm, fit_ok = _robust_line_fits(T, P, S, V)
    # (a sharp step's crossing, by the Fermi fit or by interpolating a step without smearing, falls
    # midway between two samples)
    midway_share = (pad(midway(cu), False) & keep).sum(1) / np.maximum(keep.sum(1), 1)
    fit_ok &= nok >= 4
    bend = _bend_chi2s(T - tm[:, None], P, S, keep & fit_ok[:, None])
    Wpx, H = pad(width, np.nan), pad(height, np.nan)
    w_med = _row_median(Wpx, keep)
    w_mad = 1.4826 * _row_median(np.abs(Wpx - w_med[:, None]), keep)
    h_abs = _row_median(np.abs(H), keep)
    h_med = _row_median(H, keep)
    t_lo = np.where(keep, T, np.inf).min(1)
    t_hi = np.where(keep, T, -np.inf).max(1)
    n_keep = keep.sum(1)
    for j in np.nonzero(fit_ok)[0]:
        k = int(blk_seg[j])
        kind = kinds[best_k[j]]
        A, C = float(beta[j, 0]), float(beta[j, 1])
        sA, sC = float(np.sqrt(cov[j, 0, 0])), float(np.sqrt(cov[j, 1, 1]))
        along = bool(along_x[k])
        step_p = sx_ if along else sy_
        run = float(t_hi[j] - t_lo[j])
        if midway_share[j] >= QUANTISED_SHARE and run > 0 and abs(C) * run < QUANTISED_MAX_STEPS * abs(step_p):
            # quantised crossings within a sample or two: independent points understate the error
            sC = float(np.fmax(sC, pixel_slope_error(run, step_p)))
        if along:
            slope = 1.0 / C if C != 0 else np.inf
            slope_err = sC / C**2 if C != 0 else np.inf
            x0, y0 = A, float(tm[j])
            start = (A + C * (t_lo[j] - tm[j]), t_lo[j])
            end = (A + C * (t_hi[j] - tm[j]), t_hi[j])
        else:
            slope, slope_err = C, sC
            x0, y0 = float(tm[j]), A
            start = (t_lo[j], A + C * (t_lo[j] - tm[j]))
            end = (t_hi[j], A + C * (t_hi[j] - tm[j]))
        pos_err = sA / np.sqrt(1.0 + C**2)
        if kind == "step" and w_med[j] >= 0.5:
            wv = float(w_med[j]) * abs(step_p)
            wv_err = 1.2533 * max(float(w_mad[j]), 1e-12) / np.sqrt(n_keep[j]) * abs(step_p)
        else:
            wv, wv_err = float("nan"), float("nan")
        sign = int(np.sign(h_med[j]) * np.sign(step_p)) if kind == "step" else 0
        line = TransitionLine(family=families[k], x0=float(x0), y0=float(y0), slope=float(slope),
                              slope_stderr=float(slope_err), position_stderr=float(pos_err),
                              start=(float(start[0]), float(start[1])), end=(float(end[0]), float(end[1])),
                              width_V=float(wv), width_stderr_V=float(wv_err), n_points=int(n_keep[j]),
                              step_sign=sign, refined=True, bend_chi2=float(bend[j]))
        kj = keep[j]
        out[k] = RefinedLine(line=line, step_height=float(h_abs[j]), refined=True, shape=kind,
                             points=(T[j][kj], P[j][kj], S[j][kj]), along_x=along)
    return _with_unrefined(out, segs, axes, families, along_x) + extra


def _with_unrefined(out, segs, axes, families, along_x) -> list[RefinedLine]:
    """``out`` with every missing entry (None) set to its segment's Hough/TLS line, not refined."""
    miss = [k for k, r in enumerate(out) if r is None]
    if miss:
        lines = _segments_to_lines([segs[k] for k in miss], axes, [families[k] for k in miss])
        for k, ln in zip(miss, lines):
            out[k] = RefinedLine(line=ln, step_height=float("nan"), refined=False, shape="none",
                                 along_x=bool(along_x[k]))
    return out


#: a profile must have samples on the map (not cut off by its border or by missing data) up to
#: ``max(MIN_SIDE_PX, MIN_SIDE_WIDTHS·w)`` beyond its fitted crossing on both sides
MIN_SIDE_PX = 3.0
MIN_SIDE_WIDTHS = 4.0


def _plateaus_on_both_sides(U: np.ndarray, avail: np.ndarray, u0: np.ndarray, width: np.ndarray) -> np.ndarray:
    """Profiles whose available samples run ``max(MIN_SIDE_PX, MIN_SIDE_WIDTHS·w)`` past ``u0`` on both sides.

    ``U`` (m, k) sample offsets, ``avail`` (m, k) samples on the map with a
    finite value, ``u0`` (m,) fitted crossings, ``width`` (m,) Fermi widths
    (px; NaN counts as 0). A side's run ends at its first unavailable sample;
    a side without one passes (the window length is the caller's choice).

    Why: a line that runs within a few pixels of the map's border (or of a
    block of missing rows) has one plateau of its step cut off. The fit then
    extrapolates that level with the baseline slope taken from the other
    side, and any curvature of the sensor background moves the crossing: on
    a 112² si-sige map with 3 px broad lines, the dot2 line 1–6 rows above
    the bottom edge came out 0.3–0.7 px above its true half-occupation
    crossing where fewer than 3 rows lay below it (≈ 0.1 px elsewhere), a
    tilt that read as bending towards the triple points. A Fermi step is
    within 2 % of its plateau 4 widths from its centre (``1/(1 + e⁴)``).
    Cuts at neighbouring lines (:func:`_all_profiles`) are not counted
    here: near a vertex they are needed, and the family fits leave those
    points out anyway.
    """
    w = np.where(np.isfinite(width), width, 0.0)
    reach = np.maximum(MIN_SIDE_PX, MIN_SIDE_WIDTHS * w)
    with np.errstate(invalid="ignore"):
        d = U - u0[:, None]
        # distance to the first unavailable sample on each side (inf: none inside the window);
        # the last available sample lies 1 px closer
        lo_bad = np.where(~avail & (d < 0), -d, np.inf).min(1)
        hi_bad = np.where(~avail & (d > 0), d, np.inf).min(1)
        # a side that the border does not cut at all passes (the window's own length is the caller's choice)
        lo_ok = ~np.isfinite(lo_bad) | (lo_bad - 1.0 >= reach)
        hi_ok = ~np.isfinite(hi_bad) | (hi_bad - 1.0 >= reach)
        return lo_ok & hi_ok


def _interpolated_crossings(fit: BatchFit, U: np.ndarray, Y: np.ndarray, M: np.ndarray, hw: int) -> BatchFit:
    """Sub-pixel crossings of unresolved steps from the half-height level between two samples.

    For a step narrower than a sample (fitted w < 0.7 px) the Fermi fit
    fixes u0 only to the interval between the two samples around it. The
    sample values carry more: after removing the fitted baseline and
    dividing by the height, the normalised signal F goes from 0 to 1, and
    any smearing (sensor bandwidth, thermal width, filtering) leaves
    intermediate values next to the step; the crossing of F = ½ by linear
    interpolation between the two bracketing samples is then sub-pixel. For
    a perfectly sharp step it falls back to the midpoint. Errors: the noise
    of the two samples propagated through the interpolation, at least
    0.1 px (common practice for sub-pixel edge location, no source).
    """
    if fit.a is None:
        return fit
    n = U.shape[0]
    sharp = fit.width < 0.7
    k = np.floor(fit.u0).astype(int)
    j0 = np.clip(k + hw, 0, U.shape[1] - 2)
    rows = np.arange(n)
    h = np.where(np.abs(fit.height) > 0, fit.height, np.nan)
    F0 = (Y[rows, j0] - fit.a - fit.b * U[rows, j0]) / h
    F1 = (Y[rows, j0 + 1] - fit.a - fit.b * U[rows, j0 + 1]) / h
    den = F1 - F0
    # noise of one sample in units of the height, from the profile residuals
    dof = np.maximum(M.sum(1) - 5, 1)
    with np.errstate(invalid="ignore", divide="ignore"):  # (a failed profile: NaN, and its row is not `good`)
        sn = np.sqrt(fit.ssr / dof) / np.abs(h)
    # at low SNR the interpolation is noisier than the pixel quantisation (1/√12 px): midpoint kept
    good = sharp & M[rows, j0] & M[rows, j0 + 1] & np.isfinite(den) & (den > 0.3) & (sn < 0.2)
    frac = np.clip((0.5 - F0) / np.where(good, den, 1.0), 0.0, 1.0)
    u_new = np.where(good, U[rows, j0] + frac, fit.u0)
    e_new = np.where(good, np.maximum(sn * np.sqrt((1 - frac) ** 2 + frac**2) / np.where(good, den, 1.0), 0.1),
                     fit.u0_err)
    return replace(fit, u0=u_new, u0_err=e_new, interpolated=good)
