"""Charge jumps: rows of the slow axis where the whole pattern shifts."""

from __future__ import annotations

import numpy as np
import xarray as xr
from scipy import ndimage as ndi
from scipy.fft import irfft, next_fast_len, rfft

from ..mapdata import MapAxes
from ..preprocess._checks import check_map
from ..preprocess._nan import fill_nan
from ..preprocess.noise import MAX_NOISE_SAMPLES, _noise_core
from .result import ChargeJump

__all__ = ["detect_charge_jumps"]

#: A pixel this many noise σ away from the median of its neighbours along x and along y is a spike.
SPIKE_SIGMAS = 6.0


def _median3(a: np.ndarray, b: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Element-wise median of three arrays."""
    return np.maximum(np.minimum(a, b), np.minimum(np.maximum(a, b), c))


def _despiked(img: np.ndarray, noise: float) -> np.ndarray:
    """``img`` with isolated single-pixel outliers replaced by the median of their x neighbours.

    A spike in one block of rows and none in the next reads as a pattern
    shift. A pixel counts as a spike when it stands out by ``SPIKE_SIGMAS``
    times the white-noise σ ``noise`` from the median of three both along x
    and along y: a step keeps its pixel inside the three-point median across
    it, and a narrow line (a transport peak) is continued by its neighbours
    along the line, so only isolated outliers go (common practice, no source).
    """
    ny, nx = img.shape
    if ny < 3 or nx < 3 or not noise > 0:
        return img
    lim = SPIKE_SIGMAS * noise
    centre = img[:, 1:-1]
    mx = _median3(img[:, :-2], centre, img[:, 2:])
    r, c = np.nonzero(np.abs(centre - mx) > lim)
    c = c + 1
    inner = (r > 0) & (r < ny - 1)
    r, c = r[inner], c[inner]
    if not r.size:
        return img
    my = _median3(img[r - 1, c], img[r, c], img[r + 1, c])
    spike = np.abs(img[r, c] - my) > lim
    if not spike.any():
        return img
    out = img.copy()
    out[r[spike], c[spike]] = mx[r[spike], c[spike] - 1]
    return out


#: Across the seam of a charge jump the lines have left their old places: the profile correlation
#: at the jump lag must exceed the one at the natural (no-jump) lag by this much ...
SEAM_DISPLACEMENT = 0.25
#: ... and better than at the lag of a steady motion (the block shift scaled to the rows apart).
SEAM_STEADY = 0.1


def _ncc_at(a: np.ndarray, b: np.ndarray, lag: float) -> float:
    """Normalised correlation of mean-free profiles ``a(x)`` and ``b(x + lag)`` (fractional lag,
    linear interpolation, overlap only)."""
    x = np.arange(b.size, dtype=float)
    bi = np.interp(x + lag, x, b, left=np.nan, right=np.nan)
    m = np.isfinite(bi)
    aa, bb = a[m], bi[m]
    den = np.sqrt(float((aa * aa).sum() * (bb * bb).sum()))
    return float((aa * bb).sum()) / den if den > 0 else 0.0


def _abrupt(gx: np.ndarray, valid_rows: np.ndarray, row: int, shift: float, drift: float,
            block: int) -> bool:
    """Whether the block-wise pattern shift ``shift`` (pixels) at ``row`` happens at one seam.

    A charge trap switches at one moment of the sweep: every line is displaced by
    the same amount between one row and the next (or the one after, when the
    switch fell inside a row). A line that merely moves steadily along the slow
    axis – a shallow line (a hexagon edge of a strongly coupled double dot)
    whose wide |∂s/∂x| footprint dominates a few rows, or lines ending and
    starting at triple points – accumulates its displacement over the
    ``block`` rows of the block comparison and shows only a fraction of it
    between single rows, while the other lines stay where they were.

    For seams ``row − 1 … row + 1``, profiles of ``h`` = 1 or 2 rows on each
    side, ``gap`` = 0 or 1 rows left out at the seam (a switch inside a row),
    the rows are ``frac = (h + gap)/block`` of the block distance apart; the
    natural drift is ``drift·frac``. The seam is abrupt when the correlation
    of the profiles at the jump lag ``drift·frac + shift`` exceeds the one at
    the natural lag by ``SEAM_DISPLACEMENT`` and the one at a steady motion's
    lag ``(drift + shift)·frac`` by ``SEAM_STEADY`` (common practice, no
    source).
    """
    ny = gx.shape[0]
    for h in (1, 2):
        for s in range(row - 1, row + 2):
            for gap in (0, 1):
                lo, hi = s - gap - h, s + h
                if lo < 0 or hi > ny or not (valid_rows[lo:s - gap].all() and valid_rows[s:hi].all()):
                    continue
                a = gx[lo:s - gap].mean(0)
                b = gx[s:hi].mean(0)
                a = a - a.mean()
                b = b - b.mean()
                frac = (h + gap) / block
                nat = drift * frac
                c_jump = _ncc_at(a, b, nat + shift)
                if (c_jump - _ncc_at(a, b, nat) >= SEAM_DISPLACEMENT
                        and c_jump - _ncc_at(a, b, nat + shift * frac) >= SEAM_STEADY):
                    return True
    return False


#: A pattern shift is a charge jump only when the lines that carry it are seen across the width: the
#: second-strongest quarter of the map's width must hold this fraction of the strongest quarter's
#: |∂s/∂x| power (rows either side of the seam) ...
SPREAD_FRACTION = 0.3
#: ... and the shift must not be one the pattern repeats itself at: its own correlation at the shift
#: at least this high, after a dip below ``ALIAS_DIP`` on the way (lines of one family one period on).
ALIAS_CORRELATION = 0.5
ALIAS_DIP = 0.2


def _seen_across(before: np.ndarray, after: np.ndarray, quarters: int = 4) -> bool:
    """Whether the |∂s/∂x| profiles either side of a seam spread over the width (see :data:`SPREAD_FRACTION`).

    A trap moves every line of the map; where the sensor sees lines in one
    stretch of the width only (one or two steep lines, the rest faint), the
    dot1 lines stepping by the mutual shift δ1 where a dot2 line runs along
    the rows look the same, so no jump can be told there (common practice,
    no source).
    """
    power = np.zeros(quarters)
    for prof in (before, after):
        for q, part in enumerate(np.array_split(prof, quarters)):
            power[q] += float(((part - part.mean()) ** 2).sum())
    top = np.sort(power)
    return bool(top[-1] > 0 and top[-2] >= SPREAD_FRACTION * top[-1])


def _period_alias(before: np.ndarray, after: np.ndarray, shift: float) -> bool:
    """Whether either mean-free |∂s/∂x| profile beside a seam correlates with itself at ``shift``.

    Lines of one family repeat with the addition voltage: a shift by about
    one period cannot be told from none, and where some lines step (a dot2
    line along the rows) the correlation may prefer it. The repeat counts
    when the self-correlation, having dropped below :data:`ALIAS_DIP` past
    the lines' own width, is back to :data:`ALIAS_CORRELATION` at the shift.
    """
    n = int(np.ceil(abs(shift)))
    if n < 2:
        return False
    sign = 1.0 if shift > 0 else -1.0
    for a in (before, after):
        if (min(_ncc_at(a, a, sign * k) for k in range(1, n)) < ALIAS_DIP
                and _ncc_at(a, a, shift) >= ALIAS_CORRELATION):
            return True
    return False


def _jumps_core(values: np.ndarray, block: int = 4, min_shift_px: float = 2.0,
                noise: float | None = None) -> list[tuple[int, float]]:
    """Rows after which the pattern shifts, with the shift in pixels; ``noise``: the map's
    white-noise σ when the caller has it (else :func:`stabtool.preprocess.noise._noise_core`)."""
    ny, nx = values.shape
    if ny < 4 * block or nx < 16:
        return []
    if noise is None:
        noise = _noise_core(values, MAX_NOISE_SAMPLES)
    finite = np.isfinite(values)
    img = values if finite.all() else fill_nan(values)
    gx = np.abs(ndi.gaussian_filter1d(_despiked(img, noise), 1.0, axis=1, order=1))
    valid_rows = finite.mean(1) > 0.8
    max_lag = max(4, nx // 8)
    lags = np.full(ny, np.nan)
    score = np.zeros(ny)
    i = np.arange(block, ny - block + 1)
    vr = np.concatenate([[0], np.cumsum(valid_rows.astype(int))])
    good = ((vr[i] - vr[i - block]) == block) & ((vr[i + block] - vr[i]) == block)
    i = i[good]
    if i.size:
        # mean |∂s/∂x| of the `block` rows from row j on, for every j: the
        # rows before row i are block i − block, the rows after it block i
        # (a sum of `block` shifted slices: rows are contiguous, a cumulative
        # sum down the columns is not)
        nb = ny - block + 1
        blocks = gx[:nb].copy()
        for k in range(1, block):
            blocks += gx[k : k + nb]
        blocks /= block
        blocks -= blocks.mean(1, keepdims=True)
        # zero padding to nx + max_lag makes the circular correlation linear for
        # every lag examined (|lag| ≤ max_lag)
        L = next_fast_len(nx + max_lag + 2, real=True)
        fblk = rfft(blocks, L, axis=1)
        power = (blocks * blocks).sum(1)
        if i.size == ny - 2 * block + 1:  # every row usable: the blocks are two slices
            prod = np.conj(fblk[: ny - 2 * block + 1])
            prod *= fblk[block:]
        else:
            prod = np.conj(fblk[i - block])
            prod *= fblk[i]
        cc = irfft(prod, L, axis=1)
        lagv = np.r_[np.arange(0, max_lag + 1), np.arange(-max_lag, 0)]
        # lags 0 … max_lag, then −max_lag … −1 (the first maximum in this order wins)
        vals = np.concatenate([cc[:, : max_lag + 1], cc[:, L - max_lag :]], axis=1)
        k = np.argmax(vals, axis=1)
        best = vals[np.arange(i.size), k]
        lag = lagv[k].astype(float)
        # parabolic sub-pixel peak
        inner = (np.abs(lagv[k]) < max_lag)
        y0 = cc[np.arange(i.size), lagv[k] - 1]
        y1 = cc[np.arange(i.size), lagv[k]]
        y2 = cc[np.arange(i.size), (lagv[k] + 1) % L]
        den = y0 - 2 * y1 + y2
        corr = np.where(inner & (den < 0), 0.5 * (y0 - y2) / np.where(den < 0, den, -1.0), 0.0)
        lag = lag + corr
        norm = np.sqrt(power[i - block] * power[i])
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = np.where(norm > 0, best / norm, 0.0)
            gain = np.where((norm > 0) & (rel > 0.5), (best - cc[:, 0]) / norm, 0.0)
        lags[i] = lag
        score[i] = gain
    fin = np.isfinite(lags)
    if fin.sum() < 8:
        return []
    base = np.median(lags[fin])
    spread = 1.4826 * np.median(np.abs(lags[fin] - base))
    thr = max(min_shift_px, 5 * spread)
    dev = np.abs(lags - base)
    cand = np.nonzero(fin & (dev > thr) & (score > 0.25))[0]
    out: list[tuple[int, float]] = []
    # a jump spreads over ±block rows of the sliding comparison: keep local maxima
    for row in cand.tolist():
        lo, hi = max(0, row - block), min(ny, row + block + 1)
        win = np.where(np.isfinite(dev[lo:hi]), dev[lo:hi], -1)
        shift = float(lags[row] - base)
        # (the mean-free block profiles either side of the row, as correlated above)
        if (dev[row] >= win.max() and (not out or row - out[-1][0] > block)
                and _abrupt(gx, valid_rows, row, shift, float(base), block)
                and _seen_across(blocks[row - block], blocks[row])
                and not _period_alias(blocks[row - block], blocks[row], shift)):
            out.append((int(row), shift))
    return out


def detect_charge_jumps(da: xr.DataArray, *, block_rows: int = 4, min_shift_px: float = 2.0) -> tuple[ChargeJump, ...]:
    """Find rows after which the whole pattern is shifted along x.

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)
        The map (row offsets may remain; only x-derivatives are used).
    block_rows : int
        Rows averaged before and after each candidate row.
    min_shift_px : float
        Smallest shift reported, pixels along x.

    Returns
    -------
    tuple of ChargeJump
        ``row`` is the first row after the jump; ``shift_x_V`` the apparent
        shift along x in volts (signed, from the x axis step).

    Notes
    -----
    For every row, the mean |∂s/∂x| profile of the ``block_rows`` rows before
    is cross-correlated (FFT) with that of the rows after; the lag of the
    maximum is compared with the median lag over the map (the slow drift of
    the sloped lines). Lags beyond ``max(min_shift_px, 5 robust σ)`` mark a
    jump. Using |∂s/∂x| makes the test independent of row offsets and of the
    sensor polarity (common practice, no source). A candidate counts when the
    shift happens at one seam (:func:`_abrupt`), the lines carrying it are seen
    across the width (:func:`_seen_across`) and the shift is no repeat of the
    pattern (:func:`_period_alias`): the honeycomb itself moves the dot1
    lines by δ1 where a dot2 line runs along the rows. A trap that switches back
    within a few rows (telegraph noise) shows as two jumps of opposite sign.
    """
    axes: MapAxes = check_map(da)
    vals = np.asarray(da.values, dtype=np.float64)
    found = _jumps_core(vals, int(block_rows), float(min_shift_px))
    return tuple(ChargeJump(row=r, y=float(axes.y[r]), shift_x_V=float(s * axes.dx)) for r, s in found)
