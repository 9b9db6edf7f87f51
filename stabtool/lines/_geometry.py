"""Index ↔ volt conversions and small line-geometry helpers (private)."""

from __future__ import annotations

import numpy as np

from ..mapdata import MapAxes


def idx_to_volts(i: np.ndarray | float, coord: np.ndarray) -> np.ndarray:
    """Fractional index → voltage by linear interpolation (extrapolates linearly)."""
    i = np.asarray(i, dtype=np.float64)
    n = coord.size
    idx = np.arange(n, dtype=np.float64)
    out = np.interp(i, idx, coord)
    lo, hi = i < 0, i > n - 1
    if lo.any():
        out = np.where(lo, coord[0] + (coord[1] - coord[0]) * i, out)
    if hi.any():
        out = np.where(hi, coord[-1] + (coord[-1] - coord[-2]) * (i - (n - 1)), out)
    return out


def volts_to_idx(v: np.ndarray | float, coord: np.ndarray) -> np.ndarray:
    """Voltage → fractional index (coord may be decreasing)."""
    v = np.asarray(v, dtype=np.float64)
    idx = np.arange(coord.size, dtype=np.float64)
    if coord[-1] < coord[0]:
        return np.interp(-v, -coord, idx, left=np.nan, right=np.nan)
    return np.interp(v, coord, idx, left=np.nan, right=np.nan)


def px_points_to_volts(ix: np.ndarray, iy: np.ndarray, axes: MapAxes) -> tuple[np.ndarray, np.ndarray]:
    """Pixel (column, row) positions → (x, y) volts."""
    return idx_to_volts(ix, axes.x), idx_to_volts(iy, axes.y)


def tls_fit(px: np.ndarray, py: np.ndarray, w: np.ndarray | None = None):
    """Total-least-squares line through points: centre, unit direction, perpendicular rms."""
    if w is None:
        w = np.ones_like(px)
    sw = w.sum()
    cx, cy = (w * px).sum() / sw, (w * py).sum() / sw
    dx, dy = px - cx, py - cy
    cov = np.array([[(w * dx * dx).sum(), (w * dx * dy).sum()], [(w * dx * dy).sum(), (w * dy * dy).sum()]]) / sw
    evals, evecs = np.linalg.eigh(cov)
    u = evecs[:, 1]
    if u[0] < 0 or (u[0] == 0 and u[1] < 0):
        u = -u
    return cx, cy, u, float(np.sqrt(max(evals[0], 0.0)))


def segment_distances(points: np.ndarray, starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """Distance of each point (k, 2) to each segment (starts, ends: (m, 2)), shape (k, m).

    The nearest point of a segment is its end beyond either end; a segment
    of zero length is its start.
    """
    p = np.asarray(points, float)[:, None, :]
    a, b = np.asarray(starts, float).reshape(-1, 2), np.asarray(ends, float).reshape(-1, 2)
    ab = b - a
    den = (ab * ab).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        t = np.where(den > 0, ((p - a) * ab).sum(axis=2) / den, 0.0)
    t = np.clip(t, 0.0, 1.0)
    d = p - (a + t[..., None] * ab)
    return np.hypot(d[..., 0], d[..., 1])


def steps(axes: MapAxes) -> tuple[float, float]:
    """Mean signed steps (dx, dy) of the axes, V (cheap; equals the median for uniform sweeps)."""
    return (float((axes.x[-1] - axes.x[0]) / (axes.x.size - 1)), float((axes.y[-1] - axes.y[0]) / (axes.y.size - 1)))
