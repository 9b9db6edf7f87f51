"""Coulomb-diamond energy reference: edge slopes → lever arm and charging energy.

Input: a single-dot transport map, gate voltage on x and source–drain bias on
y (current, any sign convention). Inside a diamond the dot is Coulomb
blockaded and the current vanishes. The blockade boundaries are the diamond
edges, lines through the zero-bias degeneracies ``V_k`` with slopes
``dV_sd/dV_G = m₊ = C_G/(C_G + C_D)`` or ``m₋ = −C_G/C_S`` (bias on the
source, drain grounded); ``α = |m₊ m₋|/(|m₊| + |m₋|)``, ``E_add = e α ΔV_G``
(:mod:`stabtool.physics.diamonds`).

Notes
-----
1. Each bias half is oriented by the sign of its current (the current
   follows the bias; taking ``|I|`` would rectify the noise), smoothed
   (Gaussian, σ = 1 pixel), and the blockade mask is ``I < threshold`` with
   threshold ``max(0.1 · P99(|I|), 5 σ_smoothed noise)``.
2. In every bias row the blockaded runs that do not touch the gate range's
   ends are found; their ends are located to sub-pixel precision where
   ``|I|`` crosses the threshold.
3. Runs are tracked row to row from the diamond tips towards zero bias
   (a diamond's run widens as |V_sd| falls); a track stops where two runs
   merge near zero bias.
4. Each track side is an edge ``V_G = V_k + V_sd / m``; fitting ``V_G``
   against ``V_sd`` by least squares (rows with ``0.15 < |V_sd|/|V_tip|`` and
   runs wider than 10 % of the widest) gives ``1/m`` with its standard error.
   Upper-left and lower-right edges carry ``m₊``, upper-right and lower-left
   ``m₋``; each family's ``1/m`` is the weighted mean over its edges, its
   error scaled by the scatter between edges.
5. ``ΔV_G`` is the mean spacing between the zero-bias intercepts of
   consecutive edges of the same kind (e.g. the upper-left edges of
   neighbouring diamonds): their threshold offsets are equal and cancel. With
   a single diamond its width is used instead, with a warning.

The threshold crossing sits a fixed energy from each edge, so it shifts an
edge without tilting it: slopes do not depend on the threshold.

References
----------
L. P. Kouwenhoven, D. G. Austing and S. Tarucha, Rep. Prog. Phys. 64, 701
(2001), doi:10.1088/0034-4885/64/6/201; R. Hanson et al., Rev. Mod. Phys.
79, 1217 (2007), doi:10.1103/RevModPhys.79.1217.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import xarray as xr
from scipy import ndimage

from ..errors import InputError
from ..physics.diamonds import (
    DiamondCapacitances,
    addition_energy_meV,
    diamond_capacitances,
    diamond_lever_arm,
    diamond_lever_arm_stderr,
)
from ..quality import Quality

__all__ = ["CoulombDiamondFit", "DiamondEdge", "fit_coulomb_diamonds"]

_NAN = float("nan")


@dataclass(frozen=True)
class DiamondEdge:
    """One fitted diamond edge ``V_G = intercept_V + V_sd · inverse_slope``.

    ``family`` is "plus" (slope m₊) or "minus" (slope m₋); ``diamond`` numbers
    the diamond from low to high gate voltage within its half (upper/lower).
    """

    family: str
    half: str
    side: str
    intercept_V: float
    inverse_slope: float
    inverse_slope_stderr: float
    n_points: int


@dataclass(frozen=True)
class CoulombDiamondFit:
    """Result of :func:`fit_coulomb_diamonds` (voltages in V, energies in meV).

    Attributes
    ----------
    slope_plus, slope_plus_stderr, slope_minus, slope_minus_stderr : float
        Edge slopes ``dV_sd/dV_G`` and their standard errors.
    lever_arm, lever_arm_stderr : float
        ``α = C_G/C_Σ``.
    addition_voltage_V, addition_voltage_stderr_V : float
        Diamond width ``ΔV_G`` at zero bias (NaN if no diamond is closed in x).
    addition_energy_meV, addition_energy_stderr_meV : float
        ``E_add = e α ΔV_G``.
    capacitances : DiamondCapacitances
        ``C_G, C_S, C_D`` over ``C_Σ`` (and in aF when ΔV_G is known).
    edges : tuple of DiamondEdge
    quality : Quality
    capacitance_ratio_stderr : tuple of float
        Standard errors of ``(C_G, C_S, C_D)/C_Σ`` (propagated from the slopes).
    """

    slope_plus: float
    slope_plus_stderr: float
    slope_minus: float
    slope_minus_stderr: float
    lever_arm: float
    lever_arm_stderr: float
    addition_voltage_V: float
    addition_voltage_stderr_V: float
    addition_energy_meV: float
    addition_energy_stderr_meV: float
    capacitances: DiamondCapacitances | None
    edges: tuple[DiamondEdge, ...] = ()
    quality: Quality = field(default_factory=Quality)
    capacitance_ratio_stderr: tuple[float, float, float] = (_NAN, _NAN, _NAN)

    def __bool__(self) -> bool:
        return bool(np.isfinite(self.lever_arm))


def _ratio_errors(mp: float, mm: float, ep: float, em: float) -> tuple[float, float, float]:
    """Errors of the capacitance ratios by central differences in (m₊, m₋)."""

    def r(a: float, b: float) -> np.ndarray:
        c = diamond_capacitances(a, b)
        return np.array([c.gate, c.source, c.drain])

    hp, hm = 1e-6 * abs(mp), 1e-6 * abs(mm)
    dp = (r(mp + hp, mm) - r(mp - hp, mm)) / (2 * hp)
    dm = (r(mp, mm + hm) - r(mp, mm - hm)) / (2 * hm)
    err = np.hypot(dp * ep, dm * em)
    return (float(err[0]), float(err[1]), float(err[2]))


def _runs(mask_row: np.ndarray) -> list[tuple[int, int]]:
    """Inclusive (start, stop) index pairs of True runs."""
    d = np.diff(np.concatenate([[0], mask_row.astype(np.int8), [0]]))
    starts = np.flatnonzero(d == 1)
    stops = np.flatnonzero(d == -1) - 1
    return list(zip(starts.tolist(), stops.tolist()))


def _crossing(x: np.ndarray, a: np.ndarray, i_in: int, i_out: int, thr: float) -> float:
    """Sub-pixel position between pixel ``i_in`` (below thr) and ``i_out`` (above)."""
    a0, a1 = a[i_in], a[i_out]
    if not np.isfinite(a0) or not np.isfinite(a1) or a1 == a0:
        return 0.5 * (x[i_in] + x[i_out])
    f = np.clip((thr - a0) / (a1 - a0), 0.0, 1.0)
    return float(x[i_in] + f * (x[i_out] - x[i_in]))


def _tracks(rows: list[int], y: np.ndarray, x: np.ndarray, amp: np.ndarray, mask: np.ndarray, thr: float, min_px: int):
    """Track blockade runs from large |bias| towards zero bias; return tracks of (y, xl, xr)."""
    nx = x.size
    done: list[list[tuple[float, float, float]]] = []
    active: list[tuple[list, tuple[int, int]]] = []  # (points, last run)
    for r in rows:  # ordered from large |y| to small |y|
        runs = [(a, b) for a, b in _runs(mask[r]) if a > 0 and b < nx - 1 and b - a + 1 >= min_px]
        claimed: dict[int, list[int]] = {}
        for k, (_, (a0, b0)) in enumerate(active):
            c = 0.5 * (a0 + b0)
            for j, (a, b) in enumerate(runs):
                if a <= c <= b:
                    claimed.setdefault(j, []).append(k)
                    break
        new_active = []
        used_tracks = set()
        for j, (a, b) in enumerate(runs):
            ks = claimed.get(j, [])
            xl = _crossing(x, amp[r], a, a - 1, thr)
            xr = _crossing(x, amp[r], b, b + 1, thr)
            if len(ks) == 1:
                pts = active[ks[0]][0]
                pts.append((float(y[r]), xl, xr))
                new_active.append((pts, (a, b)))
                used_tracks.add(ks[0])
            elif len(ks) > 1:  # runs merged (near zero bias): the tracks end here
                used_tracks.update(ks)
                for k in ks:
                    done.append(active[k][0])
            else:
                new_active.append(([(float(y[r]), xl, xr)], (a, b)))
        for k, (pts, _) in enumerate(active):
            if k not in used_tracks:
                done.append(pts)
        active = new_active
    done.extend(p for p, _ in active)
    return done


def _fit_line(yv: np.ndarray, xv: np.ndarray) -> tuple[float, float, float]:
    """x = a + b y; returns (a, b, σ_b)."""
    a_mat = np.stack([np.ones_like(yv), yv], axis=1)
    coef, *_ = np.linalg.lstsq(a_mat, xv, rcond=None)
    res = xv - a_mat @ coef
    dof = max(yv.size - 2, 1)
    s2 = float(res @ res) / dof
    cov = np.linalg.pinv(a_mat.T @ a_mat) * s2
    return float(coef[0]), float(coef[1]), float(np.sqrt(max(cov[1, 1], 0.0)))


def _wmean(values: list[float], errs: list[float]) -> tuple[float, float]:
    v = np.asarray(values)
    e = np.maximum(np.asarray(errs), 1e-300)
    w = 1.0 / e**2
    m = float(np.sum(w * v) / np.sum(w))
    err = float(np.sqrt(1.0 / np.sum(w)))
    if v.size > 1:
        chi = float(np.sum(w * (v - m) ** 2) / (v.size - 1))
        err *= np.sqrt(max(chi, 1.0))
    return m, err


def _addition_voltage(edges: list[DiamondEdge], widths: list[float], q: Quality) -> tuple[float, float, Quality]:
    """ΔV_G from the spacing of same-kind edges (threshold offsets cancel); widths as fallback."""
    diffs: list[float] = []
    for half in ("upper", "lower"):
        for side in ("left", "right"):
            ints = sorted(e.intercept_V for e in edges if e.half == half and e.side == side)
            diffs.extend(np.diff(ints).tolist())
    if diffs:
        d = np.asarray(diffs)
        med = float(np.median(d))
        k = np.maximum(np.round(d / med), 1.0)
        est = d / k
        err = float(np.std(est, ddof=1) / np.sqrt(est.size)) if est.size > 1 else _NAN
        return float(np.mean(est)), err, q
    if widths:
        q = q.with_warning(
            "only one diamond: its width is read at the current threshold and is biased low by the "
            "thermal and smoothing rounding of the edges",
        )
        return float(np.mean(widths)), _NAN, q
    return _NAN, _NAN, q


def fit_coulomb_diamonds(data: xr.DataArray, *, threshold: float | None = None) -> CoulombDiamondFit:
    """Fit the edges of Coulomb diamonds in a gate (x) versus bias (y) current map.

    Parameters
    ----------
    data : xarray.DataArray, dims (bias, gate)
        Current (any unit, any sign); coordinates in V; last dimension is the gate.
    threshold : float, optional
        Blockade threshold on ``|I|`` (data units); default
        ``max(0.1 · P99(|I|), 5 σ_noise)``.

    Returns
    -------
    CoulombDiamondFit
        Lever arm NaN (tests false) when fewer than one edge of each family is found.
    """
    if not isinstance(data, xr.DataArray) or data.ndim != 2:
        raise InputError("data", "expected a 2-D DataArray with dims (bias, gate)")
    ydim, xdim = data.dims
    y = np.asarray(data[ydim].values, float)
    x = np.asarray(data[xdim].values, float)
    vals = np.asarray(data.values, float)
    if x[0] > x[-1]:
        x, vals = x[::-1], vals[:, ::-1]
    if y[0] > y[-1]:
        y, vals = y[::-1], vals[::-1]
    if not (y.min() < 0 < y.max()):
        raise InputError("data", f"the bias axis {ydim!r} must span zero (got {y.min():.3g} to {y.max():.3g} V)")
    # orient each bias half by the sign of its current (no rectification of the noise)
    amp = vals.copy()
    for rows_sel in (y > 0, y < 0):
        if np.any(rows_sel):
            amp[rows_sel] *= 1.0 if np.nansum(vals[rows_sel]) >= 0 else -1.0
    filled = np.where(np.isfinite(amp), amp, 0.0)
    amp_s = ndimage.gaussian_filter(filled, 1.0)
    dif = np.diff(amp, axis=1)
    dif = dif[np.isfinite(dif)]
    noise = float(1.4826 * np.median(np.abs(dif - np.median(dif))) / np.sqrt(2))
    p99 = float(np.nanpercentile(np.abs(amp), 99))
    thr = threshold if threshold is not None else max(0.1 * p99, 5.0 * noise / (2.0 * np.sqrt(np.pi)))
    mask = amp_s < thr
    edges: list[DiamondEdge] = []
    widths: list[float] = []
    q = Quality()
    for half, rows in (("upper", [r for r in np.argsort(-y) if y[r] > 0]), ("lower", [r for r in np.argsort(y) if y[r] < 0])):
        tracks = _tracks(rows, y, x, amp_s, mask, thr, min_px=2)
        for pts in tracks:
            if len(pts) < 6:
                continue
            arr = np.asarray(pts)
            yv, x_left, x_right = arr[:, 0], arr[:, 1], arr[:, 2]
            w = x_right - x_left
            ytip = np.max(np.abs(yv))
            sel = (np.abs(yv) > 0.15 * ytip) & (w > 0.1 * np.max(w))
            if np.count_nonzero(sel) < 5:
                continue
            al, bl, el = _fit_line(yv[sel], x_left[sel])
            ar, br, er = _fit_line(yv[sel], x_right[sel])
            fam_l = "plus" if half == "upper" else "minus"
            fam_r = "minus" if half == "upper" else "plus"
            n = int(np.count_nonzero(sel))
            edges.append(DiamondEdge(fam_l, half, "left", al, bl, el, n))
            edges.append(DiamondEdge(fam_r, half, "right", ar, br, er, n))
            widths.append(ar - al)
    plus = [e for e in edges if e.family == "plus" and e.inverse_slope > 0]
    minus = [e for e in edges if e.family == "minus" and e.inverse_slope < 0]
    wrong = [e for e in edges if e not in plus and e not in minus]
    if wrong:
        q = q.with_warning(f"{len(wrong)} edge(s) with the wrong slope sign were ignored")
    if not plus or not minus:
        return CoulombDiamondFit(
            _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, _NAN, None, tuple(edges),
            Quality(ok=False, warnings=q.warnings + ("no closed Coulomb diamond edges of both slopes were found",)),
        )
    bp, bp_err = _wmean([e.inverse_slope for e in plus], [e.inverse_slope_stderr for e in plus])
    bm, bm_err = _wmean([e.inverse_slope for e in minus], [e.inverse_slope_stderr for e in minus])
    mp, mm = 1.0 / bp, 1.0 / bm
    mp_err, mm_err = bp_err / bp**2, bm_err / bm**2
    alpha = diamond_lever_arm(mp, mm)
    alpha_err = diamond_lever_arm_stderr(mp, mm, mp_err, mm_err)
    dvg, dvg_err, q = _addition_voltage(edges, widths, q)
    e_add = addition_energy_meV(alpha, dvg)
    e_err = e_add * float(np.hypot(alpha_err / alpha, (dvg_err / dvg) if np.isfinite(dvg_err) else 0.0))
    if len(plus) < 2 or len(minus) < 2:
        q = q.with_warning(f"few edges: {len(plus)} with slope m+ and {len(minus)} with slope m-")
    if alpha_err / alpha > 0.03:
        q = q.with_warning(f"lever-arm uncertainty {100 * alpha_err / alpha:.1f} % exceeds 3 %")
    # α = C_G/C_Σ ≤ 1: more is a bias axis in the wrong unit (mV read as V gives 1000 times α and E_add)
    from .scale_verdict import impossible_lever_arms

    q = impossible_lever_arms(np.array([alpha]), np.array([alpha_err]), reference="coulomb_diamonds",
                              hint="is the bias axis in volts? (a bias in mV read as V gives 1000 times "
                                   "the lever arm)").merge(q)
    return CoulombDiamondFit(
        slope_plus=float(mp), slope_plus_stderr=float(mp_err),
        slope_minus=float(mm), slope_minus_stderr=float(mm_err),
        lever_arm=float(alpha), lever_arm_stderr=float(alpha_err),
        addition_voltage_V=dvg, addition_voltage_stderr_V=dvg_err,
        addition_energy_meV=float(e_add), addition_energy_stderr_meV=float(e_err),
        capacitances=diamond_capacitances(mp, mm, width_V=dvg),
        edges=tuple(edges), quality=q,
        capacitance_ratio_stderr=_ratio_errors(mp, mm, mp_err, mm_err),
    )
