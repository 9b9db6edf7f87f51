"""Write and read an array's virtual-gate matrix (JSON and long-format CSV).

JSON (``kind = "stabtool.virtual_gate_matrix"``): gate order, matrix,
uncertainties, per-element consistency, unmeasured elements, sensor
compensation, the maps used, the quality verdict and the caution. NaN is
written as null. :func:`read_matrix_json` reads it back for conversions.

CSV: one row per element — ``virtual_gate, physical_gate, plunger, value,
uncertainty, n_maps, chi2, dof, birge_ratio, measured``.
"""

from __future__ import annotations

import csv
import json
import math
import os
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..quality import Quality
from .assemble import CAUTION, VirtualGateMatrix, virtual_name
from .measurement import PairMeasurement

__all__ = [
    "KIND",
    "matrix_from_dict",
    "matrix_to_dict",
    "read_matrix_json",
    "write_matrix_csv",
    "write_matrix_json",
]

KIND = "stabtool.virtual_gate_matrix"
FORMAT_VERSION = 1


def _f(v: Any) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def _grid(a: np.ndarray) -> list[list[float | None]]:
    return [[_f(v) for v in row] for row in np.asarray(a, float)]


def _ungrid(rows: Any, shape: tuple[int, int], name: str, src: str) -> np.ndarray:
    try:
        a = np.array([[np.nan if v is None else float(v) for v in row] for row in rows], dtype=float)
    except (TypeError, ValueError):
        raise InputError(src, f"'{name}' is not a table of numbers") from None
    if a.shape != shape:
        raise InputError(src, f"'{name}' has shape {a.shape}, expected {shape}")
    return a


def matrix_to_dict(vgm: VirtualGateMatrix) -> dict[str, Any]:
    """The JSON object of a :class:`VirtualGateMatrix`."""
    inconsistent = []
    for i, p in enumerate(vgm.plungers):
        for j, g in enumerate(vgm.gates):
            if vgm.dof[i, j] > 0:
                inconsistent.append({
                    "virtual_gate": virtual_name(p), "physical_gate": g,
                    "chi2": _f(vgm.chi2[i, j]), "dof": int(vgm.dof[i, j]),
                    "birge_ratio": _f(vgm.birge_ratio[i, j]), "p_value": _f(vgm.p_value[i, j]),
                    "maps": [e.source for e in vgm.estimates if e.plunger == p and e.gate == g],
                })
    comp = {}
    for s in vgm.sensor_gates:
        comp[s] = {g: {"value": _f(v), "uncertainty": _f(e)}
                   for g, (v, e) in vgm.sensor_compensation(s).items()}
    return {
        "kind": KIND,
        "format_version": FORMAT_VERSION,
        "convention": "V_virtual = matrix . V_physical; rows virtual gates (one per dot, "
                      "sensor dots last), columns physical gates; M[d, g] = alpha_dg / alpha_d,plunger(d)",
        "virtual_gates": list(vgm.virtual_gates),
        "plungers": list(vgm.plungers),
        "sensor_gates": list(vgm.sensor_gates),
        "physical_gates": list(vgm.gates),
        "matrix": _grid(vgm.matrix),
        "uncertainty": _grid(vgm.uncertainty),
        "uncertainty_internal": _grid(vgm.uncertainty_internal),
        "n_maps": vgm.n_estimates.astype(int).tolist(),
        "inconsistency": {
            "chi2": _f(vgm.total_chi2),
            "dof": vgm.total_dof,
            "birge_ratio": _f(vgm.overall_birge_ratio),
            "p_value": _f(vgm.overall_p_value),
            "elements": inconsistent,
        },
        "unmeasured": [{"virtual_gate": virtual_name(p), "physical_gate": g} for p, g in vgm.unmeasured],
        "sensor_compensation": comp,
        "maps_used": [m.to_dict() for m in vgm.maps],
        "rejected": [{"virtual_gate": virtual_name(r.estimate.plunger), "physical_gate": r.estimate.gate,
                      "value": _f(r.estimate.value), "sigma": _f(r.estimate.sigma), "map": r.estimate.source,
                      "reason": r.reason} for r in vgm.rejected],
        "quality": vgm.quality.to_dict(),
        "caution": vgm.caution,
    }


def write_matrix_json(vgm: VirtualGateMatrix, path: str | os.PathLike[str]) -> Path:
    """Write :func:`matrix_to_dict` to ``path`` (UTF-8, indented); return the path."""
    p = Path(path)
    try:
        p.write_text(json.dumps(matrix_to_dict(vgm), indent=2, ensure_ascii=False) + "\n")
    except OSError as exc:
        raise InputError(p, f"cannot write ({exc.strerror or exc})") from None
    return p


def write_matrix_csv(vgm: VirtualGateMatrix, path: str | os.PathLike[str]) -> Path:
    """Write the matrix in long format, one element per row; return the path."""
    p = Path(path)
    cols = vgm.plunger_columns
    try:
        with p.open("w", newline="") as fh:
            w = csv.writer(fh)
            w.writerow(["virtual_gate", "physical_gate", "plunger", "value", "uncertainty",
                        "n_maps", "chi2", "dof", "birge_ratio", "measured"])
            for i, pl in enumerate(vgm.plungers):
                for j, g in enumerate(vgm.gates):
                    measured = j == cols[i] or vgm.n_estimates[i, j] > 0

                    def cell(v: float) -> str:
                        return "" if not math.isfinite(v) else repr(float(v))

                    w.writerow([virtual_name(pl), g, pl, cell(vgm.matrix[i, j]), cell(vgm.uncertainty[i, j]),
                                int(vgm.n_estimates[i, j]), cell(vgm.chi2[i, j]), int(vgm.dof[i, j]),
                                cell(vgm.birge_ratio[i, j]), "yes" if measured else "no"])
    except OSError as exc:
        raise InputError(p, f"cannot write ({exc.strerror or exc})") from None
    return p


def matrix_from_dict(obj: Any, *, source: str = "") -> VirtualGateMatrix:
    """Rebuild a :class:`VirtualGateMatrix` from :func:`matrix_to_dict` output.

    The per-estimate list is not stored, so ``estimates`` is empty; the maps
    and the statistics are restored.
    """
    src = source or "matrix"
    if not isinstance(obj, dict) or obj.get("kind") != KIND:
        raise InputError(src, f"not a virtual-gate matrix file (expected \"kind\": \"{KIND}\")")
    try:
        plungers = tuple(obj["plungers"])
        gates = tuple(obj["physical_gates"])
        sensors = tuple(obj.get("sensor_gates", ()))
    except KeyError as exc:
        raise InputError(src, f"missing key {exc}") from None
    shape = (len(plungers), len(gates))
    nan = np.full(shape, np.nan)
    chi2 = nan.copy()
    dof = np.zeros(shape, dtype=int)
    birge = nan.copy()
    pval = nan.copy()
    for e in obj.get("inconsistency", {}).get("elements", []):
        i = plungers.index(e["virtual_gate"][1:])
        j = gates.index(e["physical_gate"])
        chi2[i, j] = np.nan if e["chi2"] is None else e["chi2"]
        dof[i, j] = int(e["dof"])
        birge[i, j] = np.nan if e["birge_ratio"] is None else e["birge_ratio"]
        pval[i, j] = np.nan if e["p_value"] is None else e["p_value"]
    maps = []
    for m in obj.get("maps_used", []):
        q = m.get("quality", {})
        maps.append(PairMeasurement(
            x_gate=m["x_gate"], y_gate=m["y_gate"],
            m_xy=_nan(m.get("m_xy")), m_xy_err=_nan(m.get("m_xy_err")),
            m_yx=_nan(m.get("m_yx")), m_yx_err=_nan(m.get("m_yx_err")),
            source=m.get("source", ""),
            quality=Quality(ok=bool(q.get("ok", True)), warnings=tuple(q.get("warnings", ()))),
        ))
    q = obj.get("quality", {})
    return VirtualGateMatrix(
        plungers=plungers,
        sensor_gates=sensors,
        gates=gates,
        matrix=_ungrid(obj.get("matrix"), shape, "matrix", src),
        uncertainty=_ungrid(obj.get("uncertainty"), shape, "uncertainty", src),
        uncertainty_internal=_ungrid(obj.get("uncertainty_internal", obj.get("uncertainty")), shape,
                                     "uncertainty_internal", src),
        n_estimates=np.asarray(obj.get("n_maps", np.zeros(shape, int)), dtype=int).reshape(shape),
        chi2=chi2, dof=dof, birge_ratio=birge, p_value=pval,
        maps=tuple(maps),
        quality=Quality(ok=bool(q.get("ok", False)), warnings=tuple(q.get("warnings", ()))),
        caution=obj.get("caution", CAUTION),
    )


def _nan(v: Any) -> float:
    return float("nan") if v is None else float(v)


def read_matrix_json(path: str | os.PathLike[str]) -> VirtualGateMatrix:
    """Read a matrix written by :func:`write_matrix_json`."""
    p = Path(path)
    try:
        obj = json.loads(p.read_text())
    except FileNotFoundError:
        raise InputError(p, "file not found") from None
    except json.JSONDecodeError as exc:
        raise InputError(p, f"not valid JSON (line {exc.lineno}: {exc.msg})") from None
    try:
        return matrix_from_dict(obj, source=str(p))
    except (KeyError, TypeError, ValueError) as exc:
        if isinstance(exc, InputError):
            raise
        raise InputError(p, f"malformed virtual-gate matrix file ({exc})") from None
