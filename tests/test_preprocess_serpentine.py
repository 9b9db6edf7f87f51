"""Alternate rows shifted along the fast axis (a serpentine sweep read with a lag) are found and aligned.

The shift is the least-squares displacement of B. D. Lucas and T. Kanade
(Proc. 7th IJCAI, 674 (1981)) with the row parity as the only unknown; a
shift applied by interpolation to a generator map must come back to a few
hundredths of a pixel, and maps swept one way must not show one.
"""

from __future__ import annotations

import numpy as np
import pytest
from _readout import serpentine_low_pass

from stabtool.preprocess.serpentine import MIN_SHIFT_PX, align_alternate_rows, alternate_row_shift
from stabtool.simulate import quick_double_dot


def _map(seed=3, snr=30.0, preset="gaas-double"):
    return np.asarray(quick_double_dot(preset, shape=(120, 140), snr=snr, rng=seed).data.values, float)


def _shift_rows(v, odd_px, even_px):
    """Each row moved along x by a known amount (scipy's linear interpolation, NaN outside)."""
    from scipy.ndimage import shift

    out = np.empty_like(v)
    for k in range(v.shape[0]):
        out[k] = shift(v[k], odd_px if k % 2 else even_px, order=1, mode="constant", cval=np.nan)
    return out


@pytest.mark.parametrize("s", [0.4, -1.0, 2.5])
def test_known_alternate_shift_is_recovered(s):
    v = _shift_rows(_map(), s / 2, -s / 2)  # odd rows' features s beyond the even rows'
    r = alternate_row_shift(v)
    assert r.significant
    assert r.shift_px == pytest.approx(s, abs=max(0.03, 4 * r.stderr_px))


@pytest.mark.parametrize("seed,snr,preset", [(1, 30.0, "gaas-double"), (2, 5.0, "si-sige-double"),
                                             (3, 10.0, "si-mos-double"), (4, 3.0, "ge-double")])
def test_a_one_way_sweep_shows_no_shift(seed, snr, preset):
    r = alternate_row_shift(_map(seed, snr, preset))
    assert not r.significant, r
    assert abs(r.shift_px) < MIN_SHIFT_PX


def test_aligning_removes_the_shift_and_keeps_missing_points_missing():
    v = _map()
    v[40:50, 60:70] = np.nan
    moved = _shift_rows(v, 0.75, -0.75)
    r = alternate_row_shift(moved)
    again = alternate_row_shift(align_alternate_rows(moved, r.shift_px))
    assert abs(again.shift_px) < 0.03
    aligned = align_alternate_rows(moved, r.shift_px)
    assert np.isnan(aligned[45, 65])
    # away from the borders and the gap the aligned map is the original to interpolation accuracy
    core = (slice(2, -2), slice(5, -5))
    diff = np.abs(aligned - v)[core]
    step = np.nanmedian(np.abs(np.diff(v, axis=1)))
    assert np.nanmedian(diff) < step


def test_one_pole_low_pass_on_a_serpentine_sweep_is_found_and_aligned():
    # y_n = (1 − a) x_n + a y_(n−1) smears a step by a one-sided exponential of mean a/(1 − a)
    # points (from memory: the mean of the geometric distribution); rows alternate direction, so
    # odd rows move against even ones by twice the delay of each. The least-squares shift of a
    # one-sided smear lies between its mode (0) and its mean: |shift| between 1 and 2 means.
    v = _map(5, 60.0)
    a = np.exp(-1 / 1.5)
    mean_delay = a / (1 - a)
    flat = serpentine_low_pass(v, a)
    r = alternate_row_shift(flat)
    assert r.significant and r.shift_px < 0
    assert mean_delay <= abs(r.shift_px) <= 2 * mean_delay
    # aligned, each parity sits where the unfiltered rows do (the delays cancel on the midpoint)
    aligned = align_alternate_rows(flat, r.shift_px)
    for parity in (0, 1):
        both = np.full_like(v, np.nan)
        both[parity::2] = aligned[parity::2]
        both[1 - parity::2] = v[1 - parity::2]
        assert abs(alternate_row_shift(both).shift_px) < 0.1 * mean_delay


@pytest.mark.regression
def test_analysis_undoes_a_serpentine_low_pass_and_keeps_the_virtual_gates():
    # a generator map swept back and forth through a one-pole low-pass of 1.5 points: the analysis
    # measures the filter from the noise, undoes it in each row's direction (which removes the
    # zig-zag), says so, and the virtual gates stay within the clean-map bound 0.005 of the issue
    # (measured 0.0006 on this seed; 0.0007 with the rows only aligned, 0.0003 without the lag)
    import warnings

    from stabtool.analysis import Analyzer

    sm = quick_double_dot("si-sige-double", shape=(140, 140), snr=30.0, rng=1)
    v = np.asarray(sm.data.values, float)
    a = np.exp(-1 / 1.5)
    flat = serpentine_low_pass(v, a)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer()(sm.data.copy(data=flat)).to_json()
    note = [w for w in j["quality"]["warnings"] if w.startswith("read-out low-pass")]
    assert note and "back and forth" in note[0]
    tau = float(note[0].split("time constant ")[1].split(" ")[0])
    assert abs(tau - 1.5) < 0.2
    m, mt = np.array(j["virtual_gate_matrix"]), np.array(sm.truth.to_json()["virtual_gate_matrix"])
    assert np.max(np.abs(m - mt)) <= 0.005


@pytest.mark.regression
def test_lag_smeared_lines_give_no_temperature_lever_arm():
    # held-out probe map (serpentine sweep through a one-pole low-pass of 0.5–3 points, seed 10):
    # with the rows only aligned, the smear broadened the dot1 lines to 9× their thermal width and
    # the temperature gave α11 = 0.031 against a true 0.28 with a stated 8.5 %. With the low-pass
    # undone the lines are resolution-limited (0.6 px FWHM, measured), as the truth's are: no lever arm.

    from _probe import analysed, make_map

    pm = make_map(10, noise=("lag",))
    j = analysed(pm).to_json()
    assert j["lever_arm"] is None
    ws = j["quality"]["warnings"]
    assert any(w.startswith("read-out low-pass") for w in ws)
    assert any(w.startswith("dot1 lines are") and "resolution-limited" in w for w in ws)


def test_widths_smeared_by_the_remaining_lag_are_not_used():
    # a smear of 0.5·10⁻⁴ V along x: across a dot1 line (cut along x) half of its 10⁻⁴ V width,
    # beyond the 0.4 the rule allows; across a dot2 line of slope −0.5 (cut along y) a quarter
    from types import SimpleNamespace

    from stabtool.analysis import LAG_WIDTH_FRACTION, _lag_broadened
    from stabtool.quality import Quality

    assert 0.25 < LAG_WIDTH_FRACTION < 0.5
    fit = SimpleNamespace(slopes={"dot1": -3.0, "dot2": -0.5})
    ws, q = _lag_broadened(np.array([1e-4, 1e-4]), fit, 0.5e-4, Quality())
    assert np.isnan(ws[0]) and ws[1] == 1e-4
    assert any(w.startswith("dot1 lines: the read-out lag smears them by 0.50") for w in q.warnings)
    same, q0 = _lag_broadened(np.array([1e-4, 1e-4]), fit, 0.0, Quality())
    assert np.all(same == 1e-4) and not q0.warnings
