"""Vectorised Levenberg–Marquardt fit of many 1-D step (or peak) profiles at once.

Model, with ``F = 1 − fermi_occupation(u, u0, w)`` (the Fermi form of
:mod:`stabtool.physics.thermal`, so ``w`` is the Fermi width directly):

* ``"step"``: ``y = a + b u + h F``
* ``"peak"``: ``y = a + b u + h · 4 F (1 − F)`` (the derivative line shape,
  for maps where transitions show as peaks or dips rather than steps)

Parameters ``(a, b, h, u0, log w)``. Starts from a small grid over
``(u0, w)`` with the linear parameters solved exactly (variable projection,
Golub & Pereyra, SIAM J. Numer. Anal. 10, 413 (1973),
doi:10.1137/0710036), then damped Gauss–Newton steps (Levenberg 1944,
Marquardt 1963, doi:10.1137/0111030) on all profiles in parallel.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..physics.thermal import fermi_occupation


@dataclass(frozen=True)
class BatchFit:
    """Per-profile results (arrays of length n); ``ok`` marks usable fits."""

    u0: np.ndarray
    u0_err: np.ndarray
    width: np.ndarray
    width_err: np.ndarray
    height: np.ndarray
    height_err: np.ndarray
    ssr: np.ndarray
    ok: np.ndarray
    a: np.ndarray | None = None  # baseline offset and slope of the model (None when not kept)
    b: np.ndarray | None = None
    interpolated: np.ndarray | None = None  # u0 from the half-height interpolation (refine.py)


def _basis(u, u0, w, kind):
    F = 1.0 - fermi_occupation(u, u0[:, None], w[:, None])
    if kind == "step":
        return F, F * (1 - F)
    P = 4 * F * (1 - F)
    return P, 4 * F * (1 - F) * (1 - 2 * F)


def _linsolve(u, y, m, phi):
    """Exact (a, b, h) of ``a + b u + h φ`` per profile from the 3×3 normal equations."""
    At = np.stack([m, m * u, m * phi], axis=1)  # (n, 3, k)
    ATA = At @ At.transpose(0, 2, 1) + 1e-12 * np.eye(3)
    ATy = At @ (m * y)[..., None]
    p = np.linalg.solve(ATA, ATy)[..., 0]
    r = m * (y - (p[:, 0:1] + p[:, 1:2] * u + p[:, 2:3] * phi))
    return p, (r * r).sum(1)


def _jac_res(pp, u, y, m, kind):
    """Transposed Jacobian (n, 5, k) and residuals (n, k) of the model at parameters ``pp`` (n, 5)."""
    w = np.exp(pp[:, 4])[:, None]
    phi, dphi = _basis(u, pp[:, 3], w[:, 0], kind)
    hd = m * pp[:, 2:3] * dphi / w
    r = m * (y - (pp[:, 0:1] + pp[:, 1:2] * u + pp[:, 2:3] * phi))
    Jt = np.empty((u.shape[0], 5, u.shape[1]))
    Jt[:, 0] = m
    Jt[:, 1] = m * u
    Jt[:, 2] = m * phi
    Jt[:, 3] = -hd
    Jt[:, 4] = -hd * (u - pp[:, 3:4])
    return Jt, r


def _ssr(pp, u, y, m, kind):
    w = np.exp(pp[:, 4])
    phi, _ = _basis(u, pp[:, 3], w, kind)
    r = m * (y - (pp[:, 0:1] + pp[:, 1:2] * u + pp[:, 2:3] * phi))
    return (r * r).sum(1)


def fit_profiles(u: np.ndarray, y: np.ndarray, mask: np.ndarray, *, kind: str = "step",
                 halfwidth: float, n_iter: int = 20) -> BatchFit:
    """Fit all rows of ``y`` (n, k) sampled at ``u`` (n, k); ``mask`` (n, k) marks valid samples.

    Profiles leave the iteration once converged (relative change of the
    residual sum below 1e-10 or the damping saturated), so the cost follows
    the slow minority, not ``n × n_iter``.
    """
    n = y.shape[0]
    m = mask.astype(float)
    y = np.where(mask, y, 0.0)
    best_ssr = np.full(n, np.inf)
    p = np.zeros((n, 5))
    for w0 in (0.7, 2.5):
        for c0 in np.arange(-2.0, 3.0):
            u0 = np.full(n, c0)
            ww = np.full(n, w0)
            phi, _ = _basis(u, u0, ww, kind)
            lin, ssr = _linsolve(u, y, m, phi)
            better = ssr < best_ssr
            best_ssr = np.where(better, ssr, best_ssr)
            p[better, :3] = lin[better]
            p[better, 3] = c0
            p[better, 4] = np.log(w0)
    lam = np.full(n, 1e-2)
    ssr = best_ssr.copy()
    eye = np.eye(5)
    act = np.arange(n)
    lo_w, hi_w = np.log(0.05), np.log(4 * halfwidth)
    for _ in range(n_iter):
        if act.size == 0:
            break
        ua, ya, ma, pa = u[act], y[act], m[act], p[act]
        Jt, r = _jac_res(pa, ua, ya, ma, kind)
        JTJ = Jt @ Jt.transpose(0, 2, 1)
        g = (Jt @ r[..., None])[..., 0]
        D = np.diagonal(JTJ, axis1=1, axis2=2) + 1e-12
        la = lam[act]
        A = JTJ + la[:, None, None] * D[:, :, None] * eye
        try:
            step = np.linalg.solve(A, g[..., None])[..., 0]
        except np.linalg.LinAlgError:
            break
        trial = pa + step
        trial[:, 4] = np.clip(trial[:, 4], lo_w, hi_w)
        st = _ssr(trial, ua, ya, ma, kind)
        old = ssr[act]
        good = np.isfinite(st) & (st < old)
        p[act[good]] = trial[good]
        ssr[act] = np.where(good, st, old)
        la = np.where(good, la * 0.3, la * 10)
        lam[act] = la
        done = (good & (old - st <= 1e-10 * old)) | (la > 1e6)
        act = act[~done]
    Jt, r = _jac_res(p, u, y, m, kind)
    JTJ = Jt @ Jt.transpose(0, 2, 1)
    dof = np.maximum(m.sum(1) - 5, 1)
    s2 = ssr / dof
    try:
        cov = np.linalg.inv(JTJ + 1e-15 * eye) * s2[:, None, None]
    except np.linalg.LinAlgError:
        cov = np.full((n, 5, 5), np.nan)
    err = np.sqrt(np.abs(np.einsum("nii->ni", cov)))
    w = np.exp(p[:, 4])
    # an unresolved step (w well below a sample) pins its centre only to the
    # interval between two samples: the error is that interval's rms, 1/√12
    sharp = w < 0.7
    err[sharp, 3] = 1.0 / np.sqrt(12.0)
    err[sharp, 4] = np.where(np.isfinite(err[sharp, 4]), err[sharp, 4], 10.0)
    ok = (
        np.isfinite(p).all(1) & np.isfinite(err).all(1)
        & (np.abs(p[:, 3]) < halfwidth - 0.5) & (w < halfwidth / 2)
        & (np.abs(p[:, 2]) > 3 * err[:, 2]) & (err[:, 3] < 2.0)
    )
    return BatchFit(u0=p[:, 3], u0_err=err[:, 3], width=w, width_err=w * err[:, 4], height=p[:, 2],
                    height_err=err[:, 2], ssr=ssr, ok=ok, a=p[:, 0].copy(), b=p[:, 1].copy())
