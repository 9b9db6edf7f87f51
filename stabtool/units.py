"""Voltage units: parsing and conversion to volts.

Coordinates are float64 volts after loading; the file's original unit is kept
in the coordinate's ``original_units`` attribute.
"""

from __future__ import annotations

import numpy as np

__all__ = ["VOLTAGE_SCALE", "is_voltage_unit", "voltage_scale", "to_volts", "from_volts"]

#: Multiplier that converts a value in the named unit to volts.
VOLTAGE_SCALE: dict[str, float] = {
    "V": 1.0,
    "volt": 1.0,
    "volts": 1.0,
    "mV": 1e-3,
    "uV": 1e-6,
    "µV": 1e-6,  # micro sign U+00B5
    "μV": 1e-6,  # Greek mu U+03BC
    "nV": 1e-9,
    "millivolt": 1e-3,
    "millivolts": 1e-3,
    "microvolt": 1e-6,
    "microvolts": 1e-6,
    "nanovolt": 1e-9,
    "nanovolts": 1e-9,
}


def voltage_scale(unit: str | None) -> float:
    """Return the factor that converts ``unit`` to volts.

    Parameters
    ----------
    unit : str or None
        A voltage unit such as ``"V"``, ``"mV"``, ``"uV"`` or ``"µV"``. ``None``
        or an empty string means volts.

    Raises
    ------
    KeyError
        For an unknown unit; the loaders turn this into an
        :class:`~stabtool.errors.InputError` naming the file.
    """
    if unit is None:
        return 1.0
    key = str(unit).strip()
    if key == "":
        return 1.0
    if key in VOLTAGE_SCALE:
        return VOLTAGE_SCALE[key]
    lowered = {k.lower(): v for k, v in VOLTAGE_SCALE.items() if k.lower() not in ("mv",)}
    if key.lower() in lowered:
        return lowered[key.lower()]
    if key in ("MV", "mv"):
        # "mv" is common in hand-written headers; "MV" (megavolt) is never meant.
        return 1e-3
    raise KeyError(
        f"unknown voltage unit {unit!r}; expected one of V, mV, uV (µV), nV"
    )


def is_voltage_unit(unit: object) -> bool:
    """True for a non-empty unit :func:`voltage_scale` knows (V, mV, µV, ...)."""
    if unit is None or str(unit).strip() == "":
        return False
    try:
        voltage_scale(str(unit))
    except KeyError:
        return False
    return True


def to_volts(values: np.ndarray, unit: str | None) -> np.ndarray:
    """Convert ``values`` given in ``unit`` to float64 volts."""
    return np.asarray(values, dtype=np.float64) * voltage_scale(unit)


def from_volts(values: np.ndarray, unit: str | None) -> np.ndarray:
    """Convert float64 volts back to ``unit``."""
    return np.asarray(values, dtype=np.float64) / voltage_scale(unit)
