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


def _max_filter5(a: np.ndarray) -> np.ndarray:
    """5×5 moving maximum of a non-negative 2-D array, zero outside it.

    The same as ``scipy.ndimage.maximum_filter(a, size=(5, 5), mode="constant")``
    for ``a >= 0``, as two separable passes of shifted maxima.
    """
    out = a
    for axis in (0, 1):
        n = out.shape[axis]
        pad = [(0, 0), (0, 0)]
        pad[axis] = (2, 2)
        p = np.pad(out, pad)
        sl = [slice(None), slice(None)]
        sl[axis] = slice(0, n)
        m = p[tuple(sl)].copy()
        for k in range(1, 5):
            sl[axis] = slice(k, k + n)
            np.maximum(m, p[tuple(sl)], out=m)
        out = m
    return out


def _hough_peaks(h: np.ndarray, angles: np.ndarray, dists: np.ndarray, min_votes: int, max_peaks: int):
    """Local maxima of the accumulator (5 distance × 5 angle bins, angle wrapping), strongest first."""
    h = h.astype(np.int32) if h.size and h.max() < 2**31 - 1 else h
    hp = np.concatenate([h[::-1, -2:], h, h[::-1, :2]], axis=1)  # θ = ±90° wrap with ρ → −ρ
    mx = _max_filter5(hp)[:, 2:-2]
    cand = np.nonzero((h >= mx) & (h >= min_votes))
    votes = h[cand]
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
        dist_all = np.abs(np.outer(ca, px[fidx]) + np.outer(sa, py[fidx]) - pk_dist[k0 : k0 + chunk, None])
        near_all = dist_all <= tolerance_px
        lfree = np.ones(fidx.size, dtype=bool)  # free[fidx], kept up to date
        # peaks without a long enough run among the pixels free now never get
        # one (claims only split and shorten runs): found for the whole chunk
        # at once, with a hair of slack so that rounding never drops a peak
        jj, ff = np.nonzero(near_all)
        viable = np.zeros(ca.size, dtype=bool)
        if jj.size:
            tq = -px[fidx[ff]] * sa[jj] + py[fidx[ff]] * ca[jj]
            o = np.lexsort((tq, jj))
            jj, tq = jj[o], tq[o]
            cut = np.nonzero((np.diff(jj) != 0) | (np.diff(tq) > max_gap_px + 1e-9))[0] + 1
            rs, re = np.r_[0, cut], np.r_[cut, jj.size]
            long_run = (re - rs >= min_votes) & (tq[re - 1] - tq[rs] >= min_length_px - 2 - 1e-9)
            viable[jj[rs[long_run]]] = True
        # free pixels near each peak's line, kept up to date as pixels are claimed
        count = near_all.sum(1)
        for j in range(ca.size):
            if len(segs) >= max_lines or n_free == 0:
                break
            if count[j] < min_votes or not viable[j]:
                continue
            c, s = ca[j], sa[j]
            idx = fidx[near_all[j] & lfree]
            # free pixels within reach of this peak's runs once refitted: the
            # refitted line stays within the tolerance band of the Hough line
            # along the run, so 3 tolerances + 2 px hold every pixel it can
            # collect (the re-collection below scans these, not all pixels)
            reach = fidx[(dist_all[j] <= reach_px) & lfree]
            rx, ry = px[reach], py[reach]
            t = -px[idx] * s + py[idx] * c
            order = np.argsort(t)
            ts = t[order]
            br = np.nonzero(np.diff(ts) > max_gap_px)[0] + 1
            starts = np.concatenate([[0], br])
            ends = np.concatenate([br, [ts.size]])
            # only runs long enough in pixels and in extent are examined
            good = (ends - starts >= min_votes) & (ts[ends - 1] - ts[starts] >= min_length_px - 2)
            for st, en in zip(starts[good], ends[good]):
                sel = idx[order[st:en]]
                cx, cy, u, rms = _tls(px[sel], py[sel])
                # one re-collection around the refined line, inside the run's span
                ts_ = (px[sel] - cx) * u[0] + (py[sel] - cy) * u[1]
                tt = (rx - cx) * u[0] + (ry - cy) * u[1]
                dd = -(rx - cx) * u[1] + (ry - cy) * u[0]
                span = (tt >= ts_.min() - 1) & (tt <= ts_.max() + 1)
                sel2 = reach[free[reach] & span & (np.abs(dd) <= tolerance_px)]
                if sel2.size >= sel.size:
                    sel = sel2
                    cx, cy, u, rms = _tls(px[sel], py[sel])
                tt = (px[sel] - cx) * u[0] + (py[sel] - cy) * u[1]
                if tt.max() - tt.min() < min_length_px - 1:
                    continue
                free[sel] = False
                n_free -= sel.size
                loc = np.searchsorted(fidx, sel)
                lfree[loc] = False
                count -= near_all[:, loc].sum(1)
                segs.append(PixelSegment(float(cx), float(cy), float(u[0]), float(u[1]),
                                         float(tt.min()), float(tt.max()), int(sel.size), rms))
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
