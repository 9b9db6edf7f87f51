"""Read-out artefacts applied to a test map in measurement order (shared by the pre-processing tests)."""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

__all__ = ["charge_step", "row_low_pass_filtered", "serpentine_low_pass"]


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


def charge_step(values: np.ndarray) -> float:
    """Typical charge step of a map: the median of the largest 1 % of |Δx| (the lines' steps)."""
    d = np.abs(np.diff(np.asarray(values, float), axis=1)).ravel()
    return float(np.median(np.sort(d)[-max(1, d.size // 100):]))
