"""Pre-processing steps: noise estimate, row offsets, derivatives, denoising, background."""

from __future__ import annotations

import numpy as np
import pytest

from stabtool.errors import InputError
from stabtool.mapdata import make_map
from stabtool.preprocess import (
    correct_row_offsets,
    denoise,
    derivatives,
    estimate_noise_level,
    remove_background,
)


def _steps_map(rng=0, sigma=0.05, n=96):
    g = np.random.default_rng(rng)
    x = np.linspace(0, 1, n)
    X, Y = np.meshgrid(x, x)
    clean = np.floor(4 * (X + 0.3 * Y))  # parallel steps of height 1
    return make_map(clean + g.normal(0, sigma, (n, n)), x, x), clean


def test_noise_level_matches_the_added_white_noise():
    # MAD estimator of a Gaussian σ (Hampel 1974); the step edges are a small minority
    da, _ = _steps_map(sigma=0.05)
    assert estimate_noise_level(da) == pytest.approx(0.05, rel=0.1)


def test_row_offsets_are_removed_and_steps_kept():
    da, clean = _steps_map(sigma=0.01)
    offs = np.cumsum(np.random.default_rng(3).normal(0, 0.5, da.shape[0]))  # 1/f-like random walk
    out = correct_row_offsets(da.copy(data=da.values + offs[:, None])).values
    resid = out - clean
    resid -= np.median(resid)
    assert np.median(np.abs(resid)) < 0.02
    # the step heights along x are untouched
    assert np.median(np.abs(np.diff(out, axis=1))[np.diff(clean, axis=1) > 0]) == pytest.approx(1.0, abs=0.05)


def test_derivatives_in_volts_on_decreasing_unequal_axes():
    x = np.linspace(0.2, -0.1, 31)  # decreasing, step -10 mV
    y = np.linspace(0.0, 0.05, 11)  # step 5 mV
    X, Y = np.meshgrid(x, y)
    da = make_map(3.0 * X - 7.0 * Y, x, y)
    g = derivatives(da)
    np.testing.assert_allclose(g.d_dx.values, 3.0, rtol=1e-10)
    np.testing.assert_allclose(g.d_dy.values, -7.0, rtol=1e-10)


def test_denoise_ignores_nan_and_keeps_far_gaps_missing():
    da, _ = _steps_map(sigma=0.1)
    vals = da.values.copy()
    vals[50, 40] = np.nan
    vals[80:] = np.nan
    out = denoise(da.copy(data=vals), sigma_px=1.0).values
    assert np.isfinite(out[50, 40])  # isolated hole filled from neighbours
    assert np.all(np.isnan(out[90:]))  # beyond the kernel's reach: still missing
    # white noise through a σ = 1 px Gaussian: pixel-difference noise drops well below half
    assert estimate_noise_level(da.copy(data=out)) < 0.5 * estimate_noise_level(da)


def test_background_removal_flattens_a_smooth_sensor_background():
    da, clean = _steps_map(sigma=0.0)
    x = da["x"].values
    X, Y = np.meshgrid(x, x)
    bg = 20 * np.exp(-((X - 0.3) ** 2 + (Y - 0.6) ** 2) / 0.5)
    out = remove_background(da.copy(data=clean + bg), sigma_px=10).values
    ref = remove_background(da.copy(data=clean), sigma_px=10).values
    inner = (slice(20, -20), slice(20, -20))
    # at least 90 % of the background's variation is removed in the interior
    assert np.max(np.abs(out - ref)[inner]) < 0.1 * np.ptp(bg[inner])


def test_bad_inputs_give_one_line_errors():
    da, _ = _steps_map()
    with pytest.raises(InputError, match="sigma_px"):
        denoise(da, sigma_px=0)
    with pytest.raises(InputError, match="expected an xarray.DataArray"):
        derivatives(np.zeros((10, 10)))
    with pytest.raises(InputError, match="constant"):
        estimate_noise_level(da.copy(data=np.ones(da.shape)))
