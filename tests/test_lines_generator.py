"""Line detection on maps of the project's generator (stabtool.simulate).

Truth slopes come from the generator's constant-interaction parameters
(s1 = −α11/α12, s2 = −α21/α22; van der Wiel et al., Rev. Mod. Phys. 75, 1
(2003)). All four double-dot presets, seed 0, 192² maps.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.lines import detect_lines
from stabtool.simulate import quick_double_dot

PRESETS = ["si-sige-double", "gaas-double", "si-mos-double", "ge-double"]


def _errors(preset: str, snr: float, seed: int = 0):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sm = quick_double_dot(preset=preset, shape=(192, 192), snr=snr, rng=seed)
    truth = sm.truth.to_json()["slopes"]
    res = detect_lines(sm.data)
    errs = np.array([abs(res.family(f).slope / truth[f] - 1) for f in ("dot1", "dot2")])
    # a family off by more than 2 % must not be reported as trustworthy
    if errs.max() > 0.02:
        assert not res.quality.ok, (preset, snr, errs, res.quality)
    return errs


@pytest.mark.regression
def test_generator_clean_maps_median_slope_error_half_percent():
    errs = np.concatenate([_errors(p, 10.0) for p in PRESETS])
    assert np.median(errs) <= 0.005


@pytest.mark.regression
def test_generator_snr3_maps_median_slope_error_two_percent():
    errs = np.concatenate([_errors(p, 3.0) for p in PRESETS])
    assert np.median(errs) <= 0.02


def _run(preset: str, **artefacts):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        sm = quick_double_dot(preset=preset, shape=(192, 192), snr=10.0, rng=0, **artefacts)
    truth = sm.truth.to_json()
    res = detect_lines(sm.data)
    errs = np.array([abs(res.family(f).slope / truth["slopes"][f] - 1) for f in ("dot1", "dot2")])
    return sm, truth, res, errs


@pytest.mark.regression
def test_generator_charge_jump_found_at_its_row():
    _, truth, res, errs = _run("gaas-double", charge_jumps=1, jump_size_e=1.0)
    true_rows = [j["row"] for j in truth["artefacts"]["charge_jump_list"]]
    assert any(abs(j.row - r) <= 2 for j in res.jumps for r in true_rows)
    assert any("charge jump" in w for w in res.quality.warnings)
    assert np.all(errs <= 0.01)


@pytest.mark.regression
def test_generator_telegraph_noise_is_either_harmless_or_flagged():
    _, _, res, errs = _run("ge-double", telegraph=1.0, telegraph_dot_e=0.1, telegraph_dwell_px=1500)
    assert np.all(errs <= 0.01) or not res.quality.ok


@pytest.mark.regression
def test_generator_interrupted_decreasing_sweep():
    _, _, res, errs = _run("gaas-double", interrupted=0.3, decreasing_x=True, decreasing_y=True)
    assert np.all(errs <= 0.02)
    assert any("missing" in w for w in res.quality.warnings)


@pytest.mark.regression
def test_generator_128px_maps_are_never_confidently_wrong():
    # at 128² the dot segments are ~10 rows long and the slope goal (0.5 %) is
    # not reached on every map; a family off by more than 2 % must then be
    # reported doubtful (seeds 1 of every preset, SNR 10)
    for preset in PRESETS:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            sm = quick_double_dot(preset=preset, shape=(128, 128), snr=10.0, rng=1)
        truth = sm.truth.to_json()["slopes"]
        res = detect_lines(sm.data)
        errs = np.array([abs(res.family(f).slope / truth[f] - 1) for f in ("dot1", "dot2")])
        assert np.all(np.isfinite(errs)), preset
        if errs.max() > 0.02:
            assert not res.quality.ok, (preset, errs, res.quality)
