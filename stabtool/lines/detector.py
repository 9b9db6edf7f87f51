"""The line-detection pipeline: one configured, reusable, picklable object."""

from __future__ import annotations

from dataclasses import dataclass, fields, replace

import numpy as np
import xarray as xr

from ..errors import InputError
from ..mapdata import infinities_as_missing, share_of_points
from ..preprocess._checks import check_map
from ..preprocess.background import _row_offsets_core
from ..preprocess.noise import MAX_NOISE_SAMPLES, _noise_core
from ..quality import Quality
from ._family import family_fit
from ._geometry import steps
from ._merge import drop_duplicates, merge_collinear
from .edges import (
    CONTRAST_FLOOR,
    DEFAULT_HIGH_SIGMAS,
    DEFAULT_LOW_SIGMAS,
    FAINT_RATIO,
    EdgeScale,
    _edge_core,
    _select_scale,
    dot_line_bins,
)
from .families import classify_lines, pixel_angle_deg
from .hough import _segments_core, _segments_to_lines
from .jumps import _jumps_core
from .refine import RefinedLine, refine_segments
from .result import ChargeJump, LineDetection, LineFamily, TransitionLine
from .verdict import MIN_SLOPE_SCALE, _crosstalk_term, assess_quality, family_slope

__all__ = ["LineDetector", "detect_lines"]


@dataclass(frozen=True)
class LineDetector:
    """Configured line-detection pipeline; call it on a map.

    Parameters
    ----------
    sigma_px : float
        Gaussian σ of the edge detector, pixels.
    low_sigmas, high_sigmas : float
        Hysteresis thresholds in noise σ of a gradient component.
    min_length_px : float
        Shortest segment kept, pixels.
    max_gap_px : float
        Largest gap inside a segment, pixels.
    tolerance_px : float
        Perpendicular distance of edge pixels from a Hough line, pixels.
    angle_step_deg : float
        Hough angle bin, degrees (refined afterwards).
    profile_halfwidth_px : int
        Half-length of the step profiles fitted across each line, pixels.
    max_profiles : int
        Most profiles per line.
    detect_jumps : bool
        Look for charge jumps and exclude the rows at each jump.
    min_snr : float
        Lines with a median step height below ``min_snr`` noise σ make the
        verdict doubtful.
    scale_selection : bool
        Measure the width of the map's edges and smooth the edge map at a
        scale matched to it (at least ``sigma_px``, at most ``max_sigma_px``;
        :func:`stabtool.lines.edges.edge_scale`); segments on broad lines
        whose profiles fail on the map are fitted again on a lightly
        smoothed copy.
    max_sigma_px : float
        Largest Gaussian σ the scale selection may choose, pixels.
    weak_line_ratio : float
        Dot lines whose fitted step is below this fraction of their
        reference step (the median over all dot lines, or a faint family's
        own) are dropped as sensor texture (:func:`_drop_weak_lines`).
    contrast_floor : float
        Edges weaker than this fraction of the strong edges of their
        orientation are left out of the edge map
        (:data:`stabtool.lines.edges.CONTRAST_FLOOR`).

    Examples
    --------
    >>> det = LineDetector(sigma_px=2.0)
    >>> det  # doctest: +ELLIPSIS
    LineDetector(sigma_px=2.0, ...)
    """

    sigma_px: float = 1.5
    low_sigmas: float = DEFAULT_LOW_SIGMAS
    high_sigmas: float = DEFAULT_HIGH_SIGMAS
    min_length_px: float = 8.0
    max_gap_px: float = 3.0
    tolerance_px: float = 1.5
    angle_step_deg: float = 0.5
    profile_halfwidth_px: int = 6
    max_profiles: int = 80
    detect_jumps: bool = True
    min_snr: float = 3.0
    scale_selection: bool = True
    max_sigma_px: float = 4.0
    weak_line_ratio: float = 0.25
    contrast_floor: float = CONTRAST_FLOOR

    def __post_init__(self) -> None:
        for f in fields(self):
            v = getattr(self, f.name)
            if f.name in ("detect_jumps", "scale_selection"):
                if not isinstance(v, bool):
                    raise InputError(f.name, f"must be True or False, got {v!r}")
                continue
            if not (isinstance(v, (int, float)) and np.isfinite(v) and v > 0):
                raise InputError(f.name, f"must be a positive number, got {v!r}")
        for name in ("weak_line_ratio", "contrast_floor"):
            if getattr(self, name) >= 1:
                raise InputError(name, f"must be below 1, got {getattr(self, name)!r}")
        if self.low_sigmas > self.high_sigmas:
            raise InputError("low_sigmas", f"must not exceed high_sigmas ({self.high_sigmas}), got {self.low_sigmas}")

    def __repr__(self) -> str:
        args = ", ".join(f"{f.name}={getattr(self, f.name)!r}" for f in fields(self))
        return f"LineDetector({args})"

    def __call__(self, da: xr.DataArray) -> LineDetection:
        """Detect, sort and refine the transition lines of ``da``."""
        axes = check_map(da)
        values = infinities_as_missing(np.asarray(da.values, dtype=np.float64))  # (an overflowed read-out)
        return _detect_core(values, axes, self)


#: Edge width (px, derivative-profile σ) from which segments whose profiles fail are fitted
#: again on a smoothed copy of the map.
RESCUE_MIN_WIDTH_PX = 1.0
#: Gaussian σ of that copy as a fraction of the edge width (the profile widens by √(1 + f²)).
RESCUE_SMOOTHING = 0.5


def _select_edges(work: np.ndarray, noise: float, cfg: LineDetector,
                  faint_bins: np.ndarray | None = None) -> tuple[np.ndarray, EdgeScale]:
    """Edge map at the scale selected from the width of the map's edges."""
    edges, scale = _select_scale(work, noise, sigma_px=cfg.sigma_px, max_sigma_px=cfg.max_sigma_px,
                                 low=cfg.low_sigmas, high=cfg.high_sigmas, faint_bins=faint_bins,
                                 contrast_floor=cfg.contrast_floor)
    return edges, scale


def _slopes_apart(straight: float, bent: float, family: str) -> str:
    """How far two slopes of a family lie apart: relative, or in the virtual-gate element near an axis.

    On a map swept along virtual gates the lines run along the axes, where a relative difference
    of slopes means nothing (1169 against 1114 is M12 −0.00086 against −0.00090); the element
    itself is printed there, as the slope-error check does (``verdict.MIN_SLOPE_SCALE``).
    """
    v_straight, _ = _crosstalk_term(straight, 0.0)
    v_bent, _ = _crosstalk_term(bent, 0.0)
    if max(abs(v_straight), abs(v_bent)) >= MIN_SLOPE_SCALE:
        return f"{100 * abs(bent / straight - 1):.1f} % apart"
    element = "M12" if family == "dot1" else "M21"
    return f"{element} {-v_straight:.3g} against {-v_bent:.3g}"


def _rescue_broad(refined, segs, work, axes, names, along, edges, width_px: float, cfg: LineDetector):
    """Fit the segments whose profiles failed again, on a map smoothed by ``RESCUE_SMOOTHING·width``.

    On broad lines at low SNR a single profile across the line holds too
    little signal for a significant step; a Gaussian smoothing narrower than
    the line itself lowers the noise of each sample by ≈ ``1/(2√π σ_r)``
    while it keeps the line's centre (a symmetric kernel on a straight line)
    and widens the profile by only ``√(1 + RESCUE_SMOOTHING²)``. The smoothed
    noise is correlated over ≈ ``2√π σ_r`` profiles along the line, so the
    standard errors (and crossing-point errors) of the rescued lines are
    scaled up by the square root of that (effective number of independent
    profiles), the bending χ² down by it, and the fitted width is corrected
    for the kernel's variance (Fermi width variance π²w²/3).
    """
    bad = [k for k, r in enumerate(refined[: len(segs)]) if not r.refined]
    if not bad:
        return refined
    sr = RESCUE_SMOOTHING * width_px
    smooth = _smoothed(work, sr)
    again = refine_segments(segs, smooth, axes, families=names, along_x=along,
                            halfwidth_px=int(cfg.profile_halfwidth_px), max_points=int(cfg.max_profiles), edges=edges)
    inflate = float(np.sqrt(max(1.0, 2.0 * np.sqrt(np.pi) * sr)))
    out = list(refined)
    dx, dy = steps(axes)
    for k in bad:
        r = again[k]
        if not r.refined:
            continue
        ln = r.line
        step = abs(dx) if r.along_x else abs(dy)
        w_px = ln.width_V / step if np.isfinite(ln.width_V) else np.nan
        w_corr = np.sqrt(max(w_px**2 - 3.0 * sr**2 / np.pi**2, 0.25 * w_px**2)) * step if np.isfinite(w_px) else ln.width_V
        ln = replace(ln, slope_stderr=ln.slope_stderr * inflate, position_stderr=ln.position_stderr * inflate,
                     width_V=float(w_corr), width_stderr_V=ln.width_stderr_V * inflate,
                     bend_chi2=ln.bend_chi2 / inflate**2)
        pts = None if r.points is None else (r.points[0], r.points[1], r.points[2] * inflate)
        out[k] = replace(r, line=ln, points=pts)
    return out


#: Row offsets for the profile fits from the pixels away from the first pass's edges.
ROW_OFFSETS_CLEAR_OF_LINES = True
#: Pixels within this many derivative σ (the measured edge width) of an edge pixel are
#: left out of the row-offset medians (at least ``ROW_CLEAR_MIN_PX``).
ROW_CLEAR_WIDTHS = 3.5
ROW_CLEAR_MIN_PX = 3


def _offsets_clear_of_lines(values: np.ndarray, work: np.ndarray, edges: np.ndarray, scale: EdgeScale | None,
                            excluded_rows: np.ndarray, noise: float, plain: np.ndarray) -> np.ndarray:
    """``values`` minus row offsets measured away from the lines (see ``_masked_row_offsets``).

    The first-pass offsets (all pixels of a row) find the edges; the edge
    map, dilated by ``ROW_CLEAR_WIDTHS`` edge widths, then marks the pixels
    whose row differences carry a line's own slope, and the offsets are
    measured again without them. Returns ``work`` itself when no edge was found.
    """
    from ..preprocess.background import _row_offsets_core as offsets

    if not edges.any():
        return work
    w = scale.width_px if scale is not None and np.isfinite(scale.width_px) else 0.0
    r = max(ROW_CLEAR_MIN_PX, int(np.ceil(ROW_CLEAR_WIDTHS * w)))
    # dilation by a (2r + 1)² square, as two moving windows
    near = _within(_within(edges, r, axis=0), r, axis=1)
    off = offsets(values, near, noise, plain)
    if off is plain:
        return work
    out = values - off[:, None]
    if excluded_rows.size:
        out[excluded_rows] = np.nan
    return out


def _within(mask: np.ndarray, r: int, *, axis: int) -> np.ndarray:
    """Pixels within ``r`` of a marked pixel along ``axis`` (a moving maximum of width 2r + 1).

    The same as :func:`scipy.ndimage.maximum_filter1d` of the 0/1 mask
    (its reflecting border adds nothing to a maximum), as shifted ORs.
    """
    out = mask.copy()
    for k in range(1, min(r, mask.shape[axis] - 1) + 1):
        if axis == 0:
            out[k:] |= mask[:-k]
            out[:-k] |= mask[k:]
        else:
            out[:, k:] |= mask[:, :-k]
            out[:, :-k] |= mask[:, k:]
    return out


def _smoothed(values: np.ndarray, sigma_px: float) -> np.ndarray:
    """Gaussian-smoothed copy of ``values`` (NaN-aware: gaps stay NaN)."""
    from scipy import ndimage as ndi

    from ..preprocess._nan import fill_nan

    finite = np.isfinite(values)
    img = values if finite.all() else fill_nan(values)
    sm = ndi.gaussian_filter(img, sigma_px, mode="nearest")
    if not finite.all():
        sm[~finite] = np.nan
    return sm


def _drop_weak_lines(refined: list[RefinedLine], names: list[str], ratio: float) -> list[RefinedLine]:
    """Drop dot lines (negative slope) whose fitted step is below ``ratio`` times the median step.

    Weak lines among strong ones are sensor texture, not transitions. The
    median is over all dot lines, except for a first-pass family (``names``)
    whose own median is below ``FAINT_RATIO`` of it: a sensor that sees one
    dot much more weakly than the other gives that dot's whole family small
    steps, and they are kept (measured against their own median).

    A charge sensor's sensitivity also varies across a map: on a Lorentzian
    peak ``1/(1 + d²)`` the slope at two half-widths from the top (d = 2) is
    a quarter of the largest (at d = 1/√3), at three half-widths a tenth, so
    real lines on the weak side can have steps below a quarter of the
    median. The analysis detects again with a tenth when the lines of the
    first detection give no charge cell (``analysis.FADED_LINE_RATIO``).
    """
    dot = [(r, n) for r, n in zip(refined, names) if r.refined and r.line.slope < 0]
    if len(dot) < 4:
        return refined
    ref_all = float(np.median([r.step_height for r, _ in dot]))
    ref_h = {}
    for n in set(names):
        hs = [r.step_height for r, m in dot if m == n]
        # a family of its own contrast only when it is clearly fainter than the map's lines (as the
        # edge map's contrast floor, FAINT_RATIO); otherwise the median over all dot lines
        own = float(np.median(hs)) if len(hs) >= 4 else np.inf
        ref_h[n] = own if own < FAINT_RATIO * ref_all else ref_all
    return [r for r, n in zip(refined, names)
            if not (r.line.slope < 0 and (not r.refined or r.step_height < ratio * ref_h[n]))]


def _detect_core(values: np.ndarray, axes, cfg: LineDetector) -> LineDetection:
    ny = values.shape[0]
    quality = Quality()
    gone = ~np.isfinite(values)
    missing = float(gone.mean())
    if missing > 0:
        quality = quality.with_warning(f"{share_of_points(gone)} are missing (NaN); analysed the rest",
                                       doubtful=missing > 0.5)
    noise = _noise_core(values, MAX_NOISE_SAMPLES)
    if not (np.isfinite(noise) and noise > 0):
        rng = np.nanpercentile(values, [1, 99])
        noise = max(1e-3 * float(rng[1] - rng[0]), np.finfo(float).tiny)
    plain_offsets = _row_offsets_core(values)
    work = values - plain_offsets[:, None]
    # charge jumps
    jumps: list[ChargeJump] = []
    excluded: list[int] = []
    if cfg.detect_jumps:
        # (row offsets leave the x differences, so the noise σ, unchanged)
        for r, s in _jumps_core(work, noise=noise):
            jumps.append(ChargeJump(row=r, y=float(axes.y[r]), shift_x_V=float(s * axes.dx)))
            excluded.extend([r - 1, r])
    excluded_rows = np.array(sorted({r for r in excluded if 0 <= r < ny}), dtype=int)
    if excluded_rows.size:
        work = work.copy()
        work[excluded_rows] = np.nan
    if len(jumps) > 3:
        quality = quality.with_warning(
            f"{len(jumps)} charge jumps (pattern shifts along x) found: the map looks unstable "
            "(telegraph switching of a charge trap?)")
    elif jumps:
        quality = quality.with_warning(
            f"{len(jumps)} charge jump(s) at row(s) {', '.join(str(j.row) for j in jumps)}: "
            "the rows at each jump were excluded and the pieces analysed separately", doubtful=False)
    # edges and segments, at a scale matched to the width of the lines
    # a faint family (a sensor that hardly sees one dot) gets its own contrast floor, but only among
    # the dot lines' orientations: interdot lines are faint on most sensors
    faint_bins = dot_line_bins(float(axes.dx), float(axes.dy))
    if cfg.scale_selection:
        edges, scale = _select_edges(work, noise, cfg, faint_bins)
    else:
        edges, *_ = _edge_core(work, cfg.sigma_px, noise, cfg.low_sigmas, cfg.high_sigmas, cfg.contrast_floor,
                               faint_bins=faint_bins)
        scale = None
    if ROW_OFFSETS_CLEAR_OF_LINES:
        work = _offsets_clear_of_lines(values, work, edges, scale, excluded_rows, noise, plain_offsets)
    segs = _segments_core(edges, min_length_px=cfg.min_length_px, max_gap_px=cfg.max_gap_px,
                          tolerance_px=cfg.tolerance_px, angle_step_deg=cfg.angle_step_deg, max_lines=400)
    segs = merge_collinear(segs)
    coarse = _segments_to_lines(segs, axes, ["unassigned"] * len(segs))  # segment_to_line of each
    names = classify_lines(coarse, axes)
    along = []
    for line, name in zip(coarse, names):
        if name == "dot1":
            along.append(True)
        elif name == "dot2":
            along.append(False)
        else:
            along.append(abs(pixel_angle_deg(line, axes)) > 45.0)
    refined: list[RefinedLine] = refine_segments(segs, work, axes, families=names, along_x=along,
                                                 halfwidth_px=int(cfg.profile_halfwidth_px),
                                                 max_points=int(cfg.max_profiles), edges=edges)
    if (scale is not None and scale.sigma_px > cfg.sigma_px and np.isfinite(scale.width_px)
            and scale.width_px >= RESCUE_MIN_WIDTH_PX):
        # broad lines whose edges needed a larger scale: rescue the segments whose profiles fail
        refined = _rescue_broad(refined, segs, work, axes, names, along, edges, scale.width_px, cfg)
    # weak lines among strong ones of their family are sensor texture, not transitions
    refined = _drop_weak_lines(refined, names, cfg.weak_line_ratio)
    # second pass: classify again with the refined slopes
    lines = [r.line for r in refined]
    names2 = classify_lines(lines, axes)
    lines = [l if l.family == n else replace(l, family=n) for l, n in zip(lines, names2)]  # type: ignore[arg-type]
    keep_lines = drop_duplicates(lines, steps(axes))
    keep_ids = {id(l) for l in keep_lines}
    mask_keep = [id(l) in keep_ids for l in lines]
    refined = [r for r, k in zip(refined, mask_keep) if k]
    names2 = [n for n, k in zip(names2, mask_keep) if k]
    lines = [l for l, k in zip(lines, mask_keep) if k]
    families: dict[str, LineFamily] = {}
    unassigned: list[TransitionLine] = []
    fits = {}
    for fam, other in (("dot1", "dot2"), ("dot2", "dot1")):
        mem = [r for r, n in zip(refined, names2) if n == fam]
        oth = [l for l, n in zip(lines, names2) if n == other]
        fits[fam] = family_fit(mem, oth, axes, steep=fam == "dot1")
        f = fits[fam]
        if f is not None and f.bend_used:
            quality = quality.with_warning(
                f"{fam} lines bend towards the triple points (strong interdot tunnel coupling?): the "
                f"straight-line slope {f.straight_slope:.4g} is biased; reporting {f.slope:.4g} from a fit "
                f"with 1/distance bending terms ({_slopes_apart(f.straight_slope, f.slope, fam)}), itself uncertain")
    for fam in ("dot1", "dot2", "interdot"):
        members = [l for l, n in zip(lines, names2) if n == fam]  # (their family is already set)
        key = (lambda l: l.y0) if fam == "dot2" else (lambda l: l.x0)
        members.sort(key=key)
        s, se, _ = family_slope(members)
        jf = fits.get(fam)
        if jf is not None and (jf.bend_used or (np.isfinite(jf.slope_stderr) and np.isfinite(se)
                                                and jf.slope_stderr <= se
                                                and abs(jf.slope - s) <= 3 * np.hypot(se, jf.slope_stderr))):
            # the joint fit of all members (one shared slope) when it agrees with the
            # line-by-line mean and is more precise; otherwise the robust mean of lines
            s, se = jf.slope, jf.slope_stderr
        families[fam] = LineFamily(name=fam, slope=s, slope_stderr=se, lines=tuple(members))  # type: ignore[arg-type]
    unassigned = [l for l, n in zip(lines, names2) if n == "unassigned"]
    heights = np.array([r.step_height for r, n in zip(refined, names2) if n in ("dot1", "dot2") and r.refined])
    snr = float(np.median(heights) / noise) if heights.size else float("nan")
    quality = assess_quality(families, tuple(unassigned), snr=snr, min_snr=cfg.min_snr,
                             excluded_fraction=excluded_rows.size / ny, quality=quality)
    return LineDetection(axes=axes, families=families, unassigned=tuple(unassigned), jumps=tuple(jumps),
                         excluded_rows=excluded_rows, noise_level=float(noise), snr=snr, quality=quality,
                         processed=work, edges=edges,
                         edge_width_px=float(scale.width_px) if scale is not None else float("nan"))


def detect_lines(da: xr.DataArray, **options) -> LineDetection:
    """Detect the transition lines of a map with a :class:`LineDetector`.

    Parameters
    ----------
    da : xarray.DataArray, shape (ny, nx)
        A map in the stabtool data model (volts on both axes).
    **options
        Keyword options of :class:`LineDetector`.

    Returns
    -------
    LineDetection
    """
    valid = {f.name for f in fields(LineDetector)}
    bad = [k for k in options if k not in valid]
    if bad:
        import difflib

        hint = difflib.get_close_matches(bad[0], sorted(valid), n=1)
        extra = f"; did you mean {hint[0]!r}?" if hint else f"; valid options: {', '.join(sorted(valid))}"
        raise InputError(bad[0], f"unknown option of detect_lines{extra}")
    return LineDetector(**options)(da)
