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

Implementation: samples are stored as (k, n) arrays (profile index last, so
every reduction runs over the short sample axis with the long profile axis
vectorised); the normal equations are built from the analytic Jacobian with
one ``einsum`` and solved by Gaussian elimination written out over the whole
batch (the 3×3 and 5×5 systems are symmetric positive definite, so no
pivoting is needed). A singular system makes only its own profile fail.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


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


_DIAG = np.arange(5)


def _basis(u, u0, w, kind):
    """Line shape φ and ``dphi`` (with ∂φ/∂u0 = −dphi/w) on (k, n) samples.

    ``F = 1 − fermi_occupation(u, u0, w) = ½ (1 + tanh((u − u0)/(2w)))``
    (:func:`stabtool.physics.thermal.fermi_occupation` written out, so that
    ``F (1 − F) = ¼ (1 − tanh²)`` needs no second pass).
    """
    t = np.tanh((u - u0) * (0.5 / w))
    F = 0.5 + 0.5 * t
    q = 0.25 - 0.25 * (t * t)  # F (1 − F)
    if kind == "step":
        return F, q
    return 4.0 * q, (-4.0 * q) * t  # 4F(1−F), 4F(1−F)(1−2F)


def _gauss_solve(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Solve ``A X = B`` for a batch: A (p, p, n), B (p, q, n) → X (p, q, n).

    Gaussian elimination without pivoting (A symmetric positive definite);
    a zero pivot gives non-finite values in that column of the batch only.
    Small batches go to LAPACK (:func:`numpy.linalg.solve`), unless one of
    their systems is singular.
    """
    if A.shape[2] <= 256:
        # small batches: LAPACK per system costs less than the written-out elimination's overhead
        try:
            return np.linalg.solve(A.transpose(2, 0, 1), B.transpose(2, 0, 1)).transpose(1, 2, 0)
        except np.linalg.LinAlgError:
            pass
    A = A.copy()
    B = B.copy()
    p = A.shape[0]
    with np.errstate(all="ignore"):
        for i in range(p - 1):
            f = A[i + 1 :, i] / A[i, i]  # (p−i−1, n)
            A[i + 1 :, i:] -= f[:, None] * A[i, i:][None]
            B[i + 1 :] -= f[:, None] * B[i][None]
        X = np.empty_like(B)
        for i in range(p - 1, -1, -1):
            s = B[i]
            if i < p - 1:
                s = s - (A[i, i + 1 :, None] * X[i + 1 :]).sum(0)
            X[i] = s / A[i, i]
    return X


def _linear_start(u, y, m, phi, c0):
    """Exact (a, b, h) of ``a + b u + h φ`` per profile, and the residual sum (variable projection)."""
    mphi = m * phi
    A = np.empty((3, 3, u.shape[1]))
    A[0, 0], A[0, 1], A[1, 1] = c0["m"], c0["mu"], c0["muu"]
    A[0, 2] = A[2, 0] = mphi.sum(0)
    A[1, 2] = A[2, 1] = (mphi * u).sum(0)
    A[2, 2] = (mphi * phi).sum(0)
    A[1, 0] = A[0, 1]
    for i in range(3):
        A[i, i] += 1e-12
    rhs = np.stack([c0["my"], c0["muy"], (mphi * y).sum(0)])[:, None]
    p = _gauss_solve(A, rhs)[:, 0]
    r = m * (y - (p[0] + p[1] * u + p[2] * phi))
    return p, (r * r).sum(0)


def fit_profiles(u: np.ndarray, y: np.ndarray, mask: np.ndarray, *, kind: str = "step",
                 halfwidth: float, n_iter: int = 20) -> BatchFit:
    """Fit all rows of ``y`` (n, k) sampled at ``u`` (n, k); ``mask`` (n, k) marks valid samples.

    Profiles leave the iteration once converged (relative change of the
    residual sum below 1e-10 or the damping saturated), so the cost follows
    the slow minority, not ``n × n_iter``.
    """
    n = y.shape[0]
    # (k, n) layout: reductions over the short sample axis, the batch vectorised
    uT = np.ascontiguousarray(np.asarray(u, float).T)
    mT = np.ascontiguousarray(np.asarray(mask, bool).T).astype(float)
    yT = np.ascontiguousarray(np.where(mask, y, 0.0).T)
    c0 = {"m": mT.sum(0), "mu": (mT * uT).sum(0), "muu": (mT * uT * uT).sum(0),
          "my": (mT * yT).sum(0), "muy": (mT * uT * yT).sum(0)}
    best_ssr = np.full(n, np.inf)
    p = np.zeros((5, n))
    for w0 in (0.7, 2.5):
        for c in np.arange(-2.0, 3.0):
            phi, _ = _basis(uT, c, w0, kind)
            lin, ssr = _linear_start(uT, yT, mT, phi, c0)
            better = ssr < best_ssr
            best_ssr = np.where(better, ssr, best_ssr)
            p[:3, better] = lin[:, better]
            p[3, better] = c
            p[4, better] = np.log(w0)
    lam = np.full(n, 1e-2)
    ssr = best_ssr.copy()
    act = np.arange(n)
    lo_w, hi_w = np.log(0.05), np.log(4 * halfwidth)
    ua, ya, ma = uT, yT, mT
    ca = c0
    pa = p.copy()  # parameters of the active profiles, with their line shapes
    phi, dphi = _basis(ua, pa[3], np.exp(pa[4]), kind)
    for _ in range(n_iter):
        if act.size == 0:
            break
        A, g = _normal_equations(pa, ua, ya, ma, kind, ca, phi, dphi)
        la = lam[act]
        D = A[_DIAG, _DIAG] + 1e-12  # (5, n_act)
        A[_DIAG, _DIAG] += la * D
        step = _gauss_solve(A, g[:, None])[:, 0]
        trial = pa + step
        trial[4] = np.clip(trial[4], lo_w, hi_w)
        st, tphi, tdphi = _ssr(trial, ua, ya, ma, kind)
        old = ssr[act]
        good = np.isfinite(st) & (st < old)
        pa[:, good] = trial[:, good]
        phi[:, good] = tphi[:, good]
        dphi[:, good] = tdphi[:, good]
        p[:, act[good]] = trial[:, good]
        ssr[act] = np.where(good, st, old)
        la = np.where(good, la * 0.3, la * 10)
        lam[act] = la
        done = (good & (old - st <= 1e-10 * old)) | (la > 1e6)
        if done.any():
            keep = ~done
            act = act[keep]
            ua, ya, ma = ua[:, keep], ya[:, keep], ma[:, keep]
            pa, phi, dphi = pa[:, keep], phi[:, keep], dphi[:, keep]
            ca = {key: val[keep] for key, val in ca.items()}
    JTJ, _ = _normal_equations(p, uT, yT, mT, kind, c0)
    dof = np.maximum(mT.sum(0) - 5, 1)
    s2 = ssr / dof
    JTJ[_DIAG, _DIAG] += 1e-15
    eye = np.broadcast_to(np.eye(5)[:, :, None], (5, 5, n))
    cinv = _gauss_solve(JTJ, eye)
    var = np.einsum("iin->in", cinv) * s2  # (5, n)
    err = np.sqrt(np.abs(var)).T  # (n, 5)
    p = p.T
    w = np.exp(p[:, 4])
    # an unresolved step (w well below a sample) pins its centre only to the
    # interval between two samples: the error is that interval's rms, 1/√12
    sharp = w < 0.7
    err[sharp, 3] = 1.0 / np.sqrt(12.0)
    err[sharp, 4] = np.where(np.isfinite(err[sharp, 4]), err[sharp, 4], 10.0)
    with np.errstate(invalid="ignore"):
        ok = (
            np.isfinite(p).all(1) & np.isfinite(err).all(1)
            & (np.abs(p[:, 3]) < halfwidth - 0.5) & (w < halfwidth / 2)
            & (np.abs(p[:, 2]) > 3 * err[:, 2]) & (err[:, 3] < 2.0)
        )
    return BatchFit(u0=p[:, 3].copy(), u0_err=err[:, 3].copy(), width=w, width_err=w * err[:, 4],
                    height=p[:, 2].copy(), height_err=err[:, 2].copy(), ssr=ssr, ok=ok,
                    a=p[:, 0].copy(), b=p[:, 1].copy())


def _normal_equations(pp, u, y, m, kind, c, phi=None, dphi=None):
    """``JᵀJ`` (5, 5, n) and ``Jᵀr`` (5, n) of the model at parameters ``pp`` (5, n); samples (k, n).

    ``c`` holds the parameter-free sums ``Σm``, ``Σmu``, ``Σmu²`` per profile (the mask is 0/1).
    """
    w = np.exp(pp[4])
    if phi is None:
        phi, dphi = _basis(u, pp[3], w, kind)
    hd = m * dphi * (pp[2] / w)
    v = u - pp[3]
    r = m * (y - (pp[0] + pp[1] * u + pp[2] * phi))
    J = np.empty((5,) + u.shape)
    J[0] = m
    J[1] = m * u
    J[2] = m * phi
    J[3] = -hd
    J[4] = J[3] * v
    # rows 0–1 of JᵀJ hold the constant sums Σm, Σmu, Σmu² and the symmetric
    # counterparts of rows 2–4: only rows 2–4 are computed
    JTJ = np.empty((5, 5, u.shape[1]))
    JTJ[2:] = np.einsum("ikn,jkn->ijn", J[2:], J)
    JTJ[:2, 2:] = JTJ[2:, :2].transpose(1, 0, 2)
    JTJ[0, 0], JTJ[0, 1], JTJ[1, 1] = c["m"], c["mu"], c["muu"]
    JTJ[1, 0] = JTJ[0, 1]
    g = np.einsum("ikn,kn->in", J, r)
    return JTJ, g


def _ssr(pp, u, y, m, kind):
    """Residual sum per profile at parameters ``pp`` (5, n), and the line shape there."""
    phi, dphi = _basis(u, pp[3], np.exp(pp[4]), kind)
    r = m * (y - (pp[0] + pp[1] * u + pp[2] * phi))
    return (r * r).sum(0), phi, dphi
