"""Durable, resumable storage of batch results.

Layout of a batch output folder ``DIR``::

    DIR/.records/<hash>.json   one record per map, written once, atomically
    DIR/.records/batch.json    the analysis settings the batch was started with
    DIR/plots/<stem>-<hash8>.png
    DIR/results.csv            the table, rebuilt atomically from the records
    DIR/results.nc             the same table as NetCDF (dimension ``map``)

A record is the single source of truth: the tables are derived from the
records and can always be rebuilt. Every file is written to a temporary name
in the same folder and moved into place with :func:`os.replace`, which is
atomic on POSIX and Windows, so a kill at any instant (even SIGKILL) leaves
either the old or the new complete file, never half of one. Records are keyed
by the SHA-256 of the file content, so a resumed batch skips exactly the maps
already finished, whatever their path, and never writes a map twice.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..io.atomic import atomic_write, atomic_write_bytes, atomic_write_text
from ..report.caution import RESULTS_CAUTION

__all__ = [
    "STATUSES",
    "BatchRecord",
    "ResultStore",
    "atomic_write_bytes",
    "atomic_write_text",
    "content_hash",
    "flatten_result",
    "records_table",
    "write_csv",
    "write_netcdf",
]

#: Status of a row: the analysis ran and is trusted, ran but is doubtful, or failed.
STATUSES = ("ok", "doubtful", "failed")

#: Columns every table starts with, in this order.
BASE_COLUMNS = (
    "file",
    "hash",
    "status",
    "reason",
    "time",
    "x_gate",
    "y_gate",
    "warnings",
    "plot",
    "elapsed_s",
)

_MAX_ARRAY_CELLS = 16

#: Columns always stored as text, even when empty.
_TEXT_COLUMNS = frozenset({"file", "hash", "status", "reason", "time", "x_gate", "y_gate",
                           "warnings", "plot"})  # numeric lists up to 4x4 become columns; longer ones are counted only


def content_hash(path: str | os.PathLike[str], *, chunk: int = 1 << 20) -> str:
    """SHA-256 of a file's bytes, first 16 hex digits (64 bits).

    Raises
    ------
    InputError
        When the file cannot be read.
    """
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            while True:
                block = fh.read(chunk)
                if not block:
                    break
                h.update(block)
    except OSError as exc:
        raise InputError(path, f"cannot be read ({exc.strerror or exc})") from None
    return h.hexdigest()[:16]


def _jsonable(value: Any) -> Any:
    """Convert numpy scalars/arrays and tuples to plain JSON types; NaN/inf to None."""
    t = type(value)  # exact plain types first: they are nearly every leaf of a result
    if t is float:
        return value if math.isfinite(value) else None
    if t is str or t is bool or t is int or value is None:
        return value
    if t is dict:
        return {str(k): _jsonable(v) for k, v in value.items()}
    if t is list or t is tuple:
        return [_jsonable(v) for v in value]
    if isinstance(value, Mapping):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        return v if math.isfinite(v) else None
    if isinstance(value, str):
        return str(value)
    return str(value)


@dataclass(frozen=True)
class BatchRecord:
    """Outcome of one map in a batch.

    Attributes
    ----------
    file : str
        Path of the map file as found from the inputs.
    hash : str
        Content hash (:func:`content_hash`), the record's key.
    status : {"ok", "doubtful", "failed"}
        ``ok``: the analysis ran and its quality verdict is ok; ``doubtful``:
        it ran but the verdict is not ok; ``failed``: it did not run.
    reason : str or None
        One-line reason of a failure, or None.
    order : int
        Position of the file in the input order.
    time : str or None
        Time of the sweep (ISO 8601) when the file says it, else None.
    plot : str or None
        Path of the annotated plot, relative to the output folder.
    elapsed_s : float
        Wall time of the analysis in the worker, s.
    result : dict or None
        The JSON of ``stabtool analyze --json`` for this map.
    info : dict or None
        Device, gates, voltage window and shape of the map, when the
        pipeline's result exposes the map (used to find repeated sweeps).
    """

    file: str
    hash: str
    status: str
    reason: str | None = None
    order: int = 0
    time: str | None = None
    plot: str | None = None
    elapsed_s: float = float("nan")
    result: dict | None = None
    info: dict | None = None

    def __post_init__(self) -> None:
        if self.status not in STATUSES:
            raise ValueError(f"status must be one of {STATUSES}, got {self.status!r}")

    def to_dict(self, *, plain_result: bool = False) -> dict:
        """Plain-JSON form (NaN becomes null).

        ``plain_result``: ``result`` is already plain JSON (the output of ``_jsonable``, as
        the batch workers send it) and is taken as it is instead of being converted again
        (a full pass over a result of thousands of numbers, once per map in the parent).
        """
        out = _jsonable(
            {
                "file": self.file,
                "hash": self.hash,
                "status": self.status,
                "reason": self.reason,
                "order": self.order,
                "time": self.time,
                "plot": self.plot,
                "elapsed_s": self.elapsed_s,
                "result": None if plain_result else self.result,
                "info": self.info,
            }
        )
        if plain_result:
            out["result"] = self.result
        return out

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> BatchRecord:
        """Inverse of :meth:`to_dict`."""
        elapsed = d.get("elapsed_s")
        return cls(
            file=str(d["file"]),
            hash=str(d["hash"]),
            status=str(d["status"]),
            reason=d.get("reason"),
            order=int(d.get("order") or 0),
            time=d.get("time"),
            plot=d.get("plot"),
            elapsed_s=float("nan") if elapsed is None else float(elapsed),
            result=d.get("result"),
            info=d.get("info"),
        )

    def row(self) -> dict[str, Any]:
        """The record as one flat table row (see :func:`flatten_result`).

        Computed once per record and kept (the tables are rebuilt from all
        records several times during a batch; records are not modified).
        """
        cached = self.__dict__.get("_row")
        if cached is None:
            cached = self._flat_row()
            object.__setattr__(self, "_row", cached)  # frozen dataclass: a private memo
        return dict(cached)

    def _row_keys(self) -> tuple[str, ...]:
        """Column names of :meth:`row`, in order (kept with the memo)."""
        keys = self.__dict__.get("_keys")
        if keys is None:
            keys = tuple(self.row())
            object.__setattr__(self, "_keys", keys)
        return keys

    def _flat_row(self) -> dict[str, Any]:
        flat = flatten_result(self.result or {})
        warnings = flat.pop("quality.warnings", None)
        row: dict[str, Any] = {
            "file": self.file,
            "hash": self.hash,
            "status": self.status,
            "reason": self.reason,
            "time": self.time,
            "x_gate": flat.pop("x_gate", None),
            "y_gate": flat.pop("y_gate", None),
            "warnings": warnings,
            "plot": self.plot,
            "elapsed_s": self.elapsed_s if math.isfinite(self.elapsed_s) else None,
        }
        row.update(flat)
        return row


def flatten_result(result: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    """Flatten an analysis JSON into ``{column: scalar}``.

    Rules: nested objects join their keys with ``.`` (``slopes.dot1``);
    numeric lists of at most 16 cells become one column per cell with the
    indices appended (``virtual_gate_matrix.0.1``); lists of strings are
    joined with `` | `` (``quality.warnings``); other lists (line lists,
    charge-state tables) are replaced by their length (``lines.n``).

    Parameters
    ----------
    result : mapping
        The JSON object of one map.
    prefix : str
        Prefix of the column names (used in the recursion).

    Returns
    -------
    dict
        Column name → bool, int, float, str or None.
    """
    out: dict[str, Any] = {}
    for key, value in result.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping):
            out.update(flatten_result(value, prefix=f"{name}."))
        elif isinstance(value, (list, tuple, np.ndarray)):
            out.update(_flatten_list(name, value))
        else:
            out[name] = _jsonable(value)
    return out


def _flatten_list(name: str, value: Any) -> dict[str, Any]:
    items = list(value.tolist() if isinstance(value, np.ndarray) else value)
    if all(isinstance(v, str) for v in items):
        return {name: " | ".join(items)}
    try:
        arr = np.asarray(items, dtype=object)
    except Exception:  # noqa: BLE001 - ragged lists are just counted
        arr = None
    numeric = (
        arr is not None
        and arr.size <= _MAX_ARRAY_CELLS
        and arr.dtype == object
        and all(v is None or isinstance(v, (bool, int, float, np.number)) for v in arr.ravel())
    )
    if numeric and arr is not None and arr.ndim >= 1:
        return {
            name + "." + ".".join(str(i) for i in idx): _jsonable(arr[idx])
            for idx in np.ndindex(arr.shape)
        }
    return {f"{name}.n": len(items)}


def records_table(records: Iterable[BatchRecord]) -> tuple[list[str], list[dict[str, Any]]]:
    """Rows of the results table, sorted by input order then file name.

    Returns
    -------
    columns : list of str
        :data:`BASE_COLUMNS` first, then every other column in order of first
        appearance.
    rows : list of dict
        One per record.
    """
    recs, columns = _sorted_with_columns(records)
    return columns, [r.row() for r in recs]


def _sorted_with_columns(records: Iterable[BatchRecord]) -> tuple[list[BatchRecord], list[str]]:
    """Records in table order (input order, then file name) and the table's columns.

    :data:`BASE_COLUMNS` first, then every other column in order of first appearance.
    """
    recs = sorted(records, key=lambda r: (r.order, r.file))
    columns = list(BASE_COLUMNS)
    seen = set(columns)
    for r in recs:
        for key in r._row_keys():
            if key not in seen:
                seen.add(key)
                columns.append(key)
    return recs, columns


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    return str(value)


def write_csv(path: str | os.PathLike[str], records: Iterable[BatchRecord], *,
              cache: dict | None = None) -> None:
    """Write the results table as CSV, atomically.

    ``cache``: a dict kept by the caller between rebuilds of the same table (the batch
    rebuilds it every few seconds while maps arrive): each record's rendered line is
    kept there and reused while the columns stay the same, so a rebuild formats only
    the new records. The file is the same with or without it.
    """
    recs, columns = _sorted_with_columns(records)
    if cache is None:
        cache = {}
    key_cols = tuple(columns)
    if cache.get("columns") != key_cols:
        cache.clear()
        cache["columns"] = key_cols
    lines: dict = cache.setdefault("lines", {})
    buf = io.StringIO()
    writer = csv.writer(buf, lineterminator="\n")
    writer.writerow(columns)
    out = [buf.getvalue()]
    for r in recs:
        hit = lines.get(r.hash)
        if hit is None or hit[0] is not r:  # new, or replaced by a rerun
            row = r.row()
            buf.seek(0)
            buf.truncate()
            writer.writerow([_cell(row.get(c)) for c in columns])
            hit = lines[r.hash] = (r, buf.getvalue())
        out.append(hit[1])
    atomic_write_text(path, "".join(out))


def _column_array(values: Sequence[Any]) -> np.ndarray:
    present = [v for v in values if v is not None]
    if present and all(isinstance(v, (bool, np.bool_)) for v in present):
        return np.array([np.nan if v is None else float(v) for v in values])
    if all(isinstance(v, (int, float, np.number)) and not isinstance(v, bool) for v in present):
        return np.array([np.nan if v is None else float(v) for v in values], dtype=np.float64)
    return np.array(["" if v is None else _cell(v) for v in values], dtype=object)


def write_netcdf(path: str | os.PathLike[str], records: Iterable[BatchRecord]) -> None:
    """Write the results table as NetCDF (one variable per column, dimension ``map``), atomically.

    Numeric and boolean columns are float64 with NaN for missing values
    (booleans as 0/1, marked ``boolean="true"``); other columns are strings
    with "" for missing values.
    """
    import xarray as xr

    columns, rows = records_table(records)
    data_vars = {}
    for c in columns:
        values = [row.get(c) for row in rows]
        if c in _TEXT_COLUMNS:
            arr = np.array(["" if v is None else str(v) for v in values], dtype=object)
        else:
            arr = _column_array(values)
        attrs = {}
        present = [v for v in values if v is not None]
        if present and all(isinstance(v, bool) for v in present):
            attrs["boolean"] = "true"
        data_vars[c] = ("map", arr, attrs)
    ds = xr.Dataset(
        data_vars,
        attrs={
            "title": "stabtool batch results",
            "caution": CAUTION,
        },
    )
    with atomic_write(path, mode="path") as (tmp, _):
        ds.to_netcdf(tmp, engine="h5netcdf")


#: The caution printed with every batch summary.
CAUTION = RESULTS_CAUTION


class ResultStore:
    """The records of one batch output folder.

    Parameters
    ----------
    out_dir : path
        The batch output folder (created if missing).

    Notes
    -----
    Only the process that runs the batch writes here; workers return their
    results (and plot bytes) to it. Reading tolerates anything a kill can
    leave behind: stray temporary files are ignored and removed.
    """

    RECORDS = ".records"
    SETTINGS = "batch.json"

    def __init__(self, out_dir: str | os.PathLike[str]) -> None:
        self.out_dir = Path(out_dir)
        self.records_dir = self.out_dir / self.RECORDS
        self.plots_dir = self.out_dir / "plots"
        self._csv_cache: dict = {}  # rendered table lines, reused between rebuilds (see write_csv)

    def __repr__(self) -> str:
        return f"ResultStore({str(self.out_dir)!r})"

    def create(self) -> None:
        """Make the folders."""
        self.records_dir.mkdir(parents=True, exist_ok=True)
        self.plots_dir.mkdir(parents=True, exist_ok=True)
        for folder in (self.out_dir, self.records_dir, self.plots_dir, self.out_dir / "drift"):
            for stray in folder.glob(".tmp-*"):  # left by a kill between write and rename
                try:
                    stray.unlink()
                except OSError:
                    pass
        self.clear_features()  # a killed run's feature images (its maps are loaded again when needed)

    def has_records(self) -> bool:
        """True when the folder holds records of an earlier batch."""
        return self.records_dir.is_dir() and any(
            not p.name.startswith(".") for p in self.records_dir.glob("*.json")
        )

    # settings -----------------------------------------------------------
    def read_settings(self) -> dict | None:
        """The settings saved by :meth:`write_settings`, or None."""
        path = self.records_dir / self.SETTINGS
        try:
            return json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return None

    def write_settings(self, settings: Mapping[str, Any]) -> None:
        """Save the analysis settings of this batch (checked on ``--resume``)."""
        atomic_write_text(self.records_dir / self.SETTINGS, json.dumps(_jsonable(settings), indent=1))

    # records --------------------------------------------------------------
    def record_path(self, key: str) -> Path:
        return self.records_dir / f"{key}.json"

    def write(self, record: BatchRecord, *, plain_result: bool = False) -> None:
        """Store one record atomically (replacing an earlier one with the same hash).

        ``plain_result``: see :meth:`BatchRecord.to_dict`.
        """
        atomic_write_text(self.record_path(record.hash), json.dumps(record.to_dict(plain_result=plain_result)))

    FEATURES = ".drift-features"

    def write_feature(self, key: str, source: str, feature: Any) -> Any:
        """Save a map's drift feature image (``numpy.save``) until the drift has run.

        Returns the :class:`~stabtool.batch.drift.PreparedSweep` that points at it. The
        files live in ``.records/.drift-features`` and are removed by :meth:`clear_features`.
        """
        import numpy as np

        from .drift import PreparedSweep

        folder = self.records_dir / self.FEATURES
        folder.mkdir(parents=True, exist_ok=True)
        path = folder / f"{key}.npy"
        np.save(path, np.ascontiguousarray(feature.img), allow_pickle=False)
        return PreparedSweep.of(source, str(path), feature)

    def clear_features(self) -> None:
        """Remove the drift feature images of this run (and any left by a killed one)."""
        import shutil

        shutil.rmtree(self.records_dir / self.FEATURES, ignore_errors=True)

    def write_plot(self, name: str, data: bytes) -> str:
        """Store plot bytes atomically under ``plots/``; return the path relative to DIR."""
        atomic_write_bytes(self.plots_dir / name, data, fsync=False)
        return f"plots/{name}"

    def load(self) -> dict[str, BatchRecord]:
        """Every stored record, keyed by content hash."""
        out: dict[str, BatchRecord] = {}
        if not self.records_dir.is_dir():
            return out
        for path in self.records_dir.glob("*.json"):
            if path.name == self.SETTINGS or path.name.startswith("."):
                continue
            try:
                rec = BatchRecord.from_dict(json.loads(path.read_text(encoding="utf-8")))
            except (OSError, ValueError, KeyError, TypeError):
                continue  # cannot happen with atomic writes; never fatal
            out[rec.hash] = rec
        return out

    def write_tables(self, records: Iterable[BatchRecord], *, netcdf: bool = True) -> None:
        """Rebuild ``results.csv`` (and ``results.nc``) from ``records``, atomically."""
        recs = list(records)
        write_csv(self.out_dir / "results.csv", recs, cache=self._csv_cache)
        if netcdf:
            write_netcdf(self.out_dir / "results.nc", recs)
