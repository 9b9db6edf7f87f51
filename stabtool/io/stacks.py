"""Stacked maps: one NetCDF variable holding many sweeps (a repeat or time dimension).

An overnight series is often saved as one file whose map variable has a
third dimension (``rep``, ``time``, a stepped gate ...). Such a file stands
for one map per position along the extra dimensions. Each map is named by a
*slice reference*, the file name followed by the positions in brackets::

    night.nc[rep=3]
    scan.h5[field=1,rep=0]

:func:`stabtool.io.load` reads a slice reference as the file with
``isel={"rep": 3}``, so the reference can travel anywhere a file name does
(a batch row, a worker task, a drift series). :func:`expand_stacks` turns
the stacked files of a list of inputs into their slice references.

Time of a slice (for ordering and the drift rate): the coordinate of the
extra dimension when it is a CF time (``units = "hours since 2026-11-30
22:00"``) or ISO text, or an elapsed time (units ``s``, ``min``, ``h``)
added to the file's ``time`` attribute. Otherwise the file's single ``time`` attribute
is not the slice's: it is kept as ``stack_time`` and the slice has none,
so the slices are ordered by position.
"""

from __future__ import annotations

import itertools
import os
import re
from collections.abc import Mapping, Sequence
from datetime import datetime, timedelta
from typing import Any

import numpy as np
import xarray as xr

__all__ = ["expand_stacks", "slice_ref", "slice_time", "split_slice_ref", "stack_selections"]

_REF = re.compile(r"^(?P<path>.+)\[(?P<sel>[^\[\]=,]+=-?\d+(?:,[^\[\]=,]+=-?\d+)*)\]$")

#: Attribute names that carry a sweep's start time (as read by the batch and the drift).
TIME_KEYS = ("time", "start_time", "timestamp", "datetime", "date", "started")

#: Elapsed-time units of a stack coordinate, in seconds.
_ELAPSED_S = {"s": 1.0, "sec": 1.0, "second": 1.0, "seconds": 1.0, "min": 60.0, "minute": 60.0,
              "minutes": 60.0, "h": 3600.0, "hr": 3600.0, "hour": 3600.0, "hours": 3600.0}


def slice_ref(path: str | os.PathLike[str], isel: Mapping[str, int]) -> str:
    """The slice reference ``path[dim=index,...]`` of one map of a stacked file."""
    sel = ",".join(f"{dim}={int(index)}" for dim, index in isel.items())
    return f"{os.fspath(path)}[{sel}]"


def split_slice_ref(text: str | os.PathLike[str]) -> tuple[str, dict[str, int] | None]:
    """``(file, isel)`` of a slice reference; ``(text, None)`` for anything else.

    A name that exists as a file is never split (a file may have brackets in
    its name), nor one whose part before the brackets is no file.
    """
    src = os.fspath(text)
    m = _REF.match(src)
    if m is None or os.path.exists(src) or not os.path.isfile(m["path"]):
        return src, None
    isel = {}
    for item in m["sel"].split(","):
        dim, index = item.rsplit("=", 1)
        isel[dim.strip()] = int(index)
    return m["path"], isel


def _map_variable(ds: xr.Dataset, var: str | None) -> str | None:
    """The variable :func:`stabtool.io.netcdf.read_netcdf` would choose (None when it would fail)."""
    from ..errors import InputError
    from .netcdf import _choose_variable

    try:
        return _choose_variable(ds, "", var)
    except InputError:
        return None


def stack_selections(path: str | os.PathLike[str], *, var: str | None = None, x: str | None = None,
                     y: str | None = None) -> list[dict[str, int]]:
    """Every ``isel`` of a stacked NetCDF map, in storage order; empty for a plain map.

    The map variable is chosen as :func:`stabtool.io.load` chooses it (or
    named by ``var``); its last two dimensions are the gates (or those named
    ``x`` and ``y``), the others (longer than 1) are stacked. Files that are no NetCDF, cannot be opened or hold no single
    map give an empty list (loading them then says what is wrong).
    """
    from .detect import detect_format

    src = os.fspath(path)
    try:
        kind = detect_format(src)
    except Exception:  # noqa: BLE001 - a bad file is reported when it is loaded
        return []
    if kind not in ("netcdf", "netcdf3"):
        return []
    from .netcdf import open_lazily

    try:
        with open_lazily(src, kind=kind) as ds:
            name = _map_variable(ds, var)
            if name is None:
                return []
            sizes = ds[name].sizes
            dims = [str(d) for d in ds[name].dims]
            gates = [g for g in (x, y) if g in dims]
            others = [d for d in dims if d not in gates][: len(dims) - 2] if gates else dims[:-2]
            stacked = [d for d in others if sizes[d] > 1]
    except Exception:  # noqa: BLE001 - as above
        return []
    ranges = [range(int(sizes[d])) for d in stacked]
    return [dict(zip(stacked, combo)) for combo in itertools.product(*ranges)] if stacked else []


def expand_stacks(paths: Sequence[Any], *, var: str | None = None, x: str | None = None,
                  y: str | None = None) -> list[Any]:
    """``paths`` with each stacked NetCDF file replaced by the slice references of its maps.

    Items keep their type (``str`` or :class:`pathlib.Path`); plain files are
    returned as they are. ``var``, ``x``, ``y`` as for :func:`stack_selections`.
    """
    out: list[Any] = []
    for p in paths:
        selections = stack_selections(p, var=var, x=x, y=y)
        if not selections:
            out.append(p)
            continue
        out.extend(type(p)(slice_ref(p, sel)) for sel in selections)
    return out


def _iso(dt: datetime) -> str:
    return dt.isoformat(timespec="seconds") if dt.microsecond == 0 else dt.isoformat()


def _parse_start(value: Any) -> datetime | None:
    try:
        return datetime.fromisoformat(str(value).strip().replace("Z", "+00:00"))
    except ValueError:
        return None


def slice_time(coord: xr.DataArray | None, index: int, attrs: Mapping[str, Any]) -> str | None:
    """Start time (ISO text) of the slice at ``index`` along a stacked dimension, or None.

    Parameters
    ----------
    coord : DataArray or None
        The stacked dimension's coordinate as stored (times not decoded).
    index : int
        Position of the slice.
    attrs : mapping
        The file's attributes (its ``time`` is the start of an elapsed-time
        coordinate).
    """
    if coord is None or coord.ndim != 1:
        return None
    if coord.dtype.kind in "OSU":  # ISO text per slice
        when = _parse_start(coord.values[index].decode() if isinstance(coord.values[index], bytes)
                            else coord.values[index])
        return None if when is None else _iso(when)
    units = str(coord.attrs.get("units", "")).strip()
    if " since " in units:  # CF time (Eaton et al., NetCDF Climate and Forecast conventions, sec. 4.4)
        try:
            decoded = xr.decode_cf(xr.Dataset({"t": coord.variable.to_base_variable()}))["t"].values
        except Exception:  # noqa: BLE001 - an undecodable time is no time
            return None
        value = decoded[index]
        if isinstance(value, np.datetime64):
            if np.isnat(value):
                return None
            return str(np.datetime_as_string(value, unit="s"))
        if hasattr(value, "isoformat"):  # cftime (non-standard calendars)
            return str(value.isoformat())
        return None
    scale = _ELAPSED_S.get(units.lower())
    if scale is None or coord.dtype.kind not in "iuf":
        return None
    start = next((_parse_start(attrs[k]) for k in TIME_KEYS if k in attrs and _parse_start(attrs[k])), None)
    value = float(coord.values[index])
    if start is None or not np.isfinite(value):
        return None
    return _iso(start + timedelta(seconds=value * scale))
