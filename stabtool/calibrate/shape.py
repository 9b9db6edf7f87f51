"""Non-thermal broadening test: a Fermi step against a Lorentzian-broadened one.

A level coupled strongly to its reservoir (tunnel/lifetime broadening) has a
Lorentzian density of states; its occupation is the Fermi function convolved
with a Lorentzian of half width γ
(:func:`stabtool.physics.thermal.broadened_occupation`). Fitting that shape
with γ free and comparing it with the pure Fermi fit tells whether the width
is thermal. A thermal-looking fit of a broadened line would overestimate
``w`` and underestimate the lever arm, so the verdict is reported, never
folded into the width.

Notes
-----
The test is nested-model least squares: γ ≥ 0 is added to the Fermi model,
and broadening is reported when γ exceeds 3 standard errors, is at least
15 % of the thermal width, and lowers χ² by more than 9 noise variances
(a 3σ improvement for one extra parameter). The digamma closed form of the
convolved occupation is used (common practice, no source).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import optimize

from ..fit.fermi import FermiStepFit
from ..physics.thermal import broadened_occupation

__all__ = ["ShapeComparison", "compare_line_shapes"]

_NBG = {"none": 0, "linear": 2, "quadratic": 3}


@dataclass(frozen=True)
class ShapeComparison:
    """Result of :func:`compare_line_shapes`.

    Attributes
    ----------
    thermal : bool
        True when the line shape is consistent with pure thermal broadening.
    gamma_V, gamma_stderr_V : float
        Lorentzian half width (gate volts) of the broadened fit and its error.
    width_V : float
        Thermal width of the broadened fit, V.
    delta_chi2 : float
        χ² decrease (in units of the noise variance) from adding γ.
    message : str
        One line for a warning ("" when thermal and conclusive).
    inconclusive : bool
        True when the trace is consistent with thermal broadening but too
        noisy to exclude a Lorentzian half width above the thermal width
        (γ + 2σ_γ > w).
    """

    thermal: bool
    gamma_V: float
    gamma_stderr_V: float
    width_V: float
    delta_chi2: float
    message: str = ""
    inconclusive: bool = False


def compare_line_shapes(v: np.ndarray, signal: np.ndarray, fermi: FermiStepFit) -> ShapeComparison:
    """Fit a Lorentzian-broadened Fermi step from ``fermi`` and test whether γ is needed.

    Parameters
    ----------
    v, signal : array_like, shape (n,)
        The trace (gate voltages in V).
    fermi : FermiStepFit
        A successful Fermi fit of the same trace.

    Returns
    -------
    ShapeComparison
    """
    v = np.asarray(v, float)
    s = np.asarray(signal, float)
    ok = np.isfinite(v) & np.isfinite(s)
    v, s = v[ok], s[ok]
    if not fermi:
        return ShapeComparison(False, np.nan, np.nan, np.nan, np.nan, "no Fermi fit to compare with")
    nbg = _NBG[fermi.background_kind]
    vref, w0 = fermi.background_ref_V, fermi.width_V
    ys = float(np.std(s)) or 1.0
    x = (v - vref) / w0  # voltages in units of the Fermi width

    def model(p):
        x0, w, g, h = p[:4]
        occ = broadened_occupation(x, x0, w, abs(g))
        bg = sum(p[4 + k] * (x / 100.0) ** k for k in range(nbg))
        return bg + h * (1.0 - occ)

    b = np.asarray(fermi.background[:nbg]) * (w0 * 100.0) ** np.arange(nbg) / ys
    p_f = np.concatenate([[(fermi.centre_V - vref) / w0, 1.0, 0.0, fermi.step_height / ys], b])
    fun = lambda p: model(p) - s / ys
    chi_f = float(np.sum(fun(p_f) ** 2))
    best = None
    for g0 in (0.05, 0.3, 1.0):
        p0 = p_f.copy()
        p0[2] = g0
        p0[1] = max(0.3, 1.0 - 0.5 * g0)
        lo = np.full(p0.size, -np.inf)
        hi = np.full(p0.size, np.inf)
        lo[1], lo[2] = 1e-3, 0.0
        sol = optimize.least_squares(fun, p0, bounds=(lo, hi), method="trf", x_scale="jac")
        if best is None or sol.cost < best.cost:
            best = sol
    assert best is not None
    chi_b = 2 * best.cost
    n = x.size
    dof = max(n - best.x.size, 1)
    var = chi_b / dof
    try:
        cov = np.linalg.pinv(best.jac.T @ best.jac) * var
        g_err = float(np.sqrt(max(cov[2, 2], 0.0)))
    except np.linalg.LinAlgError:  # pragma: no cover
        g_err = np.nan
    gamma = float(best.x[2])
    width = float(best.x[1])
    dchi = (chi_f - chi_b) / var if var > 0 else np.inf
    broadened = gamma > 3 * g_err and gamma > 0.15 * width and dchi > 9.0
    msg = ""
    if broadened:
        msg = (
            f"non-thermal broadening: a Lorentzian half width {gamma * w0:.3g} V "
            f"(± {g_err * w0:.2g} V, {gamma / width:.2f} of the thermal width) improves the fit "
            f"(Δχ² = {dchi:.0f}); the Fermi width overestimates k_B T/(e α)"
        )
    inconclusive = False
    if not broadened and np.isfinite(g_err) and gamma + 2 * g_err > width:
        inconclusive = True
        msg = (
            f"line-shape test inconclusive: the trace cannot exclude a Lorentzian half width up to "
            f"{(gamma + 2 * g_err) * w0:.3g} V (thermal width {width * w0:.3g} V); more signal-to-noise "
            "or a temperature series is needed to confirm thermal broadening"
        )
    return ShapeComparison(not broadened, gamma * w0, g_err * w0, width * w0, float(dchi), msg, inconclusive)
