"""Sorting segments into families by orientation (stabtool.lines.families.classify_lines).

Dot lines of both dots have negative slopes dV_y/dV_x and the interdot lines
positive ones (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)). A family
within a few degrees of an axis is the exception: its members' measured slopes
scatter about zero, and the orientation, not the sign, says which family a
segment belongs to.
"""

from __future__ import annotations

import numpy as np

from stabtool.lines import classify_lines
from stabtool.lines.result import TransitionLine
from stabtool.mapdata import MapAxes

AXES = MapAxes(x=np.linspace(0, 0.1, 201), y=np.linspace(0, 0.1, 201), x_gate="PA", y_gate="PB")


def _seg(x0, y0, slope, half=0.01, n=40):
    dx = half / np.hypot(1.0, slope)
    return TransitionLine(family="unassigned", x0=x0, y0=y0, slope=slope, slope_stderr=1e-3, position_stderr=1e-5,
                          start=(x0 - dx, y0 - slope * dx), end=(x0 + dx, y0 + slope * dx), n_points=n)


def test_a_nearly_flat_dot2_segment_with_a_positive_measured_slope_stays_in_dot2():
    steep = [_seg(0.02 + 0.02 * k, 0.05, -3.0) for k in range(4)]
    flat = [_seg(0.05, 0.02 + 0.02 * k, s) for k, s in enumerate((-0.03, -0.02, -0.025, +0.01))]
    interdot = [_seg(0.03, 0.03, 1.0, half=0.002, n=6), _seg(0.07, 0.07, 1.1, half=0.002, n=6)]
    names = classify_lines(steep + flat + interdot, AXES)
    assert names[:4] == ["dot1"] * 4
    assert names[4:8] == ["dot2"] * 4  # the +0.01 segment is 1.7° from the family, not an interdot line
    assert names[8:] == ["interdot", "interdot"]
