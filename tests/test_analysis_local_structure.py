"""A small area the model does not describe is left out of the model fit; structure across the map is not.

The maps are the generator double dot of ``test_fit_refine._sensor_map`` (a drifting
Lorentzian sensor, SNR 20), whose analysis is ok with |ΔM| ≤ 0.005 (the clean-map bound of
the fitter issue, stabtool.bench.bounds). A 6 px spot of 0.2 of the signal range stands for a
local defect (a sensor glitch, a spot of charge noise); a charge trap's extra step along a
whole line of the map stands for a model that is wrong where it matters.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from test_fit_refine import _sensor_map

from stabtool.fit.refine import residual_structure_test


def _with_spot(da, *, amplitude=0.2, centre=(20, 115), radius=6):
    """``da`` with a flat disc of ``amplitude`` × the signal range added (a local defect)."""
    v = np.asarray(da.values, float)
    yy, xx = np.mgrid[0 : v.shape[0], 0 : v.shape[1]]
    disc = (yy - centre[0]) ** 2 + (xx - centre[1]) ** 2 < radius**2
    return da.copy(data=v + amplitude * float(v.max() - v.min()) * disc)


def _analyse(da):
    from stabtool.analysis import Analyzer

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Analyzer(electron_temperature_K=0.12)(da)


def test_structure_test_names_the_box_of_each_significant_tile():
    # white noise with a block of 6 σ (rows 52–63, columns 28–43) inside the tile of rows 48–71 and
    # columns 24–47: that tile is the only hit, and its box (half-open, widened by the difference
    # lag) holds the block and its edges
    rng = np.random.default_rng(5)
    z = rng.normal(size=(96, 96))
    z[52:64, 28:44] += 6.0
    st = residual_structure_test(z, np.zeros_like(z))
    assert st.flagged
    assert st.hits == ((48, 73, 24, 49),)
    # the boxes are tiles of the grid, each at most one tile and the lag wide
    assert all(b[1] - b[0] <= 24 + st.lags[0] and b[3] - b[2] <= 24 + st.lags[1] for b in st.hits)
    assert not residual_structure_test(rng.normal(size=(96, 96)), np.zeros((96, 96))).hits


@pytest.mark.regression
def test_a_local_defect_is_left_out_of_the_model_fit():
    # the spot pulls the model fit of the whole map (M about 0.003–0.005 off, several stated σ);
    # left out, the fit is within 0.001 of the truth and the map is ok, with a note naming the area
    da, truth = _sensor_map(3)
    res = _analyse(_with_spot(da))
    j = res.to_json()
    notes = [w for w in res.quality.warnings if "were left out of the model fit" in w]
    assert len(notes) == 1, res.quality.warnings
    assert not any("sharp residual structure near" in w for w in res.quality.warnings)
    assert j["quality"]["ok"], res.quality.warnings
    dm = np.abs(np.array(j["virtual_gate_matrix"]) - np.array(truth["virtual_gate_matrix"]))
    assert dm.max() <= 0.001


@pytest.mark.regression
def test_a_strong_defect_is_left_out_one_tile_at_a_time():
    # a spot of 0.6 of the signal range pulls the first fit so far that 16 tiles flag, and the
    # worst ones that fit in the share do not cover the spot; left out one flagged tile per fit,
    # the spot's tiles go and the fit is within 0.001 of the truth (with 0.2: see above)
    da, truth = _sensor_map(4)
    res = _analyse(_with_spot(da, amplitude=0.6))
    j = res.to_json()
    assert any("were left out of the model fit" in w for w in res.quality.warnings), res.quality.warnings
    assert j["quality"]["ok"], res.quality.warnings
    dm = np.abs(np.array(j["virtual_gate_matrix"]) - np.array(truth["virtual_gate_matrix"]))
    assert dm.max() <= 0.001
    # the boxes left out hold the spot's centre
    assert any(y0 <= 20 < y1 and x0 <= 115 < x1 for y0, y1, x0, x1 in res.refinement.left_out_px)


@pytest.mark.regression
def test_without_the_refit_the_same_defect_keeps_the_map_doubtful(monkeypatch):
    from stabtool import analysis

    monkeypatch.setattr(analysis, "LOCAL_STRUCTURE_REFIT", False)
    da, _ = _sensor_map(3)
    res = _analyse(_with_spot(da))
    assert not res.quality.ok
    assert any("sharp residual structure near" in w for w in res.quality.warnings)


@pytest.mark.regression
def test_structure_along_a_whole_line_is_not_left_out():
    # a charge trap's step along a line across the map crosses more tiles than may be left out
    # (LOCAL_STRUCTURE_MAX_SHARE): the map stays doubtful and says why
    da, _ = _sensor_map(3, trap=True)
    res = _analyse(da)
    assert not res.quality.ok
    assert any("does not describe the map" in w for w in res.quality.warnings)
    assert not any("were left out of the model fit" in w for w in res.quality.warnings)


def _refinement(params, errors, structure):
    from stabtool.fit.refine import Refinement

    return Refinement(ok=not structure.flagged, params=params, errors=errors, cov=np.zeros((9, 9)), residual_ratio=1.0,
                      noise=1.0, step=(1.0, 1.0), width_resolved=False, stride=(1, 1), converged=True,
                      structure=structure)


def test_the_left_out_area_is_within_the_share_and_a_zero_error_does_not_break_the_note(monkeypatch):
    # a stub model fit: the first flags three tiles of a 48×48 map, the refit flags none and states a
    # zero error on one parameter; with half the map as the share the two worst tiles fit (576 + 576
    # of 2304 pixels), not the third, and the note still reads
    import xarray as xr

    from stabtool import analysis
    from stabtool.fit.refine import PARAM_NAMES, StructureTest

    boxes = ((0, 24, 0, 24), (24, 48, 24, 48), (0, 24, 24, 48))
    flagged = StructureTest(True, 2.0, 9.0, 4.0, (12, 12), 4, 0.5, (1, 1), hits=boxes)
    clean = StructureTest(False, 0.0, 0.0, 4.0, (0, 0), 4, 0.0, (1, 1))
    first = _refinement(dict.fromkeys(PARAM_NAMES, 1.0), dict.fromkeys(PARAM_NAMES, 0.1), flagged)
    seen = []

    def stub(da, fit, **kw):
        seen.append(np.isnan(da.values))
        return _refinement({**dict.fromkeys(PARAM_NAMES, 1.0), "M12": 1.2},
                           {**dict.fromkeys(PARAM_NAMES, 0.1), "M21": 0.0}, clean)

    monkeypatch.setattr("stabtool.fit.refine.refine_model", stub)
    monkeypatch.setattr(analysis, "LOCAL_STRUCTURE_MAX_SHARE", 0.5)
    v = np.linspace(0, 1, 48)
    da = xr.DataArray(np.zeros((48, 48)), coords={"y": v, "x": v}, dims=("y", "x"))
    ref, note = analysis._without_local_structure(da, None, None, first, width_guess_V=None)
    assert len(seen) == 1 and seen[0].sum() == 2 * 576
    assert seen[0][:24, :24].all() and seen[0][24:, 24:].all() and not seen[0][:24, 24:].any()
    assert ref.left_out_px == boxes[:2]
    assert "1152 of 2304 points" in note and "2.0 σ" in note
    # a first fit without sharp structure is returned as it is, without a refit
    plain = _refinement(dict.fromkeys(PARAM_NAMES, 1.0), dict.fromkeys(PARAM_NAMES, 0.1), clean)
    assert analysis._without_local_structure(da, None, None, plain, width_guess_V=None) == (plain, "")
    assert len(seen) == 1
