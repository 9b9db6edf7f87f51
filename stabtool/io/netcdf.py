"""NetCDF / HDF5 maps (h5netcdf; classic NetCDF-3 through scipy).

Reading
-------
* the map is the variable named ``var``; else the one named in the global
  attribute ``stabtool_map_variable`` (written by :func:`write_netcdf`); else
  the single real-valued 2-D variable whose dimensions both have numeric
  coordinates (integer maps beside it, such as charge states, and matrices
  with labelled dimensions are results, not the map);
* gate voltages on dimensions of other names (``sensor(y, x)`` with
  ``PA(x)``, ``PB(y)``), as set-point grids (``PA(y, x)``), or a flat point
  list (``PA(n)``, ``PB(n)``, ``sensor(n)``) are brought to that form
  (:mod:`._nc_layouts`);
* the last dimension is x unless ``x=`` / ``y=`` name the gate dimensions;
* data with more than two dimensions needs ``isel={dim: index}`` for the
  others (size-1 dimensions are dropped silently);
* coordinate ``units`` attributes (V, mV, uV/µV, nV; none means V) are
  honoured; ``original_units`` is kept;
* the variable's attributes and the file's global attributes (e.g. a
  generator's ``stabtool_truth`` JSON text) are kept in ``DataArray.attrs``.

Writing
-------
A DataArray is stored as one variable with coordinates in V (and their
``original_units``); a Dataset (a map plus result variables) as is. Attribute
values NetCDF cannot hold (dicts, bools, None, nested lists) are stored as
JSON text and decoded again on reading.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from typing import Any

import numpy as np
import xarray as xr

from ..errors import InputError
from ..mapdata import make_map, require_real_numbers
from ._common import checked_voltage_scale, decode_attrs, encode_attrs, principal_projection
from ._nc_layouts import flat_point_map, iq_pair, is_setpoint_grid, with_gate_dimensions
from ._select import pick
from .stacks import TIME_KEYS, slice_time

__all__ = ["MAP_VARIABLE_ATTR", "open_lazily", "open_netcdf", "read_netcdf", "write_netcdf"]

#: Global attribute naming the map variable of a file written by stabtool.
MAP_VARIABLE_ATTR = "stabtool_map_variable"


def open_lazily(path: str, *, kind: str = "netcdf") -> xr.Dataset:
    """Open a NetCDF file without reading its arrays (times not decoded; HDF5 arrays without
    dimension scales get phony dimensions). Use as a context manager."""
    engine = "scipy" if kind == "netcdf3" else "h5netcdf"
    kwargs: dict[str, Any] = {"phony_dims": "sort"} if engine == "h5netcdf" else {}
    return xr.open_dataset(path, engine=engine, decode_times=False, **kwargs)


def open_netcdf(path: str, *, kind: str = "netcdf") -> xr.Dataset:
    """Open and load a NetCDF file fully (the file is closed afterwards)."""
    try:
        with open_lazily(path, kind=kind) as ds:
            return ds.load()
    except Exception as exc:  # noqa: BLE001 - any reader failure is a bad file
        reason = " ".join(str(exc).split())[:160] or type(exc).__name__
        raise InputError(path, f"truncated or corrupt NetCDF/HDF5 file ({reason})") from None


def _is_gate_var(ds: xr.Dataset, name: Any) -> bool:
    """Dimensions all carry numeric 1-D coordinates (gate voltages, not labels)."""
    v = ds[name]
    return v.ndim >= 2 and all(
        d in ds.coords and ds[d].ndim == 1 and ds[d].dtype.kind in "iuf" for d in v.dims
    )


def _choose_variable(ds: xr.Dataset, src: str, var: str | None) -> str:
    names = [str(n) for n in ds.data_vars]
    if var is not None:
        return names[pick(src, var, names, what="variable")]
    named = ds.attrs.get(MAP_VARIABLE_ATTR)
    if isinstance(named, str) and named in ds.data_vars:
        return named
    if not names:
        raise InputError(src, "the file holds no data variables")
    two = [n for n in names if ds[n].squeeze().ndim == 2]
    if len(two) > 1:  # set-point grids (a meshgrid of gate voltages) beside the map are no map
        two = [n for n in two if not is_setpoint_grid(ds[n])] or two
    gated = [n for n in two if _is_gate_var(ds, n)]
    # a measured signal is real-valued; integer maps beside it are labels (charge states)
    measured = [n for n in gated if ds[n].dtype.kind == "f"]
    for pool in (measured, gated, two):
        if len(pool) == 1:
            return pool[0]
        if len(pool) > 1:
            raise InputError(
                src,
                f"several 2-D variables ({', '.join(pool)}); choose one with var=... "
                "(stabtool info --var NAME)",
            )
    higher = [n for n in names if ds[n].squeeze().ndim > 2]
    if len(higher) == 1:
        return higher[0]
    if higher:
        raise InputError(src, f"several variables with more than 2 dimensions ({', '.join(higher)}); choose one with var=...")
    dims = ", ".join(f"{n} ({' × '.join(map(str, ds[n].shape)) or 'scalar'})" for n in names)
    raise InputError(
        src,
        f"1-D data: no 2-D variable (variables: {dims}); a map needs "
        "two swept gates (1-D traces are not read by load)",
    )


def _coord_volts(ds: xr.Dataset, src: str, dim: str, values: np.ndarray) -> tuple[np.ndarray, str]:
    attrs = ds[dim].attrs if dim in ds.variables else {}
    unit = attrs.get("units")
    unit = None if unit is None else str(unit)
    scale = checked_voltage_scale(src, unit, f"on coordinate {dim!r}")
    original = str(attrs.get("original_units") or unit or "V") if scale == 1.0 else str(unit)
    return require_real_numbers(values, f"coordinate {dim!r}", src) * scale, original


def read_netcdf(
    path: str,
    *,
    var: str | None = None,
    x: str | None = None,
    y: str | None = None,
    isel: Mapping[str, int] | None = None,
    kind: str = "netcdf",
) -> xr.DataArray:
    """Read a map from a NetCDF/HDF5 file (see module notes)."""
    ds = open_netcdf(path, kind=kind)
    if not isel:
        flat = flat_point_map(ds, path, var, x, y)  # every point along one dimension (a sweep log)
        if flat is not None:
            return flat
    pair = iq_pair(ds) if var is None else None
    if pair is not None:  # I and Q stored apart: one complex map
        i_name, q_name, joined = pair
        iq = (ds[i_name] + 1j * ds[q_name]).assign_attrs(ds[i_name].attrs)
        ds = ds.drop_vars([i_name, q_name]).assign({joined: iq})
    name = _choose_variable(ds, path, var)
    ds = with_gate_dimensions(ds, path, name, (x, y))  # gate voltages on other dimensions or as grids
    da = ds[name]
    selection: dict[str, int] = {}
    if isel:
        for dim, index in isel.items():
            if dim not in da.dims:
                raise InputError(path, f"isel: variable {name!r} has no dimension {dim!r}{_dims(da)}")
            size = da.sizes[dim]
            if not -size <= int(index) < size:
                raise InputError(path, f"isel: index {index} is out of range for dimension {dim!r} of size {size}")
            selection[dim] = int(index)
        da = da.isel(selection)
    if da.ndim > 2:
        da = da.squeeze(drop=True) if any(s == 1 for s in da.shape) else da
    if da.ndim == 1:
        raise InputError(path, f"1-D data: variable {name!r} has dims {tuple(map(str, da.dims))}; a map needs two swept gates")
    if da.ndim > 2:
        keep = [d for d in (y, x) if d is not None]
        others = [str(d) for d in da.dims if d not in keep][: da.ndim - 2] if keep else [str(d) for d in da.dims[:-2]]
        raise InputError(
            path,
            f"{da.ndim}-D data: variable {name!r} has dims {tuple(map(str, da.dims))}; select a 2-D "
            f"slice with isel={{{', '.join(repr(d) + ': 0' for d in others)}}} "
            f"(stabtool analyze or info: {' '.join('--isel ' + d + '=0' for d in others)}, or the name "
            f"{os.path.basename(path)}[{','.join(d + '=0' for d in others)}]; batch and drift take every slice)",
        )
    dims = [str(d) for d in da.dims]
    xd = dims[pick(path, x, dims, what="dimension")] if x is not None else None
    yd = dims[pick(path, y, dims, what="dimension")] if y is not None else None
    if xd is None:
        xd = dims[-1] if yd != dims[-1] else dims[0]
    if yd is None:
        yd = dims[0] if xd != dims[0] else dims[-1]
    if xd == yd:
        raise InputError(path, f"x and y name the same dimension {xd!r}")
    da = da.transpose(yd, xd)
    for d in (yd, xd):
        if d not in da.coords:
            raise InputError(
                path,
                f"dimension {d!r} of variable {name!r} has no coordinate variable with the gate voltages",
            )
    projection = None
    if np.iscomplexobj(da.values):  # an I/Q (reflectometry) map: its principal I/Q axis
        real, projection = principal_projection(da.values)
        da = da.copy(data=real)
    xv, xorig = _coord_volts(ds, path, xd, da[xd].values)
    yv, yorig = _coord_volts(ds, path, yd, da[yd].values)
    attrs = decode_attrs({**ds.attrs, **da.attrs})
    attrs.pop(MAP_VARIABLE_ATTR, None)
    units = str(attrs.pop("units", "a.u."))
    attrs.pop("source", None)
    if projection is not None:
        attrs["iq_projection_deg"] = round(projection, 3)
    if selection:
        attrs["selection"] = ", ".join(f"{k}={v}" for k, v in selection.items())
        _slice_times(attrs, ds, selection)
    out = make_map(da.values, xv, yv, x_gate=xd, y_gate=yd, name=name, units=units, source=path, attrs=attrs)
    out[xd].attrs["original_units"] = xorig
    out[yd].attrs["original_units"] = yorig
    return out


def _slice_times(attrs: dict[str, Any], ds: xr.Dataset, selection: Mapping[str, int]) -> None:
    """Give a slice of a stack its own start time (:func:`.stacks.slice_time`), in place.

    Without one, the file's time attributes (the same for every slice) move
    to ``stack_<key>``, so that no two slices claim the same start.
    """
    for dim, index in selection.items():
        coord = ds[dim] if dim in ds.coords else None
        size = ds.sizes.get(dim, 1)
        when = slice_time(coord, index % size if size else index, attrs)
        if when is not None:
            attrs["time"] = when
            return
    if any(ds.sizes.get(dim, 1) > 1 for dim in selection):
        for key in TIME_KEYS:
            if key in attrs:
                attrs[f"stack_{key}"] = attrs.pop(key)


def _dims(da: xr.DataArray) -> str:
    return f" (dims: {', '.join(map(str, da.dims))})"


def _prepare(obj: xr.DataArray | xr.Dataset) -> xr.Dataset:
    if isinstance(obj, xr.DataArray):
        name = str(obj.name) if obj.name is not None else "signal"
        ds = obj.rename(name).to_dataset().copy(deep=False)
        ds.attrs[MAP_VARIABLE_ATTR] = name
    else:
        ds = obj.copy(deep=False)
    ds.attrs = encode_attrs(ds.attrs)
    for variable in ds.variables.values():
        variable.attrs = encode_attrs(variable.attrs)
        variable.encoding = {}
    return ds


def write_netcdf(obj: xr.DataArray | xr.Dataset, tmp_path: str, *, target: str) -> None:
    """Write ``obj`` to ``tmp_path`` with h5netcdf (the caller moves it in place)."""
    ds = _prepare(obj)
    try:
        ds.to_netcdf(tmp_path, engine="h5netcdf")
    except (TypeError, ValueError) as exc:
        raise InputError(target, f"cannot write NetCDF: {' '.join(str(exc).split())}") from None
