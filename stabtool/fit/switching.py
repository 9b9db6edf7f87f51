"""Sensor switching offsets: piecewise-constant offsets along the rows of a model residual.

A charge trap next to the sensor (random telegraph switching) moves the
sensor's signal between two levels at random moments of the sweep. After the
row offsets are removed, a row in which the trap switched keeps a step: one
part of the row sits at the old level, the rest at the new one. A model of the
map that has no such offsets leaves the step in its residual, where the lines
are gone; there a step is found by a change-point search along the row.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import pairwise

import numpy as np

from .relocate import mean_shift_stats

__all__ = ["SwitchingOffsets", "switching_offsets"]

#: Shortest piece of a row on either side of a switch, pixels.
MIN_PIECE_PX = 8
#: Residuals are clipped at this many noise σ before the change-point statistic (a misfit
#: near a line must not pass for a switch).
CLIP_SIGMAS = 4.0
#: Fraction of each piece's pixels that must lie within half the step of the piece's median:
#: a switch moves the whole piece, a misfit near a line only a few pixels.
MIN_UNIFORM_FRACTION = 0.8
#: Most switches searched per row (binary segmentation).
MAX_SWITCHES_PER_ROW = 3


@dataclass(frozen=True)
class SwitchingOffsets:
    """Outcome of :func:`switching_offsets`.

    Attributes
    ----------
    offsets : ndarray, shape (ny, nx)
        Piecewise-constant offset of every pixel (0 where no switch was found;
        NaN where the residual is unknown).
    switches : tuple of (int, int, float)
        ``(row, column, step)`` of every switch found (step in signal units).
    """

    offsets: np.ndarray
    switches: tuple[tuple[int, int, float], ...]

    @property
    def n_switches(self) -> int:
        return len(self.switches)


def _cusum_split(r: np.ndarray, sigma: float) -> tuple[int, float]:
    """Best split of ``r`` (finite, 1-D) into two constant pieces: ``(index, statistic in σ)``.

    The statistic is the mean-shift statistic of the line re-measurement
    (:func:`stabtool.fit.relocate.mean_shift_stats`) of the clipped values,
    ``|m₂ − m₁| √(n₁ n₂ / n) / σ``, over splits leaving ``MIN_PIECE_PX`` on
    each side.
    """
    n = r.size
    if n < 2 * MIN_PIECE_PX:
        return 0, 0.0
    c = np.clip(r, -CLIP_SIGMAS * sigma, CLIP_SIGMAS * sigma)
    # (entry k − 1 of the statistics is the split after k samples)
    t = mean_shift_stats(c[None, :])[0, MIN_PIECE_PX - 1 : n - MIN_PIECE_PX] / sigma
    k = int(np.argmax(t))
    return MIN_PIECE_PX + k, float(t[k])


def _uniform(piece: np.ndarray, level: float, half_step: float) -> bool:
    return bool(np.mean(np.abs(piece - level) < half_step) >= MIN_UNIFORM_FRACTION)


def switching_offsets(residual: np.ndarray, noise: float, *, threshold: float | None = None) -> SwitchingOffsets:
    """Find the switches of a sensor offset along the rows of a model residual.

    Parameters
    ----------
    residual : ndarray, shape (ny, nx)
        Map minus its model (rows = the slow axis, columns in sweep order);
        NaN where the model is unknown.
    noise : float
        White-noise σ of a pixel.
    threshold : float, optional
        Change-point statistic (σ) a switch must exceed; default
        ``√(2 ln(ny·nx)) + 2``, above the largest value white noise reaches
        over the whole map.

    Returns
    -------
    SwitchingOffsets

    Notes
    -----
    Per row, binary segmentation (A. J. Scott and M. Knott, "A cluster analysis
    method for grouping means in the analysis of variance", Biometrics 30, 507
    (1974), doi:10.2307/2529204) with the CUSUM statistic of a change in mean
    (E. S. Page, "Continuous inspection schemes", Biometrika 41, 100 (1954),
    doi:10.1093/biomet/41.1-2.100): the best split of a piece is kept when
    its statistic exceeds ``threshold`` and both sides are uniform (at least
    ``MIN_UNIFORM_FRACTION`` of their pixels within half the step of their
    median). Each piece's offset is its median; a row without a switch keeps
    an offset of 0 (row offsets are the row-offset correction's business).
    """
    res = np.asarray(residual, float)
    ny, nx = res.shape
    out = np.zeros(res.shape)
    out[~np.isfinite(res)] = np.nan
    found: list[tuple[int, int, float]] = []
    if not (np.isfinite(noise) and noise > 0):
        return SwitchingOffsets(out, ())
    thr = float(np.sqrt(2.0 * np.log(max(ny * nx, 2))) + 2.0) if threshold is None else float(threshold)
    for r in range(ny):
        cols = np.flatnonzero(np.isfinite(res[r]))
        if cols.size < 2 * MIN_PIECE_PX + 1:
            continue
        v = res[r, cols]
        pieces = [(0, v.size)]
        cuts: list[int] = []
        for _ in range(MAX_SWITCHES_PER_ROW):
            best = None
            for a, b in pieces:
                k, t = _cusum_split(v[a:b], noise)
                if t > thr and (best is None or t > best[2]):
                    best = (a, b, t, a + k)
            if best is None:
                break
            a, b, _, s = best
            lo, hi = float(np.median(v[a:s])), float(np.median(v[s:b]))
            half = 0.5 * abs(hi - lo)
            if not (_uniform(v[a:s], lo, half) and _uniform(v[s:b], hi, half)):
                break
            pieces.remove((a, b))
            pieces += [(a, s), (s, b)]
            cuts.append(s)
        if not cuts:
            continue
        spans = list(pairwise([0, *sorted(cuts), v.size]))
        levels = [float(np.median(v[p:q])) for p, q in spans]
        base = float(np.median(v))  # the row's own level stays (the row-offset correction's)
        for (p, q), lev in zip(spans, levels):
            out[r, cols[p:q]] = lev - base
        for (s, _), (l0, l1) in zip(spans[1:], pairwise(levels)):
            found.append((r, int(cols[s]), l1 - l0))
    return SwitchingOffsets(out, tuple(found))
