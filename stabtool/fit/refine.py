"""Global refinement: the constant-interaction model fitted to the map itself.

Starting from the line-based estimate (:func:`stabtool.fit.model.fit_diagram`),
the map is modelled as

``s(x, y) = Σ_N p_N(x, y) · (a_N + b_N x + c_N y) + q(x, y)``

where ``p_N`` is the thermal (Boltzmann) probability of charge state
``N = (N1, N2)``, each charge state has its own sensor signal, smooth across
the state's cell (a plane ``a_N + b_N x + c_N y``: a charge sensor reads a
smooth function of the electrostatic potential, different for each charge
configuration, so no assumption on the sensor's response curve is made), and
``q`` is a common quadratic curvature. The probabilities come from the
constant-interaction energy written in units of ``e α11`` volts:

``F(N) = ½ ΔV1 N1² + δ1 N1 N2 + ½ r ΔV2 N2² − N1 (V'_1 − c1) − r N2 (V'_2 − c2)``,

``V' = M V``, ``r = α22/α11 = δ1/δ2``, weights ``exp(−F/w1)`` with the Fermi
width ``w1 = k_B T/(e α11)`` along x (the dot2 width along y is ``w1/r``).

The linear coefficients (three per charge state plus the curvature) are
solved at every step (variable projection); the nine nonlinear ones
``(M12, M21, ΔV1, ΔV2, δ1, r, c1, c2, w1)`` by a damped Gauss–Newton
(Levenberg–Marquardt) iteration on the pixels within a few line widths of
the predicted transitions (at full resolution, so sharp lines are not
pixelated) plus a sparse grid of the rest. The covariance of the nonlinear
parameters uses the variable-projection Jacobian (the linear coefficients
projected out) in a cluster-robust sandwich with one cluster per map row,
which stays honest when the noise is correlated along the fast axis (row
offsets, 1/f noise) or the model is imperfect, and is never smaller than the
usual ``χ²_red``-scaled estimate.

References
----------
W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1 (constant-interaction model).
G. H. Golub and V. Pereyra, "The differentiation of pseudo-inverses and
nonlinear least squares problems whose variables separate", SIAM J. Numer.
Anal. 10, 413 (1973), doi:10.1137/0710036 (variable projection).
L. Kaufman, "A variable projection method for solving separable nonlinear
least squares problems", BIT 15, 49 (1975), doi:10.1007/BF01932995.
K.-Y. Liang and S. L. Zeger, "Longitudinal data analysis using generalized
linear models", Biometrika 73, 13 (1986), doi:10.1093/biomet/73.1.13
(cluster-robust "sandwich" covariance).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.sparse as sp
import xarray as xr

from ..quality import Quality
from .model import DiagramFit

__all__ = ["MAX_RESIDUAL_RATIO", "PARAM_NAMES", "Adoption", "Refinement", "adopt_refinement", "clustered_covariance",
           "model_occupations", "refine_model"]

PARAM_NAMES = ("M12", "M21", "addition_V1", "addition_V2", "mutual_V1", "alpha_ratio_22_11", "c1", "c2", "width_V1")
#: Residual rms over noise above which (with a residual above 25 % of the smallest step) the model is rejected.
MAX_RESIDUAL_RATIO = 1.5
#: Pixels within this many Fermi widths (or pixels, whichever is larger) of a transition are fitted.
BAND_WIDTHS = 5.0
#: Largest number of fitted pixels (band pixels are thinned evenly above it).
MAX_POINTS = 2500
#: Lower bound of the Fermi width, in pixels (a sharper step is unresolved; the bound keeps the
#: model differentiable between pixels).
W_LO_PX = 0.1
#: Factor on the sandwich standard errors: on maps rendered by the model itself (white noise,
#: SNR 10, 8 noise draws × 6 maps) the pulls of the nine parameters have rms 1.1–1.3 (the
#: linearisation at a noisy optimum), so the errors are widened by this factor.
STAT_INFLATION = 1.25

_OFFSETS = np.array([(i, j) for i in (-1, 0, 1) for j in (-1, 0, 1)], float)


def _state_weights(
    x: np.ndarray, y: np.ndarray, theta: np.ndarray, n_min: tuple[int | None, int | None], *, gap: bool = False
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """Boltzmann probabilities of the 9 states around the nearest lattice state.

    Returns ``n1, n2`` (shape (9, p), the states), ``prob`` (9, p) and, with
    ``gap``, the energy gap (p,) between the two lowest states in units of
    ``w1`` (else None; ``prob`` is then not computed either).
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
    n1 = base[None, :, 0] + _OFFSETS[:, 0, None]
    n2 = base[None, :, 1] + _OFFSETS[:, 1, None]
    f = (0.5 * dv1 * n1 * n1 + d1 * n1 * n2 + 0.5 * r * dv2 * n2 * n2 - n1 * u - n2 * v) / w1
    for i, lowest in enumerate(n_min):
        if lowest is not None:
            f = np.where((n1 if i == 0 else n2) < lowest, np.inf, f)
    f -= f.min(axis=0, keepdims=True)
    if gap:
        return n1, n2, f, np.partition(f, 1, axis=0)[1]
    wts = np.exp(-f)
    prob = wts / wts.sum(axis=0)
    return n1, n2, prob, None


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

    Returns
    -------
    n1, n2 : ndarray, shape (p,)
    """
    n1, n2, prob, _ = _state_weights(np.asarray(x, float), np.asarray(y, float), np.asarray(theta, float), n_min)
    return (prob * n1).sum(axis=0), (prob * n2).sum(axis=0)


@dataclass(frozen=True)
class Refinement:
    """Result of the global model fit.

    Attributes
    ----------
    ok : bool
        The fit converged and the model describes the map (residual near noise).
    params, errors : dict
        Refined values and standard errors of ``PARAM_NAMES`` plus derived
        ``mutual_V2`` (δ2 = δ1/r) and ``width_V2`` (w1/r); errors from the
        row-clustered sandwich covariance.
    cov : ndarray, shape (9, 9)
        Covariance of ``PARAM_NAMES`` (row-clustered sandwich, at least the
        ``χ²_red``-scaled Gauss–Newton covariance).
    residual_ratio : float
        rms residual / noise standard deviation.
    noise : float
        Noise standard deviation of the map (from point-to-point differences).
    step : tuple of float
        Median signal change for one added electron on dot1, dot2.
    width_resolved : bool
        The fitted width is not at its lower bound (a tenth of a pixel).
    stride : tuple of int
        Stride (y, x) of the sparse grid of pixels far from any line.
    n_points : int
        Pixels fitted.
    iterations : int
    converged : bool
    snr : float
        Median charge-step height (both dots, between neighbouring charge
        states at the map centre) over the noise standard deviation.
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
    n_points: int = 0
    iterations: int = 0
    converged: bool = False
    snr: float = float("nan")

    def __bool__(self) -> bool:
        return self.ok

    def vector(self) -> tuple[np.ndarray, np.ndarray]:
        """``(M12, M21, ΔV1, δ1, ΔV2, δ2)`` and its (6, 6) covariance (the order of ``DiagramFit.params``)."""
        p = self.params
        th = np.array([p[k] for k in PARAM_NAMES])
        d1, r = th[4], th[5]
        # linear map from the 9 parameters to the 6: δ2 = δ1 / r
        jac = np.zeros((6, 9))
        jac[0, 0] = jac[1, 1] = jac[2, 2] = jac[4, 3] = jac[3, 4] = 1.0
        jac[5, 4] = 1.0 / r
        jac[5, 5] = -d1 / r**2
        vec = np.array([th[0], th[1], th[2], d1, th[3], d1 / r])
        return vec, jac @ self.cov @ jac.T

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
            "n_points": int(self.n_points),
            "iterations": int(self.iterations),
            "converged": bool(self.converged),
            "snr": self.snr,
        }


def _noise(z: np.ndarray) -> float:
    d = np.diff(z, axis=1).ravel()
    d = d[np.isfinite(d)]
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2)) if d.size else float("nan")


def clustered_covariance(jac: np.ndarray, res: np.ndarray, clusters: np.ndarray, *, dof: int) -> np.ndarray:
    """Cluster-robust (sandwich) covariance of least-squares parameters, never below the plain one.

    Parameters
    ----------
    jac : ndarray, shape (n, k)
        Jacobian of the model at the solution (linear coefficients projected out).
    res : ndarray, shape (n,)
        Residuals (data − model).
    clusters : ndarray of int, shape (n,)
        Cluster of every point (here the map row): residuals may be correlated
        within a cluster, not between clusters.
    dof : int
        Degrees of freedom of the residual.

    Returns
    -------
    ndarray, shape (k, k)
        ``H⁻¹ (Σ_c s_c s_cᵀ) H⁻¹ · G/(G−1) · (n−1)/dof`` with ``H = JᵀJ``,
        ``s_c = Σ_{i∈c} J_i r_i`` over the ``G`` clusters; each standard error
        is raised to the plain ``χ²``-scaled one ``(H⁻¹ RSS/dof)`` and to the
        random-effects one (one offset of variance ``τ²`` per cluster, ``τ²``
        from the cluster means of the residuals) where those are larger (few
        clusters make the sandwich noisy and biased low).

    References
    ----------
    K.-Y. Liang and S. L. Zeger, Biometrika 73, 13 (1986), doi:10.1093/biomet/73.1.13.
    """
    k = jac.shape[1]
    try:
        hinv = np.linalg.pinv(jac.T @ jac)
    except np.linalg.LinAlgError:
        return np.full((k, k), np.nan)
    score = jac * res[:, None]
    order = np.argsort(clusters, kind="stable")
    starts = np.r_[0, np.flatnonzero(np.diff(clusters[order])) + 1]
    sums = np.add.reduceat(score[order], starts, axis=0)
    g = sums.shape[0]
    n = res.size
    meat = sums.T @ sums * (g / max(g - 1, 1)) * ((n - 1) / max(dof, 1))
    cov = hinv @ meat @ hinv
    s2 = float(res @ res) / max(dof, 1)
    cov_gn = hinv * s2
    # random-effects form of the same correlation (one offset per cluster, variance τ²):
    # Σ = s²_within (JᵀJ)⁻¹ + τ² (JᵀJ)⁻¹ (Σ_c j_c j_cᵀ) (JᵀJ)⁻¹ with j_c = Σ_{i∈c} J_i; unlike the
    # sandwich it is not biased low when few clusters carry the information
    n_c = np.add.reduceat(np.ones(n), starts)
    mean_c = np.add.reduceat(res[order], starts) / n_c
    within = float(np.sum((res[order] - np.repeat(mean_c, n_c.astype(int))) ** 2)) / max(n - g, 1)
    tau2 = max(float(np.mean(mean_c**2 - within / n_c)), 0.0)
    jsum = np.add.reduceat(jac[order], starts, axis=0)
    cov_re = hinv * min(within, s2) + tau2 * (hinv @ (jsum.T @ jsum) @ hinv)
    floor = np.maximum(np.diag(cov_gn), np.diag(cov_re))
    inflate = np.sqrt(np.maximum(floor, 0) / np.maximum(np.diag(cov), 1e-300))
    inflate = np.maximum(inflate, 1.0)
    return cov * np.outer(inflate, inflate)

class _Problem:
    """The separable least-squares problem on a fixed set of pixels."""

    def __init__(self, px, py, pz, rows, n_min, xn, yn):
        self.px, self.py, self.pz, self.rows = px, py, pz, rows
        self.n_min = n_min
        self.xn, self.yn = xn, yn
        self.quad = np.column_stack([xn * xn, xn * yn, yn * yn])

    def design(self, theta: np.ndarray) -> tuple[sp.csr_matrix, np.ndarray]:
        n1, n2, prob, _ = _state_weights(self.px, self.py, theta, self.n_min)
        lo1, lo2 = n1.min(), n2.min()
        width = int(n2.max() - lo2) + 1
        sid = ((n1 - lo1) * width + (n2 - lo2)).astype(np.int64)
        keep = prob > 1e-12
        uniq, inv = np.unique(sid[keep], return_inverse=True)
        p = self.px.size
        rows = np.broadcast_to(np.arange(p), prob.shape)[keep]
        pr = prob[keep]
        ns = uniq.size
        data = np.concatenate([pr, pr * self.xn[rows], pr * self.yn[rows]])
        cols = np.concatenate([inv, inv + ns, inv + 2 * ns])
        a = sp.csr_matrix((data, (np.tile(rows, 3), cols)), shape=(p, 3 * ns))
        a = sp.hstack([a, sp.csr_matrix(self.quad)], format="csr")
        states = np.column_stack([uniq // width + lo1, uniq % width + lo2])
        return a, states

    @staticmethod
    def gram(a: sp.csr_matrix) -> np.ndarray:
        """``AᵀA`` (dense) with a tiny ridge for states seen at very few pixels."""
        ata = (a.T @ a).toarray()
        d = np.diag(ata).copy()
        ata[np.diag_indices_from(ata)] += 1e-9 * np.maximum(d, d.max() * 1e-6)
        return ata

    @staticmethod
    def solve(ata: np.ndarray, a: sp.csr_matrix, z: np.ndarray) -> np.ndarray:
        try:
            return np.linalg.solve(ata, a.T @ z)
        except np.linalg.LinAlgError:
            return np.linalg.pinv(ata) @ (a.T @ z)

    def predict_fixed(self, theta: np.ndarray, coef: np.ndarray, states: np.ndarray) -> np.ndarray:
        """Model with the linear coefficients held fixed (states outside the set count 0)."""
        n1, n2, prob, _ = _state_weights(self.px, self.py, theta, self.n_min)
        ns = states.shape[0]
        lo = states.min(axis=0)
        shape = (states.max(axis=0) - lo + 1).astype(np.int64)
        table = np.full((int(shape[0]), int(shape[1])), ns, dtype=np.int64)
        table[(states[:, 0] - lo[0]).astype(int), (states[:, 1] - lo[1]).astype(int)] = np.arange(ns)
        i1 = (n1 - lo[0]).astype(np.int64)
        i2 = (n2 - lo[1]).astype(np.int64)
        inside = (i1 >= 0) & (i2 >= 0) & (i1 < shape[0]) & (i2 < shape[1])
        idx = np.where(inside, table[np.clip(i1, 0, shape[0] - 1), np.clip(i2, 0, shape[1] - 1)], ns)
        a0 = np.append(coef[:ns], 0.0)
        bx = np.append(coef[ns:2 * ns], 0.0)
        cy = np.append(coef[2 * ns:3 * ns], 0.0)
        lin = a0[idx] + bx[idx] * self.xn[None, :] + cy[idx] * self.yn[None, :]
        return np.sum(prob * lin, axis=0) + self.quad @ coef[3 * ns:]


def _forward_jacobian(prob_: Any, theta: np.ndarray, coef: np.ndarray, states: Any,
                      steps: np.ndarray) -> np.ndarray:
    """Forward-difference Jacobian of the model at fixed linear coefficients, one step per parameter."""
    pred0 = prob_.predict_fixed(theta, coef, states)
    jac = np.empty((pred0.size, theta.size))
    for k in range(theta.size):
        tp = theta.copy()
        tp[k] += steps[k]
        jac[:, k] = (prob_.predict_fixed(tp, coef, states) - pred0) / steps[k]
    return jac


def refine_model(
    da: xr.DataArray,
    fit: DiagramFit,
    *,
    charge_states: Any = None,
    max_points: int = MAX_POINTS,
    width_guess_V: float | None = None,
    max_iter: int = 8,
) -> Refinement:
    """Fit the constant-interaction model to the map, starting from ``fit``.

    Parameters
    ----------
    da : xarray.DataArray
        The map (dims y, x; volts).
    fit : DiagramFit
        Line-based estimate (must test true).
    charge_states : ChargeStates, optional
        When a dot's occupation is absolute (empty corner in the map), states
        below its empty level are excluded; otherwise the model has no lower
        bound.
    max_points : int
        Largest number of pixels fitted.
    width_guess_V : float, optional
        Starting Fermi width of dot1 lines along x, V.
    max_iter : int
        Largest number of Gauss–Newton steps.

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
    q = Quality()
    nan9 = np.full((9, 9), np.nan)

    def failed(msg: str) -> Refinement:
        return Refinement(False, {}, {}, nan9, np.nan, noise, (np.nan, np.nan), False, (1, 1),
                          quality=q.with_warning(msg))

    if not fit.ok or x.size < 8 or y.size < 8:
        return failed("model fit to the map skipped: no line-based estimate to start from")
    # states below the lowest line exist unless the empty corner was found (absolute occupations)
    n_min: tuple[int | None, int | None] = (None, None)
    lat = fit.lattice
    absolute = tuple(getattr(charge_states, "absolute", (False, False)))
    if lat is not None:
        lows = (int(lat.labels1[:, 0].min()) - 1, int(lat.labels2[:, 1].min()) - 1)
        n_min = (lows[0] if absolute[0] else None, lows[1] if absolute[1] else None)
    dv1, dv2 = fit.addition_V
    d1, d2 = np.maximum(fit.mutual_V, 0.0)
    r0 = d1 / d2 if d1 > 0 and d2 > 0 else dv1 / dv2
    pitch_x = float(np.median(np.abs(np.diff(x))))
    pitch_y = float(np.median(np.abs(np.diff(y))))
    w_lo = W_LO_PX * pitch_x
    w0 = width_guess_V if width_guess_V and np.isfinite(width_guess_V) and width_guess_V > 0 else pitch_x
    w0 = float(np.clip(w0, 2 * w_lo, 0.2 * dv1))
    theta = np.array([fit.vg_matrix[0, 1], fit.vg_matrix[1, 0], dv1, dv2, max(d1, 1e-3 * dv1), r0,
                      fit.offsets_V[0], fit.offsets_V[1], w0])
    lo = np.array([-np.inf, -np.inf, 0.3 * dv1, 0.3 * dv2, 0.0, 0.05 * r0, -np.inf, -np.inf, w_lo])
    hi = np.array([np.inf, np.inf, 3 * dv1, 3 * dv2, 0.9 * dv1, 20 * r0, np.inf, np.inf, 0.5 * dv1])

    # ------------------------------------------------------------ pixel choice
    xx, yy = np.meshgrid(x, y)
    rr = np.broadcast_to(np.arange(y.size)[:, None], z.shape)
    fin = np.isfinite(z)
    allx, ally = xx[fin], yy[fin]
    gap = _state_weights(allx, ally, theta, n_min, gap=True)[3]
    assert gap is not None
    # band: gap in units of w1 below BAND_WIDTHS·max(w, 1.5 px) (dot2 lines: width along y is w1/r)
    band_w = max(w0, 1.5 * pitch_x, 1.5 * pitch_y * r0)
    near = gap * w0 < BAND_WIDTHS * band_w
    idx_all = np.flatnonzero(fin.ravel())
    near_idx = idx_all[near]
    if near_idx.size > max_points:
        near_idx = near_idx[np.linspace(0, near_idx.size - 1, max_points).astype(int)]
    sy = max(1, int(np.ceil(y.size / 24)))
    sx = max(1, int(np.ceil(x.size / 24)))
    grid = np.zeros(z.shape, bool)
    grid[::sy, ::sx] = True
    far_idx = np.flatnonzero((grid & fin).ravel())
    sel = np.union1d(near_idx, far_idx)
    px, py, pz = xx.ravel()[sel], yy.ravel()[sel], z.ravel()[sel]
    prow = rr.ravel()[sel]
    xm, ym = px.mean(), py.mean()
    xs_, ys_ = max(np.ptp(px), 1e-12), max(np.ptp(py), 1e-12)
    prob_ = _Problem(px, py, pz, prow, n_min, (px - xm) / xs_, (py - ym) / ys_)
    sig = noise if np.isfinite(noise) and noise > 0 else float(np.nanstd(pz)) * 0.01 + 1e-30

    # ------------------------------------------------------- Gauss–Newton / LM
    scale = np.array([0.01, 0.01, 0.01 * dv1, 0.01 * dv2, 0.01 * dv1, 0.01 * r0, 0.01 * dv1, 0.01 * dv2, w0])
    lam = 1e-3
    converged = False
    it = 0
    try:
        a, states = prob_.design(theta)
        ata = prob_.gram(a)
        coef = prob_.solve(ata, a, pz)
        res = pz - a @ coef
        cost = float(res @ res)
        jac = None
        for it in range(1, max_iter + 1):
            steps = np.append(1e-2 * scale[:8], 1e-3 * theta[8])
            jac = _forward_jacobian(prob_, theta, coef, states, steps)
            # Kaufman's variable-projection Jacobian: the linear coefficients follow the step
            jac = jac - a @ np.linalg.solve(ata, np.asarray(a.T @ jac))
            js = jac * scale
            g = js.T @ res
            hmat = js.T @ js
            improved = False
            for _ in range(8):
                step = np.linalg.solve(hmat + lam * np.diag(np.diag(hmat) + 1e-12), g) * scale
                cand = np.clip(theta + step, lo, hi)
                a_c, st_c = prob_.design(cand)
                ata_c = prob_.gram(a_c)
                coef_c = prob_.solve(ata_c, a_c, pz)
                res_c = pz - a_c @ coef_c
                cost_c = float(res_c @ res_c)
                if cost_c < cost:
                    rel = (cost - cost_c) / cost
                    theta, a, ata, states, coef, res, cost = cand, a_c, ata_c, st_c, coef_c, res_c, cost_c
                    lam = max(lam / 5, 1e-7)
                    improved = True
                    break
                lam *= 8
            # converged: no better point, or the step is statistically irrelevant (< 0.1 σ of every parameter)
            try:
                sig_p = np.sqrt(np.clip(np.diag(np.linalg.pinv(hmat)), 0, None) * cost / max(pz.size - 9, 1)) * scale
            except np.linalg.LinAlgError:
                sig_p = np.full(9, np.inf)
            # a width below two pixels' lower bound is unresolved: its slow crawl to the bound does not count
            free = np.ones(9, bool)
            free[8] = theta[8] >= 2 * w_lo
            if not improved or rel < 1e-5 or np.all(np.abs(step[free]) <= 0.1 * sig_p[free]):
                converged = True
                break
    except (ValueError, np.linalg.LinAlgError, FloatingPointError) as exc:
        return failed(f"model fit to the map failed: {exc}")

    # ------------------------------------------------------------- covariance
    jac = _forward_jacobian(prob_, theta, coef, states, 1e-4 * np.append(scale[:8], theta[8]))
    # variable projection: remove the part of J the linear coefficients can absorb
    jp = jac - a @ np.linalg.solve(ata, np.asarray(a.T @ jac))
    n_lin = a.shape[1]
    dof = max(pz.size - 9 - n_lin, 1)
    chi2 = float(cost / dof) / sig**2
    cov = clustered_covariance(jp, res, prow, dof=dof) * STAT_INFLATION**2
    err = np.sqrt(np.clip(np.diag(cov), 0, None))

    # ------------------------------------------------------------- verdict
    ns = states.shape[0]
    a0 = coef[:ns]
    lookup = {tuple(s): a0[i] for i, s in enumerate(states.astype(int))}
    steps1 = [lookup[(s[0] + 1, s[1])] - a0[i] for i, s in enumerate(states.astype(int)) if (s[0] + 1, s[1]) in lookup]
    steps2 = [lookup[(s[0], s[1] + 1)] - a0[i] for i, s in enumerate(states.astype(int)) if (s[0], s[1] + 1) in lookup]
    g1 = float(np.median(steps1)) if steps1 else np.nan
    g2 = float(np.median(steps2)) if steps2 else np.nan
    all_steps = np.abs(np.r_[steps1, steps2])
    snr = float(np.median(all_steps) / sig) if all_steps.size else float("nan")
    ratio = float(np.sqrt(chi2))
    width_resolved = bool(theta[8] > 1.5 * w_lo)
    params = dict(zip(PARAM_NAMES, map(float, theta)))
    errors = dict(zip(PARAM_NAMES, map(float, err)))
    params["mutual_V2"] = float(theta[4] / theta[5])
    errors["mutual_V2"] = float(abs(params["mutual_V2"]) * np.hypot(err[4] / max(theta[4], 1e-30), err[5] / theta[5]))
    params["width_px1"] = float(theta[8] / pitch_x)
    params["width_V2"] = float(theta[8] / theta[5])
    errors["width_V2"] = float(params["width_V2"] * np.hypot(err[8] / theta[8], err[5] / theta[5]))
    step_min = float(np.nanmin(np.abs([g1, g2]))) if np.any(np.isfinite([g1, g2])) else np.nan
    if not converged:
        q = q.with_warning(f"model fit to the map did not converge in {max_iter} steps", doubtful=False)
    if ratio > MAX_RESIDUAL_RATIO and not (ratio * sig <= 0.25 * step_min):
        q = q.with_warning(
            f"the constant-interaction model does not describe the map: residual is {ratio:.2f}× the noise"
        )
    if np.isfinite(step_min) and step_min < 3 * sig:
        q = q.with_warning(
            f"charge steps are weak: smallest step {step_min:.3g} vs noise {sig:.3g} (SNR {step_min / sig:.1f})"
        )
    return Refinement(ok=q.ok and converged, params=params, errors=errors, cov=cov, residual_ratio=ratio,
                      noise=noise, step=(g1, g2), width_resolved=width_resolved, stride=(sy, sx), n_min=n_min,
                      quality=q, n_points=int(pz.size), iterations=it, converged=converged, snr=snr)


#: Systematic floor added in quadrature to the refined errors of (M12, M21, ΔV1, δ1, ΔV2, δ2):
#: absolute for M, relative for ΔV and δ, for lines one pixel wide (Fermi width w1) or broader,
#: scaled by w1/px below (down to a tenth). The model is an idealisation (constant interaction,
#: one plane per charge state); on generator maps with 3–4 px broad lines (w1 ≈ 1 px) the refined
#: values scatter about the truth by up to ≈ 0.0025 in M, 0.3 % in ΔV and 2.5 % in δ beyond their
#: statistical errors, while on maps rendered by the model itself the pulls are ≈ 1 and on maps
#: with sharp lines the statistical errors alone cover the truth (|pull| ≤ 0.8).
SYSTEMATIC_FLOOR = (0.0015, 0.0015, 0.003, 0.02, 0.003, 0.02)
#: Largest normalised difference between the refined and the line-based value for adoption.
MAX_DISAGREEMENT_SIGMA = 3.0


@dataclass(frozen=True)
class Adoption:
    """Outcome of :func:`adopt_refinement`.

    Attributes
    ----------
    fit : DiagramFit
        The diagram fit with the refined virtual gates when adopted, else the
        line-based one unchanged.
    adopted : bool
    z : ndarray, shape (6,)
        |refined − line-based| / √(σ_ref² + σ_line²) for (M12, M21, ΔV1, δ1, ΔV2, δ2).
    quality : Quality
        Notes and warnings about the adoption (merge into the analysis verdict).
    """

    fit: DiagramFit
    adopted: bool
    z: np.ndarray
    quality: Quality = field(default_factory=Quality)


def adopt_refinement(fit: DiagramFit, ref: Refinement) -> Adoption:
    """Use the refined virtual gates when the global fit is sound and agrees with the lines.

    The refinement's ``(M12, M21)`` (sandwich covariance plus
    :data:`SYSTEMATIC_FLOOR`) replace the line-based slopes when the
    refinement converged and describes the map (``ref.ok``) and every one of
    ``(M12, M21, ΔV1, δ1, ΔV2, δ2)`` agrees with the line-based value within
    :data:`MAX_DISAGREEMENT_SIGMA` combined standard errors. The addition
    voltages and mutual shifts stay those of the lattice of line positions,
    re-evaluated at the refined ``M`` to first order (``∂(ΔV, δ)/∂M`` of the
    lattice fit) with the covariance rebuilt as in
    :func:`stabtool.fit.model.fit_diagram`; Cdg and α11/α22 are recomputed
    and propagated. (The refined ΔV and δ are reported under
    ``refinement`` only: on generator maps they carry a systematic offset of
    up to 0.3 % and 2.5 %, larger than the line-based scatter of δ.)
    Otherwise the line-based fit is kept and, when the two disagree, a
    warning says on what.

    Parameters
    ----------
    fit : DiagramFit
    ref : Refinement

    Returns
    -------
    Adoption
    """
    from dataclasses import replace

    from .model import MUTUAL_SIGMAS, _derived
    from .uncertainty import error_verdict, propagate

    q = Quality()
    z = np.full(6, np.nan)
    if not fit.ok or not ref.params or fit.lattice is None:
        return Adoption(fit, False, z, q)
    vec, cov = ref.vector()
    # the idealisation matters in proportion to the thermal smearing: full floor from a width of one pixel
    smear = float(np.clip(ref.params.get("width_px1", 1.0), 0.1, 1.0))
    floor = smear * np.array(SYSTEMATIC_FLOOR) * np.array([1, 1, abs(vec[2]), abs(vec[3]), abs(vec[4]), abs(vec[5])])
    cov = cov + np.diag(floor**2)
    line_err = np.sqrt(np.clip(np.diag(fit.param_cov), 0, None))
    z = np.abs(vec - fit.params) / np.sqrt(np.diag(cov) + line_err**2)
    names = ("M12", "M21", "ΔV1", "δ1", "ΔV2", "δ2")
    check = np.ones(6, bool)
    if not fit.mutual_resolved:
        check[[3, 5]] = False
    if not ref.ok:
        return Adoption(fit, False, z, q)
    bad = [i for i in range(6) if check[i] and not z[i] <= MAX_DISAGREEMENT_SIGMA]
    if bad:
        what = ", ".join(f"{names[i]} ({z[i]:.1f} σ)" for i in bad)
        q = q.with_warning(f"the model fit to the map disagrees with the line-based estimate on {what}: "
                           "line-based numbers kept")
        return Adoption(fit, False, z, q)
    # lattice numbers at the refined M: p_D(M) ≈ p_D + G ΔM, G = ∂(ΔV1, δ1, ΔV2, δ2)/∂(M12, M21)
    g = fit.lattice.grad_m[[0, 1, 3, 4]]
    if not np.all(np.isfinite(g)):
        return Adoption(fit, False, z, q)
    cov_m_old = fit.param_cov[:2, :2]
    cov_m = cov[:2, :2]
    lat_only = fit.param_cov[2:, 2:] - g @ cov_m_old @ g.T
    p = fit.params.copy()
    p[:2] = vec[:2]
    p[2:] = fit.params[2:] + g @ (vec[:2] - fit.params[:2])
    if not fit.mutual_resolved:
        p[[3, 5]] = fit.params[[3, 5]]
    new_cov = np.zeros((6, 6))
    new_cov[:2, :2] = cov_m
    new_cov[2:, 2:] = lat_only + g @ cov_m @ g.T
    new_cov[2:, :2] = g @ cov_m
    new_cov[:2, 2:] = (g @ cov_m).T
    err = np.sqrt(np.clip(np.diag(new_cov), 0, None))
    resolved = fit.mutual_resolved and bool(np.all(np.abs(p[[3, 5]]) > MUTUAL_SIGMAS * err[[3, 5]]))
    values, errors = propagate(_derived, p, new_cov)
    slopes = dict(fit.slopes)
    slope_errors = dict(fit.slope_errors)
    slopes["dot1"], slope_errors["dot1"] = float(values[5]), float(errors[5])
    slopes["dot2"], slope_errors["dot2"] = float(values[6]), float(errors[6])
    if resolved and np.isfinite(values[7]) and not (np.isfinite(fit.slope_errors.get("interdot", np.nan))
                                                    and fit.slope_errors["interdot"] <= errors[7]):
        slopes["interdot"], slope_errors["interdot"] = float(values[7]), float(errors[7])
    new = replace(
        fit,
        slopes=slopes,
        slope_errors=slope_errors,
        params=p,
        param_cov=new_cov,
        vg_matrix=np.array([[1.0, p[0]], [p[1], 1.0]]),
        vg_matrix_error=np.array([[0.0, err[0]], [err[1], 0.0]]),
        addition_V=p[[2, 4]].copy(),
        addition_V_error=err[[2, 4]].copy(),
        mutual_V=p[[3, 5]].copy(),
        mutual_V_error=err[[3, 5]].copy(),
        offsets_V=fit.offsets_V + np.nan_to_num(fit.lattice.grad_m[[2, 5]]) @ (vec[:2] - fit.params[:2]),
        cdg_aF=values[:4].reshape(2, 2),
        cdg_aF_error=errors[:4].reshape(2, 2),
        alpha_ratio=float(values[4]) if resolved else float("nan"),
        alpha_ratio_error=float(errors[4]) if resolved else float("nan"),
        mutual_resolved=resolved,
    )
    new = replace(new, quality=error_verdict(new))
    q = q.with_warning("virtual gates refined by the model fit to the map", doubtful=False)
    return Adoption(new, True, z, q)
