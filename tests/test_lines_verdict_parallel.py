"""The parallel-lines check of the detection verdict weighs every line it can, and never skips a family.

Lines of one family share a slope (constant-interaction model: van der Wiel
et al., Rev. Mod. Phys. 75, 1 (2003)); a family whose slopes scatter far
beyond their errors is not one family, and the verdict must say so even when
one of its lines is exactly vertical or has a vanishing stated error.
"""

from __future__ import annotations

import numpy as np

from stabtool.lines.result import LineFamily, TransitionLine
from stabtool.lines.verdict import assess_quality


def _line(family, slope, err):
    return TransitionLine(family=family, x0=0.0, y0=0.0, slope=slope, slope_stderr=err, position_stderr=1e-5,
                          start=(0.0, 0.0), end=(0.01, 0.01), refined=True)


def _families(dot1_slopes, dot1_errors):
    dot1 = tuple(_line("dot1", s, e) for s, e in zip(dot1_slopes, dot1_errors))
    dot2 = tuple(_line("dot2", -0.3, 1e-4) for _ in range(3))
    return {"dot1": LineFamily("dot1", float(np.median(dot1_slopes)), 1e-3, dot1),
            "dot2": LineFamily("dot2", -0.3, 1e-4, dot2)}


def _not_parallel(fams):
    q = assess_quality(fams, (), snr=30.0, min_snr=3.0, excluded_fraction=0.0)
    return [w for w in q.warnings if "dot1 lines are not parallel" in w]


def test_scattered_steep_family_is_flagged():
    assert _not_parallel(_families([-5.0, -5.0, -20.0, -12.0], [0.01] * 4))


def test_a_vertical_line_does_not_hide_the_scatter_of_the_others():
    # slope −inf (1/s = 0 exactly) and a zero stated error once made the weighted mean NaN
    assert _not_parallel(_families([-5.0, -5.0, -20.0, -12.0, -np.inf], [0.01, 0.01, 0.01, 0.01, 0.0]))


def test_parallel_steep_family_with_a_vertical_line_is_not_flagged():
    assert not _not_parallel(_families([-50.0, -50.5, -49.6, -np.inf], [2.0, 2.0, 2.0, np.inf]))
