"""Robust noise level of a map."""

from __future__ import annotations

import numpy as np
import xarray as xr

from ._checks import as_map_array

__all__ = ["estimate_noise_level"]

#: 1/Φ⁻¹(3/4): converts a median absolute deviation to a Gaussian σ.
MAD_TO_SIGMA = 1.482602218505602


def _median_inplace(a: np.ndarray) -> float:
    """Median of a 1-D scratch array of finite values (possibly reordered); equals ``np.median(a)``."""
    n = a.size
    h = n // 2
    if n % 2:
        return float(_order_statistics(a, (h,))[0])
    lo, hi = _order_statistics(a, (h - 1, h))
    return float((lo + hi) / 2)


#: Arrays from this size on select their order statistics inside a bracket (see _order_statistics).
BRACKET_MIN_SIZE = 8192
#: Size of the strided sample that places the bracket.
BRACKET_SAMPLE = 2048


def _order_statistics(a: np.ndarray, ks: tuple[int, ...]) -> np.ndarray:
    """The ``ks``-th smallest values of the finite 1-D array ``a`` (exact; ``a`` may be reordered).

    A large array is first cut to a bracket around the wanted ranks, placed
    by the sorted values of a strided sample (±5 binomial standard errors of
    the sample quantile, plus a margin); when the bracket holds the ranks —
    the count below it at most the smallest rank and the count up to its top
    above the largest — the values are selected among its few elements
    instead of the whole array (the same values, at a fraction of the cost
    of partitioning it all). Otherwise, and for small arrays, ``a`` is
    partitioned in place (introselect, :meth:`numpy.ndarray.partition`).
    """
    n = a.size
    if n >= BRACKET_MIN_SIZE:
        sample = np.sort(a[:: n // BRACKET_SAMPLE])
        m = sample.size
        q_lo, q_hi = min(ks) / n, max(ks) / n
        half = 5.0 * np.sqrt(0.25 / m) + 2.0 / m
        lo_v = sample[max(int(np.floor((q_lo - half) * m)), 0)]
        hi_v = sample[min(int(np.ceil((q_hi + half) * m)), m - 1)]
        inside = (a >= lo_v) & (a <= hi_v)
        below = int(np.count_nonzero(a < lo_v))
        mid = a[inside]
        if below <= min(ks) and max(ks) < below + mid.size:
            rel = [k - below for k in ks]
            mid.partition(rel)
            return mid[rel]
    a.partition(list(ks))
    return a[list(ks)]


def _noise_from_diffs(d: np.ndarray) -> float:
    """σ = 1.4826 · MAD / √2 of neighbour differences ``d`` (any shape; a scratch array, reordered)."""
    d = d.ravel()
    fin = np.isfinite(d)
    if not fin.all():
        d = d[fin]
    if d.size < 8:
        return float("nan")
    med = _median_inplace(d)
    dev = np.abs(np.subtract(d, med, out=d), out=d)
    return float(MAD_TO_SIGMA * _median_inplace(dev) / np.sqrt(2.0))


#: Differences used by the pipeline's noise estimates at most (every k-th row
#: beyond): the MAD of 2¹⁸ samples has a relative standard error of about
#: 0.2 %, far below anything the thresholds resolve.
MAX_NOISE_SAMPLES = 2**18


def _noise_core(values: np.ndarray, max_samples: int | None = None) -> float:
    """σ from the differences along x; with ``max_samples``, of every k-th row only (k ≥ 1)."""
    if max_samples is not None and values.size > max_samples:
        values = values[:: int(np.ceil(values.size / max_samples))]
    return _noise_from_diffs(np.diff(values, axis=1))


def estimate_noise_level(da: xr.DataArray) -> float:
    """White-noise σ of a map from differences along the fast axis (x).

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)
        The map (NaN allowed).

    Returns
    -------
    float
        ``σ = 1.4826 · MAD(Δ_x s) / √2`` in signal units. Differences along
        the fast axis are immune to slow-axis (1/f) row offsets; the median
        ignores the few differences that straddle a transition line.

    Notes
    -----
    The MAD estimator of scale, F. R. Hampel, "The influence curve and its
    role in robust estimation", J. Am. Stat. Assoc. 69, 383 (1974),
    doi:10.1080/01621459.1974.10482962.
    """
    values, _, _ = as_map_array(da)
    return _noise_core(values)
