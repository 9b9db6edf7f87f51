"""Options that several commands share: their choices, help texts and parsers.

The ``--readout`` choices repeat :data:`stabtool.analysis.READOUTS` so that
building the parser does not import the analysis (every command would pay
for it); ``tests/test_cli_readout.py`` checks that the two agree.
"""

from __future__ import annotations

from typing import Any

from ..errors import InputError

#: ``--readout``: what the map measures
READOUT_CHOICES = ("auto", "charge", "derivative-x", "derivative-y")

READOUT_HELP = (
    "what the maps measure: 'auto' analyses a map whose lines are peaks (a lock-in's derivative) as its "
    "sum along the modulated gate; 'derivative-x'/'derivative-y' say which gate was modulated; "
    "'charge' never sums"
)

ISEL_HELP = "position along an extra dimension of NetCDF data (repeatable)"


def add_load_options(p: Any) -> None:
    """``--var``, ``--x``, ``--y``: which quantity and gates to read from files holding several."""
    p.add_argument("--var", default=None, metavar="NAME",
                   help="measured quantity to read (variable, column or key name), where a file holds several")
    p.add_argument("--x", default=None, metavar="GATE", help="gate to put on x (plunger of dot1)")
    p.add_argument("--y", default=None, metavar="GATE", help="gate to put on y (plunger of dot2)")


def load_options(args: Any) -> dict[str, str]:
    """The ``var``, ``x``, ``y`` given on the command line (for :func:`stabtool.io.load`)."""
    return {k: v for k in ("var", "x", "y") if (v := getattr(args, k, None)) is not None}


def parse_isel(items: list[str] | None) -> dict[str, int] | None:
    """``["rep=0", ...]`` (``--isel DIM=INDEX``, repeatable) as ``{"rep": 0, ...}``; None when not given."""
    if not items:
        return None
    out: dict[str, int] = {}
    for item in items:
        dim, sep, index = item.partition("=")
        try:
            out[dim.strip()] = int(index)
        except ValueError:
            raise InputError("--isel", f"expected DIM=INDEX with an integer INDEX, got {item!r}") from None
        if not sep or not dim.strip():
            raise InputError("--isel", f"expected DIM=INDEX, got {item!r}")
    return out
