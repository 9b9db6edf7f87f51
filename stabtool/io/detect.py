"""Which reader a file needs: by content (magic bytes) first, extension second.

Formats
-------
``"netcdf"``
    NetCDF-4 / HDF5 (signature ``\\x89HDF``), read with h5netcdf; classic
    NetCDF-3 (``CDF\\x01``/``CDF\\x02``) read with scipy.
``"npz"``
    NumPy ``.npz`` (a zip archive).
``"text"``
    CSV/TSV/whitespace tables; :mod:`.csv_long` or :mod:`.csv_grid` decides the
    layout from the header row.
"""

from __future__ import annotations

import os
from pathlib import Path

from ..errors import InputError

__all__ = ["NETCDF_SUFFIXES", "SUPPORTED_SUFFIXES", "TEXT_SUFFIXES", "detect_format"]

NETCDF_SUFFIXES = (".nc", ".nc4", ".netcdf", ".h5", ".hdf5", ".hdf", ".he5", ".cdf")
TEXT_SUFFIXES = (".csv", ".tsv", ".txt", ".dat")
NPZ_SUFFIXES = (".npz",)
#: File suffixes :func:`stabtool.io.load` reads.
SUPPORTED_SUFFIXES: tuple[str, ...] = NETCDF_SUFFIXES + TEXT_SUFFIXES + NPZ_SUFFIXES

_HDF5 = b"\x89HDF\r\n\x1a\n"
_ACCEPTED = ".nc/.h5 (NetCDF/HDF5), .csv/.tsv/.txt (long or grid table), .npz (NumPy)"


def _sniff(head: bytes) -> str | None:
    if head.startswith(_HDF5):
        return "netcdf"
    if head[:3] == b"CDF" and head[3:4] in (b"\x01", b"\x02", b"\x05"):
        return "netcdf3"
    if head.startswith((b"PK\x03\x04", b"PK\x05\x06")):
        return "npz"
    if head.startswith(b"\x93NUMPY"):
        return "npy"
    if b"\x00" in head:
        return None
    try:
        head.decode("utf-8")
    except UnicodeDecodeError as exc:
        if exc.start < len(head) - 4:  # not just a cut multi-byte character
            try:
                head.decode("latin-1")
            except UnicodeDecodeError:  # pragma: no cover - latin-1 decodes anything
                return None
    return "text"


def detect_format(path: str | os.PathLike[str]) -> str:
    """Return ``"netcdf"``, ``"netcdf3"``, ``"npz"`` or ``"text"`` for ``path``.

    Raises
    ------
    InputError
        Missing or empty file, a directory, a ``.npy`` array (no voltages),
        a NetCDF suffix on a file that is not NetCDF, or an unknown format.
    """
    p = Path(path)
    src = os.fspath(path)
    if not p.exists():
        raise InputError(src, "no such file")
    if p.is_dir():
        raise InputError(src, "is a directory, not a file")
    try:
        size = p.stat().st_size
        with open(p, "rb") as fh:
            head = fh.read(4096)
    except PermissionError:
        raise InputError(src, "permission denied") from None
    except OSError as exc:
        raise InputError(src, f"cannot read: {exc.strerror or exc}") from None
    if size == 0:
        raise InputError(src, "the file is empty")
    suffix = p.suffix.lower()
    kind = _sniff(head)
    if suffix in NETCDF_SUFFIXES and kind not in ("netcdf", "netcdf3"):
        raise InputError(
            src,
            "truncated or corrupt NetCDF: the file does not start with the "
            "HDF5/NetCDF signature",
        )
    if kind == "npy":
        raise InputError(
            src,
            "a .npy file holds one array without gate voltages; save x, y and "
            "the signal together with numpy.savez (.npz)",
        )
    if suffix in NPZ_SUFFIXES and kind != "npz":
        raise InputError(src, "corrupt .npz: the file is not a zip archive")
    if kind == "text" and suffix in NETCDF_SUFFIXES + NPZ_SUFFIXES:  # pragma: no cover
        kind = None
    if kind is None and suffix in TEXT_SUFFIXES:
        raise InputError(src, f"binary content in a {suffix} file: not a text table (corrupt, or another format "
                              f"under this name); accepted: {_ACCEPTED}")
    if kind is None or (kind == "text" and suffix not in TEXT_SUFFIXES and not _looks_tabular(head)):
        raise InputError(src, f"unknown format (suffix {suffix or 'none'!r}); accepted: {_ACCEPTED}")
    return kind


def _looks_tabular(head: bytes) -> bool:
    """A text file without a known suffix is read only if it looks like a table."""
    text = head.decode("utf-8", errors="replace")
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if len(lines) < 2:
        return False
    return any(d in lines[0] for d in (",", "\t", ";")) or len(lines[0].split()) >= 3
