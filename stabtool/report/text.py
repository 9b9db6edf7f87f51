"""Readable text summary of an analysis result."""

from __future__ import annotations

from typing import Any

import numpy as np

from .caution import MATRIX_CAUTION

__all__ = ["fmt_pm", "summary_text"]


def fmt_pm(value: float | None, error: float | None, *, scale: float = 1.0, unit: str = "", digits: int = 4) -> str:
    """``value ± error unit`` (or ``n/a``), values multiplied by ``scale``."""
    if value is None or not np.isfinite(value):
        return "n/a"
    v = value * scale
    if error is None or not np.isfinite(error):
        return f"{v:.{digits}g}{(' ' + unit) if unit else ''}"
    return f"{v:.{digits}g} ± {error * scale:.2g}{(' ' + unit) if unit else ''}"


def _line_count(family: str, used: np.ndarray) -> str:
    """``"dot1 21 (1 set aside)"``: the detected lines of a family and how many the result does not use."""
    aside = int(np.size(used) - np.count_nonzero(used))
    return f"{family} {np.size(used)}" + (f" ({aside} set aside)" if aside else "")


def summary_text(res: Any) -> str:
    """Multi-line summary of an :class:`~stabtool.analysis.AnalysisResult`."""
    j = res.to_json()
    d = res.diagram
    lines = [f"map: {res.data.attrs.get('source', res.data.name or 'map')}  (x = {res.x_gate}, y = {res.y_gate})"]
    lines.append("lines: " + ", ".join(_line_count(fam, used) for fam, used in zip(("dot1", "dot2", "interdot"),
                                                                             res.lines_used)))
    for fam in ("dot1", "dot2", "interdot"):
        lines.append(f"  slope {fam:8s} {fmt_pm(d.slopes[fam], d.slope_errors[fam])}")
    m, me = d.vg_matrix, d.vg_matrix_error
    lines.append("virtual-gate matrix M (V' = M V):")
    for i in range(2):
        lines.append("  [" + ", ".join(fmt_pm(m[i, k], me[i, k]) for k in range(2)) + "]")
    if np.any(np.isfinite(m)):
        lines.append(f"  caution: {MATRIX_CAUTION}")
    lines.append(
        f"addition voltages: dot1 {fmt_pm(d.addition_V[0], d.addition_V_error[0], scale=1e3, unit='mV')}, "
        f"dot2 {fmt_pm(d.addition_V[1], d.addition_V_error[1], scale=1e3, unit='mV')}"
    )
    if d.mutual_resolved:
        lines.append(
            f"mutual shifts: dot1 {fmt_pm(d.mutual_V[0], d.mutual_V_error[0], scale=1e3, unit='mV')}, "
            f"dot2 {fmt_pm(d.mutual_V[1], d.mutual_V_error[1], scale=1e3, unit='mV')}"
        )
    else:
        lines.append("mutual shifts: unresolved")
    c, ce = res.gate_capacitance
    source = " from the triple-point lattice" if res.from_triple_points else ""
    lines.append(f"gate capacitances Cdg (aF){source}, rows dots, columns (x, y):")
    for i in range(2):
        lines.append("  [" + ", ".join(fmt_pm(c[i, k], ce[i, k]) for k in range(2)) + "]")
    if j["lever_arm"] is not None:
        la, lae = res.lever_arm, res.lever_arm_error
        lines.append(f"lever arms (eV/V), reference: {res.scale.reference}:")
        for i in range(2):
            lines.append("  [" + ", ".join(fmt_pm(la[i, k], lae[i, k]) for k in range(2)) + "]")
        ec, ece = res.charging_energy_meV, res.charging_energy_error_meV
        lines.append(
            "charging energies: " + ", ".join(f"{k} {fmt_pm(ec[k], ece[k], unit='meV')}" for k in ("dot1", "dot2", "mutual"))
        )
    elif res.scale.quality.warnings:
        # a reference was given but could not set the scale (e.g. lines too sharp for the temperature)
        lines.append("lever arms, charging energies: n/a (the energy reference given could not set the scale: "
                     "see the quality notes)")
    else:
        lines.append("lever arms, charging energies: n/a (no energy reference; give --electron-temperature or --lever-arm)")
    tc = getattr(res, "tunnel", None)
    if tc is not None:
        if tc:
            lines.append(f"interdot tunnel coupling t (gap 2t): {fmt_pm(tc.value_ueV, tc.error_ueV, unit='µeV')}")
        elif np.isfinite(tc.upper_limit_ueV):
            lines.append(f"interdot tunnel coupling t (gap 2t): < {tc.upper_limit_ueV:.3g} µeV (2σ, not resolved)")
        else:
            lines.append("interdot tunnel coupling: not measured")
    cs = res.charge_states
    if cs is not None:
        kind = ["absolute" if a else "relative" for a in cs.absolute]
        lines.append(f"charge states: N1 {kind[0]}, N2 {kind[1]}" + ("; few-electron regime" if cs.few_electron else "")
                     + ("; empty corner in view, absolute labels withheld (doubtful labelling)" if cs.withheld else ""))
    if res.refinement is not None:
        r = res.refinement
        lines.append(f"model fit to the map: residual / noise = {r.residual_ratio:.2f}")
    lines.append(f"quality: {'ok' if res.quality.ok else 'DOUBTFUL'}"
                 + ("" if res.quality.ok or not res.quality.warnings else " ('!' made it doubtful, '·' notes)"))
    warnings, doubtful = res.quality.doubts_first_flagged()
    flags = doubtful if doubtful is not None else [not res.quality.ok] * len(warnings)
    for w, flag in zip(warnings, flags):
        lines.append(f"  {'!' if flag else '·'} {w}")
    return "\n".join(lines)
