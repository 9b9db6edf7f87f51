"""Smooth sensor background and slow-axis row offsets.

A charge sensor turns each charge transition into a step on a smooth, often
non-monotonic background (the sensor's own Coulomb peak: its flanks give
steps of opposite sign, so the polarity of the lines can flip across the
map). Slow drifts of the sensor (1/f noise) add an offset per row of the slow
axis. Both are removed here; later steps only use polarity-independent
quantities (gradient magnitude) or the local sign of a step.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xarray as xr

from ._checks import as_map_array
from ._nan import kept_row_medians, nan_gaussian

__all__ = ["RowOffsetTest", "correct_row_offsets", "default_background_sigma", "remove_background", "row_offset_test"]


def default_background_sigma(shape: tuple[int, int]) -> float:
    """Default background scale in pixels: a tenth of the larger side, at least 8."""
    return float(max(8.0, 0.1 * max(shape)))


def _background_core(values: np.ndarray, sigma_px: float) -> np.ndarray:
    bg = nan_gaussian(values, sigma_px)
    return values - bg


def remove_background(da: xr.DataArray, *, sigma_px: float | None = None) -> xr.DataArray:
    """Subtract the smooth sensor background (a wide NaN-aware Gaussian).

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)
        The map; NaN marks missing points and stays NaN.
    sigma_px : float, optional
        Width of the background Gaussian in pixels (default: a tenth of the
        larger side, at least 8 px). It must be wider than the line spacing
        for the steps to survive as steps.

    Returns
    -------
    xarray.DataArray
        Same shape, coordinates and attributes; the background subtracted.

    Notes
    -----
    A high-pass by normalised convolution (Knutsson & Westin, CVPR 1993,
    doi:10.1109/CVPR.1993.341081). Step edges keep their position and height
    locally; only variations slower than ``sigma_px`` are removed.
    """
    values, _, _ = as_map_array(da)
    s = default_background_sigma(values.shape) if sigma_px is None else float(sigma_px)
    if not s > 0:
        from ..errors import InputError

        raise InputError("sigma_px", f"must be > 0, got {sigma_px!r}")
    return da.copy(data=_background_core(values, s))


#: With an exclusion mask, a row step needs at least this fraction of the row's differences left.
MIN_KEPT_FRACTION = 0.25
#: Row spans (rows) over which the tests below accumulate the row steps.
TEST_SPANS_ROWS = (1, 4, 16)
#: The lines bias the plain row medians when, over some span, the plain and the clear medians
#: differ by more than this many noise σ of that difference.
BIAS_Z = 5.0
#: Row jitter or drift: the clear rows' steps, accumulated over a span, scatter about their median
#: by more than this many noise σ (robust scatter).
JITTER_Z = 2.0


def _row_offsets_core(values: np.ndarray, exclude: np.ndarray | None = None, noise: float | None = None,
                      plain: np.ndarray | None = None) -> np.ndarray:
    """Per-row offsets (length ny) from medians of consecutive-row differences.

    With ``exclude`` (bool, shape of ``values``) and the white-noise σ
    ``noise``, the pixels marked are left out of the medians (see
    :func:`_masked_row_offsets`; ``plain``, optional, is this function's
    result without ``exclude``, if already at hand).
    """
    if exclude is not None:
        return _masked_row_offsets(values, exclude, float(noise) if noise is not None else float("nan"), plain)
    d = np.diff(values, axis=0)
    steps = np.zeros(values.shape[0])
    import warnings

    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        fin = np.isfinite(d)
        cnt = fin.sum(axis=1)
        if d.size and fin.all():
            # no NaN: the plain median (in place on the scratch differences) is far faster
            # (one selection of the upper middle value; for an even count the lower one is
            # the largest value below it)
            h = d.shape[1] // 2
            d.partition(h, axis=1)
            rowmed = d[:, h].copy()
            if d.shape[1] % 2 == 0:
                rowmed = (d[:, :h].max(axis=1) + rowmed) / 2
        else:
            rowmed = np.nanmedian(np.where(fin, d, np.nan), axis=1) if d.size else np.zeros(d.shape[0])
        med = np.where(cnt >= 3, rowmed, 0.0)
    med = np.nan_to_num(med)
    steps[1:] = med
    off = np.cumsum(steps)
    return off - np.median(off)


def _masked_row_offsets(values: np.ndarray, exclude: np.ndarray, noise: float,
                        plain: np.ndarray | None = None) -> np.ndarray:
    """:func:`_row_offsets_core` with the pixels marked in ``exclude`` left out of the medians.

    Why: a row difference crossing a broad, shallow transition line carries
    the line's own derivative over much of the row (a line of pixel slope
    0.25 and 3 px thermal width spans ≈ 12 columns per row, and a family of
    such lines in neighbouring cells spans the whole row), so the plain
    median takes part of the line for a row offset; subtracting it bends
    every column profile across the line by an amount that changes along it
    (on a noiseless 112² map at 1.7 K: crossings tilted by ±0.4 px along a
    segment, dot2 slopes 5–20 % too steep).

    The rows with at least ``MIN_KEPT_FRACTION`` of their differences clear
    of the lines ("clear rows") give a median of those. Where, accumulated
    over some span of ``TEST_SPANS_ROWS`` clear rows, the plain medians differ
    from the clear ones by more than ``BIAS_Z`` noise σ of that difference,
    the lines bias the plain medians: the clear rows then take their clear
    median and the other rows, which cannot tell an offset from a line, the
    median step of the clear rows (the map's trend along y) unless the map
    has row jitter or drift (the clear rows' steps, accumulated over a span,
    scatter about that median by more than ``JITTER_Z`` σ, robust scatter),
    in which case they keep their plain median (biased, but far better than
    leaving the jitter in). Otherwise (no significant bias, e.g. sharp lines)
    the plain medians are returned unchanged. Noise: a median of n
    differences of white noise σ has variance π/2·2σ²/n (asymptotic variance
    of a sample median); the median of a subset of m of the n values differs
    from the full median with variance ≈ π/2·2σ²·(1/m − 1/n). Without a
    finite ``noise`` the plain medians are returned.
    """
    if plain is None:
        plain = _row_offsets_core(values)
    if not (np.isfinite(noise) and noise > 0):
        return plain
    d = np.diff(values, axis=0)
    fin = np.isfinite(d)
    keep = fin & ~(exclude[1:] | exclude[:-1])
    cnt = keep.sum(axis=1)
    n_fin = fin.sum(axis=1)
    good = (cnt >= 3) & (cnt >= MIN_KEPT_FRACTION * n_fin)
    if good.sum() < 5:
        return plain
    s2 = np.pi / 2 * 2.0 * noise**2  # n × variance of a median of n differences
    with np.errstate(all="ignore"):
        med = kept_row_medians(d, keep, cnt)
        med_plain = np.diff(plain)
        var_c = np.where(good, s2 / np.maximum(cnt, 1), 0.0)
        var_d = np.where(good, s2 * np.maximum(1.0 / np.maximum(cnt, 1) - 1.0 / np.maximum(n_fin, 1), 0.0), 0.0)
        trend = float(np.median(med[good]))

        def span_z(x, var):
            """Accumulated ``x`` over each span, in σ of its accumulated variance, per span."""
            cx = np.concatenate([[0.0], np.cumsum(np.where(good, x, 0.0))])
            cv = np.concatenate([[0.0], np.cumsum(var)])
            out = []
            for k in TEST_SPANS_ROWS:
                if k < cx.size:
                    v = cv[k:] - cv[:-k]
                    out.append((cx[k:] - cx[:-k])[v > 0] / np.sqrt(v[v > 0]))
            return out

        bias = any(z.size and np.max(np.abs(z)) > BIAS_Z for z in span_z(med_plain - med, var_d))
        if not bias:
            return plain
        jitter = any(z.size >= 3 and 1.4826 * float(np.median(np.abs(z))) > JITTER_Z
                     for z in span_z(med - trend, var_c))
    med = np.where(good, med, med_plain if jitter else trend)
    steps = np.zeros(values.shape[0])
    steps[1:] = np.nan_to_num(med)
    off = np.cumsum(steps)
    return off - np.median(off)


def correct_row_offsets(da: xr.DataArray) -> xr.DataArray:
    """Remove an offset per row of the slow axis (y), robustly.

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)

    Returns
    -------
    xarray.DataArray
        The map minus the cumulative sum of the median difference between
        consecutive rows.

    Notes
    -----
    The median over a row ignores the few pixels where a transition line
    crosses between the two rows, so lines survive while offsets common to a
    whole row (1/f noise of the sensor on the slow axis, sensor telegraph
    switching between sweeps) vanish. Slow background trends along y are
    removed as well, which is harmless for edge detection. A transition line
    parallel to the rows over more than half of the row would be removed too
    (common practice, no source).
    """
    values, _, _ = as_map_array(da)
    off = _row_offsets_core(values)
    return da.copy(data=values - off[:, None])


#: Row offsets are significant when the changes of consecutive row steps scatter by more than this
#: many noise σ (robust scatter; white noise alone gives ≈ 1; broad jitter: 1/f noise, random walks).
ROW_SCATTER_Z = 3.0
#: A row step is sharp when it departs from the running median of ``SHARP_WINDOW_ROWS`` row steps
#: by more than this many noise σ of a row median ...
SHARP_STEP_Z = 8.0
SHARP_WINDOW_ROWS = 5
#: ... and this many sharp steps make the row offsets significant (sparse jumps: sensor switching
#: between sweeps).
MIN_SHARP_STEPS = 3


@dataclass(frozen=True)
class RowOffsetTest:
    """Whether a map has row offsets beyond its white noise (:func:`row_offset_test`).

    Attributes
    ----------
    scatter_z : float
        Robust scatter of the changes of consecutive row steps, in noise σ (≈ 1 for white noise).
    n_sharp : int
        Row steps departing from their neighbours' by more than ``SHARP_STEP_Z`` σ.
    significant : bool
        ``scatter_z > ROW_SCATTER_Z`` or ``n_sharp >= MIN_SHARP_STEPS``.
    """

    scatter_z: float
    n_sharp: int
    significant: bool


def row_offset_test(values: np.ndarray, noise: float, *, offsets: np.ndarray | None = None) -> RowOffsetTest:
    """Test a map for row offsets (steps common to a whole row) beyond its white noise.

    Parameters
    ----------
    values : ndarray, shape (ny, nx)
        The map (NaN allowed).
    noise : float
        White-noise σ of a pixel (e.g. from differences along the fast axis,
        which row offsets do not reach).
    offsets : ndarray, shape (ny,), optional
        ``_row_offsets_core(values)``, when the caller has it already.

    Returns
    -------
    RowOffsetTest

    Notes
    -----
    The row steps are the medians of consecutive-row differences
    (:func:`correct_row_offsets`); with white noise alone each has the
    standard error ``σ·√(π/n)`` (asymptotic variance π/2·2σ²/n of a sample
    median of n differences). Transition lines bias these medians too, but
    smoothly from row to row (a line has a thermal width and crosses the
    rows gradually), while a row offset is one pixel sharp along y. Hence
    the test uses only the sharp part: the changes of consecutive steps
    (two steps share a row, so their change has 3× the variance of one)
    (robust scatter, median absolute deviation, F. R. Hampel, J. Am. Stat.
    Assoc. 69, 383 (1974), doi:10.1080/01621459.1974.10482962) for dense
    jitter, and the departures from a running median of the steps for sparse
    jumps.
    """
    from scipy.ndimage import median_filter

    values = np.asarray(values, dtype=np.float64)
    if values.ndim != 2 or values.shape[0] < 4 or not (np.isfinite(noise) and noise > 0):
        return RowOffsetTest(float("nan"), 0, False)
    st = np.diff(_row_offsets_core(values) if offsets is None else np.asarray(offsets, float))
    n = np.isfinite(np.diff(values, axis=0)).sum(axis=1)
    z = np.where(n >= 3, st / (float(noise) * np.sqrt(np.pi / np.maximum(n, 1))), 0.0)
    # consecutive steps share a row (with opposite signs): correlation −1/2, so a change of two
    # steps has variance 2 + 2·½ = 3 in units of one step's
    dz = np.diff(z) / np.sqrt(3.0)
    scatter = float(1.4826 * np.median(np.abs(dz - np.median(dz))))
    sharp = z - median_filter(z, SHARP_WINDOW_ROWS, mode="nearest")
    n_sharp = int(np.count_nonzero(np.abs(sharp) > SHARP_STEP_Z))
    return RowOffsetTest(scatter, n_sharp, bool(scatter > ROW_SCATTER_Z or n_sharp >= MIN_SHARP_STEPS))


def slow_axis_is_x(values: np.ndarray) -> bool:
    """Do the map's sweep offsets run along columns (x the slow axis) rather than rows?

    Parameters
    ----------
    values : ndarray, shape (ny, nx)
        The map (NaN allowed), rows along y as everywhere in the package.

    Returns
    -------
    bool
        True when :func:`row_offset_test` finds dense offsets common to whole
        columns (its scatter beyond ``ROW_SCATTER_Z``; the map transposed, the
        noise σ from differences along y) and none common to whole rows (the
        noise σ from differences along x).

    Notes
    -----
    The pipeline takes y for the slow axis (one sweep per row) and corrects
    offsets per row. A map whose gate on x was stepped in the outer loop
    carries its 1/f offsets per column instead: each test's noise comes from
    differences along the other test's offsets, which those offsets inflate,
    so a map with offsets along one axis passes the other test. Only the
    dense scatter counts for columns, not a few sharp steps: sharp lines
    within about 1° of vertical step whole columns too (synthetic honeycomb,
    150², lines 0.7 px wide at 60 and 200 px per px: 5–9 sharp column steps,
    scatter 1.0–1.1), and removing them per column would erase those lines;
    1/f offsets per column score a scatter of about 100 and more.
    """
    from .noise import _noise_from_diffs

    values = np.asarray(values, dtype=np.float64)
    if values.ndim != 2 or min(values.shape) < 4:
        return False
    noise_x = _noise_from_diffs(np.diff(values, axis=1))
    noise_y = _noise_from_diffs(np.diff(values, axis=0))
    if not (np.isfinite(noise_x) and np.isfinite(noise_y) and noise_x > 0 and noise_y > 0):
        return False
    col = row_offset_test(values.T, noise_y)
    return bool(col.scatter_z > ROW_SCATTER_Z) and not row_offset_test(values, noise_x).significant


def correct_column_offsets(values: np.ndarray) -> np.ndarray:
    """``values`` minus an offset per column (medians of consecutive-column differences, as per row)."""
    values = np.asarray(values, dtype=np.float64)
    return values - _row_offsets_core(values.T)[None, :]
