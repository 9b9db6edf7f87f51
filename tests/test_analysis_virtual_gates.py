"""Maps swept along virtual gates: the dot lines run along the axes.

A lab that has measured its virtual-gate matrix re-measures the double dot
along the virtual plungers to check it: each then moves its own dot only, so
dot1 lines run along y and dot2 lines along x, and a matrix a few per cent
off tilts a family either way, to positive slopes too (common practice, no
source). On such gates the capacitance of a dot to the other dot's virtual
plunger is negative: ``Cdg = Cdd·α`` (constant-interaction model, van der
Wiel et al., Rev. Mod. Phys. 75, 1 (2003)) with the cross lever arm
``α_ij = 0`` gives ``Cdg_ij = −C_m α_jj``.

Truth: the generator's virtual gates (``Device.with_virtual_gates``), built
from the true lever arms.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.analysis import analyze
from stabtool.fit.uncertainty import VIRTUAL_GATE_CROSSTALK, negative_capacitances
from stabtool.lines import detect_lines
from stabtool.simulate import Artefacts, presets, simulate_map
from stabtool.simulate.quick import double_dot_window


def virtual_gate_map(preset: str, matrix_error=(0.0, 0.0), *, snr: float = 30.0, rng: int = 0):
    """A preset double dot swept along the virtual plungers of its true matrix plus ``matrix_error``.

    ``matrix_error``: added to the off-diagonal elements (M12, M21) of the
    true virtual-gate matrix before it is inverted into the sweep directions.
    """
    dev = presets.get(preset)
    g = list(dev.gate_names)[:2]
    a = dev.lever_arm[:2, :2]
    m = a / np.diag(a)[:, None]
    minv = np.linalg.inv(m + np.array([[0.0, matrix_error[0]], [matrix_error[1], 0.0]]))
    xd = {g[0]: float(minv[0, 0]), g[1]: float(minv[1, 0])}
    yd = {g[0]: float(minv[0, 1]), g[1]: float(minv[1, 1])}
    vdev = dev.with_virtual_gates({"vA": xd, "vB": yd})
    xr_, yr_ = double_dot_window(vdev, x_gate="vA", y_gate="vB", electrons=5.0)
    return simulate_map(dev, x_gate="vA", y_gate="vB", x_range_V=xr_, y_range_V=yr_, shape=(150, 150),
                        x_direction=xd, y_direction=yd, temperature_K=0.06, artefacts=Artefacts(snr=snr), rng=rng)


def _analysed(sm):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return analyze(sm.data)


def test_the_truth_of_a_virtual_plunger_pair_has_negative_cross_capacitances():
    # Cdg = Cdd·α with α diagonal: the off-diagonal Cdg_ij = Cdd_ij α_jj = −C_m α_jj (derivation above)
    sm = virtual_gate_map("gaas-double")
    t = sm.truth.quantities
    cdg, alpha = np.array(t["gate_capacitance_aF"]), np.array(t["lever_arm"])
    cdd = np.asarray(presets.get("gaas-double").cdd)[:2, :2]
    np.testing.assert_allclose(alpha[[0, 1], [1, 0]], 0.0, atol=1e-12)
    np.testing.assert_allclose(cdg[[0, 1], [1, 0]], [cdd[0, 1] * alpha[1, 1], cdd[1, 0] * alpha[0, 0]], rtol=1e-9)
    assert np.all(cdg[[0, 1], [1, 0]] < 0)


def test_a_map_on_the_true_virtual_gates_is_ok_with_its_negative_cross_capacitances():
    sm = virtual_gate_map("gaas-double")
    res = _analysed(sm)
    j, t = res.to_json(), sm.truth.quantities
    assert j["quality"]["ok"], res.quality.warnings
    # issue bounds of an ok clean map: virtual gates within 0.005, Cdg within 2 % on every element
    np.testing.assert_allclose(j["virtual_gate_matrix"], t["virtual_gate_matrix"], atol=0.005)
    cdg, true = np.array(j["gate_capacitance_aF"]), np.array(t["gate_capacitance_aF"])
    assert np.all(np.abs(cdg / true - 1) <= 0.02)
    assert np.all(cdg[[0, 1], [1, 0]] < 0)
    notes = [w for w in res.quality.warnings if "as on virtual gates" in w]
    assert len(notes) == 2 and all(w.startswith("gate capacitance Cdg") for w in notes)


@pytest.mark.slow  # (about 15 s: the unit tests of test_lines_families.py hold the rule)
def test_a_family_tilted_to_positive_slopes_by_a_matrix_a_few_percent_off_is_found():
    # the sweep's matrix is off by (+0.05, −0.03): the dot1 lines lean to positive slopes, and the
    # sign test alone named them interdot lines (no dot1 family, no numbers)
    sm = virtual_gate_map("gaas-double", (0.05, -0.03))
    t = sm.truth.quantities
    assert t["slopes"]["dot1"] > 0 > t["slopes"]["dot2"]
    res = _analysed(sm)
    assert len(res.detection.family("dot1")) >= 3 and len(res.detection.family("dot2")) >= 3
    j = res.to_json()
    m, err = np.array(j["virtual_gate_matrix"]), np.array(j["virtual_gate_matrix_error"])
    true = np.array(t["virtual_gate_matrix"])
    # (its verdict may be doubtful; the numbers it gives stand within 3 stated errors)
    assert np.all(np.abs(m - true) <= 3 * err + 1e-12)
    cdg, cerr = np.array(j["gate_capacitance_aF"]), np.array(j["gate_capacitance_aF_error"])
    assert np.all(np.abs(cdg - np.array(t["gate_capacitance_aF"])) <= 3 * cerr)


def test_lines_sharper_than_a_pixel_along_the_axes_state_the_pixel_limited_error():
    # si-sige-double on a coarse grid (2 mV per pixel, lines far sharper): each band piece of a dot
    # line is ~20 px tall and leans by under a pixel, so it fixes its cross-talk only to ±1/20.
    # Read as independent points, the pieces gave M12 = −0.0041 ± 0.0012 and M21 = 0.0085 ± 0.0023
    # against the truth −0.043 and 0.045 (pulls 33 and 16).
    sm = virtual_gate_map("si-sige-double", (0.04, -0.04))
    res = _analysed(sm)
    j, t = res.to_json(), sm.truth.quantities
    m, err = np.array(j["virtual_gate_matrix"]), np.array(j["virtual_gate_matrix_error"])
    true = np.array(t["virtual_gate_matrix"])
    assert np.all(np.abs(true[[0, 1], [1, 0]]) > 0.04)
    assert np.all(np.abs(m - true)[[0, 1], [1, 0]] <= 3 * err[[0, 1], [1, 0]])
    assert not j["quality"]["ok"]
    # the charge lattice stands: every Cdg within 3 stated errors and the 2 % bound (keeping the
    # points past a pixel step let stray segments into the lattice: ΔV1 half the truth, Cdg11 75 % off)
    cdg, cerr = np.array(j["gate_capacitance_aF"]), np.array(j["gate_capacitance_aF_error"])
    true_cdg = np.array(t["gate_capacitance_aF"])
    assert np.all(np.abs(cdg - true_cdg) <= 3 * cerr)
    assert np.all(np.abs(cdg / true_cdg - 1) <= 0.02)
    # and the user is told why, and what would resolve it
    assert any(w.startswith("dot1 lines are sharper than a pixel") and "finer steps along the x gate" in w
               for w in res.quality.warnings)


def test_detected_segments_sharper_than_a_pixel_along_the_axes_state_the_pixel_limit():
    # the same map's detected band pieces, 3–23 px tall: each leans by under a pixel or two, so its
    # own slope is known to about ±1 px over its length. Read as independent points, 9 of the 37
    # dot segments stated slopes beyond 3 errors of the truth (median |pull| 1.8 and 1.5).
    sm = virtual_gate_map("si-sige-double", (0.04, -0.04))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        det = detect_lines(sm.data)
    truth = sm.truth.quantities["slopes"]
    pulls = []
    for ln in det.family("dot1").lines:  # as dx/dy: the cross-talk −M12 of a near-vertical family
        if np.isfinite(ln.slope) and ln.slope != 0:
            pulls.append((1 / ln.slope - 1 / truth["dot1"]) / (ln.slope_stderr / ln.slope**2))
    pulls += [(ln.slope - truth["dot2"]) / ln.slope_stderr for ln in det.family("dot2").lines]
    pulls = np.abs(pulls)
    assert len(pulls) >= 20
    # a normal spread leaves 0.3 % beyond 3σ; allow a tenth for the pieces' ends near triple points
    assert np.mean(pulls > 3) <= 0.1, np.round(pulls, 1)


@pytest.mark.parametrize("m12, m21, doubtful", [(0.002, 0.05, False), (-0.04, -0.01, False), (0.3, 0.05, True),
                                                (0.002, 0.25, True), (None, None, True)])
def test_a_negative_cross_capacitance_is_a_doubt_unless_both_cross_talks_are_near_zero(m12, m21, doubtful):
    # (physical plungers of neighbouring dots have cross-talk of 0.1-0.5: common practice, no source)
    cdg, err = np.array([[20.0, -1.5], [3.0, 18.0]]), np.full((2, 2), 0.05)
    vg = None if m12 is None else np.array([[1.0, m12], [m21, 1.0]])
    ((text, flag),) = negative_capacitances(cdg, err, vg)
    assert flag is doubtful and text.startswith("gate capacitance Cdg12")
    assert ("mislabelled" in text) is doubtful and ("virtual gates" in text) is not doubtful
    # a negative element larger than half the other dot's own (−10 of 18 aF) is no mutual capacitance
    if not doubtful:
        assert max(abs(m12), abs(m21)) < VIRTUAL_GATE_CROSSTALK
        ((text, flag),) = negative_capacitances(np.array([[20.0, -10.0], [3.0, 18.0]]), err, vg)
        assert flag and "mislabelled" in text
    # within 3 stated errors of zero it is not reported at all
    assert negative_capacitances(np.array([[20.0, -0.1], [3.0, 18.0]]), err, vg) == []
