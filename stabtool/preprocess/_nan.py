"""NaN-aware helpers: smoothing (normalised convolution) and row medians of selected entries."""

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


def kept_row_medians(d: np.ndarray, keep: np.ndarray, cnt: np.ndarray) -> np.ndarray:
    """Median of the ``keep`` entries of each row of ``d`` (``cnt`` of them; garbage where none).

    The same number as :func:`numpy.median` of the kept entries (bit for bit; tests).

    One selection instead of a sort: of the e left-out entries of a row,
    ⌊e/2⌋ become −∞ and the rest +∞, so the kept order statistics
    ``(c−1)//2`` and ``c//2`` land on the full row's ``n//2 − 1`` or ``n//2``
    (n = c + e, checked for every parity of c and e).
    """
    n = d.shape[1]
    out = np.where(keep, d, np.inf)
    drop = ~keep
    low = drop & (np.cumsum(drop, axis=1) <= ((n - cnt) // 2)[:, None])
    out[low] = -np.inf
    h = n // 2
    out.partition((max(h - 1, 0), h), axis=1)
    f = (n - cnt) // 2
    r = np.arange(d.shape[0])
    lo = np.clip(f + (cnt - 1) // 2, 0, n - 1)
    hi = np.clip(f + cnt // 2, 0, n - 1)
    with np.errstate(invalid="ignore"):  # rows with nothing kept: −∞ + ∞
        return (out[r, lo] + out[r, hi]) / 2
