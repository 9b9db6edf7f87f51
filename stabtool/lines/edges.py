"""Edge map: Canny with thresholds set from the map's own noise level."""

from __future__ import annotations

from dataclasses import dataclass, replace
from functools import lru_cache

import numpy as np
import xarray as xr
from scipy import ndimage as ndi

from ..errors import InputError
from ..mapdata import MapAxes
from ..preprocess._checks import check_map
from ..preprocess._nan import fill_nan
from ..preprocess.noise import MAX_NOISE_SAMPLES, _noise_core, _noise_from_diffs

__all__ = ["EdgeMap", "EdgeScale", "edge_map", "edge_scale", "DEFAULT_LOW_SIGMAS", "DEFAULT_HIGH_SIGMAS"]

#: Hysteresis thresholds in units of the noise σ of one Sobel gradient component.
DEFAULT_LOW_SIGMAS = 2.5
DEFAULT_HIGH_SIGMAS = 5.0


@dataclass(frozen=True)
class EdgeMap:
    """Edge pixels of a map and how they were found.

    Attributes
    ----------
    edges : ndarray of bool, shape (ny, nx)
        Edge pixels (``edges[iy, ix]``).
    axes : MapAxes
        Voltage axes of the map.
    noise : float
        White-noise σ of the map (signal units).
    gradient_noise : float
        σ of one Sobel gradient component of the smoothed noise (signal units
        per pixel, pixel frame); thresholds are multiples of it.
    low_threshold, high_threshold : float
        Hysteresis thresholds used, in the same units (the lowest ones where
        the contrast floor differs between orientations).
    sigma_px : float
        Canny Gaussian σ, pixels.
    valid : ndarray of bool, shape (ny, nx)
        Pixels with data (not NaN).
    """

    edges: np.ndarray
    axes: MapAxes
    noise: float
    gradient_noise: float
    low_threshold: float
    high_threshold: float
    sigma_px: float
    valid: np.ndarray

    @property
    def n_edges(self) -> int:
        return int(self.edges.sum())


#: Variance (px²) the central difference of the Sobel operator adds across an edge (a
#: two-pixel box, 2²/12).
SOBEL_VARIANCE_PX2 = 1.0 / 3.0
#: Fewest strong edge pixels for a width estimate.
MIN_WIDTH_PIXELS = 30


@dataclass(frozen=True)
class EdgeScale:
    """Measured width of a map's edges and the smoothing scale chosen from it.

    Attributes
    ----------
    width_px : float
        Standard deviation of the edges' derivative profile across the line,
        pixels (a Fermi step of width ``w`` has ``π w/√3 ≈ 1.81 w``); 0 for
        edges sharper than the measurement resolves, NaN when too few strong
        edge pixels were found.
    sigma_px : float
        Gaussian σ chosen for the edge map, pixels.
    ratio : float
        Measured ratio of the mean squared gradient at the small and the
        large probe scale on the strong edges (noise power subtracted).
    n_pixels : int
        Strong edge pixels the ratio was measured on.
    probe_sigmas_px : tuple of float
        The two probe scales.
    base_snr : float
        Median gradient magnitude of those pixels at the small probe scale,
        in noise σ of one gradient component.
    """

    width_px: float
    sigma_px: float
    ratio: float
    n_pixels: int
    probe_sigmas_px: tuple[float, float]
    base_snr: float = float("nan")


def _edge_width_core(grad_a, sigma_a: float, grad_b, sigma_b: float, edges_b: np.ndarray,
                     strong: float) -> tuple[float, float, int, float]:
    """Edge width (px) from the gradients at two scales on the strong edges of the larger one.

    ``grad_*`` = ``(gx, gy, sx, sy)`` of :func:`_edge_core` (noise units and
    noise σ). Returns ``(width_px, ratio, n_pixels, base_snr)``, ``base_snr``
    the median gradient magnitude on those pixels at the small scale, in
    noise σ of a gradient component (noise power subtracted).
    """
    gxa, gya, sxa, sya = grad_a
    gxb, gyb, sxb, syb = grad_b
    sel = edges_b & (gxb * gxb + gyb * gyb > strong * strong)
    n = int(sel.sum())
    if n < MIN_WIDTH_PIXELS:
        return float("nan"), float("nan"), n, float("nan")
    base_snr = float(np.sqrt(max(float(np.median(gxa[sel] ** 2 + gya[sel] ** 2)) - 2.0, 0.0)))
    # squared gradient magnitude in signal units minus its noise power (both components)
    pa = float(((gxa[sel] * sxa) ** 2 + (gya[sel] * sya) ** 2).mean() - (sxa * sxa + sya * sya))
    pb = float(((gxb[sel] * sxb) ** 2 + (gyb[sel] * syb) ** 2).mean() - (sxb * sxb + syb * syb))
    if not (pa > 0 and pb > 0):
        return float("nan"), float("nan"), n, base_snr
    q = pa / pb
    va, vb = sigma_a**2 + SOBEL_VARIANCE_PX2, sigma_b**2 + SOBEL_VARIANCE_PX2
    if q <= 1.0:
        return float("inf"), q, n, base_snr
    return float(np.sqrt(max((vb - q * va) / (q - 1.0), 0.0))), q, n, base_snr


@lru_cache(maxsize=32)
def gradient_noise_gain(sigma_px: float) -> float:
    """L2 norm of the Gaussian-then-Sobel kernel: σ_gradient / σ_white."""
    n = int(np.ceil(4 * sigma_px)) + 4
    d = np.zeros((2 * n + 1, 2 * n + 1))
    d[n, n] = 1.0
    k = ndi.sobel(ndi.gaussian_filter(d, sigma_px), axis=1)
    return float(np.sqrt((k**2).sum()))


#: From this Gaussian σ (px) on, the thresholds follow the larger filtered noise next to the
#: borders. Below it the excess (≤ 1.5× within 2 px of the border) gave no false edge on
#: 8 pure-noise maps of 128² at σ = 1.5 px, while at 2.5–4 px it gave 6–87 edge pixels per map;
#: the default scale is left exactly as it was.
BORDER_GAIN_MIN_SIGMA_PX = 2.0


@lru_cache(maxsize=64)
def _border_gain_1d(n: int, sigma_px: float, derivative: bool) -> np.ndarray:
    """Noise std of the 1-D Gaussian-then-Sobel factor at each of ``n`` pixels, relative to the interior.

    The filters replicate the edge pixel (``mode="nearest"``), so near a
    border one noise sample enters several taps and the filtered noise is
    larger than inside (by up to ~2× for the smoothing factor): from the
    squared effective weights of each output pixel, computed on unit
    impulses. Pixels farther than the kernel radius from both ends get 1.
    """
    r = int(np.ceil(4 * sigma_px)) + 2
    m = n if n <= 3 * r else 3 * r
    eye = np.eye(m)
    a = ndi.gaussian_filter1d(eye, sigma_px, axis=0, mode="nearest")
    k = np.array([-1.0, 0.0, 1.0]) if derivative else np.array([1.0, 2.0, 1.0])
    a = ndi.correlate1d(a, k, axis=0, mode="nearest")
    v = np.sqrt((a * a).sum(axis=1))
    if m == n:
        return v / v[n // 2]
    out = np.ones(n)
    inner = v[m // 2]
    out[:r] = v[:r] / inner
    out[n - r:] = v[::-1][:r][::-1] / inner
    return out


def _block_median(a: np.ndarray, block: int) -> np.ndarray:
    """Median over ``block``×``block`` tiles, interpolated back to full size."""
    rows, ix = _block_median_rows(a, block)
    return _interp_cols(rows, ix)


def _subtract_block_median(a: np.ndarray, block: int) -> None:
    """``a -= _block_median(a, block)``, in place (the same numbers).

    The column interpolation is done per interval between two tile centres
    (a handful of them), where both neighbouring tile columns are fixed: the
    same products and sums as :func:`_interp_cols`, without gathering two
    full-size arrays.
    """
    rows, pos = _block_median_rows(a, block)
    n = rows.shape[1]
    i0 = np.clip(np.floor(pos).astype(int), 0, n - 1)
    i1 = np.minimum(i0 + 1, n - 1)
    f = pos - i0
    cuts = np.r_[0, np.flatnonzero(np.diff(i0)) + 1, i0.size]  # i0 rises with the column
    for s, e in zip(cuts[:-1].tolist(), cuts[1:].tolist()):
        k, k1 = int(i0[s]), int(i1[s])
        t = rows[:, k : k + 1] * (1.0 - f[s:e])
        t += rows[:, k1 : k1 + 1] * f[s:e]
        a[:, s:e] -= t


def _block_median_rows(a: np.ndarray, block: int) -> tuple[np.ndarray, np.ndarray]:
    """Tile medians of :func:`_block_median` interpolated along y (ny, bx), and the column positions (nx,)."""
    ny, nx = a.shape
    by, bx = max(1, ny // block), max(1, nx // block)
    tiles = a[: by * block, : bx * block].reshape(by, block, bx, block).transpose(0, 2, 1, 3).reshape(by, bx, -1)
    # the tiles are a fresh copy: the median by partitioning in place (= np.median); for an
    # even count one selection of the upper middle value, the lower one is the largest below it
    h = tiles.shape[2] // 2
    tiles.partition(h, axis=2)
    med = tiles[:, :, h]
    if tiles.shape[2] % 2 == 0:
        med = (tiles[:, :, :h].max(axis=2) + med) / 2
    cy = (np.arange(by) + 0.5) * block - 0.5
    cx = (np.arange(bx) + 0.5) * block - 0.5
    iy = np.clip(np.interp(np.arange(ny), cy, np.arange(by)), 0, by - 1)
    ix = np.clip(np.interp(np.arange(nx), cx, np.arange(bx)), 0, bx - 1)
    # bilinear interpolation is separable: along y, then along x, by gathering the
    # two neighbouring tile values (no matrix product: a multi-threaded BLAS
    # call of this size costs ~100× more CPU than it saves on a loaded machine);
    # the second pass gathers columns, so the full-size result is written in order
    return _interp_rows(med, iy), ix


def _interp_rows(m: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """Rows of ``m`` linearly interpolated at fractional row positions ``pos`` in [0, len(m) − 1]."""
    n = m.shape[0]
    i0 = np.clip(np.floor(pos).astype(int), 0, n - 1)
    i1 = np.minimum(i0 + 1, n - 1)
    f = (pos - i0)[:, None]
    return m[i0] * (1.0 - f) + m[i1] * f


def _interp_cols(m: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """Columns of ``m`` linearly interpolated at fractional column positions ``pos``.

    The same arithmetic as ``_interp_rows(m.T, pos).T``, computed in place
    on two gathered full-size arrays.
    """
    n = m.shape[1]
    i0 = np.clip(np.floor(pos).astype(int), 0, n - 1)
    i1 = np.minimum(i0 + 1, n - 1)
    f = pos - i0
    out = m[:, i0]
    out *= 1.0 - f
    hi = m[:, i1]
    hi *= f
    out += hi
    return out


_TAN_22, _TAN_67 = np.tan(np.pi / 8), np.tan(3 * np.pi / 8)


def _nms_at(ci: np.ndarray, ax: np.ndarray, ay: np.ndarray, mc: np.ndarray, magnitude, nx: int) -> np.ndarray:
    """Non-maximum suppression at interior pixels ``ci`` (flat indices) only.

    ``ax, ay, mc``: gradient components and magnitude there; ``magnitude(i)``
    gives the magnitude at other flat indices. A pixel is kept when its
    magnitude is at least that of the next pixel along the gradient direction
    (quantised to x, y and the two diagonals) and above that of the previous
    one (the Canny rule).
    """
    # direction quantised by comparisons instead of angles: |ay| ≤ tan(π/8)|ax| → x,
    # |ay| ≥ tan(3π/8)|ax| → y, else the diagonal of the sign of ax·ay
    bx, by = np.abs(ax), np.abs(ay)
    step = np.where(by <= _TAN_22 * bx, 1,
                    np.where(by >= _TAN_67 * bx, nx, np.where((ax > 0) == (ay > 0), nx + 1, nx - 1)))
    return (mc >= magnitude(ci + step)) & (mc > magnitude(ci - step))


def _hysteresis(ci: np.ndarray, mc: np.ndarray, low: float | np.ndarray, high: float | np.ndarray,
                shape: tuple[int, int]) -> np.ndarray:
    """Hysteresis thresholding of the magnitudes ``mc`` at flat indices ``ci`` (zero elsewhere).

    The same result as :func:`skimage.filters.apply_hysteresis_threshold`
    on the full magnitude image: pixels above ``low`` connected (4-neighbours,
    :func:`scipy.ndimage.label`) to a pixel above ``high``. The thresholds
    are numbers or, per pixel, arrays like ``mc``.
    """
    low = np.minimum(low, high)
    mask_low = np.zeros(shape[0] * shape[1], bool)
    mask_low[ci[mc > low]] = True
    labels, n = ndi.label(mask_low.reshape(shape))
    lab = labels.ravel()
    hit = np.zeros(n + 1, bool)
    hit[lab[ci[mc > high]]] = True
    hit[0] = False
    return hit[labels]


#: orientation bins of the contrast floor (gradient direction modulo 180°, 15° each)
N_ORIENTATION_BINS = 12
#: strong pixels a bin needs for a reference of its own
ORIENTATION_MIN_PIXELS = 20
#: an orientation whose strong edges are below this fraction of the map's is a faint family
FAINT_RATIO = 0.4
#: lowest per-orientation reference, as a fraction of the whole map's
ORIENTATION_FLOOR = 0.2


def dot_line_bins(x_step: float, y_step: float) -> np.ndarray:
    """Orientation bins (boolean, ``N_ORIENTATION_BINS``) of the gradient across a dot line.

    Dot lines have negative slopes dV_y/dV_x; in the pixel frame (column,
    row) that is a negative slope when the two axis steps have the same sign,
    and the gradient across such a line points into the first quadrant
    (0°–90°); otherwise into the second.
    """
    first = np.arange(N_ORIENTATION_BINS) < N_ORIENTATION_BINS // 2
    return first if x_step * y_step > 0 else ~first


def _orientation_bins(gx: np.ndarray, gy: np.ndarray) -> np.ndarray:
    """Bin (0 … N_ORIENTATION_BINS − 1) of the gradient direction modulo 180°."""
    ang = np.arctan2(gy, gx) % np.pi
    return np.minimum((ang * (N_ORIENTATION_BINS / np.pi)).astype(int), N_ORIENTATION_BINS - 1)


def _orientation_references(ms: np.ndarray, bins: np.ndarray, ref: float, *,
                            allowed: np.ndarray | None = None) -> np.ndarray:
    """Reference magnitude of the contrast floor per orientation bin, shape (N_ORIENTATION_BINS,).

    ``ms`` are the strong (above the high threshold, suppressed) magnitudes,
    ``bins`` their orientation bins and ``ref`` the map's reference (their
    95th percentile). A bin whose strong pixels (pooled with the two
    neighbouring bins: a line's gradient directions spread over them) are at
    least ``ORIENTATION_MIN_PIXELS`` and have a 95th percentile below
    ``FAINT_RATIO · ref`` holds a faint family: its reference is that
    percentile, but not below ``ORIENTATION_FLOOR · ref``. Every other bin
    keeps ``ref``, so maps whose families are of comparable contrast get the
    same edges as with one floor. ``allowed`` (boolean per bin) limits the
    faint references to some orientations (the dot lines' quadrant: the
    interdot lines, fainter than the dot lines on most sensors, keep the
    map's floor).
    """
    out = np.full(N_ORIENTATION_BINS, float(ref))
    order = np.argsort(bins, kind="stable")
    ms_sorted = ms[order]
    edges = np.searchsorted(bins[order], np.arange(N_ORIENTATION_BINS + 1))
    faint = ms_sorted < FAINT_RATIO * ref
    n_bin = np.diff(edges)
    below = np.concatenate([[0], np.cumsum(faint)])
    n_faint = below[edges[1:]] - below[edges[:-1]]
    for b in range(N_ORIENTATION_BINS):
        if allowed is not None and not allowed[b]:
            continue
        nb = [(b - 1) % N_ORIENTATION_BINS, b, (b + 1) % N_ORIENTATION_BINS]
        n_pool = int(n_bin[nb].sum())
        # (the 95th percentile, interpolated at 0.95 (n − 1), is below FAINT_RATIO·ref only if
        # the pool's lowest floor(0.95 (n − 1)) + 1 are)
        if n_pool < ORIENTATION_MIN_PIXELS or n_faint[nb].sum() < int(0.95 * (n_pool - 1)) + 1:
            continue
        rb = _percentile_linear(np.concatenate([ms_sorted[edges[k]:edges[k + 1]] for k in nb]), 0.95)
        if rb < FAINT_RATIO * ref:
            out[b] = max(rb, ORIENTATION_FLOOR * ref)
    return out


def _sobel(a: np.ndarray, axis: int) -> np.ndarray:
    """:func:`scipy.ndimage.sobel` of a 2-D array along ``axis`` (mode "reflect"), as array slices.

    The central difference ``a[i+1] − a[i−1]`` along ``axis``, then
    ``2 d[j] + (d[j−1] + d[j+1])`` across it, the edge sample repeated at
    the borders: the same operations, in the same order, as scipy's
    symmetric and antisymmetric 3-tap correlations (hence the same bits),
    without their per-line overhead.
    """
    if min(a.shape) < 3:
        return ndi.sobel(a, axis=axis)
    # the slices along and across ``axis``: s(lo, hi) picks lo:hi along it, c(lo, hi) across it
    def s(lo, hi):
        return (slice(None), slice(lo, hi)) if axis == 1 else (slice(lo, hi), slice(None))

    def c(lo, hi):
        return (slice(lo, hi), slice(None)) if axis == 1 else (slice(None), slice(lo, hi))

    d = np.empty(a.shape)
    np.subtract(a[s(2, None)], a[s(None, -2)], out=d[s(1, -1)])
    np.subtract(a[s(1, 2)], a[s(0, 1)], out=d[s(0, 1)])
    np.subtract(a[s(-1, None)], a[s(-2, -1)], out=d[s(-1, None)])
    g = np.empty(a.shape)
    np.multiply(d[c(1, -1)], 2.0, out=g[c(1, -1)])
    g[c(1, -1)] += d[c(None, -2)] + d[c(2, None)]
    g[c(0, 1)] = 2.0 * d[c(0, 1)] + (d[c(0, 1)] + d[c(1, 2)])
    g[c(-1, None)] = 2.0 * d[c(-1, None)] + (d[c(-2, -1)] + d[c(-1, None)])
    return g


def _percentile_linear(x: np.ndarray, q: float) -> float:
    """``np.percentile(x, 100 q)`` of a finite 1-D array (default "linear" method), with one partition.

    The same arithmetic as numpy's: virtual index ``(n − 1) q``, the two
    neighbouring order statistics ``a, b`` and ``a + (b − a) γ`` (or
    ``b − (b − a)(1 − γ)`` for ``γ ≥ ½``); far less call overhead.
    """
    n = x.size
    v = (n - 1) * q
    lo = int(np.floor(v))
    if v >= n - 1:
        return float(np.partition(x, n - 1)[n - 1])
    part = np.partition(x, (lo, lo + 1))
    a, b = part[lo], part[lo + 1]
    g = v - lo
    d = b - a
    return float(b - d * (1 - g) if g >= 0.5 else a + d * g)


#: Edges weaker than this fraction of the strong edges of their orientation are not kept (see
#: :func:`_edge_core`).
CONTRAST_FLOOR = 0.2


def _edge_core(values: np.ndarray, sigma_px: float, noise: float, low: float, high: float,
               contrast_floor: float = CONTRAST_FLOOR, *, with_gradient: bool = False, faint_bins: np.ndarray | None = None):
    """Edge map of ``values`` at one scale (see :func:`edge_map`).

    Returns ``(edges, gradient_noise, low, high, valid)``; with
    ``with_gradient`` also ``(gx, gy, sx, sy)``: the smoothed gradient
    components in noise units and their noise σ (signal units per pixel).
    ``faint_bins`` (boolean, ``N_ORIENTATION_BINS``) limits the faint-family
    contrast floor to those orientation bins (None: every bin).
    """
    valid = np.isfinite(values)
    img = values if valid.all() else fill_nan(values)
    sm = ndi.gaussian_filter(img, sigma_px, mode="nearest")
    gx = _sobel(sm, 1)
    gy = _sobel(sm, 0)
    block = int(max(32, round(16 * sigma_px)))
    if min(img.shape) >= 2 * block:
        _subtract_block_median(gx, block)
        _subtract_block_median(gy, block)
    all_valid = bool(valid.all())
    if not all_valid:
        # isolated missing points are filled; only large gaps (an interrupted
        # sweep) are kept away from, by the reach of the smoothing kernel
        lab, _ = ndi.label(~valid)
        sizes = np.bincount(lab.ravel())
        big = (sizes > 4)[lab] & (lab > 0)
        inner = ~ndi.binary_dilation(big, iterations=int(np.ceil(2 * sigma_px)) + 1) if big.any() else None
    # per-axis white-noise level from pixel differences (robust to the few
    # differences that straddle a line); the y one also holds residual row noise
    # (the median of the differences along y, in any order)
    # (every k-th column of a large map: see MAX_NOISE_SAMPLES)
    kcol = int(np.ceil(values.size / MAX_NOISE_SAMPLES)) if values.size > MAX_NOISE_SAMPLES else 1
    noise_y = _noise_from_diffs(np.diff(values[:, ::kcol], axis=0))
    gain = gradient_noise_gain(sigma_px)
    sx = gain * noise
    sy = gain * max(noise, noise_y if np.isfinite(noise_y) else noise)
    # gradient magnitude in noise units, |(gx/sx, gy/sy)|. Only pixels above
    # the low threshold can become edges (the thresholds only rise below), so
    # the magnitude, the non-maximum suppression and the hysteresis are
    # evaluated there alone: the squared magnitude (with a hair of slack, a
    # superset) picks the candidates, the magnitude itself decides
    gx /= sx
    gy /= sy
    if sigma_px >= BORDER_GAIN_MIN_SIGMA_PX:
        # near the borders the replicated edge pixels make the filtered noise larger: the
        # thresholds follow it (separable: derivative factor along the axis, smoothing across)
        ny_, nx_ = gx.shape
        gx /= np.outer(_border_gain_1d(ny_, float(sigma_px), False), _border_gain_1d(nx_, float(sigma_px), True))
        gy /= np.outer(_border_gain_1d(ny_, float(sigma_px), True), _border_gain_1d(nx_, float(sigma_px), False))
    g2 = np.multiply(gx, gx)
    g2 += np.multiply(gy, gy)
    cand = g2 > low * low * (1 - 1e-9)
    if not all_valid and inner is not None:
        cand &= inner
    # the border pixels are never edges
    cand[[0, -1], :] = False
    cand[:, [0, -1]] = False
    ci = np.flatnonzero(cand)
    g2f = g2.ravel()

    def magnitude(i):
        return np.sqrt(g2f[i])

    mc = magnitude(ci)
    above = mc > low
    ci, mc = ci[above], mc[above]
    gxf, gyf = gx.ravel(), gy.ravel()

    def suppressed(sel):
        """The candidates ``sel`` (boolean) that survive non-maximum suppression: (indices, magnitudes)."""
        c, m = ci[sel], mc[sel]
        keep = _nms_at(c, gxf[c], gyf[c], m, magnitude, gx.shape[1])
        return c[keep], m[keep]

    # contrast floor: at high SNR, weak structure (sensor curvature, residual
    # ramps) is far above the noise; keep only edges within a factor of the
    # strong ones (common practice for Canny thresholds, no source). The
    # strong ones are those of the same orientation when that orientation's
    # edges are all much weaker than the map's (a family of a dot the sensor
    # hardly sees): see _orientation_references. The suppression (a
    # pixel-by-pixel test) runs first on the candidates above the high
    # threshold, which fix the floor, then on those between the lowest final
    # low threshold and that: the pixels below it never become edges (the
    # same edges as suppressing every candidate)
    strong_sel = mc > high
    cs, ms = suppressed(strong_sel)
    hi0, lo0 = high, low
    ref_bin = None
    if contrast_floor > 0 and ms.size >= 20:
        ref_bin = _orientation_references(ms, _orientation_bins(gxf[cs], gyf[cs]), _percentile_linear(ms, 0.95),
                                          allowed=faint_bins)
        high = max(high, contrast_floor * float(ref_bin.min()))
        low = max(low, 0.5 * contrast_floor * float(ref_bin.min()))
    cw, mw = suppressed(~strong_sel & (mc > low))
    if low >= hi0:
        cs_keep = ms > low
        cs, ms = cs[cs_keep], ms[cs_keep]
    ci, mc = np.concatenate([cs, cw]), np.concatenate([ms, mw])
    if ref_bin is None:
        edges = _hysteresis(ci, mc, low, high, gx.shape)
    else:
        ref_pix = ref_bin[_orientation_bins(gxf[ci], gyf[ci])]
        edges = _hysteresis(ci, mc, np.maximum(lo0, 0.5 * contrast_floor * ref_pix),
                            np.maximum(hi0, contrast_floor * ref_pix), gx.shape)
    out = (edges, float(np.hypot(sx, sy) / np.sqrt(2)), low, high, valid)
    if with_gradient:
        return out + ((gx, gy, sx, sy),)
    return out


def edge_map(
    da: xr.DataArray,
    *,
    sigma_px: float = 1.5,
    low_sigmas: float = DEFAULT_LOW_SIGMAS,
    high_sigmas: float = DEFAULT_HIGH_SIGMAS,
    noise: float | None = None,
) -> EdgeMap:
    """Canny edge map with hysteresis thresholds from the map's noise level.

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)
        A pre-processed map (background and row offsets removed). NaN allowed.
    sigma_px : float
        Canny Gaussian σ in pixels (isotropic pixel frame).
    low_sigmas, high_sigmas : float
        Hysteresis thresholds as multiples of the noise σ of one Sobel
        gradient component, ``σ_g = σ · ‖K‖₂`` with K the Gaussian-then-Sobel
        kernel. Noise alone rarely exceeds ``5 σ_g`` (Rayleigh tail
        ``exp(−12.5) ≈ 4·10⁻⁶`` per pixel).
    noise : float, optional
        White-noise σ of the map; default a robust MAD estimate
        (:func:`stabtool.preprocess.estimate_noise_level`).

    Returns
    -------
    EdgeMap

    Notes
    -----
    J. Canny, "A computational approach to edge detection", IEEE Trans.
    Pattern Anal. Mach. Intell. 8, 679 (1986), doi:10.1109/TPAMI.1986.4767851;
    implementation :func:`skimage.feature.canny`. The pixel frame weighs x and
    y steps equally whatever their size in volts. Thresholds scale with the
    measured noise, so the same settings serve maps of any signal unit. The
    y noise level of a map larger than 512² comes from every k-th column
    (at most 2¹⁸ differences; the MAD's relative standard error is then
    about 0.2 %). Non-maximum suppression and hysteresis are evaluated at
    the pixels above the low threshold only, with the same result as on the
    whole image.
    """
    axes = check_map(da)
    values = np.asarray(da.values, dtype=np.float64)
    if not (np.isfinite(sigma_px) and sigma_px > 0):
        raise InputError("sigma_px", f"must be a positive number of pixels, got {sigma_px!r}")
    if not (0 < low_sigmas <= high_sigmas):
        raise InputError("low_sigmas", f"need 0 < low_sigmas <= high_sigmas, got {low_sigmas!r}, {high_sigmas!r}")
    nz = _noise_core(values) if noise is None else float(noise)
    if noise is None:
        # a noiseless (synthetic) map: floor at 1e-3 of the signal range
        lo_hi = np.nanpercentile(values, [1, 99])
        nz = max(nz, 1e-3 * float(lo_hi[1] - lo_hi[0])) if np.isfinite(nz) else nz
    if not (np.isfinite(nz) and nz > 0):
        raise InputError(da.attrs.get("source", "da"), "cannot estimate a noise level (too few finite neighbours, or a noiseless map with noise=None); pass noise=")
    edges, g, lo, hi, valid = _edge_core(values, float(sigma_px), nz, low_sigmas, high_sigmas)
    return EdgeMap(edges=edges, axes=axes, noise=nz, gradient_noise=g, low_threshold=lo,
                   high_threshold=hi, sigma_px=float(sigma_px), valid=valid)


#: Selected σ per unit of measured edge width (see :func:`edge_scale`).
SCALE_PER_WIDTH = 2.5
#: The larger probe scale, as a multiple of the base σ.
PROBE_FACTOR = 2.0
#: Most pixels the larger probe scale is computed on (a central window of a larger map).
PROBE_MAX_PIXELS = 128 * 128


def _select_scale(values: np.ndarray, noise: float, *, sigma_px: float, max_sigma_px: float, low: float,
                  high: float, faint_bins: np.ndarray | None = None,
                  contrast_floor: float = CONTRAST_FLOOR) -> tuple[np.ndarray, EdgeScale]:
    """Edge map at the selected scale and the :class:`EdgeScale` (core of :func:`edge_scale`)."""
    sa, sb = float(sigma_px), PROBE_FACTOR * float(sigma_px)
    ra = _edge_core(values, sa, noise, low, high, contrast_floor, with_gradient=True, faint_bins=faint_bins)
    # the width is a property of the lines, not of every pixel: on a large map the
    # larger probe scale runs on a central window of at most PROBE_MAX_PIXELS
    ny, nx = values.shape
    f = min(1.0, float(np.sqrt(PROBE_MAX_PIXELS / (ny * nx))))
    wy, wx = min(ny, int(np.ceil(ny * f))), min(nx, int(np.ceil(nx * f)))
    y0, x0 = (ny - wy) // 2, (nx - wx) // 2
    win = (slice(y0, y0 + wy), slice(x0, x0 + wx))
    rb = _edge_core(values[win], sb, noise, low, high, contrast_floor, with_gradient=True, faint_bins=faint_bins)
    edges_b = rb[0]
    if f < 1.0:
        # away from the window's border (its smoothing sees a replicated edge there)
        m = int(np.ceil(3 * sb))
        inner = np.zeros_like(edges_b)
        inner[m:-m or None, m:-m or None] = True
        edges_b = edges_b & inner
    gxa, gya, sxa, sya = ra[5]
    grad_a = (gxa[win], gya[win], sxa, sya)
    width, q, n, base_snr = _edge_width_core(grad_a, sa, rb[5], sb, edges_b, high)
    sel = sa
    if (np.isfinite(width) or width == np.inf) and base_snr < high:
        sel = float(min(max(sa, SCALE_PER_WIDTH * width), max(sa, max_sigma_px)))
    scale = EdgeScale(width_px=width, sigma_px=sel, ratio=q, n_pixels=n, probe_sigmas_px=(sa, sb),
                      base_snr=base_snr)
    if sel <= sa + 0.1:
        return ra[0], replace(scale, sigma_px=sa)
    if abs(sel - sb) <= 0.1 and f == 1.0:
        return rb[0], replace(scale, sigma_px=sb)
    return _edge_core(values, sel, noise, low, high, contrast_floor, faint_bins=faint_bins)[0], scale


def edge_scale(
    da: xr.DataArray,
    *,
    sigma_px: float = 1.5,
    max_sigma_px: float = 4.0,
    low_sigmas: float = DEFAULT_LOW_SIGMAS,
    high_sigmas: float = DEFAULT_HIGH_SIGMAS,
    noise: float | None = None,
) -> EdgeScale:
    """Measure the width of a map's edges and select the edge-map scale from it.

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)
        A pre-processed map (background and row offsets removed). NaN allowed.
    sigma_px : float
        Base Gaussian σ of the edge map, pixels; the scale never goes below it.
    max_sigma_px : float
        Largest σ that may be selected, pixels.
    low_sigmas, high_sigmas : float
        Hysteresis thresholds (noise σ of a gradient component), as in
        :func:`edge_map`; the thresholds at every scale come from the noise
        of the same smoothed derivative, so the false-edge rate stays the same.
    noise : float, optional
        White-noise σ of the map; default a robust MAD estimate.

    Returns
    -------
    EdgeScale

    Notes
    -----
    The edge map is computed at the base scale σ_a and at σ_b = 2 σ_a. On
    the strong edges of the σ_b map the mean squared gradient magnitude is
    measured at both scales, the noise power of each smoothed derivative
    subtracted. For a step whose derivative profile across the line is a
    Gaussian of σ ``s`` (an error-function step), the gradient peak at scale
    σ is ``h / √(2π (σ² + δ + s²))`` (δ = 1/3 px², the Sobel central
    difference), so the ratio ``Q`` of the two squared responses gives
    ``s² = (σ_b² + δ − Q (σ_a² + δ)) / (Q − 1)``. This is the parametric form
    of T. Lindeberg's scale selection for edges (γ-normalised derivatives with
    γ = ½, whose response peaks at σ = s; "Edge detection and ridge detection
    with automatic scale selection", Int. J. Comput. Vis. 30, 117 (1998),
    doi:10.1023/A:1008097225773), from two scales instead of a scale space.

    A larger scale is selected only when the base scale is not enough: when
    the median strong edge is below ``high_sigmas`` at σ_a (a broad line at
    low SNR). The noise-normalised response of a step keeps growing with σ
    (∝ σ²/√(σ² + s²)), so the selected σ = ``SCALE_PER_WIDTH``·s (2.5 s,
    between ``sigma_px`` and ``max_sigma_px``) is set by how far the lines
    may be blurred (triple points, neighbouring lines), not by the edge
    itself; the factor is loosely set (on the benchmark's 16 SNR-3 maps of
    112² with 3–4 px broad lines, maps with a virtual-gate result, all of
    them still beyond the 0.02 bound and reported doubtful: 1 at 2 s, 2 at
    2.5 s, 3 at 3 s, 2 at 4 s; 0 at the base scale). Sharp lines (s → 0)
    and maps whose edges are clear at σ_a keep σ_a. On a map larger than
    ``PROBE_MAX_PIXELS`` the σ_b probe runs on a central window (speed).
    The width reads about 0.65 of
    the Fermi profile's σ (π w/√3) on honeycomb maps (short segments and
    rounded triple points lower the large-scale response); on isolated
    error-function steps it is within ~10 %.
    """
    axes = check_map(da)
    del axes
    values = np.asarray(da.values, dtype=np.float64)
    if not (np.isfinite(sigma_px) and sigma_px > 0):
        raise InputError("sigma_px", f"must be a positive number of pixels, got {sigma_px!r}")
    if not (np.isfinite(max_sigma_px) and max_sigma_px > 0):
        raise InputError("max_sigma_px", f"must be a positive number of pixels, got {max_sigma_px!r}")
    if not (0 < low_sigmas <= high_sigmas):
        raise InputError("low_sigmas", f"need 0 < low_sigmas <= high_sigmas, got {low_sigmas!r}, {high_sigmas!r}")
    nz = _noise_core(values) if noise is None else float(noise)
    if not (np.isfinite(nz) and nz > 0):
        raise InputError(da.attrs.get("source", "da"), "cannot estimate a noise level; pass noise=")
    _, scale = _select_scale(values, nz, sigma_px=float(sigma_px), max_sigma_px=float(max_sigma_px),
                             low=low_sigmas, high=high_sigmas)
    return scale
