"""The lever-arm calibration record and its JSON file.

A calibration file (``lever.json``) is written by ``stabtool calibrate`` and
read by ``stabtool analyze --lever-arm-file``. It holds one lever arm (eV/V)
of one gate on one dot, its standard error, the method and the files it came
from. Keys (null when unknown)::

    format                 "stabtool-lever-arm"
    format_version         1
    device, gate           names (device may be null)
    lever_arm              α, eV/V
    lever_arm_stderr       one standard error
    method                 "temperature_series" | "known_electron_temperature" | "user"
    method_description     one line
    electron_temperature_K the known T_e (single-temperature method)
    saturation_temperature_K, saturation_temperature_stderr_K
    saturation_model       model name and source status
    linear_regime_lever_arm, linear_regime_lever_arm_stderr
    source_files           list of paths
    traces                 one record per trace (file, label, temperature_K, width_V, ...)
    quality                {ok, warnings}
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..errors import InputError
from ..quality import Quality

__all__ = [
    "FILE_FORMAT",
    "METHODS",
    "LeverArmCalibration",
    "TraceRecord",
    "read_lever_arm_file",
    "user_lever_arm",
    "write_lever_arm_file",
]

FILE_FORMAT = "stabtool-lever-arm"
METHODS = ("temperature_series", "known_electron_temperature", "user")
_NAN = float("nan")


def _num(x: float) -> float | None:
    return None if x is None or not math.isfinite(float(x)) else float(x)


def _opt(d: dict, key: str) -> float:
    v = d.get(key)
    return _NAN if v is None else float(v)


@dataclass(frozen=True)
class TraceRecord:
    """Fit summary of one trace (voltages in V, temperature in K)."""

    source: str
    label: str
    temperature_K: float
    temperature_source: str
    ok: bool
    reason: str = ""
    centre_V: float = _NAN
    width_V: float = _NAN
    width_stderr_V: float = _NAN
    step_height: float = _NAN
    reduced_chi2: float = _NAN
    points_per_fwhm: float = _NAN
    lorentzian_gamma_V: float = _NAN
    warnings: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "file": self.source,
            "label": self.label,
            "temperature_K": _num(self.temperature_K),
            "temperature_source": self.temperature_source,
            "ok": bool(self.ok),
            "reason": self.reason,
            "centre_V": _num(self.centre_V),
            "width_V": _num(self.width_V),
            "width_stderr_V": _num(self.width_stderr_V),
            "step_height": _num(self.step_height),
            "reduced_chi2": _num(self.reduced_chi2),
            "points_per_fwhm": _num(self.points_per_fwhm),
            "lorentzian_gamma_V": _num(self.lorentzian_gamma_V),
            "warnings": list(self.warnings),
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> TraceRecord:
        return cls(
            source=str(d.get("file", "")),
            label=str(d.get("label", "")),
            temperature_K=_opt(d, "temperature_K"),
            temperature_source=str(d.get("temperature_source", "")),
            ok=bool(d.get("ok", False)),
            reason=str(d.get("reason", "")),
            centre_V=_opt(d, "centre_V"),
            width_V=_opt(d, "width_V"),
            width_stderr_V=_opt(d, "width_stderr_V"),
            step_height=_opt(d, "step_height"),
            reduced_chi2=_opt(d, "reduced_chi2"),
            points_per_fwhm=_opt(d, "points_per_fwhm"),
            lorentzian_gamma_V=_opt(d, "lorentzian_gamma_V"),
            warnings=tuple(d.get("warnings", ())),
        )


@dataclass(frozen=True)
class LeverArmCalibration:
    """A calibrated lever arm of one gate (eV/V) with its provenance.

    Attributes
    ----------
    lever_arm, lever_arm_stderr : float
        α and its standard error (NaN when the calibration failed).
    gate : str
        The swept gate.
    device : str or None
    method : {"temperature_series", "known_electron_temperature", "user"}
    method_description : str
    electron_temperature_K : float
        The electron temperature used by the single-temperature method (NaN otherwise).
    saturation_K, saturation_stderr_K : float
        Saturated electron temperature of a series (NaN otherwise).
    saturation_model : str
    linear_lever_arm, linear_lever_arm_stderr : float
        Linear-regime cross-check of a series (NaN otherwise).
    source_files : tuple of str
    traces : tuple of TraceRecord
    quality : Quality
    path : str or None
        The calibration file this record was read from.
    """

    lever_arm: float
    lever_arm_stderr: float
    gate: str
    device: str | None
    method: str
    method_description: str = ""
    electron_temperature_K: float = _NAN
    saturation_K: float = _NAN
    saturation_stderr_K: float = _NAN
    saturation_model: str = ""
    linear_lever_arm: float = _NAN
    linear_lever_arm_stderr: float = _NAN
    source_files: tuple[str, ...] = ()
    traces: tuple[TraceRecord, ...] = ()
    quality: Quality = field(default_factory=Quality)
    path: str | None = None

    def __bool__(self) -> bool:
        return math.isfinite(self.lever_arm)

    @property
    def lever_arms(self) -> dict[str, float]:
        """``{gate: α}``: the calibrated lever arm keyed by gate (for map analysis)."""
        return {self.gate: self.lever_arm} if math.isfinite(self.lever_arm) else {}

    @property
    def lever_arm_errors(self) -> dict[str, float]:
        """``{gate: σ_α}``, matching :attr:`lever_arms`."""
        return {self.gate: self.lever_arm_stderr} if math.isfinite(self.lever_arm) else {}

    @property
    def relative_stderr(self) -> float:
        """``σ_α / α``."""
        return self.lever_arm_stderr / self.lever_arm

    def to_dict(self) -> dict[str, Any]:
        """JSON form (keys as in the module docstring)."""
        from .. import __version__

        return {
            "format": FILE_FORMAT,
            "format_version": 1,
            "device": self.device,
            "gate": self.gate,
            "lever_arm": _num(self.lever_arm),
            "lever_arm_stderr": _num(self.lever_arm_stderr),
            "method": self.method,
            "method_description": self.method_description,
            "electron_temperature_K": _num(self.electron_temperature_K),
            "saturation_temperature_K": _num(self.saturation_K),
            "saturation_temperature_stderr_K": _num(self.saturation_stderr_K),
            "saturation_model": self.saturation_model or None,
            "linear_regime_lever_arm": _num(self.linear_lever_arm),
            "linear_regime_lever_arm_stderr": _num(self.linear_lever_arm_stderr),
            "source_files": list(self.source_files),
            "traces": [t.to_dict() for t in self.traces],
            "quality": self.quality.to_dict(),
            "stabtool_version": __version__,
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any], *, path: str | None = None) -> LeverArmCalibration:
        """Inverse of :meth:`to_dict`; raises InputError on a malformed record."""
        src = path or "lever-arm record"
        if not isinstance(d, dict):
            raise InputError(src, "expected a JSON object")
        if d.get("format") != FILE_FORMAT:
            raise InputError(src, f"not a lever-arm calibration (format is {d.get('format')!r}, expected {FILE_FORMAT!r})")
        if d.get("format_version") != 1:
            raise InputError(src, f"unsupported format_version {d.get('format_version')!r}; this stabtool reads version 1")
        q = d.get("quality") or {}
        quality = Quality(ok=bool(q.get("ok", False)), warnings=tuple(q.get("warnings", ())))
        alpha = d.get("lever_arm")
        if alpha is None:
            why = "; ".join(quality.warnings[:2]) or "no reason recorded"
            raise InputError(src, f"holds no lever arm (the calibration failed: {why})")
        try:
            alpha = float(alpha)
            err = _opt(d, "lever_arm_stderr")
        except (TypeError, ValueError):
            raise InputError(src, f"lever_arm {d.get('lever_arm')!r} is not a number") from None
        if not (math.isfinite(alpha) and alpha > 0):
            raise InputError(src, f"lever_arm {alpha!r} is not a positive number")
        if d.get("method") not in METHODS:
            raise InputError(src, f"unknown method {d.get('method')!r}; expected one of {', '.join(METHODS)}")
        if not d.get("gate"):
            raise InputError(src, "no gate name; the lever arm cannot be matched to a map axis")
        try:
            traces = tuple(TraceRecord.from_dict(t) for t in d.get("traces", ()))
        except (TypeError, ValueError, AttributeError) as exc:
            raise InputError(src, f"malformed trace record ({exc})") from None
        return cls(
            lever_arm=alpha,
            lever_arm_stderr=err,
            gate=str(d["gate"]),
            device=d.get("device"),
            method=str(d["method"]),
            method_description=str(d.get("method_description", "")),
            electron_temperature_K=_opt(d, "electron_temperature_K"),
            saturation_K=_opt(d, "saturation_temperature_K"),
            saturation_stderr_K=_opt(d, "saturation_temperature_stderr_K"),
            saturation_model=str(d.get("saturation_model") or ""),
            linear_lever_arm=_opt(d, "linear_regime_lever_arm"),
            linear_lever_arm_stderr=_opt(d, "linear_regime_lever_arm_stderr"),
            source_files=tuple(map(str, d.get("source_files", ()))),
            traces=traces,
            quality=quality,
            path=path,
        )


def write_lever_arm_file(calibration: LeverArmCalibration, path: str | os.PathLike[str]) -> Path:
    """Write ``calibration`` as JSON to ``path`` (folders created); return the path."""
    p = Path(path)
    if p.parent and not p.parent.exists():
        p.parent.mkdir(parents=True, exist_ok=True)
    with open(p, "w", encoding="utf-8") as fh:
        json.dump(calibration.to_dict(), fh, indent=2)
        fh.write("\n")
    return p


def read_lever_arm_file(path: str | os.PathLike[str]) -> LeverArmCalibration:
    """Read a lever-arm calibration file written by ``stabtool calibrate``.

    Parameters
    ----------
    path : str or PathLike

    Returns
    -------
    LeverArmCalibration
        With ``path`` set to the file, for ``energy_reference``.

    Raises
    ------
    InputError
        Missing file, invalid JSON, wrong format, or no usable lever arm.
    """
    p = Path(path)
    if not p.exists():
        raise InputError(p, "no such file")
    try:
        with open(p, encoding="utf-8") as fh:
            data = json.load(fh)
    except UnicodeDecodeError:
        raise InputError(p, "not a text file; expected a lever-arm JSON file") from None
    except json.JSONDecodeError as exc:
        raise InputError(p, f"invalid JSON at line {exc.lineno}, column {exc.colno}: {exc.msg}") from None
    return LeverArmCalibration.from_dict(data, path=str(p))


def user_lever_arm(lever_arm: float, *, gate: str, stderr: float = _NAN, device: str | None = None) -> LeverArmCalibration:
    """A lever arm the user already knows, as a calibration record (method "user")."""
    if not (math.isfinite(lever_arm) and lever_arm > 0):
        raise InputError("lever_arm", f"expected a positive lever arm in eV/V, got {lever_arm!r}")
    return LeverArmCalibration(
        lever_arm=float(lever_arm), lever_arm_stderr=float(stderr), gate=gate, device=device,
        method="user", method_description="lever arm given by the user",
    )

