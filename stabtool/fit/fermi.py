"""Fermi–Dirac step fit of a 1-D trace across one dot–reservoir transition.

A gate swept finely across a transition moves the dot's electrochemical
potential through the reservoir's Fermi level; the occupation follows
``f = 1 / (1 + exp((V − V0)/w))`` with ``w = k_B T_e / (e α)``. A charge
sensor (or a current) turns the occupation into a step on a smooth
background. :func:`fit_fermi_step` fits

``s(V) = b0 + b1 (V − V_ref) + b2 (V − V_ref)² + h · [1 − f(V)]``

(either sign of the step height ``h``) and returns a :class:`FermiStepFit`.

Notes
-----
Initial guesses come from a grid search over centre and width in which the
linear parameters (step height, background) are solved exactly at every grid
point (variable projection, Golub & Pereyra, SIAM J. Numer. Anal. 10, 413
(1973), doi:10.1137/0710036); the best grid point starts a Levenberg–Marquardt
refinement of all parameters. Standard errors come from the Jacobian at the
optimum, scaled by the residual variance unless ``sigma`` is given.

A trace is rejected (``success=False`` with the reason) when

* no transition: the step is not significant (``|h| < 5 σ_h``, or under
  5 noise levels), wider than a third of the sweep, or centred outside it;
* two transitions: a second, separate step of significant height
  (≥ 25 % of the first, ≥ 6 σ) improves the fit;
* the width is at or below the sampling step (the step is not resolved).

References
----------
Standard Fermi–Dirac statistics; the width–temperature relation is used for
lever-arm calibration throughout the quantum-dot literature, e.g.
L. P. Kouwenhoven et al., "Electron transport in quantum dots", Mesoscopic
Electron Transport, NATO ASI Series E 345 (1997).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
from scipy import optimize

from ..errors import FitError, InputError
from ..physics.thermal import FERMI_FWHM_FACTOR, fermi_occupation
from ..quality import Quality

__all__ = ["FermiStepBatch", "FermiStepFit", "estimate_noise", "fit_fermi_step", "fit_fermi_steps"]

Background = Literal["none", "linear", "quadratic"]
_NBG = {"none": 0, "linear": 2, "quadratic": 3}

#: Minimum significance of the step height (height / its standard error).
MIN_STEP_SIGNIFICANCE = 5.0
#: Fewer sampling points than this inside the derivative FWHM gives a warning.
MIN_POINTS_PER_FWHM = 5.0

_NAN = float("nan")


@dataclass(frozen=True)
class FermiStepFit:
    """Result of :func:`fit_fermi_step`; tests false when the fit failed.

    Attributes
    ----------
    success : bool
        True when a single resolved Fermi step was fitted.
    reason : str
        Why the fit failed ("" on success).
    centre_V, centre_stderr_V : float
        Step centre ``V0`` and its standard error, V.
    width_V, width_stderr_V : float
        Fermi width ``w`` (derivative FWHM = 3.5255 w) and its standard error, V.
    step_height, step_height_stderr : float
        Signal change across the step from low to high gate voltage (signed,
        background excluded), in signal units.
    background : tuple of float
        Coefficients ``(b0, b1, b2)`` of ``b0 + b1 (V − V_ref) + b2 (V − V_ref)²``
        (signal units per V^k); unused orders are 0.
    background_ref_V : float
        ``V_ref`` of the background polynomial (the sweep midpoint), V.
    background_kind : str
        "none", "linear" or "quadratic".
    reduced_chi2 : float
        χ²/dof with ``sigma`` if given, otherwise with the noise estimated from
        point-to-point differences (≈ 1 for a good fit).
    noise : float
        Noise level used for ``reduced_chi2`` (signal units).
    n_points : int
        Finite points fitted.
    sampling_step_V : float
        Median spacing of the gate voltages, V.
    quality : Quality
        Verdict with warnings (e.g. few points across the width).
    """

    success: bool
    reason: str = ""
    centre_V: float = _NAN
    centre_stderr_V: float = _NAN
    width_V: float = _NAN
    width_stderr_V: float = _NAN
    step_height: float = _NAN
    step_height_stderr: float = _NAN
    background: tuple[float, float, float] = (_NAN, _NAN, _NAN)
    background_ref_V: float = _NAN
    background_kind: str = "linear"
    reduced_chi2: float = _NAN
    noise: float = _NAN
    n_points: int = 0
    sampling_step_V: float = _NAN
    quality: Quality = field(default_factory=lambda: Quality(ok=False))

    def __bool__(self) -> bool:
        return self.success

    @property
    def fwhm_V(self) -> float:
        """FWHM of the step's derivative, ``4 ln(1 + √2) w`` in V."""
        return FERMI_FWHM_FACTOR * self.width_V

    @property
    def points_per_fwhm(self) -> float:
        """Sampling points inside the derivative FWHM."""
        return self.fwhm_V / self.sampling_step_V

    def model(self, v: np.ndarray) -> np.ndarray:
        """Evaluate the fitted step plus background at gate voltages ``v`` (V)."""
        v = np.asarray(v, float)
        d = v - self.background_ref_V
        b0, b1, b2 = self.background
        bg = b0 + b1 * d + b2 * d**2
        return bg + self.step_height * (1.0 - fermi_occupation(v, self.centre_V, self.width_V))

    def background_at(self, v: np.ndarray) -> np.ndarray:
        """Evaluate only the background polynomial at ``v`` (V)."""
        d = np.asarray(v, float) - self.background_ref_V
        b0, b1, b2 = self.background
        return b0 + b1 * d + b2 * d**2


def estimate_noise(signal: np.ndarray) -> float:
    """White-noise level from point-to-point differences (robust, MAD based).

    ``σ ≈ 1.4826 · median|Δs − median Δs| / √2``: smooth signal changes between
    neighbouring points cancel, white noise adds in quadrature.
    """
    d = np.diff(np.asarray(signal, float))
    d = d[np.isfinite(d)]
    if d.size < 3:
        return _NAN
    return float(1.4826 * np.median(np.abs(d - np.median(d))) / np.sqrt(2.0))


def _step(x: np.ndarray, x0: float | np.ndarray, w: float) -> np.ndarray:
    """``1 − f`` = 0 → 1 step rising through ``x0``."""
    return 0.5 * (1.0 + np.tanh(0.5 * (x - x0) / w))


def _design(x: np.ndarray, nbg: int) -> np.ndarray:
    return np.stack([x**k for k in range(nbg)], axis=1) if nbg else np.zeros((x.size, 0))


def _grid_search(
    x: np.ndarray, y: np.ndarray, wt: np.ndarray, nbg: int, widths: np.ndarray, centres: np.ndarray,
    extra: np.ndarray | None = None,
) -> tuple[float, float, float]:
    """Best (cost, x0, w) over the grid; linear parameters solved exactly (normal equations)."""
    base = _design(x, nbg)
    if extra is not None:
        base = np.concatenate([base, extra[:, None]], axis=1)
    base = base * wt[:, None]
    yw = y * wt
    bb, by, yy = base.T @ base, base.T @ yw, float(yw @ yw)
    nb = base.shape[1]
    p = nb + 1
    best = (np.inf, _NAN, _NAN)
    half_d = 0.5 * (x[None, :] - centres[:, None])  # the same for every width (as in _step)
    for w in widths:
        st = 0.5 * (1.0 + np.tanh(half_d / w)) * wt[None, :]  # _step(x, centres, w), (n_c, n)
        ata = np.empty((centres.size, p, p))
        ata[:, :nb, :nb] = bb
        sb = st @ base
        ata[:, nb, :nb] = sb
        ata[:, :nb, nb] = sb
        ata[:, nb, nb] = np.einsum("cn,cn->c", st, st)
        atb = np.empty((centres.size, p))
        atb[:, :nb] = by
        atb[:, nb] = st @ yw
        coef = np.linalg.solve(ata + 1e-12 * np.eye(p), atb[..., None])[..., 0]
        cost = yy - np.sum(coef * atb, axis=1)  # at the optimum: |y|² − cᵀAᵀy
        i = int(np.argmin(cost))
        if cost[i] < best[0]:
            best = (float(cost[i]), float(centres[i]), float(w))
    return best


def _model_and_jac(p: np.ndarray, x: np.ndarray, nbg: int, nsteps: int) -> tuple[np.ndarray, np.ndarray]:
    """Model and Jacobian for params [x0, w, h]*nsteps + [b0..]."""
    m = np.zeros_like(x)
    cols = []
    for k in range(nsteps):
        x0, w, h = p[3 * k : 3 * k + 3]
        u = 0.5 * (x - x0) / w
        g = 0.5 * (1.0 + np.tanh(u))
        dg = 0.5 / np.cosh(np.clip(u, -350, 350)) ** 2
        m = m + h * g
        cols += [h * dg * (-0.5 / w), h * dg * (-u / w), g]
    b = p[3 * nsteps :]
    for k in range(nbg):
        m = m + b[k] * x**k
        cols.append(x**k)
    return m, np.stack(cols, axis=1)


def _refine(
    p0: np.ndarray, x: np.ndarray, y: np.ndarray, wt: np.ndarray, nbg: int, nsteps: int, *, max_nfev: int = 400
):
    """Levenberg–Marquardt in (x0, ln w, h, ...); returns the solution in (x0, w, h, ...)."""
    iw = [3 * k + 1 for k in range(nsteps)]

    def to_lin(q):
        p = q.copy()
        p[iw] = np.exp(np.clip(q[iw], -50, 5))
        return p

    def fun(q):
        return (_model_and_jac(to_lin(q), x, nbg, nsteps)[0] - y) * wt

    def jac(q):
        p = to_lin(q)
        j = _model_and_jac(p, x, nbg, nsteps)[1]
        j[:, iw] *= p[iw]
        return j * wt[:, None]

    q0 = np.asarray(p0, float).copy()
    q0[iw] = np.log(np.maximum(q0[iw], 1e-12))
    sol = optimize.least_squares(fun, q0, jac=jac, method="lm", x_scale="jac", max_nfev=max_nfev)
    sol.x = to_lin(sol.x)
    return sol


def _fail(reason: str, **kw) -> FermiStepFit:
    return FermiStepFit(success=False, reason=reason, quality=Quality(ok=False, warnings=(reason,)), **kw)


def fit_fermi_step(
    v: np.ndarray,
    signal: np.ndarray,
    *,
    background: Background = "linear",
    sigma: float | np.ndarray | None = None,
    errors: Literal["ignore", "raise"] = "ignore",
) -> FermiStepFit:
    """Fit one thermally broadened Fermi–Dirac step on a smooth background.

    Parameters
    ----------
    v : array_like, shape (n,)
        Gate voltages, V (any order; swept down is fine). NaNs are dropped.
    signal : array_like, shape (n,)
        Measured signal (sensor current, conductance, ...), any unit.
    background : {"linear", "quadratic", "none"}
        Polynomial background under the step.
    sigma : float or array_like of shape (n,), optional
        Noise standard deviation of ``signal``. If given, standard errors are
        absolute; otherwise they are scaled by the residual variance.
    errors : {"ignore", "raise"}
        ``"raise"`` turns a failed fit into :class:`~stabtool.errors.FitError`.

    Returns
    -------
    FermiStepFit
        Tests false when the trace was rejected; ``reason`` says why.

    Raises
    ------
    InputError
        When the arrays are malformed (shape, too few finite points, bad option).
    """
    if background not in _NBG:
        raise InputError("background", f"expected 'none', 'linear' or 'quadratic', got {background!r}")
    if errors not in ("ignore", "raise"):
        raise InputError("errors", f"expected 'ignore' or 'raise', got {errors!r}")
    v = np.asarray(v, float)
    s = np.asarray(signal, float)
    if v.ndim != 1 or s.shape != v.shape:
        raise InputError("signal", f"expected two 1-D arrays of equal length, got shapes {v.shape} and {s.shape}")
    sig = None
    if sigma is not None:
        sig = np.broadcast_to(np.asarray(sigma, float), v.shape)
        if not np.all(np.isfinite(sig) & (sig > 0)):
            raise InputError("sigma", "expected positive finite noise levels")
    ok = np.isfinite(v) & np.isfinite(s)
    if sig is not None:
        sig = sig[ok]
    v, s = v[ok], s[ok]
    nbg = _NBG[background]
    if v.size < nbg + 3 + 5:
        raise InputError("signal", f"a Fermi-step fit needs at least {nbg + 8} finite points, got {v.size}")
    order = np.argsort(v, kind="stable")
    v, s = v[order], s[order]
    if sig is not None:
        sig = sig[order]
    result = _fit_core(v, s, sig, background)
    if errors == "raise" and not result:
        raise FitError(result.reason)
    return result


def _fit_core(v: np.ndarray, s: np.ndarray, sig: np.ndarray | None, background: str) -> FermiStepFit:
    nbg = _NBG[background]
    n = v.size
    dv = np.diff(v)
    step_v = float(np.median(dv[dv > 0])) if np.any(dv > 0) else _NAN
    span = float(v[-1] - v[0])
    common: dict[str, Any] = dict(n_points=n, sampling_step_V=step_v, background_kind=background)
    if not np.isfinite(step_v) or span <= 0:
        return _fail("the gate voltage does not change along the trace", **common)
    vc = 0.5 * (v[0] + v[-1])
    vs = 0.5 * span
    x = (v - vc) / vs
    noise = estimate_noise(s) if sig is None else float(np.median(sig))
    ys = float(np.std(s)) or 1.0
    ym = float(np.median(s))
    y = (s - ym) / ys
    wt = np.ones(n) if sig is None else ys / sig
    xstep = step_v / vs

    # --- grid search for a starting point -------------------------------------------------
    widths = np.geomspace(0.5 * xstep, 2.0 / 3.0, 14)
    centres = np.linspace(-1.0, 1.0, min(241, max(41, n)))
    cost, x0, w0 = _grid_search(x, y, wt, nbg, widths, centres)
    if not np.isfinite(cost):
        return _fail("no transition: the step search found nothing", **common)
    sol = _refine_from(x, y, wt, nbg, x0, w0)
    p = sol.x
    x0, wn, h = p[:3]
    # --- covariance --------------------------------------------------------------------------
    res = sol.fun
    dof = max(n - p.size, 1)
    chi2 = float(np.sum(res**2))
    _, jac = _model_and_jac(p, x, nbg, 1)
    jw = jac * wt[:, None]
    try:
        cov = np.linalg.pinv(jw.T @ jw)
    except np.linalg.LinAlgError:  # pragma: no cover
        cov = np.full((p.size, p.size), np.nan)
    if sig is None:
        cov = cov * chi2 / dof
        red = (chi2 / dof) * ys**2 / noise**2 if noise > 0 else _NAN
    else:
        red = chi2 / dof
    perr = np.sqrt(np.clip(np.diag(cov), 0, None))

    centre = vc + vs * x0
    width = vs * wn
    height = ys * h
    b = np.zeros(3)
    b[:nbg] = p[3:] * ys / vs ** np.arange(nbg)
    b[0] += ym
    fit_kw: dict[str, Any] = dict(
        centre_V=float(centre),
        centre_stderr_V=float(vs * perr[0]),
        width_V=float(width),
        width_stderr_V=float(vs * perr[1]),
        step_height=float(height),
        step_height_stderr=float(ys * perr[2]),
        background=(float(b[0]), float(b[1]), float(b[2])),
        background_ref_V=float(vc),
        reduced_chi2=float(red),
        noise=float(noise),
        **common,
    )

    # --- rejection rules ------------------------------------------------------------------
    if not sol.success and sol.status <= 0:
        return _fail(f"the least-squares fit did not converge ({sol.message})", **fit_kw)
    signif = abs(h) / perr[2] if perr[2] > 0 else np.inf
    if not np.isfinite(signif) or signif < MIN_STEP_SIGNIFICANCE or (
        np.isfinite(noise) and noise > 0 and abs(height) < MIN_STEP_SIGNIFICANCE * noise
    ):
        return _fail(
            f"no transition: the best step ({height:.3g} signal units) is not significant "
            f"({signif:.1f} standard errors, noise {noise:.3g})",
            **fit_kw,
        )
    if width > span / 3.0:
        return _fail(
            f"no transition: the fitted step is {width:.3g} V wide, more than a third of the "
            f"{span:.3g} V sweep; it cannot be told from the background",
            **fit_kw,
        )
    if not (v[0] <= centre <= v[-1]):
        return _fail(
            f"no transition inside the sweep: the fitted centre {centre:.6g} V lies outside "
            f"[{v[0]:.6g}, {v[-1]:.6g}] V",
            **fit_kw,
        )
    if width <= step_v:
        return _fail(
            f"width {width:.3g} V is at or below the sampling step {step_v:.3g} V; the step is "
            "not resolved (sweep finer or over a narrower range)",
            **fit_kw,
        )
    second = _second_step(x, y, wt, nbg, p, xstep, sol.cost)
    if second is not None:
        ca, cb = (vc + vs * c for c in second)
        return _fail(
            f"two transitions: steps near {ca:.6g} V and {cb:.6g} V; "
            "crop the trace to one transition",
            **fit_kw,
        )
    quality = Quality()
    if (centre - v[0]) < 3 * width or (v[-1] - centre) < 3 * width:
        quality = quality.with_warning(
            f"the step centre {centre:.6g} V lies within 3 widths of the sweep end; the "
            "background is poorly constrained on one side"
        )
    ppf = FERMI_FWHM_FACTOR * width / step_v
    if ppf < MIN_POINTS_PER_FWHM:
        quality = quality.with_warning(
            f"only {ppf:.1f} points across the FWHM {FERMI_FWHM_FACTOR * width:.3g} V; the width "
            "is close to the resolution limit"
        )
    if np.isfinite(red) and red > 3.0:
        quality = quality.with_warning(
            f"reduced chi-squared {red:.2g} > 3: the Fermi step does not describe the trace "
            "within its noise"
        )
    return FermiStepFit(success=True, reason="", quality=quality, **fit_kw)


def _refine_from(x, y, wt, nbg, x0, w0):
    """Refine from a grid start; the linear parameters are re-solved first."""
    a = np.concatenate([_step(x, x0, w0)[:, None], _design(x, nbg)], axis=1) * wt[:, None]
    lin = np.linalg.lstsq(a, y * wt, rcond=None)[0]
    p0 = np.concatenate([[x0, w0, lin[0]], lin[1:]])
    return _refine(p0, x, y, wt, nbg, 1)


def _pair_grid(x, y, wt, nbg, widths, centres):
    """Best two-step start (x_a, x_b, w) on a grid of centre pairs with a shared width."""
    base = _design(x, nbg) * wt[:, None]
    yw = y * wt
    ia, ib = np.triu_indices(centres.size, k=1)
    best = (np.inf, _NAN, _NAN, _NAN)
    for w in widths:
        keep = (centres[ib] - centres[ia]) > 3.0 * 2.0 * w
        if not np.any(keep):
            continue
        a_i, b_i = ia[keep], ib[keep]
        st = _step(x[None, :], centres[:, None], w) * wt[None, :]  # (n_c, n)
        ss = st @ st.T
        sb = st @ base  # (n_c, nbg)
        bb = base.T @ base
        sy = st @ yw
        by = base.T @ yw
        npair = a_i.size
        p = 2 + nbg
        ata = np.empty((npair, p, p))
        ata[:, 0, 0] = ss[a_i, a_i]
        ata[:, 1, 1] = ss[b_i, b_i]
        ata[:, 0, 1] = ata[:, 1, 0] = ss[a_i, b_i]
        ata[:, 0, 2:] = ata[:, 2:, 0] = sb[a_i]
        ata[:, 1, 2:] = ata[:, 2:, 1] = sb[b_i]
        ata[:, 2:, 2:] = bb
        atb = np.empty((npair, p))
        atb[:, 0], atb[:, 1], atb[:, 2:] = sy[a_i], sy[b_i], by
        coef = np.linalg.solve(ata + 1e-12 * np.eye(p), atb[..., None])[..., 0]
        # cost = |y|² − 2 c·Aᵀy + cᵀ AᵀA c
        cost = yw @ yw - 2 * np.sum(coef * atb, axis=1) + np.einsum("kp,kpq,kq->k", coef, ata, coef)
        k = int(np.argmin(cost))
        if cost[k] < best[0]:
            best = (float(cost[k]), float(centres[a_i[k]]), float(centres[b_i[k]]), float(w))
    return best


def _second_step(x, y, wt, nbg, p, xstep, cost1) -> tuple[float, float] | None:
    """Centres (normalised) of two significant steps, or None.

    A two-step model (shared-width grid over centre pairs, then a free
    refinement) must beat the one-step fit clearly, with both steps inside the
    sweep, separated by more than three summed widths, the smaller at least
    25 % of the larger and 6 standard errors.
    """
    n = x.size
    widths = np.geomspace(max(0.5 * xstep, 1e-4), 1.0 / 6.0, 8)
    centres = np.linspace(-0.97, 0.97, min(61, max(31, n // 3)))
    cost, xa, xb, w = _pair_grid(x, y, wt, nbg, widths, centres)
    if not np.isfinite(cost):
        return None
    # the grid start must already beat the one-step fit clearly (χ² in noise variances)
    s2_grid = cost / max(n - 3 - 3 - nbg, 1)
    if s2_grid <= 0 or (2 * cost1 - cost) / s2_grid < 25.0:
        return None
    a = np.concatenate(
        [_step(x, xa, w)[:, None], _step(x, xb, w)[:, None], _design(x, nbg)], axis=1
    ) * wt[:, None]
    lin = np.linalg.lstsq(a, y * wt, rcond=None)[0]
    p0 = np.concatenate([[xa, w, lin[0], xb, w, lin[1]], lin[2:]])
    sol = _refine(p0, x, y, wt, nbg, 2)
    q = sol.x
    _, jac = _model_and_jac(q, x, nbg, 2)
    jw = jac * wt[:, None]
    dof = max(n - q.size, 1)
    s2 = (2 * sol.cost) / dof
    cov = np.linalg.pinv(jw.T @ jw) * s2
    err = np.sqrt(np.clip(np.diag(cov), 0, None))
    xa, wa, h1, xb, wb, h2 = q[:6]
    if not (-1 <= xa <= 1 and -1 <= xb <= 1):
        return None
    if abs(xa - xb) < 3 * (wa + wb) or max(wa, wb) > 1.0 / 3.0:
        return None
    hs = np.array([abs(h1), abs(h2)])
    es = np.array([err[2], err[5]])
    small = int(np.argmin(hs))
    if hs[small] < 0.25 * hs.max() or es[small] <= 0 or hs[small] / es[small] < 6.0:
        return None
    # the extra step (3 parameters) must lower chi² by much more than noise would
    if (cost1 - sol.cost) * 2 / s2 < 50.0:
        return None
    return (float(min(xa, xb)), float(max(xa, xb)))


# ----------------------------------------------------------------------------- batched fits
@dataclass(frozen=True)
class FermiStepBatch:
    """Results of :func:`fit_fermi_steps`: one entry per trace (arrays of shape (k,)).

    Attributes
    ----------
    success : ndarray of bool
        The trace passed the rejection rules of :func:`fit_fermi_step` (except
        the two-transition test, see :func:`fit_fermi_steps`).
    converged : ndarray of bool
        The batched Levenberg–Marquardt iteration converged.
    centre_V, centre_stderr_V, width_V, width_stderr_V : ndarray
        Fermi-step centre and width ``w`` with standard errors, V.
    step_height, step_height_stderr : ndarray
        Signed step height (low → high gate voltage) and error, signal units.
    reduced_chi2, noise : ndarray
        As in :class:`FermiStepFit` (noise from point-to-point differences).
    n_points : ndarray of int
    sampling_step_V : ndarray
    """

    success: np.ndarray
    converged: np.ndarray
    centre_V: np.ndarray
    centre_stderr_V: np.ndarray
    width_V: np.ndarray
    width_stderr_V: np.ndarray
    step_height: np.ndarray
    step_height_stderr: np.ndarray
    reduced_chi2: np.ndarray
    noise: np.ndarray
    n_points: np.ndarray
    sampling_step_V: np.ndarray

    def __len__(self) -> int:
        return int(self.success.size)


def _solve_batch(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve a batch of small systems ``a x = b`` (a (k, p, p), b (k, p)); a singular one gives NaN."""
    with np.errstate(all="ignore"):
        try:
            return np.linalg.solve(a, b[..., None])[..., 0]
        except np.linalg.LinAlgError:
            out = np.full(b.shape, np.nan)
            for i in range(a.shape[0]):
                try:
                    out[i] = np.linalg.solve(a[i], b[i])
                except np.linalg.LinAlgError:
                    pass
            return out


def _row_nanmedian(a: np.ndarray) -> np.ndarray:
    """``np.nanmedian(a, axis=1)`` of a 2-D array, bit for bit, without a Python loop over rows.

    NumPy takes the median of long rows one row at a time (``apply_along_axis``);
    here one selection per row does it
    (:func:`stabtool.preprocess._nan.kept_row_medians` of the non-NaN entries;
    all-NaN rows give NaN).
    """
    from ..preprocess._nan import kept_row_medians

    a = np.asarray(a, float)
    k = a.shape[0]
    if a.ndim != 2 or a.shape[1] == 0:
        return np.full(k, np.nan)
    keep = ~np.isnan(a)
    cnt = np.count_nonzero(keep, axis=1)
    return np.where(cnt > 0, kept_row_medians(a, keep, cnt), np.nan)


def _batch_model(x, p):
    """Model, tanh and F(1 − F) of ``b0 + b1 x + h F((x − x0)/w)`` on (k, n) samples; p (k, 5)."""
    x0, lw, h, b0, b1 = (p[:, i : i + 1] for i in range(5))
    w = np.exp(np.clip(lw, -50.0, 5.0))
    t = np.tanh((x - x0) * (0.5 / w))
    f = 0.5 + 0.5 * t
    return b0 + b1 * x + h * f, f, 0.25 - 0.25 * t * t, w


def _batch_jac(x, p, f, q, w):
    """Transposed Jacobian (k, 5, n) in (x0, ln w, h, b0, b1)."""
    h = p[:, 2:3]
    dx0 = -h * q / w
    return np.stack([dx0, dx0 * (x - p[:, 0:1]), f, np.ones_like(x), x], axis=1)


def _batch_jac_weighted(x, p, f, q, w, wt, xw):
    """``_batch_jac(x, p, f, q, w) * wt[:, None, :]``, element for element, without the constant rows' products.

    ``xw`` = ``x * wt``; the row of ones times ``wt`` is ``wt`` itself.
    """
    h = p[:, 2:3]
    dx0 = -h * q / w
    J = np.empty((x.shape[0], 5, x.shape[1]))
    np.multiply(dx0, wt, out=J[:, 0])
    np.multiply(dx0 * (x - p[:, 0:1]), wt, out=J[:, 1])
    np.multiply(f, wt, out=J[:, 2])
    J[:, 3] = wt
    J[:, 4] = xw
    return J


def fit_fermi_steps(
    v: list[np.ndarray] | tuple[np.ndarray, ...],
    signal: list[np.ndarray] | tuple[np.ndarray, ...],
    *,
    centre_guess_V: np.ndarray | float | None = None,
    max_iter: int = 40,
) -> FermiStepBatch:
    """Fit one Fermi step on a linear background to each of many traces at once.

    Same model, normalisation, error definition (Jacobian covariance scaled by
    the residual variance) and rejection rules as
    :func:`fit_fermi_step` with ``background="linear"``, vectorised over the
    traces: a variable-projection grid over the width at the guessed centre
    (linear parameters solved exactly), then Levenberg–Marquardt steps with
    the analytic Jacobian on all traces in parallel (5×5 normal equations per
    trace). Meant for traces that hold one transition near a known position
    (cuts aligned on a fitted line); unlike :func:`fit_fermi_step` there is
    no search for a second step and no grid over the centre.

    Parameters
    ----------
    v, signal : sequence of 1-D arrays
        Gate voltages (V) and signals of each trace (lengths may differ;
        NaNs are dropped; ≥ 10 finite points each, else that trace fails).
    centre_guess_V : float or array of shape (k,), optional
        Start of the step centre (default: the middle of each sweep).
    max_iter : int
        Levenberg–Marquardt iterations at most.

    Returns
    -------
    FermiStepBatch
        A trace that did not converge is marked ``converged=False`` (callers
        may refit it with :func:`fit_fermi_step`).

    References
    ----------
    G. H. Golub and V. Pereyra, SIAM J. Numer. Anal. 10, 413 (1973),
    doi:10.1137/0710036 (variable projection); D. W. Marquardt, J. Soc. Ind.
    Appl. Math. 11, 431 (1963), doi:10.1137/0111030.
    """
    k = len(v)
    if len(signal) != k:
        raise InputError("signal", f"expected as many signal traces as voltage traces, got {len(signal)} and {k}")
    vv, ss = [], []
    for a, b in zip(v, signal):
        a = np.asarray(a, float).ravel()
        b = np.asarray(b, float).ravel()
        if a.shape != b.shape:
            raise InputError("signal", f"expected equal lengths, got {a.size} and {b.size}")
        ok = np.isfinite(a) & np.isfinite(b)
        vv.append(a[ok])
        ss.append(b[ok])
    n_pts = np.array([a.size for a in vv], int)
    nmax = max(int(n_pts.max()) if k else 0, 1)
    nan = np.full(k, np.nan)
    V = np.full((k, nmax), np.inf)
    S = np.zeros((k, nmax))
    for i, (a, b) in enumerate(zip(vv, ss)):
        o = np.argsort(a, kind="stable")
        V[i, : a.size] = a[o]
        S[i, : a.size] = b[o]
    m = np.isfinite(V)
    usable = n_pts >= 10
    # --- per-trace normalisation (as fit_fermi_step) --------------------------------------
    last = np.maximum(n_pts - 1, 0)
    v_lo = np.where(n_pts > 0, V[:, 0], np.nan)
    v_hi = np.where(n_pts > 0, V[np.arange(k), last], np.nan)
    span = v_hi - v_lo
    usable &= np.isfinite(span) & (span > 0)
    vc = np.where(usable, 0.5 * (v_lo + v_hi), 0.0)
    vs = np.where(usable, 0.5 * span, 1.0)
    dv = np.diff(np.where(m, V, np.nan), axis=1)
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        step_v = _row_nanmedian(np.where(dv > 0, dv, np.nan))
        ds = np.diff(np.where(m, S, np.nan), axis=1)
        dmed = _row_nanmedian(ds)
        noise = 1.4826 * _row_nanmedian(np.abs(ds - dmed[:, None])) / np.sqrt(2.0)
        noise = np.where(n_pts >= 4, noise, np.nan)
        Sm = np.where(m, S, np.nan)
        ym = _row_nanmedian(Sm)
        ys = np.nanstd(Sm, axis=1)
    usable &= np.isfinite(step_v)
    ym = np.where(np.isfinite(ym), ym, 0.0)
    ys = np.where(np.isfinite(ys) & (ys > 0), ys, 1.0)
    X = np.where(m, (np.where(m, V, 0.0) - vc[:, None]) / vs[:, None], 0.0)
    Y = np.where(m, (S - ym[:, None]) / ys[:, None], 0.0)
    wt = (m & usable[:, None]).astype(float)
    xstep = np.where(usable, step_v / vs, 1.0)
    if centre_guess_V is None:
        x0g = np.zeros(k)
    else:
        x0g = np.clip((np.broadcast_to(np.asarray(centre_guess_V, float), (k,)) - vc) / vs, -0.9, 0.9)
        x0g = np.where(np.isfinite(x0g), x0g, 0.0)
    # --- start: widths grid at the guessed centre, linear parameters exact --------------------
    nw = 12
    lo_w = np.maximum(0.5 * xstep, 1e-6)
    grid_w = lo_w[:, None] * (((2.0 / 3.0) / lo_w)[:, None] ** (np.arange(nw) / (nw - 1)))  # (k, nw)
    best_cost = np.full(k, np.inf)
    p = np.zeros((k, 5))
    sw, sx, sxx = wt.sum(1), (wt * X).sum(1), (wt * X * X).sum(1)
    sy, sxy, syy = (wt * Y).sum(1), (wt * X * Y).sum(1), (wt * Y * Y).sum(1)
    dX = X - x0g[:, None]  # the same for every width
    for j in range(nw):
        w = grid_w[:, j : j + 1]
        F = (0.5 + 0.5 * np.tanh(dX * (0.5 / w))) * wt
        A = np.empty((k, 3, 3))
        A[:, 0, 0] = (F * F).sum(1)
        A[:, 0, 1] = A[:, 1, 0] = F.sum(1)
        A[:, 0, 2] = A[:, 2, 0] = (F * X).sum(1)
        A[:, 1, 1], A[:, 1, 2], A[:, 2, 1], A[:, 2, 2] = sw, sx, sx, sxx
        b = np.stack([(F * Y).sum(1), sy, sxy], axis=1)
        c = _solve_batch(A + 1e-12 * np.eye(3), b)
        cost = syy - np.sum(c * b, axis=1)
        better = np.isfinite(cost) & (cost < best_cost)
        best_cost = np.where(better, cost, best_cost)
        p[better] = np.stack([x0g, np.log(w[:, 0]), c[:, 0], c[:, 1], c[:, 2]], axis=1)[better]
    # --- batched Levenberg–Marquardt ---------------------------------------------------------
    mod, f, q, w = _batch_model(X, p)
    r = (mod - Y) * wt
    cost = np.sum(r * r, axis=1)
    lam = np.full(k, 1e-3)
    active = usable & np.isfinite(cost)
    converged = np.zeros(k, bool)
    eye = np.eye(5)
    XW = X * wt  # the constant Jacobian row, weighted
    for _ in range(max_iter):
        if not np.any(active):
            break
        ia = np.nonzero(active)[0]
        # all traces active: plain views instead of gathered copies (same values)
        sel = slice(None) if ia.size == k else ia
        Xa, wta = X[sel], wt[sel]
        J = _batch_jac_weighted(Xa, p[sel], f[sel], q[sel], w[sel], wta, XW[sel])
        A = J @ J.transpose(0, 2, 1)
        g = (J @ r[sel][:, :, None])[:, :, 0]
        dA = np.einsum("kii->ki", A)
        step = -_solve_batch(A + lam[ia, None, None] * (dA[:, :, None] * eye) + 1e-30 * eye, g)
        pt = p[sel] + step
        pt[:, 1] = np.clip(pt[:, 1], np.log(1e-6), np.log(10.0))
        mt, ft, qt, wtt = _batch_model(Xa, pt)
        rt = (mt - Y[sel]) * wta
        ct = np.sum(rt * rt, axis=1)
        good = np.isfinite(ct) & (ct <= cost[ia])
        gi = ia[good]
        rel = (cost[gi] - ct[good]) / np.maximum(cost[gi], 1e-300)
        p[gi], cost[gi], r[gi], f[gi], q[gi], w[gi] = pt[good], ct[good], rt[good], ft[good], qt[good], wtt[good]
        lam[gi] = np.maximum(lam[gi] / 3.0, 1e-9)
        lam[ia[~good]] *= 4.0
        small = np.all(np.abs(step[good][:, :3]) <= 1e-7 * (1.0 + np.abs(pt[good][:, :3])), axis=1) | (rel < 1e-12)
        done = gi[small]
        converged[done] = True
        active[done] = False
        stuck = ia[~good][lam[ia[~good]] > 1e8]
        converged[stuck] = True  # no step lowers the cost: at the minimum to rounding
        active[stuck] = False
    # --- covariance (linear w), scaled by the residual variance ---------------------------------
    J = _batch_jac(X, p, f, q, w) * wt[:, None, :]
    J[:, 1, :] /= w  # ∂/∂w = (∂/∂ ln w)/w
    A = J @ J.transpose(0, 2, 1)
    dof = np.maximum(n_pts - 5, 1)
    with np.errstate(all="ignore"):
        try:
            cov = np.linalg.pinv(A)
        except np.linalg.LinAlgError:  # pragma: no cover
            cov = np.full_like(A, np.nan)
        cov = cov * (cost / dof)[:, None, None]
        perr = np.sqrt(np.clip(np.einsum("kii->ki", cov), 0, None))
        red = (cost / dof) * ys**2 / noise**2
    wn = w[:, 0]
    centre = vc + vs * p[:, 0]
    width = vs * wn
    height = ys * p[:, 2]
    with np.errstate(all="ignore"):
        signif = np.abs(p[:, 2]) / perr[:, 2]
        success = (usable & converged & np.isfinite(signif) & (signif >= MIN_STEP_SIGNIFICANCE)
                   & ~(np.isfinite(noise) & (noise > 0) & (np.abs(height) < MIN_STEP_SIGNIFICANCE * noise))
                   & (width <= span / 3.0) & (centre >= v_lo) & (centre <= v_hi) & (width > step_v))
    return FermiStepBatch(
        success=success, converged=converged & usable,
        centre_V=np.where(usable, centre, nan), centre_stderr_V=np.where(usable, vs * perr[:, 0], nan),
        width_V=np.where(usable, width, nan), width_stderr_V=np.where(usable, vs * perr[:, 1], nan),
        step_height=np.where(usable, height, nan), step_height_stderr=np.where(usable, ys * perr[:, 2], nan),
        reduced_chi2=np.where(usable, red, nan), noise=noise, n_points=n_pts, sampling_step_V=step_v,
    )
