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
#: Figure size (inches) and resolution of the per-map plots.
FIGSIZE_IN = (9.5, 7.0)
PLOT_DPI = 100
#: zlib level of the PNGs (1: fast, files about 20 % larger than at the default 6).
PNG_COMPRESS_LEVEL = 1


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


def _image(ax: Any, x: np.ndarray, y: np.ndarray, z: np.ndarray, lo: float, hi: float) -> Any:
    """The map as an image: ``imshow`` on evenly spaced axes (fast), ``pcolormesh`` otherwise."""
    def even(a: np.ndarray) -> bool:
        d = np.diff(a)
        return a.size > 1 and bool(np.all(np.abs(d - d[0]) <= 1e-3 * abs(d[0]))) and d[0] != 0

    if not (even(x) and even(y)):
        return ax.pcolormesh(1e3 * x, 1e3 * y, z, shading="nearest", cmap="gray", vmin=lo, vmax=hi, rasterized=True)
    if x[0] > x[-1]:
        x, z = x[::-1], z[:, ::-1]
    if y[0] > y[-1]:
        y, z = y[::-1], z[::-1]
    hx, hy = 0.5 * (x[1] - x[0]), 0.5 * (y[1] - y[0])
    extent = (1e3 * (x[0] - hx), 1e3 * (x[-1] + hx), 1e3 * (y[0] - hy), 1e3 * (y[-1] + hy))
    # nearest-neighbour up-sampling keeps pixels crisp (as pcolormesh would); large maps are filtered
    interp = "nearest" if max(z.shape) <= 600 else "antialiased"
    return ax.imshow(z, origin="lower", extent=extent, aspect="auto", cmap="gray", vmin=lo, vmax=hi,
                     interpolation=interp)


def _draw(res: Any, ax: Any, *, cax: Any = None, max_labels: int = 40) -> Any:
    """Draw ``res`` on ``ax`` (colour bar in ``cax`` when given); return the image artist."""
    from matplotlib.collections import LineCollection

    fig = ax.figure
    da = res.data
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    z = np.asarray(da.values, float)
    lo, hi = np.nanpercentile(z, [1, 99])
    mesh = _image(ax, x, y, z, lo, hi)
    cb = fig.colorbar(mesh, cax=cax) if cax is not None else fig.colorbar(mesh, ax=ax, pad=0.01)
    cb.set_label(f"{da.name or 'signal'} ({da.attrs.get('units', 'a.u.')})")
    d = res.diagram
    aside: list[np.ndarray] = []
    for i_fam, (fam, lines) in enumerate((("dot1", d.lines1), ("dot2", d.lines2), ("interdot", d.interdot))):
        groups = d.line_groups[i_fam] if i_fam < 2 and d.lattice is not None else None
        n_used = int(np.sum(groups >= 0)) if groups is not None else len(lines)
        segs = []
        for k, ln in enumerate(lines):
            seg = 1e3 * np.array([ln.start, ln.end], float)
            if groups is not None and k < groups.size and groups[k] < 0:
                aside.append(seg)
            else:
                segs.append(seg)
        if segs:
            # one artist per family (drawing cost does not grow with the number of segments)
            ax.add_collection(LineCollection(segs, colors=FAMILY_COLOURS[fam], linewidths=1.6, alpha=0.9,
                                             label=f"{fam} ({n_used})"), autolim=False)
    if aside:
        ax.add_collection(LineCollection(aside, colors="0.6", linewidths=0.8, linestyles=":", alpha=0.8,
                                         label="set aside"), autolim=False)
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
        ax.text(0.01, 0.01, "\n".join("! " + w[:110] for w in res.quality.doubts_first()[:4]), transform=ax.transAxes,
                va="bottom", ha="left", fontsize=6.5, color="#b00000",
                bbox={"boxstyle": "round", "fc": "white", "ec": "#b00000", "alpha": 0.85})
    return mesh


def plot_result(res: Any, *, ax: Any = None, max_labels: int = 40) -> Any:
    """Draw ``res`` on a matplotlib Axes (created with pyplot if None); return the Figure.

    The map, the line families (segments set aside greyed), the triple
    points, the charge-state labels and a box with the key numbers; the
    quality warnings of a doubtful result in red.
    """
    if ax is None:
        import matplotlib.pyplot as plt

        fig, ax = plt.subplots(figsize=FIGSIZE_IN, dpi=PLOT_DPI)
    else:
        fig = ax.figure
    _draw(res, ax, max_labels=max_labels)
    fig.tight_layout()
    return fig


def _fixed_layout_figure(dpi: float) -> tuple[Any, Any, Any]:
    """A pyplot-free Agg figure with fixed axes and colour-bar positions (no layout pass)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    w, h = FIGSIZE_IN
    fig = Figure(figsize=FIGSIZE_IN, dpi=dpi)
    FigureCanvasAgg(fig)
    # margins in inches: tick labels + axis label on the left and bottom, title on top,
    # colour bar with its label on the right
    left, bottom, top, right = 0.80, 0.60, 0.35, 1.15
    cb_gap, cb_w = 0.08, 0.22
    ax = fig.add_axes((left / w, bottom / h, (w - left - right) / w, (h - bottom - top) / h))
    cax = fig.add_axes(((w - right + cb_gap) / w, bottom / h, cb_w / w, (h - bottom - top) / h))
    return fig, ax, cax


def save_plot(res: Any, path: str | os.PathLike[str], *, max_labels: int = 40, dpi: float | None = None) -> None:
    """Write the figure of ``res`` as PNG to ``path`` atomically (temp file + os.replace).

    Rendered without pyplot on the Agg canvas with a fixed layout (no
    tight-layout pass) at ``dpi`` (default :data:`PLOT_DPI`); the content
    is that of :func:`plot_result`.
    """
    import matplotlib as mpl

    path = os.fspath(path)
    # the default colours "C0" of lines and patches are looked up in the property cycle,
    # which rcParams deep-copies on every access (~1 ms each, ~50 per figure): name them
    with mpl.rc_context(_EXPLICIT_DEFAULT_COLOURS):
        fig, ax, cax = _fixed_layout_figure(PLOT_DPI if dpi is None else float(dpi))
        _draw(res, ax, cax=cax, max_labels=max_labels)
        atomic_savefig(fig, path, pil_kwargs={"compress_level": PNG_COMPRESS_LEVEL})


_EXPLICIT_DEFAULT_COLOURS = {"lines.color": "#1f77b4", "patch.facecolor": "#1f77b4"}
