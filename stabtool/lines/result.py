"""Result records of transition-line detection (all voltages in V)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from ..mapdata import MapAxes
from ..quality import Quality

__all__ = ["FamilyName", "TransitionLine", "LineFamily", "ChargeJump", "LineDetection"]

FamilyName = Literal["dot1", "dot2", "interdot", "unassigned"]


@dataclass(frozen=True)
class TransitionLine:
    """One charge-transition line segment, in volts.

    Attributes
    ----------
    family : {"dot1", "dot2", "interdot", "unassigned"}
    x0, y0 : float
        A point on the line (the segment midpoint), V.
    slope : float
        dV_y/dV_x; ±inf for an exactly vertical line.
    slope_stderr : float
        One standard error of ``slope``.
    position_stderr : float
        Standard error of the line's position perpendicular to itself, V.
    start, end : tuple of float
        Segment end points ``(x, y)``, V.
    width_V : float
        Fitted Fermi width ``w`` across the line along the dot's own gate
        (x for dot1, y for dot2), V; NaN when not measured.
    width_stderr_V : float
        Standard error of ``width_V``; NaN when not measured.
    n_points : int
        Number of sub-pixel crossing points the line was fitted to.
    step_sign : int
        +1 when the signal rises as the line is crossed towards more
        electrons, −1 when it falls, 0 when unknown.
    """

    family: FamilyName
    x0: float
    y0: float
    slope: float
    slope_stderr: float
    position_stderr: float
    start: tuple[float, float]
    end: tuple[float, float]
    width_V: float = float("nan")
    width_stderr_V: float = float("nan")
    n_points: int = 0
    step_sign: int = 0

    @property
    def length_V(self) -> float:
        """Segment length in volt space, V."""
        return float(np.hypot(self.end[0] - self.start[0], self.end[1] - self.start[1]))

    def x_at(self, y: np.ndarray | float) -> np.ndarray | float:
        """x on the (infinite) line at voltage ``y``."""
        if np.isinf(self.slope):
            return self.x0 + 0.0 * np.asarray(y)
        return self.x0 + (np.asarray(y) - self.y0) / self.slope

    def y_at(self, x: np.ndarray | float) -> np.ndarray | float:
        """y on the (infinite) line at voltage ``x``."""
        return self.y0 + self.slope * (np.asarray(x) - self.x0)


@dataclass(frozen=True)
class LineFamily:
    """Parallel lines of one kind sharing a slope.

    Attributes
    ----------
    name : {"dot1", "dot2", "interdot"}
    slope, slope_stderr : float
        Common slope dV_y/dV_x of the family (weighted over its lines) and
        its standard error.
    lines : tuple of TransitionLine
        Sorted by position (x for dot1 and interdot, y for dot2).
    """

    name: FamilyName
    slope: float
    slope_stderr: float
    lines: tuple[TransitionLine, ...] = field(default_factory=tuple)

    def __len__(self) -> int:
        return len(self.lines)


@dataclass(frozen=True)
class ChargeJump:
    """A sudden shift of the whole pattern between two rows of the slow axis.

    Attributes
    ----------
    row : int
        Index of the first row after the jump.
    y : float
        Slow-axis voltage of that row, V.
    shift_x_V : float
        Apparent shift of the pattern along x, V.
    """

    row: int
    y: float
    shift_x_V: float


@dataclass(frozen=True)
class LineDetection:
    """Everything the line-detection pipeline found in one map.

    An empty family has zero lines, never ``None``.
    """

    axes: MapAxes
    families: dict[str, LineFamily]
    unassigned: tuple[TransitionLine, ...]
    jumps: tuple[ChargeJump, ...]
    excluded_rows: np.ndarray
    noise_level: float
    snr: float
    quality: Quality
    processed: np.ndarray | None = None
    edges: np.ndarray | None = None

    def family(self, name: str) -> LineFamily:
        """The family called ``name`` (empty if none was found)."""
        return self.families.get(name, LineFamily(name=name, slope=float("nan"), slope_stderr=float("nan")))  # type: ignore[arg-type]

    def all_lines(self) -> list[TransitionLine]:
        """Every line, family by family, then the unassigned ones."""
        out: list[TransitionLine] = []
        for fam in self.families.values():
            out.extend(fam.lines)
        out.extend(self.unassigned)
        return out
