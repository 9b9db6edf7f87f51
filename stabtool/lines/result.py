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
    refined : bool
        True when the line was refined from sub-pixel profile fits; False
        when only the Hough/TLS fit of edge pixels is available.
    bend_chi2 : float
        Drop of χ² (2 degrees of freedom) when quadratic and cubic terms are
        added to the straight-line fit of the crossing points; large values
        mean the line bends (e.g. rounded triple points with strong tunnel
        coupling). NaN when not measured.
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
    refined: bool = False
    bend_chi2: float = float("nan")

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

    An empty family has zero lines, never ``None``. ``edge_width_px`` is the
    measured width of the map's edges (:class:`stabtool.lines.edges.EdgeScale`
    ``width_px``: σ of the derivative profile across the lines, pixels; NaN
    when not measured).
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
    edge_width_px: float = float("nan")

    def family(self, name: str) -> LineFamily:
        """The family called ``name`` (empty if none was found)."""
        return self.families.get(name, LineFamily(name=name, slope=float("nan"), slope_stderr=float("nan")))  # type: ignore[arg-type]

    @property
    def slopes(self) -> dict[str, float]:
        """Family slopes dV_y/dV_x (NaN for a family not found)."""
        return {n: self.family(n).slope for n in ("dot1", "dot2", "interdot")}

    def plot(self, ax=None, data=None, *, show_edges: bool = False):  # noqa: ANN001
        """Draw the map with every line, one colour per family, and a legend.

        Parameters
        ----------
        ax : matplotlib Axes, optional
            Axes to draw on (a new figure otherwise).
        data : xarray.DataArray or ndarray, optional
            Map to draw underneath (default: the processed map kept in the result).
        show_edges : bool
            Overlay the edge pixels.

        Returns
        -------
        matplotlib Axes
        """
        import matplotlib.pyplot as plt

        if ax is None:
            _, ax = plt.subplots(figsize=(6, 5))
        x, y = self.axes.x, self.axes.y
        img = None
        if data is not None:
            img = np.asarray(getattr(data, "values", data), float)
        elif self.processed is not None:
            img = self.processed
        extent = (x[0] - self.axes.dx / 2, x[-1] + self.axes.dx / 2, y[0] - self.axes.dy / 2, y[-1] + self.axes.dy / 2)
        if img is not None:
            ax.imshow(img, origin="lower", extent=extent, aspect="auto", cmap="gray", interpolation="nearest")
        if show_edges and self.edges is not None:
            iy, ix = np.nonzero(self.edges)
            ax.plot(x[ix], y[iy], ",", color="yellow", alpha=0.5)
        colours = {"dot1": "tab:red", "dot2": "tab:blue", "interdot": "tab:green", "unassigned": "tab:gray"}
        groups = [(n, self.family(n).lines, self.family(n).slope) for n in ("dot1", "dot2", "interdot")]
        groups.append(("unassigned", self.unassigned, float("nan")))
        for name, lines, slope in groups:
            label = f"{name} ({len(lines)})" + (f", slope {slope:.4g}" if np.isfinite(slope) else "")
            for k, ln in enumerate(lines):
                ax.plot([ln.start[0], ln.end[0]], [ln.start[1], ln.end[1]], "-", color=colours[name],
                        lw=2 if name != "unassigned" else 1, alpha=0.9, label=label if k == 0 else None)
        for j in self.jumps:
            ax.axhline(j.y, color="orange", ls="--", lw=1, label="charge jump" if j is self.jumps[0] else None)
        ax.set_xlim(min(extent[:2]), max(extent[:2]))
        ax.set_ylim(min(extent[2:]), max(extent[2:]))
        if x[0] > x[-1]:
            ax.invert_xaxis()
        if y[0] > y[-1]:
            ax.invert_yaxis()
        ax.set_xlabel(f"{self.axes.x_gate} (V)")
        ax.set_ylabel(f"{self.axes.y_gate} (V)")
        verdict = "ok" if self.quality.ok else "doubtful"
        ax.set_title(f"transition lines: {verdict}, SNR {self.snr:.1f}")
        if ax.get_legend_handles_labels()[0]:
            ax.legend(loc="upper right", fontsize=7, framealpha=0.8)
        return ax

    def all_lines(self) -> list[TransitionLine]:
        """Every line, family by family, then the unassigned ones."""
        out: list[TransitionLine] = []
        for fam in self.families.values():
            out.extend(fam.lines)
        out.extend(self.unassigned)
        return out
