"""Edge map: Canny with thresholds set from the map's own noise level."""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import xarray as xr
from scipy import ndimage as ndi

from ..errors import InputError
from ..mapdata import MapAxes
from ..preprocess._checks import check_map
from ..preprocess._nan import fill_nan
from ..preprocess.noise import MAX_NOISE_SAMPLES, _noise_core, _noise_from_diffs

__all__ = ["EdgeMap", "edge_map", "DEFAULT_LOW_SIGMAS", "DEFAULT_HIGH_SIGMAS"]

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
        Hysteresis thresholds used, in the same units.
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


@lru_cache(maxsize=32)
def gradient_noise_gain(sigma_px: float) -> float:
    """L2 norm of the Gaussian-then-Sobel kernel: σ_gradient / σ_white."""
    n = int(np.ceil(4 * sigma_px)) + 4
    d = np.zeros((2 * n + 1, 2 * n + 1))
    d[n, n] = 1.0
    k = ndi.sobel(ndi.gaussian_filter(d, sigma_px), axis=1)
    return float(np.sqrt((k**2).sum()))


def _block_median(a: np.ndarray, block: int) -> np.ndarray:
    """Median over ``block``×``block`` tiles, interpolated back to full size."""
    ny, nx = a.shape
    by, bx = max(1, ny // block), max(1, nx // block)
    tiles = a[: by * block, : bx * block].reshape(by, block, bx, block).transpose(0, 2, 1, 3).reshape(by, bx, -1)
    # the tiles are a fresh copy: the median by partitioning in place (= np.median)
    h = tiles.shape[2] // 2
    if tiles.shape[2] % 2:
        tiles.partition(h, axis=2)
        med = tiles[:, :, h]
    else:
        tiles.partition([h - 1, h], axis=2)
        med = (tiles[:, :, h - 1] + tiles[:, :, h]) / 2
    cy = (np.arange(by) + 0.5) * block - 0.5
    cx = (np.arange(bx) + 0.5) * block - 0.5
    iy = np.clip(np.interp(np.arange(ny), cy, np.arange(by)), 0, by - 1)
    ix = np.clip(np.interp(np.arange(nx), cx, np.arange(bx)), 0, bx - 1)
    # bilinear interpolation is separable: along y, then along x, by gathering the
    # two neighbouring tile values (no matrix product: a multi-threaded BLAS
    # call of this size costs ~100× more CPU than it saves on a loaded machine)
    return _interp_rows(_interp_rows(med, iy).T, ix).T


def _interp_rows(m: np.ndarray, pos: np.ndarray) -> np.ndarray:
    """Rows of ``m`` linearly interpolated at fractional row positions ``pos`` in [0, len(m) − 1]."""
    n = m.shape[0]
    i0 = np.clip(np.floor(pos).astype(int), 0, n - 1)
    i1 = np.minimum(i0 + 1, n - 1)
    f = (pos - i0)[:, None]
    return m[i0] * (1.0 - f) + m[i1] * f


def _nms_at(ci: np.ndarray, ax: np.ndarray, ay: np.ndarray, mc: np.ndarray, magnitude, nx: int) -> np.ndarray:
    """Non-maximum suppression at interior pixels ``ci`` (flat indices) only.

    ``ax, ay, mc``: gradient components and magnitude there; ``magnitude(i)``
    gives the magnitude at other flat indices. A pixel is kept when its
    magnitude is at least that of the next pixel along the gradient direction
    (quantised to x, y and the two diagonals) and above that of the previous
    one (the Canny rule).
    """
    ang = np.mod(np.arctan2(ay, ax), np.pi)
    q = np.floor((ang + np.pi / 8) / (np.pi / 4)).astype(int) % 4  # 0: x, 1: diag, 2: y, 3: anti-diag
    step = np.array([1, nx + 1, nx, nx - 1])[q]
    return (mc >= magnitude(ci + step)) & (mc > magnitude(ci - step))


def _hysteresis(ci: np.ndarray, mc: np.ndarray, low: float, high: float, shape: tuple[int, int]) -> np.ndarray:
    """Hysteresis thresholding of the magnitudes ``mc`` at flat indices ``ci`` (zero elsewhere).

    The same result as :func:`skimage.filters.apply_hysteresis_threshold`
    on the full magnitude image: pixels above ``low`` connected (4-neighbours,
    :func:`scipy.ndimage.label`) to a pixel above ``high``.
    """
    low = min(low, high)
    mask_low = np.zeros(shape[0] * shape[1], bool)
    mask_low[ci[mc > low]] = True
    labels, n = ndi.label(mask_low.reshape(shape))
    lab = labels.ravel()
    hit = np.zeros(n + 1, bool)
    hit[lab[ci[mc > high]]] = True
    hit[0] = False
    return hit[labels]


def _edge_core(values: np.ndarray, sigma_px: float, noise: float, low: float, high: float,
               contrast_floor: float = 0.2):
    valid = np.isfinite(values)
    img = values if valid.all() else fill_nan(values)
    sm = ndi.gaussian_filter(img, sigma_px, mode="nearest")
    gx = ndi.sobel(sm, axis=1)
    gy = ndi.sobel(sm, axis=0)
    block = int(max(32, round(16 * sigma_px)))
    if min(img.shape) >= 2 * block:
        gx -= _block_median(gx, block)
        gy -= _block_median(gy, block)
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
    ax, ay = gx.ravel()[ci], gy.ravel()[ci]
    keep = _nms_at(ci, ax, ay, mc, magnitude, gx.shape[1])
    ci, mc = ci[keep], mc[keep]
    # contrast floor: at high SNR, weak structure (sensor curvature, residual
    # ramps) is far above the noise; keep only edges within a factor of the
    # strong ones (common practice for Canny thresholds, no source)
    strong = mc[mc > high]
    if contrast_floor > 0 and strong.size >= 20:
        ref = float(np.percentile(strong, 95))
        high = max(high, contrast_floor * ref)
        low = max(low, 0.5 * contrast_floor * ref)
    edges = _hysteresis(ci, mc, low, high, gx.shape)
    return edges, float(np.hypot(sx, sy) / np.sqrt(2)), low, high, valid


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
