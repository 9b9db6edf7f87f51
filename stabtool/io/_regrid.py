"""Rebuild a 2-D grid from points listed one per row (x, y, signal).

Rows come in measurement order, with the fast axis in x or in y, raster or
serpentine, increasing or decreasing. Set-points are snapped to the grid of
their unique values:

1. exact unique values (within 1e-9 of the span, i.e. float noise) are tried
   first;
2. if they do not make a grid (measured read-backs scatter), the sorted unique
   values are split where the gaps between them jump, in log scale, by the
   largest ratio (jitter gaps ≪ grid steps). The split is accepted only if the
   jump is at least :data:`MIN_GAP_RATIO` and every cluster spans at most
   :data:`MAX_JITTER` of the smallest step between cluster centres.

Axes keep the measured direction: the slow axis runs from the first row to
the last; the fast axis in the direction of the first sweep line. Missing
grid cells are accepted only in the final sweep line (an interrupted sweep)
and become NaN.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError

__all__ = ["MAX_JITTER", "MIN_GAP_RATIO", "Grid", "rebuild_grid", "warn_incomplete"]

#: Smallest ratio between the grid step and the largest within-cluster gap.
MIN_GAP_RATIO = 4.0
#: Largest cluster width accepted, as a fraction of the smallest grid step.
MAX_JITTER = 0.25


@dataclass(frozen=True)
class Grid:
    """A rebuilt grid.

    Attributes
    ----------
    x, y : ndarray, shape (nx,), (ny,)
        Set-points in measured direction (file units).
    signal : ndarray, shape (ny, nx)
        ``signal[iy, ix]``; NaN where no row was measured.
    n_missing : int
        Cells without a row (all in the final sweep line).
    fast : str
        ``"x"`` or ``"y"``: the axis that changes from row to row.
    snapped : bool
        True when jittered set-points were snapped to cluster centres.
    """

    x: np.ndarray
    y: np.ndarray
    signal: np.ndarray
    n_missing: int
    fast: str
    snapped: bool


class _NotAGrid(Exception):
    pass


def _exact_levels(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    order = np.argsort(v, kind="stable")
    s = v[order]
    span = s[-1] - s[0]
    eps = 1e-9 * span if span > 0 else 0.0
    new = np.empty(s.size, dtype=bool)
    new[0] = True
    new[1:] = np.diff(s) > eps
    return _levels_from_breaks(s, order, new)


def _levels_from_breaks(s: np.ndarray, order: np.ndarray, new: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    label_sorted = np.cumsum(new) - 1
    # median of each cluster: exact member value when all members are equal
    starts = np.flatnonzero(new)
    ends = np.append(starts[1:], s.size)
    # s is sorted: the median of a cluster is the mean of its middle element(s)
    centres = 0.5 * (s[(starts + ends - 1) // 2] + s[(starts + ends) // 2])
    idx = np.empty(s.size, dtype=np.int64)
    idx[order] = label_sorted
    return centres, idx


def _snapped_levels(v: np.ndarray, column: str) -> tuple[np.ndarray, np.ndarray]:
    order = np.argsort(v, kind="stable")
    s = v[order]
    d = np.diff(s)
    span = s[-1] - s[0]
    pos = np.sort(d[d > 1e-12 * span])
    if pos.size < 2:
        raise _NotAGrid(f"column {column!r}: too few distinct set-points")
    logs = np.log(pos)
    jumps = np.diff(logs)
    # a grid line holds at least two rows, so at most about n/2 gaps are grid
    # steps: breaks lower down lie among the within-cluster (jitter) gaps
    lowest = max(0, pos.size - (v.size // 2 + 1) - 1)
    jumps[:lowest] = -np.inf
    k = int(np.argmax(jumps))
    ratio = float(np.exp(jumps[k]))
    if ratio < MIN_GAP_RATIO:
        raise _NotAGrid(
            f"the set-points of column {column!r} do not fall on a grid: their "
            "scatter is not clearly smaller than the step"
        )
    threshold = float(np.sqrt(pos[k] * pos[k + 1]))
    new = np.empty(s.size, dtype=bool)
    new[0] = True
    new[1:] = d > threshold
    centres, idx = _levels_from_breaks(s, order, new)
    starts = np.flatnonzero(new)
    ends = np.append(starts[1:], s.size)
    width = max(float(s[b - 1] - s[a]) for a, b in zip(starts, ends))
    min_step = float(np.min(np.diff(centres))) if centres.size > 1 else np.inf
    if width > MAX_JITTER * min_step:
        raise _NotAGrid(
            f"the set-points of column {column!r} scatter by up to {width:.3g}, more "
            f"than {MAX_JITTER:g} of the smallest step {min_step:.3g}"
        )
    return centres, idx


def _assemble(
    source: str,
    xs: np.ndarray,
    ys: np.ndarray,
    sig: np.ndarray,
    lev: tuple[tuple[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]],
    names: tuple[str, str],
    snapped: bool,
) -> Grid:
    (xc, ix), (yc, iy) = lev
    nx, ny = xc.size, yc.size
    n = sig.size
    if nx * ny > 4 * n + 16:
        raise _NotAGrid(
            f"the {n} rows have {nx} distinct {names[0]!r} and {ny} distinct {names[1]!r} "
            "values: the points do not form a grid"
        )
    if nx < 2 or ny < 2:
        one = names[0] if nx < 2 else names[1]
        raise InputError(
            source,
            f"1-D data: column {one!r} holds a single set-point; a map needs two swept "
            "gates (1-D traces are not read by load)",
        )
    flat = iy * nx + ix
    counts = np.bincount(flat, minlength=nx * ny)
    if counts.max() > 1:
        cell = int(np.argmax(counts > 1))
        rows = np.flatnonzero(flat == cell)[:2] + 1
        raise InputError(
            source,
            f"duplicated grid point {names[0]}={xc[cell % nx]:.6g}, {names[1]}={yc[cell // nx]:.6g} "
            f"in data rows {rows[0]} and {rows[1]}",
        )
    # fast axis: the one whose index changes more often between rows
    change_x = np.count_nonzero(np.diff(ix))
    change_y = np.count_nonzero(np.diff(iy))
    fast = "x" if change_x >= change_y else "y"
    slow_idx = iy if fast == "x" else ix
    fast_idx = ix if fast == "x" else iy
    missing = np.flatnonzero(counts == 0)
    if missing.size:
        last_slow = slow_idx[-1]
        miss_slow = (missing // nx) if fast == "x" else (missing % nx)
        if np.any(miss_slow != last_slow):
            bad = int(missing[np.argmax(miss_slow != last_slow)])
            raise InputError(
                source,
                f"ragged grid: {missing.size} of {nx * ny} points of the "
                f"{names[0]} × {names[1]} grid have no row, not only in the final sweep "
                f"line (e.g. {names[0]}={xc[bad % nx]:.6g}, {names[1]}={yc[bad // nx]:.6g})",
            )
    cells = np.full(nx * ny, np.nan)
    cells[flat] = sig
    grid = cells.reshape(ny, nx)
    # measured directions
    slow_dir = np.sign(slow_idx[-1] - slow_idx[0]) or 1
    same_line = np.flatnonzero((np.diff(slow_idx) == 0) & (np.diff(fast_idx) != 0))
    fast_dir = np.sign(fast_idx[same_line[0] + 1] - fast_idx[same_line[0]]) if same_line.size else 1
    xdir, ydir = (fast_dir, slow_dir) if fast == "x" else (slow_dir, fast_dir)
    if xdir < 0:
        xc, grid = xc[::-1], grid[:, ::-1]
    if ydir < 0:
        yc, grid = yc[::-1], grid[::-1, :]
    return Grid(x=xc, y=yc, signal=grid, n_missing=int(missing.size), fast=fast, snapped=snapped)


def rebuild_grid(
    source: str,
    xs: np.ndarray,
    ys: np.ndarray,
    sig: np.ndarray,
    *,
    names: tuple[str, str] = ("x", "y"),
) -> Grid:
    """Put points ``(xs[i], ys[i], sig[i])`` on their grid (see module notes).

    Raises
    ------
    InputError
        Duplicated points, a ragged grid (cells missing outside the final
        sweep line), set-points that do not form a grid, or 1-D data.
    """
    xs = np.asarray(xs, dtype=np.float64)
    ys = np.asarray(ys, dtype=np.float64)
    for col, v in zip(names, (xs, ys)):
        bad = np.flatnonzero(~np.isfinite(v))
        if bad.size:
            raise InputError(source, f"data row {bad[0] + 1}, column {col!r}: missing set-point (NaN)")
    if xs.size < 2:
        raise InputError(source, f"only {xs.size} data row(s); a map needs at least 2 × 2 points")
    exact = (_exact_levels(xs), _exact_levels(ys))
    try:
        return _assemble(source, xs, ys, sig, exact, names, snapped=False)
    except (_NotAGrid, InputError) as exc:
        if isinstance(exc, InputError) and exc.fault.startswith("1-D"):
            raise
        first: Exception = exc
    lev = []
    reasons = []
    for col, v, ex in zip(names, (xs, ys), exact):
        try:
            lev.append(_snapped_levels(v, col) if ex[0].size > 1 else ex)
        except _NotAGrid as why:
            lev.append(ex)
            reasons.append(str(why))
    if len(reasons) == 2:  # nothing to snap: report the first failure
        raise InputError(source, str(first)) if isinstance(first, _NotAGrid) else first
    try:
        return _assemble(source, xs, ys, sig, (lev[0], lev[1]), names, snapped=True)
    except _NotAGrid as second:
        raise InputError(source, "; ".join([str(second)] + reasons)) from None
    except InputError as second_error:
        if isinstance(first, InputError):
            raise first from None
        raise InputError(
            source,
            "the set-points scatter and do not form a clean grid even after snapping them to "
            f"their clusters ({second_error.fault})",
        ) from None


def warn_incomplete(source: str, grid: Grid, *, stacklevel: int) -> None:
    """A :class:`~stabtool.errors.PartialSweepWarning` when the rebuilt grid has cells without a point."""
    if grid.n_missing:
        import warnings

        from ..errors import PartialSweepWarning

        warnings.warn(
            f"{source}: the sweep is incomplete: {grid.n_missing} of {grid.signal.size} points "
            "(in the final sweep line) are missing and kept as NaN",
            PartialSweepWarning,
            stacklevel=stacklevel + 1,
        )
