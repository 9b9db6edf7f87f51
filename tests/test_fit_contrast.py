"""Which detected lines show a charge step in the map (stabtool.fit.contrast).

Maps of exact vertical steps (dot1-like lines at known x) with white noise of
known σ; the step of each line is then known in units of σ, so the verdicts
follow from the rule's own constants.
"""


import numpy as np
import pytest

from stabtool.fit.contrast import (
    MIN_STEP_FRACTION,
    MIN_STEP_SIGMAS,
    MIN_STEP_SIGMAS_ALONE,
    line_contrast,
)
from stabtool.lines.result import TransitionLine

NY, NX = 120, 160
X = np.linspace(0.0, 0.016, NX)  # 0.1 mV steps
Y = np.linspace(0.0, 0.012, NY)
LINE_X = (0.0025, 0.0055, 0.0085, 0.0115, 0.0145)  # between pixels: every step is a clean one-pixel step


def _lines() -> list[TransitionLine]:
    return [TransitionLine(family="dot1", x0=x, y0=0.006, slope=np.inf, slope_stderr=0.0, position_stderr=1e-5,
                           start=(x, 0.001), end=(x, 0.011)) for x in LINE_X]


def _map(heights, sigma=1.0, seed=0):
    """Steps of the given heights at LINE_X on white noise of std ``sigma``."""
    z = np.zeros((NY, NX))
    for x, h in zip(LINE_X, heights):
        z[:, X > x] += h
    return z + np.random.default_rng(seed).normal(0.0, sigma, z.shape)


def test_clear_lines_of_a_fading_sensor_are_kept_on_request():
    # a peak sensor whose operating point runs down its flank across the map (common practice, no
    # source): the same dot's steps fall from 80 σ to 14 σ per sample. Every line is a true one and
    # the far ones are clear on their own (z ≥ MIN_STEP_SIGMAS_ALONE), though below
    # MIN_STEP_FRACTION of the near ones: the fraction rule sets them aside, keep_clear keeps them
    heights = (80.0, 50.0, 30.0, 20.0, 14.0)
    z = _map(heights)
    con = line_contrast(z, X, Y, _lines(), which=0, noise=1.0, keep_clear=True)
    assert np.all(con.z >= MIN_STEP_SIGMAS_ALONE), con.z
    assert np.abs(con.step[-1]) < MIN_STEP_FRACTION * np.percentile(np.abs(con.step), 80)
    assert con.keep.all()
    np.testing.assert_allclose(np.abs(con.step), heights, rtol=0.1)
    strict = line_contrast(z, X, Y, _lines(), which=0, noise=1.0)
    assert strict.keep.tolist() == [True, True, True, True, False]


def test_a_weak_step_beside_strong_ones_is_still_set_aside():
    # the fraction rule stays for steps that are significant but not clear on their own: 3 σ per
    # sample (z ≈ 8, above MIN_STEP_SIGMAS and below MIN_STEP_SIGMAS_ALONE) beside steps of 30 σ
    heights = (30.0, 30.0, 3.0, 30.0, 30.0)
    con = line_contrast(_map(heights, seed=1), X, Y, _lines(), which=0, noise=1.0, keep_clear=True)
    assert MIN_STEP_SIGMAS <= con.z[2] < MIN_STEP_SIGMAS_ALONE, con.z
    assert con.keep.tolist() == [True, True, False, True, True]


def test_no_step_no_line():
    # a line drawn where the map has no step at all is set aside by the significance test
    heights = (20.0, 20.0, 0.0, 20.0, 20.0)
    con = line_contrast(_map(heights, seed=2), X, Y, _lines(), which=0, noise=1.0, keep_clear=True)
    assert con.z[2] < MIN_STEP_SIGMAS
    assert con.keep.tolist() == [True, True, False, True, True]


@pytest.mark.regression
def test_a_map_whose_sensor_fades_across_it_gets_its_cell():
    # held-out probe seed 55 (sech² sensor, SNR 60): the operating point runs down the peak's flank,
    # so the right half's lines step 3–4× less than the left half's (z ≈ 85–125 against 385–470).
    # With the fraction rule alone no two dot1 lines bound one band and the map had no cell; the
    # lines kept as clear on their own give the truth's addition voltages (constant-interaction
    # model, van der Wiel et al., RMP 75, 1 (2003)) within 0.5 % and Cdg within the 2 % bound
    from _probe import analysed, make_map

    pm = make_map(55)
    j = analysed(pm).to_json()
    assert any("sensitivity varies over the map" in w for w in j["quality"]["warnings"])
    t = pm.truth
    for dot in ("dot1", "dot2"):
        assert j["addition_voltages_V"][dot] == pytest.approx(t["addition_voltages_V"][dot], rel=0.005)
    cdg, cdg_t = np.array(j["gate_capacitance_aF"], float), np.array(t["gate_capacitance_aF"])
    assert np.all(np.abs(cdg / cdg_t - 1) <= 0.02)
    assert np.max(np.abs(np.array(j["virtual_gate_matrix"]) - np.array(t["virtual_gate_matrix"]))) <= 0.005
