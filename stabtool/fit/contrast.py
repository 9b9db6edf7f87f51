"""Check detected lines against the map: a charge transition is a step in the signal.

For each segment the signal is sampled at points along it, displaced by ±d
along the dot's own gate (x for dot1, y for dot2); the median difference is
the line's step. Segments whose step is not significant against the noise,
or much weaker than the family's strong steps (optionally: without being
clear on its own), are set aside before the lattice fit. This guards the
model against spurious edges of a detector.

Notes
-----
Noise from the median absolute deviation of neighbouring-pixel differences
(σ = 1.4826 · MAD / √2, common practice, no source). Sampling by linear
interpolation on the pixel grid (:func:`scipy.ndimage.map_coordinates`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import map_coordinates

from ..lines.result import TransitionLine

__all__ = ["MIN_STEP_FRACTION", "MIN_STEP_SIGMAS", "MIN_STEP_SIGMAS_ALONE", "LineContrast", "line_contrast",
           "map_noise"]

#: A line's step must exceed this many standard errors…
MIN_STEP_SIGMAS = 5.0
#: …and this fraction of the family's typical strong step (80th percentile of |step|),
MIN_STEP_FRACTION = 0.3
#: With ``keep_clear``, a step of this many standard errors is kept whatever its fraction: a sensor
#: whose sensitivity varies over the map (a peak sensor's operating point moving down its flank)
#: shows the same family's lines with steps a few times apart, and the fraction rule sets the far
#: ones aside however clear they are. Lines set aside by the fraction rule alone with z ≥ 30 that lay
#: within 1.5 px of a true line of their family: held-out probe seeds 0–63 121 of 121, seeds 64–127
#: 125 of 131, sensor comb seeds 0–31 9 of 11 (with z ≥ 20: 168 of 178 on seeds 64–127). See
#: DEVELOPERS.md, "Lines of a sensor whose sensitivity varies" (why the model fit uses it only when
#: the map gives no cell without it).
MIN_STEP_SIGMAS_ALONE = 30.0


def map_noise(z: np.ndarray) -> float:
    """Noise standard deviation from neighbouring-pixel differences along x."""
    d = np.diff(np.asarray(z, float), axis=1).ravel()
    d = d[np.isfinite(d)]
    if d.size == 0:
        return float("nan")
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2))


@dataclass(frozen=True)
class LineContrast:
    """Steps of a family's lines.

    Attributes
    ----------
    step : ndarray, shape (k,)
        Signal step across each line (towards higher own-gate voltage).
    z : ndarray, shape (k,)
        Step over its standard error.
    keep : ndarray of bool, shape (k,)
    """

    step: np.ndarray
    z: np.ndarray
    keep: np.ndarray


def _index(axis: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Fractional pixel index of voltages ``v`` on a monotonic axis."""
    if axis[0] <= axis[-1]:
        return np.interp(v, axis, np.arange(axis.size), left=np.nan, right=np.nan)
    return np.interp(v, axis[::-1], np.arange(axis.size)[::-1], left=np.nan, right=np.nan)


def line_contrast(
    z: np.ndarray,
    x: np.ndarray,
    y: np.ndarray,
    lines: tuple[TransitionLine, ...] | list[TransitionLine],
    *,
    which: int,
    noise: float | None = None,
    n_samples: int = 15,
    offset_px: float = 2.5,
    keep_clear: bool = False,
) -> LineContrast:
    """Measure the signal step across each line.

    Parameters
    ----------
    z : ndarray, shape (ny, nx)
    x, y : ndarray, shape (nx,), (ny,)
        Axes in V.
    lines : sequence of TransitionLine
    which : {0, 1}
        0 for dot1 lines (displacement along x), 1 for dot2 (along y).
    noise : float, optional
        Noise standard deviation (default: :func:`map_noise`).
    n_samples : int
        Points sampled along each segment.
    offset_px : float
        Displacement on each side, in pixels (raised to two Fermi widths when
        the line's width is known).
    keep_clear : bool
        Keep a step of at least :data:`MIN_STEP_SIGMAS_ALONE` standard errors
        even below :data:`MIN_STEP_FRACTION` of the family's strong steps.
    """
    z = np.asarray(z, float)
    sig = map_noise(z) if noise is None else float(noise)
    k = len(lines)
    steps, zs = np.full(k, np.nan), np.full(k, np.nan)
    step_v = abs(float(np.median(np.diff(x)))) if which == 0 else abs(float(np.median(np.diff(y))))
    zf = np.where(np.isfinite(z), z, np.nanmean(z))
    if k:
        # every line's sample points at once (the same numbers as one line at a time)
        t = np.linspace(0.1, 0.9, n_samples)
        ends = np.array([[ln.start[0], ln.start[1], ln.end[0], ln.end[1]] for ln in lines], float)
        px = ends[:, 0, None] + t * (ends[:, 2, None] - ends[:, 0, None])
        py = ends[:, 1, None] + t * (ends[:, 3, None] - ends[:, 1, None])
        d = np.full(k, offset_px * step_v)
        widths = np.array([ln.width_V for ln in lines], float)
        wide = np.isfinite(widths)
        d[wide] = np.maximum(d[wide], 2.0 * widths[wide])
        if which == 0:
            iy = _index(y, py)
            a = (iy, _index(x, px + d[:, None]))
            b = (iy, _index(x, px - d[:, None]))
        else:
            ix = _index(x, px)
            a = (_index(y, py + d[:, None]), ix)
            b = (_index(y, py - d[:, None]), ix)
        ok = np.isfinite(a[0]) & np.isfinite(a[1]) & np.isfinite(b[0]) & np.isfinite(b[1])
        n_ok = ok.sum(axis=1)
        sa = map_coordinates(zf, [a[0][ok], a[1][ok]], order=1)
        sb = map_coordinates(zf, [b[0][ok], b[1][ok]], order=1)
        diff = sa - sb
        starts = np.concatenate([[0], np.cumsum(n_ok)])
        for i in np.flatnonzero(n_ok >= 3):
            steps[i] = float(np.median(diff[starts[i] : starts[i + 1]]))
            se = sig * np.sqrt(2.0 / n_ok[i])
            zs[i] = abs(steps[i]) / se if se > 0 else np.inf
    strong = np.abs(steps[np.isfinite(zs) & (zs >= MIN_STEP_SIGMAS)])
    ref = float(np.percentile(strong, 80)) if strong.size else np.nan
    keep = np.isfinite(zs) & (zs >= MIN_STEP_SIGMAS)
    if np.isfinite(ref):
        keep &= (np.abs(steps) >= MIN_STEP_FRACTION * ref) | (keep_clear & (zs >= MIN_STEP_SIGMAS_ALONE))
    return LineContrast(step=steps, z=zs, keep=keep)
