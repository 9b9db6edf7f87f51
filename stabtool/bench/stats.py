"""Statistics of the benchmark: error percentiles and the silent-failure rule.

Percentiles use linear interpolation between order statistics (NumPy's
default ``method="linear"``, Hyndman & Fan type 7), ignoring NaN (a quantity
that was not reported counts against coverage, not against the error).

References
----------
R. J. Hyndman and Y. Fan, "Sample quantiles in statistical packages",
The American Statistician 50, 361 (1996), doi:10.2307/2684934.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np

from .bounds import FITTER_BOUNDS, FitterBounds
from .compare import Comparison

__all__ = [
    "CHECKED_GROUPS",
    "ErrorStats",
    "SilentVerdict",
    "error_stats",
    "nan_percentile",
    "silent_failure",
]

#: Groups the silent-failure rule checks (slopes have no per-map fitter bound).
CHECKED_GROUPS: tuple[str, ...] = ("virtual_gate", "cdg", "lever_arm", "charging_energy")


def nan_percentile(values: Iterable[float], q: float | Sequence[float]) -> float | np.ndarray:
    """Percentile(s) ``q`` (0–100) of the finite-or-inf, non-NaN ``values``.

    Linear interpolation (NumPy's default). An empty input gives NaN.
    ``inf`` values are kept (an infinite relative error is a real failure).
    """
    arr = np.asarray(list(values), dtype=float)
    arr = arr[~np.isnan(arr)]
    qs = np.atleast_1d(np.asarray(q, dtype=float))
    if np.any((qs < 0) | (qs > 100)):
        raise ValueError(f"percentile q must lie in [0, 100], got {q!r}")
    if arr.size == 0:
        out = np.full(qs.shape, np.nan)
    else:
        # Linear interpolation between order statistics (Hyndman & Fan type 7),
        # written out so that an infinite error stays infinite instead of
        # turning into NaN through inf - inf.
        s = np.sort(arr)
        pos = qs / 100.0 * (s.size - 1)
        lo = np.floor(pos).astype(int)
        hi = np.minimum(lo + 1, s.size - 1)
        frac = pos - lo
        a, b = s[lo], s[hi]
        with np.errstate(invalid="ignore"):
            interp = a + frac * (b - a)
        out = np.where(frac == 0, a, np.where(np.isinf(a), a, np.where(np.isinf(b), b, interp)))
    return float(out[0]) if np.ndim(q) == 0 else out


@dataclass(frozen=True)
class ErrorStats:
    """Summary of one error over a set of maps.

    Attributes
    ----------
    n : int
        Number of maps with a value.
    median, p95 : float
        50th and 95th percentile (NaN when ``n == 0``).
    p5, p25, p75 : float
        Further percentiles, for the bands of the plots.
    """

    n: int
    median: float
    p95: float
    p5: float
    p25: float
    p75: float

    def to_dict(self) -> dict:
        """Plain-dict form (floats as they are; the JSON writer maps NaN to null)."""
        return {"n": self.n, "median": self.median, "p95": self.p95,
                "p5": self.p5, "p25": self.p25, "p75": self.p75}


def error_stats(values: Iterable[float]) -> ErrorStats:
    """Median, 95th and band percentiles of ``values`` (NaN ignored)."""
    arr = np.asarray(list(values), dtype=float)
    n = int(np.count_nonzero(~np.isnan(arr)))
    p5, p25, med, p75, p95 = np.atleast_1d(nan_percentile(arr, [5, 25, 50, 75, 95]))
    return ErrorStats(n=n, median=float(med), p95=float(p95), p5=float(p5),
                      p25=float(p25), p75=float(p75))


@dataclass(frozen=True)
class SilentVerdict:
    """Outcome of the silent-failure rule on one map.

    ``silent`` is True when the quality verdict was ``ok`` but at least one
    reported quantity is beyond its bound; ``reasons`` names each such
    quantity (one line each). ``beyond`` lists the groups beyond their bound
    whatever the verdict (useful to see how often a doubtful flag was right).
    """

    silent: bool
    beyond: tuple[str, ...]
    reasons: tuple[str, ...]

    def __bool__(self) -> bool:
        return self.silent


def silent_failure(
    comparison: Comparison,
    *,
    ok: bool,
    snr: float,
    bounds: FitterBounds = FITTER_BOUNDS,
) -> SilentVerdict:
    """Apply the silent-failure rule to one compared result.

    Parameters
    ----------
    comparison : Comparison
        Errors of the result against the truth.
    ok : bool
        The result's quality verdict.
    snr : float
        Signal-to-noise ratio of the map (selects the virtual-gate bound).
    bounds : FitterBounds
        The bounds (default: :data:`~stabtool.bench.bounds.FITTER_BOUNDS`).

    Notes
    -----
    Each checked group's worst *reported* element is compared with its bound
    (virtual-gate elements in absolute terms, the rest relative). A quantity
    that was not reported (null) is never beyond its bound: null is an honest
    answer. An infinite error (a non-zero estimate of a zero truth) is beyond.
    """
    limits = bounds.for_snr(snr)
    beyond: list[str] = []
    reasons: list[str] = []
    for group in CHECKED_GROUPS:
        err = comparison.primary(group)
        if not math.isnan(err) and err > limits[group]:
            beyond.append(group)
            kind = "abs" if group == "virtual_gate" else "rel"
            reasons.append(f"{group}: {kind} error {err:.4g} > bound {limits[group]:g}")
    return SilentVerdict(silent=bool(ok) and bool(beyond), beyond=tuple(beyond),
                         reasons=tuple(reasons))
