"""Edge map: Canny with thresholds set from the map's own noise level."""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import xarray as xr
from scipy import ndimage as ndi
from skimage.filters import apply_hysteresis_threshold

from ..errors import InputError
from ..mapdata import MapAxes
from ..preprocess._checks import check_map
from ..preprocess._nan import fill_nan
from ..preprocess.noise import _noise_core

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
    med = np.median(tiles, axis=2)
    cy = (np.arange(by) + 0.5) * block - 0.5
    cx = (np.arange(bx) + 0.5) * block - 0.5
    iy = np.clip(np.interp(np.arange(ny), cy, np.arange(by)), 0, by - 1)
    ix = np.clip(np.interp(np.arange(nx), cx, np.arange(bx)), 0, bx - 1)
    # bilinear interpolation is separable: two small interpolation matrices
    return _interp_matrix(iy, by) @ med @ _interp_matrix(ix, bx).T


def _interp_matrix(pos: np.ndarray, n: int) -> np.ndarray:
    """Rows of linear-interpolation weights at fractional positions ``pos`` in [0, n − 1]."""
    W = np.zeros((pos.size, n))
    i0 = np.clip(np.floor(pos).astype(int), 0, n - 1)
    i1 = np.minimum(i0 + 1, n - 1)
    f = pos - i0
    r = np.arange(pos.size)
    W[r, i0] += 1.0 - f
    W[r, i1] += f
    return W


def _nms(gx: np.ndarray, gy: np.ndarray, mag: np.ndarray) -> np.ndarray:
    """Non-maximum suppression along the (4-way quantised) gradient direction."""
    ang = np.mod(np.arctan2(gy, gx), np.pi)
    q = np.floor((ang + np.pi / 8) / (np.pi / 4)).astype(int) % 4  # 0: x, 1: diag, 2: y, 3: anti-diag
    p = np.pad(mag, 1, mode="constant")
    c = p[1:-1, 1:-1]
    nb = {
        0: (p[1:-1, 2:], p[1:-1, :-2]),
        1: (p[2:, 2:], p[:-2, :-2]),
        2: (p[2:, 1:-1], p[:-2, 1:-1]),
        3: (p[2:, :-2], p[:-2, 2:]),
    }
    keep = np.zeros(mag.shape, dtype=bool)
    for k, (a, b) in nb.items():
        sel = q == k
        keep |= sel & (c >= a) & (c > b)
    return keep


def _edge_core(values: np.ndarray, sigma_px: float, noise: float, low: float, high: float,
               contrast_floor: float = 0.2):
    valid = np.isfinite(values)
    img = fill_nan(values)
    sm = ndi.gaussian_filter(img, sigma_px, mode="nearest")
    gx = ndi.sobel(sm, axis=1)
    gy = ndi.sobel(sm, axis=0)
    block = int(max(32, round(16 * sigma_px)))
    if min(img.shape) >= 2 * block:
        gx = gx - _block_median(gx, block)
        gy = gy - _block_median(gy, block)
    if valid.all():
        inner = valid
    else:
        # isolated missing points are filled; only large gaps (an interrupted
        # sweep) are kept away from, by the reach of the smoothing kernel
        lab, _ = ndi.label(~valid)
        sizes = np.bincount(lab.ravel())
        big = (sizes > 4)[lab] & (lab > 0)
        inner = ~ndi.binary_dilation(big, iterations=int(np.ceil(2 * sigma_px)) + 1) if big.any() else np.ones_like(valid)
    # per-axis white-noise level from pixel differences (robust to the few
    # differences that straddle a line); the y one also holds residual row noise
    noise_y = _noise_core(values.T)
    gain = gradient_noise_gain(sigma_px)
    sx = gain * noise
    sy = gain * max(noise, noise_y if np.isfinite(noise_y) else noise)
    nx_, ny_ = gx / sx, gy / sy
    mag = np.hypot(nx_, ny_)
    keep = _nms(nx_, ny_, mag)
    keep &= inner
    keep[[0, -1], :] = False
    keep[:, [0, -1]] = False
    m = np.where(keep, mag, 0.0)
    # contrast floor: at high SNR, weak structure (sensor curvature, residual
    # ramps) is far above the noise; keep only edges within a factor of the
    # strong ones (common practice for Canny thresholds, no source)
    strong = m[m > high]
    if contrast_floor > 0 and strong.size >= 20:
        ref = float(np.percentile(strong, 95))
        high = max(high, contrast_floor * ref)
        low = max(low, 0.5 * contrast_floor * ref)
    edges = apply_hysteresis_threshold(m, low, high)
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
    measured noise, so the same settings serve maps of any signal unit.
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
