"""Current spots of a transport map: the triple points or bias triangles of a series double dot.

At small source–drain bias the current through a series double dot flows only
at the triple points; at larger bias inside small bias triangles. This module
finds those spots and their current-weighted centroids in volts, the input
of the triple-point lattice (:mod:`stabtool.fit.transport_lattice`).

Notes
-----
The current is oriented (its sign follows the bias), row and column medians
are removed (slow-axis offsets; the map is mostly empty), the map is smoothed
(Gaussian, σ = 1 pixel) and thresholded at ``median + 5 σ_s`` with ``σ_s``
the robust (MAD) spread of the smoothed map itself, or at a tenth of the
median spot peak if that is higher (on a clean map the faint tails would
join the two points of a pair). Connected regions not touching the border
are the spots; their positions are current-weighted centroids.

References
----------
W. G. van der Wiel et al., "Electron transport through double quantum dots",
Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import xarray as xr
from scipy import ndimage

from ..errors import InputError

__all__ = ["TransportSpots", "find_transport_spots"]

_NAN = float("nan")
#: threshold of the smoothed map in robust σ (false alarms ~1e-7 per independent sample)
THRESHOLD_SIGMAS = 5.0
#: regions are also cut at this fraction of the median spot peak (keeps the pairs apart on clean maps)
RELATIVE_LEVEL = 0.1
#: largest fraction of the map above the threshold of a transport map: spots cover ≤ 2.5 % of the
#: held-out probe's transport maps, bias triangles at 0.3 mV about 7 % (charge-sensor maps reach it
#: too, at 0.4–10 %: their spots then form no consistent lattice and nothing is printed)
SPARSE_AREA = 0.15

@dataclass(frozen=True)
class TransportSpots:
    """Current spots of a transport map.

    Attributes
    ----------
    points_V : ndarray, shape (n, 2)
        Weighted centroids (x, y), V.
    n_pixels : ndarray, shape (n,), int
        Pixels above the threshold per spot.
    peak : ndarray, shape (n,)
        Peak smoothed current (oriented, data units).
    noise : float
        Robust σ of the smoothed map (data units).
    threshold : float
    area_fraction : float
        Fraction of the map above the threshold (small for a transport map).
    sign : float
        +1 or −1: the sign of the current.
    level : float
        Median of the (oriented) map: the current away from the spots.
    """

    points_V: np.ndarray
    n_pixels: np.ndarray
    peak: np.ndarray
    noise: float
    threshold: float
    area_fraction: float
    sign: float
    level: float = _NAN

    def __len__(self) -> int:
        return int(self.points_V.shape[0])

    @property
    def sparse(self) -> bool:
        """Does the map look like a transport map: at least 4 spots, under ``SPARSE_AREA`` of the
        map above the threshold, and the current away from the spots near zero (|median| under a
        quarter of the median spot peak; slow-axis offsets allowed)? A charge-sensor map usually
        sits on a large background level (not always: the lattice fit is the final check)."""
        if len(self) < 4 or not np.isfinite(self.area_fraction):
            return False
        peak = float(np.median(self.peak))
        return bool(self.area_fraction < SPARSE_AREA and abs(self.level) < 0.25 * peak)


# ----------------------------------------------------------------------------- spots
def _axes(da: xr.DataArray, source: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    if not isinstance(da, xr.DataArray) or da.ndim != 2:
        raise InputError(source, "expected a 2-D DataArray (y_gate, x_gate) of current")
    ydim, xdim = da.dims
    xs = np.asarray(da[xdim].values, float)
    ys = np.asarray(da[ydim].values, float)
    vals = np.asarray(da.values, float)
    if xs.size < 8 or ys.size < 8:
        raise InputError(source, f"map of {ys.size}x{xs.size} pixels: a triple-point lattice needs at least 8x8")
    for name, ax in (("x", xs), ("y", ys)):
        d = np.diff(ax)
        if not np.all(np.isfinite(ax)) or not (np.all(d > 0) or np.all(d < 0)):
            raise InputError(source, f"the {name} coordinates are not finite and strictly monotonic")
    if not np.any(np.isfinite(vals)):
        raise InputError(source, "the map holds no finite value")
    if xs[0] > xs[-1]:
        xs, vals = xs[::-1], vals[:, ::-1]
    if ys[0] > ys[-1]:
        ys, vals = ys[::-1], vals[::-1]
    return xs, ys, vals


def _despike(v: np.ndarray) -> np.ndarray:
    """Replace isolated one-pixel outliers (> 6 robust σ, no neighbour above 3 σ) by their 3×3 median."""
    sig = 1.4826 * float(np.median(np.abs(v - np.median(v))))
    if not sig > 0:
        return v
    z = np.abs(v) / sig
    neighbours = ndimage.maximum_filter(np.where(z > 3, 1, 0), footprint=np.array([[1, 1, 1], [1, 0, 1], [1, 1, 1]]))
    spike = (z > 6) & (neighbours == 0)
    if not spike.any():
        return v
    return np.where(spike, ndimage.median_filter(v, size=3), v)


def _spots(xs: np.ndarray, ys: np.ndarray, vals: np.ndarray, threshold_sigmas: float,
           despike: bool = False) -> TransportSpots:
    v = np.where(np.isfinite(vals), vals, np.nan)
    raw_level = float(np.nanmedian(v))
    with warnings.catch_warnings():  # rows or columns lost entirely (an interrupted sweep) stay NaN
        warnings.simplefilter("ignore", RuntimeWarning)
        v = v - np.nanmedian(v, axis=1, keepdims=True)
        v = v - np.nanmedian(v, axis=0, keepdims=True)
    v = np.where(np.isfinite(v), v, 0.0)
    if despike:
        v = _despike(v)
    a = np.abs(v)
    big = a >= np.percentile(a, 99.5)
    sign = 1.0 if np.sum(v[big]) >= 0 else -1.0
    s = ndimage.gaussian_filter(sign * v, 1.0)
    med = float(np.median(s))
    noise = float(1.4826 * np.median(np.abs(s - med)))
    empty = TransportSpots(np.zeros((0, 2)), np.zeros(0, int), np.zeros(0), noise, _NAN, _NAN, sign, sign * raw_level)
    if not noise > 0:
        return empty
    thr = med + threshold_sigmas * noise
    mask = s > thr
    labels, n = ndimage.label(mask, structure=np.ones((3, 3)))
    if n:
        # on a clean map the noise threshold sits in the faint tails that join the two triple points
        # of a pair: regions are cut at a tenth of the typical spot peak as well
        peaks = np.asarray(ndimage.maximum(s, labels, np.arange(1, n + 1)), float)
        floor = med + RELATIVE_LEVEL * float(np.median(peaks) - med)
        if floor > thr:
            thr = floor
            mask = s > thr
            labels, n = ndimage.label(mask, structure=np.ones((3, 3)))
    if n == 0:
        return TransportSpots(np.zeros((0, 2)), np.zeros(0, int), np.zeros(0), noise, thr, 0.0, sign, sign * raw_level)
    idx = np.arange(1, n + 1)
    npx_reg = np.asarray(ndimage.sum(mask, labels, idx), int)
    objs = ndimage.find_objects(labels)
    ny, nx = s.shape
    border_reg = np.array([o[0].start == 0 or o[1].start == 0 or o[0].stop == ny or o[1].stop == nx for o in objs])
    w = np.where(mask, s - thr, 0.0)
    cy, cx = (np.asarray(c) for c in zip(*ndimage.center_of_mass(w, labels, idx)))
    npx = npx_reg
    peak = np.asarray(ndimage.maximum(s, labels, idx), float)
    keep = ~border_reg
    x = np.interp(cx[keep], np.arange(nx), xs)
    y = np.interp(cy[keep], np.arange(ny), ys)
    return TransportSpots(np.column_stack([x, y]), npx[keep], peak[keep], noise, thr,
                          float(mask.mean()), sign, sign * raw_level)


def find_transport_spots(da: xr.DataArray, *, threshold_sigmas: float = THRESHOLD_SIGMAS,
                         source: str = "data") -> TransportSpots:
    """Current spots (triple points or bias triangles) of a transport map.

    Parameters
    ----------
    da : xarray.DataArray, dims (y_gate, x_gate)
        Current (any unit, either sign) against two gate voltages, V. Axes
        may decrease; NaN allowed.
    threshold_sigmas : float
        Detection threshold in robust σ of the smoothed map.
    source : str
        Name used in error messages.

    Returns
    -------
    TransportSpots
        Spots not touching the map border (see the module Notes, step 1).
    """
    if not (np.isfinite(threshold_sigmas) and threshold_sigmas > 0):
        raise InputError("threshold_sigmas", f"expected a positive number, got {threshold_sigmas}")
    xs, ys, vals = _axes(da, source)
    return _spots(xs, ys, vals, float(threshold_sigmas))
