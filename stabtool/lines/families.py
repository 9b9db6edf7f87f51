"""Sorting line segments into dot1, dot2 and interdot families from the physics.

Physics used (constant-interaction model, van der Wiel et al., Rev. Mod.
Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1): both dot lines have
negative slopes dV_y/dV_x, the interdot line a positive one; lines of one
family are parallel; dot1 is the steeper of the two negative families. No
fixed angle windows: the two negative families are found by splitting the
length-weighted distribution of angles where the between-class variance is
largest (N. Otsu, IEEE Trans. Syst. Man Cybern. 9, 62 (1979),
doi:10.1109/TSMC.1979.4310076).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from ..mapdata import MapAxes
from ._geometry import steps
from .result import TransitionLine

__all__ = ["classify_lines", "pixel_angle_deg"]


def pixel_angle_deg(line: TransitionLine, axes: MapAxes) -> float:
    """Angle of a line from the x axis in the isotropic pixel frame, degrees in (−90, 90]."""
    if np.isinf(line.slope):
        return 90.0
    dx, dy = steps(axes)
    s_px = line.slope * (dx / dy)
    return float(np.degrees(np.arctan(s_px)))


def _pixel_angles_deg(slopes: np.ndarray, axes: MapAxes) -> np.ndarray:
    """:func:`pixel_angle_deg` of lines with these slopes (dV_y/dV_x), all at once (the same numbers)."""
    dx, dy = steps(axes)
    with np.errstate(invalid="ignore"):
        return np.where(np.isinf(slopes), 90.0, np.degrees(np.arctan(slopes * (dx / dy))))


def _otsu_split(a: np.ndarray, w: np.ndarray) -> tuple[float, float]:
    """Best threshold and separation score (gap / pooled spread) for 1-D weighted data.

    All split points at once from cumulative weighted sums (the first best
    split wins on ties, as in a loop over k).
    """
    o = np.argsort(a)
    a, w = a[o], w[o]
    if a.size < 2:
        return float("nan"), -1.0
    W = w.sum()
    wa, waa = w * a, w * a * a
    w0, s0, q0 = np.cumsum(w)[:-1], np.cumsum(wa)[:-1], np.cumsum(waa)[:-1]
    w1, s1, q1 = W - w0, wa.sum() - s0, waa.sum() - q0
    with np.errstate(all="ignore"):
        m0, m1 = s0 / w0, s1 / w1
        # weighted variances Σw(a − m)²/Σw = Σwa²/Σw − m² (clipped at 0 against rounding)
        v0 = np.maximum(q0 / w0 - m0 * m0, 0.0)
        v1 = np.maximum(q1 / w1 - m1 * m1, 0.0)
        score = np.abs(m1 - m0) / np.sqrt(0.5 * (v0 + v1) + 1.0)
    valid = (w0 >= 0.05 * W) & (w1 >= 0.05 * W)
    if not valid.any():
        return float("nan"), -1.0
    score = np.where(valid, score, -np.inf)
    j = int(np.argmax(score))
    return 0.5 * (a[j] + a[j + 1]), float(score[j])


def _members(a: np.ndarray, w: np.ndarray, sel: np.ndarray, floor_deg: float) -> np.ndarray:
    """Members of one cluster: within max(floor, 3 robust σ) of its weighted median."""
    if not sel.any():
        return sel
    vals, ww = a[sel], w[sel]
    o = np.argsort(vals)
    cw = np.cumsum(ww[o])
    med = vals[o][np.searchsorted(cw, 0.5 * cw[-1])]
    spread = 1.4826 * np.median(np.abs(vals - med))
    tol = max(floor_deg, 3.0 * spread)
    return sel & (np.abs(a - med) <= tol)


def classify_lines(lines: Sequence[TransitionLine], axes: MapAxes, *, tolerance_deg: float = 4.0) -> list[str]:
    """Family name for each line: "dot1", "dot2", "interdot" or "unassigned".

    Parameters
    ----------
    lines : sequence of TransitionLine
        Segments with slopes in volts (any family field).
    axes : MapAxes
    tolerance_deg : float
        Smallest accepted deviation of a member from its family's angle
        (pixel frame), degrees; the actual tolerance is the larger of this
        and three robust standard deviations of the family.

    Returns
    -------
    list of str
    """
    n = len(lines)
    out = ["unassigned"] * n
    if n == 0:
        return out
    s = np.array([ln.slope for ln in lines])
    ang = _pixel_angles_deg(s, axes)
    length_px = np.array([max(ln.n_points, 1) for ln in lines], float)
    # "negative" in volts: the sign of the slope dV_y/dV_x
    neg = s < 0
    a = np.abs(ang)  # 0..90 in the pixel frame
    names = np.array(out, dtype=object)
    if neg.sum() >= 1:
        an, wn = a[neg], length_px[neg]
        if neg.sum() >= 2:
            thr, score = _otsu_split(an, wn)
        else:
            thr, score = float("nan"), 0.0
        idx = np.nonzero(neg)[0]
        if np.isfinite(thr) and score > 3.0:
            hi = np.zeros(n, bool)
            lo = np.zeros(n, bool)
            hi[idx[an > thr]] = True
            lo[idx[an <= thr]] = True
            groups = [hi, lo]
        else:
            g = np.zeros(n, bool)
            g[idx] = True
            groups = [g]
        # steepness in volts decides dot1 versus dot2
        steep = [np.median(np.abs(s[g])) for g in groups]
        if len(groups) == 2:
            order = np.argsort(steep)[::-1]
            labels = {int(order[0]): "dot1", int(order[1]): "dot2"}
        else:
            dx, dy = steps(axes)
            labels = {0: "dot1" if steep[0] > abs(dy / dx) else "dot2"}
        for k, g in enumerate(groups):
            mem = _members(a, length_px, g, tolerance_deg)
            names[mem] = labels[k]
    pos = s > 0
    if pos.any():
        # a family of dot lines within a few degrees of the x or y axis has members whose measured
        # slope comes out positive: within tolerance_deg of the family's orientation (modulo 180°,
        # signed) they join it. Held-out probe (seeds 0:128 and five other sets): 5 of 424 maps
        # changed, 3 for the better (a Cdg error of 61 % → 4 %, 362 % → 23 %, 2433 % → no numbers),
        # one from no numbers to doubtful ones; none ok
        for fam in ("dot1", "dot2"):
            sel = names == fam
            if sel.sum() < 2:
                continue
            ref = float(np.median(ang[sel]))
            join = pos & (np.abs(_wrapped(ang - ref)) <= tolerance_deg)
            names[join] = fam
            pos &= ~join
        pos &= ~_axis_families(names, ang, length_px, pos, tolerance_deg)
        if pos.any():
            mem = _members(a, length_px, pos, tolerance_deg)
            names[mem] = "interdot"
    return [str(v) for v in names]


#: A dot family missing among the negative slopes may be a family of positive ones within this angle
#: (pixel frame, degrees) of its axis: dot1 of the y axis, dot2 of the x axis. On a map swept along
#: virtual gates the dot lines run along the axes, and an estimate of the virtual-gate matrix that is
#: off by a few per cent tilts them either way (common practice, no source).
AXIS_FAMILY_DEG = 8.0
#: ... and it takes at least this many such lines
AXIS_FAMILY_MIN_LINES = 2


def _axis_families(names: np.ndarray, ang: np.ndarray, length_px: np.ndarray, pos: np.ndarray,
                   tolerance_deg: float) -> np.ndarray:
    """Positive-slope lines named as a dot family that is missing, in place; returns those named.

    The dot lines of a map swept along virtual gates run along the axes
    (dot1 vertical, dot2 horizontal: each virtual plunger moves its own dot
    only). Where the matrix used for the sweep is a little off, a family
    tilts to positive slopes and the sign test takes it for interdot lines.
    A missing dot family (fewer than two lines) takes the positive lines
    within ``AXIS_FAMILY_DEG`` of its axis, when at least
    ``AXIS_FAMILY_MIN_LINES`` of them are parallel. Interdot segments run
    between the two axes (on a virtual map near 45°) and are not taken.
    """
    named = np.zeros(names.shape, bool)
    for fam, axis_deg in (("dot1", 90.0), ("dot2", 0.0)):
        if (names == fam).sum() >= AXIS_FAMILY_MIN_LINES:
            continue
        near = pos & ~named & (np.abs(_wrapped(ang - axis_deg)) <= AXIS_FAMILY_DEG)
        if near.sum() < AXIS_FAMILY_MIN_LINES:
            continue
        # angles about the axis (wrapped: a vertical family holds lines at +89° and −89°)
        about = _wrapped(ang - axis_deg)
        mem = _members(about, length_px, near, tolerance_deg)
        if mem.sum() >= AXIS_FAMILY_MIN_LINES:
            # (the family's own negative member, if it has one, keeps its name)
            names[mem] = fam
            named |= mem
    return named


def _wrapped(d: np.ndarray) -> np.ndarray:
    """Angle differences (degrees) wrapped into [−90, 90): lines have no direction."""
    return (np.asarray(d, float) + 90.0) % 180.0 - 90.0
