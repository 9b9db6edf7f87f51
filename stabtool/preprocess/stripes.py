"""Pickup whose phase steps by an arbitrary amount from row to row: straight stripes, found and subtracted.

A tone ``A sin(2π f t + φ)`` in measurement time is phase-continuous along
each row, but a row usually starts after a wait (the gate's return, a
settling time, a trigger), and the tone runs on during it: row ``i`` then
starts a fixed, unknown phase step ``2π g`` after row ``i − 1``. On the map
this is a plane wave ``A sin(2π (f x + g y) + φ)`` — straight stripes at any
angle (:mod:`stabtool.preprocess.pickup` handles the case without a wait, ``g
= f n_x``, in the row-major time series).

Detection. The plane wave is one point of the map's 2-D spectrum; the
stability pattern's straight edges put their power on spokes through the
origin, and its repeating cells on a lattice of peaks whose height stays
within about 10³ of the local level on the held-out probe. The x-differences
of the map (which flatten the steps and slow backgrounds) go through a 2-D
Hann window; a peak at least :data:`PEAK_RATIO` above the local level (the
geometric mean over :data:`LEVEL_BINS`² bins, scaled to the mean of an
exponential distribution) with at least :data:`MIN_PERIODS_PER_ROW` periods
per row and off the row axis (``|g| ≥ 1.5/n_y``: a pattern repeating from row to
row is the stability diagram's own) is refined to the maximum of the
least-squares amplitude within half a bin and accepted only if the fitted
plane wave removes :data:`MIN_EXPLAINED` of the power within ± 2 bins of it
(the 1-D rule's test, :mod:`stabtool.preprocess.pickup`). Up to
:data:`MAX_WAVES` are removed one after the other.

One dot's transitions alone (equally spaced parallel lines across the whole
map) are a plane wave too, with a peak as high as a tone's; but their
x-differences are a train of narrow pulses whose second harmonic is about as
strong as the fundamental, where a tone has none. A peak with such a
harmonic is the device's own staircase: it and its harmonics are passed over
(:func:`_is_pulse_train`).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi
from scipy.fft import rfft2

# the staircase rule's thresholds are those of the tones in measurement time (one rule, one place)
from .pickup import HARMONIC_PEAK_RATIO, HARMONIC_POWER_SHARE, MAX_STAIRCASES

__all__ = ["LEVEL_BINS", "MAX_WAVES", "MIN_EXPLAINED", "PEAK_RATIO", "Stripes", "find_stripes", "remove_stripes",
           "row_differences"]

#: A peak of the 2-D power spectrum must stand this many times above the local level.
PEAK_RATIO = 1e3
#: Side of the window (bins) of the local spectral level.
LEVEL_BINS = 9
#: The fitted plane wave must remove at least this fraction of the power within ± 2 bins of its peak.
MIN_EXPLAINED = 0.99
#: Fewest periods along a row (longer periods are background, not pickup).
MIN_PERIODS_PER_ROW = 4.0
#: Shortest period along x searched (points).
MIN_PERIOD = 2.2
#: Most plane waves removed.
MAX_WAVES = 3
_EULER_GAMMA = 0.5772156649015329


@dataclass(frozen=True)
class Stripes:
    """One plane wave ``amplitude · sin(2π (fx·j + fy·i) + phase)`` (``j`` column, ``i`` row index).

    Attributes
    ----------
    fx : float
        Cycles per point along a row.
    fy : float
        Cycles per row (the phase step from one row to the next, in turns).
    amplitude : float
        In the map's signal units.
    phase : float
        Radians.
    peak_ratio : float
        Its spectral peak over the local level.
    """

    fx: float
    fy: float
    amplitude: float
    phase: float
    peak_ratio: float

    @property
    def period_points(self) -> float:
        """Period along a row, points."""
        return 1.0 / self.fx

    def signal(self, shape: tuple[int, int]) -> np.ndarray:
        """The wave on a map of ``shape``."""
        i = np.arange(shape[0], dtype=float)[:, None]
        j = np.arange(shape[1], dtype=float)[None, :]
        return self.amplitude * np.sin(2 * np.pi * (self.fx * j + self.fy * i) + self.phase)


def find_stripes(values: np.ndarray) -> Stripes | None:
    """The strongest plane-wave pickup of a map (rows along x), or None.

    Parameters
    ----------
    values : ndarray, shape (ny, nx)

    Returns
    -------
    Stripes or None
    """
    v = np.asarray(values, float)
    if v.ndim != 2 or v.shape[0] < 8 or v.shape[1] < 16:
        return None
    d, ok = row_differences(v)
    if ok.mean() < 0.5:
        return None
    ny, nd = d.shape
    window = np.hanning(ny)[:, None] * np.hanning(nd)[None, :]
    power = np.abs(rfft2(d * window)) ** 2
    fy = np.fft.fftfreq(ny)[:, None]
    fx = np.fft.rfftfreq(nd)[None, :]
    with np.errstate(divide="ignore"):
        log_p = np.log(np.maximum(power, np.finfo(float).tiny))
    level = np.exp(ndi.uniform_filter(log_p, LEVEL_BINS, mode="wrap") + _EULER_GAMMA)
    ratio = power / level
    search = ((fx >= MIN_PERIODS_PER_ROW / v.shape[1]) & (fx <= 1.0 / MIN_PERIOD)
              & (np.abs(fy) >= 1.5 / ny))
    ratio = np.where(search, ratio, 0.0)
    for _ in range(MAX_STAIRCASES + 1):
        k = np.unravel_index(int(np.argmax(ratio)), ratio.shape)
        if not ratio[k] >= PEAK_RATIO:
            return None
        g0 = float(fx[0, k[1]]), float(fy[k[0], 0])
        if not _is_pulse_train(power, level, k, *g0, ny, nd):
            break
        # a staircase of charge lines: its whole harmonic series is left out of the search
        for n in range(1, int(0.5 / g0[0]) + 2):
            hb = _harmonic_bin(n, *g0, ny, nd)
            if hb is not None:
                ratio[[(hb[0] + dy) % ny for dy in (-1, 0, 1)], max(hb[1] - 1, 0) : hb[1] + 2] = 0.0
    else:
        return None
    # refine to the least-squares amplitude's maximum within ± half a bin (three nested 5 × 5 grids,
    # each a quarter of the one before: a residual error below 0.01 bin leaves < 0.1 % of the power)
    gx, gy = float(fx[0, k[1]]), float(fy[k[0], 0])
    span_x, span_y = 0.5 / nd, 0.5 / ny
    for _ in range(3):
        trials = [(tx, ty) for tx in gx + span_x * np.linspace(-1, 1, 5) for ty in gy + span_y * np.linspace(-1, 1, 5)]
        amps = [float(np.hypot(*_fit(d, ok, tx, ty))) for tx, ty in trials]
        gx, gy = trials[int(np.argmax(amps))]
        span_x, span_y = span_x / 4, span_y / 4
    a, b = _fit(d, ok, gx, gy)
    wave = Stripes(fx=float(gx), fy=float(gy), amplitude=float(np.hypot(a, b)), phase=float(np.arctan2(b, a)),
                   peak_ratio=float(ratio[k]))
    rest = np.where(ok, d - np.diff(wave.signal(v.shape), axis=1), 0.0)
    after = np.abs(rfft2(rest * window)) ** 2
    if not _near(after, k) <= (1.0 - MIN_EXPLAINED) * _near(power, k):
        return None
    return wave


def _harmonic_bin(n: int, gx: float, gy: float, ny: int, nd: int) -> tuple[int, int] | None:
    """The rfft2 bin (row, column) of the frequency (n gx, n gy), folded into [0, ½] along x; None off the grid."""
    fx2, fy2 = (n * gx) % 1.0, n * gy
    if fx2 > 0.5:  # aliased: the sampled wave is the one at (1 − fx2, −fy2)
        fx2, fy2 = 1.0 - fx2, -fy2
    col = round(fx2 * nd)
    if col < 1 or col > nd // 2:
        return None
    return round(fy2 * ny) % ny, col


def _is_pulse_train(power: np.ndarray, level: np.ndarray, k: tuple, gx: float, gy: float, ny: int,
                    nd: int) -> bool:
    """Whether the spectral peak ``k`` at (gx, gy) has a strong second harmonic: a charge staircase.

    Equally spaced parallel charge lines (one dot's transitions across the whole map: a plunger
    swept against a barrier, or one dot of a pair still empty) make a plane-wave peak as high as a
    tone's, but their x-differences are a train of narrow pulses, whose even harmonics are about
    as strong as the fundamental (a step of Fermi width ``w`` and spacing ``P`` damps harmonic ``n``
    by ``(πqw)/sinh(πqw)``, ``q = 2πn/P``). Pickup from a tone is a sinusoid, and a symmetric
    periodic pickup (mains) has odd harmonics only. So a second harmonic of at least
    :data:`HARMONIC_POWER_SHARE` of the fundamental's power, itself a spectral peak
    (:data:`HARMONIC_PEAK_RATIO` over its local level), marks the pattern as the device's own.
    """
    b = _harmonic_bin(2, gx, gy, ny, nd)
    if b is None:
        return False
    rows = [(b[0] + dy) % ny for dy in (-1, 0, 1)]
    cols = slice(max(b[1] - 1, 0), min(b[1] + 2, power.shape[1]))
    p2 = power[rows, cols]
    i = np.unravel_index(int(np.argmax(p2)), p2.shape)
    peak2 = float(p2[i])
    lev2 = float(level[rows, cols][i])
    return bool(peak2 >= HARMONIC_POWER_SHARE * float(power[k]) and peak2 >= HARMONIC_PEAK_RATIO * lev2)


def remove_stripes(values: np.ndarray, *, max_waves: int = MAX_WAVES) -> tuple[np.ndarray, list[Stripes]]:
    """``values`` without its plane-wave pickup (up to ``max_waves``) and the waves removed."""
    v = np.asarray(values, float).copy()
    waves: list[Stripes] = []
    for _ in range(max_waves):
        w = find_stripes(v)
        if w is None:
            break
        v = v - w.signal(v.shape)
        waves.append(w)
    return v, waves


def row_differences(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """x-differences (0 where a point is missing, each row's median removed) and where they exist."""
    d = np.diff(v, axis=1)
    ok = np.isfinite(d)
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a row without any difference (all NaN): median NaN → 0
        med = np.nanmedian(np.where(ok, d, np.nan), axis=1, keepdims=True) if not ok.all() else np.median(
            d, axis=1, keepdims=True)
    d = np.where(ok, d - np.nan_to_num(med), 0.0)
    return d, ok


def _fit(d: np.ndarray, ok: np.ndarray, fx: float, fy: float) -> tuple[float, float]:
    """Least-squares ``(a, b)`` of ``a sin + b cos`` of the plane wave (fx, fy), fitted to its x-differences ``d``.

    The wave separates, ``sin(α_j + β_i) = sin α_j cos β_i + cos α_j sin β_i``, so on rows without
    missing points every sum is a product of a row vector, the map and a column vector (no
    trigonometry over the map); rows with some points missing take the sums point by point.
    """
    ny, nd = d.shape
    alpha = 2 * np.pi * fx * np.arange(nd + 1, dtype=float)
    beta = 2 * np.pi * fy * np.arange(ny, dtype=float)
    ds, dc = np.diff(np.sin(alpha)), np.diff(np.cos(alpha))  # the wave's x-differences: ds cos β + dc sin β
    cb, sb = np.cos(beta), np.sin(beta)
    full = ok.all(axis=1)
    m = np.zeros((2, 2))
    rhs = np.zeros(2)
    if full.any():
        c, sn, dd = cb[full], sb[full], d[full]
        dds, ddc = dd @ ds, dd @ dc
        rhs += [c @ dds + sn @ ddc, c @ ddc - sn @ dds]
        sss, scc, ssc = ds @ ds, dc @ dc, ds @ dc
        c2, s2, cs = c @ c, sn @ sn, c @ sn
        m += [[sss * c2 + 2 * ssc * cs + scc * s2, ssc * (c2 - s2) + (scc - sss) * cs],
              [ssc * (c2 - s2) + (scc - sss) * cs, scc * c2 - 2 * ssc * cs + sss * s2]]
    part = ~full & ok.any(axis=1)
    if part.any():
        c, sn, mask, dd = cb[part, None], sb[part, None], ok[part], d[part]
        bs = np.where(mask, ds * c + dc * sn, 0.0)
        bc = np.where(mask, dc * c - ds * sn, 0.0)
        rhs += [np.vdot(bs, dd), np.vdot(bc, dd)]
        m += [[np.vdot(bs, bs), np.vdot(bs, bc)], [np.vdot(bs, bc), np.vdot(bc, bc)]]
    try:
        a, b = np.linalg.solve(m, rhs)
    except np.linalg.LinAlgError:
        return 0.0, 0.0
    return float(a), float(b)


def _near(power: np.ndarray, k: tuple, half: int = 2) -> float:
    """Power within ± ``half`` bins of ``k`` (wrapping along the full axis 0)."""
    rows = np.arange(k[0] - half, k[0] + half + 1) % power.shape[0]
    cols = slice(max(k[1] - half, 0), k[1] + half + 1)
    return float(power[rows, cols].sum())
