"""A one-pole low-pass on the read-out along the fast axis: measured from the noise and undone.

A lock-in time constant or an RC filter comparable with the time per point
turns each sample into ``y[n] = a y[n−1] + (1 − a) x[n]`` (``a = e^{−Δt/τ}``,
τ in points) along the measurement time, i.e. along each row. Every
transition line is then moved by about ``a/(1 − a)`` points along the sweep
and, worse, broadened along x: Fermi widths across steep lines, and the
lever arms taken from them, come out too large.

Estimate. The mixed second difference ``f = Δ_x Δ_y v`` (a row minus the row
before — or, on a serpentine sweep, the row of the same direction two rows
before — then differenced along x) cancels the stability pattern, the
smooth background and row offsets, and leaves the noise filtered along x.
For white noise behind the filter, consecutive values of ``f`` along x
correlate as ``ρ₁ = −(1 − a)/2`` and ``ρ₂ = −a(1 − a)/2`` (the first difference
of an AR(1) process: G. E. P. Box and G. M. Jenkins, *Time Series
Analysis*, Holden-Day 1970, ch. 3), so ``a₁ = 1 + 2ρ₁`` and ``a₂ = ρ₂/ρ₁``
must agree (the exponential shape of a one-pole filter; a telegraph switch,
a residual tone or a slow drift do not give it). What the lines leave in
``f`` is masked (local mean of ``|f|`` above :data:`MASK_LEVEL` robust σ,
dilated); what remains of them (and any isotropic correlated noise) shows
along y too, where the filter puts nothing, so the excess of the same
statistic along y is subtracted from ``a₁``.

Direction. Rows are taken as measured towards increasing column index (the
order a file stores them in), unless the lines' x-derivatives say otherwise:
a causal smear gives every step a long tail after it, and
``T = Σ d_n d_{n+1} (|d_n| − |d_{n+1}|) / Σ |d|³`` (``d`` the x-differences) is
positive for tails towards increasing x and negative for the reverse, zero
for symmetric lines. On a serpentine sweep the rows of one parity run the
other way; which one is forward follows from the sign of their shift.

Correction. The inverse filter ``x[n] = (y[n] − a y[n−1]) / (1 − a)`` along
each row in its measurement direction (the first point of a row is kept).
It restores the lines' shape and position and returns the noise that passed
through the filter to white, at its original level.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy import ndimage as ndi

__all__ = ["MIN_COEFFICIENT", "RowLowPass", "agrees_with_shift", "row_low_pass", "undo_row_low_pass"]

#: Smallest filter coefficient ``a`` that is undone (τ ≈ 0.6 points: below it the
#: estimate's own bias, up to ~0.1 on high-SNR maps, is comparable with ``a``).
MIN_COEFFICIENT = 0.2
#: The lag-2 estimate must agree with the lag-1 estimate to this plus 3 of its own standard errors
#: (dense, broad lines of a 4-dot array at 0.4 K gave a₁ ≈ 0.2–0.35 with a₂ 0.04–0.17: not a filter).
SHAPE_TOLERANCE = 0.05
#: Largest coefficient undone (τ ≈ 20 points: beyond it the filter is an averaging over the row).
MAX_COEFFICIENT = 0.95
#: Mask of the lines: local mean of |f| (5×5) above this many robust σ of f, or |f| above 4 σ.
MASK_LEVEL = 1.25
#: The estimator's reading of the across-row statistic on white noise (200² maps, measured).
REFERENCE_ON_NOISE = 0.04
#: |T| from which the lines' asymmetry sets the direction of a row-major sweep.
MIN_ASYMMETRY = 0.02
#: Fewest pairs of unmasked values along x for an estimate.
MIN_PAIRS = 2000
#: Largest fraction of the mixed differences masked as lines: beyond it the lines cover the map and
#: their tails, not the noise, set the correlations (dense broad lines of a 4-dot array at 0.4 K:
#: 57–76 % masked, a₁ ≈ 0.3 without a filter; filtered probe maps: at most 43 %).
MAX_MASKED = 0.5
#: Largest window (points per side, at the map's centre) the estimate reads.
MAX_WINDOW = 384


@dataclass(frozen=True)
class RowLowPass:
    """A one-pole low-pass along the rows, as measured.

    Attributes
    ----------
    coefficient : float
        ``a = e^{−1/τ}`` per point after the across-row correction (NaN when
        not measurable).
    stderr : float
        Its uncertainty: the statistical error and the size of the
        across-row correction, in quadrature.
    lag1, lag2, across : float
        The raw estimates ``a₁``, ``a₂`` and the across-row reading.
    lag2_stderr : float
        Statistical error of ``a₂`` (``σ(ρ₂)/|ρ₁|``).
    forward : bool
        Rows (the even ones on a serpentine sweep) measured towards increasing column index.
    serpentine : bool
        Alternate rows run the other way.
    asymmetry : float
        The lines' tail statistic ``T`` (NaN on a serpentine, or when no filter was found).
    """

    coefficient: float
    stderr: float
    lag1: float
    lag2: float
    across: float
    lag2_stderr: float = float("nan")
    forward: bool = True
    serpentine: bool = False
    asymmetry: float = float("nan")

    @property
    def direction_from(self) -> str:
        """What set the direction: ``"serpentine shift"``, ``"line tails"`` or ``"stored order"``."""
        if self.serpentine:
            return "serpentine shift"
        return "line tails" if self._tails_clear else "stored order"

    @property
    def _tails_clear(self) -> bool:
        """The lines' tail statistic is at least :data:`MIN_ASYMMETRY` either way."""
        return bool(np.isfinite(self.asymmetry) and abs(self.asymmetry) >= MIN_ASYMMETRY)

    @property
    def tau_points(self) -> float:
        """Time constant in points, ``−1/ln a`` (NaN unless ``0 < a < 1``)."""
        a = self.coefficient
        return float(-1.0 / np.log(a)) if 0 < a < 1 else float("nan")

    @property
    def tau_stderr_points(self) -> float:
        """Standard error of :attr:`tau_points` (``dτ/da = τ²/a``)."""
        t = self.tau_points
        return float(t * t / self.coefficient * self.stderr) if np.isfinite(t) else float("nan")

    @property
    def significant(self) -> bool:
        """Coefficient in [MIN, MAX], lag-2 shape consistent, above 3 standard errors."""
        a, e = self.coefficient, self.stderr
        if not (np.isfinite(a) and np.isfinite(e)):
            return False
        return bool(MIN_COEFFICIENT <= a <= MAX_COEFFICIENT and a >= 3 * e
                    and abs(self.lag2 - self.lag1) <= SHAPE_TOLERANCE + 3 * self.lag2_stderr)


def row_low_pass(values: np.ndarray, *, serpentine: bool = False, odd_rows_forward: bool = False) -> RowLowPass:
    """Measure a one-pole low-pass along the rows (axis 1) of a map from its noise (NaN-aware).

    Parameters
    ----------
    values : ndarray, shape (ny, nx)
        The map, rows along the fast axis, columns in measurement order.
    serpentine : bool
        Alternate rows were measured in opposite directions.
    odd_rows_forward : bool
        On a serpentine sweep: the odd rows run towards increasing column index.

    Returns
    -------
    RowLowPass
    """
    v = np.asarray(values, float)
    step = 2 if serpentine else 1
    nan = RowLowPass(float("nan"), float("nan"), float("nan"), float("nan"), float("nan"))
    if v.ndim != 2 or v.shape[0] < step + 3 or v.shape[1] < 8:
        return nan
    # a filter is the instrument's, the same all over the map: a central window of at most
    # MAX_WINDOW² points is plenty for the correlations (statistical error ≈ 0.01)
    v = _central_window(v, MAX_WINDOW)
    f = np.diff(v[step:] - v[:-step], axis=1)
    bad = _line_mask(f)
    (r1, r2), n_pairs = _lag_correlations(f, bad, (1, 2))
    (q,), _ = _lag_correlations(f.T, bad.T, (step,))
    if n_pairs < MIN_PAIRS or bad.mean() > MAX_MASKED or not (np.isfinite(r1) and np.isfinite(q)) or r1 >= 0:
        return nan
    lag1, lag2 = 1 + 2 * r1, r2 / r1
    across = 1 + 2 * q  # (lag `step` across rows: f's rows share one row of the map there)
    excess = max(across - REFERENCE_ON_NOISE, 0.0)
    a = lag1 - excess
    # f's values along x are themselves pairwise differences: about 1.5× the independent-sample error
    se_rho = 1.5 / np.sqrt(n_pairs)
    err = float(np.hypot(2 * se_rho, excess))
    found = RowLowPass(float(a), err, float(lag1), float(lag2), float(across), lag2_stderr=float(se_rho / abs(r1)))
    if serpentine:
        return replace(found, forward=not odd_rows_forward, serpentine=True)
    if not found.significant:
        return found
    measured = replace(found, asymmetry=tail_asymmetry(v))
    # tails towards lower column index mean rows swept that way; otherwise the stored order stands
    return replace(measured, forward=not (measured._tails_clear and measured.asymmetry < 0))


def agrees_with_shift(lp: RowLowPass, shift_px: float) -> bool:
    """Whether a serpentine's alternate-row shift is what the filter ``lp`` makes of it.

    A one-pole filter delays a step by ``a/(1 − a)`` points on average (the
    mean of its geometric impulse response) and by less at its steepest
    point; rows swept both ways then sit apart by between one and two such
    delays (measured on generator maps, ``tests/test_preprocess_serpentine.py``).
    Accepted: ``|shift|`` within [0.8, 2.5] mean delays. A coefficient read
    from noise that other artefacts correlate (a switching sensor, a residual
    tone) comes out too large and fails it.
    """
    a = lp.coefficient
    if not (np.isfinite(a) and 0 < a < 1 and np.isfinite(shift_px)):
        return False
    delay = a / (1 - a)
    return bool(0.8 * delay <= abs(shift_px) <= 2.5 * delay)


def tail_asymmetry(values: np.ndarray) -> float:
    """The lines' tail statistic ``T`` along x (> 0: tails towards increasing column index)."""
    d = np.diff(np.asarray(values, float), axis=1)
    d0, d1 = d[:, :-1], d[:, 1:]
    with np.errstate(invalid="ignore"):
        den = np.nansum(np.abs(d) ** 3)
        return float(np.nansum(d0 * d1 * (np.abs(d0) - np.abs(d1))) / den) if den > 0 else float("nan")


def undo_row_low_pass(values: np.ndarray, lp: RowLowPass) -> np.ndarray:
    """Apply the inverse filter ``(y[n] − a y[n−1]) / (1 − a)`` along each row in its measurement direction.

    The first point of each row is kept; a missing point makes its own and
    the next point missing.
    """
    v = np.asarray(values, float)
    a = float(lp.coefficient)
    out = v.copy()
    forward_rows = np.ones(v.shape[0], bool)
    if lp.serpentine:
        forward_rows[1::2] = False
    if not lp.forward:
        forward_rows = ~forward_rows
    fw = v[forward_rows]
    out[forward_rows, 1:] = (fw[:, 1:] - a * fw[:, :-1]) / (1 - a)
    bw = v[~forward_rows]
    out[~forward_rows, :-1] = (bw[:, :-1] - a * bw[:, 1:]) / (1 - a)
    return out


def _central_window(v: np.ndarray, n: int) -> np.ndarray:
    """The central ``n × n`` points of ``v`` (all of it along an axis shorter than ``n``)."""
    i0, j0 = max((v.shape[0] - n) // 2, 0), max((v.shape[1] - n) // 2, 0)
    return v[i0 : i0 + n, j0 : j0 + n]


def _line_mask(f: np.ndarray) -> np.ndarray:
    """Where the lines (or missing points) leave their mark in ``f``: True = not used."""
    a = np.abs(f)
    finite = np.isfinite(a)
    s = 1.4826 * float(np.median(a[finite])) if finite.any() else float("nan")
    if not np.isfinite(s) or s <= 0:
        return np.ones(f.shape, bool)
    a[~finite] = 10 * s
    local = ndi.uniform_filter(a, 5, mode="nearest")
    bad = (local > MASK_LEVEL * s) | (a > 4 * s) | ~finite
    # dilated by one point (a 3×3 maximum: the same as a binary dilation, separable)
    return ndi.maximum_filter(bad.view(np.uint8), size=3, mode="constant").view(bool)


def _lag_correlations(f: np.ndarray, bad: np.ndarray, lags) -> tuple[list[float], int]:
    """Correlations of ``f`` with itself ``k`` values along axis 1, unmasked values only; the lag-1 pair count."""
    z = np.where(bad, 0.0, f)
    g = (~bad).astype(float)
    n0 = g.sum()
    if n0 == 0:
        return [float("nan")] * len(lags), 0
    var = (z * z).sum() / n0
    out, n1 = [], 0
    for k in lags:
        n = (g[:, :-k] * g[:, k:]).sum()
        if k == lags[0]:
            n1 = int(n)
        out.append(float((z[:, :-k] * z[:, k:]).sum() / n / var) if n and var > 0 else float("nan"))
    return out, n1
