"""Interdot tunnel coupling from the polarisation line across an interdot transition.

Along the detuning direction the sensor signal is
``g(s) = g0 + δg · P(ε(s)) + slope · s`` with ``ε = a_ε (s − s0)`` (``a_ε`` the
detuning lever arm in eV per V along the profile) and
``P(ε) = ½[1 + (ε/Ω) tanh(Ω/2kT_e)]``, ``Ω = √(ε² + 4t²)``
(:mod:`stabtool.physics.polarisation`; the anticrossing gap is 2t). Given
``T_e`` and ``a_ε``, the line width fixes ``t``.

Notes
-----
Start values from a grid over (s0, t) with the linear parameters solved
exactly at each grid point (all grid points at once, by projection); then
bounded least squares (t ≥ 0) with the analytic Jacobian. The standard
error of ``t`` comes from the Jacobian, scaled by the residual variance.
When ``t`` is not above two standard errors, or ``t = 0`` fits within
Δχ² < 4 (near ``t = 0`` the linearised error is meaningless: ``P`` depends
on ``t²``), the line is thermally broadened
and only an upper limit ``t + 2σ`` is meaningful: the result says so and is
marked doubtful.

References
----------
L. DiCarlo et al., Phys. Rev. Lett. 92, 226801 (2004),
doi:10.1103/PhysRevLett.92.226801 (formula recalled from memory).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import xarray as xr
from scipy import ndimage, optimize

from ..errors import InputError
from ..physics.constants import KB_EV_PER_K
from ..physics.polarisation import polarisation, polarisation_fwhm_eV
from ..quality import Quality

__all__ = ["DetuningProfile", "PolarisationFit", "detuning_profile", "fit_polarisation_line"]

_NAN = float("nan")


@dataclass(frozen=True)
class PolarisationFit:
    """Result of :func:`fit_polarisation_line`.

    Attributes
    ----------
    tunnel_coupling_ueV, tunnel_coupling_stderr_ueV : float
        ``t`` (gap 2t) and its standard error, µeV.
    centre_V, centre_stderr_V : float
        Position of zero detuning along the profile, V.
    step, slope, offset : float
        ``δg`` (signal units), ``∂g/∂s`` (per V) and ``g0``.
    fwhm_V : float
        FWHM of ``dP/ds`` of the fitted line, V along the profile.
    reduced_chi2 : float
        χ²/dof with the noise estimated from point-to-point differences.
    quality : Quality
    """

    tunnel_coupling_ueV: float
    tunnel_coupling_stderr_ueV: float
    centre_V: float
    centre_stderr_V: float
    step: float
    slope: float
    offset: float
    fwhm_V: float
    reduced_chi2: float
    quality: Quality = field(default_factory=Quality)

    def __bool__(self) -> bool:
        return bool(np.isfinite(self.tunnel_coupling_ueV))


def _model(s, p, a_eps, temp):
    s0, t_ueV, g0, dg, sl = p
    return g0 + dg * polarisation(a_eps * (s - s0), abs(t_ueV) * 1e-6, temp) + sl * (s - s0)


def _polarisation_partials(eps: np.ndarray, t_eV: float, temp: float) -> tuple[np.ndarray, np.ndarray]:
    """``∂P/∂ε`` (1/eV) and ``∂P/∂t`` (1/eV) of ``P = ½[1 + (ε/Ω) tanh(Ω/2kT)]``, ``Ω = √(ε² + 4t²)``.

    Differentiating the formula of :func:`stabtool.physics.polarisation.polarisation`
    (T > 0): with ``h = tanh(Ω/2kT)`` and ``σ = 1 − h²``,
    ``∂P/∂Ω = ½ ε (σ/(2kT Ω) − h/Ω²)``, ``∂Ω/∂ε = ε/Ω``, ``∂Ω/∂t = 4t/Ω`` and
    ``∂P/∂ε|_Ω = ½ h/Ω``; so ``∂P/∂ε = ½[(4t²/Ω³) h + (ε²/Ω²) σ/(2kT)]`` (the
    physics module's ``polarisation_derivative``) and ``∂P/∂t = (4t/Ω) ∂P/∂Ω``.
    Used as the analytic Jacobian of the fit.
    """
    kt = KB_EV_PER_K * temp
    omega = np.sqrt(eps**2 + 4.0 * t_eV**2)
    x = omega / (2.0 * kt)
    h = np.tanh(x)
    sech2 = 1.0 / np.cosh(np.clip(x, -350, 350)) ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        inv = np.where(omega > 0, 1.0 / np.where(omega > 0, omega, 1.0), 0.0)
        d_eps = 0.5 * (4.0 * t_eV**2 * inv**3 * h + (eps * inv) ** 2 * sech2 / (2.0 * kt))
        # Ω → 0 (ε = t = 0): P is flat in t there
        d_omega = 0.5 * eps * (sech2 * inv / (2.0 * kt) - h * inv**2)
    d_eps = np.where(omega > 0, d_eps, 1.0 / (4.0 * kt))  # the Fermi slope at ε = 0, t = 0
    return d_eps, 4.0 * t_eV * inv * d_omega


def _jacobian(s, p, a_eps, temp):
    """Analytic Jacobian of :func:`_model` with respect to ``(s0, t_ueV, g0, δg, slope)``, shape (n, 5)."""
    s0, t_ueV, _g0, dg, sl = p
    d_eps, d_t = _polarisation_partials(a_eps * (s - s0), abs(t_ueV) * 1e-6, temp)
    jac = np.empty((s.size, 5))
    jac[:, 0] = -dg * a_eps * d_eps - sl
    jac[:, 1] = dg * d_t * 1e-6 * (1.0 if t_ueV >= 0 else -1.0)
    jac[:, 2] = 1.0
    jac[:, 3] = polarisation(a_eps * (s - s0), abs(t_ueV) * 1e-6, temp)
    jac[:, 4] = s - s0
    return jac


def _grid_start(s, g, a, temp, centres, t_grid) -> tuple[float, float, np.ndarray]:
    """Best (centre, t) of the grid with the linear parameters ``(g0, δg, slope)`` solved exactly.

    For every grid point the cost is the residual of ``g`` on ``[1, P, s − c]``;
    ``1`` and ``s − c`` span the same space for every centre, so ``g`` and each
    ``P`` are projected once on the complement of ``span{1, s}`` and the cost is
    ``|g⊥|² − (P⊥·g⊥)²/|P⊥|²``, for the whole grid at once. Returns the centre,
    t (µeV) and the linear coefficients of the best point.
    """
    n = s.size
    sc = s - s.mean()
    q1 = sc / np.sqrt(sc @ sc)
    gp = g - g.mean()
    gp = gp - q1 * (q1 @ gp)
    cost = np.empty((t_grid.size, centres.size))
    eps = a * (s[None, :] - centres[:, None])  # (n_centres, n)
    for i, t in enumerate(t_grid):
        pp = polarisation(eps, t * 1e-6, temp)
        pp = pp - pp.mean(axis=1, keepdims=True)
        pp = pp - np.outer(pp @ q1, q1)
        num = pp @ gp
        den = np.einsum("ij,ij->i", pp, pp)
        with np.errstate(invalid="ignore", divide="ignore"):
            cost[i] = gp @ gp - np.where(den > 1e-300 * n, num**2 / den, 0.0)
    it, ic = np.unravel_index(int(np.argmin(cost)), cost.shape)  # first minimum, as a (t, c) scan would find
    c0, t0 = float(centres[ic]), float(t_grid[it])
    p = polarisation(a * (s - c0), t0 * 1e-6, temp)
    m = np.stack([np.ones_like(s), p, s - c0], axis=1)
    coef, *_ = np.linalg.lstsq(m, g, rcond=None)
    return c0, t0, coef


def fit_polarisation_line(
    s_V: np.ndarray,
    signal: np.ndarray,
    *,
    electron_temperature_K: float,
    detuning_lever_arm: float,
) -> PolarisationFit:
    """Fit ``t`` from a profile across an interdot line.

    Parameters
    ----------
    s_V : array_like, shape (n,)
        Position along the detuning direction, V (any origin).
    signal : array_like, shape (n,)
        Sensor signal.
    electron_temperature_K : float
        Electron temperature, K (> 0).
    detuning_lever_arm : float
        ``|dε/ds|``, eV per V along the profile (see
        :func:`stabtool.physics.polarisation.detuning_lever_arm`).

    Returns
    -------
    PolarisationFit
    """
    s = np.asarray(s_V, float)
    g = np.asarray(signal, float)
    if s.ndim != 1 or s.shape != g.shape:
        raise InputError("signal", f"expected two 1-D arrays of equal length, got {s.shape} and {g.shape}")
    if not (electron_temperature_K > 0):
        raise InputError("electron_temperature_K", f"expected a positive temperature, got {electron_temperature_K}")
    if not (detuning_lever_arm > 0):
        raise InputError("detuning_lever_arm", f"expected a positive lever arm, got {detuning_lever_arm}")
    ok = np.isfinite(s) & np.isfinite(g)
    s, g = s[ok], g[ok]
    if s.size < 12:
        raise InputError("signal", f"a polarisation-line fit needs at least 12 finite points, got {s.size}")
    order = np.argsort(s)
    s, g = s[order], g[order]
    a = float(detuning_lever_arm)
    temp = float(electron_temperature_K)
    kt_ueV = KB_EV_PER_K * temp * 1e6
    span = s[-1] - s[0]
    step_s = float(np.median(np.diff(s)))
    noise = float(1.4826 * np.median(np.abs(np.diff(g) - np.median(np.diff(g)))) / np.sqrt(2))
    # grid over (s0, t): linear parameters (g0, δg, slope) exact
    centres = np.linspace(s[0] + 0.05 * span, s[-1] - 0.05 * span, 81)
    t_max = 0.25 * span * a * 1e6
    t_grid = np.concatenate([[0.0], np.geomspace(max(0.05 * kt_ueV, 1e-3), max(t_max, kt_ueV), 14)])
    c0, t0, coef = _grid_start(s, g, a, temp, centres, t_grid)
    p0 = np.array([c0, max(t0, 0.1 * kt_ueV), coef[0], coef[1], coef[2]])
    lo = np.array([s[0], 0.0, -np.inf, -np.inf, -np.inf])
    hi = np.array([s[-1], np.inf, np.inf, np.inf, np.inf])
    xs = np.array([step_s, max(kt_ueV, 1.0), 1.0, 1.0, 1.0])
    sol = optimize.least_squares(lambda p: _model(s, p, a, temp) - g, np.clip(p0, lo, hi), bounds=(lo, hi),
                                 x_scale=xs, method="trf", jac=lambda p: _jacobian(s, p, a, temp))
    p = sol.x
    dof = max(s.size - 5, 1)
    s2 = 2 * sol.cost / dof
    cov = np.linalg.pinv(sol.jac.T @ sol.jac) * s2
    err = np.sqrt(np.clip(np.diag(cov), 0, None))
    t_fit, t_err = abs(float(p[1])), float(err[1])
    fwhm_V = polarisation_fwhm_eV(t_fit * 1e-6, temp) / a
    red = s2 / noise**2 if noise > 0 else _NAN
    q = Quality()
    if abs(p[3]) < 5 * max(noise, 1e-300) / np.sqrt(max(fwhm_V / step_s, 1.0)):
        q = q.with_warning("the polarisation step is not significant above the noise")
    if not (t_fit > 2 * t_err) or not _zero_t_excluded(s, g, p, a, temp, sol.cost, s2):
        upper = _upper_limit(s, g, p, a, temp, sol.cost, s2, kt_ueV)
        q = q.with_warning(
            f"tunnel coupling not resolved above the thermal width (k_B T_e = {kt_ueV:.3g} µeV): "
            f"t < {upper:.3g} µeV (2σ upper limit)"
        )
    elif t_err / max(t_fit, 1e-300) > 0.1:
        q = q.with_warning(f"tunnel-coupling uncertainty {100 * t_err / t_fit:.0f} % exceeds 10 %")
    if fwhm_V < 3 * step_s:
        q = q.with_warning(
            f"the line FWHM {fwhm_V:.3g} V spans fewer than 3 sampling steps ({step_s:.3g} V): resolution-limited"
        )
    if fwhm_V > 0.5 * span:
        q = q.with_warning("the line is wider than half the profile; the background is poorly constrained")
    if np.isfinite(red) and red > 3:
        q = q.with_warning(f"reduced chi-squared {red:.2g} > 3: the polarisation model does not describe the profile")
    return PolarisationFit(
        tunnel_coupling_ueV=t_fit, tunnel_coupling_stderr_ueV=t_err,
        centre_V=float(p[0]), centre_stderr_V=float(err[0]),
        step=float(p[3]), slope=float(p[4]), offset=float(p[2]),
        fwhm_V=float(fwhm_V), reduced_chi2=float(red), quality=q,
    )


def _fit_at_fixed_t(s, g, start, t, a, temp):
    """Least squares of ``(s0, g0, δg, slope)`` with ``t`` (µeV) held fixed; ``start`` is a 5-vector."""
    def res(q):
        return _model(s, np.array([q[0], t, q[1], q[2], q[3]]), a, temp) - g

    def jac(q):
        return _jacobian(s, np.array([q[0], t, q[1], q[2], q[3]]), a, temp)[:, [0, 2, 3, 4]]

    return optimize.least_squares(res, np.array([start[0], start[2], start[3], start[4]]), method="lm", jac=jac)


def _zero_t_excluded(s, g, p, a, temp, cost0, s2) -> bool:
    """Whether ``t = 0`` is excluded at 2σ by the profile likelihood (Δχ² ≥ 4).

    ``P`` depends on ``t²``, so near ``t = 0`` the χ² surface is flat to
    fourth order and the linearised error of ``t`` says nothing: a fit that
    ends close to the bound has to be compared with the best fit at ``t = 0``.
    """
    sol = _fit_at_fixed_t(s, g, p, 0.0, a, temp)
    return bool(2 * (sol.cost - cost0) / s2 >= 4.0)


def _upper_limit(s, g, p, a, temp, cost0, s2, kt_ueV) -> float:
    """Profile-likelihood 2σ upper limit of t: smallest t ≥ t_fit with Δχ² ≥ 4."""
    t_fit = abs(float(p[1]))
    prev = p.copy()
    for t in np.geomspace(max(t_fit, 0.05 * kt_ueV), 50 * kt_ueV + t_fit, 60):
        sol = _fit_at_fixed_t(s, g, prev, t, a, temp)
        prev = np.array([sol.x[0], t, sol.x[1], sol.x[2], sol.x[3]])
        if 2 * (sol.cost - cost0) / s2 >= 4.0:
            return float(t)
    return float("inf")


@dataclass(frozen=True)
class DetuningProfile:
    """Signal along a straight cut through a map.

    ``s_V`` is the signed distance (V, in gate-voltage space) from ``through``
    along ``direction`` (unit vector ``(ux, uy)``); ``signal`` the map value
    averaged over ``n_average`` parallel cuts.
    """

    s_V: np.ndarray
    signal: np.ndarray
    through: tuple[float, float]
    direction: tuple[float, float]
    n_average: int


def detuning_profile(
    data: xr.DataArray,
    *,
    through: tuple[float, float],
    direction: tuple[float, float],
    half_length_V: float,
    half_width_V: float = 0.0,
    n_points: int = 201,
    n_average: int = 5,
) -> DetuningProfile:
    """Cut a map along ``direction`` through the point ``through`` (x, y in V).

    Bilinear interpolation (:func:`scipy.ndimage.map_coordinates`, order 1)
    on the map's voltage axes; with ``half_width_V > 0`` the profile is the mean
    of ``n_average`` parallel cuts spread over ± ``half_width_V``.
    """
    if not isinstance(data, xr.DataArray) or data.ndim != 2:
        raise InputError("data", "expected a 2-D DataArray (y, x)")
    ydim, xdim = data.dims
    xs = np.asarray(data[xdim].values, float)
    ys = np.asarray(data[ydim].values, float)
    u = np.asarray(direction, float)
    nrm = np.hypot(*u)
    if not nrm > 0:
        raise InputError("direction", "must be a non-zero vector")
    u = u / nrm
    perp = np.array([-u[1], u[0]])
    s = np.linspace(-half_length_V, half_length_V, int(n_points))
    offs = np.linspace(-half_width_V, half_width_V, int(n_average)) if half_width_V > 0 else np.array([0.0])
    vals = np.asarray(data.values, float)
    acc = np.zeros_like(s)
    for o in offs:
        px = through[0] + s * u[0] + o * perp[0]
        py = through[1] + s * u[1] + o * perp[1]
        ix = np.interp(px, xs, np.arange(xs.size)) if xs[0] < xs[-1] else np.interp(px, xs[::-1], np.arange(xs.size)[::-1])
        iy = np.interp(py, ys, np.arange(ys.size)) if ys[0] < ys[-1] else np.interp(py, ys[::-1], np.arange(ys.size)[::-1])
        acc += ndimage.map_coordinates(vals, [iy, ix], order=1, mode="nearest")
    return DetuningProfile(s, acc / offs.size, (float(through[0]), float(through[1])), (float(u[0]), float(u[1])), int(offs.size))
