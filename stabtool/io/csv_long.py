"""Long-format text tables: one measured point per row.

Layout
------
::

    # stabtool-attrs: {"device": "kestrel-7"}      (optional)
    PA (mV),PB (mV),sensor (nA)
    -10.0,-5.0,0.113
    -9.5,-5.0,0.118
    ...

* header row with at least three labelled columns; units as ``NAME (UNIT)``,
  ``NAME [UNIT]``, ``NAME / UNIT`` or ``NAME_UNIT``; a gate column without a
  unit is in volts, a quantity without one is ``a.u.``;
* by default the first column is x, the second y, the third the signal;
  ``x=``, ``y=``, ``var=`` pick columns by name (the signal defaults to the
  first column that is neither x nor y);
* rows in measurement order, any order of the sweep (fast axis x or y,
  raster or serpentine, up or down); the grid is rebuilt by
  :func:`stabtool.io._regrid.rebuild_grid` (jittered read-backs snapped);
* an interrupted final sweep line is kept and filled with NaN; a final text
  line cut short (fewer cells) counts as not measured.
"""

from __future__ import annotations

import json
import warnings
from typing import Any

import numpy as np
import xarray as xr

from ..errors import InputError, PartialSweepWarning
from ..mapdata import make_map
from ..units import from_volts
from ._common import checked_voltage_scale, decode_attrs, fmt_number
from ._headers import format_label, parse_label
from ._regrid import rebuild_grid, warn_incomplete
from ._select import pick
from ._text import TextTable, parse_body

__all__ = ["read_long", "write_long"]

ATTRS_META = "stabtool-attrs"


def gate_unit(source: str, label: Any) -> str:
    """Voltage unit of a gate label (``V`` when none); unknown units raise."""
    unit = label.unit or "V"
    checked_voltage_scale(source, unit, f"in gate column {label.text!r}")
    return unit


def meta_attrs(table: TextTable) -> dict[str, Any]:
    """Attributes stored in a ``# stabtool-attrs: {...}`` comment."""
    text = table.meta.get(ATTRS_META)
    if not text:
        return {}
    try:
        attrs = json.loads(text)
    except ValueError:
        raise InputError(table.source, f"the '# {ATTRS_META}:' comment is not valid JSON") from None
    return decode_attrs(attrs) if isinstance(attrs, dict) else {}


def read_long(
    table: TextTable, *, var: str | None = None, x: str | None = None, y: str | None = None
) -> xr.DataArray:
    """Build a map from a long-format :class:`TextTable` (see module notes)."""
    src = table.source
    labels = [parse_label(h) for h in table.header]
    names = [lb.name for lb in labels]
    texts = [lb.text for lb in labels]
    if len(labels) < 3:
        raise InputError(
            src,
            f"1-D data: the header has {len(labels)} column(s) ({', '.join(map(repr, texts))}); "
            "a map needs x, y and signal columns (1-D traces are not read by load)",
        )
    ix = pick(src, x, names, texts, what="column") if x is not None else 0
    iy = pick(src, y, names, texts, what="column") if y is not None else (1 if ix != 1 else 0)
    if iy == ix:
        raise InputError(src, f"x and y name the same column {texts[ix]!r}")
    if var is not None:
        iv = pick(src, var, names, texts, what="column")
    else:
        iv = next(i for i in range(len(labels)) if i not in (ix, iy))
    if iv in (ix, iy):
        raise InputError(src, f"the signal column {texts[iv]!r} is also a gate column")
    xunit, yunit = gate_unit(src, labels[ix]), gate_unit(src, labels[iy])
    values, cut = parse_body(table, ncols=len(labels), column_names=texts, allow_short_last=True)
    if cut:
        lineno = table.body[-1][0]
        if not (np.isfinite(values[-1, ix]) and np.isfinite(values[-1, iy])):
            values = values[:-1]
        warnings.warn(
            f"{src}: the final line {lineno} is cut short (an interrupted write); its missing "
            "cells are treated as not measured",
            PartialSweepWarning,
            stacklevel=2,
        )
    grid = rebuild_grid(
        src, values[:, ix], values[:, iy], values[:, iv], names=(labels[ix].name, labels[iy].name)
    )
    warn_incomplete(src, grid, stacklevel=2)
    attrs = meta_attrs(table)
    attrs.pop("source", None)
    attrs.pop("units", None)
    if grid.snapped:
        attrs["setpoints_snapped"] = 1
    return make_map(
        grid.signal,
        grid.x,
        grid.y,
        x_gate=labels[ix].name,
        y_gate=labels[iy].name,
        name=labels[iv].name,
        units=labels[iv].unit or "a.u.",
        x_units=xunit,
        y_units=yunit,
        source=src,
        attrs=attrs,
    )


def coord_in_file_units(da: xr.DataArray, dim: str) -> tuple[np.ndarray, str]:
    """Coordinate ``dim`` converted to its ``original_units`` (12 significant digits)."""
    coord = da[dim]
    unit = str(coord.attrs.get("original_units") or "V")
    try:
        values = from_volts(coord.values, unit)
    except KeyError:
        unit, values = "V", np.asarray(coord.values, dtype=np.float64)
    return np.array([float(f"{v:.12g}") for v in values]), unit


def attrs_comment(da: xr.DataArray) -> str:
    """``# stabtool-attrs: {...}`` line for the attributes that are not in the header."""
    from .jsonio import dumps

    extra = {k: v for k, v in da.attrs.items() if k not in ("units", "source", "source_format")}
    return f"# {ATTRS_META}: {dumps(extra, indent=None)}\n" if extra else ""


def write_long(da: xr.DataArray, handle: Any, *, delimiter: str = ",") -> None:
    """Write ``da`` as a long table: y slow, x fast, in the stored order."""
    ydim, xdim = (str(d) for d in da.dims)
    xv, xu = coord_in_file_units(da, xdim)
    yv, yu = coord_in_file_units(da, ydim)
    name = str(da.name) if da.name is not None else "signal"
    header = [format_label(xdim, xu), format_label(ydim, yu), format_label(name, da.attrs.get("units"))]
    handle.write(attrs_comment(da))
    handle.write(delimiter.join(header) + "\n")
    xs = [fmt_number(v) for v in xv]
    sig = np.asarray(da.values, dtype=np.float64)
    for iy, yval in enumerate(yv):
        ytxt = fmt_number(yval)
        row = sig[iy].tolist()
        handle.write(
            "".join(f"{xt}{delimiter}{ytxt}{delimiter}{s!r}\n" for xt, s in zip(xs, row))
        )
