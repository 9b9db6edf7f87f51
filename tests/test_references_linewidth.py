"""Line-width energy reference (stabtool.fit.linewidth) against generator truth.

Truth: stabtool.simulate at a known T_e (charge read-out, white noise). Widths
are measured with stabtool.fit.fermi across one dot1 line (along x) and one
dot2 line (along y). Bound from the specification: α within 5 % when lines
are ≥ 3 pixels wide.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import constants

from stabtool.errors import InputError
from stabtool.fit.fermi import fit_fermi_step
from stabtool.fit.linewidth import lever_arms_from_line_widths
from stabtool.lines.result import TransitionLine

from _references import longest_segment, midpoint, preset_truth, window

HALF = 1.5e-3
STEP = 2 * HALF / 160


def _measured_line(truth, family, *, temp, noise, seed, n_across=161):
    seg = longest_segment(truth, family)
    c = midpoint(seg)
    shape = (21, n_across) if family == "dot1" else (n_across, 21)
    sm = window(truth, c, HALF, shape, temperature_K=temp, readout="charge", rng=seed)
    data = sm.data.values + np.random.default_rng(seed).normal(0, noise, sm.data.shape)
    xs = sm.data[sm.data.dims[1]].values
    ys = sm.data[sm.data.dims[0]].values
    cuts, v = (data, xs) if family == "dot1" else (data.T, ys)
    fits = [f for f in (fit_fermi_step(v, row) for row in cuts[::2]) if f]
    w = np.array([f.width_V for f in fits])
    e = np.array([f.width_stderr_V for f in fits])
    wt = 1 / e**2
    return TransitionLine(family, c[0], c[1], seg.slope, 0.0, 0.0, seg.start, seg.end,
                          width_V=float(np.sum(wt * w) / np.sum(wt)), width_stderr_V=float(np.sqrt(1 / np.sum(wt))))


@pytest.mark.regression
def test_line_width_lever_arms_within_5_percent():
    truth = preset_truth()
    alpha = np.array(truth.lever_arm)
    lines = [_measured_line(truth, f, temp=0.1, noise=0.02, seed=s) for f, s in (("dot1", 1), ("dot2", 2))]
    ref = lever_arms_from_line_widths(lines, electron_temperature_K=0.1, x_step_V=STEP, y_step_V=STEP,
                                      alpha_ratio=alpha[0, 0] / alpha[1, 1])
    assert min(ref.dot1.width_pixels, ref.dot2.width_pixels) >= 3
    assert ref.quality.ok, ref.quality.warnings
    assert ref.dot1.lever_arm == pytest.approx(alpha[0, 0], rel=0.05)
    assert ref.dot2.lever_arm == pytest.approx(alpha[1, 1], rel=0.05)
    # α = k_B T/(e w) with scipy.constants
    assert ref.dot1.lever_arm == pytest.approx(constants.k * 0.1 / (constants.e * ref.dot1.width_V), rel=1e-9)


def _line(family, w, e=None):
    return TransitionLine(family, 0.0, 0.0, -3.0 if family == "dot1" else -0.3, 0.0, 0.0, (0, 0), (1, 1),
                          width_V=w, width_stderr_V=e if e is not None else 0.02 * w)


def test_resolution_limited_width_is_doubtful():
    ref = lever_arms_from_line_widths([_line("dot1", 1.5e-4), _line("dot2", 1.5e-4)],
                                      electron_temperature_K=0.1, x_step_V=1e-4, y_step_V=1e-5)
    assert not ref.quality.ok
    assert any("dot1" in m and "resolution-limited" in m for m in ref.quality.warnings)
    assert not any("dot2" in m and "resolution-limited" in m for m in ref.quality.warnings)


def test_family_broader_than_thermal_is_reported():
    # diagram ratio α11/α22 = 1, but dot2 lines are 40 % wider
    ref = lever_arms_from_line_widths([_line("dot1", 1e-4), _line("dot2", 1.4e-4)],
                                      electron_temperature_K=0.1, x_step_V=1e-5, y_step_V=1e-5, alpha_ratio=1.0)
    assert not ref.quality.ok
    assert any("dot2 lines are 40 % broader than thermal" in m for m in ref.quality.warnings)


def test_lines_of_one_dot_that_disagree_are_reported():
    lines = [_line("dot1", 1e-4, 1e-6), _line("dot1", 1.3e-4, 1e-6), _line("dot2", 1e-4)]
    ref = lever_arms_from_line_widths(lines, electron_temperature_K=0.1, x_step_V=1e-5, y_step_V=1e-5)
    assert any("disagree" in m for m in ref.quality.warnings)


def test_missing_temperature_is_an_input_error():
    with pytest.raises(InputError, match="positive temperature"):
        lever_arms_from_line_widths([], electron_temperature_K=0.0, x_step_V=1e-5, y_step_V=1e-5)
