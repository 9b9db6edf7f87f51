"""Input checks shared by the pre-processing and line-detection steps."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..errors import InputError
from ..mapdata import MapAxes, map_axes


def as_map_array(da: xr.DataArray, *, name: str = "da") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Check a map and return ``(values, x, y)`` as float64 arrays (no copy of coords)."""
    axes = check_map(da, name=name)
    return np.asarray(da.values, dtype=np.float64), axes.x, axes.y


def check_map(da: xr.DataArray, *, name: str = "da", min_size: int = 8) -> MapAxes:
    """Validate a map for image processing; return its axes.

    Raises :class:`InputError` naming the parameter (or the map's source file).
    """
    if not isinstance(da, xr.DataArray):
        raise InputError(name, f"expected an xarray.DataArray map, got {type(da).__name__}")
    src = da.attrs.get("source", name)
    if da.ndim != 2:
        raise InputError(src, f"expected a 2-D map (y, x), got {da.ndim}-D with dims {tuple(map(str, da.dims))}")
    for dim in da.dims:
        if dim not in da.coords:
            raise InputError(src, f"dimension {dim!r} has no voltage coordinate")
    axes = map_axes(da)
    for gate, v in ((axes.x_gate, axes.x), (axes.y_gate, axes.y)):
        if v.size < min_size:
            raise InputError(src, f"axis {gate!r} has {v.size} points; line detection needs at least {min_size}")
        if not np.all(np.isfinite(v)):
            raise InputError(src, f"axis {gate!r} holds non-finite voltages")
        st = np.diff(v)
        if not (np.all(st > 0) or np.all(st < 0)):
            raise InputError(src, f"axis {gate!r} is not strictly monotonic")
    vals = np.asarray(da.values)
    if not np.issubdtype(vals.dtype, np.number):
        raise InputError(src, f"map values must be numeric, got dtype {vals.dtype}")
    fin = np.isfinite(vals)
    if fin.sum() < 16:
        raise InputError(src, "the map holds fewer than 16 finite values")
    if np.nanmax(vals) == np.nanmin(vals):
        raise InputError(src, "the map is constant; there is nothing to analyse")
    return axes
