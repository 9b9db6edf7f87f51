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

__all__ = ["MIN_WIDTH_PIXELS", "DotWidth", "LineWidthReference", "lever_arms_from_line_widths"]

#: Widths under this many sampling steps are resolution-limited.
MIN_WIDTH_PIXELS = 2.0


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
