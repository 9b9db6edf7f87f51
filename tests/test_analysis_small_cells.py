"""Maps whose charge cells are only a few pixels across (stabtool.analysis).

A quick survey or a coarse overnight sweep may have 40–90 pixels per axis; a
charge cell then spans 7–25 pixels and a dot line's piece between two lines of
the other dot may be shorter than the detector's shortest segment (8 px). When
the first detections give no charge cell, the analysis detects again with
segments down to ``SHORT_SEGMENT_PX``. Truth is the generator's
constant-interaction model (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003));
the bounds are the fitter's (clean maps: virtual-gate elements within 0.005,
Cdg within 2 %).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

#: held-out probe maps of 40–90 px whose first detections give no charge cell: seed 4, a sech²
#: sensor (SNR 60, 9 dot1 and too few dot2 segments of 8 px); seed 25, an I/Q sensor on a 46 × 80
#: map (SNR 60) whose dot2 pieces between the dot1 lines are 5–8 px long
SMALL_MAPS = [4, 25]


@pytest.mark.regression
@pytest.mark.parametrize("seed", SMALL_MAPS)
def test_short_dot_line_pieces_are_used_when_the_cell_needs_them(seed):
    from _probe import analysed, make_map

    from stabtool.analysis import Analyzer
    from stabtool.lines.detector import LineDetector

    pm = make_map(seed, size=(40, 90))
    res = analysed(pm)
    t = pm.truth
    assert res.diagram.ok, res.quality.warnings
    assert any("segments down to" in w for w in res.quality.warnings)
    out = res.to_json()
    m, m_err = np.asarray(out["virtual_gate_matrix"]), np.asarray(out["virtual_gate_matrix_error"])
    off = np.abs(m - np.asarray(t["virtual_gate_matrix"]))
    assert off.max() <= 0.005
    # the stated errors cover the actual ones (3σ)
    assert np.all(off <= 3 * m_err + 1e-12)
    cdg, cdg_t = np.asarray(out["gate_capacitance_aF"]), np.asarray(t["gate_capacitance_aF"])
    assert np.abs(cdg / cdg_t - 1).max() <= 0.02
    # the first detection alone (a detector given by the caller is used as it is) has no cell
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        first = Analyzer(electron_temperature_K=pm.meta["T"], detector=LineDetector())(pm.data)
    assert not first.diagram.ok
    assert first.to_json()["virtual_gate_matrix"][0][1] is None



@pytest.mark.regression
def test_pieces_of_broad_lines_or_of_noisy_maps_are_not_tried_as_short_segments():
    # a segment shorter than twice the line's width has no direction of its own (common practice,
    # no source): the retry is made only when the first detection's edges are at most 2.5 px broad
    # and the map is clean (SNR ≥ 10, the fitter's own definition)
    from dataclasses import replace

    from _probe import make_map

    from stabtool.analysis import CLEAN_SNR, SHORT_SEGMENT_PX, _with_short_segments
    from stabtool.lines import detect_lines

    pm = make_map(25, size=(40, 90))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        first = detect_lines(pm.data)
        assert first.edge_width_px <= SHORT_SEGMENT_PX / 2
        assert _with_short_segments(pm.data, first) is not None
        for width in (SHORT_SEGMENT_PX, 10.0, float("nan")):
            assert _with_short_segments(pm.data, replace(first, edge_width_px=width)) is None
        # nor on maps that are not clean: on noisy maps 5-px pieces gave matrices 0.06–0.15 off
        assert _with_short_segments(pm.data, replace(first, snr=CLEAN_SNR - 1)) is None
