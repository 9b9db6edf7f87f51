"""Pickup at one frequency whose phase is random from row to row: fitted and subtracted row by row.

When each row is started at a moment of its own (a software-timed sweep that
starts every row after a variable delay), a mains tone keeps its frequency
along every row but starts each row at a random phase: neither a tone in
measurement time (:mod:`stabtool.preprocess.pickup`) nor a plane wave
(:mod:`stabtool.preprocess.stripes`).

Detection. The rows' periodograms of the x-differences (Hann window),
averaged over the rows, show the tone as one peak; its height over the
running median of the averaged spectrum must reach :data:`PEAK_RATIO`
(averaged over ~100–250 rows, the spectrum of a map without pickup stayed
below 5 on the held-out probe). The stability pattern also repeats along the
rows (the lines of one dot), but its phase moves steadily from row to row as
the lines run across the map: the rows' complex amplitudes ``c_i`` at the peak
are coherent, and the coherence ``κ = max_g |Σ_i c_i e^{−2πi g i}|² / (n_y Σ
|c_i|²)`` (1 for a plane wave, about ``ln n_y / n_y`` for random phases) must
stay below :data:`MAX_COHERENCE`. The frequency is refined to the maximum of
the summed least-squares power of all rows (each row its own amplitude and
phase: the maximum-likelihood frequency for that model in white noise, cf.
D. C. Rife and R. R. Boorstyn, IEEE Trans. Inf. Theory 20, 591 (1974)), and
the per-row sinusoids must leave no more than :data:`MAX_RESIDUAL_RATIO`
times the running median within ± 2 bins of the peak (nothing above the
noise).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage as ndi

from .pickup import running_level
from .stripes import row_differences

__all__ = ["MAX_COHERENCE", "MAX_RESIDUAL_RATIO", "PEAK_RATIO", "RowTone", "find_row_tone", "remove_row_tones"]

#: The rows' averaged periodogram must peak this many times above its running median.
PEAK_RATIO = 6.0
#: Largest coherence of the rows' amplitudes at the peak (a plane wave or the lines' pattern: 0.3–1).
MAX_COHERENCE = 0.2
#: What the per-row sinusoids leave within ± 2 bins of the peak must be at most this many times the
#: spectrum's running median there (the noise: a tone leaves nothing above it).
MAX_RESIDUAL_RATIO = 1.5
#: Fewest periods along a row, and the shortest period (points).
MIN_PERIODS_PER_ROW = 4.0
MIN_PERIOD = 2.2
#: Most tones removed.
MAX_TONES = 2


@dataclass(frozen=True, eq=False)
class RowTone:
    """A tone of one frequency along the rows with an amplitude and phase of its own in every row.

    (Compared by identity: its per-row coefficients are arrays.)

    Attributes
    ----------
    frequency : float
        Cycles per point along a row.
    amplitude : float
        Root-mean-square over the rows of the per-row amplitude (signal units).
    peak_ratio : float
        Peak of the rows' averaged periodogram over its running median.
    coherence : float
        ``κ`` of the rows' amplitudes at the peak.
    sin_coef, cos_coef : ndarray, shape (ny,)
        Per-row coefficients: row ``i`` carries ``sin_coef[i] sin(2π f j) + cos_coef[i] cos(2π f j)``.
    """

    frequency: float
    amplitude: float
    peak_ratio: float
    coherence: float
    sin_coef: np.ndarray = field(repr=False)
    cos_coef: np.ndarray = field(repr=False)

    @property
    def period_points(self) -> float:
        """Period along a row, points."""
        return 1.0 / self.frequency

    def signal(self, shape: tuple[int, int]) -> np.ndarray:
        """The tone on a map of ``shape``."""
        w = 2 * np.pi * self.frequency * np.arange(shape[1], dtype=float)
        return self.sin_coef[:, None] * np.sin(w)[None, :] + self.cos_coef[:, None] * np.cos(w)[None, :]


def find_row_tone(values: np.ndarray) -> RowTone | None:
    """The strongest tone with a random phase per row in a map (rows along x), or None.

    Parameters
    ----------
    values : ndarray, shape (ny, nx)

    Returns
    -------
    RowTone or None
    """
    v = np.asarray(values, float)
    if v.ndim != 2 or v.shape[0] < 16 or v.shape[1] < 16:
        return None
    d, ok = row_differences(v)
    if ok.mean() < 0.5:
        return None
    ny, nd = d.shape
    window = np.hanning(nd)[None, :]
    spec = np.fft.rfft(d * window, axis=1)
    mean_power = (np.abs(spec) ** 2).mean(axis=0)
    freq = np.fft.rfftfreq(nd)
    level = running_level(mean_power, max(15, nd // 20))
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where((freq >= MIN_PERIODS_PER_ROW / v.shape[1]) & (freq <= 1.0 / MIN_PERIOD),
                         mean_power / level, 0.0)
    k = int(np.argmax(np.nan_to_num(ratio)))
    if not ratio[k] >= PEAK_RATIO:
        return None
    c = spec[:, k]
    total = float(np.sum(np.abs(c) ** 2))
    kappa = float(np.max(np.abs(np.fft.fft(c)) ** 2) / (ny * total)) if total > 0 else 1.0
    if kappa > MAX_COHERENCE:
        return None
    # the fits leave out the lines' steps (spikes of the x-differences and their neighbours): with two
    # parameters per row, a step's projection on a long period would otherwise move the lines
    use = ok & ~_step_points(d, ok)
    dz = np.where(use, d, 0.0)
    # refine to the maximum of the rows' summed least-squares power within ± half a bin (nested grids)
    f, span = float(freq[k]), 0.5 / nd
    for _ in range(3):
        trials = f + span * np.linspace(-1, 1, 5)
        f = float(trials[int(np.argmax([_row_fits(dz, use, t)[2] for t in trials]))])
        span /= 4
    a, b, _ = _row_fits(dz, use, f)
    tone = RowTone(frequency=f, amplitude=float(np.sqrt(np.mean(a * a + b * b))), peak_ratio=float(ratio[k]),
                   coherence=kappa, sin_coef=a, cos_coef=b)
    rest = np.where(ok, d - np.diff(tone.signal(v.shape), axis=1), 0.0)
    after = (np.abs(np.fft.rfft(rest * window, axis=1)) ** 2).mean(axis=0)
    near = slice(max(k - 2, 0), k + 3)
    if not after[near].sum() <= MAX_RESIDUAL_RATIO * level[near].sum():
        return None
    return tone


def remove_row_tones(values: np.ndarray, *, max_tones: int = MAX_TONES) -> tuple[np.ndarray, list[RowTone]]:
    """``values`` without its random-phase row tones (up to ``max_tones``) and the tones removed."""
    v = np.asarray(values, float).copy()
    tones: list[RowTone] = []
    for _ in range(max_tones):
        t = find_row_tone(v)
        if t is None:
            break
        v = v - t.signal(v.shape)
        tones.append(t)
    return v, tones


def _step_points(d: np.ndarray, ok: np.ndarray) -> np.ndarray:
    """x-differences beyond 4 robust σ (the median absolute deviation of all of them) and 2 points either side."""
    sigma = 1.4826 * float(np.median(np.abs(d[ok]))) if ok.any() else 0.0
    if not sigma > 0:
        return np.zeros(d.shape, bool)
    big = ok & (np.abs(d) > 4 * sigma)
    return ndi.maximum_filter(big.view(np.uint8), size=(1, 5), mode="constant").view(bool)


def _row_fits(d: np.ndarray, ok: np.ndarray, f: float) -> tuple[np.ndarray, np.ndarray, float]:
    """Per-row least-squares ``(a_i, b_i)`` of ``a sin + b cos`` at ``f`` fitted to the x-differences; their summed power."""
    nd = d.shape[1]
    w = 2 * np.pi * f * np.arange(nd + 1, dtype=float)
    ds, dc = np.diff(np.sin(w)), np.diff(np.cos(w))
    m = ok.astype(float)
    g11, g12, g22 = m @ (ds * ds), m @ (ds * dc), m @ (dc * dc)
    r1, r2 = d @ ds, d @ dc  # (d is 0 at missing points)
    det = g11 * g22 - g12 * g12
    with np.errstate(divide="ignore", invalid="ignore"):
        a = np.where(det > 0, (g22 * r1 - g12 * r2) / det, 0.0)
        b = np.where(det > 0, (g11 * r2 - g12 * r1) / det, 0.0)
    return a, b, float(np.sum(a * r1 + b * r2))
