"""Interdot tunnel coupling of a double-dot map: polarisation-line cuts across the interdot lines.

Given the electron temperature and the lever-arm matrix α (so the detuning
scale is known), every interdot segment predicted by the fitted lattice is
cut along the detuning gradient ``u ∝ α_1,: − α_2,:`` (the normal of the
interdot line in gate space), the cuts parallel to it over the central part
of the segment are averaged (:func:`stabtool.fit.polarisation.detuning_profile`)
and the polarisation line is fitted with ``t`` free
(:func:`stabtool.fit.polarisation.fit_polarisation_line`).

Notes
-----
* Gap convention: ``Ω = √(ε² + 4t²)``, the anticrossing gap is ``2t``
  (:mod:`stabtool.physics.polarisation`).
* The detuning lever arm ``|α_1,: − α_2,:|`` carries the error of the energy
  reference; its effect on ``t`` is propagated by refitting each profile with
  the lever arm moved by ± one standard error (close to the thermal width a
  small scale error moves ``t`` a lot, so this is not a small correction).
* Segments whose cut would leave the map or reach the neighbouring dot lines
  (more than 35 % of a cell in virtual coordinates) are skipped.
* Segments whose fit succeeded and whose only doubt is their own
  statistical error are combined by an inverse-variance mean;
  the error is the larger of the propagated one and the scatter between
  segments. When no segment resolves ``t`` (thermally broadened line) only
  the profile-likelihood 2σ upper limit is reported and ``t`` is null.

References
----------
L. DiCarlo et al., Phys. Rev. Lett. 92, 226801 (2004),
doi:10.1103/PhysRevLett.92.226801 (polarisation line, formula from memory).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field, replace

import numpy as np
import xarray as xr
from scipy import optimize

from ..errors import InputError
from ..physics.constants import KB_EV_PER_K
from ..physics.polarisation import polarisation_fwhm_eV
from ..quality import Quality
from .lattice import transition_line
from .model import DiagramFit
from .polarisation import detuning_profile

__all__ = ["BIAS_PER_T_OVER_ECM", "CouplingRatio", "TunnelCoupling", "coupling_to_mutual_ratio", "interdot_segments",
           "tunnel_coupling_from_map"]

_NAN = float("nan")
#: Largest cut half-length, as a fraction of the cell in virtual coordinates.
_CUT_FRACTION = 0.35
#: Relative uncertainty of the energy scale (T_e × lever arms) always allowed in the fit, on top
#: of the stated lever-arm error: temperature lever arms of hot generator maps deviate by 1–2 %
#: (bench maps, 112–200 px), and a 2 % broader line reads as t ≈ 0.4 k_B T.
SCALE_FLOOR = 0.02
#: Relative widening of the polarisation line (FWHM over the thermal one) below which t is never
#: reported as resolved, only bounded.
MIN_WIDTH_EXCESS = 0.01
#: Largest population of the outer charge states along a cut below which they are ignored.
OUTER_MIN = 1e-3


@dataclass(frozen=True)
class TunnelCoupling:
    """Interdot tunnel coupling ``t`` (gap 2t) measured on a map.

    Attributes
    ----------
    value_ueV, error_ueV : float
        ``t`` and its standard error (µeV); NaN when not resolved.
    upper_limit_ueV : float
        2σ upper limit when ``t`` is not resolved (NaN otherwise).
    per_segment : tuple of dict
        Midpoint (V), ``t``, error, verdict of each cut.
    detuning_lever_arm : float
        ``|α_1,: − α_2,:|``, eV/V.
    quality : Quality
        Doubtful when resolved segments disagree or none could be fitted;
        an unresolved (upper-limit) result is a note, not a doubt.
    """

    value_ueV: float = _NAN
    error_ueV: float = _NAN
    upper_limit_ueV: float = _NAN
    per_segment: tuple[dict, ...] = ()
    detuning_lever_arm: float = _NAN
    quality: Quality = field(default_factory=Quality)

    def __bool__(self) -> bool:
        return bool(np.isfinite(self.value_ueV))

    def to_json(self) -> dict:
        return {
            "value_ueV": self.value_ueV, "error_ueV": self.error_ueV, "upper_limit_ueV": self.upper_limit_ueV,
            "detuning_lever_arm": self.detuning_lever_arm, "segments": list(self.per_segment),
            "quality": self.quality.to_dict(),
        }


def interdot_segments(fit: DiagramFit, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Interdot segments predicted by the fitted lattice inside the map.

    Returns
    -------
    ndarray, shape (k, 2, 2)
        ``[[x_a, y_a], [x_b, y_b]]`` per segment, in V (both ends inside the map).
    """
    lat = fit.lattice
    if not fit.ok or lat is None or not fit.mutual_resolved:
        return np.zeros((0, 2, 2))
    dv, dm, c = fit.addition_V, fit.mutual_V, fit.offsets_V
    minv = np.linalg.inv(fit.vg_matrix)
    labels = np.vstack([lat.labels1, lat.labels2])
    lo, hi = labels.min(axis=0) - 1, labels.max(axis=0) + 1
    segs = []
    for n1 in range(int(lo[0]), int(hi[0]) + 1):
        for n2 in range(int(lo[1]), int(hi[1]) + 1):
            u, _, v_hi = transition_line(0, n1, n2, dv, dm, c)  # the upper end of the dot1 line: a triple point
            a = np.array([u, v_hi])
            pa, pb = minv @ a, minv @ (a + dm)
            if all(x.min() <= p[0] <= x.max() and y.min() <= p[1] <= y.max() for p in (pa, pb)):
                segs.append((pa, pb))
    return np.array(segs, float).reshape(-1, 2, 2)


def _upper_from(q: Quality) -> float:
    for m in q.warnings:
        hit = re.search(r"t < ([0-9.eE+\-]+) µeV", m)
        if hit:
            return float(hit.group(1))
    return _NAN


@dataclass(frozen=True)
class _CutGeometry:
    """Energies along an averaged detuning cut and how the cut samples the map.

    ``a_eps = (α_1 − α_2)·u`` (detuning ε = μ1 − μ2 changes by ``−a_eps`` per V along ``u``),
    ``a_mean = ½ (α_1 + α_2)·u`` (the mean electrochemical potential μ̄ changes by ``−a_mean``),
    ``b = α_1·n = α_2·n`` along the interdot line ``n ⊥ u`` (μ̄ changes by ``−b`` per V),
    ``e_cm`` the mutual charging energy (eV) = ``|b|`` × segment length, ``kt`` = k_B T_e (eV).
    ``node_s``, ``node_o`` (k,): positions (V along ``u`` and ``n`` from the segment midpoint)
    of the map pixels the cut touches; ``idx``, ``wts`` (m, n, 4): the bilinear interpolation
    of :func:`stabtool.fit.polarisation.detuning_profile` (m parallel cuts of n points) on them.
    ``whiten`` (n, n): ``L⁻¹`` with ``L Lᵀ = W Wᵀ`` (``W`` the profile's linear map from the
    pixels): white pixel noise becomes correlated along the oversampled, interpolated and
    averaged profile, and χ² differences are only valid after whitening. ``pixel_noise``: the
    white-noise level of the pixels under the cut (point-to-point differences).
    """

    a_eps: float
    a_mean: float
    b: float
    e_cm: float
    kt: float
    node_s: np.ndarray
    node_o: np.ndarray
    idx: np.ndarray
    wts: np.ndarray
    whiten: np.ndarray | None = None
    pixel_noise: float = _NAN

    def scaled(self, f: float) -> _CutGeometry:
        """Every lever arm (and so E_Cm) multiplied by ``f``."""
        return replace(self, a_eps=self.a_eps * f, a_mean=self.a_mean * f, b=self.b * f, e_cm=self.e_cm * f)


def _interpolation_plan(xs: np.ndarray, ys: np.ndarray, through: np.ndarray, u: np.ndarray, s: np.ndarray,
                        offsets: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray,
                                                      tuple[int, int, int, int]]:
    """Pixels and bilinear weights of the parallel cuts of ``detuning_profile`` (same index maps).

    Returns node positions along ``u`` and ``n`` (V from ``through``), (m, n, 4) node indices
    and weights, so that ``profile = mean over m of Σ wts · value[idx]``, and the pixel box
    ``(y0, y1, x0, x1)`` (slices) of the nodes.
    """
    perp = np.array([-u[1], u[0]])
    px = through[0] + s[None, :] * u[0] + offsets[:, None] * perp[0]
    py = through[1] + s[None, :] * u[1] + offsets[:, None] * perp[1]

    def frac(p, ax):
        ar = np.arange(ax.size, dtype=float)
        return np.interp(p, ax, ar) if ax[0] < ax[-1] else np.interp(p, ax[::-1], ar[::-1])

    fx, fy = frac(px, xs), frac(py, ys)
    jx = np.clip(np.floor(fx).astype(int), 0, max(xs.size - 2, 0))
    iy = np.clip(np.floor(fy).astype(int), 0, max(ys.size - 2, 0))
    tx, ty = fx - jx, fy - iy
    x_lo, x_hi = int(jx.min()), int(min(jx.max() + 1, xs.size - 1))
    y_lo, y_hi = int(iy.min()), int(min(iy.max() + 1, ys.size - 1))
    nx = x_hi - x_lo + 1
    gx, gy = np.meshgrid(xs[x_lo : x_hi + 1], ys[y_lo : y_hi + 1])
    dxy = np.stack([gx.ravel() - through[0], gy.ravel() - through[1]], axis=1)
    node_s, node_o = dxy @ u, dxy @ perp

    def node(i, j):
        return (np.minimum(i, ys.size - 1) - y_lo) * nx + (np.minimum(j, xs.size - 1) - x_lo)

    idx = np.stack([node(iy, jx), node(iy, jx + 1), node(iy + 1, jx), node(iy + 1, jx + 1)], axis=-1)
    wts = np.stack([(1 - ty) * (1 - tx), (1 - ty) * tx, ty * (1 - tx), ty * tx], axis=-1)
    return node_s, node_o, idx, wts, (y_lo, y_hi + 1, x_lo, x_hi + 1)


def _whitening(idx: np.ndarray, wts: np.ndarray, n_nodes: int) -> np.ndarray:
    """``L⁻¹`` of the profile-noise covariance ``W Wᵀ`` (per unit pixel variance), shape (n, n)."""
    from scipy import sparse

    m, n, _ = idx.shape
    rows = np.broadcast_to(np.arange(n)[None, :, None], idx.shape).ravel()
    w = sparse.csr_matrix((wts.ravel() / m, (rows, idx.ravel())), shape=(n, n_nodes))
    c = (w @ w.T).toarray()
    c[np.diag_indices(n)] += 1e-9 * float(np.trace(c)) / n
    return np.linalg.inv(np.linalg.cholesky(c))


def _mean_charges(s0: float | np.ndarray, t_eV: float | np.ndarray,
                  geo: _CutGeometry) -> tuple[np.ndarray, np.ndarray]:
    """Thermal ``⟨N1⟩, ⟨N2⟩`` (relative to the cell (N1, N2) below the segment) along the averaged cut.

    Four charge states around the interdot segment, constant-interaction energies relative to
    (N1, N2) (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)): ``E_A = μ1`` for
    (N1+1, N2), ``E_B = μ2`` for (N1, N2+1), ``E_D = μ1 + μ2 + E_Cm`` for (N1+1, N2+1).
    A and B are coupled by ``t``: levels ``μ̄ ± Ω/2``, ``Ω = √(ε² + 4t²)``, ``ε = μ1 − μ2``,
    and the occupation of A within the pair is ``½[1 − (ε/Ω) tanh(Ω/2kT)]`` (the polarisation
    line, DiCarlo et al., Phys. Rev. Lett. 92, 226801 (2004), from memory). All four levels are
    Boltzmann weighted: on hot maps (E_Cm of a few k_B T) the outer states broaden the line
    beyond the two-level shape, which a two-level fit reads as tunnel coupling. At the segment
    midpoint ``μ̄ = −E_Cm/2``. The occupations are evaluated on the map's pixels and
    interpolated exactly as the data were (the bilinear interpolation of a pixel-sampled line
    widens it by a fraction of a pixel, which a model evaluated on the cut reads as ``t``).
    Returns two arrays of shape (n,); with ``s0`` and ``t_eV`` arrays of shape (k,) (k parameter
    points at once, as the grid scans of :func:`_fit_cut` use it), two of shape (k, n) whose
    rows are what k separate calls give, to the last bit.
    """
    if np.ndim(s0) or np.ndim(t_eV):
        s0 = np.asarray(s0, float)[:, None]
        t_eV = np.asarray(t_eV, float)[:, None]
    # written for few NumPy calls on the few hundred pixels of a cut (this runs ~100 times per cut);
    # every element is computed with the same operations in the same order as the formulas read
    ds = geo.node_s - s0
    eps = -geo.a_eps * ds
    mbar = -0.5 * geo.e_cm - geo.a_mean * ds
    mbar -= geo.b * geo.node_o
    omega = eps * eps
    omega += 4.0 * t_eV * t_eV
    np.sqrt(omega, out=omega)  # Ω
    beta = 1.0 / geo.kt
    low = mbar - 0.5 * omega  # the lower level of the coupled pair sets the energy zero
    w0 = low * beta
    np.exp(np.minimum(np.maximum(w0, -700.0, out=w0), 50.0, out=w0), out=w0)  # E_0 = 0
    wd = 2 * mbar
    wd += geo.e_cm
    wd -= low
    wd = np.negative(wd, out=wd)
    wd *= beta
    np.exp(np.minimum(np.maximum(wd, -700.0, out=wd), 50.0, out=wd), out=wd)
    whigh = -omega * beta
    np.exp(whigh, out=whigh)
    z = w0 + wd
    z += 1.0
    z += whigh
    if omega.all():  # Ω > 0 everywhere (t > 0, or no pixel exactly at zero detuning)
        ratio = eps / omega
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.where(omega > 0, eps / np.where(omega > 0, omega, 1.0), 0.0)
    th = 0.5 * omega * beta
    np.tanh(th, out=th)
    th *= ratio
    n_a = 1.0 - th
    n_a *= 0.5
    pair = 1.0 + whigh
    pair /= z
    pd = wd / z
    n1 = pair * n_a
    n1 += pd
    n2 = 1.0 - n_a
    n2 *= pair
    n2 += pd
    m = geo.idx.shape[0]
    if n1.ndim == 2:  # one interpolation per parameter point (the same sums as one call each)
        p1 = np.stack([np.einsum("mnc,mnc->n", geo.wts, row[geo.idx]) for row in n1]) / m
        p2 = np.stack([np.einsum("mnc,mnc->n", geo.wts, row[geo.idx]) for row in n2]) / m
        return p1, p2
    p1 = np.einsum("mnc,mnc->n", geo.wts, n1[geo.idx]) / m
    p2 = np.einsum("mnc,mnc->n", geo.wts, n2[geo.idx]) / m
    return p1, p2


def _project(s: np.ndarray, g: np.ndarray, s0: float, t_eV: float, geo: _CutGeometry,
             gw: np.ndarray | None = None, charges: tuple[np.ndarray, np.ndarray] | None = None):
    """Residual and linear coefficients of ``g ≈ g0 + slope (s − s0) + c ⟨N1 − N2⟩ + c_Σ ⟨N1 + N2 − 1⟩``.

    The sensor is taken as linear in the two charges over the cut: ``c`` is the polarisation
    contrast, ``c_Σ`` the response to the total charge, seen only where the outer states
    (N1, N2) and (N1+1, N2+1) are populated; below a population of ``OUTER_MIN`` that column is
    left out (it would only fit noise, and its near-collinearity made the residual jump).
    ``gw``: ``whiten @ g`` when the caller has it (the same for every call on one cut);
    ``charges``: ``_mean_charges(s0, t_eV, geo)`` when the caller has it.
    Returns the (whitened) residual and ``(g0, slope, c, c_Σ)``.
    """
    n1, n2 = _mean_charges(s0, t_eV, geo) if charges is None else charges
    outer = n1 + n2 - 1.0
    use_outer = float(np.max(np.abs(outer))) >= OUTER_MIN
    a = np.empty((s.size, 4 if use_outer else 3))  # columns 1, s − s0, ⟨N1 − N2⟩[, ⟨N1 + N2 − 1⟩]
    a[:, 0] = 1.0
    np.subtract(s, s0, out=a[:, 1])
    np.subtract(n1, n2, out=a[:, 2])
    if use_outer:
        a[:, 3] = outer
    if geo.whiten is not None:  # generalised least squares: residuals in units of the pixel noise
        a = geo.whiten @ a
        gw = geo.whiten @ g if gw is None else gw
    else:
        gw = g
    coef, *_ = np.linalg.lstsq(a, gw, rcond=None)
    r = gw - a @ coef
    return r, np.append(coef, 0.0) if not use_outer else coef


@dataclass(frozen=True)
class _SegmentFit:
    t_best_ueV: float
    t_ueV: float
    error_ueV: float
    upper_ueV: float
    resolved: bool
    centre_V: float
    contrast: float
    fwhm_V: float
    reduced_chi2: float
    warnings: tuple[str, ...]


def _fit_cut(s: np.ndarray, g: np.ndarray, geo: _CutGeometry, *, scale_sigma: float) -> _SegmentFit:
    """Fit ``(s0, t)`` of the four-state thermal model to one averaged cut (variable projection).

    Nonlinear parameters ``(s0, τ = t², f)``: the model depends on ``t`` only through ``t²``, so
    χ² is close to a parabola in ``τ`` down to ``τ = 0`` (not in ``t``, where it is flat to fourth
    order). ``f`` is the energy scale (T_e and the lever arms together; every energy × f), a
    nuisance parameter with a Gaussian prior of relative width ``scale_sigma``: near the thermal
    limit a line a few per cent broader than predicted reads as ``t ≈ k_B T``, so a scale error
    must not turn into a coupling. ``t`` counts as resolved when the best fit at ``t = 0`` (``s0``
    and ``f`` free) is worse by Δχ² ≥ 4 and ``τ > 2σ_τ``; otherwise the 2σ upper limit
    ``√(τ̂ + 2σ_τ)`` is given. Errors from the Jacobian (scale prior included), χ² scaled by
    its value per degree of freedom.
    """
    kt_ueV = geo.kt * 1e6
    # (the cut may run either way along the detuning axis: held-out probe seed 40 of 40–90 px maps
    # had descending samples, and the fit's bounds came out reversed)
    step_s = float(abs(np.median(np.diff(s))))
    s_lo, s_hi = float(min(s[0], s[-1])), float(max(s[0], s[-1]))
    span = s_hi - s_lo
    if geo.whiten is not None and np.isfinite(geo.pixel_noise) and geo.pixel_noise > 0:
        noise = float(geo.pixel_noise)  # the whitened residuals are in pixel-noise units
        point_noise = noise * float(np.sqrt(np.mean(np.sum(np.linalg.inv(geo.whiten) ** 2, axis=1))))
    else:
        d = np.diff(g)
        noise = point_noise = float(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2))
    sf = float(scale_sigma) if scale_sigma > 0 else 0.0
    ds, dt = max(step_s, 1e-300), kt_ueV**2  # parameter units: s0 in sampling steps, τ in (k_B T)²

    gw = geo.whiten @ g if geo.whiten is not None else None  # the same in every projection of this cut

    def res(s0, tau, f=1.0):
        gg = geo if f == 1.0 else geo.scaled(f)
        return _project(s, g, s0, np.sqrt(max(tau, 0.0)) * 1e-6, gg, gw)[0]

    def costs(s0s, taus):
        """χ² of the grid points (s0, τ): the occupations of all points in one pass."""
        s0s, taus = np.broadcast_arrays(np.asarray(s0s, float), np.asarray(taus, float))
        t_ev = np.sqrt(np.maximum(taus, 0.0)) * 1e-6
        p1, p2 = _mean_charges(s0s, t_ev, geo)
        out = np.empty(s0s.size)
        for i in range(s0s.size):
            r = _project(s, g, float(s0s[i]), float(t_ev[i]), geo, gw, charges=(p1[i], p2[i]))[0]
            out[i] = float(r @ r)
        return out

    centres = np.linspace(s_lo + 0.15 * span, s_hi - 0.15 * span, 21)
    c = costs(centres, 0.0)
    s0 = float(centres[int(np.argmin(c))])
    t_max = 0.25 * span * geo.a_eps * 1e6
    t_grid = np.concatenate([[0.0], np.geomspace(max(0.1 * kt_ueV, 1e-3), max(t_max, kt_ueV), 8)])
    ct = costs(s0, t_grid * t_grid)
    t0 = float(t_grid[int(np.argmin(ct))])
    dof = max(s.size - 7, 1)
    s2_ref = max(noise**2 if geo.whiten is not None else 0.0, float(ct.min()) / dof)
    w_prior = np.sqrt(max(s2_ref, 1e-300)) / sf if sf > 0 else 0.0

    def fit(fixed_tau: float | None, start: np.ndarray):
        """Best (s0[, τ], f) in scaled units; returns (cost, params, jacobian)."""
        if fixed_tau is None:
            free = [0, 1, 2] if sf > 0 else [0, 1]
        else:
            free = [0, 2] if sf > 0 else [0]
        lb = np.array([s_lo / ds, 0.0, 1.0 - 5 * sf])[free]
        ub = np.array([s_hi / ds, np.inf, 1.0 + 5 * sf])[free]

        def full(q):
            v = np.array([start[0], start[1] if fixed_tau is None else fixed_tau / dt, 1.0])
            v[free] = q
            return v

        def fun(q):
            v = full(q)
            r = res(v[0] * ds, v[1] * dt, v[2])
            return np.append(r, w_prior * (v[2] - 1.0)) if sf > 0 else r

        x0 = np.clip(np.array([start[0], start[1], start[2]])[free], lb, ub)
        r = optimize.least_squares(fun, x0, bounds=(lb, ub), diff_step=1e-5, method="trf", xtol=1e-6,
                                   ftol=1e-8)
        # Jacobian at the solution by forward differences into the feasible side (the solver's
        # own one is not returned as the plain derivative at an active bound)
        f0 = fun(r.x)
        jac = np.empty((f0.size, r.x.size))
        for i in range(r.x.size):
            h = 1e-4 * max(1.0, abs(r.x[i]))
            if r.x[i] + h > ub[i]:
                h = -h
            xp = r.x.copy()
            xp[i] += h
            jac[:, i] = (fun(xp) - f0) / h
        return 2 * r.cost, full(r.x), jac

    cost_b, qb, jac = fit(None, np.array([s0 / ds, t0 * t0 / dt, 1.0]))
    cost0, q0, _ = fit(0.0, qb)
    if cost0 < cost_b:  # the t = 0 optimum is the global one
        cost_b, qb = cost0, q0
    s2 = max(cost_b / dof, noise**2 if geo.whiten is not None else 0.0, 1e-300)
    dchi0 = (cost0 - cost_b) / s2
    s0, tau, f_best = float(qb[0] * ds), float(qb[1] * dt), float(qb[2])
    cov = np.linalg.pinv(jac.T @ jac) * s2
    sig_tau = float(np.sqrt(max(cov[1, 1], 0.0))) * dt
    t_fit = float(np.sqrt(max(tau, 0.0)))
    _, coef = _project(s, g, s0, t_fit * 1e-6, geo.scaled(f_best), gw)
    contrast = float(coef[2])
    fwhm_V = polarisation_fwhm_eV(t_fit * 1e-6, geo.kt / KB_EV_PER_K) / geo.a_eps
    red = s2 / noise**2 if noise > 0 else _NAN
    warn: list[str] = []
    if abs(contrast) < 5 * max(point_noise, 1e-300) / np.sqrt(max(fwhm_V / step_s, 1.0)):
        warn.append("the polarisation step is not significant above the noise")
    # a coupling that widens the line by less than MIN_WIDTH_EXCESS is below any realistic
    # accuracy of the thermal width (scale, sensor linearity), whatever the noise
    widened = fwhm_V * geo.a_eps > (1 + MIN_WIDTH_EXCESS) * polarisation_fwhm_eV(0.0, geo.kt / KB_EV_PER_K)
    resolved = tau > 2 * sig_tau and dchi0 >= 4.0 and widened
    err, upper = _NAN, _NAN
    if resolved:
        err = 0.5 * sig_tau / t_fit
    else:
        upper = float(np.sqrt(max(tau, 0.0) + 2 * sig_tau))
        warn.append(f"tunnel coupling not resolved above the thermal width (k_B T_e = {kt_ueV:.3g} µeV): "
                    f"t < {upper:.3g} µeV (2σ upper limit)")
    if resolved and err > 0.1 * t_fit:
        warn.append(f"tunnel-coupling uncertainty {100 * err / t_fit:.0f} % exceeds 10 %")
    if resolved and fwhm_V < 3 * step_s:
        warn.append(f"the line FWHM {fwhm_V:.3g} V spans fewer than 3 sampling steps ({step_s:.3g} V): "
                    "resolution-limited")
    if fwhm_V > 0.5 * span:
        warn.append("the line is wider than half the profile; the background is poorly constrained")
    if np.isfinite(red) and red > 3:
        warn.append(f"reduced chi-squared {red:.2g} > 3: the polarisation model does not describe the profile")
    return _SegmentFit(t_fit, t_fit if resolved else _NAN, err, upper, resolved, s0, contrast, float(fwhm_V),
                       float(red), tuple(warn))


def _segment_order(segs: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Segments from the longest (equal to 1e-9 relative: nearest the map centre first, then index).

    All interdot segments of a lattice have the same length up to rounding, so ranking on raw
    lengths picked segments by rounding noise.
    """
    lengths = np.hypot(*(segs[:, 1] - segs[:, 0]).T)
    top = float(np.max(lengths)) if lengths.size else 0.0
    key = np.round(lengths / top * 1e9) if top > 0 else lengths
    mid = 0.5 * (segs[:, 0] + segs[:, 1])
    cx, cy = 0.5 * (x.min() + x.max()), 0.5 * (y.min() + y.max())
    dist = np.hypot((mid[:, 0] - cx) / max(np.ptp(x), 1e-300), (mid[:, 1] - cy) / max(np.ptp(y), 1e-300))
    return np.lexsort((np.arange(lengths.size), np.round(dist * 1e9), -key))


def tunnel_coupling_from_map(
    da: xr.DataArray,
    fit: DiagramFit,
    *,
    lever_arm: np.ndarray,
    lever_arm_error: np.ndarray,
    electron_temperature_K: float,
    max_segments: int = 4,
) -> TunnelCoupling:
    """Fit ``t`` on the interdot lines of a map whose energy scale is known.

    Parameters
    ----------
    da : xarray.DataArray, dims (y, x)
        The map (sensor signal).
    fit : DiagramFit
        Line-based fit (lattice, virtual gates, ΔV, δ).
    lever_arm, lever_arm_error : ndarray, shape (2, 2)
        α (eV/V, rows dots, columns gates x, y) and its standard error.
    electron_temperature_K : float
        T_e, K.
    max_segments : int
        Longest segments used.

    Returns
    -------
    TunnelCoupling
    """
    alpha = np.asarray(lever_arm, float)
    alpha_err = np.asarray(lever_arm_error, float)
    if alpha.shape != (2, 2) or not np.all(np.isfinite(alpha)):
        raise InputError("lever_arm", f"expected a finite 2×2 lever-arm matrix, got {alpha.tolist()}")
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    d = alpha[0] - alpha[1]
    a_eps = float(np.hypot(*d))
    u = d / a_eps
    # error of |α1 − α2| from the element errors (uncorrelated approximation)
    e_d = np.hypot(alpha_err[0], alpha_err[1])
    a_eps_err = float(np.sqrt(np.sum((u * np.nan_to_num(e_d)) ** 2)))
    scale_sigma = float(np.hypot(a_eps_err / a_eps, SCALE_FLOOR))
    q = Quality()
    segs = interdot_segments(fit, x, y)
    if segs.shape[0] == 0:
        return TunnelCoupling(detuning_lever_arm=a_eps,
                              quality=q.with_warning("tunnel coupling: no interdot segment inside the map"))
    lengths = np.hypot(*(segs[:, 1] - segs[:, 0]).T)
    order = _segment_order(segs, x, y)
    dx, dy = abs(float(np.median(np.diff(x)))), abs(float(np.median(np.diff(y))))
    step = min(dx, dy)
    mu = fit.vg_matrix @ u  # virtual-coordinate step per volt along u
    room = np.min((fit.addition_V - np.abs(fit.mutual_V)) / np.maximum(np.abs(mu), 1e-12))
    half_length = _CUT_FRACTION * float(room)
    perp = np.array([-u[1], u[0]])  # along the interdot line (as in detuning_profile)
    kt = KB_EV_PER_K * float(electron_temperature_K)
    zmap = np.asarray(da.values, float)
    records: list[dict] = []
    for k in order:
        if len(records) >= max_segments:
            break
        pa, pb = segs[k]
        mid = 0.5 * (pa + pb)
        ends = np.array([mid - half_length * u, mid + half_length * u])
        if not (np.all((ends[:, 0] >= x.min()) & (ends[:, 0] <= x.max()))
                and np.all((ends[:, 1] >= y.min()) & (ends[:, 1] <= y.max()))):
            continue
        half_width = 0.3 * float(lengths[k])
        n_avg = int(np.clip(round(2 * half_width / step) + 1, 1, 25))
        n_pts = int(np.clip(round(4 * half_length / step), 41, 301))
        prof = detuning_profile(da, through=(float(mid[0]), float(mid[1])), direction=(float(u[0]), float(u[1])),
                                half_length_V=half_length, half_width_V=half_width if n_avg > 1 else 0.0,
                                n_points=n_pts, n_average=max(n_avg, 1))
        if not np.all(np.isfinite(prof.signal)):
            continue  # NaN pixels under the cut
        b_n = 0.5 * float((alpha[0] + alpha[1]) @ perp)
        offsets = np.linspace(-half_width, half_width, n_avg) if n_avg > 1 else np.zeros(1)
        node_s, node_o, idx, wts, box = _interpolation_plan(x, y, mid, u, prof.s_V, offsets)
        patch = zmap[box[0] : box[1], box[2] : box[3]]
        dz = np.diff(patch, axis=1).ravel()
        dz = dz[np.isfinite(dz)]
        pix_noise = float(1.4826 * np.median(np.abs(dz - np.median(dz))) / np.sqrt(2)) if dz.size > 8 else _NAN
        whiten = _whitening(idx, wts, node_s.size)
        # the occupations are evaluated only on the pixels the cut touches (about a quarter of
        # its bounding box): the same numbers at each of them, so the same profile
        used, inverse = np.unique(idx, return_inverse=True)
        geo = _CutGeometry(a_eps=a_eps, a_mean=0.5 * float((alpha[0] + alpha[1]) @ u), b=b_n,
                           e_cm=abs(b_n) * float(lengths[k]), kt=kt, node_s=node_s[used], node_o=node_o[used],
                           idx=inverse.reshape(idx.shape), wts=wts, whiten=whiten, pixel_noise=pix_noise)
        sv, gv = prof.s_V, prof.signal
        pf = _fit_cut(sv, gv, geo, scale_sigma=scale_sigma)
        t, t_err = pf.t_ueV, pf.error_ueV
        # a fit whose only doubt is its own statistical error is combined with the others
        usable = bool(pf.resolved) and all("uncertainty" in m for m in pf.warnings)
        scale_err = 0.0  # the energy scale is a parameter of the fit (in t_err)
        records.append({
            "midpoint_V": [float(mid[0]), float(mid[1])], "t_ueV": t,
            "error_ueV": float(np.hypot(t_err, scale_err)) if np.isfinite(t) else _NAN,
            "fit_error_ueV": t_err, "scale_error_ueV": scale_err, "ok": not pf.warnings, "usable": usable,
            "upper_limit_ueV": pf.upper_ueV, "best_fit_ueV": pf.t_best_ueV, "warnings": list(pf.warnings),
            "mutual_energy_over_kT": geo.e_cm / kt,
        })
    if not records:
        return TunnelCoupling(detuning_lever_arm=a_eps, quality=q.with_warning(
            "tunnel coupling: no interdot segment with room for a detuning cut inside the map"))
    # combine in t² (the model depends on t only through t²): each segment's profile likelihood is
    # taken as a parabola in t², centred on its best fit, with Δχ² = 1 at t ± σ (resolved) or
    # Δχ² = 4 at its upper limit (unresolved); a resolved line among unresolved ones is weighed
    # against them instead of being reported alone
    comb = [r for r in records
            if all(("uncertainty" in m) or ("not resolved" in m) for m in r["warnings"])
            and (r["usable"] or (np.isfinite(r["upper_limit_ueV"]) and np.isfinite(r["best_fit_ueV"])))]
    if comb:
        tau, sig = [], []
        for r in comb:
            if r["usable"]:
                tau.append(r["t_ueV"] ** 2)
                sig.append(2 * r["t_ueV"] * r["error_ueV"])
            else:
                tb = max(r["best_fit_ueV"], 0.0)
                tau.append(tb**2)
                sig.append(max(0.5 * (r["upper_limit_ueV"] ** 2 - tb**2), 1e-12))
        tau_a, sig_a = np.array(tau), np.array(sig)
        w = 1 / sig_a**2
        mean = float(np.sum(w * tau_a) / np.sum(w))
        err = float(np.sqrt(1 / np.sum(w)))
        if tau_a.size > 1:
            chi2 = float(np.sum(w * (tau_a - mean) ** 2) / (tau_a.size - 1))
            err *= max(1.0, np.sqrt(chi2))
            if chi2 > 9:
                q = q.with_warning(f"tunnel coupling: the {tau_a.size} interdot lines disagree (χ²/dof = {chi2:.1f})")
        if not mean > 2 * err:
            up = float(np.sqrt(max(mean, 0.0) + 2 * err))
            return TunnelCoupling(upper_limit_ueV=up, per_segment=tuple(records), detuning_lever_arm=a_eps,
                                  quality=q.with_warning(
                                      f"tunnel coupling not resolved (thermally broadened interdot line): "
                                      f"t < {up:.3g} µeV (2σ upper limit)", doubtful=False))
        t_val = float(np.sqrt(mean))
        t_err = 0.5 * err / t_val
        if t_err > 0.1 * t_val:
            q = q.with_warning(f"tunnel coupling uncertain: t = {t_val:.3g} ± {t_err:.2g} µeV (> 10 %)")
        return TunnelCoupling(t_val, t_err, _NAN, tuple(records), a_eps, q)
    uppers = np.array([r["upper_limit_ueV"] for r in records], float)
    uppers = uppers[np.isfinite(uppers)]
    if uppers.size:
        up = float(np.median(uppers))
        return TunnelCoupling(upper_limit_ueV=up, per_segment=tuple(records), detuning_lever_arm=a_eps,
                              quality=q.with_warning(
                                  f"tunnel coupling not resolved (thermally broadened interdot line): t < {up:.3g} µeV "
                                  "(2σ upper limit)", doubtful=False))
    return TunnelCoupling(per_segment=tuple(records), detuning_lever_arm=a_eps, quality=q.with_warning(
        "tunnel coupling: the polarisation-line fits failed: " + "; ".join(records[0]["warnings"][:2]),
        doubtful=False))


#: ΔM ≈ BIAS_PER_T_OVER_ECM · t/E_Cm: virtual-gate bias from lines repelled near the triple points by
#: the interdot tunnel coupling (measured on the generator's four double-dot presets: 0.03–0.10).
BIAS_PER_T_OVER_ECM = 0.1


@dataclass(frozen=True)
class CouplingRatio:
    """Scale-free ``t/E_Cm`` from the interdot line width (see :func:`coupling_to_mutual_ratio`)."""

    value: float = _NAN
    error: float = _NAN
    upper_limit: float = _NAN

    @property
    def expected_vg_bias(self) -> float:
        """Expected virtual-gate bias ``BIAS_PER_T_OVER_ECM · t/E_Cm`` (NaN when t/E_Cm is not resolved)."""
        return BIAS_PER_T_OVER_ECM * self.value if np.isfinite(self.value) else _NAN

    def to_json(self) -> dict:
        return {"value": self.value, "error": self.error, "upper_limit": self.upper_limit,
                "expected_vg_bias": self.expected_vg_bias}


def coupling_to_mutual_ratio(da: xr.DataArray, fit: DiagramFit, *, thermal_width_V: float) -> CouplingRatio:
    """``t/E_Cm`` without an energy scale, from the width of the interdot lines.

    In units where α11 = 1, the detuning gradient is ``M_1,: − M_2,:/(α11/α22)``
    (α11/α22 = δ2/δ1 from the diagram), ``E_Cm = δ1`` and ``k_B T_e = w1``
    (the Fermi width of the dot1 lines along x). The polarisation fit in
    these units gives ``t/E_Cm`` directly. Used to flag maps whose lines
    are pushed apart near the triple points (the common-slope fit is then
    biased by ≈ 0.1 t/E_Cm on the generator's presets).

    Parameters
    ----------
    thermal_width_V : float
        w1 = k_B T_e/(e α11), V; a sub-pixel value when the lines are sharp.
    """
    from ..physics.constants import KB_EV_PER_K

    if not fit.ok or not fit.mutual_resolved or not np.isfinite(fit.alpha_ratio) or not fit.mutual_V[0] > 0:
        return CouplingRatio()
    unit = 0.1  # α11 in the fake units (any value; cancels)
    alpha = unit * np.vstack([fit.vg_matrix[0], fit.vg_matrix[1] / fit.alpha_ratio])
    temp = unit * thermal_width_V / KB_EV_PER_K
    if not (np.isfinite(temp) and temp > 0):
        return CouplingRatio()
    tc = tunnel_coupling_from_map(da, fit, lever_arm=alpha, lever_arm_error=np.zeros((2, 2)),
                                  electron_temperature_K=temp, max_segments=2)
    ecm_ueV = unit * fit.mutual_V[0] * 1e6
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    pixel = min(abs(float(np.median(np.diff(x)))), abs(float(np.median(np.diff(y)))))
    a_eps = float(np.hypot(*(alpha[0] - alpha[1])))

    def resolved(t_ueV: float) -> bool:
        # a sharp interdot step, interpolated, looks about a pixel wide whatever t is
        return polarisation_fwhm_eV(t_ueV * 1e-6, temp) / a_eps >= 1.5 * pixel

    if tc:
        if not resolved(tc.value_ueV):
            return CouplingRatio(upper_limit=(tc.value_ueV + 2 * tc.error_ueV) / ecm_ueV)
        return CouplingRatio(tc.value_ueV / ecm_ueV, tc.error_ueV / ecm_ueV, _NAN)
    # segments fitted but flagged as resolution-limited or uncertain: keep a clearly resolved value as an
    # estimate. Any other flag means the fit did not measure t (a line wider than half the cut leaves
    # t unconstrained: seen at t/E_Cm ≈ 100 with a zero error on a sample map)
    vals = [(r["t_ueV"], r["fit_error_ueV"]) for r in tc.per_segment
            if np.isfinite(r["t_ueV"]) and r["t_ueV"] > 3 * r["fit_error_ueV"] > 0
            and all(("resolution-limited" in m) or ("uncertainty" in m) for m in r["warnings"])]
    if vals:
        v = float(np.median([a for a, _ in vals]))
        if not resolved(v):
            return CouplingRatio(upper_limit=v / ecm_ueV)
        return CouplingRatio(v / ecm_ueV, float(np.median([e for _, e in vals])) / ecm_ueV, _NAN)
    return CouplingRatio(upper_limit=tc.upper_limit_ueV / ecm_ueV if np.isfinite(tc.upper_limit_ueV) else _NAN)
