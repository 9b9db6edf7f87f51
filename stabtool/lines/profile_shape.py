"""Are a map's transition lines steps (a charge read-out) or peaks (its derivative)?

A charge sensor read directly gives a step at every transition line: the
signal settles at a different level on either side. Read through a lock-in
that modulates a gate, the map is the signal's derivative along that gate,
and every line becomes a peak or a dip that returns to the same level on
both sides (the lines of transport maps at low bias are peaks too).

The test: the map's profiles across each detected dot line, averaged along
the line, give a left level, a right level and the largest excursion from
their mean in the middle. Their *level ratio* ``|right − left| / (2 ·
excursion)`` is 1 for an ideal step and 0 for a symmetric peak. On a
derivative map the edge detector sits on a peak's flanks, and a window of
``±PROFILE_HALFWIDTH_PX`` around the flank still spans the whole peak, so
the ratio stays near 0 there too.

Per family, the lines' ratios are combined by their median weighted with
excursion × length (strong, long lines count most), and the map's ratio is
the larger of the two families' (a family needs two lines). Artefacts that
the detector takes for lines (telegraph stretches along the rows, residual
pickup stripes) are symmetric too, but they land in one family: on
held-out charge-sensor maps one family's weighted median went down to
0.044 while the other's stayed ≥ 0.62. Measured on the whole held-out
probe: DEVELOPERS.md, "Derivative read-outs".
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from ._geometry import volts_to_idx
from .result import LineDetection

#: half-length of the profiles across a line (px): several times a typical Fermi width and an
#: edge detector's offset from a peak's centre
PROFILE_HALFWIDTH_PX = 8
#: shortest line (px) whose profiles are used; fewer lines than MIN_LINES give no verdict
MIN_LINE_PX = 8.0
MIN_LINES = 3
#: a map ratio below this says the lines are peaks (held-out probe: lock-in maps ≤ 0.114, charge-sensor
#: maps ≥ 0.207, the next 0.361)
PEAK_RATIO = 0.15


@dataclass(frozen=True)
class LineShape:
    """The level ratio of a map's dot lines (the larger family's weighted median) and their number.

    ``ratio`` is NaN (and ``peaks`` False) with fewer than :data:`MIN_LINES` usable lines.
    ``axis`` is the gate axis ("x" or "y") a derivative map most likely differentiates along
    (:func:`derivative_axis`; "x" unless both families say otherwise).
    """

    ratio: float
    n_lines: int
    axis: str = "x"

    @property
    def peaks(self) -> bool:
        """The lines are peaks (the map looks like a derivative read-out)."""
        return bool(np.isfinite(self.ratio) and self.ratio < PEAK_RATIO)


def line_shape(detection: LineDetection) -> LineShape:
    """The level ratio of the dot lines of ``detection``, on the map it processed.

    Parameters
    ----------
    detection : LineDetection
        Lines found on the map (their end points are used; NaN points are allowed).

    Returns
    -------
    LineShape
    """
    img = np.asarray(detection.processed, float)
    if img.ndim != 2 or not np.isfinite(img).any():
        return LineShape(float("nan"), 0)
    img = np.where(np.isfinite(img), img, np.nanmedian(img))
    ax = detection.axes
    h = PROFILE_HALFWIDTH_PX
    u = np.arange(-h, h + 1, dtype=float)
    outer = h // 3 + 1
    per_family: dict[str, list[tuple[float, float]]] = {"dot1": [], "dot2": []}
    steps: dict[str, list[tuple[float, float, float]]] = {"dot1": [], "dot2": []}
    for fam, lines in per_family.items():
        family = detection.families.get(fam)
        for ln in family.lines if family is not None else ():
            x0, y0 = float(volts_to_idx(ln.start[0], ax.x)), float(volts_to_idx(ln.start[1], ax.y))
            x1, y1 = float(volts_to_idx(ln.end[0], ax.x)), float(volts_to_idx(ln.end[1], ax.y))
            length = float(np.hypot(x1 - x0, y1 - y0))
            if not np.isfinite(length) or length < MIN_LINE_PX:
                continue
            t = np.linspace(0.0, 1.0, int(length))[2:-2]
            px, py = x0 + t * (x1 - x0), y0 + t * (y1 - y0)
            nx, ny = -(y1 - y0) / length, (x1 - x0) / length
            xs, ys = px[:, None] + u * nx, py[:, None] + u * ny
            prof = ndi.map_coordinates(img, [ys.ravel(), xs.ravel()], order=1, mode="nearest").reshape(xs.shape)
            m = prof.mean(axis=0)
            left, right = m[:outer].mean(), m[-outer:].mean()
            excursion = float(np.max(np.abs(m[h // 2 : -(h // 2)] - 0.5 * (left + right))))
            if excursion > 0:
                lines.append((abs(right - left) / (2.0 * excursion), excursion * length))
                area = abs(float(np.sum(m - 0.5 * (left + right))))  # the peak's area across the line (px)
                steps[fam].append((area / max(abs(nx), 1e-3), area / max(abs(ny), 1e-3), excursion * length))
    n_lines = sum(len(v) for v in per_family.values())
    medians = [_weighted_median(v) for v in per_family.values() if len(v) >= 2]
    if n_lines < MIN_LINES or not medians:
        return LineShape(float("nan"), n_lines)
    return LineShape(float(max(medians)), n_lines, derivative_axis(steps))


def derivative_axis(steps: dict[str, list[tuple[float, float, float]]]) -> str:
    """The axis a derivative map most likely differentiates along, from its peaks' areas.

    Summed across a line along x, a derivative along x steps by the sensor's
    step ``h`` of that dot, and one along y by ``h·|n_y/n_x|`` (``n`` the
    line's normal, in pixels): so each hypothesis gives each family's sensor
    step from the peak's area along the normal, ``area/|n_x|`` or
    ``area/|n_y|``. A charge sensor sees both dots of a pair with steps of the
    same order (the held-out probe draws their ratio over 0.1–3); the
    hypothesis whose two family steps are nearer each other (in ratio) wins.
    The two differ by the ratio of the families' slopes (≈ 10 on a typical
    honeycomb). ``steps`` holds ``(area/|n_x|, area/|n_y|, weight)`` per line
    and family. With one family only (fewer than two lines in the other), the
    derivative is taken across that family's lines: a derivative along x hides
    the shallow (dot2) lines, nearly parallel to x, and one along y the steep
    (dot1) lines; with neither, "x".
    """
    n1, n2 = len(steps["dot1"]), len(steps["dot2"])
    if n1 < 2 or n2 < 2:
        return "y" if n2 >= 2 else "x"
    hx = {f: _weighted_median([(a, w) for a, _, w in v]) for f, v in steps.items()}
    hy = {f: _weighted_median([(b, w) for _, b, w in v]) for f, v in steps.items()}
    if min(*hx.values(), *hy.values()) <= 0:
        return "x"
    lx = abs(np.log(hx["dot1"] / hx["dot2"]))
    ly = abs(np.log(hy["dot1"] / hy["dot2"]))
    return "y" if ly < lx else "x"


def _weighted_median(pairs: list[tuple[float, float]]) -> float:
    """The weighted median of ``(value, weight)`` pairs (the lowest value reaching half the weight)."""
    v, w = np.array(pairs, float).T
    order = np.argsort(v)
    cum = np.cumsum(w[order])
    return float(v[order][np.searchsorted(cum, 0.5 * cum[-1])])
