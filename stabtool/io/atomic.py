"""Atomic file writes: readers see the old file or the new one, never a part.

Every writer in stabtool goes through these functions: the bytes go to a
temporary file in the target's folder, which is flushed, given the permissions
a plain ``open()`` would give, and moved over the target with
:func:`os.replace`. On any error the temporary file is removed and an existing
target is left untouched.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO, Any

from ..errors import InputError

__all__ = ["atomic_savefig", "atomic_write", "atomic_write_bytes", "atomic_write_text"]


def _file_mode() -> int:
    """Permissions ``open()`` would give a new file (``mkstemp`` alone gives 0600)."""
    umask = os.umask(0)
    os.umask(umask)
    return 0o666 & ~umask


def check_target(path: str | os.PathLike[str], *, inputs: tuple[str | os.PathLike[str], ...] = ()) -> None:
    """Refuse an output path before any work is done for it.

    Raises
    ------
    InputError
        When the folder does not exist, the path is a folder, or it names one of ``inputs`` (a
        result written over the measured map it came from would lose the measurement).
    """
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    if not folder.is_dir():
        raise InputError(path, f"cannot write: folder {str(folder)!r} does not exist")
    if target.is_dir():
        raise InputError(path, "cannot write: it is a folder, not a file")
    for source in inputs:
        src = Path(source)
        same = (target.exists() and src.exists() and os.path.samefile(target, src)) or (
            target.resolve() == src.resolve())
        if same:
            raise InputError(path, "is an input of this run: writing there would replace it; choose another name")


@contextlib.contextmanager
def atomic_write(
    path: str | os.PathLike[str], *, mode: str = "w", fsync: bool = True
) -> Iterator[tuple[str, IO[Any] | None]]:
    """Write ``path`` atomically: a temp file in the same folder, then ``os.replace``.

    Yields ``(tmp_path, handle)``; ``handle`` is an open file for ``mode`` in
    ``"w"``/``"wb"`` or ``None`` for ``mode="path"`` (the caller writes
    ``tmp_path`` itself, e.g. with a library's own writer).

    Raises
    ------
    InputError
        When the folder does not exist or cannot be written, or the path is a folder.
    """
    target = Path(path)
    folder = target.parent if str(target.parent) else Path(".")
    check_target(target)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp" + target.suffix, dir=folder)
    except OSError as exc:
        raise InputError(path, f"cannot write: {exc.strerror or exc}") from None
    handle: IO[Any] | None = None
    try:
        os.chmod(tmp, _file_mode())
        if mode == "path":
            os.close(fd)
        else:
            handle = os.fdopen(fd, mode) if "b" in mode else os.fdopen(fd, mode, encoding="utf-8", newline="")
        yield tmp, handle
        if handle is not None:
            handle.flush()
            if fsync:
                os.fsync(handle.fileno())
            handle.close()
        os.replace(tmp, target)
    except BaseException:
        if handle is not None and not handle.closed:
            handle.close()
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes, *, fsync: bool = True) -> None:
    """Write ``data`` to ``path`` atomically."""
    with atomic_write(path, mode="wb", fsync=fsync) as (_, fh):
        assert fh is not None
        fh.write(data)


def atomic_write_text(path: str | os.PathLike[str], text: str, *, fsync: bool = True) -> None:
    """Write UTF-8 ``text`` to ``path`` atomically."""
    atomic_write_bytes(path, text.encode("utf-8"), fsync=fsync)


def atomic_savefig(fig: Any, path: str | os.PathLike[str], **savefig_kwargs: Any) -> None:
    """Save a matplotlib figure to ``path`` atomically (format from ``savefig_kwargs`` or PNG)."""
    savefig_kwargs.setdefault("format", "png")
    with atomic_write(path, mode="path") as (tmp, _):
        fig.savefig(tmp, **savefig_kwargs)
