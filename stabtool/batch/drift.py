"""Drift and jumps of the charge pattern across repeated sweeps of the same gates.

Each map of a time-ordered series is registered to the first one by phase
correlation on a background-free derivative image, in volts: every map is
resampled onto the first map's voltage grid before the correlation, so
shifted or re-stepped gate windows are handled and the pattern offset comes
out in volts directly. The offset series is then split at sudden jumps (step
detection on the sweep-to-sweep differences) and fitted with one common
linear trend (slow drift) plus one level per segment.

Sign convention: a positive offset means the charge pattern appears at a
higher gate voltage than in the first sweep (the device needs more voltage
for the same transition).
"""

from __future__ import annotations

import itertools
import json
import math
import os
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from pathlib import Path
from collections.abc import Mapping
from typing import Any, Sequence

import numpy as np
import xarray as xr

from ..errors import InputError
from ..io.atomic import atomic_savefig
from ..io.stacks import TIME_KEYS
from ..mapdata import map_axes, validate_map, without_infinities
from ..quality import Quality

__all__ = [
    "Registration",
    "DriftJump",
    "DriftResult",
    "register_maps",
    "order_sweeps",
    "measure_drift",
    "sweep_time_of",
    "SweepFeature",
    "PreparedSweep",
    "feature_of",
]

#: Map attributes that may hold the start time of a sweep, in order of preference.
TIME_ATTRS = TIME_KEYS


# --------------------------------------------------------------------------- records
@dataclass(frozen=True)
class Registration:
    """Offset of one map's charge pattern relative to a reference map.

    Attributes
    ----------
    offset_x_V, offset_y_V : float
        Pattern offset along the x and y gates, V (positive: the pattern
        appears at higher voltage than in the reference).
    match : float
        Pearson correlation of the two derivative images after alignment,
        over their common valid area (1 = identical, about 0 = unrelated).
    overlap : float
        Fraction of the reference window covered by valid data of the
        registered map, 0–1.
    """

    offset_x_V: float
    offset_y_V: float
    match: float
    overlap: float


@dataclass(frozen=True)
class DriftJump:
    """A sudden offset change between two consecutive sweeps.

    Attributes
    ----------
    index : int
        Position (in the ordered series) of the first sweep after the jump.
    file : str
        That sweep's file (or label).
    size_x_V, size_y_V : float
        Step of the offset along x and y, V (the slow drift between the two
        sweeps removed).
    """

    index: int
    file: str
    size_x_V: float
    size_y_V: float


@dataclass(frozen=True)
class DriftResult:
    """Pattern offset versus time for one series of repeated sweeps.

    Attributes
    ----------
    x_gate, y_gate : str
        Gate names.
    files : tuple of str
        Sweep labels (file names) in time order.
    times : tuple of str or None
        Sweep start times as found in the files (ISO 8601), None if unknown.
    t : ndarray, shape (n,)
        Time axis of the trend: hours since the first sweep when every sweep
        has a time, else the sweep number (0, 1, ...).
    time_unit : {"h", "sweep"}
        Unit of ``t``.
    offset_x_V, offset_y_V : ndarray, shape (n,)
        Pattern offset of each sweep relative to the first, V.
    match, overlap : ndarray, shape (n,)
        Registration match and overlap (see :class:`Registration`).
    step_x_V, step_y_V : float
        Voltage steps of the reference grid, V (the registration resolution
        is a fraction of these).
    jumps : tuple of DriftJump
        Sudden jumps found.
    rate_x_V, rate_y_V : float
        Slow drift rate along x and y, V per ``time_unit``; NaN when fewer
        than three sweeps.
    rate_x_stderr_V, rate_y_stderr_V : float
        One standard error of the rates.
    residual_rms_V : float
        RMS of the offsets about the fitted model (segments + trend), V.
    quality : Quality
        Verdict: not ok when registration is weak or ambiguous, or the
        offsets do not follow the jump + trend model.
    """

    x_gate: str
    y_gate: str
    files: tuple[str, ...]
    times: tuple[str | None, ...]
    t: np.ndarray
    time_unit: str
    offset_x_V: np.ndarray
    offset_y_V: np.ndarray
    match: np.ndarray
    overlap: np.ndarray
    step_x_V: float
    step_y_V: float
    jumps: tuple[DriftJump, ...] = field(default_factory=tuple)
    rate_x_V: float = float("nan")
    rate_y_V: float = float("nan")
    rate_x_stderr_V: float = float("nan")
    rate_y_stderr_V: float = float("nan")
    residual_rms_V: float = float("nan")
    quality: Quality = field(default_factory=Quality)

    def __repr__(self) -> str:
        return (
            f"DriftResult({self.x_gate}/{self.y_gate}, {len(self.files)} sweeps, "
            f"{len(self.jumps)} jumps, rate=({1e3 * self.rate_x_V:.3g}, "
            f"{1e3 * self.rate_y_V:.3g}) mV/{self.time_unit}, ok={self.quality.ok})"
        )

    @property
    def significant_drift(self) -> bool:
        """True when a trend is resolved (|rate| > 3 σ on an axis) and exceeds half a step overall."""
        span = float(np.ptp(self.t)) if self.t.size else 0.0
        out = False
        for rate, err, step in (
            (self.rate_x_V, self.rate_x_stderr_V, self.step_x_V),
            (self.rate_y_V, self.rate_y_stderr_V, self.step_y_V),
        ):
            if math.isfinite(rate) and abs(rate) * span > 0.5 * abs(step):
                if not math.isfinite(err) or abs(rate) > 3 * err:
                    out = True
        return out

    def verdict(self) -> str:
        """One-line plain-language verdict."""
        parts = []
        if self.jumps:
            parts.append(f"{len(self.jumps)} jump{'s' if len(self.jumps) > 1 else ''}")
        if self.significant_drift:
            parts.append(
                f"slow drift ({1e3 * self.rate_x_V:+.3g}, {1e3 * self.rate_y_V:+.3g}) "
                f"mV/{self.time_unit}"
            )
        text = ", ".join(parts) if parts else "stable (no jump, no resolved drift)"
        return text + ("" if self.quality.ok else " — doubtful: " + "; ".join(self.quality.warnings))

    def to_json(self) -> dict:
        """Plain-JSON form: offsets and rates in mV."""

        def num(v: float) -> float | None:
            return float(v) if math.isfinite(v) else None

        return {
            "x_gate": self.x_gate,
            "y_gate": self.y_gate,
            "time_unit": self.time_unit,
            "sweeps": [
                {
                    "file": f,
                    "time": tm,
                    "t": num(t),
                    "offset_x_mV": num(1e3 * ox),
                    "offset_y_mV": num(1e3 * oy),
                    "match": num(m),
                    "overlap": num(ov),
                }
                for f, tm, t, ox, oy, m, ov in zip(
                    self.files, self.times, self.t, self.offset_x_V, self.offset_y_V,
                    self.match, self.overlap,
                )
            ],
            "step_mV": {"x": num(1e3 * self.step_x_V), "y": num(1e3 * self.step_y_V)},
            "jumps": [
                {"index": j.index, "file": j.file, "size_x_mV": num(1e3 * j.size_x_V),
                 "size_y_mV": num(1e3 * j.size_y_V)}
                for j in self.jumps
            ],
            "drift_rate_mV": {"x": num(1e3 * self.rate_x_V), "y": num(1e3 * self.rate_y_V)},
            "drift_rate_errors_mV": {
                "x": num(1e3 * self.rate_x_stderr_V), "y": num(1e3 * self.rate_y_stderr_V)
            },
            "residual_rms_mV": num(1e3 * self.residual_rms_V),
            "significant_drift": self.significant_drift,
            "verdict": self.verdict(),
            "quality": self.quality.to_dict(),
        }

    def write_csv(self, path: str | os.PathLike[str]) -> None:
        """Offsets per sweep as CSV (mV), atomically."""
        import csv
        import io

        from .store import atomic_write_text

        buf = io.StringIO()
        w = csv.writer(buf, lineterminator="\n")
        w.writerow(["file", "time", f"t_{self.time_unit}", "offset_x_mV", "offset_y_mV",
                    "match", "overlap", "jump_before"])
        jump_idx = {j.index for j in self.jumps}
        for i, (f, tm) in enumerate(zip(self.files, self.times)):
            w.writerow([f, tm or "", repr(float(self.t[i])), f"{1e3 * self.offset_x_V[i]:.6g}",
                        f"{1e3 * self.offset_y_V[i]:.6g}", f"{self.match[i]:.4f}",
                        f"{self.overlap[i]:.4f}", "true" if i in jump_idx else "false"])
        atomic_write_text(path, buf.getvalue())

    def save_plot(self, path: str | os.PathLike[str]) -> None:
        """Offset along x and y versus time, with trend, jumps and verdict, as PNG."""
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        fig = Figure(figsize=(8.0, 5.0), dpi=100)
        FigureCanvasAgg(fig)
        axes = fig.subplots(2, 1, sharex=True)
        model = _model_curves(self)
        for ax, gate, off, curve, step in (
            (axes[0], self.x_gate, self.offset_x_V, model[0], self.step_x_V),
            (axes[1], self.y_gate, self.offset_y_V, model[1], self.step_y_V),
        ):
            ax.axhspan(-500 * abs(step), 500 * abs(step), color="0.92", lw=0,
                       label="± half a voltage step")
            ax.plot(self.t, 1e3 * off, "o", ms=4, color="C0", label="measured offset")
            if curve is not None:
                bounds = [0, *[j.index for j in self.jumps], len(self.t)]
                for n, (a, b) in enumerate(zip(bounds[:-1], bounds[1:])):
                    ax.plot(self.t[a:b], 1e3 * curve[a:b], "-", color="C1", lw=1.2,
                            label="jumps + linear drift" if n == 0 else None)
            for j in self.jumps:
                tj = 0.5 * (self.t[j.index - 1] + self.t[j.index])
                ax.axvline(tj, color="C3", ls="--", lw=1)
            ax.set_ylabel(f"offset along {gate} (mV)")
            ax.grid(True, alpha=0.3)
        axes[0].legend(loc="best", fontsize=8)
        axes[1].set_xlabel("time since first sweep (h)" if self.time_unit == "h" else "sweep number")
        status = "ok" if self.quality.ok else "DOUBTFUL"
        fig.suptitle(f"Pattern drift {self.x_gate}/{self.y_gate} [{status}]\n{self.verdict()}",
                     fontsize=9)
        fig.tight_layout()
        atomic_savefig(fig, path)

    def write_outputs(self, out_dir: str | os.PathLike[str], *, stem: str = "drift") -> dict[str, Path]:
        """Write ``<stem>.csv``, ``<stem>.json`` and ``<stem>.png`` into ``out_dir``."""
        from .store import atomic_write_text

        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        paths = {k: out / f"{stem}.{k}" for k in ("csv", "json", "png")}
        self.write_csv(paths["csv"])
        atomic_write_text(paths["json"], json.dumps(self.to_json(), indent=1))
        tmp = out / f".tmp-{stem}.png"
        self.save_plot(tmp)
        os.replace(tmp, paths["png"])
        return paths


# --------------------------------------------------------------------------- preprocessing
def _ascending(da: xr.DataArray) -> xr.DataArray:
    for dim in da.dims:
        c = da[dim].values
        if c.size > 1 and c[1] < c[0]:
            da = da.isel({dim: slice(None, None, -1)})
    return da


def _feature_image(da: xr.DataArray, *, smooth_px: float) -> np.ndarray:
    """Background-free, polarity-free edge image of a map, robustly normalised.

    Gradient magnitude of the lightly smoothed map in the isotropic pixel
    frame: a smooth sensor background contributes a nearly constant level
    (removed with the median) and both line polarities give ridges.
    """
    from ..preprocess import denoise, derivatives

    ax = map_axes(da)
    smoothed = denoise(da, sigma_px=smooth_px) if smooth_px > 0 else da
    g = derivatives(smoothed).magnitude_px(ax.dx, ax.dy)
    finite = np.isfinite(g)
    if finite.sum() < 16:
        return np.full(g.shape, np.nan)
    med = np.median(g[finite])
    mad = 1.4826 * np.median(np.abs(g[finite] - med))
    scale = mad if mad > 0 else (np.std(g[finite]) or 1.0)
    z = (g - med) / scale
    return np.clip(z, -3.0, 30.0)  # a charge jump or a glitch must not dominate


def _resample(img: np.ndarray, x: np.ndarray, y: np.ndarray, xr_: np.ndarray, yr_: np.ndarray) -> np.ndarray:
    """Linear interpolation of ``img`` (on ascending x, y) onto the grid ``(yr_, xr_)``; NaN outside."""
    from scipy.interpolate import RegularGridInterpolator

    interp = RegularGridInterpolator((y, x), img, method="linear", bounds_error=False,
                                     fill_value=np.nan)
    yy, xx = np.meshgrid(yr_, xr_, indexing="ij")
    return interp(np.stack([yy.ravel(), xx.ravel()], axis=-1)).reshape(yy.shape)


@dataclass(frozen=True)
class _Prepared:
    img: np.ndarray  # feature image on the reference grid, NaN where no data
    label: str
    time: str | None
    x_gate: str
    y_gate: str


def _prepare(da: xr.DataArray, ref_x: np.ndarray | None, ref_y: np.ndarray | None, *,
             smooth_px: float, label: str) -> tuple[_Prepared, np.ndarray, np.ndarray]:
    return _place(feature_of(da, smooth_px=smooth_px), ref_x, ref_y, label=label)


#: Smoothing of the feature images of :func:`measure_drift` (pixels) unless told otherwise.
DEFAULT_SMOOTH_PX = 1.0


@dataclass(frozen=True)
class SweepFeature:
    """The feature image of one sweep on its own (ascending) voltage grid, as the drift uses it.

    Computed where the map is already in memory (a batch worker, right after the analysis),
    so the drift need not load the file again; :class:`PreparedSweep` points at it on disk.
    """

    img: np.ndarray  # (ny, nx)
    x: np.ndarray  # (nx,) V, ascending
    y: np.ndarray  # (ny,) V, ascending
    time: str | None
    x_gate: str
    y_gate: str
    smooth_px: float
    dx: float  # steps of the grid (as stabtool.mapdata.map_axes states them), V
    dy: float


def feature_of(da: xr.DataArray, *, smooth_px: float = DEFAULT_SMOOTH_PX) -> SweepFeature:
    """:class:`SweepFeature` of a map (validated, axes made ascending, :func:`_feature_image`)."""
    import warnings

    from ..errors import StabtoolWarning

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", StabtoolWarning)
        da = without_infinities(da)
        validate_map(da)
    da = _ascending(da)
    ax = map_axes(da)
    img = _feature_image(da, smooth_px=smooth_px)
    return SweepFeature(img, ax.x, ax.y, sweep_time_of(da), ax.x_gate, ax.y_gate, float(smooth_px),
                        float(ax.dx), float(ax.dy))


def _place(feat: SweepFeature, ref_x: np.ndarray | None, ref_y: np.ndarray | None, *,
           label: str) -> tuple[_Prepared, np.ndarray, np.ndarray]:
    """The feature on the reference grid (its own grid when there is no reference yet)."""
    img = feat.img
    if ref_x is None or ref_y is None:
        ref_x, ref_y = feat.x, feat.y
    else:
        if not (feat.x.shape == ref_x.shape and feat.y.shape == ref_y.shape
                and np.allclose(feat.x, ref_x, atol=1e-3 * abs(feat.dx))
                and np.allclose(feat.y, ref_y, atol=1e-3 * abs(feat.dy))):
            img = _resample(img, feat.x, feat.y, ref_x, ref_y)
    return _Prepared(img, label, feat.time, feat.x_gate, feat.y_gate), ref_x, ref_y


@dataclass(frozen=True)
class PreparedSweep:
    """A sweep of a series whose feature image was saved by the batch (``numpy.save``).

    ``source`` is the map file (the sweep's label, and what is loaded instead when the
    feature file cannot be read or was made with another smoothing); ``header`` is its
    :class:`SweepFeature` without the image (grid, time, gates, smoothing).
    """

    source: str
    feature_path: str
    header: SweepFeature

    @classmethod
    def of(cls, source: str, feature_path: str, feat: SweepFeature) -> PreparedSweep:
        """The sweep ``source`` whose ``feat.img`` was saved to ``feature_path``."""
        return cls(source, feature_path, replace(feat, img=np.empty((0, 0))))

    @property
    def time(self) -> str | None:
        return self.header.time


def _sweep(item: Any, ref_x: np.ndarray | None, ref_y: np.ndarray | None, *,
           smooth_px: float, load_options: Mapping[str, Any] | None = None) -> tuple[_Prepared, np.ndarray, np.ndarray]:
    """A series item (DataArray, path or :class:`PreparedSweep`) prepared on the reference grid."""
    if isinstance(item, PreparedSweep):
        h = item.header
        if h.smooth_px == smooth_px:
            try:
                img = np.load(item.feature_path, allow_pickle=False)
            except (OSError, ValueError):
                img = None
            if img is not None and img.shape == (h.y.size, h.x.size):
                return _place(replace(h, img=img), ref_x, ref_y, label=item.source)
        item = item.source
    da, label = _load(item, load_options)
    return _prepare(da, ref_x, ref_y, smooth_px=smooth_px, label=label)


# --------------------------------------------------------------------------- registration
def _tukey(n: int, alpha: float) -> np.ndarray:
    """Tukey (tapered cosine) window of length ``n``: flat centre, cosine tapers of ``alpha·n/2``."""
    if n < 3 or alpha <= 0:
        return np.ones(n)
    x = np.linspace(0.0, 1.0, n)
    w = np.ones(n)
    edge = alpha / 2
    lo, hi = x < edge, x > 1 - edge
    w[lo] = 0.5 * (1 + np.cos(np.pi * (x[lo] / edge - 1)))
    w[hi] = 0.5 * (1 + np.cos(np.pi * ((x[hi] - 1) / edge + 1)))
    return w


def _tukey2d(shape: tuple[int, int], alpha: float = 0.3) -> np.ndarray:
    return np.outer(_tukey(shape[0], alpha), _tukey(shape[1], alpha))


def _windowed_fft(img: np.ndarray, valid: np.ndarray, box: tuple[slice, slice], win: np.ndarray,
                  cache: dict | None) -> np.ndarray:
    """FFT of the image cropped to ``box``, minus its mean over valid pixels, zero elsewhere, tapered.

    ``cache`` (kept by the caller over one series): the transform of the same image array and box
    is computed once (each sweep is registered to the first and to the one before it, and is the
    one before the next): the same ``scipy.fft.fftn`` of the same array, so the same bits.
    """
    from scipy.fft import fftn

    key = (id(img), box[0].start, box[0].stop, box[1].start, box[1].stop)
    if cache is not None:
        hit = cache.get(key)
        if hit is not None and hit[0] is img:
            return hit[1]
    im, vm = img[box], valid[box]
    out = fftn(np.where(vm, im - np.mean(im[vm]), 0.0) * win)
    if cache is not None:
        cache[key] = (img, out)
    return out


def _register_images(ref: np.ndarray, mov: np.ndarray, *, upsample: int,
                     cache: dict | None = None) -> tuple[float, float, float, float]:
    """Pattern displacement of ``mov`` relative to ``ref`` in pixels (dy, dx), match, overlap.

    ``cache``: see :func:`_windowed_fft`.
    """
    from scipy import ndimage as ndi
    from skimage.registration import phase_cross_correlation

    vr, vm = np.isfinite(ref), np.isfinite(mov)
    overlap = float((vr & vm).sum()) / max(1, int(vr.sum()))
    if vm.sum() < 16 or vr.sum() < 16:
        return math.nan, math.nan, math.nan, overlap
    # crop to the rows and columns both maps mostly cover (an interrupted sweep
    # loses trailing rows; a shifted window loses a band): missing data must not
    # look like a flat region to the correlation
    both = vr & vm
    rows = np.flatnonzero(both.mean(axis=1) > 0.5)
    cols = np.flatnonzero(both.mean(axis=0) > 0.5)
    if rows.size < 8 or cols.size < 8:
        return math.nan, math.nan, math.nan, overlap
    box = (slice(int(rows[0]), int(rows[-1]) + 1), slice(int(cols[0]), int(cols[-1]) + 1))
    win = _tukey2d((box[0].stop - box[0].start, box[1].stop - box[1].start))
    fa = _windowed_fft(ref, vr, box, win, cache)
    fb = _windowed_fft(mov, vm, box, win, cache)
    ref, mov, vr, vm = ref[box], mov[box], vr[box], vm[box]
    # (the transforms phase_cross_correlation would compute itself from the windowed images)
    shift, _, _ = phase_cross_correlation(fa, fb, upsample_factor=upsample, normalization=None, space="fourier")
    # skimage returns the shift that moves ``mov`` onto ``ref``: the pattern moved by -shift
    back = ndi.shift(np.where(vm, mov, 0.0), shift, order=1, mode="constant", cval=0.0)
    valid = ndi.shift(vm.astype(float), shift, order=1, mode="constant", cval=0.0) > 0.99
    both = valid & vr
    if both.sum() > 16:
        ra, rb = ref[both], back[both]
        sa, sb = ra.std(), rb.std()
        match = float(np.mean((ra - ra.mean()) * (rb - rb.mean())) / (sa * sb)) if sa > 0 and sb > 0 else 0.0
    else:
        match = math.nan
    return -float(shift[0]), -float(shift[1]), match, overlap


def register_maps(
    reference: xr.DataArray, moving: xr.DataArray, *, upsample: int = 20, smooth_px: float = 1.0
) -> Registration:
    """Offset of ``moving``'s charge pattern relative to ``reference``, in volts.

    Parameters
    ----------
    reference, moving : xarray.DataArray, shape (ny, nx)
        Maps of the same two gates (any steps, directions or windows that
        overlap).
    upsample : int
        Sub-pixel precision of the phase correlation is ``1/upsample`` pixel.
    smooth_px : float
        Gaussian smoothing before the derivative, pixels.

    Returns
    -------
    Registration

    Raises
    ------
    InputError
        When the maps are of different gates.

    Notes
    -----
    The moving map's derivative image is resampled onto the reference's
    voltage grid, then registered by cross-correlation with the
    single-step DFT upsampling of Guizar-Sicairos, Thurman & Fienup, "Efficient
    subpixel image registration algorithms", Opt. Lett. 33, 156 (2008),
    doi:10.1364/OL.33.000156 (scikit-image's ``phase_cross_correlation``).
    The derivative (gradient magnitude) removes the smooth sensor
    background and the polarity of the lines; a Tukey window tapers the edges.
    A periodic honeycomb makes offsets larger than half a cell ambiguous.
    """
    ref, rx, ry = _prepare(reference, None, None, smooth_px=smooth_px, label="reference")
    mov, _, _ = _prepare(moving, rx, ry, smooth_px=smooth_px, label="moving")
    _check_gates(ref, mov)
    dy, dx, match, overlap = _register_images(ref.img, mov.img, upsample=upsample)
    return Registration(dx * float(np.median(np.diff(rx))), dy * float(np.median(np.diff(ry))),
                        match, overlap)


def _check_gates(ref: _Prepared, mov: _Prepared) -> None:
    if (mov.x_gate, mov.y_gate) != (ref.x_gate, ref.y_gate):
        raise InputError(
            mov.label,
            f"sweeps gates {mov.y_gate!r} (y) and {mov.x_gate!r} (x), but the series is of "
            f"{ref.y_gate!r} (y) and {ref.x_gate!r} (x); drift needs repeated sweeps of the same gates",
        )


# --------------------------------------------------------------------------- ordering
def _parse_time(value: Any) -> datetime | None:
    if value is None:
        return None
    if isinstance(value, datetime):
        dt = value
    elif isinstance(value, np.datetime64):
        dt = datetime.fromisoformat(str(np.datetime_as_string(value, unit="s")))
    else:
        text = str(value).strip()
        if not text:
            return None
        try:
            dt = datetime.fromisoformat(text.replace("Z", "+00:00"))
        except ValueError:
            return None
    return dt if dt.tzinfo else dt.replace(tzinfo=timezone.utc)


def sweep_time_of(da: xr.DataArray) -> str | None:
    """Start time of a sweep from its attributes (``time``, ``start_time``, ...), ISO text or None."""
    for key in TIME_ATTRS:
        value = da.attrs.get(key)
        if value is not None and _parse_time(value) is not None:
            return str(value)
    return None


def _natural_key(name: str) -> tuple:
    from .inputs import natural_key

    return natural_key(name)


def order_sweeps(labels: Sequence[str], times: Sequence[str | None]) -> list[int]:
    """Indices that put sweeps in time order.

    By the time attribute when every sweep has one, else by natural order of
    the labels (file names): ``run2`` before ``run10``.
    """
    parsed = [_parse_time(t) for t in times]
    if parsed and all(p is not None for p in parsed):
        return sorted(range(len(labels)), key=lambda i: (parsed[i], _natural_key(Path(labels[i]).name)))
    return sorted(range(len(labels)), key=lambda i: _natural_key(Path(labels[i]).name))


# --------------------------------------------------------------------------- step + trend
def _robust_sigma(v: np.ndarray) -> float:
    v = v[np.isfinite(v)]
    if v.size == 0:
        return math.nan
    return float(1.4826 * np.median(np.abs(v - np.median(v))))


def _detect_jumps(t: np.ndarray, off: np.ndarray, steps: np.ndarray, *, threshold: float) -> list[int]:
    """Indices i (first sweep after a jump) where the offset steps suddenly.

    A sweep-to-sweep difference is a jump when, after removing the typical
    (median) drift rate, it exceeds ``threshold`` robust standard deviations
    of the differences on either axis, and at least one voltage step.
    """
    n = off.shape[0]
    if n < 3:
        return []
    d = np.diff(off, axis=0)  # (n-1, 2)
    dt = np.diff(t)
    dt = np.where(dt > 0, dt, np.nan)
    rate = np.nanmedian(d / dt[:, None], axis=0)
    rate = np.where(np.isfinite(rate), rate, 0.0)
    resid = d - rate[None, :] * np.nan_to_num(dt, nan=0.0)[:, None]
    jumps: list[int] = []
    for k in range(n - 1):
        big = False
        for a in range(2):
            others = np.delete(resid[:, a], k)
            sigma = max(_robust_sigma(others) if others.size else 0.0, 0.1 * steps[a])
            if abs(resid[k, a]) > max(threshold * sigma, steps[a]):
                big = True
        if big and np.all(np.isfinite(off[k:k + 2])):
            jumps.append(k + 1)
    return jumps


def _fit_trend(t: np.ndarray, off: np.ndarray, jumps: Sequence[int]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Least squares of offset = level(segment) + rate·t per axis.

    Returns rate (2,), rate stderr (2,), model (n, 2).
    """
    n = t.size
    seg = np.zeros(n, dtype=int)
    for j in jumps:
        seg[j:] += 1
    nseg = int(seg.max()) + 1
    X = np.zeros((n, nseg + 1))
    X[np.arange(n), seg] = 1.0
    X[:, -1] = t
    ok = np.all(np.isfinite(off), axis=1)
    rate = np.full(2, np.nan)
    err = np.full(2, np.nan)
    model = np.full((n, 2), np.nan)
    Xo = X[ok]
    # a segment with no valid point or a degenerate time axis leaves the rate undetermined
    used = Xo[:, :-1].sum(axis=0) > 0
    Xo = np.concatenate([Xo[:, :-1][:, used], Xo[:, -1:]], axis=1)
    Xfull = np.concatenate([X[:, :-1][:, used], X[:, -1:]], axis=1)
    if Xo.shape[0] <= Xo.shape[1] - 1 or np.linalg.matrix_rank(Xo) < Xo.shape[1]:
        return rate, err, model
    for a in range(2):
        coef, *_ = np.linalg.lstsq(Xo, off[ok, a], rcond=None)
        model[:, a] = Xfull @ coef
        rate[a] = coef[-1]
        dof = Xo.shape[0] - Xo.shape[1]
        if dof > 0:
            r = off[ok, a] - Xo @ coef
            s2 = float(r @ r) / dof
            cov = s2 * np.linalg.inv(Xo.T @ Xo)
            err[a] = math.sqrt(max(cov[-1, -1], 0.0))
    return rate, err, model


def _model_curves(res: DriftResult) -> tuple[np.ndarray | None, np.ndarray | None]:
    off = np.stack([res.offset_x_V, res.offset_y_V], axis=1)
    _, _, model = _fit_trend(res.t, off, [j.index for j in res.jumps])
    if not np.isfinite(model).any():
        return None, None
    return model[:, 0], model[:, 1]


# --------------------------------------------------------------------------- the series
def _load(item: xr.DataArray | str | os.PathLike[str],
          load_options: Mapping[str, Any] | None = None) -> tuple[xr.DataArray, str]:
    if isinstance(item, xr.DataArray):
        return item, str(item.attrs.get("source", item.name or "map"))
    import warnings

    from ..errors import PartialSweepWarning
    from ..io import load

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PartialSweepWarning)  # missing points are handled
        return load(item, **(load_options or {})), os.fspath(item)


#: Sweeps per parallel registration task of :func:`measure_drift` (at least 4 tasks are made).
DRIFT_CHUNK = 32


@dataclass(frozen=True)
class _RangeRegistration:
    """Registrations of consecutive sweeps of a series (see :func:`_register_range`)."""

    labels: list[str]
    times: list[str | None]
    rows: list[tuple[float, float, float, float]]  # (dx, dy) px to the first sweep, match, overlap
    chain: list[tuple[float, float]]  # (dx, dy) px to the previous sweep (NaN for the first two)
    ref_x: np.ndarray
    ref_y: np.ndarray
    x_gate: str
    y_gate: str


def _register_range(first: Any, before: Any, chunk: Sequence[Any], start: int, *, upsample: int,
                    smooth_px: float, load_options: Mapping[str, Any] | None = None) -> _RangeRegistration:
    """Register the sweeps ``chunk`` (positions ``start, start + 1, …`` of the series) to ``first``.

    ``first`` is the series' first sweep (the reference and its voltage grid),
    ``before`` the sweep at position ``start − 1`` (None for ``start ≤ 1``),
    needed for the sweep-to-sweep registration of ``chunk[0]``. At most three
    feature images are held at once.
    """
    ref, ref_x, ref_y = _sweep(first, None, None, smooth_px=smooth_px, load_options=load_options)
    ref_label = ref.label
    prev = ref
    if start >= 2:
        prev, _, _ = _sweep(before, ref_x, ref_y, smooth_px=smooth_px, load_options=load_options)
    out = _RangeRegistration([], [], [], [], ref_x, ref_y, ref.x_gate, ref.y_gate)
    nan2 = (math.nan, math.nan)
    ffts: dict = {}  # windowed transforms by image and crop (see _windowed_fft)
    for k, item in enumerate(chunk, start):
        if k == 0:
            out.labels.append(ref_label)
            out.times.append(ref.time)
            out.rows.append((0.0, 0.0, 1.0, 1.0))
            out.chain.append(nan2)
            continue
        cur, _, _ = _sweep(item, ref_x, ref_y, smooth_px=smooth_px, load_options=load_options)
        label = cur.label
        out.labels.append(label)
        out.times.append(cur.time)
        _check_gates(ref, cur)
        live = (id(ref.img), id(prev.img), id(cur.img))
        for key in [key for key in ffts if key[0] not in live]:  # at most three images' transforms kept
            del ffts[key]
        dy, dx, match, overlap = _register_images(ref.img, cur.img, upsample=upsample, cache=ffts)
        out.rows.append((dx, dy, match, overlap))
        if k >= 2:
            sy, sx, _, _ = _register_images(prev.img, cur.img, upsample=upsample, cache=ffts)
            out.chain.append((sx, sy))
        else:
            out.chain.append(nan2)
        prev = cur
    return out


def measure_drift(
    maps: Sequence[xr.DataArray | str | os.PathLike[str]],
    *,
    order: str = "auto",
    upsample: int = 20,
    smooth_px: float = DEFAULT_SMOOTH_PX,
    jump_threshold: float = 6.0,
    min_match: float = 0.3,
    executor: Any = None,
    load_options: Mapping[str, Any] | None = None,
) -> DriftResult:
    """Pattern offset of each sweep relative to the first, with jumps and slow drift.

    Parameters
    ----------
    maps : sequence of DataArray, paths or PreparedSweep
        Repeated sweeps of the same two gates. Paths are loaded one at a
        time (at most three feature images are held at once); a
        :class:`PreparedSweep` gives the feature image the batch saved
        (the same numbers as loading its ``source``).
    order : {"auto", "given"}
        ``"auto"``: by the sweeps' time attribute when all have one, else by
        file name; ``"given"``: as passed.
    upsample : int
        Registration precision is ``1/upsample`` pixel.
    smooth_px : float
        Smoothing before the derivative, pixels.
    jump_threshold : float
        A jump is a sweep-to-sweep step larger than this many robust standard
        deviations of the steps (and at least one voltage step).
    min_match : float
        Sweeps whose aligned derivative images correlate less than this with
        the reference make the result doubtful.
    executor : concurrent.futures.Executor, optional
        Register chunks of consecutive sweeps in parallel on it (e.g. the
        batch's process pool); the result is the same as without.
    load_options : mapping, optional
        ``var``, ``x``, ``y`` for :func:`stabtool.io.load` of the paths.

    Returns
    -------
    DriftResult

    Raises
    ------
    InputError
        Fewer than two sweeps, unreadable files, or sweeps of different gates.

    Notes
    -----
    Registration: :func:`register_maps`. Each sweep is also registered to
    the previous one; when the direct and the chained offsets disagree by
    more than a voltage step, the pattern is ambiguous (a periodic
    honeycomb shifted by more than half a cell, or sweeps of different
    regions) and the result is doubtful. Jumps: outliers of the sweep-to-
    sweep differences (median/MAD, a robust z-score). Slow drift: ordinary
    least squares of offset = segment level + rate·t, with the standard
    error of the rate from the residuals.
    """
    if len(maps) < 2:
        raise InputError("INPUTS", f"drift needs at least 2 sweeps of the same gates, got {len(maps)}")
    if order not in ("auto", "given"):
        raise InputError("order", f"must be 'auto' or 'given', got {order!r}")
    items = list(maps)
    labels: list[str] = []
    times: list[str | None] = []
    if order == "auto":
        for it in items:
            if isinstance(it, PreparedSweep):
                labels.append(it.source)
                times.append(it.time)
                continue
            da, label = _load(it, load_options)
            labels.append(label)
            times.append(sweep_time_of(da))
            del da
        idx = order_sweeps(labels, times)
        items = [items[i] for i in idx]
    n = len(items)
    if executor is None:
        parts = [_register_range(items[0], None, items, 0, upsample=upsample, smooth_px=smooth_px,
                                 load_options=load_options)]
    else:
        # chunks of consecutive sweeps; each loads the first sweep (and its own predecessor) again
        n_chunks = max(1, min(n, max(4, -(-n // DRIFT_CHUNK))))
        bounds = np.linspace(0, n, n_chunks + 1).round().astype(int)
        futures = [executor.submit(_register_range, items[0], items[a - 1] if a >= 2 else None, items[a:b], int(a),
                                   upsample=upsample, smooth_px=smooth_px, load_options=load_options)
                   for a, b in itertools.pairwise(bounds) if b > a]
        parts = [f.result() for f in futures]
    files = [lab for p in parts for lab in p.labels]
    tlist = [tm for p in parts for tm in p.times]
    rows = [r for p in parts for r in p.rows]
    chain = [c for p in parts for c in p.chain]
    ref_x, ref_y = parts[0].ref_x, parts[0].ref_y
    x_gate, y_gate = parts[0].x_gate, parts[0].y_gate
    chain_bad: list[str] = []
    for k in range(2, n):
        # registration to the previous sweep must agree with the difference of the direct offsets
        sx, sy = chain[k]
        dx, dy = rows[k][0], rows[k][1]
        px, py = rows[k - 1][0], rows[k - 1][1]
        if math.isfinite(sx) and math.isfinite(dx) and (abs(px + sx - dx) > 1.0 or abs(py + sy - dy) > 1.0):
            chain_bad.append(Path(files[k]).name)
    step_x = float(np.median(np.diff(ref_x)))
    step_y = float(np.median(np.diff(ref_y)))
    arr = np.array(rows, dtype=float)
    off = np.stack([arr[:, 0] * step_x, arr[:, 1] * step_y], axis=1)
    match_arr, overlap_arr = arr[:, 2], arr[:, 3]

    parsed = [_parse_time(tm) for tm in tlist]
    if all(p is not None for p in parsed):
        t0 = parsed[0]
        t = np.array([(p - t0).total_seconds() / 3600.0 for p in parsed])  # type: ignore[operator]
        unit = "h"
        if np.any(np.diff(t) < 0) and order == "given":
            unit = "h"
    else:
        t = np.arange(len(files), dtype=float)
        unit = "sweep"

    steps = np.array([abs(step_x), abs(step_y)])
    jump_idx = _detect_jumps(t, off, steps, threshold=jump_threshold)
    rate, rate_err, model = _fit_trend(t, off, jump_idx)
    resid = off - model
    fin = np.isfinite(resid)
    rms = float(np.sqrt(np.mean(resid[fin] ** 2))) if fin.any() else math.nan

    q = Quality()
    if len(files) < 3:
        q = q.with_warning("fewer than 3 sweeps: jumps and drift rate cannot be told apart")
    bad = [Path(f).name for f, m in zip(files, match_arr) if not (m >= min_match)]
    if bad:
        q = q.with_warning(
            f"{len(bad)} sweep(s) register poorly to the first (match < {min_match}): "
            + ", ".join(bad[:5]) + (" ..." if len(bad) > 5 else "")
        )
    low = [Path(f).name for f, o in zip(files, overlap_arr) if o < 0.5]
    if low:
        q = q.with_warning(f"{len(low)} sweep(s) overlap less than half of the first window: "
                           + ", ".join(low[:5]))
    if chain_bad:
        q = q.with_warning(
            "registration to the first sweep disagrees with sweep-to-sweep registration for "
            + ", ".join(chain_bad[:5])
            + " (periodic pattern shifted by more than half a cell?)"
        )
    if math.isfinite(rms) and len(files) >= 4 and rms > 1.0 * float(np.hypot(*steps)) / math.sqrt(2):
        q = q.with_warning(
            f"offsets scatter {1e3 * rms:.3g} mV about the jump + linear-drift model, more than a "
            "voltage step: the drift is not described by that model"
        )
    jumps = tuple(
        DriftJump(index=j, file=files[j],
                  size_x_V=float(off[j, 0] - off[j - 1, 0] - (rate[0] * (t[j] - t[j - 1]) if math.isfinite(rate[0]) else 0.0)),
                  size_y_V=float(off[j, 1] - off[j - 1, 1] - (rate[1] * (t[j] - t[j - 1]) if math.isfinite(rate[1]) else 0.0)))
        for j in jump_idx
    )
    for j in jumps:
        q = q.with_warning(
            f"jump of ({1e3 * j.size_x_V:+.3g}, {1e3 * j.size_y_V:+.3g}) mV before {Path(j.file).name}",
            doubtful=False,
        )
    return DriftResult(
        x_gate=x_gate, y_gate=y_gate, files=tuple(files), times=tuple(tlist), t=t,
        time_unit=unit, offset_x_V=off[:, 0], offset_y_V=off[:, 1], match=match_arr,
        overlap=overlap_arr, step_x_V=step_x, step_y_V=step_y, jumps=jumps,
        rate_x_V=float(rate[0]), rate_y_V=float(rate[1]),
        rate_x_stderr_V=float(rate_err[0]), rate_y_stderr_V=float(rate_err[1]),
        residual_rms_V=rms, quality=q,
    )
