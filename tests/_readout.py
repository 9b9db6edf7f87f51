"""Read-out artefacts applied to a test map in measurement order (shared by the pre-processing tests)."""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

__all__ = ["charge_step", "lockin", "row_low_pass_filtered", "serpentine_low_pass", "staircase"]


def serpentine_low_pass(values: np.ndarray, a: float) -> np.ndarray:
    """``values`` swept back and forth (odd rows from high to low x) through ``y_n = (1 − a) x_n + a y_(n−1)``."""
    snake = np.asarray(values, float).copy()
    snake[1::2] = snake[1::2, ::-1]
    flat = lfilter([1 - a], [1, -a], snake.ravel(), zi=[a * snake.flat[0]])[0].reshape(snake.shape)
    flat[1::2] = flat[1::2, ::-1].copy()
    return flat


def row_low_pass_filtered(values: np.ndarray, a: float) -> np.ndarray:
    """``values`` swept row by row towards increasing column index through ``y_n = (1 − a) x_n + a y_(n−1)``.

    Each row starts from the filter's steady state at its first point.
    """
    v = np.asarray(values, float)
    return lfilter([1 - a], [1, -a], v, axis=1, zi=a * v[:, :1])[0]


def staircase(*, slope=-2.5, spacing_px=22.35, width_px=0.45, shape=(120, 150), step=0.08, noise=0.01, seed=1):
    """One dot's transitions across the whole map: parallel Fermi steps (the conventions' occupation
    f = 1/(1 + exp((V − V0)/w))), ``spacing_px`` apart along a row, slope ``slope`` in pixels
    (row index per column index), on a sensor with its own gate slope and white noise."""
    rng = np.random.default_rng(seed)
    i = np.arange(shape[0], dtype=float)[:, None]
    j = np.arange(shape[1], dtype=float)[None, :]
    u = (j - i / slope) / spacing_px  # lines j = j0 + i/slope
    n_lines = int(np.ceil((shape[1] + shape[0] / abs(slope)) / spacing_px)) + 2
    occ = sum(1.0 / (1.0 + np.exp(-(u - k) * spacing_px / width_px)) for k in range(-n_lines, n_lines + 1))
    return 1.0 - step * occ + 0.3 * j / shape[1] + rng.normal(0.0, noise, shape)


def charge_step(values: np.ndarray) -> float:
    """Typical charge step of a map: the median of the largest 1 % of |Δx| (the lines' steps)."""
    d = np.abs(np.diff(np.asarray(values, float), axis=1)).ravel()
    return float(np.median(np.sort(d)[-max(1, d.size // 100):]))


def lockin(da, snr=None, seed=0):
    """The map read through a lock-in on the x gate: its central difference along x (modulation ±1
    point), with white noise at ``snr`` (99.5th percentile of |derivative| over the noise σ)."""
    p = np.gradient(np.asarray(da.values, float), axis=1)
    if snr is not None:
        p = p + np.random.default_rng(seed).normal(0.0, np.percentile(np.abs(p), 99.5) / snr, p.shape)
    return da.copy(data=p)
