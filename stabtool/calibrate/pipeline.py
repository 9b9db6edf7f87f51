"""From 1-D traces to a lever-arm calibration.

Steps: fit a Fermi step to every trace (:func:`stabtool.fit.fermi.fit_fermi_step`),
test its line shape for non-thermal broadening
(:func:`stabtool.calibrate.shape.compare_line_shapes`), then

* ≥ 3 distinct temperatures: fit the widths against temperature
  (:func:`stabtool.calibrate.series.fit_temperature_series`) → lever arm and
  saturated electron temperature;
* one temperature: take it as the electron temperature, ``α = k_B T_e/(e w)``
  per trace (weighted mean over traces);
* two temperatures: each trace at its own temperature, with a warning that
  saturation cannot be checked.

:class:`Calibrator` holds the options and runs the steps; the CLI uses it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InputError
from ..fit.fermi import fit_fermi_step
from ..io.traces import Trace1D
from ..physics.thermal import lever_arm_from_width
from ..quality import Quality
from .result import LeverArmCalibration, TraceRecord
from .series import SATURATION_MODEL, TemperatureSeriesFit, fit_temperature_series
from .shape import compare_line_shapes

__all__ = ["Calibrator", "calibrate_traces", "fit_trace", "lever_arm_from_trace"]


def fit_trace(trace: Trace1D, *, background: str = "linear", check_shape: bool = True) -> TraceRecord:
    """Fermi fit plus line-shape test of one trace, as a :class:`TraceRecord`."""
    try:
        fit = fit_fermi_step(trace.v, trace.signal, background=background)  # type: ignore[arg-type]
    except InputError as exc:  # name the file, not the array
        raise InputError(trace.source, f"trace {trace.label!r}: {exc.fault}") from None
    common: dict[str, Any] = dict(source=trace.source, label=trace.label, temperature_K=trace.temperature_K,
                  temperature_source=trace.temperature_source)
    if not fit:
        return TraceRecord(ok=False, reason=fit.reason, **common)
    warnings = list(fit.quality.warnings)
    gamma = float("nan")
    ok = fit.quality.ok
    if check_shape:
        shape = compare_line_shapes(trace.v, trace.signal, fit)
        gamma = shape.gamma_V
        if not shape.thermal:
            warnings.append(shape.message)
            ok = False
        elif shape.inconclusive:
            warnings.append(shape.message)
    return TraceRecord(
        ok=ok, centre_V=fit.centre_V, width_V=fit.width_V, width_stderr_V=fit.width_stderr_V,
        step_height=fit.step_height, reduced_chi2=fit.reduced_chi2, points_per_fwhm=fit.points_per_fwhm,
        lorentzian_gamma_V=gamma, warnings=tuple(warnings), **common,
    )


def lever_arm_from_trace(
    v: np.ndarray, signal: np.ndarray, *, electron_temperature_K: float, background: str = "linear"
) -> LeverArmCalibration:
    """Lever arm from one trace at a known electron temperature.

    ``α = k_B T_e/(e w)``, ``σ_α = α σ_w / w``.

    Parameters
    ----------
    v, signal : array_like, shape (n,)
        Gate voltages (V) and signal.
    electron_temperature_K : float
        Known electron temperature, K.
    background : {"linear", "quadratic", "none"}
    """
    trace = Trace1D(np.asarray(v, float), np.asarray(signal, float), "gate", "signal", "",
                    float(electron_temperature_K), "user", None, "<array>", "trace")
    return Calibrator(background=background).run([trace])


@dataclass(frozen=True)
class Calibrator:
    """Configured calibration run (the CLI and scripts share it).

    Parameters
    ----------
    background : {"linear", "quadratic", "none"}
        Background polynomial under each step.
    check_shape : bool
        Test each trace for non-thermal (Lorentzian) broadening.
    exponent : float
        Exponent ``n`` of the saturation model.
    """

    background: str = "linear"
    check_shape: bool = True
    exponent: float = 2.0

    def fit(self, traces: Sequence[Trace1D]) -> list[TraceRecord]:
        """Fit every trace."""
        return [fit_trace(t, background=self.background, check_shape=self.check_shape) for t in traces]

    def run(self, traces: Sequence[Trace1D]) -> LeverArmCalibration:
        """Fit every trace and combine them into one lever arm."""
        if not traces:
            raise InputError("TRACES", "no traces to calibrate")
        gates = sorted({t.gate for t in traces})
        if len(gates) > 1:
            raise InputError("TRACES", f"traces sweep different gates ({', '.join(gates)}); calibrate one gate at a time")
        devices = sorted({t.device for t in traces if t.device})
        if len(devices) > 1:
            raise InputError("TRACES", f"traces come from different devices ({', '.join(devices)})")
        missing = [t for t in traces if not np.isfinite(t.temperature_K)]
        if missing:
            raise InputError(
                missing[0].source,
                f"trace {missing[0].label!r} has no temperature; give --temperature K or "
                "--temperatures-from attr:NAME / column:NAME",
            )
        records = self.fit(traces)
        return combine(records, gate=gates[0], device=devices[0] if devices else None, exponent=self.exponent)


def calibrate_traces(traces: Sequence[Trace1D], *, background: str = "linear", check_shape: bool = True) -> LeverArmCalibration:
    """Lever-arm calibration from traces (see :class:`Calibrator`)."""
    return Calibrator(background=background, check_shape=check_shape).run(traces)


def combine(records: Sequence[TraceRecord], *, gate: str, device: str | None, exponent: float = 2.0) -> LeverArmCalibration:
    """Combine per-trace records into one calibration."""
    sources = tuple(dict.fromkeys(r.source for r in records))
    good = [r for r in records if np.isfinite(r.width_V)]
    q = Quality()
    rejected = [r for r in records if not np.isfinite(r.width_V)]
    for r in rejected:
        q = q.with_warning(f"{r.source} [{r.label}]: trace rejected: {r.reason}", doubtful=False)
    n_temps = np.unique([r.temperature_K for r in good]).size
    for r in good:
        for w in r.warnings:
            inconclusive = w.startswith("line-shape test inconclusive")
            if inconclusive and n_temps >= 3:
                continue  # a series tests thermal scaling itself (width against temperature)
            q = q.with_warning(f"{r.source} [{r.label}]: {w}", doubtful=not inconclusive)
    base: dict[str, Any] = dict(gate=gate, device=device, source_files=sources, traces=tuple(records))
    if not good:
        return LeverArmCalibration(
            lever_arm=float("nan"), lever_arm_stderr=float("nan"), method="known_electron_temperature",
            method_description="no trace could be fitted", quality=Quality(ok=False, warnings=q.warnings
            + ("no trace holds a usable Fermi step; no lever arm",)), **base,
        )
    temps = np.array([r.temperature_K for r in good])
    widths = np.array([r.width_V for r in good])
    errs = np.array([r.width_stderr_V for r in good])
    distinct = np.unique(temps)
    if distinct.size >= 3:
        series = fit_temperature_series(temps, widths, errs, exponent=exponent)
        return _from_series(series, q, base)
    alphas = np.array([lever_arm_from_width(w, t) for w, t in zip(widths, temps)])
    a_err = alphas * errs / widths
    wts = 1.0 / a_err**2
    alpha = float(np.sum(wts * alphas) / np.sum(wts))
    err = float(np.sqrt(1.0 / np.sum(wts)))
    if alphas.size > 1:
        chi = float(np.sum(wts * (alphas - alpha) ** 2) / (alphas.size - 1))
        err *= np.sqrt(max(1.0, chi))
        if chi > 4.0:
            q = q.with_warning(f"lever arms of the {alphas.size} traces scatter beyond their errors (reduced chi-squared {chi:.1f})")
    if distinct.size == 2:
        q = q.with_warning(
            "two temperatures cannot separate the lever arm from electron-temperature saturation; "
            "each trace was taken at its own temperature as the electron temperature"
        )
        desc = "traces at two temperatures, each taken as the electron temperature: alpha = k_B T_e/(e w)"
        te = float("nan")
    else:
        q = q.with_warning(
            f"the temperature {distinct[0]:g} K is taken as the electron temperature; if it is the "
            "fridge temperature the lever arm is overestimated by T_e/T", doubtful=False,
        )
        desc = f"Fermi width at a known electron temperature {distinct[0]:g} K: alpha = k_B T_e/(e w)"
        te = float(distinct[0])
    if err / alpha > 0.1:
        q = q.with_warning(f"lever-arm uncertainty {100 * err / alpha:.0f} % exceeds 10 %")
    return LeverArmCalibration(
        lever_arm=alpha, lever_arm_stderr=err, method="known_electron_temperature",
        method_description=desc, electron_temperature_K=te, quality=q, **base,
    )


def _from_series(series: TemperatureSeriesFit, q: Quality, base: dict[str, Any]) -> LeverArmCalibration:
    return LeverArmCalibration(
        lever_arm=series.lever_arm,
        lever_arm_stderr=series.lever_arm_stderr,
        method="temperature_series",
        method_description=(
            f"Fermi widths at {len(set(series.temperatures_K))} temperatures fitted with "
            "w = k_B T_e/(e alpha) and the saturation model"
        ),
        saturation_K=series.saturation_K,
        saturation_stderr_K=series.saturation_stderr_K,
        saturation_model=SATURATION_MODEL,
        linear_lever_arm=series.linear_lever_arm,
        linear_lever_arm_stderr=series.linear_lever_arm_stderr,
        quality=q.merge(series.quality),
        **base,
    )
