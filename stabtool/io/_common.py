"""Helpers shared by the readers and writers: atomic writes, name suggestions,
attributes that survive a file round trip."""

from __future__ import annotations

import contextlib
import difflib
import json
from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np

from ..errors import InputError
from .atomic import atomic_write

__all__ = [
    "JSON_ATTRS_KEY",
    "atomic_write",
    "checked_voltage_scale",
    "decode_attrs",
    "encode_attrs",
    "fmt_number",
    "suggest",
]

#: Attribute listing the names of attributes stored as JSON text in a file.
JSON_ATTRS_KEY = "stabtool_json_attrs"


def suggest(name: str, choices: Iterable[str]) -> str:
    """``"; did you mean 'x'?"`` for close names (difflib), else ``""``."""
    close = difflib.get_close_matches(str(name), [str(c) for c in choices], n=3, cutoff=0.5)
    if not close:
        return ""
    return "; did you mean " + " or ".join(repr(c) for c in close) + "?"


def _jsonable(value: Any) -> Any:
    from .jsonio import to_jsonable

    return to_jsonable(value)


def encode_attrs(attrs: Mapping[str, Any]) -> dict[str, Any]:
    """Attributes a NetCDF file can hold: dicts, lists of mixed type, bools and
    ``None`` become JSON text, listed in ``attrs[JSON_ATTRS_KEY]``."""
    out: dict[str, Any] = {}
    encoded: list[str] = []
    for key, value in attrs.items():
        if key == JSON_ATTRS_KEY:
            continue
        if isinstance(value, (str, int, float, np.integer, np.floating)) and not isinstance(value, bool) or isinstance(value, np.ndarray) and value.dtype.kind in "iuf" and value.ndim <= 1:
            out[key] = value
        elif (
            isinstance(value, (list, tuple))
            and value
            and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
        ):
            out[key] = np.asarray(value, dtype=np.float64)
        else:
            out[key] = json.dumps(_jsonable(value))
            encoded.append(str(key))
    if encoded:
        out[JSON_ATTRS_KEY] = json.dumps(encoded)
    return out


def decode_attrs(attrs: Mapping[str, Any]) -> dict[str, Any]:
    """Inverse of :func:`encode_attrs`."""
    out = dict(attrs)
    listed = out.pop(JSON_ATTRS_KEY, None)
    if listed is None:
        return out
    try:
        names = json.loads(listed)
    except (TypeError, ValueError):
        return out
    for key in names:
        if key in out and isinstance(out[key], str):
            with contextlib.suppress(ValueError):
                out[key] = json.loads(out[key])
    return out


def checked_voltage_scale(source: str, unit: str | None, where: str) -> float:
    """:func:`stabtool.units.voltage_scale` of ``unit``; an unknown one raises an
    :class:`InputError` naming ``source`` and ``where`` (``"on coordinate 'PA'"``)."""
    from ..units import voltage_scale

    try:
        return voltage_scale(unit)
    except KeyError:
        raise InputError(source, f"unknown unit {unit!r} {where}; accepted voltage units: V, mV, uV (µV), nV") from None


def fmt_number(value: float) -> str:
    """Shortest text that reads back as the same float (``repr``)."""
    return repr(float(value))


def principal_projection(values: np.ndarray) -> tuple[np.ndarray, float]:
    """A complex (I/Q) map projected on the principal axis of its I/Q cloud, and that axis's angle (degrees).

    Reflectometry read-outs record the resonator's complex response; the
    charge steps move it along one direction of the I/Q plane, which the
    largest-variance axis of the points finds (common practice, no source).
    The real part of ``z·exp(−iθ)`` keeps the full step contrast whatever
    demodulation phase was set; NaN stays NaN.
    """
    z = np.asarray(values, dtype=np.complex128)
    finite = np.isfinite(z)
    pts = np.stack([z.real[finite], z.imag[finite]])
    if pts.shape[1] < 2:
        return np.where(finite, z.real, np.nan), 0.0
    cov = np.cov(pts)
    w, vecs = np.linalg.eigh(cov)
    vx, vy = vecs[:, int(np.argmax(w))]
    theta = float(np.arctan2(vy, vx))
    out = (z * np.exp(-1j * theta)).real
    return np.where(finite, out, np.nan), float(np.degrees(theta))
