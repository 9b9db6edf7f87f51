"""NaN-aware smoothing helpers (normalised convolution)."""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi


def nan_gaussian(values: np.ndarray, sigma: float | tuple[float, float]) -> np.ndarray:
    """Gaussian smoothing that ignores NaN (normalised convolution).

    Points with no finite neighbour within the kernel stay NaN.

    References
    ----------
    H. Knutsson and C.-F. Westin, "Normalized and differential convolution",
    Proc. IEEE CVPR (1993), doi:10.1109/CVPR.1993.341081.
    """
    a = np.asarray(values, dtype=np.float64)
    finite = np.isfinite(a)
    if finite.all():
        return ndi.gaussian_filter(a, sigma, mode="nearest")
    w = ndi.gaussian_filter(finite.astype(np.float64), sigma, mode="nearest")
    s = ndi.gaussian_filter(np.where(finite, a, 0.0), sigma, mode="nearest")
    with np.errstate(invalid="ignore", divide="ignore"):
        out = s / w
    out[w < 1e-6] = np.nan
    return out


def fill_nan(values: np.ndarray, sigma: float = 2.0) -> np.ndarray:
    """Replace NaN by a NaN-aware local mean (wider kernels where needed)."""
    a = np.asarray(values, dtype=np.float64)
    if np.isfinite(a).all():
        return a.copy()
    out = a.copy()
    s = sigma
    for _ in range(8):
        miss = ~np.isfinite(out)
        if not miss.any():
            break
        sm = nan_gaussian(a, s)
        out[miss] = sm[miss]
        s *= 2.0
    out[~np.isfinite(out)] = np.nanmedian(a)
    return out
