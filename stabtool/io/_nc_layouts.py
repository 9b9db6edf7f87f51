"""Other NetCDF layouts of a map, brought to the one the reader expects.

The reader (:mod:`.netcdf`) expects a 2-D variable whose dimensions carry
index coordinates with the gate voltages (``sensor(PB, PA)`` with ``PA(PA)``,
``PB(PB)``). Measurement software also writes:

* **gate coordinates on other dimensions** — ``sensor(y, x)`` with the gate
  voltages in 1-D variables ``PA(x)``, ``PB(y)`` (coordinates or data
  variables): each such dimension takes the one numeric, strictly monotonic
  1-D variable along it as its gate (:func:`with_gate_dimensions`);
* **set-point grids** — ``PA(y, x)``, ``PB(y, x)`` as 2-D arrays (a meshgrid
  of the set-points): accepted when each is constant along one dimension
  (to 1e-6 of its span, read-back jitter aside) and reduced to 1-D;
* **I and Q as two variables** — ``I(PB, PA)``, ``Q(PB, PA)`` (or
  ``sensor_I``, ``sensor_Q``) beside no other map: read as one complex map
  (:func:`iq_pair`), which the reader projects on its principal I/Q axis;
* **a flat point list** — every point of the sweep along one dimension,
  ``PA(point)``, ``PB(point)``, ``sensor(point)``, in measurement order
  (:func:`flat_point_map`): the grid is rebuilt as for a long text table
  (:func:`stabtool.io._regrid.rebuild_grid`).

Where the choice is not unique the error lists the candidates; ``x=`` and
``y=`` name the gate variables, ``var=`` the measured one.
"""

from __future__ import annotations

import re
from typing import Any

import numpy as np
import xarray as xr

from ..errors import InputError
from ..mapdata import make_map
from ..units import is_voltage_unit
from ._common import checked_voltage_scale, decode_attrs
from ._regrid import rebuild_grid, warn_incomplete

__all__ = ["flat_point_map", "iq_pair", "is_setpoint_grid", "with_gate_dimensions"]

#: a set-point grid counts as constant along a dimension within this share of its span
MESH_TOLERANCE = 1e-6


def _numeric(v: xr.DataArray | xr.Variable) -> bool:
    return v.dtype.kind in "iuf"


def _monotonic(values: np.ndarray) -> bool:
    v = np.asarray(values, float)
    if v.size < 2 or not np.all(np.isfinite(v)):
        return False
    d = np.diff(v)
    return bool(np.all(d > 0) or np.all(d < 0))


def _has_voltage_units(v: xr.DataArray) -> bool:
    return is_voltage_unit(v.attrs.get("units"))


def _as_profile(v: xr.DataArray, dim: str) -> np.ndarray | None:
    """The values of a set-point grid ``v`` along ``dim``, when ``v`` is constant along its other dimension."""
    other = [d for d in v.dims if d != dim]
    if v.ndim != 2 or len(other) != 1 or not _numeric(v):
        return None
    arr = np.asarray(v.transpose(other[0], dim).values, float)
    if not np.all(np.isfinite(arr)):
        return None
    span = float(np.ptp(arr)) or 1.0
    if np.max(np.ptp(arr, axis=0)) > MESH_TOLERANCE * span:
        return None
    return arr.mean(axis=0)


def is_setpoint_grid(v: xr.DataArray) -> bool:
    """A 2-D variable constant along one dimension and strictly monotonic along the other."""
    if v.ndim != 2:
        return False
    for dim in v.dims:
        prof = _as_profile(v, str(dim))
        if prof is not None and _monotonic(prof):
            return True
    return False


def iq_pair(ds: xr.Dataset) -> tuple[str, str, str] | None:
    """``(I name, Q name, map name)`` when the file's only 2-D real variables are an I/Q pair, else None.

    Names ``I``/``Q`` or ``<name>_I``/``<name>_Q`` (any case, ``-``, ``.``
    or space as separator); the map is named ``<name>`` (``iq`` without one).
    """
    two = [str(n) for n, v in ds.data_vars.items() if v.ndim >= 2 and v.dtype.kind == "f" and not is_setpoint_grid(v)]
    if len(two) != 2:
        return None
    parts = []
    for n in two:
        m = re.fullmatch(r"(?:(.*?)[_\-. ])?([IiQq])", n)
        if m is None:
            return None
        parts.append((m.group(1) or "", m.group(2).upper(), n))
    (p1, k1, n1), (p2, k2, n2) = parts
    if p1 != p2 or {k1, k2} != {"I", "Q"} or ds[n1].dims != ds[n2].dims:
        return None
    i_name, q_name = (n1, n2) if k1 == "I" else (n2, n1)
    return i_name, q_name, p1 or "iq"


def _candidates(ds: xr.Dataset, name: str, dim: str) -> dict[str, np.ndarray]:
    """Gate-voltage candidates for ``dim`` of variable ``name``: 1-D variables along it, or set-point grids."""
    out: dict[str, np.ndarray] = {}
    dims = set(ds[name].dims)
    for key, v in ds.variables.items():
        key = str(key)
        if key in (name, dim) or not _numeric(v):
            continue
        if v.dims == (dim,):
            values = np.asarray(v.values, float)
        elif v.ndim == 2 and dim in v.dims and set(v.dims) <= dims:
            prof = _as_profile(ds[key], dim)
            if prof is None:
                continue
            values = prof
        else:
            continue
        if _monotonic(values):
            out[key] = values
    return out


def _phony(dim: str) -> bool:
    """A dimension HDF5 files without dimension scales get (h5netcdf ``phony_dims``)."""
    return dim.startswith("phony_dim_")


def _by_length(ds: xr.Dataset, name: str, size: int) -> dict[str, np.ndarray]:
    """1-D numeric, strictly monotonic variables of ``size`` on phony dimensions (plain HDF5 arrays)."""
    out: dict[str, np.ndarray] = {}
    for key, v in ds.variables.items():
        key = str(key)
        if key != name and v.ndim == 1 and _phony(str(v.dims[0])) and v.size == size and _numeric(v):
            values = np.asarray(v.values, float)
            if _monotonic(values):
                out[key] = values
    return out


def with_gate_dimensions(ds: xr.Dataset, src: str, name: str, wanted: tuple[str | None, str | None]) -> xr.Dataset:
    """``ds`` with each gate dimension of ``name`` that has no index coordinate renamed to its gate variable.

    Parameters
    ----------
    ds : Dataset
        As opened.
    src : str
        File name for errors.
    name : str
        The map variable.
    wanted : (x, y)
        Gate names the user gave (``x=``, ``y=``). On a dimension with
        several candidates, the one named wins. The dimensions of a plain
        HDF5 array carry no meaning (phony dimensions), so there the
        candidates are the arrays of the right length, and ``x`` (or an
        array named ``x``) is sought for the last dimension, ``y`` for the
        first.

    Returns
    -------
    Dataset
        Unchanged when every dimension has its coordinate; else the map
        variable alone with its gate coordinates (and the file's attributes).
    """
    var = ds[name]
    dims = [str(d) for d in var.dims]
    role = {dims[-1]: wanted[0], dims[-2]: wanted[1]} if var.ndim >= 2 else {}
    chosen: dict[str, tuple[str, np.ndarray]] = {}
    taken: set[str] = set()
    for k, dim in enumerate(dims):
        if (dim in ds.coords and ds[dim].dims == (dim,)) or (k < len(dims) - 2 and not _phony(dim)):
            continue
        found = _candidates(ds, name, dim)
        if _phony(dim):
            found.update(_by_length(ds, name, var.shape[k]))
        found = {key: v for key, v in found.items() if key not in taken}
        if not found:
            continue  # (the reader names the dimension without a coordinate)
        if _phony(dim):  # (arrays named x and y, as in an .npz, say which is which)
            axis = "x" if k == len(dims) - 1 else "y"
            named = role.get(dim)
            picks = [named] if named is not None and named in found else [key for key in found if key.lower() == axis][:1]
        else:
            picks = [key for key in found if key in [w for w in wanted if w is not None]]
        if len(found) > 1 and len(picks) != 1:
            volts = [key for key in found if _has_voltage_units(ds[key])]
            if len(volts) != 1 or _phony(dim):
                raise InputError(
                    src,
                    f"dimension {dim!r} of variable {name!r} ({var.shape[k]} points) has several gate-voltage "
                    f"candidates ({', '.join(sorted(found))}); choose with x= and y= (stabtool analyze --x / --y)",
                )
            picks = volts
        key = picks[0] if picks else next(iter(found))
        chosen[dim] = (key, found[key])
        taken.add(key)
    if not chosen:
        return ds
    new_dims = [chosen[d][0] if d in chosen else d for d in dims]
    coords = {chosen[d][0]: xr.Variable((chosen[d][0],), chosen[d][1], attrs=dict(ds[chosen[d][0]].attrs))
              for d in chosen}
    coords.update({d: ds[d].variable for d in dims if d not in chosen and d in ds.coords and ds[d].dims == (d,)})
    return xr.Dataset({name: xr.Variable(tuple(new_dims), var.values, attrs=dict(var.attrs))}, coords=coords,
                      attrs=dict(ds.attrs))


def flat_point_map(ds: xr.Dataset, src: str, var: str | None, x: str | None, y: str | None) -> xr.DataArray | None:
    """The map of a flat point list (see module notes), or None when the file is no such list.

    Gates: ``x=`` / ``y=``; else the two variables with voltage units; else
    the two coordinates; else the first two variables in file order (x,
    then y), as for a long text table. The signal: ``var=``, else the one
    numeric variable left.
    """
    ones = [str(k) for k, v in ds.variables.items() if v.ndim == 1 and _numeric(v)]
    if any(v.ndim >= 2 for v in ds.data_vars.values()):
        return None
    by_dim: dict[Any, list[str]] = {}
    for k in ones:
        by_dim.setdefault(ds[k].dims[0], []).append(k)
    groups = [keys for keys in by_dim.values() if len(keys) >= 3]
    if len(groups) != 1:
        return None
    keys = groups[0]

    def named(wanted: str | None) -> str | None:
        if wanted is None:
            return None
        if wanted not in keys:
            raise InputError(src, f"no variable named {wanted!r} along the point list ({', '.join(keys)})")
        return wanted

    gx, gy, sv = named(x), named(y), named(var)
    if gx is None or gy is None:
        pool = [k for k in keys if k not in (gx, gy, sv)]
        volts = [k for k in pool if _has_voltage_units(ds[k])]
        coords = [k for k in pool if k in ds.coords]
        order = volts if len(volts) == 2 else coords if len(coords) == 2 else pool
        free = [k for k in order if k not in (gx, gy)]
        if gx is None:
            gx = free.pop(0)
        if gy is None:
            gy = free.pop(0) if free else None
    if gy is None or gx == gy:
        raise InputError(src, f"cannot tell the gate variables of the point list ({', '.join(keys)}); pass x= and y=")
    if sv is None:
        rest = [k for k in keys if k not in (gx, gy)]
        if len(rest) != 1:
            raise InputError(
                src,
                f"several measured variables along the point list ({', '.join(rest)}); choose one with var=",
            )
        sv = rest[0]
    units = [str(ds[k].attrs.get("units", "V")) for k in (gx, gy)]
    for k, unit in zip((gx, gy), units):
        checked_voltage_scale(src, unit, f"on gate variable {k!r}")
    grid = rebuild_grid(src, np.asarray(ds[gx].values, float), np.asarray(ds[gy].values, float),
                        np.asarray(ds[sv].values, float), names=(gx, gy))
    attrs = decode_attrs({**ds.attrs, **ds[sv].attrs})
    unit = str(attrs.pop("units", "a.u."))
    attrs.pop("source", None)
    if grid.snapped:
        attrs["setpoints_snapped"] = 1
    warn_incomplete(src, grid, stacklevel=3)
    return make_map(grid.signal, grid.x, grid.y, x_gate=gx, y_gate=gy, name=sv, units=unit,
                    x_units=units[0], y_units=units[1], source=src, attrs=attrs)
