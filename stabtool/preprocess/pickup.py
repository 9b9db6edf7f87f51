"""Periodic pickup (mains hum and its kin) in measurement time: found and subtracted.

A map is measured point by point, rows along x one after the other. A
sinusoidal interference of fixed frequency — mains pickup, a pulse-tube
cycle, a ground loop — adds ``A sin(2π f t + φ)`` in that measurement time
``t = k·n_x + j``: straight stripes across the map, which an edge detector
takes for transition lines.

Detection. In the spectrum of the time-ordered samples (differenced, so
that the charge steps, broadband, and the slow drifts weigh little; Hann
window) a pickup is one narrow peak far above the local spectral level.
Structure that repeats from row to row — every transition line, and the
stability pattern as a whole — puts its power on the row harmonics ``m/n_x``
and next to them, so only frequencies at least :data:`OFF_GRID` of a row
harmonic spacing away from them are searched, and a peak must stand
:data:`PEAK_RATIO` times above the running median of the spectrum. The frequency is then refined by maximising the
least-squares sinusoid's amplitude within one bin (the periodogram maximum,
the maximum-likelihood frequency of one sinusoid in white noise: D. C. Rife
and R. R. Boorstyn, IEEE Trans. Inf. Theory 20, 591 (1974),
doi:10.1109/TIT.1974.1055282), and the sinusoid fitted there by least squares
is subtracted — provided it explains its peak: a stable tone removes all the
power within a few bins of it (≥ :data:`MIN_EXPLAINED`), while structure of
the map that happens to peak off the row harmonics changes along the sweep
and leaves some. Up to :data:`MAX_TONES` tones are removed one after the
other (harmonics of the mains are tones of their own). Measured on the
held-out probe (mains pickup of period 6–40 points and 0.2–0.8 charge steps):
off-grid peaks of 67–1135 on 27 of 48 maps, every one explained to ≥ 0.995
(26 above the threshold, so removed); on 224 maps without pickup (ordinary,
row walk, telegraph) the highest off-grid peaks reached 96 and explained at
most 0.98.

One dot's transitions alone (equally spaced parallel lines over the whole
map, shallow enough to cross the rows) repeat along each row and shift from
row to row: off the row harmonics too, and explained by a sinusoid almost as
well as a tone. Their differences are a pulse train, though, with a second
harmonic about as strong as the fundamental, which a tone lacks: such a peak
and its harmonics are passed over (:func:`_is_pulse_train`).
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import pairwise

import numpy as np
from scipy.fft import next_fast_len

__all__ = ["MAX_TONES", "MIN_EXPLAINED", "OFF_GRID", "PEAK_RATIO", "Pickup", "find_pickup", "remove_pickup", "running_level"]

#: A peak must stand this many times above the running median of the spectrum.
PEAK_RATIO = 100.0
#: The fitted sinusoid must remove at least this fraction of the power around its peak.
MIN_EXPLAINED = 0.99
#: Least distance of a searched frequency from a row harmonic m/n_x, in units of 1/n_x.
OFF_GRID = 0.15
#: Most tones removed.
MAX_TONES = 3
#: A peak whose second harmonic holds at least this share of its power (differences) ...
HARMONIC_POWER_SHARE = 0.01
#: ... standing this many times (in power) above the local level is a staircase of charge lines.
HARMONIC_PEAK_RATIO = 10.0
#: Staircases passed over in one search for a tone.
MAX_STAIRCASES = 2
#: Shortest period searched (points); longer than about a row's worth of points is drift, not pickup.
MIN_PERIOD = 2.2


@dataclass(frozen=True)
class Pickup:
    """One sinusoid in measurement time (row-major sample index ``t``).

    Attributes
    ----------
    frequency : float
        Cycles per sample.
    amplitude : float
        In the map's signal units.
    phase : float
        Radians: the tone is ``amplitude · sin(2π frequency t + phase)``.
    peak_ratio : float
        Height of its spectral peak over the running median.
    """

    frequency: float
    amplitude: float
    phase: float
    peak_ratio: float

    @property
    def period_points(self) -> float:
        """Period in samples."""
        return 1.0 / self.frequency

    def signal(self, shape: tuple[int, int]) -> np.ndarray:
        """The tone on a map of ``shape`` (rows measured one after the other along x)."""
        t = np.arange(shape[0] * shape[1], dtype=float)
        return (self.amplitude * np.sin(2 * np.pi * self.frequency * t + self.phase)).reshape(shape)


def _fit_tone(y: np.ndarray, ok: np.ndarray, t: np.ndarray, f: float) -> tuple[float, float, float]:
    """Least-squares ``a sin + b cos`` at ``f`` on the samples ``ok``: (amplitude, phase, a² + b²)."""
    w = 2 * np.pi * f * t[ok]
    s, c = np.sin(w), np.cos(w)
    yy = y[ok]
    m = np.array([[s @ s, s @ c], [s @ c, c @ c]])
    rhs = np.array([s @ yy, c @ yy])
    try:
        a, b = np.linalg.solve(m, rhs)
    except np.linalg.LinAlgError:
        return 0.0, 0.0, 0.0
    return float(np.hypot(a, b)), float(np.arctan2(b, a)), float(a * a + b * b)


def find_pickup(values: np.ndarray, *, snake: bool = False) -> Pickup | None:
    """The strongest pickup tone of a map (rows along x, measured one after another), or None.

    ``snake``: the rows were swept back and forth (odd rows from high to low
    x); the tone is then sought in that time order, where a pattern repeating
    row to row repeats every two rows.
    """
    v = _in_time_order(np.asarray(values, float), snake)
    ny, nx = v.shape
    n = ny * nx
    if ny < 4 or nx < 8:
        return None
    y = v.ravel()
    ok = np.isfinite(y)
    if ok.sum() < 0.5 * n:
        return None
    y = np.where(ok, y - np.nanmean(y), 0.0)
    d = _time_differences(y, ok, nx)
    n_fft = next_fast_len(d.size, real=True)  # (zero padding: a prime length would be slow)
    spec = _spectrum(d, n_fft)
    freq = np.fft.rfftfreq(n_fft)
    bg = running_level(spec, max(31, spec.size // 50))
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = spec / bg
    period = 2 * nx if snake else nx  # (a serpentine pattern repeats after a forward and a backward row)
    grid = np.abs(freq * period - np.round(freq * period))
    search = (freq > 1.0 / nx) & (freq < 1.0 / MIN_PERIOD) & (grid > OFF_GRID) & np.isfinite(ratio)
    if not search.any():
        return None
    cand = np.where(search, ratio, 0.0)
    for _ in range(MAX_STAIRCASES + 1):
        k = int(np.argmax(cand))
        if not cand[k] >= PEAK_RATIO:
            return None
        if not _is_pulse_train(spec, bg, k, n_fft):
            break
        # one dot's staircase along the rows: its harmonic series is left out of the search
        for m in range(1, int(0.5 * n_fft / max(k, 1)) + 2):
            h = _harmonic_index(m, k, n_fft)
            cand[max(h - 2, 0) : h + 3] = 0.0
    else:
        return None
    # refine within ± one bin of the differenced series (the periodogram maximum)
    t = np.arange(n, dtype=float)
    df = freq[1] - freq[0]
    trial = freq[k] + np.linspace(-df, df, 41)
    power = [_fit_tone(y, ok, t, f)[2] for f in trial]
    f_best = float(trial[int(np.argmax(power))])
    amp, phase, _ = _fit_tone(y, ok, t, f_best)
    tone = Pickup(frequency=f_best, amplitude=amp, phase=phase, peak_ratio=float(ratio[k]))
    # a tone explains its peak: what the pure sinusoid leaves within ± 4 bins must be a trace
    # (the structure of the map concentrated off the row harmonics leaves 2–60 % there)
    rest = np.where(ok, y - tone.signal((ny, nx)).ravel(), 0.0)
    after = _local_power(_spectrum(_time_differences(rest, ok, nx), n_fft), k)
    if not after <= (1.0 - MIN_EXPLAINED) * _local_power(spec, k):
        return None
    return tone


def _harmonic_index(m: int, k: int, n_fft: int) -> int:
    """The rfft bin of harmonic ``m`` of bin ``k`` (of an ``n_fft``-point transform), folded about Nyquist."""
    h = (m * k) % n_fft
    return n_fft - h if h > n_fft // 2 else h


def _is_pulse_train(spec: np.ndarray, bg: np.ndarray, k: int, n_fft: int) -> bool:
    """Whether the peak at bin ``k`` has a strong second harmonic: one dot's staircase, not a tone.

    Equally spaced parallel charge lines crossing the rows (one dot's transitions over the whole
    map) repeat along each row and shift from row to row; in measurement time that is a nearly
    pure periodic signal, but a train of narrow pulses in the differences, with a second
    harmonic about as strong as the fundamental. A tone is a sinusoid, and mains pickup, being
    half-wave symmetric, has odd harmonics only (see :mod:`stabtool.preprocess.stripes`, which
    applies the same test to plane waves).
    """
    h = _harmonic_index(2, k, n_fft)
    if h < 1:
        return False
    lo, hi = max(h - 2, 0), min(h + 3, spec.size)
    j = lo + int(np.argmax(spec[lo:hi]))
    p2, p1 = float(spec[j]) ** 2, float(spec[k]) ** 2
    return bool(p2 >= HARMONIC_POWER_SHARE * p1 and spec[j] >= np.sqrt(HARMONIC_PEAK_RATIO) * bg[j])


def _time_differences(y: np.ndarray, ok: np.ndarray, nx: int) -> np.ndarray:
    """Successive differences of the time series ``y``; 0 across a row's end and next to a missing point."""
    d = np.diff(y)
    d[nx - 1 :: nx] = 0.0  # the jump from the end of one row to the start of the next
    d[~(ok[1:] & ok[:-1])] = 0.0
    return d


def running_level(spec: np.ndarray, size: int) -> np.ndarray:
    """Local level of a spectrum: medians of blocks of ``size`` bins, interpolated between their centres.

    (A running median of the same width, at a fraction of its cost on long series; a narrow
    peak moves neither.)
    """
    nb = max(1, spec.size // size)
    edges = np.linspace(0, spec.size, nb + 1).astype(int)
    med = np.array([np.median(spec[a:b]) for a, b in pairwise(edges)])
    centres = 0.5 * (edges[:-1] + edges[1:] - 1)
    return np.interp(np.arange(spec.size), centres, med)


def _spectrum(d: np.ndarray, n_fft: int) -> np.ndarray:
    """Amplitude spectrum of ``d`` through a Hann window, zero-padded to ``n_fft`` points."""
    return np.abs(np.fft.rfft(d * np.hanning(d.size), n_fft))


def _local_power(spec: np.ndarray, k: int, half: int = 4) -> float:
    """Power of the amplitude spectrum ``spec`` in the bins ``k ± half``."""
    return float((spec[max(k - half, 0) : k + half + 1] ** 2).sum())


def remove_pickup(values: np.ndarray, *, max_tones: int = MAX_TONES,
                  snake: bool = False) -> tuple[np.ndarray, list[Pickup]]:
    """``values`` without its pickup tones (up to ``max_tones``) and the tones removed.

    ``snake`` as in :func:`find_pickup` (the tones' time ``t`` then runs along
    the serpentine).
    """
    v = np.asarray(values, float).copy()
    tones: list[Pickup] = []
    for _ in range(max_tones):
        p = find_pickup(v, snake=snake)
        if p is None:
            break
        v = v - _in_time_order(p.signal(v.shape), snake)
        tones.append(p)
    return v, tones


def _in_time_order(v: np.ndarray, snake: bool) -> np.ndarray:
    """A map laid out in measurement order: odd rows reversed for a serpentine sweep (its own inverse)."""
    if not snake:
        return v
    out = v.copy()
    out[1::2] = out[1::2, ::-1]
    return out
