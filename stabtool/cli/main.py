"""Entry point of the ``stabtool`` command.

Each sub-command lives in its own module of this package and exposes
``register(subparsers)``, which adds its parser and sets ``func`` (a callable
taking the parsed namespace and returning the exit code). Add a new command by
adding its module name to :data:`COMMANDS`.

Exit codes: 0 when the command ran (an analysis may still be doubtful), 1 when
a batch ran but some inputs failed, 2 for bad input or usage, 3 for an
internal error. Errors are one line on stderr, never a traceback (set
``STABTOOL_DEBUG=1`` to see one).
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import warnings
from typing import Sequence

from ..errors import StabtoolError, StabtoolWarning

#: Modules of :mod:`stabtool.cli` that provide a sub-command, in help order.
COMMANDS: list[str] = [
    "info",
    "analyze",
    "batch",
    "drift",
    "bench",
    "virtual_gates",
    "simulate",
    "calibrate",
]

EXIT_OK = 0
EXIT_SOME_FAILED = 1
EXIT_BAD_INPUT = 2
EXIT_INTERNAL = 3


def _version() -> str:
    from .. import __version__

    return __version__


def build_parser() -> argparse.ArgumentParser:
    """Build the argument parser with every registered sub-command."""
    parser = argparse.ArgumentParser(
        prog="stabtool",
        description="Charge-stability diagrams of quantum-dot devices: lines, "
        "virtual gates, lever arms, charging energies and charge states.",
    )
    parser.add_argument("--version", action="version", version=f"stabtool {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        module = importlib.import_module(f"{__package__}.{name}")
        module.register(sub)
    return parser


#: Commands that run the analysis: small matrices, where threaded BLAS burns ≈ 25 % extra CPU.
_SINGLE_THREAD_COMMANDS = ("analyze", "batch")
_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")


def _single_threaded_blas() -> None:
    """One BLAS/OpenMP thread for the analysis commands; a thread count set by the user wins.

    The variables are set with ``setdefault`` (worker processes read them when they load
    numpy). This process loaded numpy already (``import stabtool`` does, before this module
    runs), so the OpenBLAS libraries it has loaded are also limited at run time through their
    ``*openblas_set_num_threads*`` entry points (Linux: found in ``/proc/self/maps``; elsewhere
    only the variables are set).
    """
    user_set = "OPENBLAS_NUM_THREADS" in os.environ or "OMP_NUM_THREADS" in os.environ
    for var in _THREAD_VARS:
        os.environ.setdefault(var, "1")
    if user_set:
        return
    import ctypes

    try:
        with open("/proc/self/maps", encoding="utf-8", errors="replace") as fh:
            fields = (ln.split() for ln in fh)
            paths = {f[-1] for f in fields if len(f) >= 6 and "openblas" in os.path.basename(f[-1]).lower()}
    except OSError:
        return
    for path in sorted(paths):
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        for name in ("openblas_set_num_threads", "scipy_openblas_set_num_threads",
                     "scipy_openblas_set_num_threads64_", "openblas_set_num_threads64_"):
            func = getattr(lib, name, None)
            if func is not None:
                func(ctypes.c_int(1))
                break


def _format_warning(message, category, filename, lineno, line=None):  # noqa: ANN001
    return f"stabtool: warning: {message}\n"


def main(argv: Sequence[str] | None = None) -> int:
    """Run the CLI; return the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_BAD_INPUT
    if args.command in _SINGLE_THREAD_COMMANDS:
        _single_threaded_blas()
    warnings.formatwarning = _format_warning
    if getattr(args, "quiet", False):
        warnings.simplefilter("ignore", StabtoolWarning)
    debug = bool(os.environ.get("STABTOOL_DEBUG"))
    if not debug:
        # numpy's floating-point notes (a NaN or an overflow inside a step that handles it) say
        # nothing a user can act on; what matters reaches the quality warnings
        warnings.filterwarnings("ignore", category=RuntimeWarning, module="numpy")
        warnings.filterwarnings("ignore", message=r"(invalid value|divide by zero|overflow) encountered",
                                category=RuntimeWarning)
    try:
        return int(args.func(args) or 0)
    except StabtoolError as exc:
        if debug:
            raise
        print(f"stabtool: error: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        print("stabtool: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return EXIT_OK
    except Exception as exc:  # noqa: BLE001 - the CLI never shows a traceback
        if debug:
            raise
        print(
            f"stabtool: internal error: {type(exc).__name__}: {' '.join(str(exc).split())} "
            "(set STABTOOL_DEBUG=1 for details)",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
