"""Lever arm and saturated electron temperature from Fermi widths versus temperature.

Model: ``w(T) = k_B T_e(T) / (e α)`` with the saturation model
``T_e = (T^n + T_sat^n)^(1/n)`` (:func:`stabtool.physics.thermal.saturated_temperature`,
``n = 2`` by default: addition in quadrature, common practice, no source).
In the linear regime (``T ≫ T_sat``) ``w = k_B T/(e α)``, so the slope of
``w`` against ``T`` gives the lever arm; the plateau at low ``T`` gives
``T_sat``.

Notes
-----
Weighted least squares in (α, T_sat) over all points with the width standard
errors as weights; the covariance is scaled by ``max(1, χ²_red)`` so scatter
beyond the stated errors widens the uncertainties instead of hiding. A
proportional fit ``w = k_B T/(e α_lin)`` over the points with ``T ≥ 5 T_sat``
is reported as a cross-check (it needs no saturation model).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import optimize

from ..errors import InputError
from ..physics.constants import KB_OVER_E
from ..physics.thermal import saturated_temperature
from ..quality import Quality

__all__ = ["SATURATION_MODEL", "TemperatureSeriesFit", "fit_temperature_series"]

#: Human-readable name of the saturation model, with its status as a source.
SATURATION_MODEL = "T_e = (T^n + T_sat^n)^(1/n), n = 2 (quadrature; common practice, no source)"


@dataclass(frozen=True)
class TemperatureSeriesFit:
    """Result of :func:`fit_temperature_series`.

    Attributes
    ----------
    lever_arm, lever_arm_stderr : float
        α (eV/V) from the saturation-model fit and its standard error.
    saturation_K, saturation_stderr_K : float
        Saturated electron temperature ``T_sat`` and its standard error, K.
    exponent : float
        ``n`` of the saturation model.
    linear_lever_arm, linear_lever_arm_stderr : float
        α from the proportional fit over the linear regime (NaN with < 2 points).
    n_linear : int
        Points in the linear regime (``T ≥ 5 T_sat``).
    reduced_chi2 : float
        χ²/dof of the saturation-model fit.
    temperatures_K, widths_V, width_stderrs_V : tuple of float
        The data fitted.
    quality : Quality
    """

    lever_arm: float
    lever_arm_stderr: float
    saturation_K: float
    saturation_stderr_K: float
    exponent: float
    linear_lever_arm: float
    linear_lever_arm_stderr: float
    n_linear: int
    reduced_chi2: float
    temperatures_K: tuple[float, ...]
    widths_V: tuple[float, ...]
    width_stderrs_V: tuple[float, ...]
    quality: Quality = field(default_factory=Quality)

    def width_model_V(self, temperature_K: np.ndarray) -> np.ndarray:
        """Fitted width at bath temperatures ``temperature_K``, V."""
        te = saturated_temperature(np.asarray(temperature_K, float), self.saturation_K, exponent=self.exponent)
        return KB_OVER_E * te / self.lever_arm


def fit_temperature_series(
    temperatures_K: np.ndarray,
    widths_V: np.ndarray,
    width_stderrs_V: np.ndarray,
    *,
    exponent: float = 2.0,
) -> TemperatureSeriesFit:
    """Fit Fermi widths against bath temperature with the saturation model.

    Parameters
    ----------
    temperatures_K : array_like, shape (n,)
        Bath (fridge) temperatures, K; at least 3 distinct values.
    widths_V, width_stderrs_V : array_like, shape (n,)
        Fitted Fermi widths ``w`` and their standard errors, V.
    exponent : float
        ``n`` of ``T_e = (T^n + T_sat^n)^(1/n)``.

    Returns
    -------
    TemperatureSeriesFit
    """
    t = np.asarray(temperatures_K, float)
    w = np.asarray(widths_V, float)
    e = np.asarray(width_stderrs_V, float)
    if not (t.shape == w.shape == e.shape and t.ndim == 1):
        raise InputError("widths_V", "temperatures, widths and their errors must be 1-D arrays of equal length")
    good = np.isfinite(t) & np.isfinite(w) & np.isfinite(e) & (e > 0) & (t > 0) & (w > 0)
    t, w, e = t[good], w[good], e[good]
    if np.unique(t).size < 3:
        raise InputError(
            "temperatures", f"a temperature series needs at least 3 distinct temperatures, got {np.unique(t).size}"
        )
    # parametrise by slope a = k_B/(e α) (V/K) and T_sat
    def resid(p):
        a, ts = p
        return (a * saturated_temperature(t, abs(ts), exponent=exponent) - w) / e

    hi = t >= np.median(t)
    a0 = float(np.sum(w[hi] * t[hi] / e[hi] ** 2) / np.sum(t[hi] ** 2 / e[hi] ** 2))
    ts0 = float(max(np.min(w) / a0 * 0.8, 1e-4)) if np.min(w) / a0 > np.min(t) else 0.3 * float(np.min(t))
    best = None
    for ts_start in (ts0, 0.3 * float(np.min(t)), float(np.min(t))):
        sol = optimize.least_squares(resid, [a0, ts_start], method="lm")
        if best is None or sol.cost < best.cost:
            best = sol
    assert best is not None
    a, ts = float(best.x[0]), abs(float(best.x[1]))
    dof = max(t.size - 2, 1)
    red = 2 * best.cost / dof
    cov = np.linalg.pinv(best.jac.T @ best.jac) * max(1.0, red)
    a_err, ts_err = np.sqrt(np.clip(np.diag(cov), 0, None))
    alpha = KB_OVER_E / a
    alpha_err = alpha * a_err / a
    # linear-regime cross-check
    lin = t >= 5 * ts
    lin_alpha = lin_err = float("nan")
    if np.count_nonzero(lin) >= 2:
        tl, wl, el = t[lin], w[lin], e[lin]
        al = float(np.sum(wl * tl / el**2) / np.sum(tl**2 / el**2))
        red_l = float(np.sum(((al * tl - wl) / el) ** 2) / max(tl.size - 1, 1))
        al_err = float(np.sqrt(max(1.0, red_l) / np.sum(tl**2 / el**2)))
        lin_alpha = KB_OVER_E / al
        lin_err = lin_alpha * al_err / al
    q = Quality()
    if red > 4.0:
        q = q.with_warning(
            f"widths scatter beyond their errors around the saturation model (reduced chi-squared "
            f"{red:.1f}); broadening may not be thermal"
        )
    if np.count_nonzero(lin) < 2:
        q = q.with_warning(
            f"only {np.count_nonzero(lin)} temperature(s) in the linear regime T >= 5 T_sat = "
            f"{5 * ts:.3g} K; the lever arm rests on the saturation model"
        )
    elif np.isfinite(lin_alpha) and abs(lin_alpha - alpha) > 3 * np.hypot(lin_err, alpha_err) + 0.02 * alpha:
        q = q.with_warning(
            f"linear-regime lever arm {lin_alpha:.4g} disagrees with the saturation-model fit {alpha:.4g}"
        )
    if ts < 0.5 * float(np.min(t)):
        q = q.with_warning(
            f"no saturation seen down to {np.min(t):.3g} K; T_sat = {ts:.2g} ± {ts_err:.2g} K is poorly "
            "constrained",
            doubtful=False,
        )
    if alpha_err / alpha > 0.1:
        q = q.with_warning(f"lever-arm uncertainty {100 * alpha_err / alpha:.0f} % exceeds 10 %")
    return TemperatureSeriesFit(
        lever_arm=float(alpha),
        lever_arm_stderr=float(alpha_err),
        saturation_K=float(ts),
        saturation_stderr_K=float(ts_err),
        exponent=float(exponent),
        linear_lever_arm=float(lin_alpha),
        linear_lever_arm_stderr=float(lin_err),
        n_linear=int(np.count_nonzero(lin)),
        reduced_chi2=float(red),
        temperatures_K=tuple(map(float, t)),
        widths_V=tuple(map(float, w)),
        width_stderrs_V=tuple(map(float, e)),
        quality=q,
    )
