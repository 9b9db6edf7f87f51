"""Steps or peaks: the level ratio of a map's lines (stabtool.lines.profile_shape).

A charge read-out steps across every line, its derivative along a gate (a lock-in on that gate)
peaks there: d/dx of a Fermi step is the symmetric 4F(1 − F)/w shape (the conventions' Fermi
function). Truth: the constant-interaction generator (van der Wiel et al., Rev. Mod. Phys. 75, 1
(2003)).
"""

from __future__ import annotations

import numpy as np
import pytest
from _readout import lockin, staircase

from stabtool.lines import detect_lines
from stabtool.lines.profile_shape import PEAK_RATIO, line_shape
from stabtool.mapdata import make_map
from stabtool.simulate import quick_double_dot


@pytest.mark.parametrize("preset,snr", [("gaas-double", None), ("si-mos-double", 20.0), ("ge-double", 8.0)])
def test_a_charge_map_steps_and_its_derivative_peaks(preset, snr):
    steps = quick_double_dot(preset, snr=snr, rng=2).data
    shape = line_shape(detect_lines(steps))
    assert shape.ratio > 0.5 and not shape.peaks
    peaks = lockin(quick_double_dot(preset, snr=None, rng=2).data, snr, 2)
    shape = line_shape(detect_lines(peaks))
    assert shape.n_lines >= 3 and shape.ratio < PEAK_RATIO and shape.peaks


def test_one_dots_staircase_steps_and_its_derivative_peaks():
    v = staircase(slope=-2.5, spacing_px=22.35, noise=0.002)
    x, y = np.linspace(0, 0.1, v.shape[1]), np.linspace(0, 0.08, v.shape[0])
    assert not line_shape(detect_lines(make_map(v, x, y))).peaks
    assert line_shape(detect_lines(make_map(np.gradient(v, axis=1), x, y))).peaks


def test_too_few_lines_give_no_verdict():
    x = np.arange(100, dtype=float)
    v = np.tile(1.0 / (1.0 + np.exp(-(x - 50.0) / 0.7)), (80, 1))  # one straight line
    da = make_map(v + np.random.default_rng(1).normal(0, 0.01, v.shape), x * 1e-3, np.arange(80) * 1e-3)
    shape = line_shape(detect_lines(da))
    assert np.isnan(shape.ratio) and not shape.peaks


@pytest.mark.parametrize("preset", ["gaas-double", "si-mos-double"])
def test_the_peaks_areas_tell_which_gate_was_modulated(preset):
    # summed across a line along the modulated axis a derivative steps by the sensor's step of that dot;
    # the hypothesis that gives the two dots comparable steps wins
    da = quick_double_dot(preset, snr=None, rng=1).data
    v = np.asarray(da.values, float)
    assert line_shape(detect_lines(da.copy(data=np.gradient(v, axis=1)))).axis == "x"
    assert line_shape(detect_lines(da.copy(data=np.gradient(v, axis=0)))).axis == "y"
