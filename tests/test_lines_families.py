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


def test_on_virtual_gates_a_family_tilted_to_positive_slopes_is_still_a_dot_family():
    # A map swept along virtual gates: each virtual plunger moves its own dot only, so dot1 lines run
    # along y and dot2 lines along x, and an estimate of the virtual-gate matrix a few per cent off
    # tilts a whole family to positive slopes (common practice, no source). The interdot segments
    # run between the axes (here at 45°) and stay interdot lines.
    dot1 = [_seg(0.02 + 0.02 * k, 0.05, 30.0 + k) for k in range(4)]  # 88° from the x axis, all positive
    dot2 = [_seg(0.05, 0.02 + 0.02 * k, -0.03 + 0.002 * k) for k in range(4)]
    interdot = [_seg(0.03 + 0.02 * k, 0.03, 1.0, half=0.002, n=6) for k in range(3)]
    assert classify_lines(dot1 + dot2 + interdot, AXES) == ["dot1"] * 4 + ["dot2"] * 4 + ["interdot"] * 3
    # and with both families tilted to positive slopes
    dot2_up = [_seg(0.05, 0.02 + 0.02 * k, 0.03 + 0.002 * k) for k in range(4)]
    assert classify_lines(dot1 + dot2_up + interdot, AXES) == ["dot1"] * 4 + ["dot2"] * 4 + ["interdot"] * 3


def test_positive_lines_near_an_axis_are_not_taken_while_both_dot_families_are_found():
    # the sign test stands on physical gates: with both negative families present, a parallel set of
    # positive segments near the x axis is not a third dot family but stays interdot (or unassigned)
    dot1 = [_seg(0.02 + 0.02 * k, 0.05, -3.0) for k in range(4)]
    dot2 = [_seg(0.05, 0.02 + 0.02 * k, -0.5) for k in range(4)]
    flat_up = [_seg(0.05 + 0.01 * k, 0.03, 0.08, half=0.003, n=8) for k in range(3)]  # 4.6° up
    names = classify_lines(dot1 + dot2 + flat_up, AXES)
    assert names[:8] == ["dot1"] * 4 + ["dot2"] * 4
    assert "dot2" not in names[8:] and "dot1" not in names[8:]


def test_one_positive_line_near_an_axis_does_not_make_a_family():
    dot2 = [_seg(0.05, 0.02 + 0.02 * k, -0.4) for k in range(4)]
    lone = [_seg(0.05, 0.05, 40.0)]  # one steep positive segment: no dot1 family from it
    names = classify_lines(dot2 + lone, AXES)
    assert names[:4] == ["dot2"] * 4 and names[4] != "dot1"
