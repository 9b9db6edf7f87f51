"""The map data model: a 2-D :class:`xarray.DataArray` of a two-gate sweep.

Conventions (shared by every module):

* ``data[iy, ix]``: the **last dimension is x**, the first is y;
* dimension names are the gate names; coordinates are float64 volts with
  ``units="V"`` and the file's unit in ``original_units``;
* the measured quantity keeps its name (``DataArray.name``) and unit
  (``attrs["units"]``); the source file is ``attrs["source"]``;
* axes may decrease and have unequal steps: all geometry is done in volts;
* missing points (an interrupted sweep) are NaN.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import xarray as xr

from .errors import InputError, PartialSweepWarning
from .units import to_volts

__all__ = ["PLAUSIBLE_GATE_V", "SIGNAL_RANGE_BAND", "MapAxes", "implausible_gate_voltages", "infinities_as_missing",
           "make_map", "map_axes", "share_of_points", "signal_gain", "signal_range", "validate_map",
           "without_infinities", "x_gate", "y_gate"]


@dataclass(frozen=True)
class MapAxes:
    """Voltage axes of a map, in volts, in the stored order.

    Attributes
    ----------
    x, y : ndarray, shape (nx,), (ny,)
        Gate voltages along x (last dimension) and y (first dimension), V.
    x_gate, y_gate : str
        Gate names.
    """

    x: np.ndarray
    y: np.ndarray
    x_gate: str
    y_gate: str

    @property
    def dx(self) -> float:
        """Median signed x step, V."""
        return float(np.median(np.diff(self.x))) if self.x.size > 1 else float("nan")

    @property
    def dy(self) -> float:
        """Median signed y step, V."""
        return float(np.median(np.diff(self.y))) if self.y.size > 1 else float("nan")


def x_gate(da: xr.DataArray) -> str:
    """Name of the gate on x (the last dimension)."""
    return str(da.dims[-1])


def y_gate(da: xr.DataArray) -> str:
    """Name of the gate on y (the first dimension)."""
    return str(da.dims[0])


def map_axes(da: xr.DataArray) -> MapAxes:
    """Return the voltage axes of ``da`` as a :class:`MapAxes` record."""
    xg, yg = x_gate(da), y_gate(da)
    return MapAxes(
        x=np.asarray(da[xg].values, dtype=np.float64),
        y=np.asarray(da[yg].values, dtype=np.float64),
        x_gate=xg,
        y_gate=yg,
    )


def make_map(
    signal: np.ndarray,
    x: np.ndarray,
    y: np.ndarray,
    *,
    x_gate: str = "x",
    y_gate: str = "y",
    name: str = "signal",
    units: str = "a.u.",
    x_units: str = "V",
    y_units: str = "V",
    source: str | None = None,
    attrs: Mapping[str, Any] | None = None,
) -> xr.DataArray:
    """Build a map in the stabtool data model.

    Parameters
    ----------
    signal : array_like, shape (ny, nx)
        Measured quantity, ``signal[iy, ix]``.
    x, y : array_like, shape (nx,), (ny,)
        Gate voltages in ``x_units`` / ``y_units``; converted to volts.
    x_gate, y_gate : str
        Gate names, used as dimension names.
    name, units : str
        Name and unit of the measured quantity.
    x_units, y_units : str
        Units of ``x`` and ``y`` as given (kept as ``original_units``).
    source : str, optional
        Path of the file the map came from.
    attrs : mapping, optional
        Further attributes of the map.

    Returns
    -------
    xarray.DataArray
        Dims ``(y_gate, x_gate)``, coordinates in volts.
    """
    if x_gate == y_gate:
        raise InputError(source, f"x and y gates have the same name {x_gate!r}")
    data = require_real_numbers(signal, f"variable {name!r}", source)
    xv = to_volts(require_real_numbers(x, f"axis {x_gate!r}", source), x_units)
    yv = to_volts(require_real_numbers(y, f"axis {y_gate!r}", source), y_units)
    da = xr.DataArray(
        data,
        dims=(y_gate, x_gate),
        coords={
            y_gate: (y_gate, yv, {"units": "V", "original_units": y_units or "V"}),
            x_gate: (x_gate, xv, {"units": "V", "original_units": x_units or "V"}),
        },
        name=name,
        attrs={"units": units, **(dict(attrs) if attrs else {})},
    )
    if source is not None:
        da.attrs["source"] = str(source)
    return da


def require_real_numbers(values: Any, what: str, source: str | None) -> np.ndarray:
    """``values`` as float64, or :class:`~stabtool.errors.InputError` when they are not real numbers.

    Integers and booleans are read as numbers. Complex values (I + iQ) are refused rather than
    silently losing their imaginary part (the file readers project an I/Q map onto its principal
    axis before this), and so are text, dates and objects.
    ``what`` names the array in the message (``"axis 'PA'"``, ``"variable 'sensor'"``).
    """
    arr = np.asarray(values)
    kind = arr.dtype
    if np.issubdtype(kind, np.integer) or np.issubdtype(kind, np.floating) or np.issubdtype(kind, np.bool_):
        return arr.astype(np.float64, copy=False)  # (no copy of a float64 map, as np.asarray before)
    if np.issubdtype(kind, np.complexfloating):
        raise InputError(source, f"{what} holds complex values (I + iQ); take one real quantity first "
                         "(stabtool.load projects an I/Q map onto its principal axis)")
    if np.issubdtype(kind, np.str_) or np.issubdtype(kind, np.bytes_):
        held = "text"
    elif np.issubdtype(kind, np.datetime64) or np.issubdtype(kind, np.timedelta64):
        held = "times or dates"
    else:
        held = f"values of type {kind}"
    raise InputError(source, f"{what} holds {held}, not numbers")


def _check_axis(values: np.ndarray, gate: str, source: str | None) -> None:
    if values.size < 2:
        raise InputError(source, f"axis {gate!r} has {values.size} point(s); a map needs at least 2")
    if not np.all(np.isfinite(values)):
        raise InputError(source, f"axis {gate!r} holds non-finite voltages")
    steps = np.diff(values)
    if not (np.all(steps > 0) or np.all(steps < 0)):
        raise InputError(
            source,
            f"axis {gate!r} is not monotonic (steps change sign or repeat); "
            "a sweep axis must strictly increase or decrease",
        )


def without_infinities(da: xr.DataArray, *, source: str | None = None) -> xr.DataArray:
    """``da`` with its infinite points made missing (NaN); ``da`` itself when it has none.

    An instrument writes ±inf for an overflowed or failed read-out; such a
    point carries no signal, like a point the sweep never reached, and every
    step of the analysis is NaN-aware. Warns :class:`PartialSweepWarning`
    with the fraction (the NaN count of :func:`validate_map` then includes them).
    """
    values = np.asarray(da.values)
    if not np.issubdtype(values.dtype, np.floating):
        return da
    finite_or_nan = infinities_as_missing(values)
    if finite_or_nan is values:
        return da
    src = source if source is not None else da.attrs.get("source")
    warnings.warn(
        f"{src or 'map'}: {share_of_points(np.isinf(values))} are infinite (overflow or a failed "
        "read-out); treated as missing",
        PartialSweepWarning,
        stacklevel=2,
    )
    return da.copy(data=finite_or_nan)


def share_of_points(mask: np.ndarray) -> str:
    """``"12 of 4096 points (0.29 %)"``: how many of a map's points ``mask`` marks, readable for a few too."""
    n, total = int(np.count_nonzero(mask)), int(np.size(mask))
    pct = 100.0 * n / max(total, 1)
    return f"{n} of {total} points ({pct:.2g} %)" if pct < 1 else f"{n} of {total} points ({pct:.1f} %)"


def infinities_as_missing(values: np.ndarray) -> np.ndarray:
    """``values`` (float) with ±inf made NaN; the array itself when it holds none (see :func:`without_infinities`)."""
    inf = np.isinf(values)
    return np.where(inf, np.nan, values) if inf.any() else values


def validate_map(da: xr.DataArray, *, source: str | None = None) -> xr.DataArray:
    """Check that ``da`` is a usable map; return it unchanged.

    Raises :class:`~stabtool.errors.InputError` for 1-D or 3-D data, bad axes,
    all-NaN or constant maps; warns :class:`PartialSweepWarning` when points
    are missing.
    """
    src = source if source is not None else da.attrs.get("source")
    if not isinstance(da, xr.DataArray):
        raise InputError(src, f"expected an xarray.DataArray, got {type(da).__name__}")
    if da.ndim != 2:
        raise InputError(
            src,
            f"expected 2-D data (y, x), got {da.ndim}-D with dims {tuple(map(str, da.dims))}",
        )
    for dim in da.dims:
        if dim not in da.coords:
            raise InputError(src, f"dimension {dim!r} has no voltage coordinate")
        axis = require_real_numbers(da[dim].values, f"axis {dim!r}", src)
        _check_axis(axis, str(dim), src)
    values = require_real_numbers(da.values, f"variable {da.name!r}" if da.name is not None else "the map", src)
    finite = np.isfinite(values)
    if not finite.any():
        raise InputError(src, "the map holds no finite values (all NaN or infinite)")
    if np.nanmax(values) == np.nanmin(values):
        raise InputError(src, "the map is constant; there is nothing to analyse")
    if not finite.all():
        warnings.warn(
            f"{src or 'map'}: {share_of_points(~finite)} are missing (NaN)",
            PartialSweepWarning,
            stacklevel=2,
        )
    return da


#: Largest gate voltage (V) taken at face value: the gates of a gate-defined dot device stay within a
#: few volts (common practice, no source); a coordinate beyond it is most likely in mV without a unit.
PLAUSIBLE_GATE_V = 20.0


def implausible_gate_voltages(da: xr.DataArray) -> str | None:
    """A one-line doubt when a gate coordinate (in volts) reaches beyond :data:`PLAUSIBLE_GATE_V`, else None."""
    far = []
    for dim in da.dims:
        v = np.asarray(da[dim].values, float)
        top = float(np.nanmax(np.abs(v))) if v.size and np.isfinite(v).any() else 0.0
        if top > PLAUSIBLE_GATE_V:
            far.append(f"{dim} reaches {top:.4g} V")
    if not far:
        return None
    return (f"gate voltages read as volts: {', '.join(far)}, beyond the few volts of a dot device's gates; "
            "if they are mV, give the coordinates a units attribute (slopes and the virtual-gate matrix do not "
            "depend on it; capacitances, addition voltages and lever arms do)")


#: Signals whose 5–95 % range lies within this band are analysed as they are; others are multiplied
#: by a power of two (exact in floating point) that brings the range to about 0.5. The pipeline
#: carries absolute damping terms and floors, so its results depend on the signal's unit: held-out
#: probe seeds 0–11 analysed in A (×1e-10) lost both their ok verdicts and their M errors changed by
#: up to 0.006. The band holds every generator, probe (ranges 0.04–1.18) and sample map, whose
#: results stay as they were.
SIGNAL_RANGE_BAND = (2.0**-6, 2.0**3)


def signal_range(da: xr.DataArray | np.ndarray) -> float:
    """The 5–95 % range of the map's finite values (their full range when that is zero; NaN if none)."""
    v = np.asarray(da.values if isinstance(da, xr.DataArray) else da, float)
    v = v[np.isfinite(v)]
    if v.size < 2:
        return float("nan")
    lo, hi = np.percentile(v, [5.0, 95.0])
    r = float(hi - lo)
    return r if r > 0 else float(np.ptp(v))


def signal_gain(da: xr.DataArray) -> float:
    """The power of two the analysis multiplies the signal by (1 within :data:`SIGNAL_RANGE_BAND`)."""
    r = signal_range(da)
    if not (np.isfinite(r) and r > 0) or SIGNAL_RANGE_BAND[0] <= r <= SIGNAL_RANGE_BAND[1]:
        return 1.0
    return float(2.0 ** -np.round(np.log2(r / 0.5)))

