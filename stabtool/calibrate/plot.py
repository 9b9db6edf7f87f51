"""Plots of a lever-arm calibration: width versus temperature, or the fitted traces."""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ..io.atomic import atomic_savefig
from ..io.traces import Trace1D
from ..physics.constants import KB_OVER_E
from ..physics.thermal import saturated_temperature
from .result import LeverArmCalibration

__all__ = ["plot_calibration"]


def plot_calibration(
    calibration: LeverArmCalibration,
    path: str | os.PathLike[str],
    *,
    traces: Sequence[Trace1D] = (),
) -> Path:
    """Write a PNG of the calibration.

    A temperature series shows the Fermi widths (µV, with error bars) against
    temperature (mK), the saturation-model fit and the linear asymptote
    ``k_B T/(e α)``; a single-temperature calibration shows each trace with its
    fitted step when ``traces`` are given.
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    from ..fit.fermi import fit_fermi_step

    cal = calibration
    recs = [r for r in cal.traces if np.isfinite(r.width_V)]
    series = cal.method == "temperature_series"
    fig, axes = plt.subplots(1, 2 if (traces and series) else 1, figsize=(11 if (traces and series) else 6.4, 4.6))
    axes = np.atleast_1d(axes)
    ax = axes[0]
    title = f"{cal.device or 'device ?'} · gate {cal.gate}"
    if series and recs:
        t = np.array([r.temperature_K for r in recs])
        w = np.array([r.width_V for r in recs])
        e = np.array([r.width_stderr_V for r in recs])
        bad = np.array([not r.ok for r in recs])
        ax.errorbar(t[~bad] * 1e3, w[~bad] * 1e6, yerr=e[~bad] * 1e6, fmt="o", color="C0", label="Fermi width")
        if bad.any():
            ax.errorbar(t[bad] * 1e3, w[bad] * 1e6, yerr=e[bad] * 1e6, fmt="s", color="C3", label="doubtful trace")
        tt = np.linspace(0, t.max() * 1.1, 300)
        model = KB_OVER_E * saturated_temperature(tt, cal.saturation_K) / cal.lever_arm
        ax.plot(tt * 1e3, model * 1e6, "-", color="C1",
                label=f"fit: α = {cal.lever_arm:.4g} ± {cal.lever_arm_stderr:.2g}, "
                f"T_sat = {cal.saturation_K * 1e3:.0f} ± {cal.saturation_stderr_K * 1e3:.0f} mK")
        ax.plot(tt * 1e3, KB_OVER_E * tt / cal.lever_arm * 1e6, "--", color="0.5", label="k_B T/(e α)")
        ax.set_xlabel("temperature (mK)")
        ax.set_ylabel("Fermi width w (µV)")
        ax.set_xlim(0, None)
        ax.set_ylim(0, None)
        ax.legend(fontsize=8, loc="upper left")
        ax.set_title(f"{title}: width vs temperature", fontsize=10)
        tax = axes[1] if len(axes) > 1 else None
    else:
        tax = ax
        ax.set_title(
            f"{title}: α = {cal.lever_arm:.4g} ± {cal.lever_arm_stderr:.2g} at T_e = "
            f"{cal.electron_temperature_K * 1e3:.0f} mK" if np.isfinite(cal.lever_arm) else f"{title}: no lever arm",
            fontsize=10,
        )
    if tax is not None and traces:
        for i, tr in enumerate(traces):
            fit = fit_fermi_step(tr.v, tr.signal)
            off = 0.0
            if fit:
                x = (tr.v - fit.centre_V) / fit.width_V
                y = (tr.signal - fit.background_at(tr.v)) / fit.step_height
                order = np.argsort(x)
                tax.plot(x[order], y[order] + off, ".", ms=2, color=f"C{i % 10}", alpha=0.5)
                xx = np.linspace(x.min(), x.max(), 400)
                tax.plot(xx, 0.5 * (1 + np.tanh(xx / 2)), "-", color=f"C{i % 10}", lw=1,
                         label=f"{tr.temperature_K * 1e3:.0f} mK" if np.isfinite(tr.temperature_K) else tr.label)
        tax.set_xlabel("(V − V0) / w")
        tax.set_ylabel("normalised step (background removed)")
        tax.set_xlim(-12, 12)
        tax.legend(fontsize=7, ncol=2)
        if tax is not ax:
            tax.set_title("traces scaled by their fitted width", fontsize=10)
    fig.tight_layout()
    out = Path(path)
    atomic_savefig(fig, out, dpi=120)
    plt.close(fig)
    return out
