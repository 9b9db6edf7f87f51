"""Line-width energy reference: Fermi widths of dot lines at a known T_e → α_ii.

Across a dot-i line, along gate i, the occupation is a Fermi function of
width ``w_i = k_B T_e/(e α_ii)`` (conventions), so ``α_ii = k_B T_e/(e w_i)``
(:func:`stabtool.physics.thermal.lever_arm_from_width`).

Notes
-----
Per dot, the widths of its lines (``TransitionLine.width_V``) are combined
by an inverse-variance weighted mean, its error scaled by the scatter between
lines. Checks, each turning the verdict doubtful:

* resolution: a width under 2 sampling steps along the dot's gate is
  resolution-limited (pixelation and smoothing broaden it);
* consistency: the lines of one dot must agree within their errors (a
  reduced χ² above 4 points at tunnel broadening or noise on some lines);
* thermal ratio: with the diagram's ratio ``α11/α22 = δ2/δ1`` the two widths
  must satisfy ``w2/w1 = α11/α22``; a family clearly broader than that (more
  than 3σ and 10 %) is broader than thermal (tunnel-, lifetime- or
  noise-broadened);
* plausibility: α outside 0.005–1 eV/V is reported (common practice, no
  source: gate lever arms of gate-defined dots lie well inside it).

On maps, the width cuts of one dot are kept clear of the other dot's lines
(:func:`clear_of_lines`, ``CLEARANCE_WIDTHS`` of the other dot's width):
nearer, the other dot's thermal tail and its counter-step through the mutual
charging energy narrow the step (dot2 widths 3.5–5.6 % low on hot maps).
:func:`choose_clear_width` picks between the clear cuts and all cuts.

References
----------
Standard Fermi–Dirac statistics (FWHM of the derivative 3.5255 k_B T);
see :mod:`stabtool.physics.thermal`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from ..lines.result import TransitionLine
from ..physics.thermal import lever_arm_from_width
from ..quality import Quality

__all__ = [
    "CLEARANCE_WIDTHS",
    "CLEAR_ADOPT_REL",
    "CROWDED_WIDTH_FLOOR",
    "MIN_WIDTH_PIXELS",
    "ClearWidth",
    "DotWidth",
    "LineWidthReference",
    "choose_clear_width",
    "clear_of_lines",
    "lever_arms_from_line_widths",
]

#: Widths under this many sampling steps are resolution-limited.
MIN_WIDTH_PIXELS = 2.0

#: A width cut must stay this many Fermi widths of the *other* dot (its own axis) away from
#: the other dot's lines over its whole window; closer, that dot's thermal tail (a curved
#: background) and its counter-step through the mutual charging energy narrow the step
#: (hot linear-sensor maps: dot2 widths −3.4 … −5.6 % with all cuts, −0.5 … −0.7 % with 4 widths).
CLEARANCE_WIDTHS = 4.0

#: Relative error floor of a width when no cut is clear of the other dot's lines (the bias
#: seen there reaches −6 %; hot linear-sensor maps, no source).
CROWDED_WIDTH_FLOOR = 0.06

#: The width from the clear cuts replaces the all-cut width only when its stated relative error
#: is at most this (the 2.5 % an ok lever arm may carry, ``fit.scale_verdict``); fewer cuts on a
#: noisy map otherwise trade a small bias for a large random error (bench si-mos SNR 10: −8.6 %).
CLEAR_ADOPT_REL = 0.025


@dataclass(frozen=True)
class ClearWidth:
    """Width of one dot's lines after the clearance rule.

    Attributes
    ----------
    width_V, error_V : float
        Width (V) and its stated standard error (V).
    choice : {"clear", "all", "crowded"}
        "clear": from the cuts clear of the other dot's lines; "all": every cut (the clear cuts too
        few or too noisy; error at least the difference of the two); "crowded": no clear cut, error
        at least ``CROWDED_WIDTH_FLOOR``.
    warning : str
        Doubt to report ("" when none).
    """

    width_V: float
    error_V: float
    choice: str
    warning: str = ""


def choose_clear_width(width_all_V: float, error_all_V: float, width_clear_V: float,
                       error_clear_V: float) -> ClearWidth:
    """Pick the width of a dot from all cuts or from the cuts clear of the other dot's lines.

    Parameters
    ----------
    width_all_V, error_all_V : float
        Width and error from every cut, V.
    width_clear_V, error_clear_V : float
        Width and error from the cuts kept by :func:`clear_of_lines`, V (NaN when none).

    Returns
    -------
    ClearWidth
        The clear-cut width when its relative error is at most ``CLEAR_ADOPT_REL``; else the
        all-cut width with its error raised to the difference of the two; with no clear cut, the
        all-cut width with its error raised to ``CROWDED_WIDTH_FLOOR`` and a warning.
    """
    w, e = float(width_all_V), float(error_all_V)
    w_c, e_c = float(width_clear_V), float(error_clear_V)
    if np.isfinite(w_c) and np.isfinite(e_c) and w_c > 0 and e_c <= CLEAR_ADOPT_REL * w_c:
        return ClearWidth(w_c, e_c, "clear")
    if np.isfinite(w_c) and w_c > 0:
        return ClearWidth(w, max(e, abs(w_c - w)), "all")
    e = max(e, CROWDED_WIDTH_FLOOR * w) if np.isfinite(e) else CROWDED_WIDTH_FLOOR * w
    return ClearWidth(
        w, e, "crowded",
        f"within {CLEARANCE_WIDTHS:g} thermal widths of the other dot's lines everywhere: width biased low, "
        f"stated error raised to {100 * CROWDED_WIDTH_FLOOR:.0f} %",
    )


def clear_of_lines(
    cross_V: np.ndarray,
    centre_V: np.ndarray,
    *,
    half_V: float,
    other_lines: Sequence[TransitionLine],
    which: int,
    clearance_V: float,
) -> np.ndarray:
    """Which width cuts stay clear of the other dot's lines.

    Parameters
    ----------
    cross_V : ndarray, shape (n,)
        Fixed voltage of each cut (x for dot2 cuts along y, y for dot1 cuts along x), V.
    centre_V : ndarray, shape (n,)
        Position of the dot's own line on each cut, V (the cut spans ``centre ± half_V``).
    half_V : float
        Half-length of the cut window along the dot's own gate, V.
    other_lines : sequence of TransitionLine
        Lines of the other dot (dot2 lines when ``which == 0``, dot1 lines when ``which == 1``).
    which : {0, 1}
        Dot of the cuts (0: cuts along x, 1: cuts along y).
    clearance_V : float
        Smallest distance allowed, along the *other* dot's gate, from the window to any other
        line, V (``CLEARANCE_WIDTHS`` × the other dot's Fermi width).

    Returns
    -------
    ndarray of bool, shape (n,)
        True where no other line comes closer than ``clearance_V`` anywhere on the window.

    Notes
    -----
    Along a dot-2 cut (fixed x) the dot-1 electrochemical potential is offset from its
    transition by ``α11·Δx``, Δx the horizontal distance to the dot-1 line, so ``Δx / w1``
    (``w1 = k_B T/(e α11)``) is that offset in units of k_B T; the dot-1 occupation then
    differs from 0 or 1 by about ``exp(−Δx/w1)`` (Fermi–Dirac statistics). Within a few
    widths the dot-1 tail bends the background and the dot-1 counter-step (mutual charging
    energy) narrows the dot-2 step. Each other line counts on its segment extended by the
    window half-length; the lines are straight, so the nearest approach over a window is at
    a window end or zero when the line crosses it.
    """
    cross = np.asarray(cross_V, float).reshape(-1)
    centre = np.asarray(centre_V, float).reshape(-1)
    keep = np.ones(cross.size, bool)
    if not np.isfinite(clearance_V) or clearance_V <= 0:
        return keep
    lines = list(other_lines)
    if not lines or cross.size == 0:
        return keep
    lo, hi = centre - half_V, centre + half_V
    # all other lines at once, one row per line (the same arithmetic as TransitionLine.x_at / y_at)
    ends = np.array([(ln.start[1], ln.end[1]) if which == 1 else (ln.start[0], ln.end[0]) for ln in lines], float)
    par = np.array([(ln.x0, ln.y0, ln.slope) for ln in lines], float)
    x0, y0, slope = par[:, 0:1], par[:, 1:2], par[:, 2:3]
    s0, s1 = np.min(ends, axis=1)[:, None], np.max(ends, axis=1)[:, None]

    def pos(v: np.ndarray) -> np.ndarray:
        # cuts along y at x = cross: other line x(y); cuts along x at y = cross: other line y(x)
        with np.errstate(all="ignore"):
            if which == 1:
                return np.where(np.isinf(slope), x0 + 0.0 * v, x0 + (v - y0) / slope)
            return y0 + slope * (v - x0)

    a = np.maximum(lo, s0 - half_V)  # (n_lines, n)
    b = np.minimum(hi, s1 + half_V)
    near = a <= b
    if not near.any():
        return keep
    da = cross - pos(a)
    db = cross - pos(b)
    dmin = np.where(np.sign(da) != np.sign(db), 0.0, np.minimum(np.abs(da), np.abs(db)))
    keep &= ~np.any(near & (dmin < clearance_V), axis=0)
    return keep


@dataclass(frozen=True)
class DotWidth:
    """Combined Fermi width and lever arm of one dot (NaN when no line had a width)."""

    dot: str
    width_V: float
    width_stderr_V: float
    width_pixels: float
    lever_arm: float
    lever_arm_stderr: float
    n_lines: int


@dataclass(frozen=True)
class LineWidthReference:
    """Result of :func:`lever_arms_from_line_widths`.

    Attributes
    ----------
    dot1, dot2 : DotWidth
        ``lever_arm`` is α11 (dot1 on x) and α22 (dot2 on y).
    electron_temperature_K : float
    quality : Quality
    """

    dot1: DotWidth
    dot2: DotWidth
    electron_temperature_K: float
    quality: Quality = field(default_factory=Quality)

    @property
    def diagonal(self) -> tuple[float, float]:
        """(α11, α22)."""
        return (self.dot1.lever_arm, self.dot2.lever_arm)


def _combine(dot: str, widths: np.ndarray, errs: np.ndarray, step: float, temp: float) -> tuple[DotWidth, float]:
    ok = np.isfinite(widths) & (widths > 0) & np.isfinite(errs) & (errs > 0)
    w, e = widths[ok], errs[ok]
    if w.size == 0:
        nan = float("nan")
        return DotWidth(dot, nan, nan, nan, nan, nan, 0), nan
    wt = 1.0 / e**2
    mean = float(np.sum(wt * w) / np.sum(wt))
    err = float(np.sqrt(1.0 / np.sum(wt)))
    chi = float(np.sum(wt * (w - mean) ** 2) / (w.size - 1)) if w.size > 1 else float("nan")
    if np.isfinite(chi):
        err *= np.sqrt(max(chi, 1.0))
    alpha = lever_arm_from_width(mean, temp)
    return DotWidth(dot, mean, err, mean / abs(step), alpha, alpha * err / mean, int(w.size)), chi


def lever_arms_from_line_widths(
    lines: Sequence[TransitionLine],
    *,
    electron_temperature_K: float,
    x_step_V: float,
    y_step_V: float,
    alpha_ratio: float | None = None,
    alpha_ratio_stderr: float | None = None,
) -> LineWidthReference:
    """Diagonal lever arms α11, α22 from the Fermi widths of dot1 and dot2 lines.

    Parameters
    ----------
    lines : sequence of TransitionLine
        Detected lines; ``width_V`` and ``width_stderr_V`` of the dot1 lines
        (measured along x) and dot2 lines (along y) are used, NaN widths skipped.
    electron_temperature_K : float
        Electron temperature, K.
    x_step_V, y_step_V : float
        Sampling steps of the map along x and y, V.
    alpha_ratio, alpha_ratio_stderr : float, optional
        ``α11/α22`` from the diagram (``δ2/δ1``), to test that both widths are thermal.

    Returns
    -------
    LineWidthReference
    """
    if not (electron_temperature_K > 0):
        raise InputError("electron_temperature_K", f"expected a positive temperature in K, got {electron_temperature_K}")
    for name, v in (("x_step_V", x_step_V), ("y_step_V", y_step_V)):
        if not (np.isfinite(v) and v != 0):
            raise InputError(name, f"expected a non-zero sampling step in V, got {v}")
    temp = float(electron_temperature_K)
    q = Quality()
    dots = []
    for fam, step in (("dot1", x_step_V), ("dot2", y_step_V)):
        sel = [ln for ln in lines if ln.family == fam]
        w = np.array([ln.width_V for ln in sel], float)
        e = np.array([ln.width_stderr_V for ln in sel], float)
        dw, chi = _combine(fam, w, e, step, temp)
        dots.append(dw)
        if dw.n_lines == 0:
            q = q.with_warning(f"{fam}: no line with a measured width; no lever arm from the line width")
            continue
        if dw.width_pixels < MIN_WIDTH_PIXELS:
            q = q.with_warning(
                f"{fam}: Fermi width {dw.width_V:.3g} V is {dw.width_pixels:.2f} sampling steps "
                f"(< {MIN_WIDTH_PIXELS:g}): resolution-limited, the lever arm is a lower bound"
            )
        if np.isfinite(chi) and chi > 4.0:
            q = q.with_warning(
                f"{fam}: the widths of its {dw.n_lines} lines disagree (reduced chi-squared {chi:.1f}); "
                "some lines are broader than thermal"
            )
        if not (0.005 <= dw.lever_arm <= 1.0):
            q = q.with_warning(f"{fam}: lever arm {dw.lever_arm:.3g} eV/V is implausible for a gate-defined dot")
    d1, d2 = dots
    if alpha_ratio is not None and np.isfinite(d1.lever_arm) and np.isfinite(d2.lever_arm):
        measured = d1.lever_arm / d2.lever_arm
        rel = np.hypot(d1.lever_arm_stderr / d1.lever_arm, d2.lever_arm_stderr / d2.lever_arm)
        rerr = np.hypot(rel, (alpha_ratio_stderr or 0.0) / alpha_ratio)
        dev = measured / alpha_ratio - 1.0
        if abs(dev) > 3 * rerr and abs(dev) > 0.10:
            broader = "dot1" if dev < 0 else "dot2"
            q = q.with_warning(
                f"{broader} lines are {100 * abs(dev):.0f} % broader than thermal relative to the other dot "
                f"(width-based α11/α22 = {measured:.3g}, diagram δ2/δ1 = {alpha_ratio:.3g})"
            )
    return LineWidthReference(d1, d2, temp, q)
