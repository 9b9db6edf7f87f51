"""Smooth sensor background and slow-axis row offsets.

A charge sensor turns each charge transition into a step on a smooth, often
non-monotonic background (the sensor's own Coulomb peak: its flanks give
steps of opposite sign, so the polarity of the lines can flip across the
map). Slow drifts of the sensor (1/f noise) add an offset per row of the slow
axis. Both are removed here; later steps only use polarity-independent
quantities (gradient magnitude) or the local sign of a step.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ._checks import as_map_array
from ._nan import nan_gaussian

__all__ = ["remove_background", "correct_row_offsets", "default_background_sigma"]


def default_background_sigma(shape: tuple[int, int]) -> float:
    """Default background scale in pixels: a tenth of the larger side, at least 8."""
    return float(max(8.0, 0.1 * max(shape)))


def _background_core(values: np.ndarray, sigma_px: float) -> np.ndarray:
    bg = nan_gaussian(values, sigma_px)
    return values - bg


def remove_background(da: xr.DataArray, *, sigma_px: float | None = None) -> xr.DataArray:
    """Subtract the smooth sensor background (a wide NaN-aware Gaussian).

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)
        The map; NaN marks missing points and stays NaN.
    sigma_px : float, optional
        Width of the background Gaussian in pixels (default: a tenth of the
        larger side, at least 8 px). It must be wider than the line spacing
        for the steps to survive as steps.

    Returns
    -------
    xarray.DataArray
        Same shape, coordinates and attributes; the background subtracted.

    Notes
    -----
    A high-pass by normalised convolution (Knutsson & Westin, CVPR 1993,
    doi:10.1109/CVPR.1993.341081). Step edges keep their position and height
    locally; only variations slower than ``sigma_px`` are removed.
    """
    values, _, _ = as_map_array(da)
    s = default_background_sigma(values.shape) if sigma_px is None else float(sigma_px)
    if not s > 0:
        from ..errors import InputError

        raise InputError("sigma_px", f"must be > 0, got {sigma_px!r}")
    return da.copy(data=_background_core(values, s))


def _row_offsets_core(values: np.ndarray) -> np.ndarray:
    """Per-row offsets (length ny) from medians of consecutive-row differences."""
    d = np.diff(values, axis=0)
    steps = np.zeros(values.shape[0])
    import warnings

    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        fin = np.isfinite(d)
        cnt = fin.sum(axis=1)
        if d.size and fin.all():
            # no NaN: the plain median (in place on the scratch differences) is far faster
            # (one selection of the upper middle value; for an even count the lower one is
            # the largest value below it)
            h = d.shape[1] // 2
            d.partition(h, axis=1)
            rowmed = d[:, h].copy()
            if d.shape[1] % 2 == 0:
                rowmed = (d[:, :h].max(axis=1) + rowmed) / 2
        else:
            rowmed = np.nanmedian(np.where(fin, d, np.nan), axis=1) if d.size else 0.0
        med = np.where(cnt >= 3, rowmed, 0.0)
    med = np.nan_to_num(med)
    steps[1:] = med
    off = np.cumsum(steps)
    return off - np.median(off)


def correct_row_offsets(da: xr.DataArray) -> xr.DataArray:
    """Remove an offset per row of the slow axis (y), robustly.

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)

    Returns
    -------
    xarray.DataArray
        The map minus the cumulative sum of the median difference between
        consecutive rows.

    Notes
    -----
    The median over a row ignores the few pixels where a transition line
    crosses between the two rows, so lines survive while offsets common to a
    whole row (1/f noise of the sensor on the slow axis, sensor telegraph
    switching between sweeps) vanish. Slow background trends along y are
    removed as well, which is harmless for edge detection. A transition line
    parallel to the rows over more than half of the row would be removed too
    (common practice, no source).
    """
    values, _, _ = as_map_array(da)
    off = _row_offsets_core(values)
    return da.copy(data=values - off[:, None])
