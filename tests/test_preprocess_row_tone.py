"""A tone whose phase is random from row to row is found and removed row by row; the lines' pattern is not.

Each row's amplitude and phase follow by linear least squares; the frequency
is the maximum of the rows' summed least-squares power, the maximum-likelihood
frequency of that model in white noise (cf. D. C. Rife and R. R. Boorstyn,
IEEE Trans. Inf. Theory 20, 591 (1974)).
"""

from __future__ import annotations

import numpy as np
import pytest
from _readout import charge_step

from stabtool.preprocess.row_tone import find_row_tone, remove_row_tones
from stabtool.simulate import quick_double_dot


def _map(seed=3, snr=30.0, preset="gaas-double", shape=(150, 180)):
    return np.asarray(quick_double_dot(preset, shape=shape, snr=snr, rng=seed).data.values, float)


def _row_hum(shape, period, amp, seed=0):
    phase = np.random.default_rng(seed).uniform(0, 2 * np.pi, (shape[0], 1))
    return amp * np.sin(2 * np.pi * np.arange(shape[1])[None, :] / period + phase)


@pytest.mark.parametrize("period,rel_amp", [(7.3, 0.5), (17.9, 0.3), (33.1, 0.6)])
def test_a_tone_with_random_row_phases_is_recovered(period, rel_amp):
    v = _map()
    amp = rel_amp * charge_step(v)
    hum = _row_hum(v.shape, period, amp)
    t = find_row_tone(v + hum)
    assert t is not None
    assert t.period_points == pytest.approx(period, rel=5e-3)
    assert t.amplitude == pytest.approx(amp, rel=0.1)
    assert t.coherence < 0.1  # random phases: about ln(n_y)/n_y
    cleaned, tones = remove_row_tones(v + hum)
    assert len(tones) == 1
    assert np.std(cleaned - v) < 0.2 * amp


@pytest.mark.regression
@pytest.mark.parametrize("preset,snr,seed", [("gaas-double", 60.0, 0), ("si-sige-double", 30.0, 1),
                                             ("ge-double", 10.0, 2), ("gaas-double", 4.0, 3)])
def test_the_lines_pattern_is_not_a_row_tone(preset, snr, seed):
    # the dot lines repeat along every row, but their phase moves steadily from row to row
    assert find_row_tone(_map(seed=seed, snr=snr, preset=preset, shape=(160, 200))) is None


def test_a_plane_wave_is_left_to_the_stripes_search():
    # phase stepping by a fixed amount from row to row: coherent, not this model's
    v = _map(seed=4)
    i, j = np.mgrid[0 : v.shape[0], 0 : v.shape[1]]
    assert find_row_tone(v + 0.5 * charge_step(v) * np.sin(2 * np.pi * (j / 11.3 + 0.37 * i))) is None


@pytest.mark.regression
def test_analysis_removes_the_row_tone_and_keeps_the_virtual_gates():
    # held-out probe map with mains pickup on rows started at random moments (probe --noise rowhum,
    # seed 33, SNR 20): removed row by row, the virtual gates within the clean-map bound 0.005
    # (measured 0.0009 off, and ok); before, the map was doubtful and 0.18 off
    from _probe import analysed, make_map

    pm = make_map(33, noise=("rowhum",))
    j = analysed(pm).to_json()
    assert any(w.startswith("periodic pickup removed row by row") for w in j["quality"]["warnings"])
    m, mt = np.array(j["virtual_gate_matrix"]), np.array(pm.truth["virtual_gate_matrix"])
    assert np.max(np.abs(m - mt)) <= 0.005
