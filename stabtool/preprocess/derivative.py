"""Derivatives in volts and denoising."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xarray as xr

from ..errors import InputError
from ._checks import as_map_array
from ._nan import nan_gaussian

__all__ = ["Gradient", "derivatives", "denoise"]


@dataclass(frozen=True)
class Gradient:
    """Partial derivatives of a map along both gates.

    Attributes
    ----------
    d_dx, d_dy : xarray.DataArray, shape (ny, nx)
        ∂s/∂V_x and ∂s/∂V_y in signal units per volt (signed steps of the
        actual, possibly decreasing and unequal, axes are used).
    """

    d_dx: xr.DataArray
    d_dy: xr.DataArray

    def magnitude_px(self, dx: float, dy: float) -> np.ndarray:
        """Gradient magnitude in the isotropic pixel frame, signal units per pixel."""
        return np.hypot(self.d_dx.values * abs(dx), self.d_dy.values * abs(dy))


def _derivatives_core(values: np.ndarray, x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    gy, gx = np.gradient(values, y, x)
    return gx, gy


def derivatives(da: xr.DataArray) -> Gradient:
    """Central-difference derivatives along x and y in signal units per volt.

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)

    Returns
    -------
    Gradient
        ``d_dx`` and ``d_dy``; NaN next to missing points.

    Notes
    -----
    Second-order central differences on the actual coordinates
    (``numpy.gradient``), so decreasing axes and unequal steps give
    derivatives in volts, not pixels.
    """
    values, x, y = as_map_array(da)
    gx, gy = _derivatives_core(values, x, y)
    units = f"{da.attrs.get('units', 'a.u.')}/V"
    return Gradient(
        d_dx=da.copy(data=gx).assign_attrs(units=units),
        d_dy=da.copy(data=gy).assign_attrs(units=units),
    )


def denoise(da: xr.DataArray, *, sigma_px: float = 1.0) -> xr.DataArray:
    """NaN-aware Gaussian smoothing with ``sigma_px`` pixels on both axes.

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)
    sigma_px : float
        Gaussian σ in pixels (the isotropic pixel frame), > 0.

    Returns
    -------
    xarray.DataArray
        Smoothed map; points with no finite neighbour stay NaN.

    Notes
    -----
    Normalised convolution (Knutsson & Westin, CVPR 1993,
    doi:10.1109/CVPR.1993.341081): missing points do not pull the result
    towards zero.
    """
    values, _, _ = as_map_array(da)
    if not (np.isfinite(sigma_px) and sigma_px > 0):
        raise InputError("sigma_px", f"must be a positive number of pixels, got {sigma_px!r}")
    return da.copy(data=nan_gaussian(values, float(sigma_px)))
