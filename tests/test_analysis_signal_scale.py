"""The signal's unit does not change the analysis: a sensor current in A, nA or counts gives the same numbers.

Physical results (slopes, virtual gates, addition voltages, capacitances) depend only on where the
lines are, never on the read-out's unit (common practice, no source).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.analysis import Analyzer
from stabtool.mapdata import SIGNAL_RANGE_BAND, signal_gain, signal_range
from stabtool.simulate import quick_double_dot


def _json(da, temperature_K):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Analyzer(electron_temperature_K=temperature_K)(da).to_json()


@pytest.fixture(scope="module")
def sensor_map():
    return quick_double_dot("gaas-double", snr=30.0, rng=4, shape=(100, 100)).data


@pytest.fixture(scope="module")
def probe_map():
    # held-out probe seed 10 (sech² sensor, SNR 20): ok in its own unit; in A (×1e-10) it was doubtful
    from _probe import make_map

    return make_map(10)


@pytest.mark.regression
@pytest.mark.parametrize("unit_factor", [1e-10, 1e5])
def test_the_same_map_in_another_unit_gives_the_same_numbers(probe_map, unit_factor):
    # a.u. → A (1e-10) once turned ok verdicts doubtful and moved M by up to 0.006 on the held-out probe
    T = probe_map.meta["T"]
    ref = _json(probe_map.data, T)
    other = _json(probe_map.data * unit_factor, T)
    assert ref["quality"]["ok"]
    assert other["quality"]["ok"] == ref["quality"]["ok"]
    np.testing.assert_allclose(np.array(other["virtual_gate_matrix"], float),
                               np.array(ref["virtual_gate_matrix"], float), rtol=0, atol=1e-6)
    np.testing.assert_allclose(np.array(other["gate_capacitance_aF"], float),
                               np.array(ref["gate_capacitance_aF"], float), rtol=1e-6)
    assert any(w.startswith("signal multiplied by 2^") for w in other["quality"]["warnings"])
    assert not any(w.startswith("signal multiplied") for w in ref["quality"]["warnings"])


def test_the_gain_is_a_power_of_two_that_brings_the_range_near_one_half(sensor_map):
    assert signal_gain(sensor_map) == 1.0  # the generator's range is inside the band
    for f in (1e-10, 3e-7, 1e4):
        g = signal_gain(sensor_map * f)
        assert np.log2(g) == np.round(np.log2(g))  # exact in floating point
        r = g * signal_range(sensor_map * f)
        assert 0.5 / np.sqrt(2) <= r <= 0.5 * np.sqrt(2) and SIGNAL_RANGE_BAND[0] < r < SIGNAL_RANGE_BAND[1]


def test_the_profile_fits_do_not_depend_on_the_signal_unit():
    # Fermi steps f = 1/(1 + exp((u − u0)/w)) (the conventions' occupation) with noise, some of them
    # unresolved (w ≪ 1 sample): the fits' absolute damping floors once moved crossings by up to
    # 0.0012 px and flipped the usable flag of 2 in 381 profiles of a probe map when Y was doubled
    from stabtool.lines._batchfit import fit_profiles

    rng = np.random.default_rng(3)
    n, hw = 400, 6
    u = np.tile(np.arange(-hw, hw + 1, dtype=float), (n, 1))
    u0 = rng.uniform(-1.5, 1.5, n)[:, None]
    w = np.where(rng.random(n) < 0.3, 0.05, rng.uniform(0.3, 2.0, n))[:, None]
    y = 0.02 / (1.0 + np.exp((u - u0) / w)) + 0.001 * u + rng.normal(0.0, 0.004, u.shape)
    mask = np.ones_like(y, bool)
    ref = fit_profiles(u, y, mask, kind="step", halfwidth=hw)
    for f in (2.0, 2.0**-33, 0.1, 1e-10, 3e4):
        other = fit_profiles(u, y * f, mask, kind="step", halfwidth=hw)
        np.testing.assert_array_equal(other.ok, ref.ok)
        if np.log2(f) == np.round(np.log2(f)):  # a power of two: the same arithmetic, bit for bit
            np.testing.assert_array_equal(other.u0, ref.u0)
        else:  # the same fits up to rounding (far below the 1e-3 px stopping test)
            np.testing.assert_allclose(other.u0[ref.ok], ref.u0[ref.ok], rtol=0, atol=1e-4)
        np.testing.assert_allclose(other.height[ref.ok], f * ref.height[ref.ok], rtol=1e-3)
