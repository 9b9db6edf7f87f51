"""Charge steps midway between a family's lines: transitions the lattice left out.

When the detector misses every other line of a dot (a sensor near the top of
its peak hardly changes across some transitions; at low SNR their edges stay
below threshold), the lattice fit labels the lines it has as consecutive
transitions and reports an addition voltage twice the true one, with errors
that know nothing of it. The map itself says so: halfway between two
neighbouring lines of a band, where a constant-interaction cell has no
transition, the signal steps like at a line.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..lines.result import TransitionLine
from .contrast import MIN_STEP_SIGMAS, line_contrast
from .lattice import transition_line

__all__ = ["MidwaySteps", "midway_steps"]

#: Midway steps are taken for missed lines when their median is at least this fraction of the
#: median step across the family's own lines (and significant, ``contrast.MIN_STEP_SIGMAS``).
MIDWAY_STEP_FRACTION = 0.5
#: Fewest midway places (pairs of neighbouring lines in one band) the test needs.
MIN_MIDWAY_PLACES = 2
#: Each midway line keeps this fraction of its band's extent (centred: clear of the triple points).
MIDWAY_EXTENT = 0.6
#: The signal is sampled this many pixels on each side of a cut (``line_contrast``'s offset), and
#: a test needs a quarter of the lines' spacing along the scan axis (the cuts lie a quarter, half
#: and three quarters of the way) to be at least this many offsets, so that no sample reaches a line.
MIDWAY_OFFSET_PX = 2.0
MIN_SPACING_OFFSETS = 4.0
#: …and a quarter spacing must also hold twice the offset (the second sampling) and this many Fermi
#: widths of the lines (their occupation is within 1/(1 + e⁴) ≈ 2 % of its plateau there).
MIDWAY_CLEAR_WIDTHS = 4.0
#: The excess step sampled at twice the offset over the one at the offset: a step keeps it near 1
#: (up to ≈ 1.7 for a Fermi width of 2 px); the flank of a sensor peak between the lines does not
#: (probe comb sensor seed 604: medians 8.1, −4.8 and −0.8; missed generator lines 0.98–1.04).
PERSISTENCE_RANGE = (0.6, 2.5)


@dataclass(frozen=True)
class MidwaySteps:
    """The signal step midway between neighbouring lines of one family, against the lines' own.

    Attributes
    ----------
    family : str
        ``"dot1"`` or ``"dot2"``.
    n_places : int
        Midway places tested (pairs of lines labelled n and n + 1 in one band of the other dot).
    step_ratio : float
        Median |excess step| midway (the step halfway minus the mean of those a quarter and three
        quarters of the way) over the median |step| across the lines.
    z : float
        Median significance of the excess steps (standard errors).
    missed : bool
        Whether the midway steps look like transitions (``MIDWAY_STEP_FRACTION``, ``MIN_STEP_SIGMAS``,
        ``PERSISTENCE_RANGE``).
    persistence : float
        Median ratio of the excess step sampled at twice the offset to the one at the offset.
    """

    family: str
    n_places: int
    step_ratio: float
    z: float
    missed: bool
    persistence: float = float("nan")

    def note(self) -> str:
        """The doubt, naming the addition voltage that is likely twice its true size."""
        i = 1 if self.family == "dot1" else 2
        return (f"the map steps midway between neighbouring {self.family} lines ({self.n_places} places; beyond "
                f"the change a quarter of the way, {100 * self.step_ratio:.0f} % of the lines' own step, z = "
                f"{self.z:.3g}): every other {self.family} transition was missed, and ΔV{i} would be twice its "
                "true size: charge cell not determined")


def _to_physical(m: np.ndarray, u: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Physical ``(x, y)`` of virtual coordinates ``(V'_1, V'_2) = M (x, y)``."""
    mi = np.linalg.inv(m)
    return mi[0, 0] * u + mi[0, 1] * v, mi[1, 0] * u + mi[1, 1] * v


def _midway_lines(lat: Any, m: np.ndarray, which: int, template: TransitionLine,
                  fraction: float = 0.5) -> list[TransitionLine]:
    """Lines ``fraction`` of the way from the family's line labelled n to n + 1, in the same band of the other dot."""
    dv = np.asarray(lat.addition_V, float)
    dm = np.nan_to_num(np.asarray(lat.mutual_V, float))
    c = np.asarray(lat.offsets_V, float)
    labels = lat.labels1 if which == 0 else lat.labels2
    have = {tuple(int(v) for v in lab) for lab in np.asarray(labels).reshape(-1, 2)}
    out = []
    for n1, n2 in sorted(have):
        nxt = (n1 + 1, n2) if which == 0 else (n1, n2 + 1)
        if nxt not in have:
            continue
        p0, lo0, hi0 = transition_line(which, n1, n2, dv, dm, c)
        p1, lo1, hi1 = transition_line(which, *nxt, dv, dm, c)
        pos = p0 + fraction * (p1 - p0)
        lo, hi = 0.5 * (lo0 + lo1), 0.5 * (hi0 + hi1)
        mid, half = 0.5 * (lo + hi), 0.5 * MIDWAY_EXTENT * abs(hi - lo)
        ends = np.array([mid - half, mid + half])
        u, v = (np.full(2, pos), ends) if which == 0 else (ends, np.full(2, pos))
        x, y = _to_physical(m, u, v)
        out.append(replace(template, x0=float(x.mean()), y0=float(y.mean()), start=(float(x[0]), float(y[0])),
                           end=(float(x[1]), float(y[1])), width_V=float("nan")))
    return out


def midway_steps(z: np.ndarray, x: np.ndarray, y: np.ndarray, lat: Any, m: np.ndarray,
                 lines: Sequence[Sequence[TransitionLine]], *, noise: float) -> list[MidwaySteps]:
    """Measure the signal step halfway between neighbouring lines of each family.

    Parameters
    ----------
    z : ndarray, shape (ny, nx)
        The map.
    x, y : ndarray
        Its axes, V.
    lat : LatticeFit
        A lattice fit with a cell (:func:`stabtool.fit.lattice.fit_lattice`).
    m : ndarray, shape (2, 2)
        The virtual-gate matrix the lattice was fitted in.
    lines : (sequence, sequence) of TransitionLine
        The dot1 and dot2 lines the lattice was fitted to (their step is the reference).
    noise : float
        Noise standard deviation of the map.

    Returns
    -------
    list of MidwaySteps
        One per family that could be tested: at least ``MIN_MIDWAY_PLACES`` places and lines far
        enough apart (``MIN_SPACING_OFFSETS``, ``MIDWAY_CLEAR_WIDTHS``).

    Notes
    -----
    In the constant-interaction model (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)) the
    occupation is constant inside a cell, so the charge-sensor signal has no step halfway between
    two transitions of one dot within a band of the other. A step there as large as the lines'
    own means the lines used are every other transition. The sensor's smooth background changes
    the signal across any cut; the cuts a quarter and three quarters of the way measure that, and
    only the excess halfway counts (held-out probe, a sensor that barely sees dot2: 71 % of a dot2
    step across the halfway cut, 1–3 % beyond the quarters). A step keeps its excess when sampled
    twice as far out; the flank of a sensor's own peak running between the lines does not.
    """
    out = []
    step_x = abs(float(np.median(np.diff(x))))
    step_y = abs(float(np.median(np.diff(y))))
    for which, (name, fam_lines) in enumerate(zip(("dot1", "dot2"), lines)):
        if not fam_lines or not (np.isfinite(lat.addition_V[which]) and lat.addition_V[which] > 0):
            continue
        # the spacing of neighbouring lines along the scan axis (x for dot1, y for dot2), pixels
        # (V'_1 = x + M12 y moves by ΔV1 along x at fixed y; V'_2 = M21 x + y by ΔV2 along y)
        spacing_px = lat.addition_V[which] / (step_x if which == 0 else step_y)
        # the samples (also those a quarter of the way) must stay clear of the lines' own tails: a
        # quarter spacing at least MIN_SPACING_OFFSETS offsets, and an offset plus MIDWAY_CLEAR_WIDTHS
        # Fermi widths
        widths = np.array([ln.width_V for ln in fam_lines], float) / (step_x if which == 0 else step_y)
        w_px = float(np.median(widths[np.isfinite(widths)])) if np.isfinite(widths).any() else 0.0
        if 0.25 * spacing_px < max(MIN_SPACING_OFFSETS * MIDWAY_OFFSET_PX, 2 * MIDWAY_OFFSET_PX + MIDWAY_CLEAR_WIDTHS * w_px):
            continue
        cuts = [_midway_lines(lat, m, which, fam_lines[0], f) for f in (0.25, 0.5, 0.75)]
        if len(cuts[1]) < MIN_MIDWAY_PLACES:
            continue
        own = line_contrast(z, x, y, list(fam_lines), which=which, noise=noise, offset_px=MIDWAY_OFFSET_PX)
        q1, half, q3 = (line_contrast(z, x, y, c, which=which, noise=noise, offset_px=MIDWAY_OFFSET_PX) for c in cuts)
        # a smooth sensor background changes the signal a quarter of the way as much as halfway; a
        # missed transition only halfway: the excess over the mean of the two quarters
        excess = half.step - 0.5 * (q1.step + q3.step)
        with np.errstate(invalid="ignore", divide="ignore"):
            se = np.abs(half.step) / half.z * np.sqrt(1.5)  # (the three samplings have the same noise)
        ref = float(np.nanmedian(np.abs(own.step))) if np.isfinite(own.step).any() else np.nan
        fin = np.isfinite(excess) & np.isfinite(se) & (se > 0)
        if not (np.isfinite(ref) and ref > 0 and fin.sum() >= MIN_MIDWAY_PLACES):
            continue
        ratio = float(np.median(np.abs(excess[fin]))) / ref
        zm = float(np.median(np.abs(excess[fin]) / se[fin]))
        # a step keeps its size when sampled twice as far out; the flank of a narrow peak there
        # (a sensor peak running between the lines) does not
        wide = [line_contrast(z, x, y, c, which=which, noise=noise, offset_px=2 * MIDWAY_OFFSET_PX) for c in cuts]
        with np.errstate(invalid="ignore", divide="ignore"):
            kept = (wide[1].step - 0.5 * (wide[0].step + wide[2].step))[fin] / excess[fin]
        kept_med = float(np.median(kept)) if np.isfinite(kept).all() else float("nan")
        step_like = PERSISTENCE_RANGE[0] <= kept_med <= PERSISTENCE_RANGE[1]
        out.append(MidwaySteps(name, int(fin.sum()), ratio, zm,
                               bool(ratio >= MIDWAY_STEP_FRACTION and zm >= MIN_STEP_SIGMAS and step_like),
                               kept_med))
    return out
