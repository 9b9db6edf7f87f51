"""Figure of an analysis: the map, the line families, triple points, charge states, key numbers."""

from __future__ import annotations

import os
from typing import Any

import numpy as np

from ..io.atomic import atomic_savefig
from .text import fmt_pm

__all__ = ["FAMILY_COLOURS", "plot_result", "save_plot"]

#: Colours of the line families (colour-blind-safe Okabe–Ito palette).
FAMILY_COLOURS = {"dot1": "#E69F00", "dot2": "#56B4E9", "interdot": "#CC79A7"}


def _key_numbers(res: Any) -> str:
    d = res.diagram
    m, me = d.vg_matrix, d.vg_matrix_error
    rows = [
        f"M12 = {fmt_pm(m[0, 1], me[0, 1])}",
        f"M21 = {fmt_pm(m[1, 0], me[1, 0])}",
        f"ΔV1 = {fmt_pm(d.addition_V[0], d.addition_V_error[0], scale=1e3, unit='mV')}",
        f"ΔV2 = {fmt_pm(d.addition_V[1], d.addition_V_error[1], scale=1e3, unit='mV')}",
    ]
    if d.mutual_resolved:
        rows.append(f"δ1, δ2 = {1e3 * d.mutual_V[0]:.3g}, {1e3 * d.mutual_V[1]:.3g} mV")
    c, ce = d.cdg_aF, d.cdg_aF_error
    rows.append(f"Cdg = [[{fmt_pm(c[0, 0], ce[0, 0], digits=3)}, {fmt_pm(c[0, 1], ce[0, 1], digits=3)}],")
    rows.append(f"       [{fmt_pm(c[1, 0], ce[1, 0], digits=3)}, {fmt_pm(c[1, 1], ce[1, 1], digits=3)}]] aF")
    if np.all(np.isfinite(res.scale.alpha_diag)):
        la, le = res.lever_arm, res.lever_arm_error
        ec, ece = res.charging_energy_meV, res.charging_energy_error_meV
        rows.append(f"α11 = {fmt_pm(la[0, 0], le[0, 0], digits=3)}, α22 = {fmt_pm(la[1, 1], le[1, 1], digits=3)} eV/V")
        rows.append(f"E_C = {fmt_pm(ec['dot1'], ece['dot1'], digits=3)}, {fmt_pm(ec['dot2'], ece['dot2'], digits=3)} meV")
        rows.append(f"scale from: {res.scale.reference}")
        tc = getattr(res, "tunnel", None)
        if tc is not None and tc:
            rows.append(f"t = {fmt_pm(tc.value_ueV, tc.error_ueV, digits=3)} µeV (gap 2t)")
        elif tc is not None and np.isfinite(tc.upper_limit_ueV):
            rows.append(f"t < {tc.upper_limit_ueV:.3g} µeV (2σ)")
    else:
        rows.append("no energy reference")
    rows.append("quality: " + ("ok" if res.quality.ok else "DOUBTFUL"))
    return "\n".join(rows)


def plot_result(res: Any, *, ax: Any = None, max_labels: int = 40) -> Any:
    """Draw ``res`` on a matplotlib Axes (created if None); return the Figure."""
    import matplotlib.pyplot as plt

    da = res.data
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    if ax is None:
        fig, ax = plt.subplots(figsize=(9.5, 7.0), dpi=110)
    else:
        fig = ax.figure
    z = np.asarray(da.values, float)
    lo, hi = np.nanpercentile(z, [1, 99])
    mesh = ax.pcolormesh(1e3 * x, 1e3 * y, z, shading="nearest", cmap="gray", vmin=lo, vmax=hi, rasterized=True)
    cb = fig.colorbar(mesh, ax=ax, pad=0.01)
    cb.set_label(f"{da.name or 'signal'} ({da.attrs.get('units', 'a.u.')})")
    d = res.diagram
    aside_labelled = False
    for i_fam, (fam, lines) in enumerate((("dot1", d.lines1), ("dot2", d.lines2), ("interdot", d.interdot))):
        groups = d.line_groups[i_fam] if i_fam < 2 and d.lattice is not None else None
        n_used = int(np.sum(groups >= 0)) if groups is not None else len(lines)
        first = True
        for k, ln in enumerate(lines):
            xs = 1e3 * np.array([ln.start[0], ln.end[0]])
            ys = 1e3 * np.array([ln.start[1], ln.end[1]])
            if groups is not None and k < groups.size and groups[k] < 0:
                ax.plot(xs, ys, color="0.6", lw=0.8, ls=":", alpha=0.8,
                        label="set aside" if not aside_labelled else None)
                aside_labelled = True
                continue
            ax.plot(xs, ys, color=FAMILY_COLOURS[fam], lw=1.6, alpha=0.9,
                    label=f"{fam} ({n_used})" if first else None)
            first = False
    tp = res.triple_points
    if tp.size:
        ax.plot(1e3 * tp[:, 0], 1e3 * tp[:, 1], "o", ms=3.5, mfc="white", mec="k", mew=0.6, ls="none",
                label="triple points")
    cs = res.charge_states
    if cs is not None:
        regions = sorted(cs.regions, key=lambda r: -r["pixels"])[:max_labels]
        minpix = 0.002 * z.size
        for r in regions:
            if r["pixels"] < minpix:
                continue
            ax.text(1e3 * r["x"], 1e3 * r["y"], f"({r['n1']},{r['n2']})", ha="center", va="center", fontsize=7,
                    color="#1a1a1a", bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.65})
        kind = "absolute" if all(cs.absolute) else ("relative" if not any(cs.absolute) else "partly absolute")
        ax.plot([], [], " ", label=f"(N1,N2): {kind}")
    ax.set_xlim(1e3 * x.min(), 1e3 * x.max())
    ax.set_ylim(1e3 * y.min(), 1e3 * y.max())
    ax.set_xlabel(f"{res.x_gate} (mV)")
    ax.set_ylabel(f"{res.y_gate} (mV)")
    ax.set_title(str(da.attrs.get("source", da.name or "map")).split(os.sep)[-1], fontsize=10)
    ax.legend(loc="upper right", fontsize=8, framealpha=0.85)
    ax.text(0.01, 0.99, _key_numbers(res), transform=ax.transAxes, va="top", ha="left", fontsize=7.5,
            family="monospace", bbox={"boxstyle": "round", "fc": "white", "ec": "0.5", "alpha": 0.85})
    if not res.quality.ok and res.quality.warnings:
        ax.text(0.01, 0.01, "\n".join("! " + w[:110] for w in res.quality.warnings[:4]), transform=ax.transAxes,
                va="bottom", ha="left", fontsize=6.5, color="#b00000",
                bbox={"boxstyle": "round", "fc": "white", "ec": "#b00000", "alpha": 0.85})
    fig.tight_layout()
    return fig


def save_plot(res: Any, path: str | os.PathLike[str], **kwargs: Any) -> None:
    """Write the figure of ``res`` as PNG to ``path`` atomically (temp file + os.replace)."""
    import matplotlib.pyplot as plt

    path = os.fspath(path)
    fig = plot_result(res, **kwargs)
    try:
        atomic_savefig(fig, path)
    finally:
        plt.close(fig)
