"""Re-measure the lines of one family on the map with a common slope.

The lines of one dot family are parallel in the constant-interaction model.
Along every row (dot1) or column (dot2) crossing a segment, the position of
the step is the change point of the signal in a window around the predicted
position (:func:`_split`, all cuts of a family at once); all crossing points of the
family are then fitted jointly by least squares with one slope and one
offset per line, with outlier rejection. This uses every pixel row of every
line for the slope, which is what the virtual-gate matrix needs.

When the mutual shift δ is only a pixel or a few, the line detector can merge
the pieces of one dot line from several charge bands into one segment: a
staircase whose straight fit has the mean slope ``1/s_eff = 1/s + δ/Δ_band``
instead of ``s``. :func:`split_at_crossings` cuts such segments where the
other family's lines (extended) cross them, so that every band piece gets its
own offset with the slope still shared; with ``groups`` :func:`relocate_family`
also tests whether one offset per piece describes the points significantly
better than one offset per original segment (F-test, nested least-squares
models).

Lines sharper than a pixel that stay within a pixel or two along their
length (a map swept along virtual gates, where the lines run almost along the
axes) are read as quantised (:func:`pixel_limited`): the points' scatter is
taken as at least the quantisation rms of a sample, 1/√12, and the common
slope's error as at least what lines that each fix their slope only to ±1
sample over their length give together (:func:`_pixel_limit`).

Notes
-----
Joint linear fit of parallel lines (common practice, no source). F-test of
nested linear models: the extra-sum-of-squares test (e.g. N. R. Draper and
H. Smith, Applied Regression Analysis, 3rd ed., Wiley 1998, ch. 6). Points farther
than 3 robust standard deviations from their line are dropped (median
absolute deviation, F. R. Hampel, J. Am. Stat. Assoc. 69, 383 (1974),
doi:10.1080/01621459.1974.10482962).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from itertools import pairwise

import numpy as np
from scipy.special import fdtrc  # F survival function, = scipy.stats.f.sf(x, dfn, dfd)

from ..lines.joint import _median, clustered_slope_variance
from ..lines.refine import QUANTISED_MAX_STEPS, QUANTISED_SHARE, midway, pixel_slope_error
from ..lines.result import TransitionLine

__all__ = ["RelocatedFamily", "SplitFamily", "clustered_slope_error", "index_to_volts", "mean_shift_stats",
           "pixel_limited", "quantised_crossings", "relocate_family", "row_clustered_slope_error",
           "split_at_crossings", "volts_to_index", "walk_slope_error"]

#: Smallest band piece kept by :func:`split_at_crossings`, pixels along the cross axis.
MIN_PIECE_PX = 8.0


@dataclass(frozen=True)
class RelocatedFamily:
    """Lines of one family re-measured with a common slope.

    Attributes
    ----------
    ok : bool
    lines : tuple of TransitionLine
        Same order as the input; each with the common slope, its own offset,
        the common slope error and its own position error.
    inv_or_slope, stderr : float
        Common dx/dy (dot1) or dy/dx (dot2) and its standard error: the
        largest of the independent-point error, the per-line clustered
        one (:func:`clustered_slope_error`) and the per-row one
        (:func:`row_clustered_slope_error`).
    n_points : int
        Crossing points used.
    residual_V : float
        Robust rms distance of the points from their lines (along the scan axis), V.
    bend_V, bend_stderr_V : float
        Common S-shaped bend of the lines (coefficient of ``u³ − 3u/5``,
        ``u`` ∈ [−1, 1] along each segment, orthogonal to offset and slope),
        as the displacement at the segment ends along the scan axis, V, and its
        standard error. Lines that bend towards the triple points (strong
        interdot tunnel coupling) bias the common slope; a significant bend
        says so.
    staircase_p : float
        With ``groups``: p-value of the F-test of one offset per group (the
        merged segments) against one offset per input line (band pieces), on
        the same points; small values say the merged segments are staircases.
        NaN when not tested.
    staircase_jump_V : float
        With ``groups``: rms offset of the pieces from their group's offset
        along the scan axis, V (≈ δ/2 for a staircase); NaN when not tested.
    pixel_limited : bool
        The lines are sharper than a pixel and move on by fewer than two
        samples along their length: the slope is known only to about ±1
        sample over a line's length (:func:`pixel_limited`).
    stderr_walk : float
        With ``walk``: the common slope's standard error when each line's
        crossing errors are a random walk (:func:`walk_slope_error`); NaN
        otherwise.
    """

    ok: bool
    lines: tuple[TransitionLine, ...]
    inv_or_slope: float
    stderr: float
    n_points: int
    residual_V: float
    bend_V: float = float("nan")
    bend_stderr_V: float = float("nan")
    staircase_p: float = float("nan")
    staircase_jump_V: float = float("nan")
    pixel_limited: bool = False
    stderr_walk: float = float("nan")


@dataclass(frozen=True)
class SplitFamily:
    """Segments of one family cut into band pieces at the other family's lines.

    Attributes
    ----------
    lines : tuple of TransitionLine
        The pieces, in input order (an uncut segment is one piece, unchanged).
    source : ndarray of int, shape (len(lines),)
        Index of the input segment each piece comes from.
    n_cut : int
        Input segments cut into more than one piece.
    """

    lines: tuple[TransitionLine, ...]
    source: np.ndarray
    n_cut: int


def _directions(lines) -> np.ndarray:
    """Unit direction ``(dx, dy)`` of every line, shape (k, 2) (vertical lines: ``(0, 1)``)."""
    s = np.array([ln.slope for ln in lines], float)
    vert = np.isinf(s)
    d = np.column_stack([np.ones(s.size), np.where(vert, 0.0, s)])
    d = d / np.hypot(d[:, 0], d[:, 1])[:, None]
    d[vert] = (0.0, 1.0)
    return d


def _crossing_matrix(lines, others, which: int) -> np.ndarray:
    """Cross-axis coordinate (y for dot1, x for dot2) where each extended ``others`` line meets each of ``lines``, V.

    Returns shape (len(lines), len(others)); NaN where the two are nearly
    parallel (|sin| < 1e-9) or the crossing is undefined.
    """
    if not len(lines) or not len(others):
        return np.full((len(lines), len(others)), np.nan)
    p = np.array([[ln.x0, ln.y0] for ln in lines], float)  # (k, 2)
    d = _directions(lines)
    q = np.array([[o.x0, o.y0] for o in others], float)  # (m, 2)
    e = _directions(others)
    den = d[:, 0, None] * e[None, :, 1] - d[:, 1, None] * e[None, :, 0]
    w0 = q[None, :, 0] - p[:, 0, None]
    w1 = q[None, :, 1] - p[:, 1, None]
    k = 1 if which == 0 else 0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        t = (w0 * e[None, :, 1] - w1 * e[None, :, 0]) / den
        out = p[:, k, None] + t * d[:, k, None]
    return np.where(np.isfinite(den) & ~(np.abs(den) < 1e-9), out, np.nan)


def split_at_crossings(
    lines: tuple[TransitionLine, ...] | list[TransitionLine],
    others: tuple[TransitionLine, ...] | list[TransitionLine],
    *,
    which: int,
    min_piece_V: float,
    slope: float | None = None,
) -> SplitFamily:
    """Cut every segment of a family where the other family's lines (extended) cross it.

    Parameters
    ----------
    lines : sequence of TransitionLine
        The family's segments.
    others : sequence of TransitionLine
        The other dot family's segments; each, extended to a full line,
        marks a charge-band boundary where it crosses a segment.
    which : {0, 1}
        0: ``lines`` are dot1 (pieces along y); 1: dot2 (pieces along x).
    min_piece_V : float
        Crossings closer than this to a segment end or to each other are not
        cut (they are the segment's own triple points, or one boundary seen
        through several lines), V along the cross axis.
    slope : float, optional
        dV_y/dV_x given to the pieces of a cut segment (the family slope):
        the cut segment's own slope is the biased staircase mean.

    Returns
    -------
    SplitFamily

    Notes
    -----
    In the constant-interaction model a dot1 line jumps by δ1 along x where a
    dot2 line meets it (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003));
    between two such crossings it is straight.
    """
    pieces: list[TransitionLine] = []
    source: list[int] = []
    n_cut = 0
    crossings = _crossing_matrix(lines, others, which)
    for i, ln in enumerate(lines):
        ends = (ln.start[1], ln.end[1]) if which == 0 else (ln.start[0], ln.end[0])
        lo, hi = min(ends), max(ends)
        row = crossings[i]
        cs = np.sort(row[~np.isnan(row)])
        cs = cs[(cs > lo + min_piece_V) & (cs < hi - min_piece_V)]
        cuts: list[float] = []
        k = 0
        while k < cs.size:  # one cut per cluster of crossings (one band boundary)
            j = k
            while j + 1 < cs.size and cs[j + 1] - cs[k] < min_piece_V:
                j += 1
            c = float(np.mean(cs[k:j + 1]))
            if c - (cuts[-1] if cuts else lo) >= min_piece_V and hi - c >= min_piece_V:
                cuts.append(c)
            k = j + 1
        if not cuts:
            pieces.append(ln)
            source.append(i)
            continue
        n_cut += 1
        sl = ln.slope if slope is None or not np.isfinite(slope) else float(slope)
        bounds = [lo, *cuts, hi]
        for a, b in pairwise(bounds):
            cm = 0.5 * (a + b)
            if which == 0:
                # the piece runs through the segment's own point at its middle height
                inv = 0.0 if np.isinf(sl) else 1.0 / sl
                xm = ln.x0 + (cm - ln.y0) * (0.0 if np.isinf(ln.slope) else 1.0 / ln.slope)
                start, end = (xm + inv * (a - cm), a), (xm + inv * (b - cm), b)
                x0, y0 = xm, cm
            else:
                ym = ln.y0 + (cm - ln.x0) * ln.slope
                start, end = (a, ym + sl * (a - cm)), (b, ym + sl * (b - cm))
                x0, y0 = cm, ym
            pieces.append(replace(ln, x0=float(x0), y0=float(y0), slope=float(sl), start=start, end=end))
            source.append(i)
    return SplitFamily(tuple(pieces), np.array(source, int), n_cut)


def median(a: np.ndarray) -> float:
    """Median of a 1-D array, the same number as :func:`numpy.median` at a fraction of its overhead.

    :func:`stabtool.lines.joint._median` (one :func:`numpy.partition`) as a
    Python float; any NaN gives NaN, and so does an empty array.
    """
    a = np.asarray(a, float).ravel()
    return float("nan") if a.size == 0 else float(_median(a))


def index_to_volts(idx: np.ndarray | float, axis: np.ndarray) -> np.ndarray:
    """Fractional sample index → volts on ``axis`` (linear interpolation, clamped at the ends)."""
    return np.asarray(np.interp(idx, np.arange(axis.size), axis))


def volts_to_index(v: np.ndarray | float, axis: np.ndarray) -> np.ndarray:
    """Volts → fractional sample index on ``axis`` (increasing or decreasing; clamped at the ends).

    ``stabtool.lines._geometry.volts_to_idx`` is the same map with NaN outside the axis.
    """
    if axis[0] <= axis[-1]:
        return np.asarray(np.interp(v, axis, np.arange(axis.size)))
    return np.asarray(np.interp(v, axis[::-1], np.arange(axis.size)[::-1]))


def _split(prof: np.ndarray, noise: float) -> float | None:
    """Sub-pixel position of the single step in ``prof`` (index units), or None if not significant.

    The split that maximises the two-sample statistic
    ``|mean(left) − mean(right)| · sqrt(k (n − k) / n)`` locates a step in white
    noise (maximum-likelihood change point for one mean shift; D. V. Hinkley,
    Biometrika 57, 1 (1970), doi:10.1093/biomet/57.1.1); the position between
    the two samples is refined by a parabola through the statistic. One
    profile; :func:`_split_rows` does the same for many profiles at once.
    """
    pos = _split_rows(np.asarray(prof, float)[None, :], noise)[0]
    return None if np.isnan(pos) else float(pos)


def _split_rows(profs: np.ndarray, noise: float) -> np.ndarray:
    """:func:`_split` of every row of ``profs`` (shape (m, n)); NaN where the step is not significant."""
    m, n = profs.shape
    if m == 0 or n < 2:
        return np.full(m, np.nan)
    return _located(mean_shift_stats(profs), noise)


def mean_shift_stats(profs: np.ndarray) -> np.ndarray:
    """``|mean(left) − mean(right)| · sqrt(k (n − k) / n)`` for every split k = 1 … n−1, shape (m, n − 1).

    The square is the residual-sum reduction of one mean shift at the split.
    """
    n = profs.shape[1]
    c = np.cumsum(profs, axis=1)
    k = np.arange(1, n)
    left = c[:, :-1] / k
    right = (c[:, -1:] - c[:, :-1]) / (n - k)
    return np.abs(left - right) * np.sqrt(k * (n - k) / n)


def _sloped_shift_stats(profs: np.ndarray) -> np.ndarray:
    """Change-point statistics of a mean shift on a linear background, shape (m, n − 1).

    Model ``y = a + b u + h·[u ≥ k]``: with ``r`` the residual of the straight
    line fitted to the profile, the step regressor's residual-sum reduction
    at split k is ``R_k² / D_k``, ``R_k = Σ_{u≥k} r_u`` and ``D_k`` the squared
    norm of the step regressor after projecting out ``1`` and ``u`` (nested
    least squares; Draper and Smith, ch. 6). The statistic is its square
    root, on the scale of :func:`mean_shift_stats`. Splits next to the ends
    (one sample on a side) cannot be told from the slope and are left out.
    """
    n = profs.shape[1]
    u = np.arange(n, dtype=float)
    uc = u - u.mean()
    suu = float(uc @ uc)
    resid = profs - profs.mean(axis=1, keepdims=True)
    resid -= ((resid @ uc) / suu)[:, None] * uc[None, :]
    tail = np.cumsum(resid[:, ::-1], axis=1)[:, ::-1][:, 1:]  # Σ_{u ≥ k} r_u, k = 1 … n−1
    m_k = n - np.arange(1, n)
    su_k = np.cumsum(uc[::-1])[::-1][1:]
    d_k = m_k - m_k**2 / n - su_k**2 / suu
    stat = np.abs(tail) / np.sqrt(np.maximum(d_k, 1e-12))
    stat[:, 0] = 0.0
    stat[:, -1] = 0.0
    return stat


def _located(stat: np.ndarray, noise: float) -> np.ndarray:
    """Sub-pixel split of the largest statistic per row (parabola through its neighbours).

    Position NaN where the maximum is below ``3.5 · noise``.
    """
    rows = np.arange(stat.shape[0])
    j = np.argmax(stat, axis=1)
    peak = stat[rows, j]
    pos = j + 0.5  # between sample j and j + 1
    inner = (j > 0) & (j < stat.shape[1] - 1)
    a = stat[rows, np.maximum(j - 1, 0)]
    cc = stat[rows, np.minimum(j + 1, stat.shape[1] - 1)]
    den = a - 2 * peak + cc
    use = inner & (den < 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        shift = np.clip(0.5 * (a - cc) / np.where(use, den, -1.0), -0.5, 0.5)
    pos = pos + np.where(use, shift, 0.0)
    return np.where(peak < 3.5 * noise, np.nan, pos)


#: A profile's background slope is modelled when its two plateaus share a slope of more than this many
#: standard errors (squared: a 5σ test; at 3σ too many profiles took it on generator maps).
SLOPE_TEST_VARIANCES = 25.0
#: Shortest profile (samples) on which a background slope is tested.
SLOPE_MIN_SAMPLES = 6
#: Samples next to the mean-shift split left out of the plateaus (a thermally broadened step is not
#: flat there, and its flanks would read as a slope).
PLATEAU_GAP_PX = 2


def _plateau_slope_z2(profs: np.ndarray, split: np.ndarray) -> np.ndarray:
    """Squared z of a slope shared by the two plateaus around ``split`` (m,), per row of ``profs`` (m, n).

    Plateaus: the samples more than ``PLATEAU_GAP_PX`` from the split on
    each side; each keeps its own mean, the common slope is their pooled
    least-squares slope, and ``z² = b̂² Σ (u − ū_side)² / σ²`` with σ = 1
    (the caller divides by the noise variance). A NaN split (no significant
    mean shift: a step that a ramp hides) tests the slope of the whole profile.
    """
    m, n = profs.shape
    u = np.arange(n, dtype=float)[None, :]
    k = np.where(np.isfinite(split), split, -1e9)[:, None]
    left = u < k - PLATEAU_GAP_PX
    right = u > k + PLATEAU_GAP_PX
    num = np.zeros(m)
    den = np.zeros(m)
    for side in (left, right):
        c = np.maximum(side.sum(1), 1)
        ub = (u * side).sum(1) / c
        yb = (profs * side).sum(1) / c
        du = np.where(side, u - ub[:, None], 0.0)
        num += (du * (profs - yb[:, None])).sum(1)
        den += (du * du).sum(1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, num * num / den, 0.0)


def _change_points(profs: np.ndarray, noise: float) -> np.ndarray:
    """Step position of every row of ``profs`` (m, n), on a linear background where the data demand one.

    A charge sensor's response changes across the map (the flank of a
    sensor peak, a polarity flip between peaks), so a cut across a line
    often sees the step on a sloped background. The mean-shift change point
    (:func:`_split_rows`) then prefers the cut's middle, i.e. the predicted
    position, and the re-measured lines follow the prediction instead of the
    data (seen on maps read by a sensor with several Coulomb peaks: slopes
    off by 10–90 % with stated errors 10× too small). Where the plateaus on
    both sides of the mean-shift split share a slope beyond
    ``SLOPE_TEST_VARIANCES`` (z², in noise variances), the step is located
    with a straight background (:func:`_sloped_shift_stats`); elsewhere the
    mean-shift position is kept, the better estimate on a flat background
    (one parameter fewer). The plateaus leave out the samples next to the
    split, so that a thermally broadened step is not read as a slope.
    """
    pos0 = _split_rows(profs, noise)
    if profs.shape[0] == 0 or profs.shape[1] < SLOPE_MIN_SAMPLES:
        return pos0
    sloped = _plateau_slope_z2(profs, pos0) > SLOPE_TEST_VARIANCES * noise**2
    if sloped.any():
        pos0[sloped] = _located(_sloped_shift_stats(profs[sloped]), noise)
    return pos0


def quantised_crossings(s: np.ndarray, scan_axis: np.ndarray) -> bool:
    """True when the crossing points ``s`` (V) sit midway between samples: steps sharper than a pixel.

    A step narrower than the sample spacing, sampled at points, is located
    only to within the pixel: its change point falls midway between the two
    samples around it (:func:`_located`), whatever its true position. Such
    points are not independent measurements scattered about the line: along
    a line that stays within one pixel they all carry the same error, and
    where the line moves on by a pixel they jump by a whole sample. The
    share of points near a midpoint (``lines.refine.midway``) tells the two
    cases apart: at least ``lines.refine.QUANTISED_SHARE`` of them (a uniform
    share of 20 % for steps resolved by the sampling; on sharp-line generator
    maps about 70 %).
    """
    s = np.asarray(s, float)
    if s.size == 0:
        return False
    return bool(np.mean(midway(volts_to_index(s, scan_axis))) >= QUANTISED_SHARE)


def pixel_limited(s: np.ndarray, scan_axis: np.ndarray, spans, b: float) -> bool:
    """True when quantised crossing points (:func:`quantised_crossings`) limit a family's slope.

    ``spans`` are the lines' extents along the cross axis (V) and ``b`` the
    family's slope (scan per cross, V/V): the lines move on by ``|b|·span``
    along their length, fewer than ``lines.refine.QUANTISED_MAX_STEPS``
    samples (median over the lines) for the limit to apply. With more, the
    sample steps are many and spread along each line, and the
    independent-point error holds (a digital straight line fixes its slope
    well: A. Rosenfeld, IEEE Trans. Comput. C-23, 1264 (1974),
    doi:10.1109/T-C.1974.223845).
    """
    step = abs(median(np.diff(scan_axis)))
    extent = np.array([abs(sp[1] - sp[0]) for sp in spans], float)
    if extent.size == 0 or not step > 0:
        return False
    return bool(median(abs(b) * extent / step) < QUANTISED_MAX_STEPS) and quantised_crossings(s, scan_axis)


def _pixel_limit(lid: np.ndarray, c: np.ndarray, n_lines: int, step: float) -> float:
    """Slope error of lines that each fix their slope only to ±1 sample over their length.

    A sharp line that moves on by under a sample along its extent ``L``
    (cross axis, V) bounds its slope to ``±step/L`` (rms ``step/(L·√3)``, a
    uniform spread); lines at independent sub-pixel offsets combine as
    independent measurements (inverse-variance). ``lid``, ``c``: line index
    and cross-axis coordinate of the points used.
    """
    if lid.size == 0:
        return float("nan")
    lo, hi = _line_ranges(lid, c, n_lines)
    ext = (hi - lo)[np.isfinite(hi - lo) & (hi > lo)]
    if ext.size == 0:
        return float("nan")
    return float(1.0 / np.sqrt(np.sum(pixel_slope_error(ext, step) ** -2)))


def _line_ranges(lid: np.ndarray, c: np.ndarray, n_lines: int) -> tuple[np.ndarray, np.ndarray]:
    """Per line, the smallest and largest ``c`` of its points (inf and −inf for lines without points)."""
    lo = np.full(n_lines, np.inf)
    hi = np.full(n_lines, -np.inf)
    np.minimum.at(lo, lid, c)
    np.maximum.at(hi, lid, c)
    return lo, hi


def _crossings(zz, scan_axis, cross_axis, spans, mids, b, *, trim, half_px, noise):
    """Sub-pixel crossing points of every line, flat: (scan V, cross V, line index) arrays.

    ``zz`` (n_cross, n_scan): the map with rows along the cross axis (``z``
    for dot1, ``z.T`` for dot2). ``spans`` (k, 2): each segment's extent along the cross axis (y for dot1),
    V; ``mids`` (k, 2): a point of each line as (scan, cross), V. Along every
    row (dot1) or column (dot2) of the central part of a segment, a window of
    ``± half_px`` pixels around the position predicted with the slope ``b``
    is cut and its change point located (:func:`_change_points`); all cuts of
    all lines are processed together.
    """
    n_scan = scan_axis.size
    n_lines = len(spans)
    if not n_lines:
        return np.zeros(0), np.zeros(0), np.zeros(0, np.int64)
    lo = np.array([min(sp) for sp in spans], float)
    hi = np.array([max(sp) for sp in spans], float)
    span = hi - lo
    lo, hi = lo + trim * span, hi - trim * span
    # every (line, row) pair inside the trimmed segment, line by line
    inside = (cross_axis[None, :] >= lo[:, None]) & (cross_axis[None, :] <= hi[:, None])
    lid, rows_a = np.nonzero(inside)
    mids_a = np.asarray(mids, float).reshape(n_lines, 2)
    cval_a = np.asarray(cross_axis[rows_a], float)
    p_idx = volts_to_index(mids_a[lid, 0] + b * (cval_a - mids_a[lid, 1]), scan_axis)
    fin = np.isfinite(p_idx)
    p_safe = np.where(fin, p_idx, -1e9)
    i0 = np.floor(p_safe - half_px).astype(np.int64)
    i1 = np.ceil(p_safe + half_px).astype(np.int64) + 1
    keep = fin & (i0 >= 1) & (i1 <= n_scan - 1)
    centre = np.full(rows_a.size, np.nan)
    lengths = i1 - i0
    for length in np.unique(lengths[keep]):
        sel = np.nonzero(keep & (lengths == length))[0]
        cols = i0[sel, None] + np.arange(length)
        profs = zz[rows_a[sel, None], cols]
        good = np.all(np.isfinite(profs), axis=1)
        sel, profs = sel[good], profs[good]
        centre[sel] = _change_points(profs, noise) + i0[sel]
    ok = np.isfinite(centre)
    s_all = np.full(rows_a.size, np.nan)
    s_all[ok] = index_to_volts(centre[ok], scan_axis)
    return s_all[ok], cval_a[ok], lid[ok]


def walk_slope_error(lid: np.ndarray, c: np.ndarray, s: np.ndarray, b: float) -> float:
    """Standard error of the common least-squares slope ``b`` when each line's crossing errors are a random walk.

    On a derivative map summed along an axis, the summed noise at one point
    holds all the noise before it along that axis: the crossing points that
    a family measures point by point along that axis (dot2 lines on a sum
    along x, column by column) share nearly all their error with their
    neighbours, and their scatter about the line says little about where
    the line is. In the random-walk model ``s_k = a_l + b c_k + W_l(c_k)``
    (one walk per line ``l``) the increments between neighbouring points
    of a line are independent, ``Δs − b Δc ~ N(0, q Δc)``, and ``q`` is
    estimated from them (``Σ r²/Δc / (n − 1)``; white errors on top of the
    walk only raise it: the estimate errs on the safe side). The pooled
    least-squares slope ``b = Σ d_k s_k / Σ d_k²`` (``d`` the points'
    distances from their line's mean ``c``) then has the variance
    ``q Σ_l V_l / (Σ d²)²`` with ``V_l = Σ_jk d_j d_k min(c_j, c_k)
    = Σ_m Δc_m (Σ_{k≥m} d_k)²`` over the line's sorted points. NaN with
    fewer than three increments.

    Parameters
    ----------
    lid : ndarray of int
        Line of each point.
    c, s : ndarray
        Cross and scan coordinates of the points (the slope is ``ds/dc``).
    b : float
        The common slope.

    Notes
    -----
    Increments of a Wiener process are independent with variance
    proportional to the step, and its covariance is ``q min(c_j, c_k)``
    (its definition; e.g. C. W. Gardiner, Handbook of Stochastic Methods,
    Springer). The variance of a linear estimate under a known covariance
    is common practice, no source.
    """
    order = np.lexsort((c, lid))
    lo, cs, ss = lid[order], c[order], s[order]
    same = lo[1:] == lo[:-1]
    dc, ds = np.diff(cs), np.diff(ss)
    inc = same & (dc > 0)
    if int(inc.sum()) < 3:
        return float("nan")
    r = ds[inc] - b * dc[inc]
    q = float(np.sum(r * r / dc[inc])) / (int(inc.sum()) - 1)
    # per line: d = c − mean, T_m = Σ_{k≥m} d_k (suffix sums), V = Σ_{m≥2} Δc_m T_m²
    starts = np.r_[0, np.nonzero(~same)[0] + 1]
    counts = np.diff(np.r_[starts, lo.size])
    mean = np.add.reduceat(cs, starts) / counts
    d = cs - np.repeat(mean, counts)
    total = np.add.reduceat(d, starts)
    prefix = np.cumsum(d) - np.repeat(np.cumsum(total) - total, counts)  # Σ_{k≤m} d_k within the line
    suffix = np.repeat(total, counts) - prefix + d  # Σ_{k≥m} d_k
    v = float(np.sum(dc[same] * suffix[1:][same] ** 2))
    sxx = float(np.sum(d * d))
    if sxx <= 0:
        return float("nan")
    return float(np.sqrt(q * v) / sxx)


def row_clustered_slope_error(rows: np.ndarray, dc: np.ndarray, r: np.ndarray, den: float, n_lines: int,
                              lags: int | None = None) -> float:
    """Standard error of a shared slope whose points share noise row by row (Driscoll–Kraay).

    Parameters
    ----------
    rows : ndarray of int, shape (n,)
        Row (slow-axis sample) of every point used in the fit: its moment in the measurement.
    dc : ndarray, shape (n,)
        Cross-axis coordinate of every point minus its line's mean, V.
    r : ndarray, shape (n,)
        Residual of every point from its line (common slope, own offset), V.
    den : float
        ``Σ dc²`` over the points, V².
    n_lines : int
        Lines with points (one offset each).
    lags : int, optional
        Rows over which the noise of a row stays correlated (Bartlett window); default the
        rule of thumb ``⌊4 (T/100)^(2/9)⌋`` for T rows (Newey and West 1994).

    Returns
    -------
    float
        ``sqrt(c · [Σ_t h_t² + 2 Σ_{l=1..L} (1 − l/(L+1)) Σ_t h_t h_{t−l}]) / den`` with
        ``h_t = Σ_{i in row t} dc_i r_i`` and ``c = N/(N − G − 1)`` for N points on G lines;
        NaN without points to spare.

    Notes
    -----
    Charge noise moves a dot's offset charge in measurement time, and with it every line of
    that dot at once: the crossing points of all lines in one row share an error, and so do
    neighbouring rows (1/f noise; E. Paladino et al., Rev. Mod. Phys. 86, 361 (2014),
    doi:10.1103/RevModPhys.86.361). Clustering by line (:func:`clustered_slope_error`)
    treats the lines as independent and misses it. The scores are summed per row and their
    covariance across rows is estimated with the Bartlett kernel: J. C. Driscoll and A. C.
    Kraay, Rev. Econ. Stat. 80, 549 (1998), doi:10.1162/003465398557825; W. K. Newey and
    K. D. West, Econometrica 55, 703 (1987), doi:10.2307/1913610; bandwidth rule: W. K. Newey
    and K. D. West, Rev. Econ. Stud. 61, 631 (1994), doi:10.2307/2297912. The part of a
    slow drift that is a trend over the whole map is a slope to any fit and stays unseen.
    """
    rows = np.asarray(rows, np.int64)
    n = rows.size
    if n == 0 or not den > 0 or n <= n_lines + 1:
        return float("nan")
    h = np.bincount(rows - rows.min(), weights=np.asarray(dc, float) * np.asarray(r, float))
    n_rows = h.size
    n_lags = int(np.floor(4.0 * (n_rows / 100.0) ** (2.0 / 9.0))) if lags is None else int(lags)
    meat = float(h @ h)
    for lag in range(1, min(n_lags, n_rows - 1) + 1):
        meat += 2.0 * (1.0 - lag / (n_lags + 1.0)) * float(h[lag:] @ h[:-lag])
    meat *= n / (n - n_lines - 1)
    return float(np.sqrt(meat)) / den if meat > 0 else float("nan")


def clustered_slope_error(lid: np.ndarray, dc: np.ndarray, r: np.ndarray, den: float, n_groups: int) -> float:
    """Cluster-robust (sandwich) standard error of a shared slope, one cluster per line.

    Parameters
    ----------
    lid : ndarray of int, shape (n,)
        Line index of every point used in the fit.
    dc : ndarray, shape (n,)
        Cross-axis coordinate of every point minus its line's mean, V.
    r : ndarray, shape (n,)
        Residual of every point from its line (common slope, own offset), V.
    den : float
        ``Σ dc²`` over the points, V².
    n_groups : int
        Upper bound of the line indices (``bincount`` length).

    Returns
    -------
    float
        ``sqrt(G/(G − 1) · (N − 1)/(N − G − 1) · Σ_g (Σ_{i∈g} dc_i r_i)²) / den``
        with G lines and N points; NaN with fewer than two lines.

    Notes
    -----
    The usual error ``σ/√Σdc²`` treats the crossing points as independent.
    Along one line they are not: slow (1/f) noise, row offsets, sensor
    drift and the pixel pattern of a sharp step move neighbouring points
    together. The clustered sandwich estimator lets the errors within each
    line be arbitrarily correlated and treats the lines as independent
    (K.-Y. Liang and S. L. Zeger, Biometrika 73, 13 (1986),
    doi:10.1093/biomet/73.1.13), with the usual small-sample factor
    ``G/(G − 1) · (N − 1)/(N − K)`` (A. C. Cameron and D. L. Miller,
    J. Human Resources 50, 317 (2015), doi:10.3368/jhr.50.2.317, Sec. VI;
    K = G + 1 parameters: one offset per line and the slope). With few lines it is itself
    uncertain (≈ G − 1 degrees of freedom), so the fit states the larger of
    it and the independent-point error, never less than the latter.
    """
    lid = np.asarray(lid, np.int64)
    if lid.size == 0 or not den > 0:
        return float("nan")
    # one shared column (dc), unit weights, bread 1/Σdc²: the family fit's sandwich with k = 1
    v = clustered_slope_variance(np.asarray(dc, float)[:, None], np.ones(lid.size), np.asarray(r, float), lid,
                                 np.array([[1.0 / den]]), n_groups)
    return float(np.sqrt(v)) if v > 0 else float("nan")


def _line_means(lid: np.ndarray, n: int, mask: np.ndarray, s: np.ndarray, c: np.ndarray):
    """Per line: number of masked points and the means of their ``s`` and ``c`` (NaN for empty lines)."""
    w = mask.astype(float)
    cnt = np.bincount(lid, w, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        cm = np.bincount(lid, w * c, n) / cnt
        sm = np.bincount(lid, w * s, n) / cnt
    return cnt, cm, sm


def _common_bend(lid: np.ndarray, n: int, use: np.ndarray, c: np.ndarray, r: np.ndarray):
    """Coefficient of the S-shaped bend ``u³ − 3u/5`` shared by the lines, and its error per unit σ.

    ``u`` ∈ [−1, 1] along each line (from its masked points' extent); the bend
    term is made orthogonal to each line's offset and slope (least squares on
    ``[1, u]``) before the residuals ``r`` are projected on it.
    """
    if not np.any(use):
        return float("nan"), float("nan")
    lo, hi = _line_ranges(lid[use], c[use], n)
    half = 0.5 * (hi - lo)
    ok_line = np.isfinite(half) & (half > 0)
    use = use & ok_line[lid]
    if not np.any(use):
        return float("nan"), float("nan")
    li, cc, rr = lid[use], c[use], r[use]
    with np.errstate(invalid="ignore"):  # lines without points have lo = inf, hi = −inf (not used)
        mid = 0.5 * (hi + lo)
    u = (cc - mid[li]) / half[li]
    g = u**3 - 0.6 * u
    k = np.bincount(li, None, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        ub = np.bincount(li, u, n) / k
        gb = np.bincount(li, g, n) / k
        du = u - ub[li]
        beta = np.bincount(li, du * (g - gb[li]), n) / np.bincount(li, du * du, n)
    g = g - gb[li] - beta[li] * du
    gg = float(g @ g)
    gr = float(g @ rr)
    if not gg > 0:
        return float("nan"), float("nan")
    return gr / gg, 1.0 / np.sqrt(gg)


def _staircase_test(gid, use, s, c, rss_piece: float, dof_piece: int, lid, n_lines: int,
                    b: float) -> tuple[float, float]:
    """F-test of one offset per group against one offset per line (shared slope in both), same points.

    Returns the p-value and the rms offset of the lines from their group's
    offset along the scan axis, both taken with the per-line fit's slope ``b``
    (weighted by points), V.
    """
    if dof_piece < 1 or not rss_piece > 0 or not np.any(use):
        return float("nan"), float("nan")
    g, ss_, cc, li = gid[use], s[use], c[use], lid[use]
    _, inv = np.unique(g, return_inverse=True)
    n_g = int(inv.max()) + 1
    n_p = int(np.unique(li).size)
    extra = n_p - n_g
    if extra < 1:
        return 1.0, 0.0
    k = np.bincount(inv, None, n_g)
    dc = cc - (np.bincount(inv, cc, n_g) / k)[inv]
    ds = ss_ - (np.bincount(inv, ss_, n_g) / k)[inv]
    den = float(dc @ dc)
    if not den > 0:
        return float("nan"), float("nan")
    bg = float(dc @ ds) / den
    r = ds - bg * dc
    rss_g = float(r @ r)
    f = max(rss_g - rss_piece, 0.0) / extra / (rss_piece / dof_piece)
    p = float(fdtrc(extra, dof_piece, f))
    # offsets at the per-line slope: line mean minus its group's mean
    kl = np.bincount(li, None, n_lines)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_r = np.bincount(li, ds - b * dc, n_lines) / kl
    okl = kl > 0
    jump = float(np.sqrt(np.sum(kl[okl] * mean_r[okl] ** 2) / np.sum(kl[okl])))
    return p, jump


def relocate_family(
    z: np.ndarray,
    x: np.ndarray,
    y: np.ndarray,
    lines: tuple[TransitionLine, ...] | list[TransitionLine],
    *,
    which: int,
    initial: float,
    noise: float,
    trim: float = 0.15,
    n_iter: int = 2,
    half_window_px: float | None = None,
    groups: np.ndarray | None = None,
    walk: bool = False,
) -> RelocatedFamily:
    """Re-measure a family's lines on the map with one common slope.

    Parameters
    ----------
    z : ndarray, shape (ny, nx)
    x, y : ndarray
        Axes, V.
    lines : sequence of TransitionLine
    which : {0, 1}
        0: dot1 (steep; positions along x per row, slope as dx/dy);
        1: dot2 (positions along y per column, slope as dy/dx).
    initial : float
        Starting dx/dy (dot1) or dy/dx (dot2).
    noise : float
        Noise standard deviation of ``z``.
    trim : float
        Fraction of each segment dropped at both ends (near triple points).
    half_window_px : float, optional
        Half-width of the cut around each predicted crossing, pixels. Default:
        both 5 px and 12 px (for thermally broad lines) are tried and the
        result with the smaller independent-point slope error is kept.
    groups : ndarray of int, shape (len(lines),), optional
        Coarser grouping of the lines (e.g. :attr:`SplitFamily.source`: the
        segment each band piece was cut from). The result then carries the
        F-test of one offset per group against one offset per line
        (``staircase_p``, ``staircase_jump_V``); the fit itself keeps one
        offset per line.
    walk : bool
        The crossing points' errors may be a random walk along the cross
        axis: the map is a derivative summed along that axis
        (:func:`stabtool.preprocess.integral.summed_axis`), so neighbouring
        points share nearly all their noise. The common slope's error in the
        random-walk model is then given as well (``stderr_walk``,
        :func:`walk_slope_error`); ``stderr`` and every choice stay as without.
    """
    lines = list(lines)
    windows = (5.0, 12.0) if half_window_px is None else (float(half_window_px),)
    tries = [_fit_window(z, x, y, lines, which=which, initial=initial, noise=noise, trim=trim, n_iter=n_iter,
                         half_px=h, groups=groups, walk=walk) for h in windows]
    good = [t for t in tries if t.ok]
    # the window is chosen by the independent-point error (the smoother measure of precision: the
    # clustered one is itself noisy with few lines, and the smaller of two noisy errors understates)
    best = min(good, key=lambda t: t.stderr_iid) if good else tries[0]
    return _relocated(lines, best, which=which, initial=initial)


@dataclass(frozen=True)
class _WindowFit:
    """Common-slope fit of one family with one window width (lines not yet rebuilt)."""

    ok: bool
    failed: bool  # no spread along the cross axis: nothing measured
    b: float
    stderr: float
    n_used: int
    sigma: float
    offsets: tuple = ()
    bend: float = float("nan")
    bend_err: float = float("nan")
    stair_p: float = float("nan")
    stair_jump: float = float("nan")
    stderr_iid: float = float("nan")  # slope error for independent points (window choice)
    pixel_limited: bool = False  # quantised points of lines within a sample or two (see pixel_limited)
    stderr_walk: float = float("nan")  # slope error in the random-walk model (see walk_slope_error)


def _relocated(lines: list[TransitionLine], fit: _WindowFit, *, which: int, initial: float) -> RelocatedFamily:
    """The :class:`RelocatedFamily` of a window fit: every line rebuilt with the common slope and its offset."""
    if fit.failed:
        return RelocatedFamily(False, tuple(lines), initial, np.nan, 0, np.nan)
    b, b_err, sigma = fit.b, fit.stderr, fit.sigma
    out = []
    for ln, off in zip(lines, fit.offsets):
        if off is None:
            out.append(replace(ln, position_stderr=float("nan")))
            continue
        sm, cm, n = off
        if which == 0:
            slope = 1.0 / b if b != 0 else np.inf
            slope_err = b_err / b**2 if b != 0 else np.inf
            x0, y0 = sm, cm
            ys = (ln.start[1], ln.end[1])
            start = (x0 + b * (ys[0] - y0), ys[0])
            end = (x0 + b * (ys[1] - y0), ys[1])
            perp = sigma / np.sqrt(n) / np.sqrt(1 + b * b)
        else:
            slope, slope_err = b, b_err
            x0, y0 = cm, sm
            xs = (ln.start[0], ln.end[0])
            start = (xs[0], y0 + b * (xs[0] - x0))
            end = (xs[1], y0 + b * (xs[1] - x0))
            perp = sigma / np.sqrt(n) / np.sqrt(1 + b * b)
        out.append(replace(ln, x0=float(x0), y0=float(y0), slope=float(slope), slope_stderr=float(slope_err),
                           position_stderr=float(perp), start=start, end=end, n_points=n))
    return RelocatedFamily(fit.ok, tuple(out), float(b), float(b_err), fit.n_used, float(sigma),
                           float(fit.bend), float(fit.bend_err), fit.stair_p, fit.stair_jump, fit.pixel_limited,
                           fit.stderr_walk)


def _fit_window(z: np.ndarray, x: np.ndarray, y: np.ndarray, lines: list[TransitionLine], *, which: int,
                initial: float, noise: float, trim: float, n_iter: int, half_px: float,
                groups: np.ndarray | None, walk: bool = False) -> _WindowFit:
    """Common slope and per-line offsets with cuts of ``± half_px`` pixels (see :func:`relocate_family`)."""
    z = np.asarray(z, float)
    n_lines_in = len(lines)
    scan_axis, cross_axis = (x, y) if which == 0 else (y, x)
    step = abs(median(np.diff(scan_axis)))
    b = float(initial)
    offsets: list[tuple[float, float, int] | None] = [None] * n_lines_in
    zz = z if which == 0 else z.T  # rows along the cross axis, columns along the scan axis
    spans = [(ln.start[1], ln.end[1]) if which == 0 else (ln.start[0], ln.end[0]) for ln in lines]
    mids0 = [(ln.x0, ln.y0) if which == 0 else (ln.y0, ln.x0) for ln in lines]  # (scan, cross)
    mids = mids0
    sigma = np.nan
    b_err = b_iid = b_walk = np.nan
    n_used = 0
    bend = bend_err = float("nan")
    limited = False
    for it in range(n_iter):
        # all crossing points of the family in flat arrays, ``lid`` = line index of each point
        s_all, c_all, lid = _crossings(zz, scan_axis, cross_axis, spans, mids, b, trim=trim, half_px=half_px,
                                       noise=max(noise, 1e-30))
        # quantised points (steps sharper than a pixel) on lines that stay within a pixel or two:
        # their scatter about the line understates their error (the points past a line's pixel
        # step stay outliers: kept, they let stray segments through, and the lattice broke on
        # a si-sige map swept along virtual gates: ΔV1 51.7 → 28.4 mV); only the last pass's
        # errors are kept, so only it asks (at the slope its crossings were cut with)
        if it == n_iter - 1:
            limited = pixel_limited(s_all, scan_axis, spans, b)
        mask = np.ones(s_all.size, bool)
        for _rej in range(3):
            cnt, cm, sm = _line_means(lid, n_lines_in, mask, s_all, c_all)
            good_pt = (cnt >= 3)[lid]
            dc, ds = c_all - cm[lid], s_all - sm[lid]
            use = mask & good_pt
            num = float(np.sum(dc[use] * ds[use]))
            den = float(np.sum(dc[use] ** 2))
            if den <= 0:
                return _WindowFit(False, True, float(initial), float("nan"), 0, float("nan"))
            b = num / den
            rr = ds - b * dc
            r = rr[good_pt]
            mad = 1.4826 * median(np.abs(r)) if r.size else 0.0
            new_mask = np.where(good_pt, np.abs(rr) <= max(3 * mad, 0.05 * step), mask)
            if np.array_equal(new_mask, mask):
                break  # no point changed: further rounds repeat these numbers exactly
            mask = new_mask
        cnt, cm, sm = _line_means(lid, n_lines_in, mask, s_all, c_all)
        good = cnt >= 3
        if it < n_iter - 1:
            # an intermediate pass only moves the predicted positions: its error, bend and
            # scatter statistics would be overwritten by the last pass (same numbers, less work)
            mids = [(float(sm[i]), float(cm[i])) if good[i] else mid for i, mid in enumerate(mids0)]
            continue
        use = mask & good[lid]
        n_used = int(cnt[good].sum())
        n_lines = int(good.sum())
        dof = max(n_used - n_lines - 1, 1)
        dc, ds = c_all - cm[lid], s_all - sm[lid]
        rr = ds - b * dc
        ss = float(np.sum(rr[use] ** 2))
        sigma = float(np.sqrt(ss / dof))
        sigma = max(sigma, (1.0 / np.sqrt(12.0) if limited else 0.02) * step)
        # crossing points along one line share slow noise (1/f, row walks, drifts): their errors are
        # correlated, and the per-line clustered sandwich error says so where the i.i.d. one cannot
        b_iid = sigma / np.sqrt(den)
        # and crossing points of different lines measured in the same row share the dots' charge noise
        # at that moment (every line of a dot moves with its offset charge): errors clustered by row,
        # with their correlation over the next rows (rows = the slow axis, the measurement time)
        t_all = c_all if which == 0 else s_all
        rows = np.rint((t_all[use] - y[0]) / (y[1] - y[0])).astype(np.int64)
        b_err = max(b_iid, clustered_slope_error(lid[use], dc[use], rr[use], den, n_lines_in),
                    row_clustered_slope_error(rows, dc[use], rr[use], den, n_lines))  # (a NaN one is passed over)
        if limited:
            b_err = max(b_err, _pixel_limit(lid[use], c_all[use], n_lines_in, step))
        if walk:
            b_walk = walk_slope_error(lid[use], c_all[use], s_all[use], b)
        bend, bend_err = _common_bend(lid, n_lines_in, mask & (cnt >= 8)[lid], c_all, rr)
        bend, bend_err = bend * 0.4, bend_err * sigma * 0.4
        offsets = [(float(sm[i]), float(cm[i]), int(cnt[i])) if good[i] else None for i in range(n_lines_in)]
        # next pass: predicted positions from the common slope
        mids = [(off[0], off[1]) if off is not None else mid for off, mid in zip(offsets, mids0)]
    stair_p = stair_jump = float("nan")
    if groups is not None and n_used:
        stair_p, stair_jump = _staircase_test(np.asarray(groups, int)[lid], use, s_all, c_all, ss, n_used - n_lines - 1,
                                              lid, n_lines_in, b)
    ok = n_used >= 6 and np.isfinite(b_err)
    return _WindowFit(bool(ok), False, float(b), float(b_err), n_used, float(sigma), tuple(offsets),
                      float(bend), float(bend_err), stair_p, stair_jump, float(b_iid), limited, float(b_walk))
