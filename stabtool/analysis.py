"""The analysis pipeline: map → lines → model numbers → energy scale → charge states.

One configured, picklable object (:class:`Analyzer`) runs every stage; the
CLI (``stabtool analyze``) and the batch runner use the same object. The
result (:class:`AnalysisResult`) is frozen, serialises to the JSON object of
the project's conventions (``to_json``) and to a NetCDF-ready
:class:`xarray.Dataset` (``to_dataset``), and plots itself (``save_plot``).

References
----------
W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1 (constant-interaction model).
"""

from __future__ import annotations

import copy
import functools
import os
import time
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from typing import TYPE_CHECKING, Any

import numpy as np
import xarray as xr

from .errors import InputError, PartialSweepWarning, QualityWarning
from .fit.charge_states import MIN_ABSOLUTE_CONFIDENCE, ChargeStates, label_charge_states
from .fit.lattice import transition_line
from .fit.model import (
    MAX_VG_ERROR,
    VG_FROM_SLOPES_NOTE,
    DiagramFit,
    dot_lines_used,
    find_stray_sets,
    fit_diagram,
)
from .lines.result import LineDetection
from .mapdata import (
    implausible_gate_voltages,
    map_axes,
    share_of_points,
    signal_gain,
    signal_range,
    validate_map,
    without_infinities,
    x_gate,
    y_gate,
)
from .physics import FERMI_FWHM_FACTOR, lever_arm_from_width
from .preprocess.integral import integral_along
from .preprocess.readout import corrected_readout, width_variance_error
from .quality import Quality

if TYPE_CHECKING:
    from .fit.diamond_map import DiamondAnalysisResult

__all__ = ["LEVER_ARM_AGREEMENT", "REFERENCE_AGREEMENT", "AnalysisResult", "Analyzer", "EnergyScale", "analyze"]

#: Relative disagreement of the width ratio (or a given α11/α22) with δ2/δ1 above which quality fails.
REFERENCE_AGREEMENT = 0.10
#: Relative disagreement between two lever-arm references above which quality fails (the 5 % goal).
LEVER_ARM_AGREEMENT = 0.05
#: A detected interdot segment lies on a predicted pair of triple points when its midpoint is within
#: this fraction of the pair's length of the pair's midpoint and its direction within this angle of
#: the pair's, in pixel units (:attr:`AnalysisResult.interdot_on_pairs`; real segments on held-out
#: and generator maps: 0.17–0.25 and 1–5°; junk: 20–86° or farther than one length).
INTERDOT_PAIR_DISTANCE = 0.5
INTERDOT_PAIR_ANGLE_DEG = 15.0
#: Thermal lines narrower than this many pixels (FWHM) are resolution-limited.
MIN_FWHM_PX = 3.0
#: Virtual-gate goal on clean maps (SNR ≥ CLEAN_SNR) and the SNR that makes a map clean.
CLEAN_VG_BOUND = 0.005
CLEAN_SNR = 10.0
#: An ok verdict on a clean map needs the 0.005 bound to be this many stated standard errors, as
#: the Cdg (2 % / 1 %) and lever-arm / E_C (5 % / 2.5 %) verdicts do. It was 3 while the row
#: offsets of 1/f noise biased M (a sample-night map had |ΔM| = 0.0064 at a stated 0.0022); with
#: the row-offset test in place, held-out probe maps that pass every other check had
#: |ΔM|/σ ≤ 1.8 (44 maps, median 0.65), and at 2σ the probe (seeds 0:320) and the walk-noise
#: probe (0:48) show no silent failure while coverage rises (seeds 0:192: 24 → 32 maps ok).
CLEAN_VG_SIGMAS = 2.0
#: A map counts as clean from this fraction of CLEAN_SNR on (the SNR estimate scatters).
CLEAN_SNR_MARGIN = 0.8
#: Expected virtual-gate bias from the interdot tunnel coupling above which quality fails.
MAX_TUNNEL_VG_BIAS = 0.004


def _nan_to_none(obj: Any) -> Any:
    """Recursively turn NaN/inf and numpy scalars into JSON-friendly values."""
    if isinstance(obj, dict):
        return {k: _nan_to_none(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_nan_to_none(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _nan_to_none(obj.tolist())
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if np.isfinite(obj) else None
    return obj


@dataclass(frozen=True)
class EnergyScale:
    """Lever arms α11, α22 and what fixed them.

    Attributes
    ----------
    alpha_diag, alpha_diag_error : ndarray, shape (2,)
        α11, α22 (eV/V) and standard errors; NaN when undetermined.
    reference : str or None
        "electron_temperature", "lever_arm", "lever_arm_file" (comma-joined
        when several were combined), or None.
    details : dict
        Per-reference values, for the JSON output.
    quality : Quality
    full_alpha, full_alpha_error : ndarray, shape (2, 2)
        Whole lever-arm matrix when the reference measures it directly (bias
        triangles); used when the diagram fit failed (e.g. a transport map).
    """

    alpha_diag: np.ndarray = field(default_factory=lambda: np.full(2, np.nan))
    alpha_diag_error: np.ndarray = field(default_factory=lambda: np.full(2, np.nan))
    reference: str | None = None
    details: dict = field(default_factory=dict)
    quality: Quality = field(default_factory=Quality)
    full_alpha: np.ndarray = field(default_factory=lambda: np.full((2, 2), np.nan))
    full_alpha_error: np.ndarray = field(default_factory=lambda: np.full((2, 2), np.nan))


def lever_arm_matrix(scale: Any, diagram: Any) -> tuple[np.ndarray, np.ndarray]:
    """Lever-arm matrix ``α = diag(α11, α22) · M`` and its errors, shape (2, 2), eV/V.

    Parameters
    ----------
    scale
        Energy scale with ``alpha_diag`` and ``alpha_diag_error`` (shape (2,)).
    diagram
        Diagram fit with ``vg_matrix`` and ``vg_matrix_error`` (shape (2, 2)).

    Returns
    -------
    (alpha, alpha_error) : tuple of ndarray
        Errors from the two factors' errors in quadrature; NaN without a scale.
    """
    a, sa = scale.alpha_diag[:, None], scale.alpha_diag_error[:, None]
    m, sm = diagram.vg_matrix, diagram.vg_matrix_error
    return a * m, np.sqrt((sa * m) ** 2 + (a * sm) ** 2)


def charging_energies(scale: Any, diagram: Any) -> tuple[dict, dict]:
    """Charging energies and their errors (meV) from the lever arms and the diagram's voltages.

    ``E_C1 = α11 ΔV1``, ``E_C2 = α22 ΔV2``, ``E_Cm`` = mean of ``α11 δ1`` and
    ``α22 δ2`` (NaN while the mutual shifts are unresolved); errors from the
    two factors' errors in quadrature.

    Parameters
    ----------
    scale
        Energy scale with ``alpha_diag`` and ``alpha_diag_error`` (eV/V, shape (2,)).
    diagram
        Diagram fit with ``addition_V``, ``mutual_V`` (V, shape (2,)), their
        ``*_error`` companions and ``mutual_resolved``.

    Returns
    -------
    (values, errors) : tuple of dict
        Keys ``"dot1"``, ``"dot2"``, ``"mutual"``, meV.

    References
    ----------
    W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1.
    """
    a, sa = scale.alpha_diag, scale.alpha_diag_error
    dv, sdv = diagram.addition_V, diagram.addition_V_error
    dm, sdm = diagram.mutual_V, diagram.mutual_V_error
    ec = 1e3 * a * dv
    sec = 1e3 * np.sqrt((sa * dv) ** 2 + (a * sdv) ** 2)
    ecm_each = 1e3 * a * dm
    secm_each = 1e3 * np.sqrt((sa * dm) ** 2 + (a * sdm) ** 2)
    if diagram.mutual_resolved:
        ecm = float(np.mean(ecm_each))
        secm = float(np.sqrt(np.sum(secm_each**2)) / 2)
    else:
        ecm, secm = float("nan"), float("nan")
    return (
        {"dot1": float(ec[0]), "dot2": float(ec[1]), "mutual": ecm},
        {"dot1": float(sec[0]), "dot2": float(sec[1]), "mutual": secm},
    )


@dataclass(frozen=True)
class _Prepared:
    """A map as measured, the same map scaled and read-out corrected for the analysis, and the notes so far."""

    measured: xr.DataArray
    corrected: xr.DataArray
    lag_V: float
    quality: Quality
    seconds: float
    tau_V: float = 0.0  # the read-out low-pass undone along x (see preprocess.readout)


#: Fit the constant-interaction model to a derivative map's integral too (its summed noise is a
#: random walk along the rows, not the white noise the model fit's checks assume)
INTEGRAL_MODEL_FIT = False


#: a derivative map's sum whose family along the sum has |M| below this is doubtful (cross-capacitance
#: ratios of a dot's two plungers below 2 % are rare: common practice, no source)
STREAK_M = 0.02
#: The detector's ``weak_line_ratio`` of a second detection when the lines of the first (a quarter)
#: give no charge cell: lines on the faded side of a sensor whose sensitivity varies across the map
#: (see :func:`stabtool.lines.detector._drop_weak_lines`). Only then: used on every map, it moved the
#: numbers of maps that had a cell either way (held-out probe, 1564 maps: within the bounds +3,
#: ok −2; bench regression case gaas-double SNR 30, Cdg12 1.93 → 2.04 % off) and let the random walk
#: of a derivative map's sum leave a streak family in (lock-in maps within the bounds 8 → 6).
FADED_LINE_RATIO = 0.1
#: The edge map's contrast floor of that second detection (0.2 in the first, ``lines.edges.CONTRAST_FLOOR``):
#: a line in the faded part of the map has weak edges too. On every map it changed many maps either way
#: (held-out probe sets 0:64, 64:128, states 0:64, stretched 0:64: within the bounds +3, −4, +1, 0)
FADED_CONTRAST_FLOOR = 0.1
#: Shortest segment (pixels) of a detection tried when the lines of the first ones (segments of at
#: least ``LineDetector.min_length_px``, 8 px) give no charge cell: a map whose charge cells are only a
#: few pixels across (small or coarse maps, many electrons) has dot line pieces between the other dot's
#: lines shorter than that. Only then: shorter segments let more noise through on every map. Held-out
#: probe, 712 maps of 13 sets (among them 96 maps of 40–90 px and 32 with 10–16 transitions per dot):
#: 6 maps without a virtual-gate matrix get one, all doubtful, M within the bounds on 4, M pulls ≤ 1.8,
#: Cdg pulls ≤ 2.5; no other map changes (DEVELOPERS.md, "Thirtieth session"). Tried only on maps whose edges are
#: at most half that broad (``LineDetection.edge_width_px``): a piece of a broad line shorter than twice its
#: width has no direction of its own (a 1 K map with 10-px edges got 12 such pieces and M12 0.40 off);
#: and only on clean maps (detection SNR ≥ ``CLEAN_SNR``): of six maps below it that got a matrix this way,
#: three were 0.06–0.15 off, one of them at 16 of its stated errors.
SHORT_SEGMENT_PX = 5.0
#: what a map measures (``Analyzer(readout=...)``, ``stabtool analyze --readout``)
READOUTS = ("auto", "charge", "derivative-x", "derivative-y")
#: the reason a derivative map's sum is never ok (followed by the axis)
SUM_DOUBT = "derivative map summed along"


#: An empty region whose crossing lines of the other dot are seen on less than this fraction of their
#: predicted length is not called empty (:func:`stabtool.fit.charge_states.lines_seen_where_empty`)
MIN_SEEN_WHERE_EMPTY = 0.3


def _blind_where_empty(states: ChargeStates, detection: LineDetection | None, x: np.ndarray, y: np.ndarray,
                       valid: np.ndarray) -> str | None:
    """The note when a dot is called empty where the other dot's lines vanish too (else None).

    Held-out probe map (``--sensors comb`` seed 4: a sensor between two of its
    own Coulomb peaks over the lower third of the map, SNR 8): no dot-2 line
    below the lowest one, two cells of it, and dot 2 was called empty there,
    wrong on 19 regions; the dot-1 lines that cross that region were not seen
    either.
    """
    from .fit.charge_states import SEEN_MIN_PIXELS, lines_seen_where_empty
    from .fit.relocate import volts_to_index as to_px

    if detection is None or not any(states.absolute):
        return None
    for dot in (0, 1):
        if not states.absolute[dot]:
            continue
        other = ("dot1", "dot2")[1 - dot]
        lines = detection.family(other).lines
        seg = np.array([(ln.start[0], ln.start[1], ln.end[0], ln.end[1]) for ln in lines], float).reshape(-1, 4)
        seg_px = np.stack([to_px(seg[:, 0], x), to_px(seg[:, 1], y), to_px(seg[:, 2], x), to_px(seg[:, 3], y)], 1)
        n, seen = lines_seen_where_empty(states.labels, valid, dot, seg_px)
        if n >= SEEN_MIN_PIXELS and seen < MIN_SEEN_WHERE_EMPTY:
            return (f"no dot{dot + 1} line below the lowest one, but the {other} lines that cross that region are "
                    f"seen on {100 * seen:.0f} % of their length there: the sensor may be blind in that part of "
                    "the map: charge states are relative")
    return None


def _along_sum(diagram: DiagramFit, axis: str) -> tuple[tuple[int, int], float]:
    """The virtual-gate element of the family that runs along a sum along ``axis``, and its value (NaN without).

    M21 = −(dot2 slope) for a sum along x, M12 = −1/(dot1 slope) along y.
    """
    along = (1, 0) if axis == "x" else (0, 1)
    return along, (float(diagram.vg_matrix[along]) if diagram.ok else float("nan"))


def _sums_failed_reason(diagrams: list[DiagramFit], axes: tuple[str, ...], lattice: bool) -> str:
    """Why a derivative map's sums did not stand in for its ordinary analysis (the end of a note).

    ``diagrams`` are the fits of the sums along ``axes``; ``lattice`` whether the one chosen has a
    charge lattice. A sum whose family along the sum has ``|M| < STREAK_M`` ranks last even when it
    has a lattice (see :func:`_integral_rank`); the note then names it.
    """
    if lattice:
        return "was doubtful too"
    streaky = [(a, *_along_sum(d, a)) for d, a in zip(diagrams, axes)]
    streaky = [(a, el, m) for a, el, m in streaky if abs(m) < STREAK_M]
    if not streaky:
        return "gave no charge lattice"
    return "gave no charge lattice but " + " and ".join(
        f"one whose family along the sum (along {a}: M{el[0] + 1}{el[1] + 1} = {m:.3g}) looks like "
        "the summed noise's streaks" for a, el, m in streaky)


def _integral_rank(res: AnalysisResult, order: int, axis: str) -> tuple:
    """Sort key of a derivative map's integral analyses: without a family along the sum first
    (``STREAK_M``: the summed noise's streaks look the same), then ok, then with a charge lattice,
    then the smaller stated virtual-gate error, then the axis the peaks' areas pointed to (``order`` 0).

    The errors compared are those before the summed noise's random walk is counted
    (``DiagramFit.vg_error_before_walk``): each sum has one family measured along itself, and the walk
    raises its element in either. On the probe's lock-in maps (on the x gate, SNR ≥ 20, seeds 0:64)
    the raised errors chose the sum along y on 3 of 31 maps, whose "dot1" family ran along that sum
    (M 0.06–0.65 off). A sum with such a family ranks last even against one without a lattice: on
    the same maps that took two garbage matrices (M21 0.18 and 1.37 off, the x-sums' "dot2" streaks)
    out, and put a right one (M 0.003 off) in place of one 1.6 off.
    """
    d = res.diagram
    errors = np.asarray(d.vg_error_before_walk if d.vg_error_before_walk is not None else d.vg_matrix_error, float)
    err = float(np.max(errors[np.isfinite(errors)])) if d.ok and np.isfinite(errors).any() else np.inf
    streaks = abs(_along_sum(d, axis)[1]) < STREAK_M
    return (streaks, not res.quality.ok, not d.ok, err, order)


@dataclass(frozen=True)
class AnalysisResult:
    """Everything ``stabtool analyze`` reports about one map.

    Attributes
    ----------
    data : xarray.DataArray
        The map as measured (infinite points made missing). Corrections the
        analysis made before reading it (alternate rows aligned, periodic
        pickup removed; a derivative map's integral along x or y analysed)
        are stated in the quality notes.
    detection : LineDetection or None
        Lines found (None when detection itself failed).
    diagram : DiagramFit
        Virtual gates, ΔV, δ, Cdg with errors.
    scale : EnergyScale
        Lever-arm scale and the reference that fixed it.
    charge_states : ChargeStates or None
    refinement : object or None
        Global constant-interaction fit of the map (:mod:`stabtool.fit.refine`).
    quality : Quality
    timings_s : dict
        Seconds per stage.
    tunnel : TunnelCoupling or None
        Interdot tunnel coupling (:mod:`stabtool.fit.tunnel`); None when T_e
        or the lever arms are unknown.
    coupling : CouplingRatio or None
        Scale-free t/E_Cm from the interdot line width and the virtual-gate
        bias it implies.
    stray_lines : tuple of StraySet
        Parallel segments off a dot family's slope, clear of the lines used:
        most likely another dot's lines (:func:`stabtool.fit.model.find_stray_sets`).
    """

    data: xr.DataArray
    detection: LineDetection | None
    diagram: DiagramFit
    scale: EnergyScale
    charge_states: ChargeStates | None
    refinement: Any
    quality: Quality
    timings_s: dict = field(default_factory=dict)
    tunnel: Any = None
    coupling: Any = None
    transport: Any = None  # TransportLattice of a transport map without dot lines, else None
    stray_lines: tuple = ()  # StraySet per dot family holding another dot's lines (fit.model.find_stray_sets)

    # ----------------------------------------------------------------- numbers
    @property
    def x_gate(self) -> str:
        return x_gate(self.data)

    @property
    def y_gate(self) -> str:
        return y_gate(self.data)

    def model_fit_tunnel_coupling_ueV(self) -> dict | None:
        """Interdot tunnel coupling from the adopted model fit with the coupling (µeV), or None.

        ``t = e α11 · t'`` with ``t'`` the fitted :data:`stabtool.fit.refine.TUNNEL_PARAM`
        (V of the x gate); the error combines those of ``t'`` and ``α11``. None when the
        adopted fit has no coupling or no energy reference fixes ``α11``.
        """
        from .fit.refine import TUNNEL_PARAM

        ref = self.refinement
        if ref is None or TUNNEL_PARAM not in (ref.params or {}):
            return None
        a, ae = float(self.lever_arm[0, 0]), float(self.lever_arm_error[0, 0])
        if not (np.isfinite(a) and a > 0):
            return None
        tv, te = ref.params[TUNNEL_PARAM], ref.errors[TUNNEL_PARAM]
        return {"value": 1e6 * a * tv, "error": 1e6 * float(np.hypot(a * te, tv * ae))}

    @property
    def lever_arm(self) -> np.ndarray:
        """α = diag(α11, α22) · M, shape (2, 2); NaN without an energy reference.

        Without a diagram fit, the matrix measured by the reference itself
        (bias triangles), if any.
        """
        if not self.diagram.ok and np.all(np.isfinite(self.scale.full_alpha)):
            return self.scale.full_alpha
        return lever_arm_matrix(self.scale, self.diagram)[0]

    @property
    def lever_arm_error(self) -> np.ndarray:
        if not self.diagram.ok and np.all(np.isfinite(self.scale.full_alpha)):
            return self.scale.full_alpha_error
        return lever_arm_matrix(self.scale, self.diagram)[1]

    @property
    def charging_energy_meV(self) -> dict:
        """E_C1 = α11 ΔV1, E_C2 = α22 ΔV2, E_Cm = mean of α11 δ1 and α22 δ2 (meV)."""
        return self._charging()[0]

    @property
    def charging_energy_error_meV(self) -> dict:
        return self._charging()[1]

    def _charging(self) -> tuple[dict, dict]:
        return charging_energies(self.scale, self.diagram)

    @property
    def from_triple_points(self) -> bool:
        """Do the numbers come from the lattice of triple points (a transport map without dot lines
        whose current spots form a consistent lattice) rather than from the diagram?"""
        t = self.transport
        return bool(not self.diagram.ok and t is not None and t.consistent)

    @property
    def gate_capacitance(self) -> tuple[np.ndarray, np.ndarray]:
        """``(Cdg, error)`` in aF, shape (2, 2) each: from the diagram, or on a transport map without
        dot lines from a consistent lattice of triple points (NaN when neither)."""
        if self.from_triple_points:
            return self.transport.cdg_aF, self.transport.cdg_aF_error
        return self.diagram.cdg_aF, self.diagram.cdg_aF_error

    @functools.cached_property
    def triple_points(self) -> np.ndarray:
        """Triple points (x, y) in volts, shape (k, 2), predicted by the fitted lattice inside the map.

        The pair of cell (N1, N2) lies at ``V' = (ΔV1 (N1 − ½) + δ1 N2 + c1,
        ΔV2 (N2 + ½) + δ2 (N1 − 1) + c2)`` and that point plus ``(δ1, δ2)``
        (the two ends of the interdot segment). On a transport map without dot
        lines, the measured current spots of a consistent triple-point lattice.
        Empty when the fit failed. Computed once per result (the JSON and the
        plot both use it); read-only.
        """
        if self.from_triple_points:
            spots = np.array(self.transport.points_V, float).reshape(-1, 2)
            spots.flags.writeable = False
            return spots
        pairs, inside = self._vertex_pairs
        out = pairs.reshape(-1, 2)[inside.reshape(-1)]
        out.flags.writeable = False
        return out

    @functools.cached_property
    def _vertex_pairs(self) -> tuple[np.ndarray, np.ndarray]:
        """Both triple points of every lattice cell with one inside the map: (k, 2, 2) in volts, and (k, 2) inside.

        Cells run one label beyond the lines on each side, except below the
        lowest lines of a dot whose occupations are absolute (no transitions in
        the empty region: the pair involves N1 − 1 ≥ 0 and the dot2 line
        N2 → N2 + 1 with N2 ≥ 0). Empty without a lattice or resolved δ.
        """
        d = self.diagram
        lat = d.lattice
        none = (np.zeros((0, 2, 2)), np.zeros((0, 2), bool))
        if not d.ok or lat is None or not d.mutual_resolved:
            return none
        dv, dm, c = d.addition_V, d.mutual_V, d.offsets_V
        minv = np.linalg.inv(d.vg_matrix)
        labels = np.vstack([lat.labels1, lat.labels2])
        lo, hi = labels.min(axis=0) - 1, labels.max(axis=0) + 1
        cs = self.charge_states
        if cs is not None:
            lowest = _lowest_lines(lat)
            if cs.absolute[0]:
                lo[0] = max(lo[0], lowest[0])
            if cs.absolute[1]:
                lo[1] = max(lo[1], lowest[1] - 1)
        axes = map_axes(self.data)
        x, y = axes.x, axes.y
        pairs, inside = [], []
        for n1 in range(int(lo[0]), int(hi[0]) + 1):
            for n2 in range(int(lo[1]), int(hi[1]) + 1):
                u, _, v_hi = transition_line(0, n1, n2, dv, dm, c)  # the upper end of the dot1 line: a triple point
                a = np.array([u, v_hi])
                ends = np.array([minv @ a, minv @ (a + dm)])
                ok = ((x.min() <= ends[:, 0]) & (ends[:, 0] <= x.max()) & (y.min() <= ends[:, 1])
                      & (ends[:, 1] <= y.max()))
                if ok.any():
                    pairs.append(ends)
                    inside.append(ok)
        if not pairs:
            return none
        return np.array(pairs, float), np.array(inside, bool)

    @functools.cached_property
    def interdot_on_pairs(self) -> np.ndarray:
        """Per detected interdot segment (``diagram.interdot``): does it lie on a predicted pair of triple points?

        In pixel units (each axis divided by its step): the segment's midpoint
        within ``INTERDOT_PAIR_DISTANCE`` of a pair's length from the pair's
        midpoint, and its direction within ``INTERDOT_PAIR_ANGLE_DEG`` of the
        pair's. Short segments that the detector sorted as interdot but that
        cross a vertex at another angle, or lie between vertices, are not
        (seen on the sample night and on held-out maps: near-vertical and flat
        segments drawn as "interdot"; the detected interdot segments of the
        probe maps were 27 of 27 such). All True when no pairs are predicted
        (δ unresolved): nothing to compare with.
        """
        lines = self.diagram.interdot
        pairs, _ = self._vertex_pairs
        if not len(pairs):
            return np.ones(len(lines), bool)
        axes = map_axes(self.data)
        px = np.array([abs(axes.dx), abs(axes.dy)])
        ends = pairs / px  # (k, 2, 2) in pixels
        mid = ends.mean(axis=1)
        vec = ends[:, 1] - ends[:, 0]
        length = np.linalg.norm(vec, axis=1)
        out = np.zeros(len(lines), bool)
        cos_max = np.cos(np.deg2rad(INTERDOT_PAIR_ANGLE_DEG))
        for i, ln in enumerate(lines):
            a, b = np.array(ln.start, float) / px, np.array(ln.end, float) / px
            v = b - a
            near = np.linalg.norm(mid - (a + b) / 2, axis=1) <= INTERDOT_PAIR_DISTANCE * length
            with np.errstate(invalid="ignore", divide="ignore"):
                aligned = np.abs(vec @ v) >= cos_max * length * np.linalg.norm(v)
            out[i] = bool(np.any(near & aligned))
        out.flags.writeable = False
        return out

    @functools.cached_property
    def lines_used(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per detected line of dot1, dot2 and interdot: does the result rest on it (not set aside)?

        Dot lines are set aside when the lattice fit left them out
        (``diagram.line_groups`` −1); interdot segments when they join no
        predicted pair of triple points (:attr:`interdot_on_pairs`). Without a
        lattice every dot line counts.
        """
        used = list(dot_lines_used(self.diagram))
        used.append(np.array(self.interdot_on_pairs, bool))  # (one per segment; a writable copy)
        return used[0], used[1], used[2]

    # ------------------------------------------------------------------ output
    def to_json(self) -> dict:
        """The JSON object of ``stabtool analyze --json`` (NaN → null)."""
        d = self.diagram
        scaled = bool((d.ok and np.any(np.isfinite(self.scale.alpha_diag)))
                      or np.all(np.isfinite(self.scale.full_alpha)))
        la = self.lever_arm if scaled else None
        la_err = self.lever_arm_error if scaled else None
        ec, ec_err = self._charging()
        if not scaled:
            ec = {k: None for k in ec}
            ec_err = {k: None for k in ec_err}
        energy_reference = self.scale.reference if scaled else None
        out: dict[str, Any] = {
            "x_gate": self.x_gate,
            "y_gate": self.y_gate,
            "slopes": dict(d.slopes),
            "slope_errors": dict(d.slope_errors),
            "virtual_gate_matrix": d.vg_matrix,
            "addition_voltages_V": {"dot1": d.addition_V[0], "dot2": d.addition_V[1]},
            "mutual_shifts_V": (
                {"dot1": d.mutual_V[0], "dot2": d.mutual_V[1]}
                if d.mutual_resolved
                else {"dot1": None, "dot2": None}
            ),
            "gate_capacitance_aF": d.cdg_aF,
            "lever_arm": la,
            "charging_energy_meV": ec,
            "energy_reference": energy_reference,
            "quality": self.quality.to_dict(),
            # extras
            "virtual_gate_matrix_error": d.vg_matrix_error,
            "addition_voltages_V_error": {"dot1": d.addition_V_error[0], "dot2": d.addition_V_error[1]},
            "mutual_shifts_V_error": (
                {"dot1": d.mutual_V_error[0], "dot2": d.mutual_V_error[1]}
                if d.mutual_resolved
                else {"dot1": None, "dot2": None}
            ),
            "gate_capacitance_aF_error": d.cdg_aF_error,
            "lever_arm_error": la_err,
            "charging_energy_meV_error": ec_err,
            "lever_arm_ratio": {"value": d.alpha_ratio, "error": d.alpha_ratio_error},
            "energy_reference_details": self.scale.details,
            "cell_spread_V": self._spreads(),
            "lines": self._lines_json(),
            "stray_lines": [st.to_json() for st in self.stray_lines],
            "triple_points_V": self.triple_points,
            "charge_states": self.charge_states.to_json() if self.charge_states is not None else None,
            "refinement": self.refinement.to_json() if self.refinement is not None else None,
            "tunnel_coupling_ueV": self.tunnel.value_ueV if self.tunnel is not None else None,
            "tunnel_coupling_ueV_error": self.tunnel.error_ueV if self.tunnel is not None else None,
            "tunnel_coupling_upper_limit_ueV": self.tunnel.upper_limit_ueV if self.tunnel is not None else None,
            "tunnel_coupling_details": self.tunnel.to_json() if self.tunnel is not None else None,
            "tunnel_to_mutual_ratio": self.coupling.to_json() if self.coupling is not None else None,
            "tunnel_coupling_model_fit_ueV": self.model_fit_tunnel_coupling_ueV(),
            "timings_s": self.timings_s,
        }
        t = self.transport
        if self.from_triple_points:
            # transport map: Cdg (and, with resolved pairs, M, ΔV, δ) from the triple-point lattice
            out["gate_capacitance_aF"], out["gate_capacitance_aF_error"] = self.gate_capacitance
            if t.vg_matrix is not None and t.pair_quality.ok:
                out["virtual_gate_matrix"], out["virtual_gate_matrix_error"] = t.vg_matrix, t.vg_matrix_error
                out["addition_voltages_V"] = {"dot1": t.addition_V[0], "dot2": t.addition_V[1]}
                out["addition_voltages_V_error"] = {"dot1": t.addition_V_error[0], "dot2": t.addition_V_error[1]}
                out["mutual_shifts_V"] = {"dot1": t.mutual_V[0], "dot2": t.mutual_V[1]}
                out["mutual_shifts_V_error"] = {"dot1": t.mutual_V_error[0], "dot2": t.mutual_V_error[1]}
            out["triple_point_lattice"] = {
                "points_V": t.points_V, "basis_V": t.basis_V, "basis_V_error": t.basis_V_error,
                "pair_resolved": t.pair_resolved, "pair_V": t.pair_V, "pair_V_error": t.pair_V_error,
                "n_cells": t.n_cells, "n_outliers": t.n_outliers,
            }
        return _nan_to_none(out)

    def _spreads(self) -> dict:
        lat = self.diagram.lattice
        if lat is None:
            return {"addition": {"dot1": None, "dot2": None}, "mutual": {"dot1": None, "dot2": None}}
        return {
            "addition": {"dot1": lat.addition_spread_V[0], "dot2": lat.addition_spread_V[1]},
            "mutual": {"dot1": lat.mutual_spread_V[0], "dot2": lat.mutual_spread_V[1]},
        }

    def _lines_json(self) -> list[dict]:
        out = []
        lat = self.diagram.lattice
        for fam, lines in (("dot1", self.diagram.lines1), ("dot2", self.diagram.lines2), ("interdot", self.diagram.interdot)):
            for k, ln in enumerate(lines):
                rec = {
                    "family": fam, "x0": ln.x0, "y0": ln.y0, "slope": ln.slope, "slope_error": ln.slope_stderr,
                    "start": list(ln.start), "end": list(ln.end), "width_V": ln.width_V,
                }
                if lat is not None and fam != "interdot":
                    grp = self.diagram.line_groups[0 if fam == "dot1" else 1]
                    if grp[k] >= 0:
                        lab = (lat.labels1 if fam == "dot1" else lat.labels2)[grp[k]]
                        rec["label"] = [int(lab[0]), int(lab[1])]
                    else:
                        rec["label"] = None
                out.append(rec)
        return out

    def to_dataset(self) -> xr.Dataset:
        """The map and all results in one Dataset (results as JSON-able attrs and arrays)."""
        import json

        da = self.data
        ds = xr.Dataset({str(da.name or "signal"): da})
        if self.charge_states is not None:
            lab = self.charge_states.labels
            ds["n1"] = (da.dims, lab[..., 0].astype(np.int32), {"long_name": "dot1 occupation"})
            ds["n2"] = (da.dims, lab[..., 1].astype(np.int32), {"long_name": "dot2 occupation"})
        ds["virtual_gate_matrix"] = (("virtual_gate", "gate"), self.diagram.vg_matrix)
        ds["virtual_gate_matrix_error"] = (("virtual_gate", "gate"), self.diagram.vg_matrix_error)
        cdg, cdg_err = self.gate_capacitance
        ds["gate_capacitance_aF"] = (("dot", "gate"), cdg, {"units": "aF"})
        ds["gate_capacitance_aF_error"] = (("dot", "gate"), cdg_err, {"units": "aF"})
        ds["lever_arm"] = (("dot", "gate"), self.lever_arm)
        ds = ds.assign_coords(dot=["dot1", "dot2"], gate=[self.x_gate, self.y_gate],
                              virtual_gate=[f"{self.x_gate}'", f"{self.y_gate}'"])
        ds.attrs["analysis_json"] = json.dumps(self.to_json())
        ds.attrs["quality_ok"] = int(self.quality.ok)
        return ds

    def summary(self) -> str:
        """Readable multi-line text summary."""
        from .report.text import summary_text

        return summary_text(self)

    def save_plot(self, path: str | os.PathLike[str], **kwargs: Any) -> None:
        """Write a PNG: map, line families, triple points, charge states, key numbers."""
        from .report.plot import save_plot

        save_plot(self, path, **kwargs)


# --------------------------------------------------------------------- scale
def _weighted(values: Sequence[float], errors: Sequence[float]) -> tuple[float, float]:
    v = np.asarray(values, float)
    e = np.asarray(errors, float)
    ok = np.isfinite(v) & (v > 0)
    v, e = v[ok], e[ok]
    if v.size == 0:
        return float("nan"), float("nan")
    if v.size >= 3:
        med = np.median(v)
        mad = 1.4826 * np.median(np.abs(v - med))
        keep = np.abs(v - med) <= max(4 * mad, 1e-3 * med)
        v, e = v[keep], e[keep]
    spread = float(np.std(v, ddof=1) / np.sqrt(v.size)) if v.size > 1 else float("nan")
    if np.all(np.isfinite(e) & (e > 0)):
        w = 1 / e**2
        mean = float(np.sum(w * v) / np.sum(w))
        err = float(np.sqrt(1 / np.sum(w)))
        return mean, max(err, spread) if np.isfinite(spread) else err
    return float(np.mean(v)), spread if np.isfinite(spread) else 0.1 * float(np.mean(v))


def _median_dot1_width(fit: DiagramFit) -> float | None:
    """Median fitted width of the dot1 lines (V), None when no line has one."""
    w = [ln.width_V for ln in fit.lines1 if np.isfinite(ln.width_V) and ln.width_V > 0]
    return float(np.median(w)) if w else None


def _length_order(lengths: Sequence[float]) -> np.ndarray:
    """Indices from the longest to the shortest; lengths equal to 1e-9 relative keep their order.

    Lengths computed along different paths differ by rounding (1e-15 relative); ranking on
    the raw values made the choice among equally long lines depend on that noise.
    """
    arr = np.asarray(lengths, float)
    top = float(np.max(np.abs(arr))) if arr.size else 0.0
    key = np.round(arr / top * 1e9) if top > 0 else arr
    return np.lexsort((np.arange(arr.size), -key))


def _cuts_along_line(x: np.ndarray, y: np.ndarray, z: np.ndarray, ln: Any, which: int,
                     half: float, *, clear: Any = None) -> tuple[np.ndarray, np.ndarray] | None:
    """Cuts along the dot's own gate through the central 70 % of ``ln``, aligned on it and stacked.

    ``x`` (nx,), ``y`` (ny,), ``z`` (ny, nx): the map. Returns (voltage relative to the line,
    signal minus each cut's mean) or None with < 3 cuts.
    """
    if which == 0:
        c0, c1 = ln.start[1], ln.end[1]
        cross, along, zz, at = y, x, z, ln.x_at
    else:
        c0, c1 = ln.start[0], ln.end[0]
        cross, along, zz, at = x, y, z.T, ln.y_at
    lo, hi = min(c0, c1), max(c0, c1)
    lo, hi = lo + 0.15 * (hi - lo), hi - 0.15 * (hi - lo)
    rows = np.nonzero((cross >= lo) & (cross <= hi))[0]
    if rows.size < 3:
        return None
    centre = np.asarray(at(cross[rows]), float).reshape(-1)
    if clear is not None:  # keep the cuts clear of the other dot's lines (fit.linewidth.clear_of_lines)
        m = clear(cross[rows], centre)
        rows, centre = rows[m], centre[m]
        if rows.size < 3:
            return None
    d = along[None, :] - centre[:, None]
    sig = zz[rows]
    ok = (np.abs(d) <= half) & np.isfinite(sig)
    cnt = ok.sum(axis=1)
    keep = cnt >= 6
    if keep.sum() < 3:
        return None
    ok &= keep[:, None]
    mean = np.where(ok, sig, 0.0).sum(axis=1) / np.maximum(cnt, 1)
    return d[ok], (sig - mean[:, None])[ok]


def _widths_from_map(da: xr.DataArray, fit: DiagramFit, which: int, *, max_lines: int = 12,
                     clearance_V: float | None = None, with_shape: bool = False) -> Any:
    """Fermi width across the dot lines, fitted on the map.

    For every line used by the fit (the ``max_lines`` longest), the cuts along
    the dot's own gate (rows for dot1, columns for dot2) through the central
    70 % of the segment are aligned on the line and stacked (each cut minus
    its mean); one Fermi step on a linear background is fitted per line, all
    lines at once (:func:`stabtool.fit.fermi.fit_fermi_steps`; a line whose
    batched fit does not converge is refitted by
    :func:`stabtool.fit.fermi.fit_fermi_step`). Returns the weighted mean
    width and its standard error (V). With ``clearance_V``, only cuts whose
    window stays that far from every line of the other dot (along the other
    dot's gate) are used (:func:`stabtool.fit.linewidth.clear_of_lines`).
    With ``with_shape``, returns ``(width, error, shape)``: ``shape()`` gives
    the sum over the fitted cuts of the χ² of the Fermi step minus that of a
    Gaussian-broadened step (:func:`stabtool.fit.line_shape.fermi_minus_gauss_chi2`;
    NaN without a cut), fitted when called: only a width that is used needs it.
    """
    from .fit.fermi import fit_fermi_step, fit_fermi_steps
    from .fit.line_shape import fermi_minus_gauss_chi2
    from .fit.linewidth import clear_of_lines

    fam_lines = fit.lines1 if which == 0 else fit.lines2
    grp = fit.line_groups[which]
    used = [ln for k, ln in enumerate(fam_lines) if k < grp.size and grp[k] >= 0]  # lines used by the fit
    lines = [used[i] for i in _length_order([ln.length_V for ln in used])[:max_lines]]
    half = 0.35 * fit.addition_V[which]
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    z = np.asarray(da.values, float)
    clear = None
    if clearance_V is not None and np.isfinite(clearance_V) and clearance_V > 0:
        others = fit.lines2 if which == 0 else fit.lines1

        def clear(cross_v: np.ndarray, centre_v: np.ndarray) -> np.ndarray:
            return clear_of_lines(cross_v, centre_v, half_V=half, other_lines=others, which=which,
                                  clearance_V=float(clearance_V))

    cuts = [c for c in (_cuts_along_line(x, y, z, ln, which, half, clear=clear) for ln in lines) if c is not None]
    fitted: list[tuple[np.ndarray, np.ndarray, float, float]] = []  # (v, s, centre, width) of each kept cut

    def shape() -> float:
        d = np.array([fermi_minus_gauss_chi2(v, s, centre_V=c0, width_V=w) for v, s, c0, w in fitted], float)
        return float(np.sum(d[np.isfinite(d)])) if np.any(np.isfinite(d)) else float("nan")

    if not cuts:
        return (float("nan"), float("nan"), shape) if with_shape else (float("nan"), float("nan"))
    batch = fit_fermi_steps([c[0] for c in cuts], [c[1] for c in cuts], centre_guess_V=0.0)
    ws, es = [], []
    for i, (v, s) in enumerate(cuts):
        if batch.converged[i] or batch.n_points[i] < 10:
            ok, w, e, c0 = bool(batch.success[i]), batch.width_V[i], batch.width_stderr_V[i], batch.centre_V[i]
        else:
            try:
                res = fit_fermi_step(v, s, background="linear")
            except InputError:
                continue
            ok, w, e, c0 = bool(res), res.width_V, res.width_stderr_V, res.centre_V
        if ok and np.isfinite(w) and w > 0 and np.isfinite(e):
            ws.append(float(w))
            es.append(float(e))
            fitted.append((v, s, float(c0), float(w)))
    w_mean, e_mean = _weighted(ws, es)
    return (w_mean, e_mean, shape) if with_shape else (w_mean, e_mean)


def _non_thermal_shape(ws: np.ndarray, shape_of: list[Any], details: dict[str, Any], q: Quality) -> Quality:
    """Doubt the temperature scale where a Gaussian-broadened step fits the lines better than Fermi's.

    ``shape_of`` per dot (None when not measured): a callable giving the
    summed χ² of the Fermi step minus that of a Gaussian-broadened one over
    the stacked cuts clear of the other dot's lines (:mod:`stabtool.fit.line_shape`),
    called only for a width in use (finite ``ws``). Beyond
    :data:`~stabtool.fit.line_shape.NON_THERMAL_DCHI2` the lines are broader
    than the temperature makes them, so ``α = k_B T_e/(e w)`` is too small
    (a lower bound); the widths are kept (``ws`` is only read) and the
    returned quality makes the scale doubtful.
    Generator maps at a quarter of their temperature, blurred by a 1.5 px
    Gaussian: lever arms 72–96 % low, and no lever-arm doubt before this test.
    """
    from .fit.line_shape import NON_THERMAL_DCHI2

    for i in range(2):
        if shape_of[i] is None or not np.isfinite(ws[i]):
            continue
        d = float(shape_of[i]())
        if np.isfinite(d):
            details[f"shape_dchi2_fermi_minus_gauss_dot{i + 1}"] = d
        if np.isfinite(d) and d > NON_THERMAL_DCHI2:
            q = q.with_warning(
                f"dot{i + 1} lines are not thermally broadened: a Gaussian-broadened step fits them better "
                f"than the Fermi step (χ² lower by {d:.0f}): the lever arm from the electron temperature is "
                "a lower bound"
            )
    return q


def _scale(
    da: xr.DataArray,
    fit: DiagramFit,
    *,
    temperature_K: float | None,
    lever_arm: tuple[float, ...] | None,
    lever_arm_file: str | None,
    triangles: Any = None,
    fast_axis_lag_V: float = 0.0,
    fast_axis_tau_V: float = 0.0,
) -> EnergyScale:
    q = Quality()
    estimates: list[tuple[str, np.ndarray, np.ndarray]] = []
    details: dict[str, Any] = {}
    ratio, ratio_err = fit.alpha_ratio, fit.alpha_ratio_error  # α11/α22
    axes = map_axes(da)
    ax_steps = (abs(axes.dx), abs(axes.dy))

    def complete(name: str, a: np.ndarray, e: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        a, e = a.copy(), e.copy()
        for i in range(2):
            if not np.isfinite(a[i]) and np.isfinite(a[1 - i]):
                if np.isfinite(ratio):
                    a[i] = a[1 - i] / ratio if i == 1 else a[1 - i] * ratio
                    e[i] = a[i] * np.hypot(e[1 - i] / a[1 - i], ratio_err / ratio)
                else:
                    nonlocal q
                    q = q.with_warning(
                        f"{name}: α{i + 1}{i + 1} needs a reference of its own (mutual shifts unresolved)"
                    )
        return a, e

    if temperature_K is not None and fit.ok:
        ws, es = np.full(2, np.nan), np.full(2, np.nan)
        # first pass on all cuts gives each dot's width; the second keeps only the cuts clear
        # of the other dot's lines by CLEARANCE_WIDTHS of its width (fit.linewidth.clear_of_lines)
        from .fit.linewidth import CLEARANCE_WIDTHS, choose_clear_width

        first = [_widths_from_map(da, fit, i) for i in range(2)]
        shape_of: list[Any] = [None, None]  # Fermi minus Gaussian step, cuts clear of the other dot's lines
        for i in range(2):
            lines = fit.lines1 if i == 0 else fit.lines2
            w, e = first[i]
            if np.isfinite(w) and np.isfinite(first[1 - i][0]):
                w_c, e_c, shape_of[i] = _widths_from_map(da, fit, i, clearance_V=CLEARANCE_WIDTHS * first[1 - i][0],
                                                         with_shape=True)
                cw = choose_clear_width(w, e, w_c, e_c)
                w, e = cw.width_V, cw.error_V
                details[f"width_dot{i + 1}_cuts"] = cw.choice
                if cw.warning:
                    q = q.with_warning(f"dot{i + 1} lines: {cw.warning}")
            source = "Fermi fits on stacked map cuts"
            if not np.isfinite(w):
                w_l = [ln.width_V for ln in lines]
                e_l = [ln.width_stderr_V for ln in lines]
                w, e = _weighted(w_l, e_l)
                source = "detected lines"
            ws[i], es[i] = w, e
            if np.isfinite(w):
                fwhm_px = FERMI_FWHM_FACTOR * w / ax_steps[i]
                if fwhm_px < MIN_FWHM_PX:
                    # the lever arm is then null (not guessed): a note, not a doubt on the reported numbers
                    q = q.with_warning(
                        f"dot{i + 1} lines are {fwhm_px:.1f} px wide (FWHM): resolution-limited, "
                        "no lever arm from the temperature",
                        doubtful=False,
                    )
                    details[f"width_dot{i + 1}_V_resolution_limited"] = w
                    ws[i], es[i] = np.nan, np.nan
                    continue
                details[f"width_dot{i + 1}_V"] = w
                details[f"width_dot{i + 1}_V_error"] = e
                details["width_source"] = source
        q = _non_thermal_shape(ws, shape_of, details, q)
        ws, q = _lag_broadened(ws, fit, fast_axis_lag_V, q)
        es = _with_undo_error(ws, es, fit, fast_axis_tau_V, fast_axis_lag_V, details)
        ws, q = _thermal_consistency(ws, es, details, ratio, ratio_err, ax_steps, q)
        a: np.ndarray = np.array([lever_arm_from_width(wi, temperature_K) if np.isfinite(wi) else np.nan for wi in ws])
        e_a: np.ndarray = a * es / ws
        if np.all(np.isfinite(a)) and np.isfinite(ratio):
            # thermal widths give α11/α22 = w2/w1; the diagram gives δ2/δ1
            r_w = a[0] / a[1]
            r_err = r_w * np.hypot(e_a[0] / a[0], e_a[1] / a[1])
            dev = abs(r_w - ratio) / ratio
            details["lever_arm_ratio_from_widths"] = r_w
            if dev > REFERENCE_AGREEMENT and abs(r_w - ratio) > 3 * np.hypot(r_err, ratio_err):
                q = q.with_warning(
                    f"line widths give α11/α22 = {r_w:.3f} but the diagram gives {ratio:.3f}: "
                    "lines broader than thermal (tunnel coupling, noise) on one dot?"
                )
        a, e_a = complete("electron temperature", a, e_a)
        if np.any(np.isfinite(a)):
            estimates.append(("electron_temperature", a, e_a))
            details["electron_temperature_K"] = temperature_K
    if lever_arm is not None:
        la = tuple(float(v) for v in lever_arm)
        a_u = np.array([la[0], la[1] if len(la) > 1 else np.nan])
        e_u = 0.0 * a_u  # a user-given value is taken as exact
        if len(la) > 1 and np.isfinite(ratio):
            dev = abs(la[0] / la[1] - ratio) / ratio
            if dev > REFERENCE_AGREEMENT and abs(la[0] / la[1] - ratio) > 3 * ratio_err:
                q = q.with_warning(
                    f"given lever arms have α11/α22 = {la[0] / la[1]:.3f} but the diagram gives {ratio:.3f}"
                )
        a_u, e_u = complete("lever arm", a_u, e_u)
        estimates.append(("lever_arm", a_u, e_u))
    if lever_arm_file is not None:
        a_f, e_f = _lever_arm_from_file(lever_arm_file, da)
        a_f, e_f = complete("lever-arm file", a_f, e_f)
        estimates.append(("lever_arm_file", a_f, e_f))
        details["lever_arm_file"] = os.fspath(lever_arm_file)
    if triangles is not None:
        if triangles:
            a_t = np.diag(np.array(triangles.lever_arm, float)).copy()
            e_t = np.diag(np.array(triangles.lever_arm_stderr, float)).copy()
            # one triangle: no scatter; take the thermal-rounding estimate (or 3 %) as the error
            rel = triangles.thermal_bias_rel if np.isfinite(triangles.thermal_bias_rel) else 0.03
            e_t = np.where(np.isfinite(e_t), np.hypot(e_t, rel * a_t), rel * a_t)
            estimates.append(("bias_triangles", a_t, e_t))
            details["bias_triangles_lever_arm"] = np.array(triangles.lever_arm).tolist()
            details["bias_triangles_n"] = len(triangles.triangles)
            details["bias_V"] = triangles.bias_V
            for w in triangles.quality.warnings:
                q = q.with_warning(f"bias triangles: {w}", doubtful=not triangles.quality.ok)
        else:
            q = q.with_warning("bias triangles: " + ("; ".join(triangles.quality.warnings[:2]) or "none found"))
    full = np.full((2, 2), np.nan), np.full((2, 2), np.nan)
    if triangles:
        a_full = np.array(triangles.lever_arm, float)
        e_full = np.array(triangles.lever_arm_stderr, float)
        rel = triangles.thermal_bias_rel if np.isfinite(triangles.thermal_bias_rel) else 0.03
        full = a_full, np.where(np.isfinite(e_full), np.hypot(e_full, rel * a_full), rel * a_full)
    if not estimates:
        return EnergyScale(details=details, quality=q)
    for name, a_est, e_est in estimates:
        details[f"alpha_from_{name}"] = np.asarray(a_est).tolist()
        details[f"alpha_from_{name}_error"] = np.asarray(e_est).tolist()
    # compare references pairwise
    for i in range(len(estimates)):
        for j in range(i + 1, len(estimates)):
            ni, ai, ei = estimates[i]
            nj, aj, ej = estimates[j]
            for k in range(2):
                if np.isfinite(ai[k]) and np.isfinite(aj[k]):
                    dev = abs(ai[k] - aj[k]) / aj[k]
                    if dev > LEVER_ARM_AGREEMENT and abs(ai[k] - aj[k]) > 3 * np.hypot(ei[k], ej[k]):
                        q = q.with_warning(
                            f"references disagree on α{k + 1}{k + 1}: {ni} gives {ai[k]:.4g}, {nj} gives {aj[k]:.4g}"
                        )
    # the user's own lever arm wins, then a file, then the temperature
    order = {"lever_arm": 0, "lever_arm_file": 1, "bias_triangles": 2, "electron_temperature": 3}
    best_name, best_a, best_e = min(estimates, key=lambda t: order[t[0]])
    if not np.all(np.isfinite(best_a)):
        q = q.with_warning(f"{best_name}: only one lever arm determined; α and E_C of the other dot are null")
    return EnergyScale(alpha_diag=np.asarray(best_a, float), alpha_diag_error=np.asarray(best_e, float),
                       reference=best_name, details=details, quality=q, full_alpha=full[0], full_alpha_error=full[1])


#: A read-out lag broadens a family's lines beyond use for the temperature when its smear (along the
#: family's profile direction) exceeds this fraction of the Fermi width: an exponential smear of
#: mean τ adds τ² to the Fermi variance π²w²/3, a width bias of ≈ 3τ²/(2π²w²), 2.4 % at τ = 0.4 w.
LAG_WIDTH_FRACTION = 0.4


def _across_profiles(fit: DiagramFit) -> tuple[float, float]:
    """How far a smear along x reaches across each family's width profile: dot1 lines are cut along
    x (1), dot2 lines along y, which a shift along x moves by the dot2 slope (``|s2|``)."""
    return 1.0, abs(fit.slopes.get("dot2", np.nan))


def _lag_broadened(ws: np.ndarray, fit: DiagramFit, lag_V: float, q: Quality) -> tuple[np.ndarray, Quality]:
    """Leave out the widths that a fast-axis read-out lag of ``lag_V`` (V along x) broadens.

    The lag smears each row along x by about ``lag_V``: across a dot1 line (cut
    along x) by ``lag_V``, across a dot2 line (cut along y, slope ``s2``) by
    ``|s2| lag_V``. A width whose smear exceeds :data:`LAG_WIDTH_FRACTION` of it
    is not used for the temperature lever arm.
    """
    if not lag_V > 0:
        return ws, q
    ws = ws.copy()
    smear = tuple(k * lag_V for k in _across_profiles(fit))
    for i in range(2):
        if np.isfinite(ws[i]) and not smear[i] <= LAG_WIDTH_FRACTION * ws[i]:
            q = q.with_warning(
                f"dot{i + 1} lines: the read-out lag smears them by {smear[i] / ws[i]:.2f} of their width; "
                "no lever arm from the temperature",
                doubtful=False,
            )
            ws[i] = np.nan
    return ws, q


def _with_undo_error(ws: np.ndarray, es: np.ndarray, fit: DiagramFit, tau_V: float, lag_V: float,
                     details: dict[str, Any]) -> np.ndarray:
    """Width errors with what an undone read-out low-pass may leave (:func:`width_variance_error`).

    The Fermi profile's variance is ``π²w²/3``; an error ``Δ`` in it moves the
    width by ``3Δ/(2π²w²)`` of itself, added in quadrature to the fit's error.
    Across a dot1 line (cut along x) the smear is the low-pass's; across a
    dot2 line (cut along y) it is ``|s2|`` times that. Held-out probe (a
    serpentine sweep through a one-pole filter of 1.50 ± 0.13 points, rows
    left 0.43 px apart, SNR 20): the undone map's dot1 width was 4.4 %
    narrow at a stated 0.45 %; this term states ≈ 12 %.
    """
    if not (tau_V > 0 or lag_V > 0):
        return es
    es = es.copy()
    scale = _across_profiles(fit)
    for i in range(2):
        if np.isfinite(ws[i]) and ws[i] > 0 and np.isfinite(scale[i]):
            var = width_variance_error(scale[i] * tau_V, scale[i] * lag_V)
            rel = 3.0 * var / (2.0 * np.pi**2 * ws[i] ** 2)
            es[i] = float(np.hypot(es[i], rel * ws[i]))
            details[f"width_dot{i + 1}_V_undo_error"] = float(rel * ws[i])
    return es


#: A resolved family is broader than thermal when the width it implies for a resolution-limited
#: family exceeds that family's own measured width (an upper bound on its thermal width) by this
#: factor and by 3σ (see :func:`_thermal_consistency`).
THERMAL_BOUND_MARGIN = 1.25
#: Fermi width (pixels) below which a measured width only says "unresolved" (the bound used then).
SHARP_WIDTH_BOUND_PX = 0.5
#: Without the diagram's α11/α22 (mutual shifts unresolved) the two plungers' lever arms on their own
#: dots are taken to lie within this factor of each other (common practice, no source: both dots sit
#: under gates of one design; the held-out probe's random devices span up to about 10×).
LEVER_ARM_RATIO_PRIOR = 10.0


def _thermal_consistency(ws: np.ndarray, es: np.ndarray, details: dict[str, Any], ratio: float, ratio_err: float,
                         ax_steps: tuple[float, float], q: Quality) -> tuple[np.ndarray, Quality]:
    """Withhold a resolved family's width when the other, resolution-limited, family shows it non-thermal.

    Both dots' lines are broadened by the same ``k_B T``: ``w_i = k_B T/(e α_ii)`` along each
    dot's own plunger (constant-interaction model; van der Wiel et al., Rev. Mod. Phys. 75, 1
    (2003)), so ``w2 = w1 · α11/α22``, the ratio the diagram gives (δ2/δ1). A family measured
    resolution-limited has a thermal width below its measured one (or below half a pixel when it
    measured narrower, :data:`SHARP_WIDTH_BOUND_PX`); when the resolved family's
    width implies a clearly larger one, the resolved lines are broadened by something else — a
    low-pass on the fast axis of a quick sweep (which widens the lines cut along it and not the
    others), tunnel or lifetime broadening, noise — and the temperature would give a lever arm far
    too small with a small stated error (held-out probe, serpentine sweeps through a one-pole filter
    of 0.5–3 points: α off by 50–90 % at stated errors of 8–12 %). The width is then not used
    (NaN) and a note says why. Without the diagram's ratio (``ratio`` NaN) the resolved width
    must still allow the other family's bound for lever arms up to :data:`LEVER_ARM_RATIO_PRIOR`
    apart (held-out all-noise probe seed 21: dot1 23× wider than dot2's bound, α 95 % off).
    ``ws``, ``es`` in volts along x (dot1) and y (dot2).
    """
    limited = [details.get(f"width_dot{i + 1}_V_resolution_limited", np.nan) for i in range(2)]
    prior = not (np.isfinite(ratio) and ratio > 0)
    ws = ws.copy()
    for i in range(2):
        j = 1 - i
        if not (np.isfinite(ws[i]) and np.isfinite(limited[j])):
            continue
        if prior:
            # the narrowest width the other family could have: α_ii/α_jj at its least likely
            factor, rel = 1.0 / LEVER_ARM_RATIO_PRIOR, 0.0
        else:
            factor, rel = (ratio if i == 0 else 1.0 / ratio), ratio_err / ratio  # w_j = w_i · α_ii/α_jj
        pred = ws[i] * factor
        pred_err = pred * np.hypot(es[i] / ws[i] if np.isfinite(es[i]) else 0.0, rel)
        # (a step narrower than a pixel fits to any width below ≈ 0.3 px: half a pixel bounds it)
        bound = max(float(limited[j]), SHARP_WIDTH_BOUND_PX * ax_steps[j])
        if pred > THERMAL_BOUND_MARGIN * bound and pred - 3 * pred_err > bound:
            details[f"width_dot{i + 1}_V_not_thermal"] = float(ws[i])
            implies = (f"even with the lever arms {LEVER_ARM_RATIO_PRIOR:.0f}× apart, dot{j + 1} lines at least"
                       if prior else f"dot{j + 1} lines")
            q = q.with_warning(
                f"dot{i + 1} lines are broader than thermal: their width implies {implies} "
                f"{FERMI_FWHM_FACTOR * pred / ax_steps[j]:.1f} px wide (FWHM), but those measure under "
                f"{FERMI_FWHM_FACTOR * bound / ax_steps[j]:.1f} px (fast-axis low-pass, tunnel or lifetime "
                "broadening?); no lever arm from the temperature",
                doubtful=False,
            )
            ws[i] = np.nan
    return ws, q


def _warn_if_doubtful(da: xr.DataArray, q: Quality) -> None:
    """A :class:`QualityWarning` with the reasons (at most three; the notes are in the result) of a
    doubtful verdict, naming the map's file."""
    if q.ok:
        return
    ws, flags = q.doubts_first_flagged()
    reasons = [w for w, f in zip(ws, flags) if f] if flags is not None else list(ws)
    warnings.warn(
        f"{da.attrs.get('source', 'map')}: analysis doubtful: {'; '.join((reasons or list(ws))[:3])}"
        + (f" (and {len(reasons) - 3} more)" if len(reasons) > 3 else ""),
        QualityWarning, stacklevel=3,
    )


def _lever_arm_from_file(path: str, da: xr.DataArray) -> tuple[np.ndarray, np.ndarray]:
    try:
        from .calibrate import read_lever_arm_file  # type: ignore[attr-defined]
    except ImportError as exc:  # pragma: no cover - depends on another module's progress
        raise InputError(path, "lever-arm files cannot be read yet (stabtool.calibrate missing)") from exc
    rec = read_lever_arm_file(path)
    rec_quality = getattr(rec, "quality", None)
    if rec_quality is not None and not rec_quality.ok:
        warnings.warn(f"{path}: the lever-arm calibration is doubtful: {'; '.join(rec_quality.warnings[:2])}",
                      QualityWarning, stacklevel=3)
    gates = [str(da.dims[-1]), str(da.dims[0])]
    a, e = np.full(2, np.nan), np.full(2, np.nan)
    # accept a mapping gate -> value or gate -> (value, error), or an object with .lever_arms
    table: Any = getattr(rec, "lever_arms", rec)
    errs = getattr(rec, "lever_arm_errors", None) or {}
    for i, g in enumerate(gates):
        if g in table:
            val = table[g]
            if isinstance(val, (tuple, list)):
                a[i], e[i] = float(val[0]), float(val[1])
            else:
                a[i] = float(getattr(val, "value", val))
                e[i] = float(getattr(val, "error", errs.get(g, 0.0)))
    if not np.any(np.isfinite(a)):
        raise InputError(path, f"no lever arm for gate {gates[0]!r} or {gates[1]!r} in the file")
    return a, e


def _is_bend_doubt(w: str) -> bool:
    """The detector's note that dot lines bend towards the triple points (not one already explained)."""
    return w.startswith("detector:") and "bend" in w and "[" not in w


#: Score (standard normal without a coupling, :func:`stabtool.fit.refine._tunnel_score`) above which the
#: map is refitted with an interdot tunnel coupling even without another sign. On 53 ordinary held-out
#: maps 5 scored above it (the score runs wider than normal there: sd ≈ 1.6); it caught a generator
#: map (gaas-double, t = 20 µeV) reported ok with M 0.007 off that no other sign reached (score 3.8).
TUNNEL_SCORE_TRIGGER = 3.0


def _tunnel_evidence(q: Quality, refinement: Any, adoption: Any) -> bool:
    """Whether to refit the map with the interdot tunnel coupling.

    After a converged model fit without it: the detector saw the dot lines
    bend towards the triple points, or the model leaves sharp structure, or
    it disagrees with the lines, or the score test for a coupling at that fit
    exceeds :data:`TUNNEL_SCORE_TRIGGER` (each a sign of triple points rounded
    by a coupling; the refit is adopted only when it resolves one,
    :func:`stabtool.fit.refine.adopt_tunnel_refinement`).
    """
    if refinement is None or not refinement.converged or not refinement.params:
        return False
    bend = any(_is_bend_doubt(w) for w in q.warnings)
    structure = refinement.structure is not None and refinement.structure.flagged
    score = bool(refinement.tunnel_score > TUNNEL_SCORE_TRIGGER)  # (NaN: False)
    return bool(bend or structure or adoption.disagreed or score)


#: Starts of the tunnel-coupled model fit, in units of the fitted line width w1 (t/(e α11) = k·w1)
TUNNEL_START_WIDTHS = (1.0, 2.0, 4.0)


def _tunnel_refinement(fit_map: xr.DataArray, fit: DiagramFit, states: Any, refinement: Any, *,
                       width_guess_V: float | None) -> Any:
    """The model fit with an interdot tunnel coupling, from several starts: the one of least residual.

    The coupling trades off against the mutual shifts (both round the
    triple points), and the least-squares surface has more than one
    minimum. Held-out probe map (tunnel coupling 25 µeV = 2.1 w1, a sensor
    averaging over the charge states, seed 4): from t = w1 the fit stopped
    at t = 1.34 w1 with δ1 13 % high and M12 0.0088 off at a stated
    0.0020; from 4 w1 it reached t = 2.15 w1, M12 0.002 off, with a lower
    residual (Δχ² ≈ 60). Each start begins at the fit without coupling.
    """
    from .fit.refine import refine_model

    best = None
    for k in TUNNEL_START_WIDTHS:
        trial = refine_model(fit_map, fit, charge_states=states, width_guess_V=width_guess_V,
                             tunnel_start_V=k * refinement.params["width_V1"], start=refinement)
        if best is None or (trial.converged and (not best.converged or trial.residual_ratio < best.residual_ratio)):
            best = trial
    return best


def _lowest_lines(lat: Any) -> tuple[int, int]:
    """Labels of the lowest dot1 and dot2 transitions of a lattice fit (N1, resp. N2, after the transition)."""
    return int(lat.labels1[:, 0].min()), int(lat.labels2[:, 1].min())


# ------------------------------------------------------------------ pipeline
#: Largest relative stated error of a gate capacitance with which absolute occupations are claimed.
ABSOLUTE_MAX_CDG_REL = 0.1


def _lattice_too_uncertain(fit) -> bool:
    """True when some gate capacitance's stated error exceeds ``ABSOLUTE_MAX_CDG_REL`` of its value (or is unknown).

    Held-out probe map with mains pickup (seed 9 of ``--noise hum``, SNR 4): a Cdg element known to
    108 % came with absolute labels wrong on 14 regions.
    """
    from .fit.uncertainty import relative_cdg_errors

    rel = relative_cdg_errors(fit)
    return not bool(np.all(np.isfinite(rel)) and np.max(rel) <= ABSOLUTE_MAX_CDG_REL)


def _without_switching(fit_map: xr.DataArray, fit: DiagramFit, states: ChargeStates, refinement: Any, *,
                       width_guess_V: float | None):
    """Remove sensor switching offsets when they are what the model fit left in its residual.

    When the fit to the map leaves sharp residual structure, the residual's
    rows are searched for piecewise-constant offsets (a charge trap switching
    the sensor during the sweep, :func:`stabtool.fit.switching.switching_offsets`).
    If some are found and the fit to the map without them converges and
    leaves no sharp structure, that fit and that map are used (the fit
    started as the first, from ``width_guess_V``). Returns ``(refinement,
    map, note)`` (the note empty when nothing changed).
    """
    from .fit.refine import refine_model
    from .fit.switching import switching_offsets

    st = refinement.structure
    if st is None or not st.flagged or refinement.model is None or not np.isfinite(refinement.noise):
        return refinement, fit_map, ""
    z = np.asarray(fit_map.values, float)
    sw = switching_offsets(z - refinement.model, refinement.noise)
    if not sw.n_switches:
        return refinement, fit_map, ""
    fixed = fit_map.copy(data=z - np.nan_to_num(sw.offsets))
    again = refine_model(fixed, fit, charge_states=states, width_guess_V=width_guess_V)
    if not again.converged or again.structure is None or again.structure.flagged:
        return refinement, fit_map, ""
    steps = np.abs([s for *_, s in sw.switches])
    return again, fixed, (f"sensor switching (telegraph noise?): {sw.n_switches} offset step(s) along the rows "
                          f"(median {np.median(steps):.3g}) removed before the model fit to the map; the numbers "
                          "may keep a bias from it")


#: Refit without the area of sharp residual structure (:func:`_without_local_structure`).
LOCAL_STRUCTURE_REFIT = True
#: Largest share of a map's finite pixels that :func:`_without_local_structure` may leave out.
LOCAL_STRUCTURE_MAX_SHARE = 0.10
#: Rounds of :func:`_without_local_structure` (each leaves out the tiles the last fit flagged).
LOCAL_STRUCTURE_ROUNDS = 3
#: Rounds of its second try, one tile (the worst the last fit flagged) per round.
LOCAL_STRUCTURE_SINGLE_ROUNDS = 6


def _refit_without_tiles(fit_map: xr.DataArray, fit: DiagramFit, states: ChargeStates, refinement: Any, *,
                         width_guess_V: float | None, rounds: int, per_round: int | None):
    """Fits of ``fit_map`` leaving out the tiles each fit flags: ``(fit, boxes, left_out)`` or None.

    Each round sets the flagged tiles (worst first, at most ``per_round`` of
    them, all within :data:`LOCAL_STRUCTURE_MAX_SHARE` of the map) to NaN and
    fits again from the last fit; the first fit that converges and flags
    nothing is returned with the boxes left out and their pixel mask.
    """
    from .fit.refine import refine_model

    z = np.array(fit_map.values, float)
    finite = np.isfinite(z)
    budget = LOCAL_STRUCTURE_MAX_SHARE * np.count_nonzero(finite)
    left_out = np.zeros(z.shape, bool)  # finite pixels set aside so far
    boxes: list[tuple[int, int, int, int]] = []
    last = refinement
    for _ in range(rounds):
        added = 0
        for box in last.structure.hits:  # (worst first) while within the budget
            if per_round is not None and added >= per_round:
                break
            y0, y1, x0, x1 = box
            more = np.count_nonzero(finite[y0:y1, x0:x1] & ~left_out[y0:y1, x0:x1])
            if np.count_nonzero(left_out) + more <= budget:
                left_out[y0:y1, x0:x1] |= finite[y0:y1, x0:x1]
                added += 1
                boxes.append(box)
        if not added:
            return None
        last = refine_model(fit_map.copy(data=np.where(left_out, np.nan, z)), fit, charge_states=states,
                            width_guess_V=width_guess_V, start=last)
        if not last.params or last.structure is None:
            return None
        if last.converged and not last.structure.flagged:
            return last, tuple(boxes), left_out
    return None


def _without_local_structure(fit_map: xr.DataArray, fit: DiagramFit, states: ChargeStates, refinement: Any, *,
                             width_guess_V: float | None):
    """The model fit without the areas of sharp residual structure, when the rest of the map needs none.

    When the fit to the map leaves sharp structure in a few tiles (a sensor
    that changes faster than the model's quadratic per charge state in a
    corner, a defect or a spot of charge noise), the significant tiles of the
    structure test are left out (set to NaN) and the map is fitted again
    from the last fit; tiles that fit flags are added, for up to
    :data:`LOCAL_STRUCTURE_ROUNDS` fits. The tiles are taken worst first
    while all of them stay within :data:`LOCAL_STRUCTURE_MAX_SHARE` of the
    map. A strong defect pulls the whole first fit, which then flags tiles
    far from it too and fills the share; so when that fails, the same is
    tried with only the worst flagged tile per fit, for up to
    :data:`LOCAL_STRUCTURE_SINGLE_ROUNDS` fits. The structure counts as
    local when a fit converges and leaves no sharp structure on the rest
    of the map: that fit is returned, with a note naming the area and how
    far the lattice parameters (M12, M21, ΔV1, ΔV2, δ1, δ1/δ2) moved, in
    standard errors, when it was left out (a defect pulls the fit that
    includes it). Otherwise the first fit and an empty note.
    """
    from .fit.refine import PARAM_NAMES

    st = refinement.structure
    if st is None or not st.flagged or not st.hits or not refinement.params:
        return refinement, ""
    found = (_refit_without_tiles(fit_map, fit, states, refinement, width_guess_V=width_guess_V,
                                  rounds=LOCAL_STRUCTURE_ROUNDS, per_round=None)
             or _refit_without_tiles(fit_map, fit, states, refinement, width_guess_V=width_guess_V,
                                     rounds=LOCAL_STRUCTURE_SINGLE_ROUNDS, per_round=1))
    if found is None:
        return refinement, ""
    last, boxes, left_out = found
    with np.errstate(divide="ignore", invalid="ignore"):  # (an error of 0 or NaN: an infinite or NaN shift)
        shifts = np.abs(np.array([last.params[k] - refinement.params[k] for k in PARAM_NAMES[:6]]) /
                        np.array([last.errors[k] for k in PARAM_NAMES[:6]], float))
    moved = f"{np.nanmax(shifts):.1f} σ" if np.any(np.isfinite(shifts)) else "an unknown number of σ"
    iy, ix = st.where
    x = fit_map[fit_map.dims[-1]].values
    y = fit_map[fit_map.dims[0]].values
    note = (f"the constant-interaction model does not describe the map near ({x[ix]:.4g}, {y[iy]:.4g}) V: "
            f"{share_of_points(left_out)} with sharp residual structure were left out of the model fit "
            f"(the lattice parameters moved by up to {moved} without them)")
    return replace(last, left_out_px=boxes), note


def _row_corrected_map(da: xr.DataArray, detection: LineDetection | None) -> xr.DataArray:
    """The map the lines are measured on: the detector's row-corrected map when row offsets are significant.

    Row offsets (1/f noise or switching of the sensor between sweeps) are steps
    along y common to a whole row; the change points that re-measure the dot2
    lines column by column lock onto them (seen: ge-double, SNR 10, 1/f rows of
    3 σ: every dot2 line found horizontal, |ΔM21| = 0.34). The correction itself
    bends the profiles where lines take much of a row, so it is used only when
    :func:`stabtool.preprocess.background.row_offset_test` finds offsets beyond
    the white noise; otherwise (and without a processed map) ``da`` itself.
    """
    from .preprocess.background import row_offset_test

    if detection is None:
        return da
    proc = detection.processed
    if proc is None or np.shape(proc) != da.shape or not np.isfinite(detection.noise_level):
        return da
    if not row_offset_test(np.asarray(da.values, float), detection.noise_level).significant:
        return da
    return da.copy(data=np.asarray(proc, float))


def _jumps_as_lattice(da: xr.DataArray, detection: LineDetection) -> tuple[LineDetection, xr.DataArray, DiagramFit] | None:
    """Detection, map and fit of ``da`` with no charge jumps, when that gives a consistent charge cell.

    Called when the detector found charge jumps and the lines then gave no
    cell. A dot2 line nearly parallel to the rows moves every dot1 line by
    the mutual shift δ1 within a few rows, which the jump test cannot tell
    from a shift of the whole pattern; without the jumps' rows left out the
    lines may fit one lattice (``ok`` and ``labels_consistent``), which a
    real jump would spoil. None otherwise.
    """
    from .lines import detect_lines

    again = detect_lines(da, detect_jumps=False)
    fit_map = _row_corrected_map(da, again)
    fit = fit_diagram(again, data=fit_map)
    if not (fit.ok and fit.labels_consistent):
        return None
    return again, fit_map, fit


def _detected_again(
    da: xr.DataArray, detection: LineDetection, **options: Any
) -> tuple[LineDetection, xr.DataArray, DiagramFit, int] | None:
    """Detection, fit map, fit and the number of dot lines gained by a detection with ``options``, or None.

    The map is detected again with the detector ``options``; None unless
    that detection has more dot lines than ``detection`` and its lines give
    a charge cell.
    """
    from .lines import detect_lines

    again = detect_lines(da, **options)
    n_dot = [len(d.family(f)) for d in (detection, again) for f in ("dot1", "dot2")]
    n_more = n_dot[2] + n_dot[3] - n_dot[0] - n_dot[1]
    if n_more <= 0:
        return None
    fit_map = _row_corrected_map(da, again)
    fit = fit_diagram(again, data=fit_map)
    if not fit.ok:
        return None
    return again, fit_map, fit, n_more


def _with_faded_lines(
    da: xr.DataArray, detection: LineDetection
) -> tuple[LineDetection, xr.DataArray, DiagramFit, int] | None:
    """:func:`_detected_again` with weak lines kept (:data:`FADED_LINE_RATIO`, :data:`FADED_CONTRAST_FLOOR`)."""
    return _detected_again(da, detection, weak_line_ratio=FADED_LINE_RATIO, contrast_floor=FADED_CONTRAST_FLOOR)


def _with_short_segments(
    da: xr.DataArray, detection: LineDetection
) -> tuple[LineDetection, xr.DataArray, DiagramFit, int] | None:
    """:func:`_detected_again` with segments down to :data:`SHORT_SEGMENT_PX` pixels (small charge cells).

    None without a try when the edges of ``detection`` are broader than
    half that length or their width was not measured, and on maps that are
    not clean (``detection.snr`` below :data:`CLEAN_SNR`).
    """
    if not (detection.edge_width_px <= SHORT_SEGMENT_PX / 2 and detection.snr >= CLEAN_SNR):
        return None
    return _detected_again(da, detection, min_length_px=SHORT_SEGMENT_PX)


def _default_detector(da: xr.DataArray) -> LineDetection:
    from . import lines as _lines

    for name in ("detect_lines", "detect", "find_lines"):
        func = getattr(_lines, name, None)
        if callable(func):
            return func(da)
    raise RuntimeError("no line detector available in stabtool.lines")


class Analyzer:
    """Configured analysis pipeline; call it on a map.

    Parameters
    ----------
    electron_temperature_K : float, optional
        Electron temperature; the lever arms follow from the thermal widths
        of the lines, ``α_ii = k_B T_e / (e w_i)``.
    lever_arm : float or (float, float), optional
        Known lever arm α11 (and α22) of the dots' plunger gates (x, y), eV/V.
        With only α11, α22 follows from α11/α22 = δ2/δ1.
    lever_arm_file : path, optional
        Calibration file read by :func:`stabtool.calibrate.read_lever_arm_file`.
    refine : bool
        Fit the constant-interaction model to the map itself after the line
        fit (checks the model, tightens the estimates).
    bias_mV : float, optional
        Source–drain bias of a double-dot transport map: the bias triangles
        give the lever arms (energy reference "bias_triangles",
        :func:`stabtool.fit.bias_triangles.fit_bias_triangles`).
    mode : {"auto", "stability", "diamonds"}
        "diamonds" analyses a Coulomb-diamond map (gate on x, bias on y;
        :mod:`stabtool.fit.diamond_map`); "auto" does so when the y axis is
        named like a bias (contains "bias", "sd" or "vsd", unit a voltage),
        otherwise the map is a charge-stability diagram.
    tunnel_coupling : bool
        Fit the interdot tunnel coupling on the polarisation lines when T_e
        and the lever arms are known (:mod:`stabtool.fit.tunnel`).
    detector : callable, optional
        ``detector(da) -> LineDetection``; default: the line detector of
        :mod:`stabtool.lines`.
    readout : {"auto", "charge", "derivative-x", "derivative-y"}
        What the map measures. "auto" takes a map whose lines are peaks for
        a derivative read-out (a lock-in on a gate) and analyses its sum
        (:meth:`_as_derivative_map`); "charge" never does; "derivative-x"
        and "derivative-y" say the map is the derivative along that gate and
        analyse its sum along that axis directly.

    Examples
    --------
    >>> an = Analyzer(electron_temperature_K=0.1)          # doctest: +SKIP
    >>> res = an(da); res.to_json()["virtual_gate_matrix"]  # doctest: +SKIP
    """

    def __init__(
        self,
        *,
        electron_temperature_K: float | None = None,
        lever_arm: float | Sequence[float] | None = None,
        lever_arm_file: str | os.PathLike[str] | None = None,
        refine: bool = True,
        tunnel_coupling: bool = True,
        bias_mV: float | None = None,
        mode: str = "auto",
        detector: Callable[[xr.DataArray], LineDetection] | None = None,
        readout: str = "auto",
    ) -> None:
        if mode not in ("auto", "stability", "diamonds"):
            raise InputError("mode", f"expected 'auto', 'stability' or 'diamonds', got {mode!r}")
        if readout not in READOUTS:
            raise InputError("readout", f"expected one of {', '.join(READOUTS)}, got {readout!r}")
        if bias_mV is not None:
            b = float(bias_mV)
            if not (np.isfinite(b) and b != 0):
                raise InputError("bias_mV", f"expected a non-zero source-drain bias in mV, got {bias_mV!r}")
            bias_mV = b
        if electron_temperature_K is not None:
            t = float(electron_temperature_K)
            if not (np.isfinite(t) and t > 0):
                raise InputError("electron_temperature_K", f"expected a positive temperature in K, got {electron_temperature_K!r}")
            electron_temperature_K = t
        if lever_arm is not None:
            raw: tuple[Any, ...] = (lever_arm,) if np.isscalar(lever_arm) else tuple(lever_arm)  # type: ignore[arg-type]
            try:
                vals = tuple(float(v) for v in raw)
            except (TypeError, ValueError):
                vals = ()
            if not (1 <= len(vals) <= 2) or not all(np.isfinite(v) and 0 < v <= 1 for v in vals):
                raise InputError("lever_arm", f"expected one or two lever arms in (0, 1] eV/V, got {lever_arm!r}")
            lever_arm = vals
        self.electron_temperature_K = electron_temperature_K
        self.lever_arm = lever_arm
        self.lever_arm_file = None if lever_arm_file is None else os.fspath(lever_arm_file)
        self.refine = bool(refine)
        self.tunnel_coupling = bool(tunnel_coupling)
        self.bias_mV = bias_mV
        self.mode = mode
        self.detector = detector
        self.readout = readout

    def __repr__(self) -> str:
        det = "default" if self.detector is None else getattr(self.detector, "__name__", repr(self.detector))
        return (
            f"Analyzer(electron_temperature_K={self.electron_temperature_K!r}, lever_arm={self.lever_arm!r}, "
            f"lever_arm_file={self.lever_arm_file!r}, refine={self.refine!r}, "
            f"tunnel_coupling={self.tunnel_coupling!r}, bias_mV={self.bias_mV!r}, mode={self.mode!r}, "
            f"detector={det}, readout={self.readout!r})"
        )

    @staticmethod
    def _states(da: xr.DataArray, fit: DiagramFit, detection: LineDetection | None, x: np.ndarray,
                y: np.ndarray, *, allow_absolute: bool = True,
                min_confidence: float = MIN_ABSOLUTE_CONFIDENCE) -> ChargeStates:
        lat = fit.lattice
        assert lat is not None
        lowest = _lowest_lines(lat)
        snr = detection.snr if detection is not None and np.isfinite(detection.snr) else 10.0
        return label_charge_states(
            x, y, fit.vg_matrix, addition_V=fit.addition_V, mutual_V=np.maximum(fit.mutual_V, 0.0),
            offsets_V=fit.offsets_V, lowest_line=lowest, snr=snr, valid=np.isfinite(np.asarray(da.values)),
            allow_absolute=allow_absolute and fit.labels_consistent, min_confidence=min_confidence,
        )

    def analyze_file(self, path: str | os.PathLike[str], **load_kwargs: Any) -> AnalysisResult | DiamondAnalysisResult:
        """Load ``path`` with :func:`stabtool.io.load` and analyse it."""
        from .io import load

        return self(load(path, **load_kwargs))

    def __call__(self, da: xr.DataArray) -> AnalysisResult | DiamondAnalysisResult:
        da = without_infinities(da)
        with warnings.catch_warnings():
            # the NaN fraction: said by the loader and in the detector's quality warnings
            warnings.simplefilter("ignore", PartialSweepWarning)
            validate_map(da)
        from .fit.diamond_map import analyze_diamond_map, is_bias_axis

        if self.mode == "diamonds" or (self.mode == "auto" and is_bias_axis(da)):
            diamonds = analyze_diamond_map(da)
            _warn_if_doubtful(da, diamonds.quality)
            return diamonds
        prepared = self._prepared(da)
        if self.readout.startswith("derivative-"):
            axis = self.readout[-1]
            res = self._summed(prepared, (axis,), f"the map is a derivative along {axis} (as given)")
        else:
            res = self._stability(prepared)
        if self.detector is None and self.readout == "auto":
            try:
                res = self._as_derivative_map(prepared, res)
            except Exception as exc:  # the ordinary analysis stands; the check's failure is a note
                if isinstance(exc, InputError):
                    raise
                res = replace(res, quality=res.quality.with_warning(
                    f"the check for a derivative read-out failed ({type(exc).__name__}: {exc})", doubtful=False))
        _warn_if_doubtful(da, res.quality)
        return res

    def _as_derivative_map(self, prepared: _Prepared, res: AnalysisResult) -> AnalysisResult:
        """The analysis of the map's integral when its lines are peaks, not steps.

        A lock-in on a gate reads the sensor's derivative (lines as peaks or
        dips, :mod:`stabtool.lines.profile_shape`); summed along that gate's
        axis (:func:`stabtool.preprocess.integral.integral_along`) it is a
        step map again. The map is summed along x and along y and the better
        analysis is kept (:func:`_integral_rank`): summed along the wrong
        axis the steps are still where the ridges are, but one family's are
        weak (their height goes with the lines' slope). A lattice that
        the step analysis found on the peaks themselves (on their flanks) is
        not kept; a transport map's lattice of triple points is, unless the
        integral gives an ok result.
        """
        from .lines.profile_shape import line_shape

        if res.detection is None:
            return res
        shape = line_shape(res.detection)
        if not shape.peaks:
            return res
        what = (f"the lines are peaks, not steps (level ratio {shape.ratio:.3f}, {shape.n_lines} lines; a lock-in's "
                "derivative?)")
        return self._summed(prepared, (shape.axis, "y" if shape.axis == "x" else "x"), what, first=res)

    def _summed(self, prepared: _Prepared, axes: tuple[str, ...], what: str,
                first: AnalysisResult | None = None) -> AnalysisResult:
        """The analysis of the map's sums along ``axes`` (the better one), with the doubts every sum gets.

        ``first`` is the ordinary analysis of a map found to be a derivative
        map: it stands, with a note, when no sum gives a charge lattice.
        """
        lines_only = copy.copy(self)
        lines_only.refine = INTEGRAL_MODEL_FIT
        # both sums, each once: a run analyses one and measures a family's slope across the lines on the
        # other (fit.model.with_slope_across)
        t_sums = time.perf_counter()
        sums = {a: integral_along(prepared.corrected, a) for a in ("x", "y")}
        t_sums = time.perf_counter() - t_sums
        # the axis given (or the one the peaks' areas point to) first, and the better analysis wins
        runs = [lines_only._stability(prepared, integrate=a, sums=sums) for a in axes]
        k = min(range(len(runs)), key=lambda i: _integral_rank(runs[i], i, axes[i]))
        again, axis = runs[k], axes[k]
        # (each run's total holds the one preparation of the map: counted once)
        spent = t_sums + sum(r.timings_s.get("total", 0.0) - prepared.seconds for r in runs)
        timings = {**again.timings_s,
                   "total": (first.timings_s.get("total", 0.0) if first else prepared.seconds) + spent}
        if first is not None:
            transport = first.transport is not None and first.transport.consistent
            if not again.diagram.ok or (transport and not again.quality.ok):
                why = _sums_failed_reason([r.diagram for r in runs], axes, again.diagram.ok)
                # a lattice of the step analysis on peaks rests on the peaks' flanks (each line twice)
                return replace(first, quality=first.quality.with_warning(
                    f"{what}; their integrals along x and y {why}", doubtful=first.diagram.ok and not transport))
        q = again.quality.with_warning(f"{what}: analysed its integral along {axis}; widths include the "
                                       "modulation", doubtful=False)
        along, m_along = _along_sum(again.diagram, axis)
        if abs(m_along) < STREAK_M:
            # the summed noise differs from one row (column) to the next, and its streaks run along
            # the sum: on the probe's lock-in maps the "dot2" family of an x-sum was such streaks on
            # 25 of 41 maps (slope within 0.03 of 0, M21 off by 0.1–2.8 at tiny stated errors)
            fam = "dot2" if axis == "x" else "dot1"
            q = q.with_warning(f"{fam} lines run along the sum ({axis}): M{along[0] + 1}{along[1] + 1} = "
                               f"{m_along:.3g}; streaks of the summed noise look the same")
        # the line fits take the sum's noise for white, but it is a random walk along the sum: the
        # stated errors were too small (probe lock-in maps on the x gate: rms pull ≈ 2, one map ok with
        # |ΔM| = 0.0085 at a stated 0.0020; summed along y, M21 off by 3.6 stated σ). The slope of the
        # family measured along the sum now counts the walk (fit.model.with_walk_errors; on the probe it
        # errs on the safe side: median |pull| 0.4), or is measured on the sum along the other axis
        # (fit.model.with_slope_across); the line positions, and so ΔV, δ and Cdg, still leave it out
        q = q.with_warning(f"{SUM_DOUBT} {axis}: the line positions' stated errors leave out the summed noise's "
                           "random walk (ΔV, δ and Cdg; the slopes' errors count it)")
        return replace(again, timings_s=timings, quality=q)

    @staticmethod
    def _prepared(da: xr.DataArray) -> _Prepared:
        """The map brought to the scale the pipeline was validated on and read-out corrected, with the notes.

        Made once per map: a derivative map's sums are taken of the same corrected map.
        """
        t0 = time.perf_counter()
        q = Quality()
        units_doubt = implausible_gate_voltages(da)
        if units_doubt is not None:
            q = q.with_warning(units_doubt)  # (mV read as V: every capacitance 1000× off)
        measured = da  # (the result holds the map as measured; the analysis reads it corrected)
        gain = signal_gain(da)
        if gain != 1.0:
            # a signal in A (1e-10) or in counts (1e5): brought to the order-one scale the pipeline was
            # validated on (the detector, fitter and model fit carry absolute damping terms and floors)
            da = da.copy(data=np.asarray(da.values, float) * gain)
            q = q.with_warning(f"signal multiplied by 2^{int(np.log2(gain))} for the analysis (its 5–95 % range, "
                               f"{signal_range(measured):.3g} {measured.attrs.get('units', 'a.u.')}, is far from "
                               "order one); signal values in these notes are in that unit", doubtful=False)
        da, lag_V, tau_V, q = corrected_readout(da, q)
        from .preprocess.background import correct_column_offsets, slow_axis_is_x

        values = np.asarray(da.values, float)
        if slow_axis_is_x(values):
            # the analysis corrects offsets per row (y slow); a sweep stepped along x carries them per column
            da = da.copy(data=correct_column_offsets(values))
            q = q.with_warning(f"offsets common to whole columns beyond the white noise: x ({x_gate(da)}) looks like "
                               "the slow axis of the sweep; an offset per column was removed before the analysis "
                               "(charge jumps are looked for between rows only)", doubtful=False)
        return _Prepared(measured=measured, corrected=da, lag_V=lag_V, quality=q,
                         seconds=time.perf_counter() - t0, tau_V=tau_V)

    def _stability(self, prepared: _Prepared, *, integrate: str | None = None,
                   sums: dict[str, xr.DataArray] | None = None) -> AnalysisResult:
        """The analysis of a charge-stability map (``integrate``: of its corrected map's integral along that axis).

        ``sums``: the corrected map's integrals along "x" and "y" (:func:`integral_along`), needed with
        ``integrate``.
        """
        timings: dict[str, float] = {}
        t0 = time.perf_counter() - prepared.seconds  # (the preparation counts as part of the detection)
        detector = self.detector or _default_detector
        measured, da, lag_V, q = prepared.measured, prepared.corrected, prepared.lag_V, prepared.quality
        if integrate is not None:
            assert sums is not None
            da = sums[integrate]
        detection: LineDetection | None
        try:
            detection = detector(da)
        except Exception as exc:
            if isinstance(exc, InputError):
                raise
            detection = None
            q = q.with_warning(f"line detection failed: {type(exc).__name__}: {exc}")
        timings["detect"] = time.perf_counter() - t0
        t1 = time.perf_counter()
        fit_map = _row_corrected_map(da, detection)
        # a sum's family measured along it carries the summed walk; the sum along the other axis measures its
        # slope across the lines (fit.model.with_slope_across)
        across = sums["y" if integrate == "x" else "x"] if integrate and sums is not None else None
        fit = fit_diagram(detection, data=fit_map, across=across) if detection is not None else None
        if fit is not None and not fit.ok and detection is not None and detection.jumps and self.detector is None:
            # the pattern shifts the detector took for charge jumps may be the honeycomb's own: dot1
            # lines step by δ1 where they cross a dot2 line that runs along the rows
            lattice = _jumps_as_lattice(da, detection)
            if lattice is not None:
                rows = ", ".join(str(j.row) for j in detection.jumps)
                detection, fit_map, fit = lattice
                q = q.with_warning(f"the pattern shifts at row(s) {rows} are the charge lattice's (dot1 lines "
                                   "stepping where dot2 lines run along the rows), not charge jumps", doubtful=False)
        # further detections while the lines give no charge cell (a detector given by the caller is used as it is)
        faded_kept = (f"steps down to {FADED_LINE_RATIO:g} of the median and edges down to {FADED_CONTRAST_FLOOR:g} "
                      "of the strong ones (a sensor whose sensitivity fades across the map)")
        short_kept = f"segments down to {SHORT_SEGMENT_PX:g} px (charge cells a few pixels across)"
        retries = ((_with_faded_lines, faded_kept), (_with_short_segments, short_kept))
        for detect_again, kept in retries:
            if fit is None or fit.ok or detection is None or self.detector is not None or integrate is not None:
                break
            found = detect_again(da, detection)
            if found is not None:
                detection, fit_map, fit, n_more = found
                q = q.with_warning(f"{n_more} more dot line(s) found with {kept}: without them the lines gave no "
                                   "charge cell", doubtful=False)
        if fit_map is not da:
            q = q.with_warning("row offsets (slow-axis noise) beyond the white noise: lines measured on the "
                               "row-corrected map", doubtful=False)
        if detection is not None:
            assert fit is not None
            # the lines are re-checked and re-measured on the map by the fitter: the
            # detector's own doubts are kept as notes when the fit succeeded
            for w in detection.quality.warnings:
                # lines bending towards the triple points (strong tunnel coupling) bias the
                # common-slope re-measurement too (seen: |ΔM| = 0.018 at t = 60 µeV, GaAs preset)
                bend = "bend" in w
                if bend and fit.ok and w.split(" ", 1)[0] in fit.staircase_families:
                    # the "bending" is the staircase of band offsets that the fitter found and
                    # re-measured piecewise (one offset per charge band)
                    q = q.with_warning(f"detector: {w} [explained by a staircase of band offsets, "
                                       "re-measured piecewise]", doubtful=False)
                    continue
                q = q.with_warning(f"detector: {w}", doubtful=not fit.ok or bend)
            if not detection.quality.ok and not fit.ok:
                q = q.with_warning("line detection doubtful")
        else:
            from .lines.result import LineDetection as _LD  # empty detection

            fit = fit_diagram(_LD(axes=map_axes(da), families={}, unassigned=(), jumps=(),
                                  excluded_rows=np.zeros(0, int), noise_level=np.nan, snr=np.nan, quality=Quality()))
        states = None
        refinement = None
        adopted = False
        tunnel_modelled = False  # the adopted model fit includes the interdot tunnel coupling
        x = np.asarray(da[da.dims[-1]].values, float)
        y = np.asarray(da[da.dims[0]].values, float)
        # the labelling may count electrons from an empty corner (see below); not on a derivative map's
        # integral, whose summed noise may hide the lowest line
        allow = integrate is None
        if fit.ok and fit.lattice is not None:
            # the model fit starts from the lattice's own labelling: an empty corner helps it even
            # where the reported labels stay relative for a low SNR (MIN_ABSOLUTE_CONFIDENCE)
            states = self._states(da, fit, detection, x, y, min_confidence=0.0)
            if self.refine:
                t2 = time.perf_counter()
                from .fit.refine import adopt_refinement, adopt_tunnel_refinement, refine_model

                width_guess = _median_dot1_width(fit)
                refinement = refine_model(fit_map, fit, charge_states=states, width_guess_V=width_guess)
                refinement, fit_map, switch_note = _without_switching(fit_map, fit, states, refinement,
                                                                      width_guess_V=width_guess)
                adoption = adopt_refinement(fit, refinement)
                # (not after sensor switching was taken out: that map stays doubtful, and its residue is
                # what the structure test sees)
                if not switch_note and _tunnel_evidence(q, refinement, adoption):
                    # dot lines pushed apart near the triple points: refit with the tunnel coupling
                    with_t = _tunnel_refinement(fit_map, fit, states, refinement, width_guess_V=width_guess)
                    tunnel_adoption = adopt_tunnel_refinement(fit, with_t, plain=refinement)
                    if tunnel_adoption.adopted:
                        refinement, adoption = with_t, tunnel_adoption
                        tunnel_modelled = True
                        bends = [w for w in q.warnings if _is_bend_doubt(w)]
                        q = q.without(lambda w: w in bends)
                        for w in bends:
                            q = q.with_warning(f"{w} [modelled: interdot tunnel coupling fitted to the map]",
                                               doubtful=False)
                local_note = ""
                # (only where nothing before makes the map doubtful: elsewhere the refit cannot make it ok,
                # and on the held-out probe the fit without the area moved M further from the truth on about
                # as many maps as it brought closer: 10 and 11 of 1276 left or entered the bounds, all doubtful)
                if LOCAL_STRUCTURE_REFIT and q.ok and not switch_note and not tunnel_modelled:
                    refinement, local_note = _without_local_structure(fit_map, fit, states, refinement,
                                                                      width_guess_V=width_guess)
                    if local_note:
                        adoption = adopt_refinement(fit, refinement)
                q = q.merge(refinement.quality).merge(adoption.quality)
                if local_note:
                    q = q.with_warning(local_note, doubtful=False)
                if switch_note:
                    # doubtful all the same: on the generator's telegraph maps (sensor switching only) the
                    # refit without the offsets was within the bounds on 25 of 48 maps (19 before), but one
                    # 192² map kept |ΔM21| = 0.006 at a stated 0.0015 (0.0002 without the switching)
                    q = q.with_warning(switch_note, doubtful=True)
                adopted = adoption.adopted
                # an empty corner counts lines from the lowest label: not claimed when the model fit
                # could not settle on the map, does not describe it or disagrees with the lines (held-out
                # maps with an empty corner: the wrong absolute labellings came with a lattice doubt, an
                # unconverged fit, residual structure or a disagreement)
                # (nor where the sensor is nearly blind in part of the map: probe seed 285, a peak-shaped
                # sensor near its maximum hid the first dot-1 line and the dot was called empty there)
                # (nor when an area of sharp residual structure was left out: it may hide a missed line)
                allow = (refinement.converged and not adoption.disagreed and not refinement.weak_steps
                         and not (refinement.structure is not None and refinement.structure.flagged)
                         and not local_note)
                # (not adopted: the line-based fit, with the errors widened where the refinement disagreed)
                fit = adoption.fit
                timings["refine"] = time.perf_counter() - t2
        if fit.ok:
            from .fit.uncertainty import error_verdict

            fit = replace(fit, quality=error_verdict(fit))  # error checks on the final errors
        # lines of another dot: read on the final slopes and lines used, so that it changes the verdict
        # and the labelling only (none of 1340 held-out double-dot maps that were ok turned doubtful with it)
        # (not on a derivative map's sum: streaks of its summed noise run along the sum, their short
        # segments' slopes scattered by a few degrees, and such a map is doubtful anyway (see _summed);
        # on probe lock-in seed 14 nine of them were named at −0.044 ± 0.006)
        stray = find_stray_sets(detection, fit) if detection is not None and integrate is None else ()
        if states is not None:
            # the reported labels: absolute only from a sound fit, a lattice known to a fraction of a
            # cell (ABSOLUTE_MAX_CDG_REL) and a confidence above MIN_ABSOLUTE_CONFIDENCE, and with no
            # line of a slope of its own (an empty corner means no line below the lowest ones; a stray
            # line may be one of them, set aside: held-out hot map seed 35 had its first dot-1 line,
            # 9 % steeper than the family near the empty corner, named another dot's, and 17 regions
            # labelled one electron short)
            too_uncertain = bool(fit.ok and _lattice_too_uncertain(fit))
            weak = any(a and c <= MIN_ABSOLUTE_CONFIDENCE for a, c in zip(states.absolute, states.confidence))
            allow = allow and not stray
            if adopted or (states.absolute != (False, False) and (not allow or too_uncertain or weak)):
                states = self._states(da, fit, detection, x, y, allow_absolute=allow and not too_uncertain)
            blind = _blind_where_empty(states, detection, x, y, np.isfinite(np.asarray(da.values)))
            if blind is not None:
                states = self._states(da, fit, detection, x, y, allow_absolute=False)
                q = q.with_warning(blind, doubtful=False)
            elif states.withheld and stray:
                q = q.with_warning("the map reaches below the lowest lines far enough to call the dots empty, but "
                                   "some lines have a slope of their own (another dot's, or a line of these dots "
                                   "set aside): charge states are relative", doubtful=False)
            elif states.withheld and too_uncertain:
                q = q.with_warning("the map reaches below the lowest lines far enough to call the dots empty, "
                                   "but the charge lattice is too uncertain (a gate capacitance known to worse "
                                   f"than {100 * ABSOLUTE_MAX_CDG_REL:.0f} %): charge states are relative",
                                   doubtful=False)
            elif states.withheld:
                q = q.with_warning("the map reaches below the lowest lines far enough to call the dots empty, but "
                                   "the line labelling is doubtful or, at this SNR, a line near the low corner "
                                   "may have been missed: charge states are relative", doubtful=False)
        for st in stray:
            q = q.with_warning(st.warning())
        q = q.merge(fit.quality)
        # the detector's SNR (edge contrast) runs about half the step-height SNR of the refinement
        # (median step / noise std, the generator's definition): the larger one decides
        snrs = [detection.snr if detection is not None else np.nan,
                refinement.snr if refinement is not None and refinement.ok else np.nan]
        snr_clean = float(np.nanmax(snrs)) if np.any(np.isfinite(snrs)) else np.nan
        clean = bool(np.isfinite(snr_clean) and snr_clean >= CLEAN_SNR_MARGIN * CLEAN_SNR)
        # the largest stated error of M an ok map may have: a clean map promises |ΔM| ≤ 0.005, which
        # must be at least CLEAN_VG_SIGMAS (2) stated σ; a noisy one 0.02 (the fitter's MAX_VG_ERROR = 0.02/3)
        vg_limit = CLEAN_VG_BOUND / CLEAN_VG_SIGMAS if clean else MAX_VG_ERROR
        sm = float(np.nanmax(fit.vg_matrix_error)) if fit.ok else np.nan
        if clean and sm > vg_limit:  # sm is NaN without a fit
            q = q.with_warning(
                f"virtual-gate matrix error {sm:.4f} is above {vg_limit:.4f}: an ok clean map (SNR "
                f"{snr_clean:.1f}) needs its {CLEAN_VG_BOUND} goal to be {CLEAN_VG_SIGMAS:g} stated σ"
            )
        t3 = time.perf_counter()
        triangles = None
        if self.bias_mV is not None:
            from .fit.bias_triangles import fit_bias_triangles

            triangles = fit_bias_triangles(da, bias_V=1e-3 * self.bias_mV,
                                           electron_temperature_K=self.electron_temperature_K)
        scale = _scale(fit_map, fit, temperature_K=self.electron_temperature_K, lever_arm=self.lever_arm,
                       lever_arm_file=self.lever_arm_file, triangles=triangles, fast_axis_lag_V=lag_V,
                       fast_axis_tau_V=prepared.tau_V)
        if (self.electron_temperature_K is not None and refinement is not None and refinement.ok
                and refinement.width_resolved):
            # cross-check only: α11 = k_B T_e/(e w1) from the width fitted to the whole map
            w1, sw1 = refinement.params["width_V1"], refinement.errors["width_V1"]
            a11 = lever_arm_from_width(w1, self.electron_temperature_K)
            scale = replace(scale, details={**scale.details, "alpha11_from_refined_width": a11,
                                            "alpha11_from_refined_width_error": a11 * sw1 / w1})
        q = q.merge(scale.quality)
        if np.any(np.isfinite(scale.alpha_diag)):
            # a dot's lever arms cannot add up to more than 1 eV/V (an energy reference in the wrong unit)
            from .fit.scale_verdict import impossible_lever_arms

            alpha, alpha_err = (lever_arm_matrix(scale, fit) if fit.ok
                                else (scale.alpha_diag, scale.alpha_diag_error))
            # (first among the warnings: it makes every energy in the result meaningless)
            q = impossible_lever_arms(alpha, alpha_err, reference=scale.reference,
                                      temperature_K=self.electron_temperature_K).merge(q)
        if fit.ok and np.any(np.isfinite(scale.alpha_diag)):
            # an ok map promises α and E_C within 5 %: their own stated errors must allow it
            from .fit.scale_verdict import scale_error_verdict

            alpha, alpha_err = lever_arm_matrix(scale, fit)
            ec, ec_err = charging_energies(scale, fit)
            q = q.merge(scale_error_verdict(alpha, alpha_err, ec, ec_err))
        timings["scale"] = time.perf_counter() - t3
        coupling = None
        if fit.ok and fit.mutual_resolved:
            from .fit.tunnel import BIAS_PER_T_OVER_ECM, coupling_to_mutual_ratio

            w_med = _median_dot1_width(fit)
            w_th = w_med if w_med is not None else 0.25 * abs(float(np.median(np.diff(x))))
            w_cuts = scale.details.get("width_dot1_V", np.nan)
            if np.isfinite(w_cuts) and w_cuts > 0:
                # the Fermi width of the stacked cuts across the dot1 lines (the T_e reference)
                w_th = float(w_cuts)
            if refinement is not None and refinement.ok and refinement.width_resolved:
                # the thermal width fitted to the whole map (every dot line at once) beats single lines
                w_th = float(refinement.params["width_V1"])
            coupling = coupling_to_mutual_ratio(da, fit, thermal_width_V=w_th)
            bias = coupling.expected_vg_bias
            # the tunnel coupling pushes the dot lines apart near the triple points and biases M by
            # ≈ BIAS_PER_T_OVER_ECM · t/E_Cm, which is not in the statistical error of M: with the
            # four-state interdot fit the central value tracks the truth (seen: 0.062 for a true 0.062,
            # GaAs t = 20 µeV, where a 3σ-low rule let |ΔM| = 0.0072 pass as ok)
            if tunnel_modelled:
                # the model fit that set M has the coupling in it: the bias is not left in M
                bias = float("nan")
            if np.isfinite(bias) and bias > MAX_TUNNEL_VG_BIAS:
                q = q.with_warning(
                    f"broad interdot lines (t/E_Cm ≈ {coupling.value:.3f} ± {coupling.error:.3f}): the dot lines "
                    f"are pushed apart near the triple points, virtual gates biased by ≈ {bias:.4f}"
                )
            # only a resolved coupling counts against M: an upper limit mostly says that the interdot
            # line is faint (often invisible to a charge sensor), not that the lines are pushed apart
            if np.isfinite(bias) and np.isfinite(sm):
                total = float(np.hypot(sm, bias))
                if sm <= vg_limit < total:
                    q = q.with_warning(
                        f"virtual-gate matrix error {sm:.4f} with the possible tunnel-coupling bias "
                        f"{bias:.4f} is {total:.4f}, more than the {vg_limit:.4g} an ok "
                        f"{'clean ' if clean else ''}map allows"
                    )
            # 2σ bound on t/E_Cm: value + 2σ when resolved, else the upper limit
            t_high = (coupling.value + 2 * coupling.error) if np.isfinite(bias) else coupling.upper_limit
            high = BIAS_PER_T_OVER_ECM * t_high if np.isfinite(t_high) else np.nan
            bends = [w for w in q.warnings if _is_bend_doubt(w)]
            if bends and adopted and np.isfinite(high) and high <= MAX_TUNNEL_VG_BIAS:
                # the CI model without tunnel coupling describes the map, its M agrees with the lines and
                # the interdot width (with the fitted thermal width) bounds the bias below the limit:
                # the bending is thermal rounding of the triple points, kept as a note
                q = q.without(lambda w: w in bends)
                for w in bends:
                    q = q.with_warning(f"{w} [thermal rounding: t/E_Cm ≤ {t_high:.3f} "
                                       "and the model fit agrees]", doubtful=False)
        timings["model"] = time.perf_counter() - t1 - timings.get("refine", 0.0) - timings["scale"]
        tunnel = None
        if (self.tunnel_coupling and self.electron_temperature_K is not None and fit.ok
                and np.all(np.isfinite(scale.alpha_diag))):
            t4 = time.perf_counter()
            from .fit.tunnel import tunnel_coupling_from_map

            alpha = scale.alpha_diag[:, None] * fit.vg_matrix
            vg_err = fit.vg_matrix_error.copy()
            if coupling is not None and np.isfinite(coupling.expected_vg_bias) and not tunnel_modelled:
                # the tunnel-coupling bias of M (not in its stated error) moves the detuning scale too
                off = ~np.eye(2, dtype=bool)
                vg_err[off] = np.hypot(vg_err[off], coupling.expected_vg_bias)
            alpha_err = np.sqrt((scale.alpha_diag_error[:, None] * fit.vg_matrix) ** 2
                                + (scale.alpha_diag[:, None] * vg_err) ** 2)
            tunnel = tunnel_coupling_from_map(da, fit, lever_arm=alpha, lever_arm_error=alpha_err,
                                              electron_temperature_K=self.electron_temperature_K)
            q = q.merge(tunnel.quality)
            timings["tunnel"] = time.perf_counter() - t4
        transport = None
        if not fit.ok:  # no usable dot lines (a transport map shows the triple points only)
            from .fit.transport_lattice import find_transport_spots, fit_transport_lattice

            spots = find_transport_spots(da)
            if spots.sparse:
                # a transport map (current only at the triple points): no dot lines to fit, but the
                # lattice of triple points gives Cdg; the line failures are kept as notes
                t5 = time.perf_counter()
                # bias triangles at the given bias fix the dot assignment when the lattice alone cannot
                alpha_triangles = np.asarray(triangles.lever_arm, float) if triangles else None
                transport = fit_transport_lattice(da, spots=spots, lever_arm=alpha_triangles)
                if transport.consistent:
                    # the lines the failed line fit saw are no dot lines: their slopes give no virtual gates
                    nan22 = np.full((2, 2), np.nan)
                    fit = replace(fit, vg_matrix=nan22, vg_matrix_error=nan22.copy())
                    # the energy reference keeps its own verdict; the failures of the line fit become notes
                    own = set(scale.quality.warnings)
                    lines_q = q
                    q = q.without(lambda w: w not in own).merge(transport.quality).with_warning(
                        "transport map: gate capacitances from the lattice of triple points; the other "
                        "quantities need dot lines or an energy reference", doubtful=not transport)
                    for w in transport.pair_quality.warnings if transport.vg_matrix is not None else ():
                        q = q.with_warning(f"virtual gates not reported: {w}", doubtful=False)
                    for w in lines_q.warnings:
                        if w not in own and w != VG_FROM_SLOPES_NOTE:  # (those virtual gates were dropped)
                            q = q.with_warning(f"lines: {w}", doubtful=False)
                else:  # the line fit's failures stand; the spots say why they are no lattice either
                    why = transport.quality.doubts_first()
                    q = q.with_warning("the map looks like a transport map, but its current spots form no "
                                       "consistent lattice of triple points" + (f" ({why[0]})" if why else ""),
                                       doubtful=False)
                timings["transport_lattice"] = time.perf_counter() - t5
        timings["total"] = time.perf_counter() - t0
        return AnalysisResult(data=measured, detection=detection, diagram=fit, scale=scale, charge_states=states,
                              refinement=refinement, quality=q, timings_s=timings, tunnel=tunnel, coupling=coupling,
                              transport=transport, stray_lines=stray)


def analyze(da_or_path: xr.DataArray | str | os.PathLike[str], **kwargs: Any) -> AnalysisResult | DiamondAnalysisResult:
    """Analyse a map (DataArray or file path) with an :class:`Analyzer` built from ``kwargs``."""
    an = Analyzer(**kwargs)
    if isinstance(da_or_path, xr.DataArray):
        return an(da_or_path)
    return an.analyze_file(da_or_path)
