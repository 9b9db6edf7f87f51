"""Sensor switching offsets (stabtool.fit.switching) and their removal before the map fit.

A charge trap next to the sensor switches it between two levels at random
moments of the sweep (random telegraph noise, common practice, no source); a
row in which it switched keeps a step after the row offsets are removed. The
change-point statistic and binary segmentation are those of Page (1954) and
Scott & Knott (1974); the false-alarm level is checked on white noise.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.analysis import Analyzer
from stabtool.fit.switching import switching_offsets
from stabtool.simulate import quick_double_dot


def test_a_switch_inside_a_row_is_found_at_its_column_and_removed():
    rng = np.random.default_rng(0)
    res = rng.normal(0, 1.0, (60, 120))
    res[20, 70:] += 3.0  # the trap switched at column 70 of row 20: three noise σ for 50 pixels
    res[41, :33] -= 4.0  # and at column 33 of row 41
    sw = switching_offsets(res, 1.0)
    assert [r for r, _, _ in sorted(sw.switches)] == [20, 41]
    assert [abs(c - want) <= 2 for (_, c, _), want in zip(sorted(sw.switches), (70, 33))] == [True, True]
    cleaned = res - sw.offsets
    assert abs(np.median(cleaned[20, 70:]) - np.median(cleaned[20, :70])) < 0.3
    assert abs(np.median(cleaned[41, :33]) - np.median(cleaned[41, 33:])) < 0.3


def test_a_step_below_about_two_and_a_half_noise_sigma_is_left_alone():
    # each side of a switch must hold MIN_UNIFORM_FRACTION = 80 % of its pixels within half the step
    # of its median; for Gaussian noise P(|z| < s/2σ) reaches 0.8 at s ≈ 2.56 σ (scipy.stats.norm)
    from scipy.stats import norm

    assert norm.cdf(1.28) - norm.cdf(-1.28) == pytest.approx(0.8, abs=0.002)
    rng = np.random.default_rng(2)
    res = rng.normal(0, 1.0, (30, 120))
    res[12, 60:] += 2.0
    assert switching_offsets(res, 1.0).n_switches == 0


def test_white_noise_gives_no_switch():
    # the threshold √(2 ln n) + 2 lies above the largest CUSUM statistic of white noise over the map
    hits = sum(switching_offsets(np.random.default_rng(s).normal(0, 1.0, (80, 150)), 1.0).n_switches
               for s in range(5))
    assert hits == 0


def test_a_short_misfit_near_a_line_is_not_a_switch():
    # a line the model misplaces leaves a bump of a few pixels, not a level that holds to the row's end
    rng = np.random.default_rng(1)
    res = rng.normal(0, 1.0, (40, 120))
    res[10, 50:56] += 8.0
    res[25, 60:75] += 2.0 * np.linspace(1, 0, 15)  # a ramp, not a level
    assert switching_offsets(res, 1.0).n_switches == 0


@pytest.mark.regression
@pytest.mark.parametrize("preset, seed", [("si-sige-double", 2), ("si-mos-double", 4), ("ge-double", 3)])
def test_generator_maps_with_a_switching_sensor_give_numbers_within_the_bounds(preset, seed):
    # the generator's telegraph artefact with the trap acting on the sensor only (telegraph_dot_e = 0):
    # the switching is named, the fit without it is within the fitter's bounds (|ΔM| ≤ 0.005 at
    # SNR ≥ 10, Cdg 2 %), and the map stays doubtful (the removal may leave a bias)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sm = quick_double_dot(preset=preset, shape=(160, 160), snr=20.0, rng=seed, telegraph=0.5,
                              telegraph_dot_e=0.0)
        res = Analyzer()(sm.data)
    j, t = res.to_json(), sm.truth.to_json()
    assert any("sensor switching" in w for w in res.quality.warnings)
    assert not j["quality"]["ok"]
    dm = np.abs(np.array(j["virtual_gate_matrix"], float) - np.array(t["virtual_gate_matrix"]))
    assert dm.max() <= 0.005
    dc = np.abs(np.array(j["gate_capacitance_aF"], float) / np.array(t["gate_capacitance_aF"]) - 1)
    assert dc.max() <= 0.02
