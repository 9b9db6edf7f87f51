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
vectorised); the normal equations are built from the analytic Jacobian, one
fused product-and-sum (``einsum``) per distinct entry (for a few hundred
profiles or fewer, one for all entries), and solved by Gaussian
elimination written out over the whole batch (the 3×3 and 5×5 systems are
symmetric positive definite, so no pivoting is needed). A singular system
makes only its own profile fail. The residual and line shape of each accepted
step are kept for the next iteration, and the profiles that share their
sample offsets (all of :mod:`stabtool.lines.refine`'s) keep them as one
column and take the start grid's shapes from one table.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np


@dataclass(frozen=True)
class BatchFit:
    """Per-profile results (arrays of length n); ``ok`` marks usable fits.

    A usable fit has finite parameters and errors, its crossing inside the
    window, its width below half the window, a significant height and (with
    :data:`REQUIRE_CONVERGED`, off by default) an iteration that met its
    stopping test (``converged``) or left the crossing settled, or is an
    unresolved step.
    """

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
    converged: np.ndarray | None = None  # the iteration met its stopping test (None: not tracked)


_DIAG = np.arange(5)
#: convergence of one profile: relative residual-sum change and crossing step (px)
CONV_REL_SSR = 1e-6
CONV_U0_PX = 1e-3
#: fitted widths below this (px) leave the crossing unresolved within its sample interval
SHARP_W = 0.5
#: With REQUIRE_CONVERGED, a profile whose iteration stops at ``n_iter`` without meeting the
#: stopping test is usable only when its crossing has settled: moved by at most SETTLE_SIGMA of its
#: standard error over the last SETTLE_ITER steps. The others (a peak shape fitted to a step, widths
#: drifting to the window for profiles without a step, steps rejected on a flat minimum) sit
#: wherever the last step left them, and the line fits downstream follow them, i.e. the iteration
#: cap and the data's last digits (golden maps times 1 + 1e-6 N(0, 1), 6 copies, SNR ≥ 3: mean
#: range of the dot1 family slope over the copies 0.39 % → 0.025 % of itself with the rule; dot2
#: unchanged, 1.5 %, which comes from lines entering or leaving the family). OFF by default: on the
#: golden maps and the held-out probe it moves single maps across the accuracy gate's bounds in
#: both directions (dot1 maps beyond bounds 20.0 → 21.0 over 6 copies, probe 0:64 ok 11 → 10, the
#: map still within bounds but flagged); see DEVELOPERS.md, "Profile fits that never converge".
REQUIRE_CONVERGED = False
SETTLE_ITER = 4
SETTLE_SIGMA = 0.05
#: an unresolved step (w < 0.7 px) is usable unconverged: its width crawls towards zero and its
#: crossing wanders inside one sample interval without changing the fit; refine.py takes the
#: interval (midpoint or half-height interpolation), which the iteration has fixed
SHARP_UNCONVERGED_USABLE = True
#: a usable fit's height exceeds this many standard errors. (The crossing and width are free, so on
#: pure white noise about 3 % of step fits (all unresolved) and 4 % of peak fits pass; 3.5 and 4 σ
#: were tried on the golden maps and gave no better slopes.)
HEIGHT_Z = 3.0
#: active profiles above which converged ones are dropped from the working arrays as they go
COMPACT_MIN_PROFILES = 256


def _basis(u, u0, w, kind):
    """Line shape φ and ``dphi`` (with ∂φ/∂u0 = −dphi/w) on (k, n) samples.

    ``F = 1 − fermi_occupation(u, u0, w) = ½ (1 + tanh((u − u0)/(2w)))``
    (:func:`stabtool.physics.thermal.fermi_occupation` written out, so that
    ``F (1 − F) = ¼ (1 − tanh²)`` needs no second pass).
    """
    t = np.subtract(u, u0)
    t *= 0.5 / w
    np.tanh(t, out=t)
    q = t * t
    q *= -0.25
    q += 0.25  # F (1 − F)
    if kind == "step":
        t *= 0.5
        t += 0.5  # F
        return t, q
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


def _jump_crossing(u, y, m):
    """Per profile (samples (k, n)): the half-way level crossing across its largest jump between neighbours."""
    d = np.where((m[1:] > 0) & (m[:-1] > 0), y[1:] - y[:-1], 0.0)
    ad = np.abs(d)
    j = ad.argmax(0)
    cols = np.arange(u.shape[1])
    return 0.5 * (u[j, cols] + u[j + 1, cols])


def _grid_start(uT, yT, mT, c0, kind):
    """Best start per profile over a small (u0, w) grid, linear parameters exact: (6, n) = a, b, h, u0, log w, SSR.

    For each trial shape φ the baseline ``a + b u`` is projected out in
    closed form (its 2×2 normal matrix is the same for every trial), so one
    trial costs four sums over the samples. Grid: u0 ∈ {−2, …, 2} px at
    w = 0.7 and 2.5 px; for steps also the crossing of the largest jump
    between neighbouring samples at w = 0.3 px (a sharp step). The first of
    equally good trials wins. When all profiles share their sample offsets
    (as the profiles of :mod:`stabtool.lines.refine` do), the fixed grid's
    shapes are one table and its sums one contraction over the samples.
    """
    n = uT.shape[1]
    m, mu, muu, my, muy = (c0[k] for k in ("m", "mu", "muu", "my", "muy"))
    det = m * muu - mu * mu
    base = (muu / det, -mu / det, m / det, my, muy)  # inverse of the baseline's normal matrix; Σy, Σuy
    bi00, bi01, bi11 = base[:3]
    yy = (mT * yT * yT).sum(0) - (my * (bi00 * my + bi01 * muy) + muy * (bi01 * my + bi11 * muy))
    grid = [(c, w0) for w0 in (0.7, 2.5) for c in np.arange(-2.0, 3.0)]
    best = np.empty((6, n))
    best[5] = np.inf
    if n and (uT == uT[:, :1]).all():
        # every profile sampled at the same offsets: the grid's shapes are one table (trials, k)
        u1 = uT[:, 0]
        phis = np.stack([_grid_shape(u1, c, w0, kind) for c, w0 in grid])
        t = len(grid)
        sums = np.einsum("tk,kn->tn", np.concatenate([phis, phis * u1, phis * phis]), mT)
        spy = np.einsum("tk,kn->tn", phis, yT)
        # all trials at once (t, n); the first of the lowest finite residual sums wins (the
        # baseline only for the winners: the same numbers, elementwise)
        sp, sup = sums[:t], sums[t : 2 * t]
        h, ssr = _project_height(sp, sup, sums[2 * t :], spy, base, yy)
        ssr = np.where(np.isfinite(ssr), ssr, np.inf)
        k = np.argmin(ssr, axis=0)
        cols = np.arange(n)
        h, ssr = h[k, cols], ssr[k, cols]
        won = np.isfinite(ssr)
        a, b = _project_baseline(h, sp[k, cols], sup[k, cols], base)
        gc = np.array([c for c, _ in grid])
        gw = np.array([np.log(w0) for _, w0 in grid])
        best[:] = np.nan
        best[5] = np.inf
        np.copyto(best, np.stack([a, b, h, gc[k], gw[k], ssr]), where=won)
    else:
        for c, w0 in grid:
            _grid_trial(best, _grid_shape(uT, c, w0, kind), c, w0, uT, yT, mT, base, yy)
    if kind == "step":
        c = _jump_crossing(uT, yT, mT)
        _grid_trial(best, _grid_shape(uT, c, 0.3, kind), c, 0.3, uT, yT, mT, base, yy)
    return best


def _grid_shape(u, c, w0, kind):
    """The trial line shape φ at crossing ``c`` and width ``w0`` (no derivative)."""
    if kind == "step":
        return 0.5 + 0.5 * np.tanh((u - c) * (0.5 / w0))
    return _basis(u, c, w0, kind)[0]


def _project(sp, sup, spp, spy, base, yy):
    """Linear parameters ``(a, b, h)`` and SSR of a trial shape from its sums Σφ, Σuφ, Σφ², Σyφ.

    φ and y with the baseline projected out: ``h = ⟨φ', y'⟩ / ⟨φ', φ'⟩``.
    """
    h, ssr = _project_height(sp, sup, spp, spy, base, yy)
    a, b = _project_baseline(h, sp, sup, base)
    return a, b, h, ssr


def _project_height(sp, sup, spp, spy, base, yy):
    """The height ``h`` and SSR of :func:`_project`."""
    bi00, bi01, bi11, my, muy = base
    q0, q1 = bi00 * sp + bi01 * sup, bi01 * sp + bi11 * sup  # B⁻¹ (Σφ, Σuφ)
    spp_r = spp - (sp * q0 + sup * q1)
    spy_r = spy - (my * q0 + muy * q1)
    h = spy_r / spp_r
    return h, yy - spy_r * h


def _project_baseline(h, sp, sup, base):
    """The baseline ``(a, b)`` of :func:`_project` for the height ``h``."""
    bi00, bi01, bi11, my, muy = base
    a = bi00 * (my - h * sp) + bi01 * (muy - h * sup)
    b = bi01 * (my - h * sp) + bi11 * (muy - h * sup)
    return a, b


def _grid_trial(best, phi, c, w0, uT, yT, mT, base, yy):
    """Keep in ``best`` (6, n) the trial shape ``phi`` (k, n) where it fits better."""
    mphi = mT * phi
    fit = _project(mphi.sum(0), (mphi * uT).sum(0), (mphi * phi).sum(0), (mphi * yT).sum(0), base, yy)
    _keep_better(best, fit, c, w0)


def _keep_better(best, fit, c, w0):
    """Keep in ``best`` (6, n) the trial ``fit = (a, b, h, ssr)`` at ``(c, w0)`` where its SSR is lower."""
    a, b, h, ssr = fit
    n = best.shape[1]
    better = np.isfinite(ssr) & (ssr < best[5])
    np.copyto(best, np.stack([a, b, h, np.broadcast_to(c, (n,)), np.full(n, np.log(w0)), ssr]), where=better)


def fit_profiles(u: np.ndarray, y: np.ndarray, mask: np.ndarray, *, kind: str = "step",
                 halfwidth: float, n_iter: int = 20) -> BatchFit:
    """Fit all rows of ``y`` (n, k) sampled at ``u`` (n, k); ``mask`` (n, k) marks valid samples.

    Profiles leave the iteration once converged (crossing step below
    ``CONV_U0_PX`` and relative change of the residual sum below
    ``CONV_REL_SSR``, ten and a hundred times looser for unresolved steps,
    or the damping saturated), so the cost follows the slow minority, not
    ``n × n_iter``. A profile still iterating after ``n_iter`` steps is
    marked not ``converged``; with ``REQUIRE_CONVERGED`` it is then not
    ``ok`` unless its crossing moved by at most ``SETTLE_SIGMA`` standard
    errors over the last ``SETTLE_ITER`` steps or it is an unresolved step.
    """
    with np.errstate(all="ignore"):  # a failed profile gives NaN in its own column only
        scale = _batch_scale(y, mask)
        if scale == 1.0:
            return _fit_batch(u, y, mask, kind, halfwidth, n_iter)
        fit = _fit_batch(u, np.asarray(y, float) / scale, mask, kind, halfwidth, n_iter)
        return replace(fit, height=fit.height * scale, height_err=fit.height_err * scale, ssr=fit.ssr * scale**2,
                       a=None if fit.a is None else fit.a * scale, b=None if fit.b is None else fit.b * scale)


def _batch_scale(y: np.ndarray, mask: np.ndarray) -> float:
    """The power of two near the profiles' typical spread (median over profiles of max − min).

    The fit's damping and covariance floors are absolute (``+1e-12``, ``+1e-15``), and the
    Jacobian columns of an unresolved step's width scale with the step height squared, so the
    fits depended on the signal's unit; divided by a power of two (exact) they do not.
    """
    m = np.asarray(mask, bool) & np.isfinite(y)
    yy = np.asarray(y, float)
    with np.errstate(all="ignore"):  # (a profile without samples gives −inf, left out below)
        spread = np.where(m, yy, -np.inf).max(axis=1) - np.where(m, yy, np.inf).min(axis=1)
    spread = spread[np.isfinite(spread) & (spread > 0)]
    if spread.size == 0:
        return 1.0
    return float(2.0 ** np.round(np.log2(np.median(spread))))


class _Active:
    """The samples, parameters and line shapes of the profiles still iterating, (·, n_act) arrays.

    ``data`` stacks the samples ``y``, the mask ``m`` and ``m u`` (3, k, n);
    ``cur`` the line shape, its derivative factor and the residual at the
    current parameters (3, k, n), ``trial`` the same at the trial step (a
    buffer); ``c`` the parameter-free sums (5, n). ``u`` stays one column
    (k, 1) when every profile has the same sample offsets (it then
    broadcasts, and compactions skip it). Stacking keeps the number of
    array operations per iteration (and per compaction) small: the late
    iterations run on a few dozen profiles, where each call's overhead, not
    its arithmetic, is the cost.
    """

    def __init__(self, uT, yT, mT, c0, p, ssr, kind):
        self.shared_u = bool((uT == uT[:, :1]).all())
        self.u = uT[:, :1] if self.shared_u else uT
        self.data = np.stack([yT, mT, mT * uT])
        self.c = np.stack([c0[key] for key in _C_KEYS])
        self.p, self.ssr = p.copy(), ssr.copy()
        self.lam = np.full(p.shape[1], 1e-2)
        self.cur = np.empty_like(self.data)
        self.trial = np.empty_like(self.data)
        self.tmp = np.empty_like(yT)
        self.design = _design_buffer(self.data)
        _shape_and_residual(self.cur, self.p, self.u, yT, mT, kind, self.tmp)

    def keep(self, sel):
        """Keep the profiles ``sel`` (boolean, n_act) only."""
        # (np.compress keeps the arrays C-contiguous: the reductions over the samples then
        # run in the same order as before the compaction)
        self.data, self.cur = np.compress(sel, self.data, axis=2), np.compress(sel, self.cur, axis=2)
        self.trial = np.empty(self.cur.shape)
        self.tmp = np.empty(self.cur.shape[1:])
        if not self.shared_u:
            self.u = np.compress(sel, self.u, axis=1)
        self.p, self.ssr, self.lam, self.c = self.p[:, sel], self.ssr[sel], self.lam[sel], self.c[:, sel]
        self.design = _design_buffer(self.data)


def _design_buffer(data: np.ndarray) -> np.ndarray | None:
    """(6, k, n) buffer ``m, m u, J₀, J₁, J₂, r`` of the fused normal equations, ``m, m u`` filled in.

    None for more than ``FUSED_MAX_PROFILES`` profiles (they take the separate sums).
    """
    if data.shape[2] > FUSED_MAX_PROFILES:
        return None
    X = np.empty((6,) + data.shape[1:])
    X[:2] = data[1:]
    return X


#: order of the parameter-free sums in ``_Active.c``
_C_KEYS = ("m", "mu", "muu", "my", "muy")


def _half_tanh_and_f1mf(u, centre, w, *, t_out, q_out):
    """``t = tanh((u − centre)/(2w))`` into ``t_out`` and ``F(1 − F) = (1 − t²)/4`` into ``q_out``.

    ``F = (1 + t)/2`` is the Fermi step; both buffers are returned.
    """
    t = np.subtract(u, centre, out=t_out)
    t *= 0.5 / w
    np.tanh(t, out=t)
    q = np.multiply(t, t, out=q_out)
    q *= -0.25
    q += 0.25  # F (1 − F)
    return t, q


def _shape_and_residual(out, pp, u, y, m, kind, tmp):
    """Line shape φ, ``dphi`` and the masked residual at ``pp`` (5, n) into ``out`` (3, k, n).

    The same arithmetic as :func:`_basis` and :func:`_residual`, written
    into preallocated buffers (``tmp``, (k, n), is scratch).
    """
    phi, dphi, r = out[0], out[1], out[2]
    w = np.exp(pp[4])
    if kind == "step":
        t, _ = _half_tanh_and_f1mf(u, pp[3], w, t_out=phi, q_out=dphi)
        t *= 0.5
        t += 0.5  # F
    else:
        t, q = _half_tanh_and_f1mf(u, pp[3], w, t_out=tmp, q_out=phi)
        np.multiply(q, -4.0, out=dphi)
        dphi *= t  # 4F(1−F)(1−2F) (times −4 and 4 are exact)
        phi *= 4.0  # 4F(1−F)
    np.multiply(pp[1], u, out=r)
    r += pp[0]
    np.multiply(pp[2], phi, out=tmp)
    r += tmp
    np.subtract(y, r, out=r)
    r *= m


def _fit_batch(u, y, mask, kind, halfwidth, n_iter) -> BatchFit:
    """:func:`fit_profiles` (inside its ``errstate``)."""
    n = y.shape[0]
    # (k, n) layout: reductions over the short sample axis, the batch vectorised
    uT = np.ascontiguousarray(np.asarray(u, float).T)
    mT = np.ascontiguousarray(np.asarray(mask, bool).T).astype(float)
    yT = np.ascontiguousarray(np.where(mask, y, 0.0).T)
    c0 = {"m": mT.sum(0), "mu": (mT * uT).sum(0), "muu": (mT * uT * uT).sum(0),
          "my": (mT * yT).sum(0), "muy": (mT * uT * yT).sum(0)}
    p = _grid_start(uT, yT, mT, c0, kind)
    ssr = p[5].copy()
    p = p[:5].copy()
    act = np.arange(n)
    frz = np.zeros(n, bool)  # active profiles already converged, left out at the next compaction
    conv = np.zeros(n, bool)  # profiles that met the stopping test
    nf = 0
    lo_w, hi_w = np.log(0.05), np.log(4 * halfwidth)
    log_sharp = np.log(SHARP_W)
    a = _Active(uT, yT, mT, c0, p, ssr, kind)
    u_snap = None  # the crossings SETTLE_ITER iterations before the cap
    for it in range(n_iter):
        if act.size == 0:
            break
        if REQUIRE_CONVERGED and it == n_iter - SETTLE_ITER:  # (only the rule reads it)
            u_snap = p[3].copy()
            u_snap[act] = a.p[3]
        A, g, diag = _normal_equations_active(a)  # (diag: the diagonal of each system, a (5, n_act) view)
        la = a.lam
        D = diag + 1e-12
        diag += la * D
        if nf and act.size <= COMPACT_MIN_PROFILES:
            # a small batch keeps its converged profiles until all have converged (see below);
            # their steps are never used, so only the others' systems are solved (each system
            # is solved on its own: the same numbers)
            live = np.flatnonzero(~frz)
            step = np.zeros((5, act.size))
            step[:, live] = _solve_vector(A[:, :, live], g[:, live])
        else:
            step = _solve_vector(A, g)
        trial = a.p + step
        np.minimum(np.maximum(trial[4], lo_w, out=trial[4]), hi_w, out=trial[4])  # (np.clip, cheaper to call)
        _shape_and_residual(a.trial, trial, a.u, a.data[0], a.data[1], kind, a.tmp)
        tr = a.trial[2]
        st = np.einsum("kn,kn->n", tr, tr)
        old = a.ssr
        good = (st < old) & ~frz  # (false for a NaN or infinite trial)
        np.copyto(a.p, trial, where=good)
        _accept(a, good)
        a.ssr = np.where(good, st, old)
        a.lam = np.where(frz, la, np.where(good, la * 0.3, la * 10))
        # converged: a step that moved the crossing by < CONV_U0_PX and changed
        # the residual sum by < CONV_REL_SSR of it (≈ a parameter step of a few
        # 10⁻³ σ; a failed step that small means the profile sits at the
        # minimum); a sharp step's width crawls towards zero without changing
        # the samples' fit, so the width itself is not tested. An unresolved
        # step (w < SHARP_W) is only located to its sample interval (refine.py
        # replaces its u0 by the interval's midpoint or the half-height
        # interpolation): 1e-2 px and 1e-4 of the residual do there.
        dr = np.abs(old - st)
        du = np.abs(step[3])
        done = ((dr <= CONV_REL_SSR * old) & (du <= CONV_U0_PX)) | (a.lam > 1e6)
        done |= (a.p[4] < log_sharp) & (du <= 10 * CONV_U0_PX) & (dr <= 100 * CONV_REL_SSR * old)
        frz |= done
        nf = int(np.count_nonzero(frz))
        # drop the converged profiles from the working arrays once they are an
        # eighth of them (each compaction copies all the arrays); a few hundred
        # profiles cost about the same per iteration as fewer (the calls' overhead),
        # so small batches are compacted only when every profile has converged
        if nf and (nf == act.size or (act.size > COMPACT_MIN_PROFILES and 8 * nf >= act.size)):
            p[:, act] = a.p
            ssr[act] = a.ssr
            conv[act[frz]] = True
            keep = ~frz
            act = act[keep]
            a.keep(keep)
            frz = np.zeros(act.size, bool)
            nf = 0
    if act.size:
        p[:, act] = a.p
        ssr[act] = a.ssr
        conv[act[frz]] = True
    fit = _finish(p, ssr, uT, yT, mT, c0, kind, halfwidth)
    if not REQUIRE_CONVERGED:
        return replace(fit, converged=conv)
    usable = conv | (SHARP_UNCONVERGED_USABLE & (fit.width < 0.7))
    if SETTLE_ITER and u_snap is not None:
        usable |= np.abs(p[3] - u_snap) <= SETTLE_SIGMA * fit.u0_err
    return replace(fit, ok=fit.ok & usable, converged=conv)


def _accept(a: _Active, good: np.ndarray) -> None:
    """Make the trial line shapes and residuals current where ``good`` (boolean, n_act).

    Mostly accepted: the buffers swap and the few rejected columns are
    copied back; otherwise a masked copy.
    """
    bad = np.flatnonzero(~good)
    if 4 * bad.size <= good.size:
        a.cur, a.trial = a.trial, a.cur
        if bad.size:
            a.cur[:, :, bad] = a.trial[:, :, bad]
    else:
        np.copyto(a.cur, a.trial, where=good)


def _normal_equations_active(a: _Active):
    """:func:`_normal_equations` of the active profiles at their current line shape and residual.

    For up to ``FUSED_MAX_PROFILES`` profiles the same sums with fewer calls
    (the late iterations run on a few dozen profiles, where each call's
    overhead is the cost): the columns ``m, m u, J₀, J₁, J₂`` and the
    residual, stacked in ``a.design``, are summed against each other in one
    contraction (5 × 6 products; ``Σ m·m = Σ m`` and ``Σ (m u)² = Σ m u²``
    as the mask is 0/1); every entry is the same sequential sum over the
    samples. More profiles take :func:`_normal_equations` itself (fewer
    products). Returns ``(JᵀJ, Jᵀr, diagonal)``, the last a writable
    (5, n) view of the diagonal of ``JᵀJ``.
    """
    y, m, mu = a.data
    phi, dphi, r = a.cur
    pp = a.p
    w = np.exp(pp[4])
    X = a.design
    J = np.empty((3,) + y.shape) if X is None else X[2:5]
    np.multiply(m, phi, out=J[0])
    np.multiply(m, dphi, out=J[1])
    J[1] *= -(pp[2] / w)  # ∂/∂u0 = −(h/w) m ∂φ
    np.subtract(a.u, pp[3], out=J[2])
    J[2] *= J[1]  # ∂/∂log w = (u − u0) ∂/∂u0
    if X is None:
        # many profiles: the separate sums (fewer products; the calls' overhead is small here)
        A, g = _normal_equations(pp, a.u, y, m, "", {"m": a.c[0], "mu": a.c[1], "muu": a.c[2]}, phi, dphi,
                                 mu=mu, r=r, jacobian=J)
        return A, g, A.reshape(25, -1)[::6]
    X[5] = r
    M = np.einsum("ikn,jkn->ijn", X[:5], X)  # (5, 6, n): JᵀJ and Jᵀr
    return M[:, :5], M[:, 5], M.reshape(30, -1)[::7]


#: Active profiles up to which the normal equations are built in a few fused contractions.
FUSED_MAX_PROFILES = 512


def _solve_vector(A: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``A x = b`` for a batch: A (5, 5, n), b (5, n) → x (5, n); A and b are overwritten.

    :func:`_gauss_solve` with one right-hand side (the same arithmetic for
    every entry it uses): the elimination leaves out the column it zeroes,
    which is never read again, and works in place.
    """
    n = A.shape[2]
    if n <= 256:
        try:
            return np.linalg.solve(A.transpose(2, 0, 1), b.T[:, :, None])[:, :, 0].T
        except np.linalg.LinAlgError:
            pass
    p = A.shape[0]
    with np.errstate(all="ignore"):
        for i in range(p - 1):
            f = A[i + 1 :, i] / A[i, i]  # (p−i−1, n)
            A[i + 1 :, i + 1 :] -= f[:, None] * A[i, i + 1 :][None]
            b[i + 1 :] -= f * b[i]
        x = np.empty_like(b)
        x[p - 1] = b[p - 1] / A[p - 1, p - 1]
        for i in range(p - 2, -1, -1):
            x[i] = (b[i] - (A[i, i + 1 :] * x[i + 1 :]).sum(0)) / A[i, i]
    return x


def _finish(p, ssr, uT, yT, mT, c0, kind, halfwidth) -> BatchFit:
    """Standard errors from ``(JᵀJ)⁻¹ s²`` at the fitted parameters ``p`` (5, n), and the usability test."""
    JTJ, _ = _normal_equations(p, uT, yT, mT, kind, c0, gradient=False)
    dof = np.maximum(mT.sum(0) - 5, 1)
    s2 = ssr / dof
    JTJ[_DIAG, _DIAG] += 1e-15
    var = _inverse_diagonal(JTJ) * s2  # (5, n)
    err = np.sqrt(np.abs(var)).T  # (n, 5)
    p = p.T
    w = np.exp(p[:, 4])
    # an unresolved step (w well below a sample) pins its centre only to the
    # interval between two samples: the error is that interval's rms, 1/√12
    sharp = w < 0.7
    err[sharp, 3] = 1.0 / np.sqrt(12.0)
    err[sharp, 4] = np.where(np.isfinite(err[sharp, 4]), err[sharp, 4], 10.0)
    ok = (
        np.isfinite(p).all(1) & np.isfinite(err).all(1)
        & (np.abs(p[:, 3]) < halfwidth - 0.5) & (w < halfwidth / 2)
        & (np.abs(p[:, 2]) > HEIGHT_Z * err[:, 2]) & (err[:, 3] < 2.0)
    )
    return BatchFit(u0=p[:, 3].copy(), u0_err=err[:, 3].copy(), width=w, width_err=w * err[:, 4],
                    height=p[:, 2].copy(), height_err=err[:, 2].copy(), ssr=ssr, ok=ok,
                    a=p[:, 0].copy(), b=p[:, 1].copy())


def _inverse_diagonal(A: np.ndarray) -> np.ndarray:
    """Diagonal (p, n) of the inverses of a batch of matrices A (p, p, n), symmetric positive definite.

    ``_gauss_solve(A, I)`` restricted to what its diagonal needs (the same
    arithmetic for those entries): after the forward elimination, column q
    of the right-hand side is zero above row q, and the back substitution
    for entry (q, q) needs rows q … p−1 of column q only.
    """
    p, _, n = A.shape
    if n <= 256:
        eye = np.broadcast_to(np.eye(p)[:, :, None], A.shape)
        return np.einsum("iin->in", _gauss_solve(A, eye))
    A = A.copy()
    B = np.zeros(A.shape)
    B[_DIAG[:p], _DIAG[:p]] = 1.0
    with np.errstate(all="ignore"):
        for i in range(p - 1):
            f = A[i + 1 :, i] / A[i, i]  # (p−i−1, n)
            A[i + 1 :, i + 1 :] -= f[:, None] * A[i, i + 1 :][None]
            B[i + 1 :, : i + 1] -= f[:, None] * B[i, : i + 1][None]
        X = np.empty_like(B)
        X[p - 1] = B[p - 1] / A[p - 1, p - 1]
        for i in range(p - 2, -1, -1):
            s = B[i, : i + 1] - (A[i, i + 1 :, None] * X[i + 1 :, : i + 1]).sum(0)
            X[i, : i + 1] = s / A[i, i]
    return X[_DIAG[:p], _DIAG[:p]]


def _normal_equations(pp, u, y, m, kind, c, phi=None, dphi=None, *, mu=None, r=None, gradient=True,
                      jacobian=None):
    """``JᵀJ`` (5, 5, n) and ``Jᵀr`` (5, n) of the model at parameters ``pp`` (5, n); samples (k, n).

    ``c`` holds the parameter-free sums ``Σm``, ``Σmu``, ``Σmu²`` per profile
    (the mask is 0/1); ``mu`` (k, n), optional, is ``m u``, and ``r`` the
    residual there (:func:`_residual`). The Jacobian's columns are ``m``,
    ``m u`` (constant) and ``m φ``, ``−m h/w ∂φ``, ``(u − u0)`` times the
    latter (height, crossing and log width); as the last three are masked,
    their sums with ``m`` need no product. With ``gradient=False`` only
    ``JᵀJ`` is computed (``Jᵀr`` is None); ``jacobian`` (3, k, n), optional,
    holds those three columns already.
    """
    if mu is None:
        mu = m * u
    if jacobian is not None:
        J = jacobian
    else:
        w = np.exp(pp[4])
        if phi is None:
            phi, dphi = _basis(u, pp[3], w, kind)
        J = np.empty((3,) + y.shape)
        np.multiply(m, phi, out=J[0])
        np.multiply(m, dphi, out=J[1])
        J[1] *= -(pp[2] / w)  # ∂/∂u0 = −(h/w) m ∂φ
        np.subtract(u, pp[3], out=J[2])
        J[2] *= J[1]  # ∂/∂log w = (u − u0) ∂/∂u0
    JTJ = np.empty((5, 5, y.shape[1]))
    JTJ[0, 0], JTJ[0, 1], JTJ[1, 1] = c["m"], c["mu"], c["muu"]
    JTJ[1, 0] = JTJ[0, 1]
    g = None
    if gradient:
        if r is None:
            r = _residual(pp, u, y, m, phi if phi is not None else J[0])
        g = np.empty((5, y.shape[1]))
        r.sum(0, out=g[0])
        np.einsum("kn,kn->n", mu, r, out=g[1])
        np.einsum("ikn,kn->in", J, r, out=g[2:])
    J.sum(1, out=JTJ[2:, 0])
    np.einsum("ikn,kn->in", J, mu, out=JTJ[2:, 1])
    for i in range(3):  # the six distinct products of the parameter-dependent columns
        for j in range(i, 3):
            np.einsum("kn,kn->n", J[i], J[j], out=JTJ[2 + i, 2 + j])
            if j > i:
                JTJ[2 + j, 2 + i] = JTJ[2 + i, 2 + j]
    JTJ[:2, 2:] = JTJ[2:, :2].transpose(1, 0, 2)
    return JTJ, g


def _residual(pp, u, y, m, phi):
    """Masked residual ``m (y − a − b u − h φ)`` (k, n)."""
    r = pp[1] * u
    r += pp[0]
    r += pp[2] * phi
    np.subtract(y, r, out=r)
    r *= m
    return r


def _ssr(pp, u, y, m, kind):
    """Residual sum per profile at parameters ``pp`` (5, n); the line shape and the residual there."""
    phi, dphi = _basis(u, pp[3], np.exp(pp[4]), kind)
    r = _residual(pp, u, y, m, phi)
    return np.einsum("kn,kn->n", r, r), phi, dphi, r
