"""Global refinement: the constant-interaction model fitted to the map itself.

Starting from the line-based estimate, the map is modelled as

``s(x, y) = P2(x, y) + g1(x, y) ⟨N1⟩ + g2(x, y) ⟨N2⟩``

with ``P2`` a smooth quadratic sensor background, ``g_i`` steps that vary
linearly across the map (a sensor's sensitivity drifts along its flank) plus
quadratic terms in the occupations (a sensor's nonlinear response to the
charge it sees) and ``⟨N_i⟩`` the thermal
(Boltzmann) average occupations of the constant-interaction energy, written
in units of ``e α11`` volts:

``F(N) = ½ ΔV1 N1² + δ1 N1 N2 + ½ r ΔV2 N2² − N1 (V'_1 − c1) − r N2 (V'_2 − c2)``,

``r = α22/α11 = δ1/δ2``, weights ``exp(−F/w1)`` with the Fermi width
``w1 = k_B T/(e α11)`` (and ``w2 = w1 / r``). Polarity is free (g1, g2 of any
sign). The linear coefficients are solved at every step (variable
projection); the nine nonlinear ones ``(M12, M21, ΔV1, ΔV2, δ1, r, c1, c2, w1)``
by :func:`scipy.optimize.least_squares` on a subsampled map. The residual is
compared with the noise to flag maps that the model does not describe.

References
----------
W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1 (constant-interaction model).
G. H. Golub and V. Pereyra, "The differentiation of pseudo-inverses and
nonlinear least squares problems whose variables separate", SIAM J. Numer.
Anal. 10, 413 (1973), doi:10.1137/0710036 (variable projection).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr
from scipy.optimize import least_squares

from ..quality import Quality
from .model import DiagramFit

__all__ = ["MAX_RESIDUAL_RATIO", "PARAM_NAMES", "Refinement", "model_occupations", "refine_model"]

PARAM_NAMES = ("M12", "M21", "addition_V1", "addition_V2", "mutual_V1", "alpha_ratio_22_11", "c1", "c2", "width_V1")
#: Residual rms over noise above which (with a residual above 25 % of the smallest step) the model is rejected.
MAX_RESIDUAL_RATIO = 1.5


_OFFSETS = np.array([(i, j) for i in (-1, 0, 1) for j in (-1, 0, 1)], float)


def model_occupations(
    x: np.ndarray, y: np.ndarray, theta: np.ndarray, *, n_min: tuple[int | None, int | None] = (None, None)
) -> tuple[np.ndarray, np.ndarray]:
    """Thermal average occupations ⟨N1⟩, ⟨N2⟩ at points ``(x, y)`` (V).

    Parameters
    ----------
    x, y : ndarray, shape (p,)
    theta : ndarray, shape (9,)
        ``(M12, M21, ΔV1, ΔV2, δ1, r, c1, c2, w1)``.
    n_min : pair of int or None
        Lowest allowed occupations (in the lattice's label units).
    """
    m12, m21, dv1, dv2, d1, r, c1, c2, w1 = theta
    u = x + m12 * y - c1
    v = r * (m21 * x + y - c2)
    a = np.array([[dv1, d1], [d1, r * dv2]])
    ainv = np.linalg.inv(a)
    cont = np.stack([u, v], -1) @ ainv.T
    base = np.rint(cont)
    for i, lowest in enumerate(n_min):
        if lowest is not None:
            base[:, i] = np.maximum(base[:, i], lowest + 1)
    offs = _OFFSETS
    n1 = base[None, :, 0] + offs[:, 0, None]
    n2 = base[None, :, 1] + offs[:, 1, None]
    f = (0.5 * dv1 * n1 * n1 + d1 * n1 * n2 + 0.5 * r * dv2 * n2 * n2 - n1 * u - n2 * v) / w1
    f -= f.min(axis=0, keepdims=True)
    wts = np.exp(-f)
    z = wts.sum(axis=0)
    return (wts * n1).sum(axis=0) / z, (wts * n2).sum(axis=0) / z


def _linear(a: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Least-squares coefficients by the normal equations (columns are well scaled)."""
    ata = a.T @ a
    ata[np.diag_indices_from(ata)] *= 1.0 + 1e-12
    try:
        return np.linalg.solve(ata, a.T @ z)
    except np.linalg.LinAlgError:
        return np.linalg.pinv(ata) @ (a.T @ z)


def _design(xn: np.ndarray, yn: np.ndarray, o1: np.ndarray, o2: np.ndarray) -> np.ndarray:
    c1, c2 = o1 - o1.mean(), o2 - o2.mean()
    return np.column_stack([np.ones_like(xn), xn, yn, xn * xn, xn * yn, yn * yn, c1, c2,
                            c1 * xn, c1 * yn, c2 * xn, c2 * yn, c1 * c1, c1 * c2, c2 * c2])


@dataclass(frozen=True)
class Refinement:
    """Result of the global model fit.

    Attributes
    ----------
    ok : bool
        The fit converged and the model describes the map (residual near noise).
    params, errors : dict
        Refined values and standard errors of ``PARAM_NAMES`` plus derived
        ``mutual_V2`` (δ2 = δ1/r) and ``width_V2`` (w1/r).
    cov : ndarray, shape (9, 9)
    residual_ratio : float
        rms residual / noise standard deviation.
    noise : float
        Noise standard deviation of the map (from point-to-point differences).
    step : tuple of float
        Signal steps g1, g2 per added electron.
    width_resolved : bool
        The fitted width is not at its lower bound (set by the subsampling).
    stride : tuple of int
        Subsampling (y, x).
    quality : Quality
    """

    ok: bool
    params: dict
    errors: dict
    cov: np.ndarray
    residual_ratio: float
    noise: float
    step: tuple[float, float]
    width_resolved: bool
    stride: tuple[int, int]
    n_min: tuple[int | None, int | None] = (None, None)
    quality: Quality = field(default_factory=Quality)

    def __bool__(self) -> bool:
        return self.ok

    def to_json(self) -> dict[str, Any]:
        return {
            "ok": bool(self.ok),
            "params": dict(self.params),
            "errors": dict(self.errors),
            "residual_over_noise": self.residual_ratio,
            "noise": self.noise,
            "signal_step_per_electron": list(self.step),
            "width_resolved": bool(self.width_resolved),
            "stride": list(self.stride),
        }


def _noise(z: np.ndarray) -> float:
    d = np.diff(z, axis=1).ravel()
    d = d[np.isfinite(d)]
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2)) if d.size else float("nan")


def refine_model(
    da: xr.DataArray,
    fit: DiagramFit,
    *,
    charge_states: Any = None,
    max_points: int = 96,
    width_guess_V: float | None = None,
) -> Refinement:
    """Fit the constant-interaction model to the map, starting from ``fit``.

    Parameters
    ----------
    da : xarray.DataArray
        The map (dims y, x; volts).
    fit : DiagramFit
        Line-based estimate (must test true).
    charge_states : ChargeStates, optional
        When a dot's occupation is absolute, states below its empty level are
        excluded from the model.
    max_points : int
        The map is subsampled to at most this many points per axis.
    width_guess_V : float, optional
        Starting Fermi width of dot1 lines, V.

    Returns
    -------
    Refinement
        Tests false (with warnings) when the fit failed or the model does not
        describe the map.
    """
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    z = np.asarray(da.values, float)
    noise = _noise(z)
    sy = max(1, int(np.ceil(y.size / max_points)))
    sx = max(1, int(np.ceil(x.size / max_points)))
    xs, ys, zs = x[::sx], y[::sy], z[::sy, ::sx]
    xx, yy = np.meshgrid(xs, ys)
    ok = np.isfinite(zs)
    px, py, pz = xx[ok], yy[ok], zs[ok]
    xm, ym = px.mean(), py.mean()
    xr_, yr_ = max(np.ptp(px), 1e-12), max(np.ptp(py), 1e-12)
    xn, yn = (px - xm) / xr_, (py - ym) / yr_
    n_min: tuple[int | None, int | None] = (None, None)
    lat = fit.lattice
    if lat is not None:
        lows = (int(lat.labels1[:, 0].min()) - 1, int(lat.labels2[:, 1].min()) - 1)
        n_min = lows  # no states below the lowest detected lines
    dv1, dv2 = fit.addition_V
    d1, d2 = np.maximum(fit.mutual_V, 0.0)
    r0 = d1 / d2 if d1 > 0 and d2 > 0 else dv1 / dv2
    pitch = abs(xs[1] - xs[0]) if xs.size > 1 else dv1 / 50
    w_lo = 0.3 * pitch
    w0 = width_guess_V if width_guess_V and np.isfinite(width_guess_V) else max(pitch, 0.02 * dv1)
    w0 = max(w0, 1.5 * w_lo)
    theta0 = np.array([fit.vg_matrix[0, 1], fit.vg_matrix[1, 0], dv1, dv2, max(d1, 1e-3 * dv1), r0,
                       fit.offsets_V[0], fit.offsets_V[1], w0])
    scale = np.array([0.01, 0.01, 0.01 * dv1, 0.01 * dv2, 0.01 * dv1, 0.01 * r0, 0.01 * dv1, 0.01 * dv2, w0])
    lo = np.array([-np.inf, -np.inf, 0.3 * dv1, 0.3 * dv2, 0.0, 0.05 * r0, -np.inf, -np.inf, w_lo])
    hi = np.array([np.inf, np.inf, 3 * dv1, 3 * dv2, 0.9 * dv1, 20 * r0, np.inf, np.inf, 0.5 * dv1])
    sig = noise if np.isfinite(noise) and noise > 0 else float(np.nanstd(pz)) * 0.01 + 1e-30

    def resid(theta: np.ndarray) -> np.ndarray:
        o1, o2 = model_occupations(px, py, theta, n_min=n_min)
        a = _design(xn, yn, o1, o2)
        coef = _linear(a, pz)
        return (pz - a @ coef) / sig

    q = Quality()
    try:
        sol = least_squares(resid, theta0, x_scale=scale, bounds=(lo, hi), method="trf", max_nfev=60)
    except (ValueError, np.linalg.LinAlgError) as exc:
        q = q.with_warning(f"model fit to the map failed: {exc}")
        return Refinement(False, {}, {}, np.full((9, 9), np.nan), np.nan, noise, (np.nan, np.nan), False, (sy, sx),
                          n_min, q)
    theta = sol.x
    res = sol.fun
    dof = max(res.size - theta.size - 15, 1)
    chi2 = float(np.sum(res**2) / dof)
    jac = sol.jac
    try:
        cov = np.linalg.pinv(jac.T @ jac) * max(chi2, 1.0)
    except np.linalg.LinAlgError:
        cov = np.full((9, 9), np.nan)
    err = np.sqrt(np.clip(np.diag(cov), 0, None))
    o1, o2 = model_occupations(px, py, theta, n_min=n_min)
    coef = _linear(_design(xn, yn, o1, o2), pz)
    g1, g2 = float(coef[6]), float(coef[7])
    ratio = float(np.sqrt(chi2))
    width_resolved = bool(theta[8] > 1.2 * w_lo)
    params = dict(zip(PARAM_NAMES, map(float, theta)))
    errors = dict(zip(PARAM_NAMES, map(float, err)))
    params["mutual_V2"] = float(theta[4] / theta[5])
    errors["mutual_V2"] = float(params["mutual_V2"] * np.hypot(err[4] / max(theta[4], 1e-30), err[5] / theta[5]))
    params["width_V2"] = float(theta[8] / theta[5])
    errors["width_V2"] = float(params["width_V2"] * np.hypot(err[8] / theta[8], err[5] / theta[5]))
    step_min = min(abs(g1), abs(g2))
    if not sol.success:
        q = q.with_warning(f"model fit to the map did not converge: {sol.message}")
    if ratio > MAX_RESIDUAL_RATIO and ratio * sig > 0.25 * step_min:
        if width_resolved:
            q = q.with_warning(
                f"the constant-interaction model does not describe the map: residual is {ratio:.1f}× the noise"
            )
        else:
            # lines sharper than the fitted grid: the residual measures pixelation, not the model
            q = q.with_warning(
                f"model residual {ratio:.1f}× the noise with lines sharper than the fitted grid "
                f"(stride {max(sy, sx)}): the check is inconclusive",
                doubtful=False,
            )
    if step_min < 3 * sig:
        q = q.with_warning(
            f"charge steps are weak: smallest step {step_min:.3g} vs noise {sig:.3g} (SNR {step_min / sig:.1f})"
        )
    return Refinement(ok=q.ok, params=params, errors=errors, cov=cov, residual_ratio=ratio, noise=noise,
                      step=(g1, g2), width_resolved=width_resolved, stride=(sy, sx), n_min=n_min, quality=q)
