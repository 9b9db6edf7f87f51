"""The read-out corrected before the analysis: periodic pickup removed, a row low-pass undone, rows aligned.

Each correction is its own module of :mod:`stabtool.preprocess`; this one
runs them in the order that works and writes one note per correction made.

Order matters. On a map swept one way, periodic pickup is looked for first as
straight stripes (a plane wave, :mod:`~stabtool.preprocess.stripes`: a tone
whose phase steps by a fixed amount from row to row, which includes a tone
continuous in row-major time), then as a tone in row-major time
(:mod:`~stabtool.preprocess.pickup`); on any map then as a tone whose phase is
random from row to row (:mod:`~stabtool.preprocess.row_tone`). On a serpentine
sweep the tone runs along the serpentine: the alternate-row shift is measured
first and the pickup removed in that time order, before any alignment
(aligning rows first would move the tone by a fraction of a sample on
alternate rows). A one-pole low-pass along the rows (a read-out time constant,
:mod:`~stabtool.preprocess.lowpass`) is then measured from the noise and
undone in each row's measurement direction, which also removes the
serpentine shift it caused; the shift is measured again and what is left of
it aligned (:mod:`~stabtool.preprocess.serpentine`).
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from ..mapdata import map_axes, signal_range, x_gate
from ..quality import Quality
from .lowpass import agrees_with_shift, row_low_pass, undo_row_low_pass
from .pickup import remove_pickup
from .row_tone import remove_row_tones
from .serpentine import AlternateRowShift, align_alternate_rows, alternate_row_shift
from .stripes import remove_stripes

__all__ = ["corrected_readout", "width_variance_error"]


def corrected_readout(da: xr.DataArray, q: Quality) -> tuple[xr.DataArray, float, float, Quality]:
    """The map with its read-out corrected, the smear that may remain along x and the time constant
    undone (V, ≥ 0), and the notes.

    Parameters
    ----------
    da : xarray.DataArray
        The map as measured (rows along x, the fast axis).
    q : Quality
        The quality so far; a note is added for every correction made.

    Returns
    -------
    (xarray.DataArray, float, float, Quality)
        The corrected map (``da`` itself when nothing was corrected); the
        smear along x that may remain (the larger of the time constant's
        standard error and half the alternate-row shift left, in volts; 0
        when neither was found); the low-pass time constant undone (V, 0
        when none; with the smear it bounds the line widths' error,
        :func:`width_variance_error`); the quality with the notes.
    """
    raw = np.asarray(da.values, float)
    shift = alternate_row_shift(raw)
    snake = shift.significant
    values, found, q = _without_pickup(raw, snake, x_gate(da), q)
    values, lp_found, tau_px, residual_px, snake, q = _without_low_pass(values, snake, shift, x_gate(da), q)
    found = found or lp_found
    if found and snake:
        shift = alternate_row_shift(values)
    if shift.significant:
        q = q.with_warning(
            f"alternate rows are shifted by {shift.shift_px:+.2f} ± {shift.stderr_px:.2f} px along {x_gate(da)} "
            "(a serpentine sweep read with a lag?): rows aligned on their midpoint before the analysis",
            doubtful=False,
        )
        values = align_alternate_rows(values, shift.shift_px)
        residual_px = max(residual_px, 0.5 * abs(shift.shift_px))
    if not found and not shift.significant:
        return da, 0.0, 0.0, q
    dx = abs(float(map_axes(da).dx))
    return da.copy(data=values), residual_px * dx, tau_px * dx, q


def width_variance_error(tau: float, tau_error: float) -> float:
    """How far off a line profile's variance may be once a low-pass of time constant ``tau`` is undone.

    A one-pole filter of time constant τ adds τ² to the variance of a line's
    profile along the rows; undone with τ̂ = τ ± δτ it leaves
    ``τ² − τ̂² ≈ ∓(2τδτ + δτ²)`` (units of ``tau`` squared), which for a
    long filter is much more than δτ² (1.5 points known to 0.2: 0.64
    points²). Without a filter undone (``tau`` 0) it is ``tau_error²``.
    """
    return float(2.0 * abs(tau) * tau_error + tau_error**2)


def _without_pickup(values: np.ndarray, snake: bool, gate: str, q: Quality) -> tuple[np.ndarray, bool, Quality]:
    """Periodic pickup removed in the order of the module docstring; whether any was found."""
    found = False
    if not snake:
        # a tone whose phase steps by a fixed amount from row to row (a wait before each row, or none):
        # straight stripes at any angle, one plane wave of the map
        values, waves = remove_stripes(values)
        if waves:
            found = True
            what = ", ".join(f"period {w.period_points:.2f} points along {gate}, phase step "
                             f"{360 * (w.fy % 1):.0f}° per row, amplitude {w.amplitude:.3g} "
                             f"({_range_share(values, w.amplitude)})" for w in waves)
            q = q.with_warning(f"periodic pickup removed (straight stripes across the map: a tone whose phase "
                               f"steps from row to row): {what}", doubtful=False)
    # a serpentine sweep's time runs back and forth; a row-major tone is still looked for after it
    # (rows shifted by another cause, or a sweep that returns without measuring)
    for order in ((True, False) if snake else (False,)):
        values, tones = remove_pickup(values, snake=order)
        if not tones:
            continue
        found = True
        what = ", ".join(f"period {p.period_points:.2f} points, amplitude {p.amplitude:.3g} "
                         f"({_range_share(values, p.amplitude)})" for p in tones)
        how = "back and forth" if order else "one after another"
        q = q.with_warning(f"periodic pickup in measurement time removed (rows measured along {gate} "
                           f"{how}): {what}", doubtful=False)
    # a tone whose phase is random from row to row (rows started at moments of their own)
    values, row_tones = remove_row_tones(values)
    if row_tones:
        found = True
        what = ", ".join(f"period {t.period_points:.2f} points along {gate}, rms amplitude {t.amplitude:.3g} "
                         f"({_range_share(values, t.amplitude)})" for t in row_tones)
        q = q.with_warning(f"periodic pickup removed row by row (a tone whose phase is random from row to row): "
                           f"{what}", doubtful=False)
    return values, found, q


def _without_low_pass(values: np.ndarray, snake: bool, shift: AlternateRowShift, gate: str,
                      q: Quality) -> tuple[np.ndarray, bool, float, float, bool, Quality]:
    """A row low-pass undone; whether it was, its time constant and that one's standard error (points),
    the sweep serpentine."""
    lp = row_low_pass(values, serpentine=snake, odd_rows_forward=snake and shift.shift_px > 0)
    # on a serpentine the rows' shift must be the filter's (else the coefficient is not trusted)
    use = lp.significant and (not snake or agrees_with_shift(lp, shift.shift_px))
    undone = undo_row_low_pass(values, lp) if use else values
    if use and not lp.serpentine:
        apart = alternate_row_shift(undone)
        if apart.significant:
            # undoing one direction on every row set alternate rows apart: the sweep ran back and forth
            # (its zig-zag hidden by other noise before); the rows set apart ran the other way, and
            # by about twice the filter's delay
            lp = row_low_pass(values, serpentine=True, odd_rows_forward=apart.shift_px > 0)
            use = lp.significant and agrees_with_shift(lp, 0.5 * apart.shift_px)
            undone = undo_row_low_pass(values, lp) if use else values
            snake = True
    if not use:
        return values, False, 0.0, 0.0, snake, q
    how = ("back and forth" if lp.serpentine else "from first to last column" if lp.forward
           else "from last to first column")
    q = q.with_warning(
        f"read-out low-pass along {gate} (rows measured {how}, judged from the {lp.direction_from}): "
        f"one-pole time constant {lp.tau_points:.2f} ± {lp.tau_stderr_points:.2f} points "
        f"(a = {lp.coefficient:.3f}, from the noise's correlation along the rows); undone before the analysis",
        doubtful=False,
    )
    return undone, True, lp.tau_points, lp.tau_stderr_points, snake, q


def _range_share(values: np.ndarray, amplitude: float) -> str:
    """``amplitude`` as a share of the map's 5–95 % range, for the notes on removed pickup."""
    spread = signal_range(values)
    return f"{100 * amplitude / spread:.0f} % of the map's 5–95 % range"
