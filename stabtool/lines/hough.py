"""Hough transform of an edge map: straight segments with end points."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from skimage.transform import hough_line

from ..errors import InputError
from ..mapdata import MapAxes
from ._geometry import idx_to_volts, steps, tls_fit
from .edges import EdgeMap
from .result import TransitionLine

__all__ = ["PixelSegment", "find_segments", "segment_to_line"]


@dataclass(frozen=True)
class PixelSegment:
    """A straight run of edge pixels in the isotropic pixel frame.

    Attributes
    ----------
    cx, cy : float
        Centre (column, row), fractional pixels.
    ux, uy : float
        Unit direction (column, row), ``ux >= 0``.
    t0, t1 : float
        Extent along the direction from the centre, pixels (t0 < 0 < t1).
    n_pixels : int
        Edge pixels supporting the segment.
    rms_px : float
        Perpendicular rms scatter of those pixels, pixels.
    """

    cx: float
    cy: float
    ux: float
    uy: float
    t0: float
    t1: float
    n_pixels: int
    rms_px: float

    @property
    def length_px(self) -> float:
        return self.t1 - self.t0

    @property
    def start_px(self) -> tuple[float, float]:
        return (self.cx + self.t0 * self.ux, self.cy + self.t0 * self.uy)

    @property
    def end_px(self) -> tuple[float, float]:
        return (self.cx + self.t1 * self.ux, self.cy + self.t1 * self.uy)

    def angle_stderr(self) -> float:
        """Standard error of the direction angle, radians (uniform pixels along the run)."""
        n = max(self.n_pixels, 3)
        spread = self.length_px / np.sqrt(12.0)
        sig = max(self.rms_px, 0.29)  # at least the pixel quantisation, 1/√12
        return float(sig / (np.sqrt(n) * max(spread, 1e-9)))


def _principal_axis(a: float, b: float, c: float) -> tuple[float, float, float] | None:
    """Unit major axis ``(ux, uy)`` (ux ≥ 0) and minor eigenvalue of the 2×2 covariance ``[[a, b], [b, c]]``.

    Closed form of the symmetric 2×2 eigenproblem; None when the axis is undefined
    (all points coincide).
    """
    half = 0.5 * (a - c)
    root = math.hypot(half, b)
    lam_max = 0.5 * (a + c) + root
    lam_min = 0.5 * (a + c) - root
    ux, uy = (lam_max - c, b) if a >= c else (b, lam_max - a)
    norm = math.hypot(ux, uy)
    if not norm > 0:
        return None
    ux, uy = ux / norm, uy / norm
    if ux < 0 or (ux == 0 and uy < 0):
        ux, uy = -ux, -uy
    return ux, uy, lam_min


def _tls(px: np.ndarray, py: np.ndarray):
    """Total-least-squares line through points: centre, unit direction, perpendicular rms.

    :func:`stabtool.lines._geometry.tls_fit` (unweighted) with the 2×2
    eigenproblem solved in closed form (it runs once or twice per segment).
    """
    n = px.size
    cx, cy = px.sum() / n, py.sum() / n
    dx, dy = px - cx, py - cy
    a, b, c = float((dx * dx).sum()) / n, float((dx * dy).sum()) / n, float((dy * dy).sum()) / n
    axis = _principal_axis(a, b, c)
    if axis is None:
        return tls_fit(px, py)
    ux, uy, lam_min = axis
    return cx, cy, np.array([ux, uy]), math.sqrt(max(lam_min, 0.0))


def _max5_axis(a: np.ndarray, axis: int) -> np.ndarray:
    """Centred 5-wide moving maximum of a non-negative 2-D array along one axis, zero outside."""

    def sl(lo, hi):  # slice lo:hi along ``axis``
        return (slice(lo, hi), slice(None)) if axis == 0 else (slice(None), slice(lo, hi))

    m = a.copy()
    np.maximum(m[sl(1, None)], a[sl(None, -1)], out=m[sl(1, None)])  # window [i-1, i]
    np.maximum(m[sl(None, -1)], a[sl(1, None)], out=m[sl(None, -1)])  # [i-1, i+1]
    m2 = m.copy()
    np.maximum(m2[sl(2, None)], a[sl(None, -2)], out=m2[sl(2, None)])
    np.maximum(m2[sl(None, -2)], a[sl(2, None)], out=m2[sl(None, -2)])  # [i-2, i+2]
    return m2


def _max_filter5(a: np.ndarray) -> np.ndarray:
    """5×5 moving maximum of a non-negative 2-D array, zero outside it.

    The same as ``scipy.ndimage.maximum_filter(a, size=(5, 5), mode="constant")``
    for ``a >= 0``, as two separable passes of shifted maxima.
    """
    return _max5_axis(_max5_axis(a, 0), 1)


def _nonzero_2d(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``np.nonzero`` of a 2-D boolean array (row and column indices, row-major order).

    From the flat indices (several times faster than ``np.nonzero`` on a 2-D array).
    """
    return np.divmod(np.flatnonzero(mask), mask.shape[1])


def _hough_peaks(h: np.ndarray, angles: np.ndarray, dists: np.ndarray, min_votes: int, max_peaks: int):
    """Local maxima of the accumulator (5 distance × 5 angle bins, angle wrapping), strongest first.

    The vote counts are narrowed to the smallest unsigned type that holds
    them (the filter passes are memory-bound).
    """
    hmax = int(h.max()) if h.size else 0
    h = h.astype(np.uint8 if hmax < 2**8 else np.uint16 if hmax < 2**16 else np.int64)
    m0 = _max5_axis(h, 0)  # the ρ pass commutes with the ρ → −ρ flip of the wrap
    mp = np.concatenate([m0[::-1, -2:], m0, m0[::-1, :2]], axis=1)  # θ = ±90° wrap with ρ → −ρ
    mx = _max5_axis(mp, 1)[:, 2:-2]
    cand = _nonzero_2d((h >= mx) & (h >= min_votes))
    votes = h[cand].astype(np.int64)
    order = np.argsort(-votes, kind="stable")[: 2 * max_peaks]
    return angles[cand[1][order]], dists[cand[0][order]]


#: Hough peaks examined in the first chunk (they claim most edge pixels); the rest form one more
FIRST_CHUNK = 64
#: (line, pixel) pairs up to which :func:`_band_members` computes the full distance matrix
DENSE_MAX_PAIRS = 2**16


def _band_members(px: np.ndarray, py: np.ndarray, key: np.ndarray, width: int, ca: np.ndarray, sa: np.ndarray,
                  dist: np.ndarray, reach: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Pixels within ``reach`` of each line ``x cos θ + y sin θ = ρ``, grouped by line.

    ``px, py`` (m,) are pixel columns and rows in row-major order, ``key``
    their ``row·width + column`` (ascending); ``ca, sa, dist`` (L,) the
    lines' ``cos θ``, ``sin θ`` and ρ. Returns ``(line, pixel, distance)``:
    line index (ascending), pixel index into ``px`` (ascending within a
    line) and ``|x cos θ + y sin θ − ρ|``, for every pair within ``reach``.

    The same pairs, in the same order and with the same distances, as
    thresholding the full (L, m) distance matrix, but only the pixels of
    each line's band are looked at: per line, the rows the band crosses
    (those holding pixels), and in each row the column interval of the band
    (1 px of slack on every side), whose pixels are found from a table of
    the number of pixels below every key; the distance is then computed
    exactly for these candidates. With few pixels (at most
    ``DENSE_MAX_PAIRS`` line–pixel pairs) the full matrix is cheaper.
    """
    n_lines = ca.size
    empty = np.zeros(0, np.int64)
    if px.size == 0 or n_lines == 0:
        return empty, empty, np.zeros(0)
    if n_lines * px.size <= DENSE_MAX_PAIRS:
        # few pixels left: the full distance matrix costs less than the search
        dd = np.multiply.outer(ca, px)
        dd += np.multiply.outer(sa, py)
        dd -= dist[:, None]
        np.abs(dd, out=dd)
        line, pix = _nonzero_2d(dd <= reach)
        return line, pix, dd[line, pix]
    rows_u = py[np.r_[True, py[1:] != py[:-1]]]  # rows holding pixels (ascending; py is)
    x_lo, x_hi = px.min(), px.max()
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        # rows of each band inside the pixels' column range (the band is a strip of half-width reach)
        ss = np.where(sa == 0, 1e-300, sa)
        ya = (dist - ca * x_lo) / ss
        yb = (dist - ca * x_hi) / ss
        slack = reach / np.abs(ss)
        y0 = np.minimum(ya, yb) - slack - 1.0
        y1 = np.maximum(ya, yb) + slack + 1.0
    y0 = np.where(np.isfinite(y0), y0, -np.inf)
    y1 = np.where(np.isfinite(y1), y1, np.inf)
    i0 = np.searchsorted(rows_u, y0, side="left")
    i1 = np.searchsorted(rows_u, y1, side="right")
    cnt = np.maximum(i1 - i0, 0)
    line = np.repeat(np.arange(n_lines), cnt)
    row = rows_u[np.repeat(i0, cnt) + (np.arange(line.size) - np.repeat(np.cumsum(cnt) - cnt, cnt))]
    c, s_, d = ca[line], sa[line], dist[line]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        cc = np.where(c == 0, 1e-300, c)
        xa = (d - s_ * row - reach) / cc
        xb = (d - s_ * row + reach) / cc
        # (kept inside the row, so that a range never reaches into the next or previous row)
        xl = np.maximum(np.floor(np.clip(np.minimum(xa, xb), x_lo - 1.0, x_hi + 1.0)) - 1.0, 0.0)
        xh = np.minimum(np.ceil(np.clip(np.maximum(xa, xb), x_lo - 1.0, x_hi + 1.0)) + 1.0, width - 1.0)
    base = row.astype(np.int64) * width
    # the pixels of each interval from a table of pixel counts below every key (two
    # look-ups instead of two binary searches)
    below = np.zeros(int(key[-1]) + 2 if key.size else 1, np.int64)
    below[key + 1] = 1
    np.cumsum(below, out=below)
    lo_key = np.minimum(base + xl.astype(np.int64), below.size - 1)
    hi_key = np.minimum(base + xh.astype(np.int64) + 1, below.size - 1)
    a, b = below[lo_key], below[hi_key]
    n = np.maximum(b - a, 0)
    cand_line = np.repeat(line, n)
    cand = np.repeat(a, n) + (np.arange(cand_line.size) - np.repeat(np.cumsum(n) - n, n))
    dd = ca[cand_line] * px[cand] + sa[cand_line] * py[cand]
    dd -= dist[cand_line]
    np.abs(dd, out=dd)
    inside = dd <= reach
    return cand_line[inside], cand[inside], dd[inside]


def _viable_peaks(xy, jj, ff, ca, sa, *, min_votes, max_gap_px, min_length_px) -> np.ndarray:
    """Peaks (boolean, per line) with a long enough run among their pixels ``ff`` (grouped by ``jj``).

    Peaks without such a run among the pixels free now never get one (claims
    only split and shorten runs); a hair of slack makes sure that rounding
    never drops a peak.
    """
    viable = np.bincount(jj, minlength=ca.size) >= min_votes
    if jj.size:
        tq = -xy[0][ff] * sa[jj] + xy[1][ff] * ca[jj]
        o = np.lexsort((tq, jj))
        jj, tq = jj[o], tq[o]
        cut = np.nonzero((np.diff(jj) != 0) | (np.diff(tq) > max_gap_px + 1e-9))[0] + 1
        rs, re = np.r_[0, cut], np.r_[cut, jj.size]
        long_run = (re - rs >= min_votes) & (tq[re - 1] - tq[rs] >= min_length_px - 2 - 1e-9)
        has_run = np.zeros(ca.size, dtype=bool)
        has_run[jj[rs[long_run]]] = True
        viable &= has_run
    return viable


def _peak_runs(xy, lfree, nloc, rloc, c, s, *, min_votes, max_gap_px, min_length_px, tolerance_px):
    """The straight runs of one Hough peak, as they are claimed (a generator).

    ``xy`` (2, m) free pixels, ``lfree`` (m,) those still free (updated by
    the caller between runs), ``nloc`` the peak's pixels within the
    tolerance and ``rloc`` those within reach (positions into ``xy``).
    Yields ``(pixels, cx, cy, ux, uy, t_lo, t_hi, rms)`` per run: its
    pixel positions, TLS centre and direction, extent and scatter.
    """
    # free pixels within reach of this peak's runs once refitted: the
    # refitted line stays within the tolerance band of the Hough line
    # along the run, so 3 tolerances + 2 px hold every pixel it can
    # collect (the re-collection below scans these, not all pixels)
    rxy = np.take(xy, rloc, axis=1)
    t = xy[1][nloc] * c - xy[0][nloc] * s
    order = np.argsort(t)
    ts = t[order]
    br = np.nonzero(np.diff(ts) > max_gap_px)[0] + 1
    starts = np.concatenate([[0], br])
    ends = np.concatenate([br, [ts.size]])
    # only runs long enough in pixels and in extent are examined
    good = (ends - starts >= min_votes) & (ts[ends - 1] - ts[starts] >= min_length_px - 2)
    for st, en in zip(starts[good].tolist(), ends[good].tolist()):
        # (in ascending order, as the re-collection below returns them: when it
        # collects the same pixels, which it mostly does, the refit would repeat
        # the same sums and is skipped)
        sel = np.sort(nloc[order[st:en]])
        cen, ux, uy, rms, d = _tls_xy(np.take(xy, sel, axis=1))
        # one re-collection around the refined line, inside the run's span
        ts_ = d[0] * ux + d[1] * uy
        t_lo, t_hi = ts_.min(), ts_.max()
        e = rxy - cen[:, None]
        tt = e[0] * ux + e[1] * uy
        dd = e[1] * ux - e[0] * uy
        m2 = lfree[rloc] & (tt >= t_lo - 1) & (tt <= t_hi + 1) & (np.abs(dd) <= tolerance_px)
        sel2 = rloc[m2]  # (ascending: rloc is)
        if sel2.size > sel.size or (sel2.size == sel.size and not np.array_equal(sel2, sel)):
            sel = sel2
            cen, ux, uy, rms, d = _tls_xy(np.take(xy, sel, axis=1))
            tt = d[0] * ux + d[1] * uy
            t_lo, t_hi = tt.min(), tt.max()
        if t_hi - t_lo < min_length_px - 1:
            continue
        yield sel, cen[0], cen[1], ux, uy, t_lo, t_hi, rms


def _tls_xy(xy: np.ndarray):
    """:func:`_tls` of the points ``xy`` (2, n), C-contiguous: ``(centre (2,), ux, uy, rms, xy − centre)``.

    The same sums (row by row, pairwise) and closed form as :func:`_tls`,
    with fewer array operations; the centred points are returned for the
    projections that follow.
    """
    n = xy.shape[1]
    cen = xy.sum(axis=1) / n
    d = xy - cen[:, None]
    q = (d[:, None] * d[None]).reshape(4, n).sum(axis=1)  # Σ dx², Σ dx dy, Σ dy dx, Σ dy²
    a, b, c = float(q[0]) / n, float(q[1]) / n, float(q[3]) / n
    axis = _principal_axis(a, b, c)
    if axis is None:
        cx, cy, u, rms = tls_fit(xy[0], xy[1])
        cen = np.array([cx, cy])
        return cen, float(u[0]), float(u[1]), rms, xy - cen[:, None]
    ux, uy, lam_min = axis
    return cen, ux, uy, math.sqrt(max(lam_min, 0.0)), d


def _segments_core(
    edges: np.ndarray,
    *,
    min_length_px: float,
    max_gap_px: float,
    tolerance_px: float,
    angle_step_deg: float,
    max_lines: int,
) -> list[PixelSegment]:
    rows, cols = _nonzero_2d(edges)
    if rows.size < 2:
        return []
    theta = np.deg2rad(np.arange(-90.0, 90.0, angle_step_deg))
    h, angles, dists = hough_line(edges, theta=theta)
    min_votes = max(3, int(0.6 * min_length_px))
    pk_ang, pk_dist = _hough_peaks(h, angles, dists, min_votes, max_lines)
    px, py = cols.astype(float), rows.astype(float)
    width = int(edges.shape[1])
    key = rows.astype(np.int64) * width + cols  # row-major order: ascending
    free = np.ones(px.size, dtype=bool)
    n_free = px.size
    segs: list[PixelSegment] = []
    reach_px = 3 * tolerance_px + 2
    k0 = 0
    while k0 < pk_ang.size:
        if len(segs) >= max_lines or n_free == 0:
            break
        # the first 64 peaks claim most pixels; the rest are examined together
        # (the result does not depend on the chunks: claimed pixels never come back)
        chunk = FIRST_CHUNK if k0 == 0 else pk_ang.size - k0
        # per peak, the free pixels within reach of its line (see below), as
        # index lists into fidx (ascending, grouped by peak): peaks' loops
        # then touch only their own band (a few hundred pixels), not every
        # free pixel; those within the tolerance are the peak's own
        fidx = np.nonzero(free)[0]
        ca, sa = np.cos(pk_ang[k0 : k0 + chunk]), np.sin(pk_ang[k0 : k0 + chunk])
        xy = np.stack([px[fidx], py[fidx]])  # the free pixels, indexed by position in fidx below
        rj, rf, rdist = _band_members(xy[0], xy[1], key[fidx], width, ca, sa, pk_dist[k0 : k0 + chunk], reach_px)
        first = k0 == 0
        k0 += chunk
        rnear = rdist <= tolerance_px
        bounds = np.searchsorted(rj, np.arange(ca.size + 1))
        lfree = np.ones(fidx.size, dtype=bool)  # free[fidx], kept up to date
        if first:
            # the strongest peaks nearly all have a run: no pre-selection
            cand_j = np.arange(ca.size)
        else:
            cand_j = np.nonzero(_viable_peaks(xy, rj[rnear], rf[rnear], ca, sa, min_votes=min_votes,
                                              max_gap_px=max_gap_px, min_length_px=min_length_px))[0]
        for j in cand_j:
            if len(segs) >= max_lines or n_free == 0:
                break
            b0, b1 = bounds[j], bounds[j + 1]
            rloc = rf[b0:b1]
            keep = lfree[rloc]
            rloc = rloc[keep]
            nloc = rloc[rnear[b0:b1][keep]]
            if nloc.size < min_votes:
                continue
            for sel, cx, cy, ux, uy, t_lo, t_hi, rms in _peak_runs(xy, lfree, nloc, rloc, ca[j], sa[j],
                                                                    min_votes=min_votes, max_gap_px=max_gap_px,
                                                                    min_length_px=min_length_px,
                                                                    tolerance_px=tolerance_px):
                lfree[sel] = False
                n_free -= sel.size
                segs.append(PixelSegment(float(cx), float(cy), float(ux), float(uy), float(t_lo), float(t_hi),
                                         int(sel.size), rms))
        free[fidx[~lfree]] = False
    return segs


def segment_to_line(seg: PixelSegment, axes: MapAxes, *, family: str = "unassigned") -> TransitionLine:
    """Convert a pixel segment to a :class:`TransitionLine` in volts (slope from end points)."""
    (sx, sy), (ex, ey) = seg.start_px, seg.end_px
    xs, ys = idx_to_volts(np.array([sx, ex, seg.cx]), axes.x), idx_to_volts(np.array([sy, ey, seg.cy]), axes.y)
    dxv, dyv = xs[1] - xs[0], ys[1] - ys[0]
    slope = dyv / dxv if dxv != 0 else np.inf
    # error propagation of the angle error: s_px = uy/ux, s_V = s_px * (dy/dx)
    dth = seg.angle_stderr()
    sx_, sy_ = steps(axes)
    ax, ay = abs(sx_), abs(sy_)
    if seg.ux > 1e-12:
        slope_err = abs(ay / ax) * dth / seg.ux**2
    else:
        slope_err = np.inf
    pos_err = max(seg.rms_px, 0.29) / np.sqrt(max(seg.n_pixels, 1)) * np.hypot(ax * seg.uy, ay * seg.ux)
    return TransitionLine(
        family=family,  # type: ignore[arg-type]
        x0=float(xs[2]), y0=float(ys[2]), slope=float(slope), slope_stderr=float(slope_err),
        position_stderr=float(pos_err), start=(float(xs[0]), float(ys[0])), end=(float(xs[1]), float(ys[1])),
        n_points=seg.n_pixels,
    )


def _segments_to_lines(segs, axes: MapAxes, families) -> list[TransitionLine]:
    """:func:`segment_to_line` of many segments, the conversions done as arrays (same numbers)."""
    if not segs:
        return []
    cx = np.array([s.cx for s in segs])
    cy = np.array([s.cy for s in segs])
    ux = np.array([s.ux for s in segs])
    uy = np.array([s.uy for s in segs])
    t0 = np.array([s.t0 for s in segs])
    t1 = np.array([s.t1 for s in segs])
    npx = np.array([s.n_pixels for s in segs], dtype=float)
    rms = np.array([s.rms_px for s in segs])
    n = cx.size
    xs = idx_to_volts(np.concatenate([cx + t0 * ux, cx + t1 * ux, cx]), axes.x)
    ys = idx_to_volts(np.concatenate([cy + t0 * uy, cy + t1 * uy, cy]), axes.y)
    x0, x1, xc = xs[:n], xs[n : 2 * n], xs[2 * n :]
    y0, y1, yc = ys[:n], ys[n : 2 * n], ys[2 * n :]
    dxv, dyv = x1 - x0, y1 - y0
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = np.where(dxv != 0, dyv / np.where(dxv != 0, dxv, 1.0), np.inf)
        # PixelSegment.angle_stderr, elementwise
        spread = (t1 - t0) / np.sqrt(12.0)
        dth = np.maximum(rms, 0.29) / (np.sqrt(np.maximum(npx, 3)) * np.maximum(spread, 1e-9))
        sx_, sy_ = steps(axes)
        ax, ay = abs(sx_), abs(sy_)
        slope_err = np.where(ux > 1e-12, abs(ay / ax) * dth / ux**2, np.inf)
        pos_err = np.maximum(rms, 0.29) / np.sqrt(np.maximum(npx, 1)) * np.hypot(ax * uy, ay * ux)
    cols = [a.tolist() for a in (xc, yc, slope, slope_err, pos_err, x0, y0, x1, y1)]
    return [
        TransitionLine(family=f, x0=a, y0=b, slope=sl, slope_stderr=se, position_stderr=pe,  # type: ignore[arg-type]
                       start=(p, q), end=(r, t), n_points=seg.n_pixels)
        for seg, f, a, b, sl, se, pe, p, q, r, t in zip(segs, families, *cols)
    ]


def find_segments(
    edges: EdgeMap,
    *,
    min_length_px: float = 8.0,
    max_gap_px: float = 3.0,
    tolerance_px: float = 1.5,
    angle_step_deg: float = 0.5,
    max_lines: int = 300,
) -> tuple[PixelSegment, ...]:
    """Straight segments in an edge map (Hough transform, then a TLS fit per run).

    Parameters
    ----------
    edges : EdgeMap
        From :func:`stabtool.lines.edge_map`.
    min_length_px : float
        Shortest segment kept, pixels.
    max_gap_px : float
        Largest gap along a line inside one segment, pixels; larger gaps
        split it (dot lines are segments of a honeycomb).
    tolerance_px : float
        Edge pixels within this perpendicular distance of a Hough line belong
        to it, pixels.
    angle_step_deg : float
        Hough angle bin, degrees. The TLS fit refines the angle far below it.
    max_lines : int
        Most Hough peaks examined.

    Returns
    -------
    tuple of PixelSegment
        In the isotropic pixel frame (x and y steps weigh equally); convert
        with :func:`segment_to_line`.

    Notes
    -----
    Hough transform: P. V. C. Hough, US patent 3,069,654 (1962), in the
    (ρ, θ) form of R. O. Duda and P. E. Hart, Commun. ACM 15, 11 (1972),
    doi:10.1145/361237.361242; implementation
    :func:`skimage.transform.hough_line`. Peaks are visited strongest first;
    each claims the free edge pixels within ``tolerance_px``; runs separated
    by gaps are split; each run is refitted by total least squares (the
    principal axis of its pixels), which removes the angle binning error
    δθ/(sin θ cos θ) on the slope.
    """
    if not isinstance(edges, EdgeMap):
        raise InputError("edges", f"expected an EdgeMap from edge_map(), got {type(edges).__name__}")
    for name, val in (("min_length_px", min_length_px), ("max_gap_px", max_gap_px),
                      ("tolerance_px", tolerance_px), ("angle_step_deg", angle_step_deg)):
        if not (np.isfinite(val) and val > 0):
            raise InputError(name, f"must be a positive number, got {val!r}")
    return tuple(_segments_core(edges.edges, min_length_px=min_length_px, max_gap_px=max_gap_px,
                                tolerance_px=tolerance_px, angle_step_deg=angle_step_deg,
                                max_lines=int(max_lines)))
