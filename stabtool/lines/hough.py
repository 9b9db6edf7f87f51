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


def _tls(px: np.ndarray, py: np.ndarray):
    """Total-least-squares line through points: centre, unit direction, perpendicular rms.

    :func:`stabtool.lines._geometry.tls_fit` (unweighted) with the 2×2
    eigenproblem solved in closed form (it runs once or twice per segment).
    """
    n = px.size
    cx, cy = px.sum() / n, py.sum() / n
    dx, dy = px - cx, py - cy
    a, b, c = float((dx * dx).sum()) / n, float((dx * dy).sum()) / n, float((dy * dy).sum()) / n
    half = 0.5 * (a - c)
    root = math.hypot(half, b)
    lam_max = 0.5 * (a + c) + root
    lam_min = 0.5 * (a + c) - root
    ux, uy = (lam_max - c, b) if a >= c else (b, lam_max - a)
    norm = math.hypot(ux, uy)
    if not norm > 0:
        return tls_fit(px, py)
    ux, uy = ux / norm, uy / norm
    if ux < 0 or (ux == 0 and uy < 0):
        ux, uy = -ux, -uy
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
    cand = np.nonzero((h >= mx) & (h >= min_votes))
    votes = h[cand].astype(np.int64)
    order = np.argsort(-votes, kind="stable")[: 2 * max_peaks]
    return angles[cand[1][order]], dists[cand[0][order]]


def _segments_core(
    edges: np.ndarray,
    *,
    min_length_px: float,
    max_gap_px: float,
    tolerance_px: float,
    angle_step_deg: float,
    max_lines: int,
) -> list[PixelSegment]:
    rows, cols = np.nonzero(edges)
    if rows.size < 2:
        return []
    theta = np.deg2rad(np.arange(-90.0, 90.0, angle_step_deg))
    h, angles, dists = hough_line(edges, theta=theta)
    min_votes = max(3, int(0.6 * min_length_px))
    pk_ang, pk_dist = _hough_peaks(h, angles, dists, min_votes, max_lines)
    px, py = cols.astype(float), rows.astype(float)
    free = np.ones(px.size, dtype=bool)
    n_free = px.size
    segs: list[PixelSegment] = []
    chunk = 64
    reach_px = 3 * tolerance_px + 2
    for k0 in range(0, pk_ang.size, chunk):
        if len(segs) >= max_lines or n_free == 0:
            break
        # signed distances of the free pixels from the next peaks' lines, all at
        # once (hough_line: dist = col*cos(angle) + row*sin(angle)); claimed
        # pixels never come back
        fidx = np.nonzero(free)[0]
        ca, sa = np.cos(pk_ang[k0 : k0 + chunk]), np.sin(pk_ang[k0 : k0 + chunk])
        # (in place: these (chunk, n_free) arrays are the largest of the search)
        dist_all = np.multiply.outer(ca, px[fidx])
        dist_all += np.multiply.outer(sa, py[fidx])
        dist_all -= pk_dist[k0 : k0 + chunk, None]
        np.abs(dist_all, out=dist_all)
        # per peak, the free pixels within reach of its line (see below), as
        # index lists into fidx (row-major, so grouped by peak): peaks' loops
        # then touch only their own band (a few hundred pixels), not every
        # free pixel; those within the tolerance are the peak's own
        rj, rf = np.nonzero(dist_all <= reach_px)
        rnear = dist_all[rj, rf] <= tolerance_px
        bounds = np.searchsorted(rj, np.arange(ca.size + 1))
        jj, ff = rj[rnear], rf[rnear]
        lfree = np.ones(fidx.size, dtype=bool)  # free[fidx], kept up to date
        # peaks without a long enough run among the pixels free now never get
        # one (claims only split and shorten runs): found for the whole chunk
        # at once, with a hair of slack so that rounding never drops a peak
        viable = np.bincount(jj, minlength=ca.size) >= min_votes
        if jj.size:
            tq = -px[fidx[ff]] * sa[jj] + py[fidx[ff]] * ca[jj]
            o = np.lexsort((tq, jj))
            jj, tq = jj[o], tq[o]
            cut = np.nonzero((np.diff(jj) != 0) | (np.diff(tq) > max_gap_px + 1e-9))[0] + 1
            rs, re = np.r_[0, cut], np.r_[cut, jj.size]
            long_run = (re - rs >= min_votes) & (tq[re - 1] - tq[rs] >= min_length_px - 2 - 1e-9)
            has_run = np.zeros(ca.size, dtype=bool)
            has_run[jj[rs[long_run]]] = True
            viable &= has_run
        cand_j = np.nonzero(viable)[0]
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
            c, s = ca[j], sa[j]
            idx = fidx[nloc]
            # free pixels within reach of this peak's runs once refitted: the
            # refitted line stays within the tolerance band of the Hough line
            # along the run, so 3 tolerances + 2 px hold every pixel it can
            # collect (the re-collection below scans these, not all pixels)
            reach = fidx[rloc]
            rx, ry = px[reach], py[reach]
            ix, iy = px[idx], py[idx]
            t = iy * c - ix * s
            order = np.argsort(t)
            ts = t[order]
            br = np.nonzero(np.diff(ts) > max_gap_px)[0] + 1
            starts = np.concatenate([[0], br])
            ends = np.concatenate([br, [ts.size]])
            # only runs long enough in pixels and in extent are examined
            good = (ends - starts >= min_votes) & (ts[ends - 1] - ts[starts] >= min_length_px - 2)
            for st, en in zip(starts[good].tolist(), ends[good].tolist()):
                sel = idx[order[st:en]]
                sx, sy = px[sel], py[sel]
                cx, cy, u, rms = _tls(sx, sy)
                # one re-collection around the refined line, inside the run's span
                ts_ = (sx - cx) * u[0] + (sy - cy) * u[1]
                tt = (rx - cx) * u[0] + (ry - cy) * u[1]
                dd = (ry - cy) * u[0] - (rx - cx) * u[1]
                m2 = free[reach] & (tt >= ts_.min() - 1) & (tt <= ts_.max() + 1) & (np.abs(dd) <= tolerance_px)
                sel2 = reach[m2]
                if sel2.size >= sel.size:
                    sel = sel2
                    sx, sy = px[sel], py[sel]
                    cx, cy, u, rms = _tls(sx, sy)
                tt = (sx - cx) * u[0] + (sy - cy) * u[1]
                t_lo, t_hi = tt.min(), tt.max()
                if t_hi - t_lo < min_length_px - 1:
                    continue
                free[sel] = False
                n_free -= sel.size
                lfree[np.searchsorted(fidx, sel)] = False
                segs.append(PixelSegment(float(cx), float(cy), float(u[0]), float(u[1]),
                                         float(t_lo), float(t_hi), int(sel.size), rms))
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
