"""Exception and warning classes shared by every stabtool module.

Every error a user can trigger with bad input is an :class:`InputError`: it
names the file (or parameter) and the fault in one line, so the CLI can print
``str(error)`` and exit with code 2 without a traceback.
"""

from __future__ import annotations

import os

__all__ = [
    "StabtoolError",
    "InputError",
    "FitError",
    "StabtoolWarning",
    "PartialSweepWarning",
    "QualityWarning",
]


class StabtoolError(Exception):
    """Base class of every error raised on purpose by stabtool."""


class InputError(StabtoolError, ValueError):
    """Input that cannot be used: a file that cannot be read, or a bad parameter.

    Parameters
    ----------
    source : str or os.PathLike or None
        The file (or parameter name) at fault.
    fault : str
        What is wrong, what was expected and, where useful, what to do.

    Examples
    --------
    >>> str(InputError("run7.csv", "row 12: 'abc' in column 'PA (mV)' is not a number"))
    "run7.csv: row 12: 'abc' in column 'PA (mV)' is not a number"
    """

    def __init__(self, source: str | os.PathLike[str] | None, fault: str) -> None:
        self.source = None if source is None else os.fspath(source)
        self.fault = " ".join(str(fault).split())  # always one line
        super().__init__(self.fault if self.source is None else f"{self.source}: {self.fault}")


class FitError(StabtoolError):
    """A fit that could not produce a result (raised only with ``errors="raise"``)."""


class StabtoolWarning(UserWarning):
    """Base class of stabtool's warnings."""


class PartialSweepWarning(StabtoolWarning):
    """The map holds missing points (an interrupted sweep)."""


class QualityWarning(StabtoolWarning):
    """An analysis result is doubtful."""
