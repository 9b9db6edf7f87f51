"""Assemble the N×M virtual-gate matrix of a dot array from pairwise maps.

Each analysed two-gate map (a :class:`~stabtool.arrays.measurement.PairMeasurement`)
measures up to two elements of the normalised matrix ``M_dg = α_dg/α_d,p(d)``.
Elements measured in several maps are combined by their inverse-variance
weighted mean; the χ² and Birge ratio of each combination (and over the whole
matrix) say how well the maps agree. Elements that no map measures are set to
0 with a NaN uncertainty and a warning naming them.

References
----------
T. Hensgens et al., Nature 548, 70 (2017), doi:10.1038/nature23022;
C. Volk et al., npj Quantum Inf. 5, 29 (2019), doi:10.1038/s41534-019-0146-y;
R. T. Birge, Phys. Rev. 40, 207 (1932), doi:10.1103/PhysRev.40.207;
O. J. Dunn, "Multiple comparisons among means", J. Am. Stat. Assoc. 56, 52
(1961) (the Bonferroni threshold used for the per-element flags; from memory).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from ..physics.virtual_gates import inverse_variance_mean, square_virtual_matrix
from ..quality import Quality
from ..report.caution import MATRIX_CAUTION
from .measurement import PairMeasurement

__all__ = [
    "CAUTION",
    "ElementEstimate",
    "Rejection",
    "VirtualGateMatrix",
    "assemble_virtual_gates",
    "virtual_name",
]

#: Printed with every matrix and stored in its JSON.
CAUTION = MATRIX_CAUTION


#: A cross-coupling this large (|M[d, g]| relative to the dot's own plunger) is implausible: a
#: plunger is by definition the gate its dot couples to most, and measured neighbour ratios are
#: 0.2–0.6 (common practice, no source). Such an estimate most likely measured another dot's lines.
IMPLAUSIBLE = 0.8


def virtual_name(plunger: str) -> str:
    """Name of the virtual gate of the dot whose plunger is ``plunger``: ``"v" + plunger``."""
    return f"v{plunger}"


@dataclass(frozen=True)
class ElementEstimate:
    """One estimate of one matrix element, from one map.

    Attributes
    ----------
    plunger : str
        Plunger of the dot (row); the virtual gate is ``virtual_name(plunger)``.
    gate : str
        Physical gate (column).
    value, sigma : float
        Estimate and its standard error (NaN when the map gave none).
    source : str
        The map it came from.
    """

    plunger: str
    gate: str
    value: float
    sigma: float
    source: str


@dataclass(frozen=True)
class Rejection:
    """An estimate left out of the combination, and why.

    Attributes
    ----------
    estimate : ElementEstimate
    reason : str
        ``"implausible"`` (|M| ≥ :data:`IMPLAUSIBLE`) or ``"doubtful map"``
        (the map's analysis was not ok and maps that are ok measured the
        same element).
    """

    estimate: ElementEstimate
    reason: str

    def __str__(self) -> str:
        e = self.estimate
        return f"{virtual_name(e.plunger)}<-{e.gate} = {e.value:.3g} from {e.source or '?'} ({self.reason})"


@dataclass(frozen=True, eq=False)
class VirtualGateMatrix:
    """Virtual-gate matrix of an array with uncertainties and consistency statistics.

    ``V_virtual = matrix · V_physical`` for the dot rows; gates that are no
    dot's plunger keep their physical value (see :meth:`square`).

    Attributes
    ----------
    plungers : tuple of str, length n_rows
        Plunger gate of each row (dots first, then sensor gates).
    sensor_gates : tuple of str
        The plungers that are charge-sensor gates (subset of ``plungers``).
    gates : tuple of str, length n_gates
        Physical gates (columns).
    matrix : ndarray, shape (n_rows, n_gates)
        Normalised elements; 1 at each row's plunger; 0 where unmeasured.
    uncertainty : ndarray, shape (n_rows, n_gates)
        Standard error, scaled by the Birge ratio where it exceeds 1; 0 on the
        plunger elements; NaN where unmeasured or where no map gave an error.
    uncertainty_internal : ndarray, shape (n_rows, n_gates)
        ``(Σ 1/σ²)^(−1/2)``, not scaled.
    n_estimates : ndarray of int, shape (n_rows, n_gates)
        Number of maps that measured each element.
    chi2, birge_ratio, p_value : ndarray, shape (n_rows, n_gates)
        Consistency of the maps per element (NaN with fewer than two maps).
    dof : ndarray of int, shape (n_rows, n_gates)
        ``max(n_estimates − 1, 0)`` for the elements with errors.
    estimates : tuple of ElementEstimate
        Every estimate that went in.
    maps : tuple of PairMeasurement
        The maps given.
    rejected : tuple of Rejection
        Estimates left out (implausible, or from a doubtful map when ok maps
        measured the same element).
    quality : Quality
        ``ok`` is False if an element is unmeasured, maps disagree beyond
        chance, or an input map was doubtful.
    caution : str
        :data:`CAUTION`.
    """

    plungers: tuple[str, ...]
    sensor_gates: tuple[str, ...]
    gates: tuple[str, ...]
    matrix: np.ndarray
    uncertainty: np.ndarray
    uncertainty_internal: np.ndarray
    n_estimates: np.ndarray
    chi2: np.ndarray
    dof: np.ndarray
    birge_ratio: np.ndarray
    p_value: np.ndarray
    estimates: tuple[ElementEstimate, ...] = ()
    maps: tuple[PairMeasurement, ...] = ()
    rejected: tuple[Rejection, ...] = ()
    quality: Quality = field(default_factory=Quality)
    caution: str = CAUTION

    # -- labels --------------------------------------------------------------
    @property
    def virtual_gates(self) -> tuple[str, ...]:
        """Names of the rows: ``v<plunger>``."""
        return tuple(virtual_name(p) for p in self.plungers)

    @property
    def plunger_columns(self) -> tuple[int, ...]:
        """Column index of each row's plunger."""
        return tuple(self.gates.index(p) for p in self.plungers)

    def element(self, plunger: str, gate: str) -> float:
        """``M[dot(plunger), gate]``."""
        return float(self.matrix[self.plungers.index(plunger), self.gates.index(gate)])

    # -- consistency over the whole matrix ------------------------------------
    @property
    def total_chi2(self) -> float:
        """Σ χ² over the elements measured more than once."""
        return float(np.nansum(np.where(self.dof > 0, self.chi2, 0.0)))

    @property
    def total_dof(self) -> int:
        """Σ (n − 1) over the elements measured more than once."""
        return int(np.sum(self.dof))

    @property
    def overall_birge_ratio(self) -> float:
        """``sqrt(Σχ²/Σdof)``; NaN when no element was measured twice."""
        return math.sqrt(self.total_chi2 / self.total_dof) if self.total_dof > 0 else float("nan")

    @property
    def overall_p_value(self) -> float:
        """Probability of a total χ² this large if every stated error is right."""
        from scipy import stats

        return float(stats.chi2.sf(self.total_chi2, self.total_dof)) if self.total_dof else float("nan")

    @property
    def unmeasured(self) -> tuple[tuple[str, str], ...]:
        """(plunger, gate) of every off-plunger element no map measured."""
        out = []
        cols = self.plunger_columns
        for i, p in enumerate(self.plungers):
            for j, g in enumerate(self.gates):
                if j != cols[i] and self.n_estimates[i, j] == 0:
                    out.append((p, g))
        return tuple(out)

    # -- square form for conversions -----------------------------------------
    def square_names(self) -> tuple[str, ...]:
        """Virtual gate names of :meth:`square` rows: the dots' ``v<plunger>``, then the
        remaining physical gates (which keep their own name and value)."""
        others = tuple(g for g in self.gates if g not in self.plungers)
        return self.virtual_gates + others

    def square(self) -> np.ndarray:
        """The invertible n_gates × n_gates matrix S with ``V′ = S V`` (rows :meth:`square_names`)."""
        return square_virtual_matrix(self.matrix, self.plunger_columns)

    def square_uncertainty(self) -> np.ndarray:
        """Standard errors of :meth:`square` (0 on the added unit rows)."""
        n_extra = len(self.gates) - len(self.plungers)
        return np.vstack([self.uncertainty, np.zeros((n_extra, len(self.gates)))])

    # -- sensor compensation ---------------------------------------------------
    def sensor_compensation(self, sensor_gate: str | None = None) -> dict[str, tuple[float, float]]:
        """Physical sensor-gate step per volt on each other gate, with its error.

        Keeping the sensor's virtual gate constant while gate g moves by
        ``dV_g`` means moving the sensor gate by ``−M[S, g] dV_g`` (the sensor
        row is normalised to 1 on the sensor gate). Returns
        ``{gate: (−M[S, g], σ)}`` for every other gate.
        """
        if not self.sensor_gates:
            raise InputError("sensor_gate", "no sensor gate in this matrix (give sensors=... when assembling)")
        sg = sensor_gate or self.sensor_gates[0]
        if sg not in self.sensor_gates:
            raise InputError("sensor_gate", f"{sg!r} is not a sensor gate; known: {', '.join(self.sensor_gates)}")
        i = self.plungers.index(sg)
        return {
            g: (0.0 - float(self.matrix[i, j]), float(self.uncertainty[i, j]))
            for j, g in enumerate(self.gates)
            if g != sg
        }

    def __repr__(self) -> str:
        return (
            f"VirtualGateMatrix({len(self.plungers)}×{len(self.gates)}, rows={list(self.virtual_gates)}, "
            f"maps={len(self.maps)}, unmeasured={len(self.unmeasured)}, "
            f"birge={self.overall_birge_ratio:.3g}, ok={self.quality.ok})"
        )


def _first_seen(measurements: Sequence[PairMeasurement]) -> list[str]:
    seen: list[str] = []
    for m in measurements:
        for g in (m.x_gate, m.y_gate):
            if g not in seen:
                seen.append(g)
    return seen


def _check_names(param: str, names: Sequence[str]) -> tuple[str, ...]:
    out = tuple(str(n) for n in names)
    dup = sorted({n for n in out if out.count(n) > 1})
    if dup:
        raise InputError(param, f"gate(s) listed twice: {', '.join(dup)}")
    if any(not n for n in out):
        raise InputError(param, "empty gate name")
    return out


def assemble_virtual_gates(
    measurements: Sequence[PairMeasurement],
    *,
    plungers: Sequence[str] | None = None,
    sensors: Sequence[str] = (),
    gates: Sequence[str] | None = None,
    inconsistency_p: float = 0.01,
    reject_doubtful: bool = True,
) -> VirtualGateMatrix:
    """Assemble the array's virtual-gate matrix from pairwise measurements.

    Parameters
    ----------
    measurements : sequence of PairMeasurement
        One per analysed map; the same pair may appear several times, in
        either orientation.
    plungers : sequence of str, optional
        Plunger gate of each dot, in row order. Default: every gate seen in
        ``measurements`` (first appearance) that is not in ``sensors``.
    sensors : sequence of str
        Charge-sensor gates: each is the plunger of a sensor dot, added as a
        row after the dots (the sensor-compensation row).
    gates : sequence of str, optional
        Physical gates (column order). Default: the plungers, the sensors,
        then any other gate seen in ``measurements``. Must contain every
        plunger and sensor; measurements on gates not listed are an error.
    inconsistency_p : float
        False-alarm probability of the consistency checks. An element is
        flagged when its χ² p-value is below ``inconsistency_p / k`` with k
        the number of elements measured more than once (Bonferroni
        correction, so that a large array does not raise false alarms by
        chance); the whole matrix is flagged when the p-value of the total
        χ² is below ``inconsistency_p``. Uncertainties are scaled by the
        Birge ratio wherever it exceeds 1, flagged or not; when the whole
        matrix is flagged, the uncertainties of elements measured by one map
        only (which no χ² can check) are scaled by the overall Birge ratio.
    reject_doubtful : bool
        Leave out the estimates of maps whose analysis is not ok wherever an
        ok map measured the same element (listed in ``rejected``). Where only
        doubtful maps measured an element they are used, and the matrix is
        not ok. Estimates with |M| ≥ :data:`IMPLAUSIBLE` are always left out
        (a dot couples most to its own plunger: such lines are probably
        another dot's).

    Returns
    -------
    VirtualGateMatrix

    Raises
    ------
    InputError
        No measurements, names listed twice, or a measured gate missing from
        ``gates``.

    Notes
    -----
    A map of (x, y) gives ``M[dot(x), y]`` and ``M[dot(y), x]`` when x and y
    are rows' plungers; a map on a gate that is no row's plunger gives only
    the element of the other gate's dot. Elements with several estimates are
    combined with :func:`stabtool.physics.virtual_gates.inverse_variance_mean`.
    Estimates without a usable error are used only when no estimate of the
    same element has one (then the element's uncertainty is NaN).
    """
    ms = list(measurements)
    if not ms:
        raise InputError("measurements", "no pairwise measurement given; need at least one analysed map")
    for m in ms:
        if not isinstance(m, PairMeasurement):
            raise InputError("measurements", f"expected PairMeasurement, got {type(m).__name__}")
    if not 0.0 < inconsistency_p < 1.0:
        raise InputError("inconsistency_p", f"must be in (0, 1), got {inconsistency_p}")
    sens = _check_names("sensors", sensors)
    seen = _first_seen(ms)
    if plungers is None:
        dots = tuple(g for g in seen if g not in sens)
    else:
        dots = _check_names("plungers", plungers)
    overlap = set(dots) & set(sens)
    if overlap:
        raise InputError("sensors", f"gate(s) both plunger and sensor: {', '.join(sorted(overlap))}")
    rows = dots + sens
    if gates is None:
        cols = rows + tuple(g for g in seen if g not in rows)
    else:
        cols = _check_names("gates", gates)
        missing = [g for g in rows if g not in cols]
        if missing:
            raise InputError("gates", f"missing the plunger/sensor gate(s) {', '.join(missing)}")
    unknown = [g for g in seen if g not in cols]
    if unknown:
        raise InputError("gates", f"maps use gate(s) {', '.join(unknown)} that are not in the gate list "
                         f"({', '.join(cols)})")

    n_r, n_c = len(rows), len(cols)
    quality = Quality()
    estimates: list[ElementEstimate] = []
    doubtful_src: set[int] = set()  # id() of estimates from maps that are not ok
    rejected: list[Rejection] = []
    unused: list[str] = []
    implausible: list[str] = []
    for m in ms:
        if not m.quality.ok:
            first = m.quality.warnings[0] if m.quality.warnings else "no reason given"
            quality = quality.with_warning(f"{m.source or m.x_gate + '/' + m.y_gate}: the analysis of this map "
                                           f"is flagged doubtful ({first})", doubtful=not reject_doubtful)
        for row_gate, col_gate, val, err in (
            (m.x_gate, m.y_gate, m.m_xy, m.m_xy_err),
            (m.y_gate, m.x_gate, m.m_yx, m.m_yx_err),
        ):
            if row_gate not in rows:
                if math.isfinite(val):
                    unused.append(f"{m.source or '?'}: lines of the dot on {row_gate} (not a plunger)")
                continue
            if not math.isfinite(val):
                continue
            est = ElementEstimate(row_gate, col_gate, float(val), float(err),
                                  m.source or f"{m.x_gate}/{m.y_gate}")
            if abs(val) >= IMPLAUSIBLE:
                implausible.append(f"{virtual_name(row_gate)}<-{col_gate} = {val:.3g} from {est.source}")
                rejected.append(Rejection(est, "implausible"))
                continue
            if not m.quality.ok:
                doubtful_src.add(id(est))
            estimates.append(est)
    if unused:
        quality = quality.with_warning("not used: " + "; ".join(unused), doubtful=False)
    if implausible:
        quality = quality.with_warning(
            "implausible cross-coupling(s) " + "; ".join(implausible) + f" (|M| >= {IMPLAUSIBLE}: a dot "
            "couples most to its own plunger, so these lines probably belong to another dot); left out",
            doubtful=False)  # an element left without estimate is flagged as unmeasured below
    if reject_doubtful:
        groups: dict[tuple[str, str], list[ElementEstimate]] = {}
        for e in estimates:
            groups.setdefault((e.plunger, e.gate), []).append(e)
        kept: list[ElementEstimate] = []
        only_doubtful: list[str] = []
        for (p, g), es in groups.items():
            ok_es = [e for e in es if id(e) not in doubtful_src]
            if ok_es:
                kept.extend(ok_es)
                rejected.extend(Rejection(e, "doubtful map") for e in es if id(e) in doubtful_src)
            else:
                kept.extend(es)
                if any(id(e) in doubtful_src for e in es):
                    only_doubtful.append(f"{virtual_name(p)}<-{g}")
        estimates = kept
        if only_doubtful:
            quality = quality.with_warning(
                "measured only by maps whose analysis is doubtful (used anyway): " + ", ".join(only_doubtful))
    if rejected:
        quality = quality.with_warning("left out: " + "; ".join(str(r) for r in rejected), doubtful=False)

    matrix = np.zeros((n_r, n_c))
    unc = np.full((n_r, n_c), np.nan)
    unc_int = np.full((n_r, n_c), np.nan)
    n_est = np.zeros((n_r, n_c), dtype=int)
    chi2 = np.full((n_r, n_c), np.nan)
    dof = np.zeros((n_r, n_c), dtype=int)
    birge = np.full((n_r, n_c), np.nan)
    pval = np.full((n_r, n_c), np.nan)
    for i, p in enumerate(rows):
        j = cols.index(p)
        matrix[i, j] = 1.0
        unc[i, j] = unc_int[i, j] = 0.0

    by_elem: dict[tuple[int, int], list[ElementEstimate]] = {}
    for e in estimates:
        by_elem.setdefault((rows.index(e.plunger), cols.index(e.gate)), []).append(e)

    inconsistent: list[str] = []
    no_error: list[str] = []
    n_tested = sum(
        1 for es in by_elem.values() if sum(1 for e in es if math.isfinite(e.sigma) and e.sigma > 0) > 1
    )
    p_element = inconsistency_p / max(n_tested, 1)
    for (i, j), es in sorted(by_elem.items()):
        label = f"{virtual_name(rows[i])}<-{cols[j]}"
        good = [e for e in es if math.isfinite(e.sigma) and e.sigma > 0]
        n_est[i, j] = len(es)
        if not good:
            matrix[i, j] = float(np.mean([e.value for e in es]))
            no_error.append(label)
            continue
        if len(good) < len(es):
            quality = quality.with_warning(
                f"{label}: {len(es) - len(good)} estimate(s) without an uncertainty ignored "
                f"({', '.join(e.source for e in es if e not in good)})", doubtful=False)
        wm = inverse_variance_mean([e.value for e in good], [e.sigma for e in good])
        n_est[i, j] = len(good)
        matrix[i, j] = wm.mean
        unc[i, j] = wm.sigma
        unc_int[i, j] = wm.sigma_internal
        chi2[i, j] = wm.chi2 if wm.dof > 0 else np.nan
        dof[i, j] = wm.dof
        birge[i, j] = wm.birge_ratio
        pval[i, j] = wm.p_value
        if wm.dof > 0 and wm.p_value < p_element:
            inconsistent.append(
                f"{label} (chi2={wm.chi2:.3g} for {wm.dof} dof, Birge ratio {wm.birge_ratio:.3g}; "
                f"maps {', '.join(e.source for e in good)})")
    if inconsistent:
        quality = quality.with_warning(
            "maps disagree beyond their stated errors on " + "; ".join(inconsistent)
            + "; uncertainties scaled by the Birge ratio")
    total_dof = int(dof.sum())
    if total_dof > 0:
        from scipy import stats

        total_chi2 = float(np.nansum(np.where(dof > 0, chi2, 0.0)))
        p_total = float(stats.chi2.sf(total_chi2, total_dof))
        if p_total < inconsistency_p:
            b_all = math.sqrt(total_chi2 / total_dof)
            single = (n_est == 1) & np.isfinite(unc) & (unc > 0)
            scaled = ""
            if single.any():
                # elements measured once cannot be checked by themselves: the elements measured
                # more than once show by how much the maps' stated errors are too small
                unc[single] *= b_all
                scaled = (f"; the uncertainties of the {int(single.sum())} element(s) measured by one map only "
                          f"are scaled by this Birge ratio")
            quality = quality.with_warning(
                f"maps disagree overall beyond their stated errors (chi2={total_chi2:.3g} for {total_dof} dof, "
                f"Birge ratio {b_all:.3g}, p={p_total:.2g}); the stated "
                "uncertainties of the maps are probably too small" + scaled)
    if no_error:
        quality = quality.with_warning("no uncertainty available for " + ", ".join(no_error))

    missing_elems = [
        f"{virtual_name(rows[i])}<-{cols[j]}"
        for i in range(n_r) for j in range(n_c)
        if j != cols.index(rows[i]) and n_est[i, j] == 0
    ]
    if missing_elems:
        quality = quality.with_warning(
            "not measured by any map, set to 0 (uncertainty unknown): " + ", ".join(missing_elems))
    return VirtualGateMatrix(
        plungers=rows,
        sensor_gates=sens,
        gates=cols,
        matrix=matrix,
        uncertainty=unc,
        uncertainty_internal=unc_int,
        n_estimates=n_est,
        chi2=chi2,
        dof=dof,
        birge_ratio=birge,
        p_value=pval,
        estimates=tuple(estimates),
        maps=tuple(ms),
        rejected=tuple(rejected),
        quality=quality,
    )
