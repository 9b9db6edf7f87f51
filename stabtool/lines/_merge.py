"""Merging of collinear fragments of one segment (private)."""

from __future__ import annotations

import numpy as np

from ._geometry import tls_fit
from .hough import PixelSegment


def merge_collinear(segs: list[PixelSegment], *, max_angle_deg: float = 2.0, max_offset_px: float = 1.0,
                    max_gap_px: float = 6.0) -> list[PixelSegment]:
    """Join fragments of one straight run broken by noise (same angle, same offset, small gap).

    Pairs are tested all at once; connected pairs (union–find) are refitted
    together by total least squares.
    """
    n = len(segs)
    if n < 2:
        return list(segs)
    cx = np.array([s.cx for s in segs]); cy = np.array([s.cy for s in segs])
    ux = np.array([s.ux for s in segs]); uy = np.array([s.uy for s in segs])
    t0 = np.array([s.t0 for s in segs]); t1 = np.array([s.t1 for s in segs])
    cosang = np.abs(ux[:, None] * ux[None, :] + uy[:, None] * uy[None, :])
    dxc, dyc = cx[None, :] - cx[:, None], cy[None, :] - cy[:, None]  # j relative to i
    off = np.abs(-dxc * uy[:, None] + dyc * ux[:, None])  # centre j from line i
    tj = dxc * ux[:, None] + dyc * uy[:, None]
    half = 0.5 * (t1 - t0)
    gap = np.maximum.reduce([tj - half[None, :] - t1[:, None], t0[:, None] - (tj + half[None, :]), np.zeros((n, n))])
    ok = (cosang >= np.cos(np.radians(max_angle_deg))) & (np.maximum(off, off.T) <= max_offset_px) & (gap <= max_gap_px)
    np.fill_diagonal(ok, False)
    parent = np.arange(n)

    def find(a: int) -> int:
        while parent[a] != a:
            parent[a] = parent[parent[a]]
            a = parent[a]
        return a

    for i, j in zip(*np.nonzero(np.triu(ok))):
        ri, rj = find(int(i)), find(int(j))
        if ri != rj:
            parent[rj] = ri
    groups: dict[int, list[int]] = {}
    for i in range(n):
        groups.setdefault(find(i), []).append(i)
    out = []
    for members in groups.values():
        if len(members) == 1:
            out.append(segs[members[0]])
            continue
        pts = []
        for k in members:
            s = segs[k]
            t = np.linspace(s.t0, s.t1, max(s.n_pixels, 2))
            pts.append(np.stack([s.cx + t * s.ux, s.cy + t * s.uy], 1))
        P = np.vstack(pts)
        mx, my, u, rms = tls_fit(P[:, 0], P[:, 1])
        tt = (P[:, 0] - mx) * u[0] + (P[:, 1] - my) * u[1]
        # a merge of fragments that are not collinear after all is undone
        if rms > max_offset_px:
            out.extend(segs[k] for k in members)
            continue
        out.append(PixelSegment(float(mx), float(my), float(u[0]), float(u[1]), float(tt.min()), float(tt.max()),
                                int(sum(segs[k].n_pixels for k in members)),
                                float(max(max(segs[k].rms_px for k in members), rms))))
    return out


def drop_duplicates(lines: list, px_scale: tuple[float, float], *, max_distance_px: float = 2.5) -> list:
    """Remove lines that retrace a better line of the same family (double edges of one transition).

    Two lines are duplicates when their overlapping parts lie within
    ``max_distance_px`` of each other in the pixel frame; the one with more
    crossing points (then the smaller slope error) is kept.
    """
    n = len(lines)
    if n < 2:
        return list(lines)
    sx, sy = abs(px_scale[0]), abs(px_scale[1])
    a = np.array([[ln.start[0] / sx, ln.start[1] / sy] for ln in lines])
    b = np.array([[ln.end[0] / sx, ln.end[1] / sy] for ln in lines])
    fam = np.array([str(ln.family) for ln in lines])
    u = b - a
    L = np.hypot(u[:, 0], u[:, 1])
    uu = u / np.where(L > 0, L, 1.0)[:, None]
    ts = np.linspace(0, 1, 9)
    dup = np.zeros((n, n), bool)
    # only lines of one family can duplicate each other: all pairs of each family at once
    for f in np.unique(fam):
        ids = np.nonzero(fam == f)[0]
        if ids.size < 2:
            continue
        A, U, UU, LL = a[ids], u[ids], uu[ids], L[ids]
        # 9 sample points of every line i, projected on every line j
        P = A[:, None, :] + ts[None, :, None] * U[:, None, :]  # (i, 9, 2)
        rel = P[:, None, :, :] - A[None, :, None, :]  # (i, j, 9, 2)
        rx, ry = rel[..., 0], rel[..., 1]
        ux_, uy_ = UU[None, :, None, 0], UU[None, :, None, 1]
        tt = rx * ux_ + ry * uy_  # (the sum over the two components)
        dist = np.abs(rx * -uy_ + ry * ux_)
        inside = (tt >= -1) & (tt <= LL[None, :, None] + 1)
        # median over the inside samples (= nanmedian of dist with the others NaN): sort, pick the
        # middle; only for the pairs that can pass (at least three inside samples, the nearest
        # within max_distance_px: the median is no nearer than that, a NaN sorting last)
        cnt = inside.sum(2)
        dq = np.where(inside, dist, np.inf)
        cand = (LL[None, :] > 0) & (cnt >= 3) & (np.fmin.reduce(dq, axis=2) <= max_distance_px)
        srt = np.sort(dq[cand], axis=1)
        c = cnt[cand]
        r = np.arange(c.size)
        with np.errstate(invalid="ignore"):
            med = 0.5 * (srt[r, np.clip((c - 1) // 2, 0, 8)] + srt[r, np.clip(c // 2, 0, 8)])
        d = np.zeros(cand.shape, bool)
        d[cand] = med <= max_distance_px
        dup[np.ix_(ids, ids)] = d
    rank = sorted(range(n), key=lambda i: (-lines[i].n_points, lines[i].slope_stderr))
    kept = np.zeros(n, bool)
    for i in rank:
        if not (dup[i] & kept).any():
            kept[i] = True
    return [lines[i] for i in np.nonzero(kept)[0]]
