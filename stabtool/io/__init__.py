"""Loaders and writers: files in, maps (2-D DataArrays in volts) out, and back.

=============  ============================  ==========================================
Format         Suffixes                      Reader / writer
=============  ============================  ==========================================
NetCDF / HDF5  .nc .nc4 .h5 .hdf5 .cdf       :mod:`.netcdf` (h5netcdf; NetCDF-3 via scipy)
long table     .csv .tsv .txt .dat           :mod:`.csv_long` (one point per row)
grid table     .csv .tsv .txt .dat           :mod:`.csv_grid` (matrix, x voltages in header)
NumPy          .npz                          :mod:`.npz`
JSON results   .json                         :mod:`.jsonio` (results only, not maps)
=============  ============================  ==========================================

The format is recognised from the file's first bytes (HDF5 / NetCDF / zip
signatures) and, for text, from the header row: numbers after the first cell
mean a grid, labels mean a long table. See each module for the exact
conventions.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Mapping
from pathlib import Path

import xarray as xr

from ..errors import InputError, PartialSweepWarning
from ..mapdata import validate_map, without_infinities
from ._common import atomic_write
from ._text import is_number, read_text_table
from .csv_grid import is_grid_header, read_grid, write_grid
from .csv_long import read_long, write_long
from .detect import NETCDF_SUFFIXES, SUPPORTED_SUFFIXES, TEXT_SUFFIXES, detect_format
from .jsonio import dumps, load_json, save_json, to_jsonable
from .netcdf import open_netcdf, read_netcdf, write_netcdf
from .npz import read_npz, write_npz
from .stacks import expand_stacks, slice_ref, split_slice_ref, stack_selections

__all__ = [
    "SUPPORTED_SUFFIXES",
    "detect_format",
    "dumps",
    "expand_stacks",
    "load",
    "load_dataset",
    "load_json",
    "save_json",
    "save_map",
    "slice_ref",
    "split_slice_ref",
    "stack_selections",
    "to_jsonable",
]


def _read(path: str, kind: str, var: str | None, x: str | None, y: str | None, isel: Mapping[str, int] | None) -> xr.DataArray:
    if isel and kind not in ("netcdf", "netcdf3"):
        raise InputError(path, "isel= applies to NetCDF files only (text and .npz maps are 2-D)")
    if kind in ("netcdf", "netcdf3"):
        return read_netcdf(path, var=var, x=x, y=y, isel=isel, kind=kind)
    if kind == "npz":
        return read_npz(path, var=var, x=x, y=y)
    table = read_text_table(path)
    if table.header and table.header[0] != "" and all(is_number(c) for c in table.header if c != ""):
        raise InputError(
            path,
            "the first row holds only numbers; a header row is needed: a long table "
            "starts with labels like 'PA (mV),PB (mV),sensor (nA)', a grid with a label "
            "cell such as 'PB (mV) \\ PA (mV)' followed by the x voltages",
        )
    if is_grid_header(table.header):
        da = read_grid(table, var=var, x=x, y=y)
        da.attrs["source_format"] = "grid table"
    else:
        da = read_long(table, var=var, x=x, y=y)
        da.attrs["source_format"] = "long table"
    return da


def load(
    path: str | os.PathLike[str],
    *,
    var: str | None = None,
    x: str | None = None,
    y: str | None = None,
    isel: Mapping[str, int] | None = None,
) -> xr.DataArray:
    """Load a two-gate map from a file.

    Parameters
    ----------
    path : str or path-like
        A NetCDF/HDF5, CSV/TSV (long or grid layout) or ``.npz`` file; the
        format is detected from the content and suffix. A slice reference
        ``file.nc[rep=3]`` names one map of a stacked file
        (:mod:`stabtool.io.stacks`).
    var : str, optional, keyword-only
        Name of the measured quantity (NetCDF variable, CSV column, NPZ key).
        Default: the single 2-D variable / the third column / ``signal``.
    x, y : str, optional, keyword-only
        Gate names to put on x (last dimension) and y. Default: the file's
        order (the last NetCDF dimension, the first CSV column, ...).
    isel : mapping of str to int, optional, keyword-only
        Positions along the extra dimensions of NetCDF data with more than two
        dimensions, e.g. ``{"repetition": 0}``.

    Returns
    -------
    xarray.DataArray, shape (ny, nx)
        Dims ``(y_gate, x_gate)``; coordinates float64 in V with
        ``original_units``; ``name`` and ``attrs["units"]`` describe the
        measured quantity; ``attrs["source"]`` is ``path``. Points never
        measured are NaN (then a :class:`~stabtool.errors.PartialSweepWarning`
        is issued).

    Raises
    ------
    stabtool.errors.InputError
        One line naming the file and the fault: missing, empty, corrupt or
        unknown files, text in number columns, ragged or duplicated grid points,
        non-monotonic axes, 1-D data, 3-D data without ``isel``, all-NaN or
        constant maps, unknown units or names.

    Examples
    --------
    >>> import stabtool
    >>> m = stabtool.load("sample_data/kestrel-7_PA_PB.nc")  # doctest: +SKIP
    >>> m.dims
    ('PB', 'PA')
    """
    ref = os.fspath(path)
    src, ref_isel = split_slice_ref(ref)
    if ref_isel:
        isel = {**ref_isel, **(isel or {})}
    kind = detect_format(src)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            da = _read(src, kind, var, x, y, isel)
        except (PermissionError, IsADirectoryError) as exc:
            raise InputError(src, f"cannot read: {exc.strerror or exc}") from None
        if kind == "netcdf3":
            da.attrs["source_format"] = "NetCDF-3"
        elif kind == "netcdf":
            da.attrs["source_format"] = "NetCDF/HDF5"
        elif kind == "npz":
            da.attrs["source_format"] = "npz"
        if ref_isel:  # a slice of a stacked file is named by its reference
            da.attrs["source"] = ref
        da = without_infinities(da, source=ref)
        validate_map(da, source=ref)
    def generic(w: warnings.WarningMessage) -> bool:  # validate_map's NaN count
        return issubclass(w.category, PartialSweepWarning) and str(w.message).endswith("are missing (NaN)")

    specific = any(issubclass(w.category, PartialSweepWarning) and not generic(w) for w in caught)
    for w in caught:
        if specific and generic(w):
            continue  # the reader already said which points are missing
        warnings.warn(w.message, w.category, stacklevel=2)
    return da


def load_dataset(path: str | os.PathLike[str]) -> xr.Dataset:
    """Open a NetCDF file written by :func:`save_map` as a whole Dataset (the
    map plus any result variables), with JSON attributes decoded."""
    from ._common import decode_attrs

    src = os.fspath(path)
    kind = detect_format(src)
    if kind not in ("netcdf", "netcdf3"):
        raise InputError(src, "load_dataset reads NetCDF/HDF5 files only; use load for other formats")
    ds = open_netcdf(src, kind=kind)
    ds.attrs = decode_attrs(ds.attrs)
    for variable in ds.variables.values():
        variable.attrs = decode_attrs(variable.attrs)
    return ds


def save_map(
    obj: xr.DataArray | xr.Dataset,
    path: str | os.PathLike[str],
    *,
    layout: str = "long",
) -> None:
    """Write a map (or, for NetCDF, a Dataset of a map plus results) atomically.

    Parameters
    ----------
    obj : xarray.DataArray or xarray.Dataset
        A map in the stabtool model (dims ``(y_gate, x_gate)``, coordinates in
        V). A Dataset is accepted for NetCDF only.
    path : str or path-like
        Target; the suffix picks the format: ``.nc``/``.h5`` NetCDF-4 via
        h5netcdf (keeps every attribute, the recommended format), ``.csv``
        comma-separated, ``.tsv``/``.txt`` tab-separated, ``.npz`` NumPy.
    layout : {"long", "grid"}, keyword-only
        Layout of a text table (one point per row, or a matrix).

    Notes
    -----
    The file is written to a temporary file in the same folder and moved over
    ``path`` with :func:`os.replace`, so a failure never leaves a half-written
    file and never destroys an existing one.
    """
    target = os.fspath(path)
    suffix = Path(target).suffix.lower()
    if layout not in ("long", "grid"):
        raise InputError("layout", f"expected 'long' or 'grid', got {layout!r}")
    if isinstance(obj, xr.Dataset):
        if suffix not in NETCDF_SUFFIXES:
            raise InputError(target, "a Dataset (map plus results) can only be saved as NetCDF (.nc)")
    elif not isinstance(obj, xr.DataArray):
        raise InputError(target, f"save_map expects an xarray.DataArray or Dataset, got {type(obj).__name__}")
    elif obj.ndim != 2:
        raise InputError(target, f"save_map expects a 2-D map, got {obj.ndim}-D with dims {tuple(map(str, obj.dims))}")
    if suffix in NETCDF_SUFFIXES:
        with atomic_write(target, mode="path") as (tmp, _):
            write_netcdf(obj, tmp, target=target)
    elif suffix in TEXT_SUFFIXES:
        assert isinstance(obj, xr.DataArray)
        delimiter = "," if suffix == ".csv" else "\t"
        writer = write_grid if layout == "grid" else write_long
        with atomic_write(target, mode="w") as (_, handle):
            writer(obj, handle, delimiter=delimiter)
    elif suffix == ".npz":
        assert isinstance(obj, xr.DataArray)
        with atomic_write(target, mode="wb") as (_, handle):
            write_npz(obj, handle)
    else:
        raise InputError(
            target,
            f"unknown format (suffix {suffix or 'none'!r}); save_map writes .nc/.h5 (NetCDF), "
            ".csv/.tsv/.txt (text table), .npz",
        )
