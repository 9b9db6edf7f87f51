"""Loader of 1-D calibration traces (a gate swept finely across one transition).

Formats (chosen by suffix):

* **CSV** (``.csv``, ``.txt``, ``.dat``): optional comment lines
  ``# key: value`` (``device``, ``gate``, ``temperature_K`` or
  ``temperature_mK``), then a header such as ``PA (mV),sensor (nA)``. The
  first column is the gate (unit in brackets, volts if none); every other
  column is a signal, one trace each. A temperature column (``T (K)``,
  ``temperature (mK)``, ... or the one named by ``temperatures_from``)
  splits the rows into one trace per temperature instead.
* **NetCDF** (``.nc``, ``.h5``, ``.nc4``): every 1-D data variable is a
  trace along its coordinate; a 2-D variable whose other dimension is a
  temperature coordinate gives one trace per temperature. Temperatures come
  from the variable's or the file's attributes (``temperature_K``, ...).
* **NPZ** (``.npz``): one 1-D gate array named ``<gate>_V``, ``<gate>_mV``
  (or ``v`` in volts), signal arrays of the same length (1-D) or of shape
  (n_traces, n); optional ``temperature_K`` (scalar or one per trace),
  ``device`` and ``gate`` strings.

Every trace carries its temperature (NaN when unknown) and where it came
from. Bad files raise :class:`~stabtool.errors.InputError` naming the file
and the fault.
"""

from __future__ import annotations

import csv
import os
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..units import is_voltage_unit, voltage_scale

__all__ = ["TEMPERATURE_KEYS", "Trace1D", "load_traces"]

#: Attribute / column names recognised as a temperature (lower case), with their unit.
TEMPERATURE_KEYS: dict[str, float] = {
    "temperature_k": 1.0,
    "temperature": 1.0,
    "t_k": 1.0,
    "t_fridge": 1.0,
    "fridge_temperature": 1.0,
    "electron_temperature": 1.0,
    "t_mxc": 1.0,
    "temperature_mk": 1e-3,
    "t_mk": 1e-3,
}

_TEMP_UNITS = {"k": 1.0, "mk": 1e-3}


@dataclass(frozen=True)
class Trace1D:
    """One 1-D trace.

    Attributes
    ----------
    v : ndarray, shape (n,)
        Gate voltages, V (in file order).
    signal : ndarray, shape (n,)
        Measured signal.
    gate : str
        Name of the swept gate.
    signal_name, signal_units : str
    temperature_K : float
        Temperature of the trace, K (NaN when unknown).
    temperature_source : str
        Where the temperature came from (``"attr temperature_K"``,
        ``"column T (K)"``, ``"user"``), "" when unknown.
    device : str or None
    source : str
        File the trace came from.
    label : str
        Short name of the trace within the file.
    """

    v: np.ndarray
    signal: np.ndarray
    gate: str
    signal_name: str
    signal_units: str
    temperature_K: float
    temperature_source: str
    device: str | None
    source: str
    label: str


def _parse_temperature_spec(spec: str | None) -> tuple[str | None, str | None]:
    """``"attr:NAME"`` / ``"column:NAME"`` / ``"NAME"`` → (kind, name)."""
    if spec is None:
        return None, None
    m = re.match(r"^(attr|attribute|column|col|coord)\s*[:=]\s*(.+)$", spec.strip())
    if m:
        kind = "attr" if m.group(1).startswith("attr") else "column"
        return kind, m.group(2).strip()
    return "any", spec.strip()


def _name_unit(header: str) -> tuple[str, str]:
    """``"PA (mV)"`` → ("PA", "mV"); ``"PA [V]"`` too; no unit → ""."""
    m = re.match(r"^\s*(.*?)\s*[\(\[]\s*([^\)\]]*)\s*[\)\]]\s*$", header)
    if m:
        return m.group(1), m.group(2)
    return header.strip(), ""


def _temp_scale(name: str, unit: str) -> float | None:
    """Scale to K if (name, unit) denotes a temperature, else None."""
    key = name.strip().lower().replace(" ", "_")
    if unit and unit.strip().lower() in _TEMP_UNITS and (key in TEMPERATURE_KEYS or key.startswith("t")):
        return _TEMP_UNITS[unit.strip().lower()]
    if key in TEMPERATURE_KEYS:
        return TEMPERATURE_KEYS[key]
    return None


def _attr_temperature(attrs: dict, name: str | None) -> tuple[float, str]:
    """Temperature from attributes: the named key, or any recognised key."""
    lowered = {str(k).lower(): k for k in attrs}
    keys = [name] if name else list(TEMPERATURE_KEYS)
    for key in keys:
        real = attrs.get(key) if key in attrs else attrs.get(lowered.get(key.lower(), ""), None)
        if real is None:
            continue
        scale = TEMPERATURE_KEYS.get(key.lower(), 1.0)
        try:
            val = float(np.asarray(real).ravel()[0]) * scale
        except (TypeError, ValueError, IndexError):
            raise InputError(None, f"temperature attribute {key!r} = {real!r} is not a number")
        return val, f"attr {key}"
    return float("nan"), ""


def _voltage(source: Path, name: str, unit: str) -> float:
    try:
        return voltage_scale(unit)
    except KeyError as exc:
        raise InputError(source, f"gate column {name!r}: {exc.args[0]}") from None


# ------------------------------------------------------------------------------------- CSV


def _load_csv(path: Path, temp_kind: str | None, temp_name: str | None) -> list[Trace1D]:
    meta: dict[str, str] = {}
    rows: list[list[str]] = []
    header: list[str] | None = None
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            lines = fh.read().splitlines()
    except UnicodeDecodeError:
        raise InputError(path, "not a text file (cannot decode as UTF-8); expected a CSV trace") from None
    body = []
    for line in lines:
        s = line.strip()
        if not s:
            continue
        if s.startswith("#"):
            m = re.match(r"^#\s*([^:=]+?)\s*[:=]\s*(.*)$", s)
            if m:
                meta[m.group(1).strip().lower()] = m.group(2).strip()
            continue
        body.append(line)
    if not body:
        raise InputError(path, "no header line and no data; expected a header like 'PA (mV),sensor (nA)'")
    delim = ";" if body[0].count(";") > body[0].count(",") else ("\t" if "\t" in body[0] and "," not in body[0] else ",")
    reader = csv.reader(body, delimiter=delim)
    header = [h.strip() for h in next(reader)]
    if len(header) < 2:
        raise InputError(path, f"header {body[0]!r} has {len(header)} column; expected the gate and at least one signal column")
    for i, row in enumerate(reader, start=2):
        if len(row) != len(header):
            raise InputError(path, f"data row {i} has {len(row)} fields, the header has {len(header)}")
        rows.append(row)
    if len(rows) < 2:
        raise InputError(path, "fewer than 2 data rows")
    data = np.empty((len(rows), len(header)))
    for i, row in enumerate(rows):
        for j, cell in enumerate(row):
            try:
                data[i, j] = float(cell) if cell.strip() not in ("", "nan", "NaN") else np.nan
            except ValueError:
                raise InputError(path, f"data row {i + 2}: {cell.strip()!r} in column {header[j]!r} is not a number") from None
    names_units = [_name_unit(h) for h in header]
    gate, gunit = names_units[0]
    if meta.get("gate") and gate.lower() in ("v", "gate", "voltage"):
        gate = meta["gate"]
    v = data[:, 0] * _voltage(path, header[0], gunit)
    device = meta.get("device")
    # temperature column
    tcol = None
    if temp_kind in ("column", "any"):
        for j, h in enumerate(header[1:], start=1):
            if h == temp_name or names_units[j][0] == temp_name:
                tcol = j
        if tcol is None and temp_kind == "column":
            raise InputError(path, f"no column {temp_name!r}; columns are {', '.join(header)}")
    if tcol is None and temp_kind is None:
        for j in range(1, len(header)):
            if _temp_scale(*names_units[j]) is not None:
                tcol = j
                break
    file_temp, file_src = float("nan"), ""
    if tcol is None and temp_kind in (None, "attr", "any"):
        # metadata lines act as attributes
        mk = {k.replace(" ", "_"): v_ for k, v_ in meta.items()}
        try:
            file_temp, file_src = _attr_temperature(mk, temp_name if temp_kind in ("attr", "any") else None)
        except InputError as exc:
            raise InputError(path, exc.fault) from None
        if temp_kind == "attr" and not file_src:
            raise InputError(path, f"no '# {temp_name}: ...' line in the file header")
        if temp_kind == "any" and not file_src:
            raise InputError(path, f"no column or '# {temp_name}: ...' line named {temp_name!r}")
        file_src = file_src.replace("attr", "header line") if file_src else ""
    traces = []
    sig_cols = [j for j in range(1, len(header)) if j != tcol]
    if not sig_cols:
        raise InputError(path, "no signal column besides the gate and temperature columns")
    if tcol is not None:
        name, unit = names_units[tcol]
        scale = _temp_scale(name, unit) or 1.0
        tvals = data[:, tcol] * scale
        if not np.all(np.isfinite(tvals)):
            raise InputError(path, f"temperature column {header[tcol]!r} holds missing values")
        uniq = np.unique(tvals)
        for j in sig_cols:
            for t in uniq:
                sel = tvals == t
                traces.append(
                    Trace1D(v[sel], data[sel, j], gate, names_units[j][0], names_units[j][1], float(t),
                            f"column {header[tcol]}", device, str(path), f"{names_units[j][0]} at {t:g} K")
                )
    else:
        for j in sig_cols:
            traces.append(
                Trace1D(v, data[:, j], gate, names_units[j][0], names_units[j][1], file_temp, file_src,
                        device, str(path), names_units[j][0])
            )
    return traces


# ------------------------------------------------------------------------------------ NetCDF


def _load_netcdf(path: Path, temp_kind: str | None, temp_name: str | None) -> list[Trace1D]:
    import xarray as xr

    try:
        ds = xr.load_dataset(path, engine="h5netcdf")
    except Exception as exc:  # noqa: BLE001 - any reader failure is bad input
        raise InputError(path, f"cannot be read as NetCDF ({type(exc).__name__}: {exc})") from None
    device = ds.attrs.get("device")
    traces = []
    for name, da in ds.data_vars.items():
        if da.ndim == 0 or not np.issubdtype(da.dtype, np.number):
            continue
        if da.ndim > 2:
            raise InputError(path, f"variable {name!r} has {da.ndim} dimensions; expected 1-D traces or (temperature, gate)")
        # the gate dimension: the one whose coordinate has a voltage unit, else the last
        gdim = da.dims[-1]
        for d in da.dims:
            if d in ds.coords and is_voltage_unit(ds[d].attrs.get("units")):
                gdim = d
        if gdim not in ds.coords:
            raise InputError(path, f"variable {name!r}: dimension {gdim!r} has no coordinate; the gate voltages are unknown")
        unit = ds[gdim].attrs.get("units", "V")
        v = np.asarray(ds[gdim].values, float) * _voltage(path, str(gdim), unit)
        sunit = str(da.attrs.get("units", ""))
        if da.ndim == 1:
            t, src = _nc_temperature(path, da.attrs, ds.attrs, temp_kind, temp_name)
            traces.append(Trace1D(v, np.asarray(da.values, float), str(gdim), str(name), sunit, t, src,
                                  device, str(path), str(name)))
            continue
        other = [d for d in da.dims if d != gdim][0]
        da = da.transpose(other, gdim)
        tvals = None
        if other in ds.coords:
            cname = str(other)
            tscale = _temp_scale(cname, str(ds[other].attrs.get("units", "")))
            if temp_name in (cname,) or (temp_kind is None and tscale is not None):
                tvals = np.asarray(ds[other].values, float) * (tscale or 1.0)
        for i in range(da.shape[0]):
            if tvals is not None:
                t, src = float(tvals[i]), f"coordinate {other}"
            else:
                t, src = _nc_temperature(path, da.attrs, ds.attrs, temp_kind, temp_name)
            label = f"{name}[{other}={ds[other].values[i] if other in ds.coords else i}]"
            traces.append(Trace1D(v, np.asarray(da.values[i], float), str(gdim), str(name), sunit, t, src,
                                  device, str(path), label))
    if not traces:
        raise InputError(path, "no numeric data variable; expected a 1-D trace along a gate coordinate")
    return traces


def _nc_temperature(path, vattrs, fattrs, kind, name) -> tuple[float, str]:
    if kind == "column":
        raise InputError(path, f"a NetCDF file has no columns; use 'attr:{name}' or a temperature coordinate")
    try:
        t, src = _attr_temperature(dict(vattrs), name if kind else None)
        if not src:
            t, src = _attr_temperature(dict(fattrs), name if kind else None)
    except InputError as exc:
        raise InputError(path, exc.fault) from None
    if kind in ("attr", "any") and not src:
        raise InputError(path, f"no attribute {name!r} on the variable or the file")
    return t, src


# --------------------------------------------------------------------------------------- NPZ


def _load_npz(path: Path, temp_kind: str | None, temp_name: str | None) -> list[Trace1D]:
    try:
        with np.load(path, allow_pickle=False) as z:
            arrays = {k: z[k] for k in z.files}
    except Exception as exc:  # noqa: BLE001
        raise InputError(path, f"cannot be read as NPZ ({type(exc).__name__}: {exc})") from None
    gkey = None
    for k in arrays:
        if k == "v" or re.match(r"^.+_(m|u|µ|n)?V$", k):
            gkey = k
            break
    if gkey is None:
        raise InputError(path, f"no gate array (named '<gate>_V', '<gate>_mV' or 'v'); arrays are {', '.join(arrays)}")
    if gkey == "v":
        gate, unit = str(arrays.get("gate", "v")), "V"
    else:
        gate, unit = gkey.rsplit("_", 1)
    v = np.asarray(arrays[gkey], float).ravel() * _voltage(path, gkey, unit)
    device = str(arrays["device"]) if "device" in arrays else None
    tkey = temp_name if temp_kind else None
    temps = None
    src = ""
    if tkey is not None:
        if tkey not in arrays:
            raise InputError(path, f"no array {tkey!r}; arrays are {', '.join(arrays)}")
        temps, src = np.atleast_1d(np.asarray(arrays[tkey], float)), f"array {tkey}"
    else:
        for k in arrays:
            if k.lower() in TEMPERATURE_KEYS:
                temps = np.atleast_1d(np.asarray(arrays[k], float)) * TEMPERATURE_KEYS[k.lower()]
                src = f"array {k}"
                break
    traces = []
    skip = {gkey, "device", "gate", tkey} | {k for k in arrays if k.lower() in TEMPERATURE_KEYS}
    for k, a in arrays.items():
        if k in skip or not np.issubdtype(a.dtype, np.number):
            continue
        a = np.asarray(a, float)
        if a.ndim == 1 and a.size == v.size:
            rows = a[None, :]
        elif a.ndim == 2 and a.shape[1] == v.size:
            rows = a
        else:
            raise InputError(path, f"array {k!r} has shape {a.shape}; expected ({v.size},) or (n_traces, {v.size}) to match {gkey!r}")
        for i, row in enumerate(rows):
            t = float("nan")
            if temps is not None:
                if temps.size == 1:
                    t = float(temps[0])
                elif temps.size == rows.shape[0]:
                    t = float(temps[i])
                else:
                    raise InputError(path, f"{temps.size} temperatures for {rows.shape[0]} traces in {k!r}")
            traces.append(Trace1D(v, row, gate, k, "", t, src if temps is not None else "", device, str(path),
                                  k if rows.shape[0] == 1 else f"{k}[{i}]"))
    if not traces:
        raise InputError(path, f"no signal array besides {gkey!r}")
    return traces


# ---------------------------------------------------------------------------------- public


def load_traces(
    path: str | os.PathLike[str],
    *,
    temperature_K: float | None = None,
    temperatures_from: str | None = None,
) -> list[Trace1D]:
    """Load the 1-D traces of one file.

    Parameters
    ----------
    path : str or PathLike
        CSV, NetCDF or NPZ file (see the module docstring for the layouts).
    temperature_K : float, optional
        Temperature of every trace, K; overrides the file.
    temperatures_from : str, optional
        Where to read temperatures: ``"attr:NAME"``, ``"column:NAME"`` or
        ``"NAME"`` (attribute, column, coordinate or array of that name).
        Without it, recognised names (``temperature_K``, ``T (K)``,
        ``temperature (mK)``, ...) are used when present.

    Returns
    -------
    list of Trace1D
        At least one trace, each with at least 2 points.

    Raises
    ------
    InputError
        File missing, unreadable, or without a usable trace.
    """
    p = Path(path)
    if temperature_K is not None and temperatures_from is not None:
        raise InputError("--temperature", "give either a temperature or where to read it from, not both")
    if temperature_K is not None and not (np.isfinite(temperature_K) and temperature_K > 0):
        raise InputError("temperature_K", f"expected a positive temperature in K, got {temperature_K!r}")
    if not p.exists():
        raise InputError(p, "no such file")
    if p.is_dir():
        raise InputError(p, "is a folder; expected a trace file (.csv, .nc, .npz)")
    kind, name = _parse_temperature_spec(temperatures_from)
    suffix = p.suffix.lower()
    if suffix in (".csv", ".txt", ".dat", ".tsv"):
        traces = _load_csv(p, kind, name)
    elif suffix in (".nc", ".nc4", ".h5", ".hdf5", ".cdf"):
        traces = _load_netcdf(p, kind, name)
    elif suffix == ".npz":
        traces = _load_npz(p, kind, name)
    else:
        raise InputError(p, f"unknown trace format {suffix!r}; expected .csv, .nc or .npz")
    out = []
    for tr in traces:
        if temperature_K is not None:
            tr = Trace1D(tr.v, tr.signal, tr.gate, tr.signal_name, tr.signal_units, float(temperature_K),
                         "user", tr.device, tr.source, tr.label)
        if np.isfinite(tr.temperature_K) and tr.temperature_K <= 0:
            raise InputError(p, f"trace {tr.label!r}: temperature {tr.temperature_K} K is not positive")
        if np.count_nonzero(np.isfinite(tr.v) & np.isfinite(tr.signal)) < 2:
            raise InputError(p, f"trace {tr.label!r} has fewer than 2 finite points")
        out.append(tr)
    return out
