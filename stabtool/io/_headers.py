"""Column labels of text files: ``PA (mV)``, ``PA [V]``, ``PA / mV``, ``PA_mV``.

A label names a gate or a measured quantity and, optionally, its unit. The
grid layout's top-left cell names both gates: ``PB (mV) \\ PA (mV)`` (y gate,
a backslash, x gate).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from ..units import VOLTAGE_SCALE, voltage_scale

__all__ = ["Label", "format_label", "parse_corner", "parse_label", "split_fields"]

#: Units recognised after an underscore (``PA_mV``, ``sensor_nA``). In brackets
#: any unit is accepted for a quantity; an underscore suffix counts as a unit
#: only when it is one of these, so ``sensor_current`` stays a plain name.
_PREFIXES = ("", "f", "p", "n", "u", "µ", "μ", "m", "k", "M", "G")
_BASE_UNITS = ("V", "A", "S", "Ohm", "Hz", "W", "dBm", "dB", "deg", "rad")
KNOWN_SUFFIX_UNITS: frozenset[str] = frozenset(
    [p + b for p in _PREFIXES for b in _BASE_UNITS] + list(VOLTAGE_SCALE) + ["au", "arb", "e2h"]
)

_BRACKET = re.compile(r"^(?P<name>.*?)\s*[\(\[]\s*(?P<unit>[^\)\]]*?)\s*[\)\]]\s*$")
_SLASH = re.compile(r"^(?P<name>[^/]*?\S)\s*/\s*(?P<unit>[^/\s]+)\s*$")
_UNDERSCORE = re.compile(r"^(?P<name>.+)_(?P<unit>[^_]+)$")


@dataclass(frozen=True)
class Label:
    """A parsed column label.

    Attributes
    ----------
    name : str
        Gate or quantity name (``"PA"``, ``"sensor"``).
    unit : str or None
        Unit as written, ``None`` when the label gives none.
    text : str
        The label as found in the file.
    """

    name: str
    unit: str | None
    text: str


def parse_label(text: str) -> Label:
    """Split a column label into name and unit.

    Accepted forms: ``NAME (UNIT)``, ``NAME [UNIT]``, ``NAME / UNIT`` and
    ``NAME_UNIT`` (the last only for a recognised unit, see
    :data:`KNOWN_SUFFIX_UNITS`). Anything else is a name without a unit.
    """
    raw = text.strip().strip('"').strip("'").strip()
    m = _BRACKET.match(raw)
    if m and m.group("name"):
        return Label(m.group("name").strip(), m.group("unit").strip() or None, raw)
    m = _SLASH.match(raw)
    if m:
        return Label(m.group("name").strip(), m.group("unit").strip(), raw)
    m = _UNDERSCORE.match(raw)
    if m and (m.group("unit") in KNOWN_SUFFIX_UNITS or _is_voltage(m.group("unit"))):
        return Label(m.group("name"), m.group("unit"), raw)
    return Label(raw, None, raw)


def _is_voltage(unit: str) -> bool:
    try:
        voltage_scale(unit)
    except KeyError:
        return False
    return True


def parse_corner(text: str) -> tuple[Label, Label] | None:
    """Parse the top-left cell of a grid file, ``Y-LABEL \\ X-LABEL``.

    Returns ``(y_label, x_label)`` or ``None`` when the cell holds no
    backslash (then the gates are unnamed).
    """
    raw = text.strip().strip('"').strip("'")
    if "\\" not in raw:
        return None
    left, _, right = raw.partition("\\")
    if not left.strip() or not right.strip():
        return None
    return parse_label(left), parse_label(right)


_WS_TOKEN = re.compile(r"\S+")


def split_fields(line: str, delimiter: str | None) -> list[str]:
    """Split one line of a text table into stripped fields.

    ``delimiter=None`` means runs of white space; then a bracketed unit
    separated by a space (``PA (mV)``) and a backslash corner label stay
    attached to their name.
    """
    if delimiter is not None:
        return [f.strip().strip('"').strip() for f in line.rstrip("\r\n").split(delimiter)]
    tokens = _WS_TOKEN.findall(line)
    merged: list[str] = []
    join_next = False
    for tok in tokens:
        if merged and (join_next or tok[0] in "([\\" or tok == "/" or merged[-1].endswith("/")):
            merged[-1] = f"{merged[-1]} {tok}"
        else:
            merged.append(tok)
        join_next = tok.endswith("\\") or tok == "/"
    return merged


def format_label(name: str, unit: str | None) -> str:
    """Inverse of :func:`parse_label`: ``NAME (UNIT)`` or ``NAME``."""
    return f"{name} ({unit})" if unit else name
