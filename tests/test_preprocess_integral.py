"""The integral of a derivative map along its rows (stabtool.preprocess.integral).

References: the trapezoid rule as implemented by ``scipy.integrate.cumulative_trapezoid``;
the Fermi step of the conventions (``stabtool.physics.thermal.fermi_occupation``).
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy.integrate import cumulative_trapezoid

from stabtool.physics.thermal import fermi_occupation
from stabtool.preprocess.integral import integral_along, without_spikes


def _map(values):
    ny, nx = values.shape
    return xr.DataArray(values, dims=("PB", "PA"),
                        coords={"PA": np.linspace(0, 0.1, nx), "PB": np.linspace(0, 0.08, ny)})


def test_the_sum_is_scipys_trapezoid_rule_started_half_a_point_in():
    # S_i = Σ_{k<i} P_k + P_i/2 = cumulative_trapezoid(P)_i + P_0/2 (unit spacing); one row, so no
    # row offset to take off
    p = np.random.default_rng(3).normal(size=(1, 40))
    s = integral_along(_map(p), "x").values
    expected = cumulative_trapezoid(p, axis=1, initial=0.0) + 0.5 * p[:, :1]
    np.testing.assert_allclose(s, expected, rtol=0, atol=1e-12)


def test_offsets_of_whole_rows_of_the_derivative_add_no_ramps():
    # a lock-in's offset drifting from row to row would be summed into a ramp per row
    rng = np.random.default_rng(4)
    x = np.arange(80, dtype=float)
    y = np.arange(60, dtype=float)[:, None]
    v = sum(1.0 - fermi_occupation(x + 0.4 * y, c, 0.7) for c in (20.0, 45.0, 70.0))
    p = np.gradient(v, axis=1)
    clean = integral_along(_map(p), "x").values
    shifted = integral_along(_map(p + rng.normal(0.0, 0.05, (60, 1))), "x").values
    # the same up to one constant per row and one ramp common to all rows (the offsets are known up to a
    # common level, which the analysis's background removal takes off), and up to the lines' own bias
    # of the row medians: the clean map has no offsets, so none are taken off there (4e-6 over 80
    # points; left in, the offsets would give ramps up to 0.11 × 80 ≈ 9)
    d = shifted - clean
    d = d - d[:1]
    assert np.abs(d - d[:, :1]).max() < 1e-4


def _noisy_derivative(rng):
    """The x-derivative of three Fermi steps (slope −2.5 px/px, width 0.7 px) on 90 × 120 points, white noise 0.01."""
    x = np.arange(120, dtype=float)
    y = np.arange(90, dtype=float)[:, None]
    v = sum(1.0 - fermi_occupation(x + 0.4 * y, c, 0.7) for c in (20.0, 55.0, 90.0))
    return np.gradient(v, axis=1) + rng.normal(0.0, 0.01, (90, 120))


def test_a_derivative_without_row_offsets_gets_no_ramps_from_their_estimates():
    # white noise only: no row offsets to take off, and taking off the estimates would add ramps of
    # their own errors, σ·√(π/n) from one row to the next (asymptotic variance of a sample median of n
    # differences, π/2·2σ²/n; common practice, no source)
    p = _noisy_derivative(np.random.default_rng(5))
    s = integral_along(_map(p), "x").values
    d = s - (cumulative_trapezoid(p, axis=1, initial=0.0) + 0.5 * p[:, :1])
    ramp = (d[:, -1] - d[:, 0]) / 119.0  # per-row slope added by the sum's corrections
    median_error = 0.01 * np.sqrt(np.pi / 120)  # 0.0016
    assert np.std(np.diff(ramp)) < 0.2 * median_error


def test_a_row_random_walk_in_the_derivative_is_taken_off_before_the_sum():
    # the same map with a random walk of 0.3 σ per row added (a lock-in offset drifting from row to row):
    # summed as it is, row r would carry a ramp of its offset times the column index; taken off, what
    # is left is the median estimates' error, σ·√(π/n) ≈ 0.16 σ per row step at n = 120
    rng = np.random.default_rng(5)
    p = _noisy_derivative(rng)
    walk = np.cumsum(rng.normal(0.0, 0.003, 90))[:, None]
    s = integral_along(_map(p + walk), "x").values
    clean = cumulative_trapezoid(p, axis=1, initial=0.0) + 0.5 * p[:, :1]
    d = s - clean
    ramp = (d[:, -1] - d[:, 0]) / 119.0  # per-row slope left in the sum
    # from row to row it changes by the median estimates' error (asymptotic variance of a sample median
    # of n differences, π/2·2σ²/n; common practice, no source), not by the walk's 0.3 σ
    median_error = 0.01 * np.sqrt(np.pi / 120)  # 0.0016
    assert np.std(np.diff(ramp)) < 1.3 * median_error < np.std(np.diff(walk[:, 0]))


@pytest.mark.parametrize("centre", [30.0, 30.25, 30.5, 30.8])
def test_the_integral_of_a_steps_derivative_crosses_half_height_at_the_step(centre):
    # a lock-in's central difference of a Fermi step, summed: the half-height crossing is the step's
    # centre (a plain cumulative sum puts it half a point early)
    x = np.arange(64, dtype=float)
    step = 1.0 - fermi_occupation(x, centre, 0.8)
    p = np.gradient(np.tile(step, (3, 1)), axis=1)
    s = integral_along(_map(p), "x").values[1]
    level = 0.5 * (s[5] + s[-5])
    i = int(np.flatnonzero(s > level)[0])
    crossing = i - 1 + (level - s[i - 1]) / (s[i] - s[i - 1])
    assert crossing == pytest.approx(centre, abs=0.02)


def test_missing_points_stay_missing_and_add_nothing():
    p = np.ones((4, 20))
    p[1, 5] = np.nan
    s = integral_along(_map(p), "x").values
    assert np.isnan(s[1, 5]) and np.isfinite(np.delete(s.ravel(), 25)).all()
    assert s[1, 10] == pytest.approx(s[0, 10] - 1.0)  # one point of 1 fewer in the sum


def test_isolated_spikes_go_but_one_pixel_ridges_stay():
    rng = np.random.default_rng(5)
    p = rng.normal(0.0, 1.0, (80, 90))
    ridges = np.zeros_like(p)
    ridges[:, 20] = 20.0  # a vertical ridge one pixel wide (a steep line)
    ridges[40, :] = -20.0  # a horizontal one (a shallow line)
    rr = np.arange(80)
    ridges[rr, 50 + rr // 3] = 20.0  # a steep diagonal one
    spikes = np.zeros_like(p)
    where = (np.array([10, 25, 60, 70, 5]), np.array([70, 35, 10, 80, 60]))
    spikes[where] = [30.0, -25.0, 40.0, 30.0, -35.0]
    out = without_spikes(p + ridges + spikes, 1.0)
    assert np.abs(out[where]).max() < 5.0  # the spikes are gone
    changed = out != p + ridges + spikes
    assert changed.sum() == len(where[0])  # nothing else moved, no ridge pixel among them


def test_a_noiseless_map_loses_nothing_to_the_spike_rule():
    # without noise every line end stands many σ off its median: the rule also needs the point to stand
    # above the map's strong features and alone
    x = np.arange(60, dtype=float)
    y = np.arange(50, dtype=float)[:, None]
    v = sum(1.0 - fermi_occupation(x + 0.3 * y, c, 0.5) for c in (12.0, 31.0, 47.0))
    p = np.gradient(v, axis=1)
    assert (without_spikes(p, 1e-9) == p).all()


def test_summed_along_y_a_steps_derivative_crosses_half_height_at_the_step():
    # a lock-in on the y gate: the sum runs down the columns; each column's offset is taken off
    y = np.arange(64, dtype=float)
    step = 1.0 - fermi_occupation(y, 30.25, 0.8)
    v = np.tile(step[:, None], (1, 5)) + np.arange(5)[None, :]  # columns at different levels
    s = integral_along(_map(np.gradient(v, axis=0)), "y").values[:, 2]
    level = 0.5 * (s[5] + s[-5])
    i = int(np.flatnonzero(s > level)[0])
    assert i - 1 + (level - s[i - 1]) / (s[i] - s[i - 1]) == pytest.approx(30.25, abs=0.02)


def test_an_unknown_axis_is_refused():
    with pytest.raises(ValueError, match="axis"):
        integral_along(_map(np.ones((4, 4))), "z")
