"""Grid-format text tables: a matrix of values with labelled axes.

Layout
------
::

    # quantity: sensor (nA)                         (optional; default "signal (a.u.)")
    PB (mV) \\ PA (mV),-10.0,-9.5,-9.0,...
    -5.0,0.113,0.118,0.120,...
    -4.5,0.115,0.117,0.125,...

* the header row holds the **x** voltages after one label cell;
* each following row starts with its **y** voltage, then the values;
* the top-left cell names the gates as ``Y-GATE (UNIT) \\ X-GATE (UNIT)``
  (y first, as the rows, then a backslash and x, as the columns); without it
  the gates are called ``y`` and ``x`` and the voltages are in volts;
* the measured quantity is named in a ``# quantity: NAME (UNIT)`` comment;
* axes are kept in the file's order (decreasing allowed, must be monotonic);
  only the final row may be short (an interrupted sweep; padded with NaN).
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
import xarray as xr

from ..errors import InputError, PartialSweepWarning
from ..mapdata import make_map
from ._common import fmt_number
from ._headers import Label, format_label, parse_corner, parse_label
from ._text import TextTable, is_number, parse_body
from .csv_long import attrs_comment, coord_in_file_units, gate_unit, meta_attrs

__all__ = ["is_grid_header", "read_grid", "write_grid"]


def is_grid_header(header: list[str]) -> bool:
    """True when every cell after the first reads as a number (x voltages)."""
    cells = [c for c in header[1:] if c != ""]
    return bool(cells) and all(is_number(c) for c in cells)


def _check_unique(source: str, values: np.ndarray, where: str, gate: str) -> None:
    _, first, counts = np.unique(values, return_index=True, return_counts=True)
    if np.any(counts > 1):
        dup = int(np.argmax(counts > 1))
        positions = np.flatnonzero(values == values[first[dup]])[:2] + 1
        raise InputError(
            source,
            f"duplicated grid points: {gate} = {values[first[dup]]:.6g} appears twice in the "
            f"{where} (positions {positions[0]} and {positions[1]})",
        )


def read_grid(table: TextTable, *, var: str | None = None, x: str | None = None, y: str | None = None) -> xr.DataArray:
    """Build a map from a grid-format :class:`TextTable` (see module notes)."""
    src = table.source
    corner = parse_corner(table.header[0]) if table.header else None
    ylab, xlab = corner if corner else (Label("y", None, "y"), Label("x", None, "x"))
    for wanted, lab, axis in ((x, xlab, "x"), (y, ylab, "y")):
        if wanted is not None and wanted != lab.name:
            raise InputError(
                src,
                f"the grid's {axis} gate is {lab.name!r}, not {wanted!r} (a grid file fixes x "
                "as the header row and y as the first column)",
            )
    quantity = parse_label(table.meta.get("quantity", "signal"))
    if var is not None and var != quantity.name:
        raise InputError(src, f"the grid holds {quantity.name!r}, not {var!r}")
    xcells = table.header[1:]
    while xcells and xcells[-1] == "":
        xcells.pop()
    xvals = np.array([float(c) for c in xcells], dtype=np.float64)
    if xvals.size < 2 or not table.body:
        raise InputError(
            src,
            f"1-D data: the grid has {xvals.size} column(s) and {len(table.body)} row(s); a map "
            "needs at least 2 × 2 points (1-D traces are not read by load)",
        )
    texts = [table.header[0] or "y"] + [f"{xlab.name}={c}" for c in xcells]
    values, short = parse_body(table, ncols=xvals.size + 1, column_names=texts, allow_short_last=True)
    yvals = values[:, 0]
    signal = values[:, 1:]
    if np.any(~np.isfinite(yvals)):
        bad = int(np.argmax(~np.isfinite(yvals)))
        raise InputError(src, f"line {table.body[bad][0]}: missing {ylab.name} voltage in the first column")
    if not np.all(np.isfinite(xvals)):
        raise InputError(src, f"the header row holds a non-finite {xlab.name} voltage")
    if yvals.size < 2:
        raise InputError(
            src,
            "1-D data: the grid has a single row; a map needs at least 2 × 2 points "
            "(1-D traces are not read by load)",
        )
    _check_unique(src, xvals, "header row", xlab.name)
    _check_unique(src, yvals, "first column", ylab.name)
    if short:
        warnings.warn(
            f"{src}: the final row (line {table.body[-1][0]}) is incomplete; the missing "
            "points are kept as NaN",
            PartialSweepWarning,
            stacklevel=2,
        )
    attrs = meta_attrs(table)
    attrs.pop("source", None)
    attrs.pop("units", None)
    return make_map(
        signal,
        xvals,
        yvals,
        x_gate=xlab.name,
        y_gate=ylab.name,
        name=quantity.name,
        units=quantity.unit or "a.u.",
        x_units=gate_unit(src, xlab),
        y_units=gate_unit(src, ylab),
        source=src,
        attrs=attrs,
    )


def write_grid(da: xr.DataArray, handle: Any, *, delimiter: str = ",") -> None:
    """Write ``da`` in the grid layout (x voltages in the header row)."""
    ydim, xdim = (str(d) for d in da.dims)
    xv, xu = coord_in_file_units(da, xdim)
    yv, yu = coord_in_file_units(da, ydim)
    name = str(da.name) if da.name is not None else "signal"
    handle.write(f"# quantity: {format_label(name, da.attrs.get('units'))}\n")
    handle.write(attrs_comment(da))
    corner = f"{format_label(ydim, yu)} \\ {format_label(xdim, xu)}"
    handle.write(delimiter.join([corner] + [fmt_number(v) for v in xv]) + "\n")
    sig = np.asarray(da.values, dtype=np.float64)
    for yval, row in zip(yv, sig.tolist()):
        handle.write(delimiter.join([fmt_number(yval)] + [repr(v) for v in row]) + "\n")
