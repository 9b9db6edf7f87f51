"""NumPy ``.npz`` maps.

Accepted keys
-------------
* ``meta`` (optional): a 0-d string array holding JSON with any of
  ``x``, ``y`` (key names of the gate arrays, also the gate names),
  ``signal`` (key of the map), ``x_units``, ``y_units`` (units of the stored
  gate arrays), ``x_original_units``, ``y_original_units``, ``units``
  (unit of the signal) and ``attrs`` (further attributes);
* the map: the key named by ``var=``, else ``meta["signal"]``, else
  ``signal``, else the only array with two or more dimensions; shape
  ``(ny, nx)``, i.e. ``signal[iy, ix]``;
* the gates: the keys named by ``x=`` / ``y=``, else ``meta["x"]`` /
  ``meta["y"]``, else keys ``x`` and ``y``, else the two 1-D arrays (of
  lengths nx and ny; the first stored is x when both have the same length).
  A key may carry its unit as in a CSV header (``PA_mV``); otherwise the
  unit comes from ``meta`` or is volts;
* a point list instead (only 1-D arrays, three or more of one length: x, y
  and signal of every point in measurement order): the grid is rebuilt as
  for a NetCDF point list (:func:`stabtool.io._nc_layouts.flat_point_map`).

Object arrays are never unpickled (``allow_pickle=False``).
"""

from __future__ import annotations

import json
import zipfile
from collections.abc import Mapping
from typing import Any

import numpy as np
import xarray as xr

from ..errors import InputError
from ..mapdata import make_map, require_real_numbers
from ._common import checked_voltage_scale, decode_attrs, principal_projection
from ._headers import parse_label
from ._select import pick

__all__ = ["read_npz", "write_npz"]


def _load_all(path: str) -> dict[str, np.ndarray]:
    try:
        with np.load(path, allow_pickle=False) as data:
            return {k: data[k] for k in data.files}
    except ValueError as exc:
        if "pickle" in str(exc).lower():
            raise InputError(path, "the .npz holds object arrays, which stabtool does not unpickle") from None
        raise InputError(path, f"corrupt .npz ({' '.join(str(exc).split())[:120]})") from None
    except (zipfile.BadZipFile, OSError, EOFError, KeyError) as exc:
        raise InputError(path, f"truncated or corrupt .npz ({' '.join(str(exc).split())[:120] or type(exc).__name__})") from None


def _meta(path: str, arrays: dict[str, np.ndarray]) -> dict[str, Any]:
    if "meta" not in arrays:
        return {}
    raw = arrays.pop("meta")
    try:
        meta = json.loads(str(raw.item() if raw.ndim == 0 else raw.tobytes().decode()))
    except (ValueError, UnicodeDecodeError):
        raise InputError(path, "the 'meta' array is not a JSON string") from None
    if not isinstance(meta, dict):
        raise InputError(path, "the 'meta' JSON must be an object")
    return meta


def _meta_attrs(meta: dict[str, Any]) -> dict[str, Any]:
    """The map attributes stored under ``meta["attrs"]`` (decoded), or none."""
    return decode_attrs(meta["attrs"]) if isinstance(meta.get("attrs"), dict) else {}


def _unit(path: str, key: str, unit: str | None) -> str:
    checked_voltage_scale(path, unit, f"for gate array {key!r}")
    return unit or "V"


def read_npz(path: str, *, var: str | None = None, x: str | None = None, y: str | None = None) -> xr.DataArray:
    """Read a map from a ``.npz`` file (see module notes)."""
    arrays = _load_all(path)
    meta = _meta(path, arrays)
    if not arrays:
        raise InputError(path, "the .npz holds no arrays")
    keys = list(arrays)
    labels = {k: parse_label(k) for k in keys}
    names = [labels[k].name for k in keys]

    def key_of(wanted: str, what: str) -> str:
        return keys[pick(path, wanted, names, keys, what=what)]

    if var is not None:
        skey = key_of(var, "array")
    elif isinstance(meta.get("signal"), str) and meta["signal"] in arrays:
        skey = meta["signal"]
    elif "signal" in arrays:
        skey = "signal"
    else:
        multi = [k for k in keys if arrays[k].ndim >= 2]
        if not multi:
            flat = _flat_point_list(path, arrays, labels, meta, var=var, x=x, y=y)
            if flat is not None:
                return flat
        if len(multi) != 1:
            if not multi:
                raise InputError(
                    path,
                    f"1-D data: no 2-D array among {', '.join(keys)}; a map needs a 2-D signal "
                    "(1-D traces are not read by load)",
                )
            raise InputError(path, f"several 2-D arrays ({', '.join(multi)}); choose one with var=...")
        skey = multi[0]
    signal = arrays[skey]
    if signal.ndim == 1:
        raise InputError(path, f"1-D data: array {skey!r} has shape {signal.shape}; a map needs a 2-D signal")
    if signal.ndim > 2:
        raise InputError(path, f"{signal.ndim}-D data: array {skey!r} has shape {signal.shape}; store a 2-D slice (ny, nx)")
    projection = None
    if signal.dtype.kind == "c":  # an I/Q (reflectometry) map: its principal I/Q axis
        signal, projection = principal_projection(signal)
    if signal.dtype.kind not in "iufb":
        raise InputError(path, f"array {skey!r} holds {signal.dtype} values, not numbers")
    ny, nx = signal.shape

    def gate_key(wanted: str | None, axis: str) -> str | None:
        if wanted is not None:
            return key_of(wanted, "array")
        m = meta.get(axis)
        if isinstance(m, str):
            if m not in arrays:
                raise InputError(path, f"meta names {axis} array {m!r}, which is not in the file{_suggest(m, keys)}")
            return m
        return axis if axis in arrays else None

    xkey, ykey = gate_key(x, "x"), gate_key(y, "y")
    if xkey is None or ykey is None:
        ones = [k for k in keys if k not in (skey, xkey, ykey) and arrays[k].ndim == 1]
        fits_x = [k for k in ones if arrays[k].size == nx]
        fits_y = [k for k in ones if arrays[k].size == ny]
        if xkey is None and ykey is None and nx == ny and len(fits_x) == 2:
            xkey, ykey = fits_x
        else:
            if xkey is None and len([k for k in fits_x if k != ykey]) == 1:
                xkey = next(k for k in fits_x if k != ykey)
            if ykey is None and len([k for k in fits_y if k != xkey]) == 1:
                ykey = next(k for k in fits_y if k != xkey)
        if xkey is None or ykey is None:
            raise InputError(
                path,
                f"cannot tell the gate arrays: keys are {', '.join(keys)}; name them x and y, "
                "add a 'meta' JSON, or pass x= and y=",
            )
    xv, yv = np.asarray(arrays[xkey]), np.asarray(arrays[ykey])
    for key, arr, n, axis in ((xkey, xv, nx, "x"), (ykey, yv, ny, "y")):
        require_real_numbers(arr, f"gate array {key!r}", path)
        if arr.ndim != 1 or arr.size != n:
            raise InputError(
                path,
                f"gate array {key!r} has shape {arr.shape}, expected ({n},) numbers to match "
                f"signal {skey!r} of shape {signal.shape} = (ny, nx)",
            )
    xlab, ylab = labels[xkey], labels[ykey]
    xunit = _unit(path, xkey, meta.get("x_units") or xlab.unit)
    yunit = _unit(path, ykey, meta.get("y_units") or ylab.unit)
    attrs = _meta_attrs(meta)
    attrs.pop("source", None)
    if projection is not None:
        attrs["iq_projection_deg"] = round(projection, 3)
    out = make_map(
        signal,
        xv,
        yv,
        x_gate=xlab.name,
        y_gate=ylab.name,
        name=labels[skey].name,
        units=str(meta.get("units") or labels[skey].unit or "a.u."),
        x_units=xunit,
        y_units=yunit,
        source=path,
        attrs=attrs,
    )
    for gate, key in ((xlab.name, "x_original_units"), (ylab.name, "y_original_units")):
        if isinstance(meta.get(key), str):
            out[gate].attrs["original_units"] = meta[key]
    return out


def _flat_point_list(path: str, arrays: dict[str, np.ndarray], labels: dict[str, Any], meta: dict[str, Any], *,
                     var: str | None, x: str | None, y: str | None) -> xr.DataArray | None:
    """The map of 1-D arrays listing every point (x, y, signal in measurement order), or None.

    As a NetCDF point list (:func:`stabtool.io._nc_layouts.flat_point_map`);
    array names may carry units (``PA_mV``).
    """
    from ._nc_layouts import flat_point_map

    ones = {k: a for k, a in arrays.items() if a.ndim == 1 and a.dtype.kind in "iuf"}
    sizes = {a.size for a in ones.values()}
    if len(ones) < 3 or len(sizes) != 1:
        return None
    names = [labels[k].name for k in ones]
    if len(set(names)) != len(names):
        return None
    ds = xr.Dataset({labels[k].name: ("point", a, {"units": labels[k].unit} if labels[k].unit else {})
                     for k, a in ones.items()})
    attrs = _meta_attrs(meta)
    ds.attrs.update({k: v for k, v in attrs.items() if k != "source"})
    return flat_point_map(ds, path, var, x, y)


def _suggest(name: str, keys: list[str]) -> str:
    from ._common import suggest

    return suggest(name, keys)


def write_npz(da: xr.DataArray, handle: Any) -> None:
    """Write ``da``: gate arrays in V under the gate names, the signal under its
    name, and a ``meta`` JSON string (see module notes)."""
    from .jsonio import dumps

    ydim, xdim = (str(d) for d in da.dims)
    name = str(da.name) if da.name is not None else "signal"
    if name in (xdim, ydim, "meta"):
        name = "signal"
    meta: Mapping[str, Any] = {
        "x": xdim,
        "y": ydim,
        "signal": name,
        "x_units": "V",
        "y_units": "V",
        "x_original_units": str(da[xdim].attrs.get("original_units", "V")),
        "y_original_units": str(da[ydim].attrs.get("original_units", "V")),
        "units": str(da.attrs.get("units", "a.u.")),
        "attrs": {k: v for k, v in da.attrs.items() if k not in ("units", "source", "source_format")},
    }
    np.savez(
        handle,
        **{
            xdim: np.asarray(da[xdim].values, dtype=np.float64),
            ydim: np.asarray(da[ydim].values, dtype=np.float64),
            name: np.asarray(da.values, dtype=np.float64),
            "meta": np.array(dumps(meta, indent=None)),
        },  # type: ignore[arg-type]
    )
