"""Picking a column / variable / key by name, with suggestions."""

from __future__ import annotations

from collections.abc import Sequence

from ..errors import InputError
from ._common import suggest

__all__ = ["pick"]


def pick(source: str, wanted: str, names: Sequence[str], texts: Sequence[str] | None = None, *, what: str) -> int:
    """Index of ``wanted`` among ``names`` (exact, then case-insensitive, then
    the full label ``texts``); an unknown name raises :class:`InputError`
    listing the choices and suggesting close ones."""
    texts = list(texts) if texts is not None else list(names)
    for pool in (list(names), list(texts)):
        if wanted in pool:
            return pool.index(wanted)
    low = [n.lower() for n in names]
    if low.count(wanted.lower()) == 1:
        return low.index(wanted.lower())
    choices = ", ".join(repr(t) for t in texts)
    raise InputError(source, f"no {what} named {wanted!r}{suggest(wanted, names)} ({what}s: {choices})")
