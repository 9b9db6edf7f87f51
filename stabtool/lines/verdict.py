"""Family slopes and the quality verdict of a line detection."""

from __future__ import annotations

from typing import Sequence

import numpy as np
from scipy.special import chdtrc  # χ² survival function, = scipy.stats.chi2.sf(x, dof) without importing scipy.stats

from ..quality import Quality
from .result import LineFamily, TransitionLine

__all__ = ["family_slope", "assess_quality"]

#: A family's stated relative slope error above this makes the verdict doubtful
#: (true errors were seen up to twice the stated ones on synthetic maps).
MAX_REL_SLOPE_ERROR = 0.01
#: Relative spread of slopes within a family above this (and significant) is doubtful.
MAX_REL_SLOPE_SPREAD = 0.05
#: The two relative checks divide by the family's cross-talk term, ``|1/slope|`` (dot1, steep) or
#: ``|slope|`` (dot2), in volts: its virtual-gate matrix element. Below this value they divide by
#: it instead: on a map swept along virtual gates the lines run along the axes, the element is near 0
#: and a relative error means nothing (the virtual-gate bounds are absolute). Above it, as on every
#: map of physical plungers, the checks are unchanged.
MIN_SLOPE_SCALE = 0.1


def family_slope(lines: Sequence[TransitionLine]) -> tuple[float, float, float]:
    """Mean slope of parallel lines, its honest error, and χ²/dof of the lines about it.

    Steep lines are averaged in ``1/slope`` (dV_x/dV_y), where their errors
    are symmetric. Lines more than 4 robust standard deviations from the
    median are left out. The mean is weighted by the lines' inverse
    variances; its error is the larger of the formal one and the one implied
    by the scatter between lines (Birge ratio, σ·√(χ²/dof); R. T. Birge,
    Phys. Rev. 40, 207 (1932), doi:10.1103/PhysRev.40.207).
    """
    s = np.array([l.slope for l in lines], float)
    e = np.array([l.slope_stderr for l in lines], float)
    ok = np.isfinite(s) & np.isfinite(e) & (e > 0) & (s != 0)
    if ok.sum() == 0:
        return float("nan"), float("nan"), float("nan")
    s, e = s[ok], e[ok]
    steep = np.median(np.abs(s)) > 1.0
    v, ve = (1.0 / s, e / s**2) if steep else (s, e)
    if v.size >= 4:
        med = np.median(v)
        rs = 1.4826 * np.median(np.abs(v - med))
        keep = np.abs(v - med) <= 4 * max(rs, 1e-12) + 2 * ve
        if keep.sum() >= 3:
            v, ve = v[keep], ve[keep]
    w = 1.0 / ve**2
    m0 = float((w * v).sum() / w.sum())
    k = v.size
    q = float((w * (v - m0) ** 2).sum())
    chi2r = q / (k - 1) if k > 1 else float("nan")
    m = m0
    err = float(np.sqrt(1.0 / w.sum()))
    if k > 1 and chi2r > 1:
        err *= np.sqrt(chi2r)
    if steep:
        return 1.0 / m, err / m**2, chi2r
    return m, err, chi2r


def _crosstalk_term(slope: float, stderr: float) -> tuple[float, float]:
    """A family's cross-talk term and its error: the slope if shallow (|slope| ≤ 1), else ``1/slope``."""
    if abs(slope) > 1.0:
        return 1.0 / slope, stderr / slope**2
    return slope, stderr


def relative_slope_error(slope: float, stderr: float) -> float:
    """Error of a family slope relative to its cross-talk term (at least ``MIN_SLOPE_SCALE``).

    For a shallow family (|slope| ≤ 1) the term is the slope; for a steep
    one ``1/slope``, whose error is ``stderr/slope²``: above the floor both
    give ``stderr/|slope|``.
    """
    v, ve = _crosstalk_term(slope, stderr)
    return float(ve / max(abs(v), MIN_SLOPE_SCALE))


def assess_quality(
    families: dict[str, LineFamily],
    unassigned: Sequence[TransitionLine],
    *,
    snr: float,
    min_snr: float,
    excluded_fraction: float,
    quality: Quality | None = None,
) -> Quality:
    """Verdict on a detection: doubtful unless every check passes.

    Checks: both dot families present with at least two lines each; slopes
    consistent within each family; family slope errors below 2 %; median line
    SNR above ``min_snr``; unassigned segments not more than a third of all;
    fewer than 20 % of the rows excluded. A missing interdot family is
    reported but is not doubtful (charge sensors often do not resolve it).
    """
    q = quality if quality is not None else Quality()
    for name in ("dot1", "dot2"):
        fam = families.get(name)
        n = len(fam) if fam is not None else 0
        if fam is None or n == 0:
            q = q.with_warning(f"no {name} lines found")
            continue
        if n < 2:
            q = q.with_warning(f"only {n} {name} line found; need at least 2 for a reliable slope")
        if np.isfinite(fam.slope) and np.isfinite(fam.slope_stderr):
            rel = relative_slope_error(fam.slope, fam.slope_stderr)
            if rel > MAX_REL_SLOPE_ERROR:
                near_axis = abs(_crosstalk_term(fam.slope, fam.slope_stderr)[0]) < MIN_SLOPE_SCALE
                what = f"{100 * rel:.1f} %" + (f" of {MIN_SLOPE_SCALE:g} in its cross-talk term" if near_axis else "")
                q = q.with_warning(f"{name} slope {fam.slope:.4g} has a large error ({what})")
        if n >= 3:
            s = np.array([l.slope for l in fam.lines])
            e = np.array([l.slope_stderr for l in fam.lines])
            steep = np.median(np.abs(s)) > 1
            with np.errstate(divide="ignore", invalid="ignore"):  # (a vertical or flat line: checked below)
                v, ve = (1 / s, e / s**2) if steep else (s, e)
            # a line whose slope (or error) is not finite in the family's own parametrisation cannot
            # be weighed; the others are, as long as three remain
            use = np.isfinite(v) & np.isfinite(ve)
            v, ve = v[use], ve[use]
            w = 1 / np.maximum(ve, 1e-150) ** 2  # (finite: a zero error must not make the mean NaN)
            m = (w * v).sum() / w.sum() if v.size else np.nan
            chi2 = float((w * (v - m) ** 2).sum())
            p = float(chdtrc(v.size - 1, chi2)) if v.size >= 3 else 1.0
            scale = max(abs(float(np.median(v))), MIN_SLOPE_SCALE) if v.size >= 3 else 1.0
            spread = 1.4826 * np.median(np.abs(v - np.median(v))) / scale if v.size >= 3 else 0.0
            if p < 1e-3 and spread > MAX_REL_SLOPE_SPREAD:
                q = q.with_warning(f"{name} lines are not parallel: slopes scatter by {100 * spread:.1f} % "
                                   f"(χ² p = {p:.1g})")
    n_inter = len(families.get("interdot", LineFamily("interdot", np.nan, np.nan)))
    if n_inter == 0:
        q = q.with_warning("no interdot lines found (often unresolved by a charge sensor)", doubtful=False)
    elif n_inter < 3:
        q = q.with_warning(f"interdot slope rests on {n_inter} short segment(s): not reliable", doubtful=False)
    if not np.isfinite(snr):
        q = q.with_warning("signal-to-noise ratio could not be measured (no refined dot line)")
    elif snr < min_snr:
        q = q.with_warning(f"low signal-to-noise ratio {snr:.1f} (< {min_snr:g})")
    n_fam = sum(len(f) for f in families.values())
    n_un = len(unassigned)
    if n_un > 0.5 * max(n_fam, 1) and n_un >= 3:
        q = q.with_warning(f"{n_un} segments could not be assigned to a family (vs {n_fam} assigned)")
    if excluded_fraction > 0.2:
        q = q.with_warning(f"{100 * excluded_fraction:.0f} % of the rows were excluded")
    return q
