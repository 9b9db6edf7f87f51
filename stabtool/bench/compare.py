"""Compare an analysis result with the generator truth, quantity by quantity.

Both sides are the JSON objects of ``stabtool analyze --json`` (the truth
record of the generator uses the same keys). Each checked quantity is a
*group* of elements:

============== =============================================== ===========
group          elements                                        error kind
============== =============================================== ===========
slopes         ``slopes.{dot1, dot2}``                         rel (abs)
interdot_slope ``slopes.interdot``                             rel (abs)
virtual_gate   off-diagonal ``virtual_gate_matrix`` M12, M21   abs (rel)
cdg            the four ``gate_capacitance_aF`` elements        rel (abs aF)
lever_arm      the four ``lever_arm`` elements                  rel (abs)
charging_energy ``charging_energy_meV.{dot1, dot2, mutual}``    rel (abs meV)
============== =============================================== ===========

The diagonal of the virtual-gate matrix is 1 by definition and is not
compared. A group's error on one map is its **worst element** (largest
error over the elements that were reported); the group is *complete* when
every element was reported (finite) and the truth is finite.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

__all__ = [
    "GROUPS",
    "GROUP_LABELS",
    "Comparison",
    "ElementError",
    "GroupError",
    "compare_with_truth",
    "extract_elements",
]

#: Element names of each compared group, in report order.
GROUPS: dict[str, tuple[str, ...]] = {
    "slopes": ("dot1", "dot2"),
    "interdot_slope": ("interdot",),
    "virtual_gate": ("M12", "M21"),
    "cdg": ("C11", "C12", "C21", "C22"),
    "lever_arm": ("a11", "a12", "a21", "a22"),
    "charging_energy": ("dot1", "dot2", "mutual"),
}

#: Human-readable label of each group for tables and plots.
GROUP_LABELS: dict[str, str] = {
    "slopes": "dot1/dot2 slopes (rel)",
    "interdot_slope": "interdot slope (rel)",
    "virtual_gate": "virtual-gate element (abs)",
    "cdg": "Cdg (rel)",
    "lever_arm": "lever arm (rel)",
    "charging_energy": "charging energy (rel)",
}


def _num(value: Any) -> float:
    """A JSON number as float; NaN for null, missing or non-numeric."""
    if value is None or isinstance(value, bool):
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def _get(obj: Any, *path: Any) -> Any:
    for key in path:
        if obj is None:
            return None
        try:
            obj = obj[key]
        except (KeyError, IndexError, TypeError):
            return None
    return obj


def extract_elements(result: Mapping[str, Any] | None) -> dict[str, dict[str, float]]:
    """Pull the compared elements out of an analyze-style JSON object.

    Parameters
    ----------
    result : mapping or None
        Keys as in ``stabtool analyze --json``; ``None`` (no result) gives
        NaN everywhere.

    Returns
    -------
    dict
        ``{group: {element: value}}`` for every group of :data:`GROUPS`;
        a null or missing value is NaN.
    """
    r = result or {}
    slopes = _get(r, "slopes")
    vg = _get(r, "virtual_gate_matrix")
    cdg = _get(r, "gate_capacitance_aF")
    la = _get(r, "lever_arm")
    ec = _get(r, "charging_energy_meV")
    return {
        "slopes": {k: _num(_get(slopes, k)) for k in GROUPS["slopes"]},
        "interdot_slope": {"interdot": _num(_get(slopes, "interdot"))},
        "virtual_gate": {"M12": _num(_get(vg, 0, 1)), "M21": _num(_get(vg, 1, 0))},
        "cdg": {f"C{i + 1}{j + 1}": _num(_get(cdg, i, j)) for i in range(2) for j in range(2)},
        "lever_arm": {f"a{i + 1}{j + 1}": _num(_get(la, i, j)) for i in range(2) for j in range(2)},
        "charging_energy": {k: _num(_get(ec, k)) for k in GROUPS["charging_energy"]},
    }


@dataclass(frozen=True)
class ElementError:
    """Error of one element: ``abs = |est − true|``, ``rel = abs / |true|``.

    NaN when the element was not reported (or the truth is not finite);
    ``rel`` is inf when the truth is exactly 0 and the estimate is not.
    """

    estimate: float
    truth: float
    abs: float
    rel: float

    @property
    def reported(self) -> bool:
        """True when both estimate and truth are finite."""
        return math.isfinite(self.estimate) and math.isfinite(self.truth)


def _element_error(estimate: float, truth: float) -> ElementError:
    if not (math.isfinite(estimate) and math.isfinite(truth)):
        return ElementError(estimate, truth, math.nan, math.nan)
    err = abs(estimate - truth)
    if truth != 0:
        rel = err / abs(truth)
    else:
        rel = 0.0 if err == 0 else math.inf
    return ElementError(estimate, truth, err, rel)


@dataclass(frozen=True)
class GroupError:
    """Worst-element error of one group on one map.

    Attributes
    ----------
    abs, rel : float
        Largest absolute and largest relative element error over the
        reported elements (NaN when none was reported). They may come from
        different elements.
    complete : bool
        Every element of the group was reported.
    n_reported : int
        Number of elements reported.
    """

    abs: float
    rel: float
    complete: bool
    n_reported: int


def _worst(values: list[float]) -> float:
    vals = [v for v in values if not math.isnan(v)]
    return max(vals) if vals else math.nan


@dataclass(frozen=True)
class Comparison:
    """Errors of one analysis result against the truth.

    Attributes
    ----------
    elements : dict
        ``{group: {element: ElementError}}``.
    groups : dict
        ``{group: GroupError}``.
    """

    elements: dict[str, dict[str, ElementError]] = field(default_factory=dict)
    groups: dict[str, GroupError] = field(default_factory=dict)

    def primary(self, group: str) -> float:
        """The error the reports use for ``group``: abs for virtual gates, rel otherwise."""
        g = self.groups[group]
        return g.abs if group == "virtual_gate" else g.rel


def compare_with_truth(
    result: Mapping[str, Any] | None, truth: Mapping[str, Any]
) -> Comparison:
    """Compare an analysis JSON object with the truth JSON object.

    Parameters
    ----------
    result : mapping or None
        Output of the analysis (``AnalysisResult.to_json()``); ``None`` when
        the analysis produced nothing.
    truth : mapping
        The generator's truth in the same keys.

    Returns
    -------
    Comparison
    """
    est = extract_elements(result)
    tru = extract_elements(truth)
    elements: dict[str, dict[str, ElementError]] = {}
    groups: dict[str, GroupError] = {}
    for group, names in GROUPS.items():
        errs = {n: _element_error(est[group][n], tru[group][n]) for n in names}
        elements[group] = errs
        n_rep = sum(e.reported for e in errs.values())
        groups[group] = GroupError(
            abs=_worst([e.abs for e in errs.values()]),
            rel=_worst([e.rel for e in errs.values()]),
            complete=n_rep == len(names),
            n_reported=n_rep,
        )
    return Comparison(elements=elements, groups=groups)
