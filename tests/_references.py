"""Generator windows around one line of a preset double dot, for the reference tests."""

from __future__ import annotations

import numpy as np

from stabtool.simulate import quick_double_dot, simulate_map


def preset_truth(preset: str = "si-sige-double"):
    """Truth of a preset double-dot map (coarse, noiseless)."""
    return quick_double_dot(preset, shape=(48, 48), snr=None, readout="charge", temperature_K=0.05).truth


def longest_segment(truth, family: str):
    segs = [s for s in truth.lines if s.family == family]
    return max(segs, key=lambda s: np.hypot(s.end[0] - s.start[0], s.end[1] - s.start[1]))


def midpoint(seg) -> tuple[float, float]:
    return (0.5 * (seg.start[0] + seg.end[0]), 0.5 * (seg.start[1] + seg.end[1]))


def window(truth, centre, half_V, shape, **kw):
    """simulate_map of the truth's device on a square window around ``centre``."""
    return simulate_map(
        truth.device, x_gate=truth.x_gate, y_gate=truth.y_gate,
        x_range_V=(centre[0] - half_V, centre[0] + half_V),
        y_range_V=(centre[1] - half_V, centre[1] + half_V), shape=shape, **kw,
    )
