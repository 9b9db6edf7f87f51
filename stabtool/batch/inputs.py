"""Turn the INPUTS of a batch (files, folders, globs) into a list of map files.

Folders are searched recursively for files with a supported suffix; hidden
files and folders (a name starting with ``.``, such as a batch's own
``.records``) are skipped. Files named explicitly are kept whatever their
suffix, so a wrong file becomes a failed row instead of vanishing silently.
Globs follow :func:`glob.glob` with ``recursive=True`` (``**`` allowed).
A stacked NetCDF file (several sweeps along an extra dimension) stands for
one input per sweep (:mod:`stabtool.io.stacks`).
"""

from __future__ import annotations

import glob
import os
import re
from pathlib import Path
from collections.abc import Mapping
from typing import Any, Iterable, Sequence

from ..errors import InputError
from ..io.stacks import expand_stacks, split_slice_ref

__all__ = ["SUPPORTED_SUFFIXES", "check_output_folder", "discover_inputs", "natural_key"]

#: File suffixes a folder search picks up (the formats :func:`stabtool.io.load` reads).
SUPPORTED_SUFFIXES: tuple[str, ...] = (".nc", ".h5", ".hdf5", ".csv", ".tsv", ".npz")

_GLOB_CHARS = re.compile(r"[*?\[]")


def natural_key(name: str) -> tuple:
    """Sort key that orders ``run2`` before ``run10`` (digits compared as numbers)."""
    parts = re.split(r"(\d+)", name)
    return tuple((0, int(p), "") if p.isdigit() else (1, 0, p.lower()) for p in parts if p)


def _supported_suffixes() -> tuple[str, ...]:
    try:  # the loaders may declare their own list
        from .. import io as _io

        suffixes = getattr(_io, "SUPPORTED_SUFFIXES", None)
        if suffixes:
            return tuple(s.lower() for s in suffixes)
    except Exception:  # noqa: BLE001 - a missing or broken io package must not stop discovery
        pass
    return SUPPORTED_SUFFIXES


def _is_hidden(path: Path, root: Path) -> bool:
    rel = path.relative_to(root)
    return any(part.startswith(".") for part in rel.parts)


def _walk_folder(folder: Path, suffixes: tuple[str, ...]) -> list[Path]:
    from .store import ResultStore

    # a folder below holding a batch's records is an earlier batch's output (results.csv, results.nc)
    results = [m.parent for m in folder.rglob(ResultStore.RECORDS) if m.is_dir() and m.parent != folder]
    found = [
        p
        for p in folder.rglob("*")
        if p.is_file() and p.suffix.lower() in suffixes and not _is_hidden(p, folder)
        and not any(r in p.parents for r in results)
    ]
    return sorted(found, key=lambda p: natural_key(str(p.relative_to(folder))))


def check_output_folder(out: str | os.PathLike[str], inputs: Sequence[str | os.PathLike[str]]) -> Path:
    """``out`` as a Path, or :class:`InputError` when it cannot be the output folder of a run over ``inputs``.

    It may not be an existing file, nor one of the input folders (results among the maps would be
    read as maps; a folder inside an input folder is fine, it is left out of the search).
    """
    folder = Path(out)
    if folder.exists() and not folder.is_dir():
        raise InputError(out, "--out must be a folder, but a file of that name exists")
    for item in inputs:
        if Path(item).is_dir() and Path(item).resolve() == folder.resolve():
            raise InputError(out, "--out is an input folder: results among the maps would be read as maps; "
                             "choose another folder (one inside it works)")
    return folder


def discover_inputs(
    inputs: Sequence[str | os.PathLike[str]],
    *,
    suffixes: Iterable[str] | None = None,
    exclude: Iterable[str | os.PathLike[str]] = (),
    stacks: bool = True,
    load_options: Mapping[str, Any] | None = None,
) -> list[Path]:
    """Expand files, folders and globs into an ordered list of distinct files.

    Parameters
    ----------
    inputs : sequence of str or path
        Files, folders (searched recursively) or glob patterns, in the order
        the user gave them.
    suffixes : iterable of str, optional
        Suffixes picked up in folders and globs (default: every format the
        loaders read, see :data:`SUPPORTED_SUFFIXES`).
    exclude : iterable of path, optional
        Folders whose content is never picked up (the batch's output folder).
    stacks : bool
        Replace a NetCDF file whose map variable holds several sweeps (an
        extra dimension such as ``rep``) by one slice reference per sweep,
        ``file.nc[rep=0]``, ``file.nc[rep=1]``, ... (:mod:`stabtool.io.stacks`).
        A slice reference may also be given as an input.
    load_options : mapping, optional
        ``var``, ``x``, ``y`` the maps are read with (they decide which
        variable and which dimensions a stack has).

    Returns
    -------
    list of pathlib.Path
        Each file once (by resolved path), in input order; within a folder or
        a glob, natural order of the file names; the slices of a stacked
        file in storage order.

    Raises
    ------
    InputError
        When no input is given, a path does not exist, a glob matches nothing,
        or nothing at all is found.
    """
    if not inputs:
        raise InputError("INPUTS", "no input given; name files, folders or glob patterns")
    sfx = tuple(s.lower() for s in suffixes) if suffixes is not None else _supported_suffixes()
    excluded = [Path(e).resolve() for e in exclude]
    seen: set[Path] = set()
    out: list[Path] = []

    def add(path: Path) -> None:
        resolved = path.resolve()
        if resolved in seen:
            return
        if any(resolved == ex or ex in resolved.parents for ex in within):
            return
        seen.add(resolved)
        out.append(path)

    for item in inputs:
        text = os.fspath(item)
        path = Path(text)
        # an excluded folder counts below a named input only: a folder named inside it (the results
        # folder of another night above this one, say) is read as given
        named = path.resolve()
        within = [ex for ex in excluded if not (ex == named or ex in named.parents)]
        if path.is_dir():
            for p in _walk_folder(path, sfx):
                add(p)
        elif path.is_file() or split_slice_ref(text)[1] is not None:  # (or one map of a stack: file.nc[rep=3])
            add(path)
        elif _GLOB_CHARS.search(text):
            matches = sorted(glob.glob(text, recursive=True), key=natural_key)
            files = []
            for m in matches:
                mp = Path(m)
                if mp.is_dir():
                    files.extend(_walk_folder(mp, sfx))
                elif mp.is_file() and mp.suffix.lower() in sfx:
                    files.append(mp)
            if not files:
                raise InputError(text, "the pattern matches no map file "
                                 f"(suffixes {', '.join(sfx)})")
            for p in files:
                add(p)
        else:
            raise InputError(text, "no such file or folder")
    if not out:
        raise InputError(
            " ".join(os.fspath(i) for i in inputs),
            f"no map file found (looked for {', '.join(sfx)})",
        )
    return expand_stacks(out, **(load_options or {})) if stacks else out
