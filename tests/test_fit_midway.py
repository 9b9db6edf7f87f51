"""Every other transition missed: the map steps midway between the lines used, and no cell is taken.

Truth: the constant-interaction generator (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)): inside a
charge cell the occupation, and so the sensor signal, has no step. Dropping every other line of one
family from a correct detection makes a lattice of twice the true addition voltage that the positions
alone cannot tell from the true one.
"""

from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np
import pytest

from stabtool.analysis import Analyzer
from stabtool.fit import model as fm
from stabtool.simulate import quick_double_dot

MIDWAY_NOTE = "the map steps midway between neighbouring"


def _map_and_fit(preset, rng):
    sm = quick_double_dot(preset, snr=30.0, shape=(160, 160), rng=rng)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        det = Analyzer(refine=False)(sm.data).detection
    return sm, det, fm._fit_once(det, data=sm.data)


def _every_other_line(det, full, family):
    """The detection with the lines of ``family`` whose own-dot label is odd left out."""
    which = 0 if family == "dot1" else 1
    labels = full.lattice.labels1 if which == 0 else full.lattice.labels2
    own = [None if g < 0 else int(labels[g][which]) for g in full.line_groups[which]]
    fam = det.families[family]
    kept = tuple(ln for ln, n in zip(fam.lines, own) if n is not None and n % 2 == 0)
    return replace(det, families={**det.families, family: replace(fam, lines=kept)})


@pytest.mark.parametrize("preset,rng,family", [("gaas-double", 0, "dot2"), ("si-sige-double", 1, "dot2"),
                                               ("ge-double", 1, "dot1"), ("si-mos-double", 0, "dot1")])
def test_a_lattice_of_every_other_line_is_no_cell(preset, rng, family, monkeypatch):
    sm, det, full = _map_and_fit(preset, rng)
    truth = sm.truth.to_json()["addition_voltages_V"]
    i = 0 if family == "dot1" else 1
    # all lines: the true cell (2 %), and no midway step
    assert full.ok and full.addition_V[i] == pytest.approx(truth[family], rel=0.02)
    assert not any(MIDWAY_NOTE in w for w in full.quality.warnings)
    half = _every_other_line(det, full, family)
    # without the test the positions alone give twice the addition voltage, reported as a sound cell
    monkeypatch.setattr(fm, "MIDWAY_TEST", False)
    blind = fm._fit_once(half, data=sm.data)
    assert blind.ok and blind.addition_V[i] == pytest.approx(2 * truth[family], rel=0.02)
    # with it: no cell, and the note names the family
    monkeypatch.setattr(fm, "MIDWAY_TEST", True)
    got = fm._fit_once(half, data=sm.data)
    assert not got.ok and np.all(np.isnan(got.addition_V)) and np.all(np.isnan(got.cdg_aF))
    assert any(w.startswith(f"{MIDWAY_NOTE} {family} lines") and f"ΔV{i + 1} would be twice" in w
               for w in got.quality.warnings)


@pytest.mark.regression
def test_a_sensor_background_that_changes_within_the_cells_is_no_missed_line():
    # held-out probe, sensor coupling 0.1–3, seed 5 (SNR 60): the sensor barely sees dot2 and its
    # background changes across each cell by 71 % of a dot2 step over the halfway cut; the change a
    # quarter and three quarters of the way is as large, so the cell stays (ΔV2 within 2 %)
    from _probe import analysed, make_map

    pm = make_map(5, coupling_ratio=(0.1, 3.0))
    j = analysed(pm).to_json()
    assert not any(MIDWAY_NOTE in w for w in j["quality"]["warnings"])
    truth = pm.truth["addition_voltages_V"]["dot2"]
    assert j["addition_voltages_V"]["dot2"] == pytest.approx(truth, rel=0.02)


@pytest.mark.regression
def test_a_small_map_whose_detector_missed_a_dot2_line_takes_the_true_cell():
    # held-out probe, small maps (60–110 px), seed 10 (92 × 104 px, SNR 20): the detector missed one dot2
    # line (visible by eye), and the lattice of the rest had ΔV2 = 2.00× the truth with M12 0.014 off at a
    # stated 0.0008. With the midway test that pass has no cell, and another pass's cell is the true one
    from _probe import analysed, make_map

    pm = make_map(10, size=(60, 110))
    j = analysed(pm).to_json()
    truth = pm.truth["addition_voltages_V"]["dot2"]
    got = j["addition_voltages_V"]["dot2"]
    assert got is None or got == pytest.approx(truth, rel=0.05)


@pytest.mark.regression
def test_a_sensor_peak_running_between_the_lines_is_no_missed_line():
    # held-out probe, comb sensor (several sensor peaks across the map), seed 604 (SNR 20): its peaks run
    # parallel to the dot2 lines between them, so the halfway cut crosses a peak's flank that the quarter
    # cuts miss (excess 93–99 % of a dot2 step). Sampled twice as far out the excess changes by factors
    # of −5 to 8, where a step keeps it (0.98–1.04 on the generator maps above): the cell stays
    from _probe import analysed, make_map

    pm = make_map(604, sensors=("comb",))
    j = analysed(pm).to_json()
    assert not any(MIDWAY_NOTE in w for w in j["quality"]["warnings"])
    for name in ("dot1", "dot2"):
        assert j["addition_voltages_V"][name] == pytest.approx(pm.truth["addition_voltages_V"][name], rel=0.02)


def test_a_coarsened_cell_goes_back_to_the_finer_one_where_the_map_steps_between(monkeypatch):
    # fit.lattice.coarsest_cell replaces a cell whose dot1 labels all share a residue modulo k by the
    # k-times larger cell, keeping the first as ``finer``. Here every other dot1 line is dropped from a
    # correct detection, and the lattice fit is given the half cell of the same segments as that finer
    # one: the map steps where it predicts the dropped lines, so the finer cell is taken
    from stabtool.fit.lattice import _lattice_from_steps

    sm, det, full = _map_and_fit("si-mos-double", 0)
    truth = sm.truth.to_json()["addition_voltages_V"]["dot1"]
    half = _every_other_line(det, full, "dot1")
    real = fm.fit_lattice

    def with_finer(seg1, seg2, **kw):
        coarse = real(seg1, seg2, **kw)
        dv, dm = coarse.addition_V, coarse.mutual_V
        fine = _lattice_from_steps(seg1, seg2, np.array([dv[0] / 2, dm[1] / 2]), np.array([dv[1], dm[0]]),
                                   interdot_extent=kw["interdot_extent"], err_floor_V=kw["err_floor_V"], n_iter=3)
        assert fine.ok and fine.addition_V[0] == pytest.approx(truth, rel=0.02)
        return replace(coarse, finer=fine)

    monkeypatch.setattr(fm, "fit_lattice", with_finer)
    got = fm._fit_once(half, data=sm.data)
    assert got.ok and got.addition_V[0] == pytest.approx(truth, rel=0.02)
    assert not any(MIDWAY_NOTE in w for w in got.quality.warnings)
    # without the finer cell the same lines give no cell (the drop test above)
    monkeypatch.setattr(fm, "fit_lattice", real)
    assert not fm._fit_once(half, data=sm.data).ok
