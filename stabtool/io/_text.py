"""Reading a text table: comments, delimiter, header row, numeric body.

Shared by :mod:`.csv_long` and :mod:`.csv_grid`. Rules:

* lines starting with ``#`` are comments; ``# key: value`` comments are kept
  (``# quantity: sensor (nA)`` names the measured quantity of a grid file,
  ``# stabtool-attrs: {...}`` holds the map's attributes as JSON);
* the first other non-blank line is the header row;
* the delimiter is taken from the header row: tab, else comma, else
  semicolon, else runs of white space;
* empty cells and ``nan`` read as NaN;
* with a tab, semicolon or white-space delimiter, numbers may use a decimal
  comma (``0,0182``, as spreadsheets in many locales write them): read so
  when the first data rows hold commas and no decimal point.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from ._headers import split_fields

__all__ = ["TextTable", "is_number", "parse_body", "read_text_table"]

_META = re.compile(r"^#\s*(?P<key>[A-Za-z][\w\- ]*?)\s*[:=]\s*(?P<value>.*)$")


@dataclass
class TextTable:
    """A text table split into its parts (1-based line numbers kept)."""

    source: str
    delimiter: str | None
    header: list[str]
    header_line: int
    body: list[tuple[int, str]]
    meta: dict[str, str] = field(default_factory=dict)


def read_text_table(path: str) -> TextTable:
    """Read ``path`` as a text table (see module notes)."""
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise InputError(path, f"cannot read: {exc.strerror or exc}") from None
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        text = raw.decode("latin-1")
    meta: dict[str, str] = {}
    header: list[str] | None = None
    header_line = 0
    delimiter: str | None = None
    body: list[tuple[int, str]] = []
    for lineno, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            m = _META.match(stripped)
            if m:
                meta[m.group("key").strip().lower()] = m.group("value").strip()
            continue
        if header is None:
            delimiter = _delimiter(line)
            header = split_fields(line, delimiter)
            while header and header[-1] == "" and delimiter is not None:
                header.pop()  # trailing delimiter
            header_line = lineno
        else:
            body.append((lineno, line))
    if header is None:
        raise InputError(path, "the file is empty (no header row, only comments or blank lines)")
    if delimiter != "," and _decimal_comma(body):
        body = [(n, line.replace(",", ".")) for n, line in body]
        header = [h.replace(",", ".") if is_number(h.replace(",", ".")) else h for h in header]  # (a grid's x row)
    return TextTable(path, delimiter, header, header_line, body, meta)


def _decimal_comma(body: list[tuple[int, str]]) -> bool:
    """Numbers written with a decimal comma (``0,0182``): commas and no point in the first data rows."""
    head = [line for _, line in body[:20]]
    return any("," in line for line in head) and not any("." in line for line in head)


def _delimiter(line: str) -> str | None:
    for d in ("\t", ",", ";"):
        if d in line:
            return d
    return None


def is_number(text: str) -> bool:
    """True for a cell that reads as a float (``nan`` and ``inf`` included)."""
    try:
        float(text)
    except ValueError:
        return False
    return True


def _cell(text: str) -> float:
    t = text.strip()
    if t == "":
        return float("nan")
    return float(t)


def parse_body(
    table: TextTable,
    *,
    ncols: int,
    column_names: list[str],
    allow_short_last: bool = False,
) -> tuple[np.ndarray, bool]:
    """Parse the data rows into a float array of shape ``(nrows, ncols)``.

    Returns ``(values, last_short)``: ``last_short`` is True when the final
    row had fewer cells (only allowed with ``allow_short_last``; missing cells
    are NaN). Text in a number cell or a row of the wrong length raises
    :class:`InputError` naming the line, data row and column.
    """
    if not table.body:
        raise InputError(table.source, "the table has a header row but no data rows")
    lines = [ln for _, ln in table.body]
    try:
        values = np.loadtxt(lines, delimiter=table.delimiter, dtype=np.float64, ndmin=2, comments=None)
        if values.shape[1] == ncols:
            return values, False
    except ValueError:
        pass
    return _parse_slow(table, ncols=ncols, column_names=column_names, allow_short_last=allow_short_last)


def _parse_slow(
    table: TextTable, *, ncols: int, column_names: list[str], allow_short_last: bool
) -> tuple[np.ndarray, bool]:
    out = np.full((len(table.body), ncols), np.nan)
    last_short = False
    nbody = len(table.body)
    for irow, (lineno, line) in enumerate(table.body):
        cells = split_fields(line, table.delimiter)
        if table.delimiter is not None:
            while len(cells) > ncols and cells[-1] == "":
                cells.pop()  # trailing delimiter
        if len(cells) != ncols:
            if allow_short_last and irow == nbody - 1 and len(cells) < ncols:
                last_short = True
            else:
                raise InputError(
                    table.source,
                    f"ragged table: line {lineno} (data row {irow + 1}) has {len(cells)} "
                    f"cells, the header row has {ncols}",
                )
        for icol, cell in enumerate(cells):
            try:
                out[irow, icol] = _cell(cell)
            except ValueError:
                name = column_names[icol] if icol < len(column_names) else f"#{icol + 1}"
                raise InputError(
                    table.source,
                    f"line {lineno} (data row {irow + 1}), column {name!r}: "
                    f"{cell!r} is not a number",
                ) from None
    return out, last_short
