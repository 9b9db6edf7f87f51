"""JSON for results: NumPy values, dataclasses and NaN made JSON-safe, written atomically."""

from __future__ import annotations

import dataclasses
import json
import math
import os
from enum import Enum
from pathlib import PurePath
from typing import Any

import numpy as np

from ..errors import InputError
from ._common import atomic_write

__all__ = ["dumps", "load_json", "save_json", "to_jsonable"]


def to_jsonable(obj: Any) -> Any:
    """Convert ``obj`` to plain JSON types.

    NumPy scalars and arrays become numbers and lists, non-finite floats
    become ``None`` (JSON null: "not determined"), dataclasses and objects with
    a ``to_dict()`` method become dicts, paths become strings, xarray objects
    become their values (DataArray) or a dict of variables (Dataset).
    """
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, (int, np.integer)) and not isinstance(obj, np.bool_):
        return int(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        return value if math.isfinite(value) else None
    if isinstance(obj, complex):
        return {"real": to_jsonable(obj.real), "imag": to_jsonable(obj.imag)}
    if isinstance(obj, np.ndarray):
        return [to_jsonable(v) for v in obj.tolist()] if obj.ndim else to_jsonable(obj.item())
    if isinstance(obj, PurePath):
        return os.fspath(obj)
    if isinstance(obj, Enum):
        return to_jsonable(obj.value)
    to_dict = getattr(obj, "to_dict", None)
    if callable(to_dict) and not isinstance(obj, type):
        try:
            import xarray as xr

            if isinstance(obj, xr.DataArray):
                return to_jsonable(obj.values)
            if isinstance(obj, xr.Dataset):
                return {str(k): to_jsonable(v.values) for k, v in obj.data_vars.items()}
        except ImportError:  # pragma: no cover
            pass
        return to_jsonable(to_dict())
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: to_jsonable(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        return [to_jsonable(v) for v in obj]
    raise TypeError(f"cannot convert {type(obj).__name__} to JSON")


def dumps(obj: Any, *, indent: int | None = 2) -> str:
    """JSON text of ``obj`` (see :func:`to_jsonable`); never emits NaN."""
    return json.dumps(to_jsonable(obj), indent=indent, allow_nan=False, ensure_ascii=False)


def save_json(obj: Any, path: str | os.PathLike[str], *, indent: int | None = 2) -> None:
    """Write ``obj`` as JSON to ``path`` atomically.

    The text is built first, then written to a temp file in the same folder
    and moved over ``path`` with :func:`os.replace`: a failure leaves an
    existing file untouched.

    Parameters
    ----------
    obj : object
        Anything :func:`to_jsonable` converts (dicts, lists, NumPy values,
        dataclasses, objects with ``to_dict()``).
    path : str or path-like
        Target file.
    indent : int or None, keyword-only
        Indentation; ``None`` for one line.
    """
    text = dumps(obj, indent=indent) + "\n"
    with atomic_write(path, mode="w") as (_, handle):
        assert handle is not None
        handle.write(text)


def load_json(path: str | os.PathLike[str]) -> Any:
    """Read a JSON file; bad JSON raises :class:`InputError` with line and column."""
    p = os.fspath(path)
    try:
        with open(p, encoding="utf-8") as fh:
            return json.load(fh)
    except FileNotFoundError:
        raise InputError(p, "no such file") from None
    except json.JSONDecodeError as exc:
        raise InputError(p, f"not valid JSON: {exc.msg} at line {exc.lineno}, column {exc.colno}") from None
    except UnicodeDecodeError:
        raise InputError(p, "not valid JSON: the file is not UTF-8 text") from None
