"""``analyze`` on a Coulomb-diamond map (gate on x, source–drain bias on y).

A diamond map is recognised explicitly (``mode="diamonds"``) or, with
``mode="auto"``, by its y axis (:func:`is_bias_axis`): a dimension whose name
contains "bias", "sd" or "vsd" (any case; e.g. ``V_sd``, ``VSD``, ``bias``)
and whose unit is a voltage. The edge slopes and the diamond width give the
lever arm of the x gate and the addition energy
(:func:`stabtool.fit.diamonds.fit_coulomb_diamonds`); the result has the
JSON keys of a stability-diagram analysis with the double-dot quantities
null, dot1 = the diamond map's dot, ``energy_reference = "coulomb_diamonds"``.

References
----------
L. P. Kouwenhoven, D. G. Austing and S. Tarucha, Rep. Prog. Phys. 64, 701
(2001), doi:10.1088/0034-4885/64/6/201.
"""

from __future__ import annotations

import json
import os
import re
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr

from ..io.atomic import atomic_savefig
from ..mapdata import x_gate, y_gate
from ..quality import Quality
from .diamonds import CoulombDiamondFit, fit_coulomb_diamonds

__all__ = ["DiamondAnalysisResult", "analyze_diamond_map", "is_bias_axis"]

_BIAS_NAME = re.compile(r"bias|v_?sd|(^|_)sd($|_)", re.IGNORECASE)


def is_bias_axis(da: xr.DataArray) -> bool:
    """True when the map's y axis is a source–drain bias (name contains bias/sd/vsd, unit a voltage)."""
    ydim = str(da.dims[0])
    units = str(da[ydim].attrs.get("original_units", da[ydim].attrs.get("units", "V")))
    is_voltage = units.replace("µ", "u").lower() in {"v", "mv", "uv", "nv"}
    return bool(_BIAS_NAME.search(ydim)) and is_voltage


def _nan_none(v: float) -> float | None:
    return float(v) if np.isfinite(v) else None


@dataclass(frozen=True)
class DiamondAnalysisResult:
    """Result of :func:`analyze_diamond_map`; same outputs as :class:`stabtool.analysis.AnalysisResult`."""

    data: xr.DataArray
    fit: CoulombDiamondFit
    quality: Quality
    timings_s: dict = field(default_factory=dict)

    @property
    def x_gate(self) -> str:
        return x_gate(self.data)

    @property
    def y_gate(self) -> str:
        return y_gate(self.data)

    def to_json(self) -> dict:
        f = self.fit
        ok = bool(f)
        a, ea = (f.lever_arm, f.lever_arm_stderr) if ok else (np.nan, np.nan)
        ec, eec = (f.addition_energy_meV, f.addition_energy_stderr_meV) if ok else (np.nan, np.nan)
        caps = f.capacitances
        cg = caps.gate_aF if (ok and caps is not None) else np.nan
        null2 = [[None, None], [None, None]]
        return {
            "x_gate": self.x_gate,
            "y_gate": self.y_gate,
            "map_kind": "coulomb_diamonds",
            "slopes": {"dot1": None, "dot2": None, "interdot": None},
            "slope_errors": {"dot1": None, "dot2": None, "interdot": None},
            "virtual_gate_matrix": null2,
            "addition_voltages_V": {"dot1": _nan_none(f.addition_voltage_V), "dot2": None},
            "mutual_shifts_V": {"dot1": None, "dot2": None},
            # the y axis is the bias, not a gate: only the x-gate element exists
            "gate_capacitance_aF": [[_nan_none(cg), None], [None, None]],
            "lever_arm": [[_nan_none(a), None], [None, None]] if ok else None,
            "charging_energy_meV": {"dot1": _nan_none(ec), "dot2": None, "mutual": None},
            "energy_reference": "coulomb_diamonds" if ok else None,
            "quality": self.quality.to_dict(),
            "addition_voltages_V_error": {"dot1": _nan_none(f.addition_voltage_stderr_V), "dot2": None},
            "lever_arm_error": [[_nan_none(ea), None], [None, None]] if ok else None,
            "charging_energy_meV_error": {"dot1": _nan_none(eec), "dot2": None, "mutual": None},
            "energy_reference_details": {
                "diamond_slope_plus": _nan_none(f.slope_plus), "diamond_slope_plus_error": _nan_none(f.slope_plus_stderr),
                "diamond_slope_minus": _nan_none(f.slope_minus),
                "diamond_slope_minus_error": _nan_none(f.slope_minus_stderr),
                "capacitance_ratios": (None if caps is None else
                                       {"gate": _nan_none(caps.gate), "source": _nan_none(caps.source),
                                        "drain": _nan_none(caps.drain)}),
                "n_edges": len(f.edges),
            },
            "tunnel_coupling_ueV": None,
            "tunnel_coupling_ueV_error": None,
            "timings_s": self.timings_s,
        }

    def to_dataset(self) -> xr.Dataset:
        ds = xr.Dataset({str(self.data.name or "signal"): self.data})
        ds.attrs["analysis_json"] = json.dumps(self.to_json())
        ds.attrs["quality_ok"] = int(self.quality.ok)
        return ds

    def summary(self) -> str:
        f = self.fit
        lines = [f"Coulomb-diamond map: {self.x_gate} (gate) vs {self.y_gate} (bias)"]
        if f:
            lines += [
                f"  lever arm α = {f.lever_arm:.4g} ± {f.lever_arm_stderr:.2g} eV/V",
                f"  edge slopes m+ = {f.slope_plus:.4g}, m- = {f.slope_minus:.4g}",
                (f"  ΔV_G = {1e3 * f.addition_voltage_V:.4g} mV, E_add = {f.addition_energy_meV:.4g} "
                 f"± {f.addition_energy_stderr_meV:.2g} meV"),
            ]
        lines.append(f"quality: {'ok' if self.quality.ok else 'DOUBTFUL'}")
        lines += [f"  - {w}" for w in self.quality.warnings]
        return "\n".join(lines)

    def save_plot(self, path: str | os.PathLike[str], **kwargs: Any) -> None:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        da = self.data
        x = np.asarray(da[da.dims[-1]].values, float)
        y = np.asarray(da[da.dims[0]].values, float)
        fig, ax = plt.subplots(figsize=(7, 5))
        ax.pcolormesh(1e3 * x, 1e3 * y, np.asarray(da.values, float), shading="auto", cmap="viridis")
        for e in self.fit.edges:
            yy = np.array([y.min(), y.max()])
            ax.plot(1e3 * (e.intercept_V + yy * e.inverse_slope), 1e3 * yy,
                    color="#E69F00" if e.family == "plus" else "#56B4E9", lw=1)
        ax.set_xlim(1e3 * x.min(), 1e3 * x.max())
        ax.set_ylim(1e3 * y.min(), 1e3 * y.max())
        ax.set_xlabel(f"{self.x_gate} (mV)")
        ax.set_ylabel(f"{self.y_gate} (mV)")
        ax.set_title(self.summary().splitlines()[1] if self.fit else "no diamond fitted")
        try:
            atomic_savefig(fig, path, dpi=110)
        finally:
            plt.close(fig)


def analyze_diamond_map(da: xr.DataArray) -> DiamondAnalysisResult:
    """Lever arm and addition energy of a Coulomb-diamond map (see the module docstring)."""
    import time

    t0 = time.perf_counter()
    fit = fit_coulomb_diamonds(da)
    q = fit.quality
    if not fit and q.ok:
        q = q.with_warning("no Coulomb diamond found")
    return DiamondAnalysisResult(data=da, fit=fit, quality=q, timings_s={"total": time.perf_counter() - t0})
