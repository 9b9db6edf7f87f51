"""Pulls: are the stated uncertainties honest on maps whose truth is known?

For every compared element the pull is ``(estimate − truth) / stated σ``.
Over many independent maps the pulls of an honest error have mean ≈ 0 and
rms ≈ 1; an rms above 1 means the errors are understated (overconfident,
the worse failure: a wrong number may pass as ok), below 1 overstated
(good results reported doubtful).

Stated errors are read from the JSON object of ``stabtool analyze --json``:
``virtual_gate_matrix_error``, ``gate_capacitance_aF_error``,
``lever_arm_error`` and ``charging_energy_meV_error`` (elements as in
:data:`stabtool.bench.compare.GROUPS`).

References
----------
L. Lyons, *Statistics for nuclear and particle physicists* (Cambridge
University Press, 1986), ch. 4 (pull distributions as a check of stated
errors).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .compare import extract_elements

__all__ = ["PULL_GROUPS", "PullSummary", "pulls_of", "stated_errors", "summarise_pulls"]

#: Groups whose stated errors are checked (element names of :data:`stabtool.bench.compare.GROUPS`).
PULL_GROUPS: tuple[str, ...] = ("virtual_gate", "cdg", "lever_arm", "charging_energy")


def stated_errors(result: Mapping[str, Any] | None) -> dict[str, dict[str, float]]:
    """Stated one-σ errors of the compared elements (NaN where not given).

    Parameters
    ----------
    result : mapping or None
        JSON object of ``stabtool analyze --json``.

    Returns
    -------
    dict
        ``{group: {element: σ}}`` for :data:`PULL_GROUPS`.
    """
    r = dict(result or {})
    shadow = {
        "virtual_gate_matrix": r.get("virtual_gate_matrix_error"),
        "gate_capacitance_aF": r.get("gate_capacitance_aF_error"),
        "lever_arm": r.get("lever_arm_error"),
        "charging_energy_meV": r.get("charging_energy_meV_error"),
    }
    ext = extract_elements(shadow)
    return {g: ext[g] for g in PULL_GROUPS}


def pulls_of(result: Mapping[str, Any] | None, truth: Mapping[str, Any]) -> dict[str, dict[str, float]]:
    """Pull ``(estimate − truth)/σ`` of every element with a finite, positive stated error.

    Parameters
    ----------
    result, truth : mapping
        Analysis JSON and the generator truth in the same keys.

    Returns
    -------
    dict
        ``{group: {element: pull}}`` (NaN where the element, its error or
        the truth is missing).
    """
    est, tru, sig = extract_elements(result), extract_elements(truth), stated_errors(result)
    out: dict[str, dict[str, float]] = {}
    for g in PULL_GROUPS:
        out[g] = {}
        for name, s in sig[g].items():
            e, t = est[g][name], tru[g][name]
            ok = all(math.isfinite(v) for v in (e, t, s)) and s > 0
            out[g][name] = (e - t) / s if ok else math.nan
    return out


@dataclass(frozen=True)
class PullSummary:
    """Pull statistics of one group over many maps.

    Attributes
    ----------
    group : str
    n : int
        Pulls counted.
    mean, rms : float
        Mean and root-mean-square pull (NaN when ``n == 0``).
    frac_above_3 : float
        Fraction of pulls with ``|pull| > 3`` (≈ 0.3 % for honest Gaussian errors).
    """

    group: str
    n: int
    mean: float
    rms: float
    frac_above_3: float

    def to_dict(self) -> dict[str, Any]:
        return {"group": self.group, "n": self.n, "mean": self.mean, "rms": self.rms,
                "frac_above_3": self.frac_above_3}


def summarise_pulls(per_map: Iterable[Mapping[str, Mapping[str, float]]]) -> dict[str, PullSummary]:
    """Pull statistics per group over the maps (outputs of :func:`pulls_of`).

    Parameters
    ----------
    per_map : iterable of dict
        One ``{group: {element: pull}}`` per map.

    Returns
    -------
    dict
        ``{group: PullSummary}`` for :data:`PULL_GROUPS`.
    """
    acc: dict[str, list[float]] = {g: [] for g in PULL_GROUPS}
    for rec in per_map:
        for g in PULL_GROUPS:
            acc[g] += [float(v) for v in (rec.get(g) or {}).values() if math.isfinite(float(v))]
    out = {}
    for g, vals in acc.items():
        a = np.asarray(vals, float)
        if a.size:
            out[g] = PullSummary(g, int(a.size), float(a.mean()), float(np.sqrt(np.mean(a * a))),
                                 float(np.mean(np.abs(a) > 3)))
        else:
            out[g] = PullSummary(g, 0, math.nan, math.nan, math.nan)
    return out
