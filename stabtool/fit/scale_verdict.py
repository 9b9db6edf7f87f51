"""Verdict on the stated errors of lever arms and charging energies.

An ok result promises its lever arms and charging energies within the 5 %
goal of the project. A number whose own stated error is a large fraction of
that goal cannot keep the promise, however good its central value looks:
then the verdict is doubtful ("never report ok when unsure"), as the
virtual-gate matrix of a clean map must have its bound at 2 stated σ
(:data:`stabtool.analysis.CLEAN_VG_SIGMAS`).

Seen on a held-out map (Gaussian sensor peak, row random walk, SNR 60):
the dot1 lines were resolution-limited, α11 came from α22 times the
diagram's δ2/δ1 (stated error 9.5 %), and the map was reported ok with
α11 at 0.233 ± 0.023 (true 0.250, −6.7 %) and E_Cm 12 % off (stated 6.9 %).

Notes
-----
The bound at ``SCALE_SIGMAS`` = 2 stated σ is a policy (common practice, no
source: a result is quoted to the precision its error bar supports). The
ok-but-wrong maps seen so far had stated errors of 6.9–15 % (the one above
and a hot 2-D 1/f variant, α22 13 % off at a stated 15 %), so any factor
from 1 to 3 would have caught them; on the hot probe variants one map
within the bounds lost its ok (α22 stated 3.4 %, E_Cm 11 %).
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from ..quality import Quality
from .uncertainty import _pct

__all__ = ["MAX_LEVER_ARM_SUM", "SCALE_GOAL", "SCALE_SIGMAS", "impossible_lever_arms", "scale_error_verdict"]

#: Relative goal of lever arms and charging energies (the fitter's bounds).
SCALE_GOAL = 0.05
#: An ok number must have the goal at this many stated standard errors.
SCALE_SIGMAS = 2.0
#: The most one dot's lever arms to all gates can add up to, eV/V. Shifting every gate and lead by
#: ΔV shifts the dot's electrochemical potential by exactly e·ΔV, and α = Cdd⁻¹ Cdg has no negative
#: element (Cdd has a positive diagonal and non-positive off-diagonal elements and is diagonally
#: dominant, so its inverse is non-negative; Cdg ≥ 0): any subset of the gates gives at most 1
#: (constant-interaction model, van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)).
MAX_LEVER_ARM_SUM = 1.0
#: Standard errors beyond :data:`MAX_LEVER_ARM_SUM` before a sum counts as impossible.
IMPOSSIBLE_SIGMAS = 3.0


def impossible_lever_arms(
    alpha: np.ndarray,
    alpha_error: np.ndarray,
    *,
    reference: str | None,
    temperature_K: float | None = None,
    hint: str | None = None,
) -> Quality:
    """Doubtful when a dot's lever arms add up to more than 1 eV/V beyond their errors.

    Such a scale is impossible whatever the map (:data:`MAX_LEVER_ARM_SUM`); the usual cause is an
    energy reference in the wrong unit, e.g. an electron temperature given in mK where K is meant,
    which makes every lever arm and charging energy 1000 times too large.

    Parameters
    ----------
    alpha, alpha_error : array of shape (2,) or (2, 2)
        Lever arms (eV/V) and standard errors: the diagonal or the whole matrix (rows = dots);
        NaN elements are left out of the sums.
    reference : str or None
        The energy reference that set the scale (named in the warning).
    temperature_K : float, optional
        The electron temperature given, quoted when it set the scale.
    hint : str, optional
        What to check, in place of the default (the temperature's unit, or the reference's units).

    Returns
    -------
    Quality
        One doubtful warning naming every dot whose lever arms are impossible.
    """
    a, sa = np.asarray(alpha, float), np.asarray(alpha_error, float)
    if a.ndim == 1:
        a, sa = a[:, None], sa[:, None]
    found = []
    for i in range(a.shape[0]):
        keep = np.isfinite(a[i])
        if not keep.any():
            continue
        total = float(np.sum(a[i][keep]))
        err = float(np.sqrt(np.sum(np.where(np.isfinite(sa[i][keep]), sa[i][keep], 0.0) ** 2)))
        if total - IMPOSSIBLE_SIGMAS * err <= MAX_LEVER_ARM_SUM:
            continue
        found.append(f"lever arm α{i + 1}{i + 1} = {total:.4g} ± {err:.2g} eV/V" if keep.sum() == 1
                     else f"lever arms of dot {i + 1} add up to {total:.4g} ± {err:.2g} eV/V")
    if not found:
        return Quality()
    if hint is None:
        hint = (f"is the electron temperature in kelvin? ({temperature_K:g} K given)"
                if reference == "electron_temperature" and temperature_K is not None
                else f"check the energy reference ({reference or 'unknown'}) and its units")
    return Quality().with_warning(
        f"{'; '.join(found)}: above {MAX_LEVER_ARM_SUM:g} eV/V, impossible (all gates and leads together "
        f"give 1): the energy scale is wrong — {hint}; lever arms and charging energies are not usable"
    )


def scale_error_verdict(
    alpha: np.ndarray,
    alpha_error: np.ndarray,
    charging_meV: Mapping[str, float],
    charging_error_meV: Mapping[str, float],
    *,
    goal: float = SCALE_GOAL,
    sigmas: float = SCALE_SIGMAS,
) -> Quality:
    """Doubtful when a reported lever arm or E_C has a stated relative error above ``goal/sigmas``.

    Parameters
    ----------
    alpha, alpha_error : array of shape (2,) or (2, 2)
        Lever arms (eV/V) and standard errors: the diagonal α11, α22 or the
        whole matrix (every element is held to the goal, as the fitter's
        bounds do); NaN = not reported (no check).
    charging_meV, charging_error_meV : mapping
        Charging energies ``{"dot1", "dot2", "mutual"}`` and their standard
        errors, meV; NaN or None = not reported.
    goal : float
        Relative goal (default 5 %).
    sigmas : float
        The goal must be at least this many stated standard errors.

    Returns
    -------
    Quality
        One doubtful warning per number whose stated error is too large; a
        reported number without a finite error is doubtful too.
    """
    lim = goal / sigmas
    q = Quality()
    a, sa = np.asarray(alpha, float), np.asarray(alpha_error, float)
    if a.ndim == 1:
        a, sa = np.diag(a), np.diag(sa)
        a[~np.eye(len(a), dtype=bool)] = np.nan
    named = [(f"lever arm α{i + 1}{j + 1}", float(a[i, j]), float(sa[i, j]), "eV/V")
             for i in range(a.shape[0]) for j in range(a.shape[1])]
    for key, val in charging_meV.items():
        err = charging_error_meV.get(key)
        named.append((f"charging energy E_C {key}", np.nan if val is None else float(val),
                      np.nan if err is None else float(err), "meV"))
    for name, val, err, unit in named:
        if not np.isfinite(val) or val == 0:
            continue
        rel = abs(err / val) if np.isfinite(err) else np.inf
        if rel > lim:
            q = q.with_warning(
                f"{name} = {val:.4g} ± {err:.2g} {unit} ({_pct(rel, lim)} %): stated error above "
                f"{100 * lim:.1f} %, the {100 * goal:g} % goal is not {sigmas:g} σ"
            )
    return q
