"""Sub-pixel refinement of a line from step (Fermi) profiles across it."""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Sequence

import numpy as np

from ..mapdata import MapAxes
from ._batchfit import BatchFit, fit_profiles
from ._geometry import idx_to_volts, steps
from .hough import PixelSegment, segment_to_line
from .result import TransitionLine

__all__ = ["RefinedLine", "refine_segment", "refine_segments"]


@dataclass(frozen=True)
class RefinedLine:
    """A refined line plus the quantities used by the quality verdict."""

    line: TransitionLine
    step_height: float  # median |h| of the profile fits, signal units (NaN if not refined)
    refined: bool
    shape: str  # "step", "peak" or "none"
    #: accepted crossing points (t, p, σ) in volts: t along the line's slow
    #: coordinate (y when ``along_x``), p the crossing along the profile axis
    points: tuple[np.ndarray, np.ndarray, np.ndarray] | None = None
    along_x: bool = True


def _profiles(values: np.ndarray, seg: PixelSegment, along_x: bool, halfwidth: int, max_points: int, trim: float,
              edges: np.ndarray | None = None):
    """Extract profiles across the segment, one per row (along_x) or column."""
    (sx, sy), (ex, ey) = seg.start_px, seg.end_px
    ny, nx = values.shape
    if along_x:
        a0, a1, b0, b1 = sy, ey, sx, ex  # param = row, position = column
        n_par, n_pos = ny, nx
    else:
        a0, a1, b0, b1 = sx, ex, sy, ey
        n_par, n_pos = nx, ny
    lo, hi = min(a0, a1) + trim, max(a0, a1) - trim
    rows = np.arange(int(np.ceil(lo)), int(np.floor(hi)) + 1)
    rows = rows[(rows >= 0) & (rows < n_par)]
    if rows.size == 0 or a1 == a0:
        return None
    if rows.size > max_points:
        rows = rows[np.linspace(0, rows.size - 1, max_points).round().astype(int)]
    pred = b0 + (rows - a0) * (b1 - b0) / (a1 - a0)
    centre = np.round(pred).astype(int)
    offs = np.arange(-halfwidth, halfwidth + 1)
    pos = centre[:, None] + offs[None, :]
    inside = (pos >= 0) & (pos < n_pos)
    posc = np.clip(pos, 0, n_pos - 1)
    if along_x:
        y = values[rows[:, None], posc]
    else:
        y = values[posc, rows[:, None]]
    mask = inside & np.isfinite(y)
    if edges is not None:
        # a profile must cross one line only: samples beyond ±2 px that hit
        # another edge (a neighbouring line, a triple point) are left out
        e = edges[rows[:, None], posc] if along_x else edges[posc, rows[:, None]]
        far = np.abs(offs)[None, :] > 2
        hit = e & far & inside
        # cut the profile at the first foreign edge on each side
        left = np.where(hit & (offs[None, :] < 0), offs[None, :], -10**6).max(1)
        right = np.where(hit & (offs[None, :] > 0), offs[None, :], 10**6).min(1)
        mask &= (offs[None, :] > left[:, None] + 1) & (offs[None, :] < right[:, None] - 1)
    u = offs[None, :].astype(float) + np.zeros((rows.size, 1))
    return rows, centre, u, y, mask


def _robust_line_fit(t: np.ndarray, p: np.ndarray, sig: np.ndarray, n_clip: float = 3.5):
    """Weighted fit p = A + C (t − t̄) with iterative clipping; returns A, C, errors, inliers, t̄."""
    keep = np.isfinite(t) & np.isfinite(p) & np.isfinite(sig) & (sig > 0)
    tm = float(np.mean(t[keep])) if keep.any() else 0.0
    res = None
    for _ in range(6):
        if keep.sum() < 4:
            return None
        w = 1.0 / sig[keep] ** 2
        X = np.stack([np.ones(keep.sum()), t[keep] - tm], 1)
        XtW = X.T * w
        cov = np.linalg.inv(XtW @ X)
        beta = cov @ (XtW @ p[keep])
        r = (p - beta[0] - beta[1] * (t - tm)) / sig
        rk = r[keep]
        scale = 1.4826 * np.median(np.abs(rk - np.median(rk)))
        scale = max(scale, 1.0)
        new = keep & (np.abs(r) <= n_clip * scale)
        new &= np.isfinite(t) & np.isfinite(p)
        if np.array_equal(new, keep):
            res = (beta, cov, keep, rk)
            break
        keep = new
        res = (beta, cov, keep, rk)
    if res is None or res[2].sum() < 4:
        return None
    beta, cov, keep, _ = res
    w = 1.0 / sig[keep] ** 2
    X = np.stack([np.ones(keep.sum()), t[keep] - tm], 1)
    r = p[keep] - X @ beta
    chi2r = float((w * r**2).sum() / max(keep.sum() - 2, 1))
    cov = cov * max(chi2r, 1.0)
    return beta, cov, keep, tm


def refine_segment(
    seg: PixelSegment,
    values: np.ndarray,
    axes: MapAxes,
    *,
    family: str,
    along_x: bool,
    halfwidth_px: int = 6,
    max_points: int = 80,
    shapes: tuple[str, ...] = ("step", "peak"),
) -> RefinedLine:
    """Refine one segment by fitting Fermi step (or peak) profiles across it.

    Parameters
    ----------
    seg : PixelSegment
    values : ndarray, shape (ny, nx)
        Map values (row offsets removed; NaN allowed).
    axes : MapAxes
    family : str
        Family name written into the result.
    along_x : bool
        Profiles along x (one per row; dot1 and other steep lines) or along y
        (one per column; dot2 and other shallow lines).
    halfwidth_px : int
        Half-length of each profile, pixels.
    max_points : int
        Most profiles per line (evenly spaced).
    shapes : tuple of {"step", "peak"}
        Line shapes tried; the one with the lower median residual wins.

    Returns
    -------
    RefinedLine
        ``refined`` False (and the Hough/TLS line kept) when fewer than four
        profiles gave a significant step.

    Notes
    -----
    Each profile is fitted with ``a + b u + h [1 − f(u)]``, ``f`` the Fermi
    occupation with width ``w`` (or the peak ``4 f (1 − f)``); the crossing
    points ``u0`` are then fitted by a straight line (position along the
    profile axis as a function of the other coordinate, so steep lines are
    fitted as x(y)) with iterative 3.5-σ clipping; standard errors are scaled
    by √χ²_red when it exceeds one.
    """
    return refine_segments([seg], values, axes, families=[family], along_x=[along_x],
                           halfwidth_px=halfwidth_px, max_points=max_points, shapes=shapes)[0]



def refine_segments(
    segs: Sequence[PixelSegment],
    values: np.ndarray,
    axes: MapAxes,
    *,
    families: Sequence[str],
    along_x: Sequence[bool],
    halfwidth_px: int = 6,
    max_points: int = 80,
    shapes: tuple[str, ...] = ("step", "peak"),
    edges: np.ndarray | None = None,
    end_trim: float = 0.0,
    widen: int = 2,
) -> list[RefinedLine]:
    """:func:`refine_segment` for many segments, with all profiles fitted in one batch.

    ``edges`` (the edge map, optional) lets each profile stop short of a
    neighbouring line. Segments whose profiles do not give a line are fitted
    again with profiles ``widen`` times longer (up to two more passes): a
    thermally broadened step (Fermi width ≳ 1 px, i.e. a 10–90 % rise over
    ≳ 4 px) cannot be told from the linear baseline ``a + b u`` inside a short
    window, so its height, and with it the significance test, is lost. The
    longer window still stops at a neighbouring line's edge. Only segments
    that fail at the fine window are refitted (coarse-to-fine fallback,
    common practice, no source), so sharp lines keep their first-pass
    result unchanged; the refits use the step shape only, because the peak
    shape fitted to a broad step gives crossings on its flanks and lines of
    the wrong slope sign.
    """
    hw = int(halfwidth_px)
    out = _refine_once(segs, values, axes, families=families, along_x=along_x, halfwidth_px=hw,
                       max_points=max_points, shapes=shapes, edges=edges, end_trim=end_trim)
    n = len(segs)
    head, extra = out[:n], out[n:]
    for _ in range(2 if widen > 1 else 0):
        redo = [k for k in range(n) if not head[k].refined]
        if not redo:
            break
        hw *= int(widen)
        again = _refine_once([segs[k] for k in redo], values, axes, families=[families[k] for k in redo],
                             along_x=[along_x[k] for k in redo], halfwidth_px=hw, max_points=max_points,
                             shapes=("step",), edges=edges, end_trim=end_trim)
        for j, k in enumerate(redo):
            head[k] = again[j]
        extra = extra + again[len(redo):]
    return head + extra


def _refine_once(segs, values, axes, *, families, along_x, halfwidth_px, max_points, shapes, edges, end_trim):
    hw = int(halfwidth_px)
    blocks = []
    for k, seg in enumerate(segs):
        trim = max(2.0, end_trim * seg.length_px)
        ext = _profiles(values, seg, along_x[k], hw, max_points, trim, edges)
        if ext is None:
            continue
        rows, centre, u, y, mask = ext
        okrows = (mask.sum(1) >= hw + 2) & mask[:, hw - 1 : hw + 2].all(1)
        if okrows.sum() < 4:
            continue
        blocks.append((k, rows[okrows], centre[okrows], u[okrows], y[okrows], mask[okrows]))
    out = [RefinedLine(line=segment_to_line(s, axes, family=f), step_height=float("nan"), refined=False, shape="none",
                       along_x=bool(a)) for s, f, a in zip(segs, families, along_x)]
    extra: list[RefinedLine] = []
    if not blocks:
        return out
    U = np.vstack([b[3] for b in blocks])
    Y = np.vstack([b[4] for b in blocks])
    M = np.vstack([b[5] for b in blocks])
    bounds = np.cumsum([0] + [b[1].size for b in blocks])
    fits = {shapes[0]: fit_profiles(U, Y, M, kind=shapes[0], halfwidth=hw)}
    if shapes[0] == "step":
        fits["step"] = _interpolated_crossings(fits["step"], U, Y, M, hw)
    if len(shapes) > 1:
        # other shapes only for lines the first one fits poorly (fewer than 70 % usable profiles)
        poor = np.zeros(U.shape[0], bool)
        for j in range(len(blocks)):
            sl = slice(bounds[j], bounds[j + 1])
            if fits[shapes[0]].ok[sl].mean() < 0.7:
                poor[sl] = True
        for kind in shapes[1:]:
            if poor.any():
                sub = fit_profiles(U[poor], Y[poor], M[poor], kind=kind, halfwidth=hw)
                full = {f: np.full(U.shape[0], np.nan) for f in ("u0", "u0_err", "width", "width_err", "height", "height_err")}
                ssr = np.full(U.shape[0], np.inf)
                ok = np.zeros(U.shape[0], bool)
                for f, arr in full.items():
                    arr[poor] = getattr(sub, f)
                ssr[poor] = sub.ssr
                ok[poor] = sub.ok
                fits[kind] = BatchFit(ssr=ssr, ok=ok, **full)
    for j, (k, rows, centre, *_rest) in enumerate(blocks):
        sl = slice(bounds[j], bounds[j + 1])
        best = None
        for kind, f in fits.items():
            okk = f.ok[sl]
            nok = int(okk.sum())
            score = float(np.median(f.ssr[sl][okk])) if nok >= 4 else np.inf
            if best is None or (nok >= 0.8 * best[2] and score < best[1]) or nok > 1.25 * best[2]:
                best = (kind, score, nok)
        kind = best[0]
        res = _line_from_crossings(out[k].line, rows, centre, fits[kind], sl, axes, along_x[k], kind)
        if res:
            out[k] = res[0]
            extra.extend(res[1:])
    return out + extra


def _interpolated_crossings(fit: BatchFit, U: np.ndarray, Y: np.ndarray, M: np.ndarray, hw: int) -> BatchFit:
    """Sub-pixel crossings of unresolved steps from the half-height level between two samples.

    For a step narrower than a sample (fitted w < 0.7 px) the Fermi fit
    fixes u0 only to the interval between the two samples around it. The
    sample values carry more: after removing the fitted baseline and
    dividing by the height, the normalised signal F goes from 0 to 1, and
    any smearing (sensor bandwidth, thermal width, filtering) leaves
    intermediate values next to the step; the crossing of F = ½ by linear
    interpolation between the two bracketing samples is then sub-pixel. For
    a perfectly sharp step it falls back to the midpoint. Errors: the noise
    of the two samples propagated through the interpolation, at least
    0.1 px (common practice for sub-pixel edge location, no source).
    """
    if fit.a is None:
        return fit
    n = U.shape[0]
    sharp = fit.width < 0.7
    k = np.floor(fit.u0).astype(int)
    j0 = np.clip(k + hw, 0, U.shape[1] - 2)
    rows = np.arange(n)
    h = np.where(np.abs(fit.height) > 0, fit.height, np.nan)
    F0 = (Y[rows, j0] - fit.a - fit.b * U[rows, j0]) / h
    F1 = (Y[rows, j0 + 1] - fit.a - fit.b * U[rows, j0 + 1]) / h
    den = F1 - F0
    # noise of one sample in units of the height, from the profile residuals
    dof = np.maximum(M.sum(1) - 5, 1)
    sn = np.sqrt(fit.ssr / dof) / np.abs(h)
    # at low SNR the interpolation is noisier than the pixel quantisation (1/√12 px): midpoint kept
    good = sharp & M[rows, j0] & M[rows, j0 + 1] & np.isfinite(den) & (den > 0.3) & (sn < 0.2)
    frac = np.clip((0.5 - F0) / np.where(good, den, 1.0), 0.0, 1.0)
    u_new = np.where(good, U[rows, j0] + frac, fit.u0)
    e_new = np.where(good, np.maximum(sn * np.sqrt((1 - frac) ** 2 + frac**2) / np.where(good, den, 1.0), 0.1),
                     fit.u0_err)
    from dataclasses import replace as _replace

    return _replace(fit, u0=u_new, u0_err=e_new, interpolated=good)


def _line_from_crossings(base, rows, centre, fit, sl, axes, along_x, kind):
    """Straight line through the crossing points (a list: empty when the fit failed)."""
    ok = fit.ok[sl]
    if ok.sum() < 4:
        return []
    sx_, sy_ = steps(axes)
    if along_x:
        pcoord, tcoord, pstep = axes.x, axes.y, sx_
    else:
        pcoord, tcoord, pstep = axes.y, axes.x, sy_
    u0, u0e = fit.u0[sl][ok], fit.u0_err[sl][ok]
    # an unresolved step lies somewhere between the two samples around it; the
    # midpoint makes the crossings a digital straight line, whose slope is
    # fixed far better than by noise-jittered centres (A. Rosenfeld, IEEE
    # Trans. Comput. C-23, 1264 (1974), doi:10.1109/T-C.1974.223845)
    interp = fit.interpolated[sl][ok] if fit.interpolated is not None else np.zeros(u0.size, bool)
    sharp = (fit.width[sl][ok] < 0.7) & ~interp
    u0 = np.where(sharp, np.floor(u0) + 0.5, u0)
    p_v = idx_to_volts(centre[ok] + u0, pcoord)
    t_v = idx_to_volts(rows[ok].astype(float), tcoord)
    # an unresolved step (w below ~0.7 px) fixes its crossing only to within the
    # pixel: floor the error at the quantisation rms 1/√12 px (common practice, no source)
    floor = np.where(sharp, 1.0 / np.sqrt(12.0), np.where(interp, 0.1, 0.05))
    sig_v = np.maximum(u0e, floor) * abs(pstep)
    widths, heights = fit.width[sl][ok], fit.height[sl][ok]
    pieces = [np.arange(t_v.size)]
    out = []
    for idx in pieces:
        r = _fit_piece(base, t_v[idx], p_v[idx], sig_v[idx], widths[idx], heights[idx], along_x, pstep, kind)
        if r is not None:
            out.append(r)
    out.sort(key=lambda r: -r.line.n_points)
    return out


def _bend_chi2(t: np.ndarray, p: np.ndarray, sig: np.ndarray) -> float:
    """Drop of χ² when quadratic and cubic terms join a straight-line fit (2 dof)."""
    if t.size < 8:
        return float("nan")
    x = t / max(np.ptp(t), 1e-300)
    w = 1.0 / sig**2

    def chi2(deg: int) -> float:
        X = np.stack([x**k for k in range(deg + 1)], 1)
        A = (X.T * w) @ X
        beta = np.linalg.lstsq(A, (X.T * w) @ p, rcond=None)[0]
        r = p - X @ beta
        return float((w * r * r).sum())

    return max(chi2(1) - chi2(3), 0.0)


def _fit_piece(base, t_v, p_v, sig_v, wpx_all, h_all, along_x, pstep, kind):
    fitres = _robust_line_fit(t_v, p_v, sig_v)
    if fitres is None:
        return None
    beta, cov, keep, tm = fitres
    A, C = beta
    sA, sC = np.sqrt(cov[0, 0]), np.sqrt(cov[1, 1])
    if along_x:
        slope = 1.0 / C if C != 0 else np.inf
        slope_err = sC / C**2 if C != 0 else np.inf
        x0, y0 = A, tm
    else:
        slope, slope_err = C, sC
        x0, y0 = tm, A
    pos_err = sA / np.sqrt(1.0 + C**2)
    bend = _bend_chi2(t_v[keep] - tm, p_v[keep], sig_v[keep])
    tk = t_v[keep]
    t_lo, t_hi = tk.min(), tk.max()
    if along_x:
        start = (float(A + C * (t_lo - tm)), float(t_lo))
        end = (float(A + C * (t_hi - tm)), float(t_hi))
    else:
        start = (float(t_lo), float(A + C * (t_lo - tm)))
        end = (float(t_hi), float(A + C * (t_hi - tm)))
    wpx = wpx_all[keep]
    w_med = float(np.median(wpx))
    if kind == "step" and w_med >= 0.5:
        width = w_med * abs(pstep)
        mad = 1.4826 * np.median(np.abs(wpx - w_med))
        width_err = 1.2533 * max(mad, 1e-12) / np.sqrt(wpx.size) * abs(pstep)
    else:
        width, width_err = float("nan"), float("nan")
    h = h_all[keep]
    sign = int(np.sign(np.median(h)) * np.sign(pstep)) if kind == "step" else 0
    line = replace(base, x0=float(x0), y0=float(y0), slope=float(slope), slope_stderr=float(slope_err),
                   position_stderr=float(pos_err), start=start, end=end, width_V=float(width),
                   width_stderr_V=float(width_err), n_points=int(keep.sum()), step_sign=sign, refined=True,
                   bend_chi2=float(bend))
    return RefinedLine(line=line, step_height=float(np.median(np.abs(h))), refined=True, shape=kind,
                       points=(t_v[keep], p_v[keep], sig_v[keep]), along_x=bool(along_x))
