"""Figure of an analysis: the map, the line families, triple points, charge states, key numbers.

:func:`plot_result` draws on a pyplot (or any) Axes for interactive use;
:func:`save_plot` and :func:`render_png` write the same content as a PNG and
are built for a batch that renders one figure per map.

Notes
-----
Where the time of a per-map PNG goes, and what the batch path does about it:

* Figure set-up (axes, ticks, colour bar): one Agg figure per process, thread
  and resolution is kept (:class:`_Frame`) with fixed axes positions (no
  layout pass); per map its image, colour limits, labels and limits are
  updated and only the per-map artists (families, triple points, labels,
  boxes, legend) are replaced.
* Text rasterisation (tick labels, legend, charge-state labels, the key
  number box): the Agg renderer of these figures rasterises each distinct
  string once per process and blits the cached glyph image afterwards
  (:class:`_TextCacheAgg`; the whole string in one FreeType pass, as
  matplotlib ≤ 3.10 did, instead of one call per glyph).
* The map: colour-mapped at its own resolution and up-sampled to the axes'
  display pixels by run-length repeats (:func:`_display_pixels`), blitted as
  is; the colour bar is a fixed ramp whose axis follows the colour limits
  (:class:`_GreyScale`). matplotlib's resampler and colour bar rebuild took
  ~16 and ~12 ms per map.
* Charge-state labels avoid the key-number box and the legend
  (:func:`_label_anchors`); the warnings sit in a band under the map, off it.
* Encoding: RGB PNG straight from the canvas buffer by Pillow at zlib level 1
  (:func:`_encode_png`).
"""

from __future__ import annotations

import math
import os
import threading
from typing import Any, ClassVar

import numpy as np

from ..io.atomic import atomic_write_bytes
from .caution import SHORT_CAUTION
from .text import fmt_pm

__all__ = ["FAMILY_COLOURS", "plot_result", "render_png", "save_plot"]

#: Colours of the line families (colour-blind-safe Okabe–Ito palette).
FAMILY_COLOURS = {"dot1": "#E69F00", "dot2": "#56B4E9", "interdot": "#CC79A7"}
#: Colour of the segments named as another dot's lines (Okabe–Ito bluish green).
STRAY_COLOUR = "#009E73"
#: Characters per line of the warnings box (6.5 pt text across the map's width).
WARNING_LINE_CHARS = 150
#: Figure size (inches) and resolution of the per-map plots.
FIGSIZE_IN = (9.5, 8.0)
#: Height (inches) of the band under the map that holds the warnings (doubts of a doubtful map,
#: notes of an ok one): kept off the map, so no line or label is hidden under them.
WARNING_BAND_IN = 1.0
#: Top of the warnings box, inches below the map's lower edge (under the tick and axis labels).
WARNING_BOX_DROP_IN = 0.55
PLOT_DPI = 100
#: zlib level of the PNGs (1: fast, files about 20 % larger than at the default 6).
PNG_COMPRESS_LEVEL = 1
#: Distinct text strings kept rasterised per process (the cache is emptied when full).
TEXT_CACHE_SIZE = 4096


def _key_numbers(res: Any) -> str:
    d = res.diagram
    m, me = d.vg_matrix, d.vg_matrix_error
    rows = [
        f"M12 = {fmt_pm(m[0, 1], me[0, 1])}",
        f"M21 = {fmt_pm(m[1, 0], me[1, 0])}",
        f"ΔV1 = {fmt_pm(d.addition_V[0], d.addition_V_error[0], scale=1e3, unit='mV')}",
        f"ΔV2 = {fmt_pm(d.addition_V[1], d.addition_V_error[1], scale=1e3, unit='mV')}",
    ]
    if d.mutual_resolved:
        rows.append(f"δ1, δ2 = {1e3 * d.mutual_V[0]:.3g}, {1e3 * d.mutual_V[1]:.3g} mV")
    from ..fit.refine import TUNNEL_PARAM  # (not at import: the plots need no fitter otherwise)

    ref = getattr(res, "refinement", None)
    if ref is not None and TUNNEL_PARAM in (ref.params or {}):  # the adopted model fit has the coupling
        t_ueV = res.model_fit_tunnel_coupling_ueV()
        if t_ueV is not None:
            rows.append(f"t = {fmt_pm(t_ueV['value'], t_ueV['error'], digits=3)} µeV (model fit, gap 2t)")
        else:
            tv, te = ref.params[TUNNEL_PARAM], ref.errors[TUNNEL_PARAM]
            rows.append(f"t/(e α11) = {fmt_pm(tv, te, scale=1e3, unit='mV')} (model fit)")
    c, ce = res.gate_capacitance
    if res.from_triple_points:  # a transport map
        rows.append("Cdg from the triple-point lattice:")
    rows.append(f"Cdg = [[{fmt_pm(c[0, 0], ce[0, 0], digits=3)}, {fmt_pm(c[0, 1], ce[0, 1], digits=3)}],")
    rows.append(f"       [{fmt_pm(c[1, 0], ce[1, 0], digits=3)}, {fmt_pm(c[1, 1], ce[1, 1], digits=3)}]] aF")
    if np.all(np.isfinite(res.scale.alpha_diag)):
        la, le = res.lever_arm, res.lever_arm_error
        ec, ece = res.charging_energy_meV, res.charging_energy_error_meV
        rows.append(f"α11 = {fmt_pm(la[0, 0], le[0, 0], digits=3)}, α22 = {fmt_pm(la[1, 1], le[1, 1], digits=3)} eV/V")
        rows.append(f"E_C = {fmt_pm(ec['dot1'], ece['dot1'], digits=3)}, {fmt_pm(ec['dot2'], ece['dot2'], digits=3)} meV")
        rows.append(f"scale from: {res.scale.reference}")
        tc = getattr(res, "tunnel", None)
        if tc is not None and tc:
            rows.append(f"t = {fmt_pm(tc.value_ueV, tc.error_ueV, digits=3)} µeV (gap 2t)")
        elif tc is not None and np.isfinite(tc.upper_limit_ueV):
            rows.append(f"t < {tc.upper_limit_ueV:.3g} µeV (2σ)")
    elif res.scale.quality.warnings:
        rows.append("energy scale: n/a (see notes)")
    else:
        rows.append("no energy reference")
    rows.append("quality: " + ("ok" if res.quality.ok else "DOUBTFUL"))
    if np.any(np.isfinite(m)):
        rows.append(SHORT_CAUTION)
    return "\n".join(rows)


# --------------------------------------------------------------------------- fast Agg pieces
def _text_cache_agg() -> type:
    """The Agg renderer subclass that rasterises each distinct string once (built on first use)."""
    global _TEXT_CACHE_AGG
    if _TEXT_CACHE_AGG is not None:
        return _TEXT_CACHE_AGG
    from matplotlib.backends.backend_agg import RendererAgg, get_hinting_flag

    class TextCacheAgg(RendererAgg):
        """Agg renderer whose plain (non-math) text is rasterised once per string and then blitted.

        A string is laid out and rasterised in one FreeType pass (``set_text`` and
        ``draw_glyphs_to_bitmap``, the text path of matplotlib ≤ 3.10) and the grey image
        kept with its offsets, keyed by string, font, size, resolution and antialiasing;
        the text is then placed on whole pixels. Any failure of this path falls back to
        matplotlib's own ``draw_text`` for good.
        """

        cache: ClassVar[dict] = {}
        enabled: ClassVar[bool] = True

        def draw_text(self, gc, x, y, s, prop, angle, ismath=False, mtext=None):
            cls = type(self)
            if ismath or not cls.enabled or _has_font_features(mtext):
                return super().draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)
            aa = bool(gc.get_antialiased())
            key = (s, hash(prop), prop.get_size_in_points(), self.dpi, aa)
            hit = cls.cache.get(key)
            try:
                if hit is None:
                    font = self._prepare_font(prop)
                    font.set_text(s, 0, flags=get_hinting_flag())
                    font.draw_glyphs_to_bitmap(antialiased=aa)
                    xo, yo = font.get_bitmap_offset()
                    hit = (np.array(font.get_image(), dtype=np.uint8), xo / 64.0, yo / 64.0,
                           font.get_descent() / 64.0)
                    if len(cls.cache) >= TEXT_CACHE_SIZE:
                        cls.cache.clear()
                    cls.cache[key] = hit
                img, xo, yo, d = hit
                rad = math.radians(angle)
                self._renderer.draw_text_image(img, round(x + xo + d * math.sin(rad)),
                                               round(y + yo + d * math.cos(rad)) + 1, angle, gc)
            except (AttributeError, TypeError, ValueError):  # another matplotlib's internals
                cls.enabled = False
                return super().draw_text(gc, x, y, s, prop, angle, ismath=ismath, mtext=mtext)
            return None

    _TEXT_CACHE_AGG = TextCacheAgg
    return TextCacheAgg


_TEXT_CACHE_AGG: type | None = None


def _has_font_features(mtext: Any) -> bool:
    for name in ("get_fontfeatures", "get_language"):
        get = getattr(mtext, name, None)
        if get is not None and get():
            return True
    return False


def _fast_canvas(fig: Any) -> Any:
    """Attach an Agg canvas whose renderer caches rasterised text (see :func:`_text_cache_agg`)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    renderer_cls = _text_cache_agg()

    class _Canvas(FigureCanvasAgg):
        def get_renderer(self, *args: Any, **kwargs: Any) -> Any:
            r = super().get_renderer(*args, **kwargs)
            if type(r) is not renderer_cls and type(r).__name__ == "RendererAgg":
                r.__class__ = renderer_cls  # the subclass adds no state
            return r

    return _Canvas(fig)


# --------------------------------------------------------------------------- drawing
def _even(a: np.ndarray) -> bool:
    d = np.diff(a)
    return a.size > 1 and bool(np.all(np.abs(d - d[0]) <= 1e-3 * abs(d[0]))) and d[0] != 0


def _map_arrays(res: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray, float, float]:
    da = res.data
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    z = np.asarray(da.values, float)
    lo, hi = np.nanpercentile(z, [1, 99])
    return x, y, z, float(lo), float(hi)


def _image_geometry(x: np.ndarray, y: np.ndarray, z: np.ndarray) -> tuple[np.ndarray, tuple, str]:
    """Data in increasing-axis order, its extent (mV) and the interpolation for ``imshow``."""
    if x[0] > x[-1]:
        x, z = x[::-1], z[:, ::-1]
    if y[0] > y[-1]:
        y, z = y[::-1], z[::-1]
    hx, hy = 0.5 * (x[1] - x[0]), 0.5 * (y[1] - y[0])
    extent = (1e3 * (x[0] - hx), 1e3 * (x[-1] + hx), 1e3 * (y[0] - hy), 1e3 * (y[-1] + hy))
    # nearest-neighbour up-sampling keeps pixels crisp (as pcolormesh would); large maps are filtered
    interp = "nearest" if max(z.shape) <= 600 else "antialiased"
    return z, extent, interp


def _image(ax: Any, x: np.ndarray, y: np.ndarray, z: np.ndarray, lo: float, hi: float) -> Any:
    """The map as an image on evenly spaced axes (fast), ``pcolormesh`` otherwise."""
    if not (_even(x) and _even(y)):
        return ax.pcolormesh(1e3 * x, 1e3 * y, z, shading="nearest", cmap="gray", vmin=lo, vmax=hi, rasterized=True)
    zz, extent, interp = _image_geometry(x, y, z)
    from matplotlib.image import AxesImage

    im = AxesImage(ax, cmap="gray", interpolation=interp, origin="lower")
    im.set_data(zz)
    im.set_clim(lo, hi)
    ax.set_aspect("auto")
    im.set_extent(extent)
    ax.add_image(im)
    return im


def _left_out_areas(res: Any, ax: Any) -> None:
    """Hatch the areas left out of the model fit for sharp residual structure (none: nothing drawn)."""
    boxes = getattr(getattr(res, "refinement", None), "left_out_px", ())
    if not boxes:
        return
    from matplotlib.collections import PatchCollection
    from matplotlib.patches import Rectangle

    x = 1e3 * np.asarray(res.data[res.data.dims[-1]].values, float)
    y = 1e3 * np.asarray(res.data[res.data.dims[0]].values, float)
    rects = []
    for y0, y1, x0, x1 in boxes:
        xa, xb = sorted((x[x0], x[min(x1, x.size) - 1]))
        ya, yb = sorted((y[y0], y[min(y1, y.size) - 1]))
        rects.append(Rectangle((xa, ya), xb - xa, yb - ya))
    ax.add_collection(PatchCollection(rects, facecolor="none", edgecolor=LEFT_OUT_COLOUR, hatch="///",
                                      linewidth=0.8, label="left out of the model fit"), autolim=False)


#: Edge and hatch colour of the areas left out of the model fit.
LEFT_OUT_COLOUR = "#c05000"


def _overlays(res: Any, ax: Any, *, n_pixels: int, max_labels: int, texts: _TextPool | None = None) -> None:
    """Everything on top of the map: families, triple points, labels, legend, boxes, axis texts.

    With ``texts`` (a reused frame's pool) the charge-state labels and the two boxes are
    updated in place from map to map (surplus ones hidden) instead of being created anew.
    """
    if texts is not None:
        texts.start()
    from matplotlib.collections import LineCollection
    from matplotlib.lines import Line2D

    da = res.data
    d = res.diagram
    aside: list[np.ndarray] = []
    # lines the result does not rest on are shown set aside (AnalysisResult.lines_used: one flag per line)
    for (fam, lines), used in zip((("dot1", d.lines1), ("dot2", d.lines2), ("interdot", d.interdot)), res.lines_used):
        n_used = int(np.sum(used))
        segs = []
        for k, ln in enumerate(lines):
            seg = 1e3 * np.array([ln.start, ln.end], float)
            if not used[k]:
                aside.append(seg)
            else:
                segs.append(seg)
        if segs:
            # one artist per family (drawing cost does not grow with the number of segments)
            ax.add_collection(LineCollection(segs, colors=FAMILY_COLOURS[fam], linewidths=1.6, alpha=0.9,
                                             label=f"{fam} ({n_used})"), autolim=False)
    if aside:
        ax.add_collection(LineCollection(aside, colors="0.6", linewidths=0.8, linestyles=":", alpha=0.8,
                                         label="set aside"), autolim=False)
    # segments named as another dot's lines (AnalysisResult.stray_lines), over the greyed ones
    if res.stray_lines:
        segs = [1e3 * np.array([ln.start, ln.end], float) for st in res.stray_lines for ln in st.segments]
        slopes = ", ".join(f"{st.slope:.3g}" for st in res.stray_lines)
        ax.add_collection(LineCollection(segs, colors=STRAY_COLOUR, linewidths=1.2, linestyles="--", alpha=0.9,
                                         label=f"another dot? (slope {slopes})"), autolim=False)
    _left_out_areas(res, ax)
    tp = res.triple_points
    if tp.size:
        ax.add_line(Line2D(1e3 * tp[:, 0], 1e3 * tp[:, 1], marker="o", ms=3.5, mfc="white", mec="k", mew=0.6,
                           ls="none", color="k", label="triple points"))
    ax.set_xlabel(f"{res.x_gate} (mV)")
    ax.set_ylabel(f"{res.y_gate} (mV)")
    ax.set_title(str(da.attrs.get("source", da.name or "map")).split(os.sep)[-1], fontsize=10)
    cs = res.charge_states
    if cs is not None:
        kind = "absolute" if all(cs.absolute) else ("relative" if not any(cs.absolute) else "partly absolute")
        ax.add_line(Line2D([], [], ls="none", marker="None", color="k", label=f"(N1,N2): {kind}"))
    # (a map with no lines has nothing to list: no empty legend box)
    legend = ax.legend(loc="upper right", fontsize=8, framealpha=0.85) if ax.get_legend_handles_labels()[0] else None
    # the boxes above the charge-state labels (zorder 3) whatever the order the artists were made in
    boxes = [_text(ax, texts, "key", 0.01, 0.99, _key_numbers(res), transform=ax.transAxes, va="top", ha="left",
                   zorder=4, fontsize=7.5, family="monospace",
                   bbox={"boxstyle": "round", "fc": "white", "ec": "0.5", "alpha": 0.85})]
    if res.quality.warnings:
        # under the map (not on it): the doubts of a doubtful map in red, the notes of an ok one in grey
        from matplotlib.transforms import ScaledTranslation

        warnings, doubtful = res.quality.doubts_first_flagged()
        colour = "#b00000" if not res.quality.ok else "0.3"
        below = ax.transAxes + ScaledTranslation(0.0, -WARNING_BOX_DROP_IN, ax.figure.dpi_scale_trans)
        _text(ax, texts, "doubts" if not res.quality.ok else "notes", 0.0, 0.0,
              _doubt_lines(warnings, doubtful=doubtful, width=WARNING_LINE_CHARS), transform=below, va="top",
              ha="left", zorder=4, fontsize=6.5, color=colour, clip_on=False,
              bbox={"boxstyle": "round", "fc": "white", "ec": colour, "alpha": 0.85})
    if cs is not None:
        regions = sorted(cs.regions, key=lambda r: -r["pixels"])[:max_labels]
        minpix = 0.002 * n_pixels
        shown = [r for r in regions if r["pixels"] >= minpix]
        _set_limits(ax, np.asarray(da[da.dims[-1]].values, float), np.asarray(da[da.dims[0]].values, float))
        anchors = _label_anchors(ax, shown, cs, da, boxes=boxes, legend=legend, fontsize=7.0, min_pixels=minpix)
        for i, (r, at) in enumerate(zip(shown, anchors)):
            if at is None:  # the whole region is under a box
                continue
            _text(ax, texts, ("label", i), at[0], at[1], f"({r['n1']},{r['n2']})", ha="center",
                  va="center", fontsize=7, color="#1a1a1a",
                  bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.65})
    if texts is not None:
        texts.hide_unused()


def _doubt_lines(warnings: Any, *, doubtful: Any = None, width: int = 110, per_warning: int = 2,
                 max_lines: int = 6) -> str:
    """The doubts box text: each warning wrapped at word boundaries, at most ``per_warning`` lines.

    A warning cut short ends in "…"; at most ``max_lines`` lines in all (the first warnings,
    doubts first as given). Each warning starts with "!" when it made the result doubtful and
    with "·" when it is a note; ``doubtful`` (one bool per warning) says which, all "!" if None.
    """
    import textwrap

    flags = [True] * len(warnings) if doubtful is None else [bool(f) for f in doubtful]
    lines: list[str] = []
    for w, flag in zip(warnings, flags):
        wrapped = textwrap.wrap(str(w), width - 2, break_on_hyphens=False) or [""]
        if len(wrapped) > per_warning:
            wrapped = wrapped[:per_warning]
            wrapped[-1] = wrapped[-1][: width - 4] + " …"
        room = max_lines - len(lines)
        if room <= 0:
            break
        bullet = "! " if flag else "· "
        lines.extend(((bullet if i == 0 else "  ") + t) for i, t in enumerate(wrapped[:room]))
    return "\n".join(lines)


def _label_anchors(ax: Any, shown: list[dict], cs: Any, da: Any, *, boxes: list[Any], legend: Any,
                   fontsize: float, min_pixels: float) -> list[tuple[float, float] | None]:
    """Where to put each charge-state label (mV): its region's centroid, unless a box covers it there.

    A label whose box would overlap a box on the map (the key numbers) or the legend moves to
    the middle of the part of its region that is clear of them (the clear pixel nearest to that
    part's centroid); with fewer than ``min_pixels`` clear pixels it is left out (None).
    The label size is estimated from its character count (no text layout per label).
    """
    out: list[tuple[float, float] | None] = [(1e3 * r["x"], 1e3 * r["y"]) for r in shown]
    if not shown:
        return out
    renderer = _renderer_of(ax.figure)
    if renderer is None:
        return out
    pt = ax.figure.dpi / 72.0
    covers = []
    for b in boxes:
        pad = (0.3 * b.get_fontsize() + 1.0) * pt  # the "round" box style's pad (0.3 em) and its edge
        covers.append(b.get_window_extent(renderer).padded(pad))
    if legend is not None:
        covers.append(_legend_extent(ax, legend, renderer))
    ext = np.array([[c.x0, c.y0, c.x1, c.y1] for c in covers])
    half_h = 0.5 * (1.2 + 0.3) * fontsize * pt + 1.0
    half_ws = np.array([0.5 * (0.62 * len(f"({r['n1']},{r['n2']})") + 0.3) * fontsize * pt + 1.0 for r in shown])
    to_px = ax.transData.transform
    anchors = to_px(np.array(out))
    hits = _overlaps_any(anchors[:, 0], anchors[:, 1], half_ws, half_h, ext)
    if not hits.any():
        return out
    frame = ax.bbox
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    # pixel centres on the display, per axis (linear axes)
    px_x = to_px(np.column_stack([1e3 * x, np.full(x.size, 1e3 * y[0])]))[:, 0]
    py_y = to_px(np.column_stack([np.full(y.size, 1e3 * x[0]), 1e3 * y]))[:, 1]
    for i in np.flatnonzero(hits):
        r, half_w = shown[i], half_ws[i]
        iy, ix = np.nonzero((cs.labels[..., 0] == r["n1"]) & (cs.labels[..., 1] == r["n2"]))
        cx, cy = px_x[ix], py_y[iy]
        clear = ((cx - half_w >= frame.x0) & (cx + half_w <= frame.x1)
                 & (cy - half_h >= frame.y0) & (cy + half_h <= frame.y1))
        clear &= ~_overlaps_any(cx, cy, half_w, half_h, ext)
        if clear.sum() < max(min_pixels, 1):
            out[i] = None
            continue
        ix, iy = ix[clear], iy[clear]
        mx, my = float(np.mean(x[ix])), float(np.mean(y[iy]))
        k = int(np.argmin((x[ix] - mx) ** 2 / np.ptp(x) ** 2 + (y[iy] - my) ** 2 / np.ptp(y) ** 2))
        out[i] = (1e3 * float(x[ix[k]]), 1e3 * float(y[iy[k]]))
    return out


def _overlaps_any(cx: np.ndarray, cy: np.ndarray, half_w: Any, half_h: float, ext: np.ndarray) -> np.ndarray:
    """Whether a box of half-size (``half_w``, ``half_h``) centred at each (cx, cy) overlaps any extent.

    ``cx``, ``cy``, ``half_w``: shape (n,) (or ``half_w`` a scalar), display pixels; ``ext``:
    (m, 4) rows ``x0, y0, x1, y1``. Returns bool, shape (n,).
    """
    cx, cy = np.asarray(cx, float)[:, None], np.asarray(cy, float)[:, None]
    hw = np.asarray(half_w, float)
    hw = hw[:, None] if hw.ndim else hw
    return ((cx + hw > ext[:, 0]) & (cx - hw < ext[:, 2]) & (cy + half_h > ext[:, 1])
            & (cy - half_h < ext[:, 3])).any(axis=1)


_LEGEND_EXTENTS: dict = {}


def _legend_extent(ax: Any, legend: Any, renderer: Any) -> Any:
    """The legend's display extent, laid out once per distinct content, place and resolution."""
    handles = list(getattr(legend, "legend_handles", None) or getattr(legend, "legendHandles", None) or [])
    key = (tuple(t.get_text() for t in legend.get_texts()), tuple(type(h).__name__ for h in handles),
           ax.bbox.bounds, ax.figure.dpi, str(getattr(legend, "_loc", "")))
    hit = _LEGEND_EXTENTS.get(key)
    if hit is None:
        if len(_LEGEND_EXTENTS) > 512:
            _LEGEND_EXTENTS.clear()
        hit = _LEGEND_EXTENTS[key] = legend.get_window_extent(renderer).frozen()
    return hit


def _renderer_of(fig: Any) -> Any:
    """The figure's renderer (for text extents before drawing), or None."""
    for get in (getattr(fig.canvas, "get_renderer", None), getattr(fig, "_get_renderer", None)):
        if get is not None:
            try:
                return get()
            except (AttributeError, TypeError):
                continue
    return None


class _TextPool:
    """Text artists of a reused frame, by key: moved and relabelled from map to map, unused ones hidden.

    A key's artist keeps the properties it was created with, so a key always gets the same
    style arguments.
    """

    def __init__(self) -> None:
        self.artists: dict[Any, Any] = {}
        self.used: set[Any] = set()

    def start(self) -> None:
        self.used = set()

    def text(self, ax: Any, key: Any, x: float, y: float, s: str, **kwargs: Any) -> Any:
        self.used.add(key)
        t = self.artists.get(key)
        if t is None:
            t = self.artists[key] = ax.text(x, y, s, **kwargs)
        else:
            t.set_position((x, y))
            t.set_text(s)
            t.set_visible(True)
        return t

    def hide_unused(self) -> None:
        for key, t in self.artists.items():
            if key not in self.used:
                t.set_visible(False)


def _text(ax: Any, texts: _TextPool | None, key: Any, x: float, y: float, s: str, **kwargs: Any) -> Any:
    """``ax.text(x, y, s, **kwargs)``, or the pooled artist ``key`` of a reused frame; the Text."""
    if texts is None:
        return ax.text(x, y, s, **kwargs)
    return texts.text(ax, key, x, y, s, **kwargs)


def _set_limits(ax: Any, x: np.ndarray, y: np.ndarray) -> None:
    ax.set_xlim(1e3 * x.min(), 1e3 * x.max())
    ax.set_ylim(1e3 * y.min(), 1e3 * y.max())


def _colour_label(res: Any) -> str:
    da = res.data
    return f"{da.name or 'signal'} ({da.attrs.get('units', 'a.u.')})"


def _draw(res: Any, ax: Any, *, cax: Any = None, max_labels: int = 40) -> Any:
    """Draw ``res`` on ``ax`` (colour bar in ``cax`` when given); return the image artist."""
    fig = ax.figure
    x, y, z, lo, hi = _map_arrays(res)
    mesh = _image(ax, x, y, z, lo, hi)
    cb = fig.colorbar(mesh, cax=cax) if cax is not None else fig.colorbar(mesh, ax=ax, pad=0.01)
    cb.set_label(_colour_label(res))
    _overlays(res, ax, n_pixels=z.size, max_labels=max_labels)
    _set_limits(ax, x, y)
    return mesh


def plot_result(res: Any, *, ax: Any = None, max_labels: int = 40) -> Any:
    """Draw ``res`` on a matplotlib Axes (created with pyplot if None); return the Figure.

    The map, the line families (segments set aside greyed), the triple
    points, the charge-state labels and a box with the key numbers; under
    the map the warnings: a doubtful result's in red (doubts first), an ok
    one's notes in grey.
    """
    if ax is None:
        import matplotlib.pyplot as plt

        fig, ax = plt.subplots(figsize=FIGSIZE_IN, dpi=PLOT_DPI)
    else:
        fig = ax.figure
    _draw(res, ax, max_labels=max_labels)
    fig.tight_layout()
    return fig


def _fixed_layout_figure(dpi: float) -> tuple[Any, Any, Any]:
    """A pyplot-free Agg figure with fixed axes and colour-bar positions (no layout pass)."""
    from matplotlib.figure import Figure

    w, h = FIGSIZE_IN
    fig = Figure(figsize=FIGSIZE_IN, dpi=dpi)
    _fast_canvas(fig)
    # margins in inches: tick labels + axis label on the left and bottom, title on top,
    # colour bar with its label on the right
    left, bottom, top, right = 0.80, 0.60 + WARNING_BAND_IN, 0.35, 1.15
    cb_gap, cb_w = 0.08, 0.22
    ax = fig.add_axes((left / w, bottom / h, (w - left - right) / w, (h - bottom - top) / h))
    cax = fig.add_axes(((w - right + cb_gap) / w, bottom / h, cb_w / w, (h - bottom - top) / h))
    return fig, ax, cax


def _display_pixels(ax: Any, lim_x: tuple[float, float], lim_y: tuple[float, float], zz: np.ndarray,
                    extent: tuple, lo: float, hi: float, cmap: Any) -> np.ndarray:
    """The map's grey levels at the axes' display resolution, RGBA uint8, row 0 at the bottom.

    ``zz`` (ny, nx) in increasing-axis order covering ``extent`` (mV); ``lim_x``, ``lim_y``
    the axes limits (mV). Each display pixel takes the map pixel under its centre
    (nearest neighbour, as ``imshow(interpolation="nearest")``); the colour map is applied
    to the ``ny × nx`` map values once, not to the up-sampled image.
    """
    from matplotlib.colors import Normalize

    x0, y0, w, h = ax.bbox.bounds
    n_w, n_h = max(int(round(w)), 1), max(int(round(h)), 1)
    ny, nx = zz.shape

    def index(lim: tuple[float, float], n_disp: int, e0: float, e1: float, n: int) -> np.ndarray:
        centres = lim[0] + (np.arange(n_disp) + 0.5) / n_disp * (lim[1] - lim[0])
        return np.clip(np.floor((centres - e0) / (e1 - e0) * n).astype(np.intp), 0, n - 1)

    jx = index(lim_x, n_w, extent[0], extent[1], nx)
    iy = index(lim_y, n_h, extent[2], extent[3], ny)
    small = cmap(Normalize(lo, hi)(np.ma.masked_invalid(zz)), bytes=True)  # (ny, nx, 4)
    # the indices never decrease: up-sampling is a run-length repeat (whole rows / 4-byte pixels)
    small32 = np.ascontiguousarray(small).view(np.uint32)[..., 0]
    cols = np.repeat(small32[:, jx[0] : jx[-1] + 1], np.bincount(jx - jx[0]), axis=1)
    big = np.repeat(cols[iy[0] : iy[-1] + 1], np.bincount(iy - iy[0]), axis=0)
    return big.view(np.uint8).reshape(n_h, n_w, 4)


def _pixel_image_class() -> type:
    """An artist that blits an RGBA array made at display resolution onto its axes (built on first use)."""
    global _PIXEL_IMAGE
    if _PIXEL_IMAGE is not None:
        return _PIXEL_IMAGE
    from matplotlib.artist import Artist

    class PixelImage(Artist):
        """``rgba`` (h, w, 4) uint8, bottom row first (Agg's order), drawn with its lower-left corner on the axes'
        (rounded to whole pixels, clipped to the axes); no resampling."""

        zorder = 0  # under everything else, as an image

        def __init__(self) -> None:
            super().__init__()
            self.rgba: np.ndarray | None = None

        def draw(self, renderer: Any) -> None:
            axes = self.axes
            if self.rgba is None or axes is None or not self.get_visible():
                return
            bbox = axes.bbox
            gc = renderer.new_gc()
            gc.set_clip_rectangle(bbox)
            renderer.draw_image(gc, round(bbox.x0), round(bbox.y0), self.rgba)
            gc.restore()
            self.stale = False

    _PIXEL_IMAGE = PixelImage
    return PixelImage


_PIXEL_IMAGE: type | None = None


class _GreyScale:
    """The colour bar of a reused frame: a fixed ramp of the colour map on a plain Axes.

    Looks like ``Figure.colorbar`` (ramp, outline, ticks and label on the right) but a new
    colour range only moves the ramp's extent and the axis limits; a matplotlib colour bar
    rebuilds its mesh, locators and formatters on every change of limits.
    """

    def __init__(self, cax: Any, cmap: Any) -> None:
        from matplotlib.image import AxesImage

        self.cax = cax
        self.ramp = AxesImage(cax, cmap=cmap, interpolation="nearest", origin="lower")
        self.ramp.set_data(np.linspace(0.0, 1.0, cmap.N)[:, None])
        self.ramp.set_clim(0.0, 1.0)
        cax.add_image(self.ramp)
        cax.set_aspect("auto")
        cax.set_navigate(False)
        cax.set_xticks([])
        cax.yaxis.tick_right()
        cax.yaxis.set_label_position("right")
        cax.set_xlim(0.0, 1.0)

    def update(self, lo: float, hi: float) -> None:
        if not hi > lo:  # a flat map (matplotlib's colour bar widens the range the same way)
            lo, hi = lo - 0.5, hi + 0.5
        self.ramp.set_extent((0.0, 1.0, lo, hi))
        self.cax.set_ylim(lo, hi)

    def set_label(self, text: str) -> None:
        self.cax.set_ylabel(text)


class _Frame:
    """A reusable per-map figure: fixed axes, colour bar and map image; per-map artists replaced.

    Only maps on evenly spaced axes use it. The map is drawn as an RGBA image made at the
    axes' display resolution (:func:`_display_pixels`, blitted without resampling); the colour
    bar is a fixed grey ramp whose value axis follows the map's colour limits (:class:`_GreyScale`).
    The others are drawn on a fresh figure.
    """

    def __init__(self, dpi: float) -> None:
        self.fig, self.ax, self.cax = _fixed_layout_figure(dpi)
        self.image: Any = None
        self.pixels: Any = None
        self.mappable: Any = None
        self.colorbar: Any = None
        self.texts = _TextPool()

    def draw(self, res: Any, *, max_labels: int) -> None:
        ax = self.ax
        for artist in (*ax.collections, *ax.lines):
            artist.remove()
        legend = ax.get_legend()
        if legend is not None:
            legend.remove()
        x, y, z, lo, hi = _map_arrays(res)
        zz, extent, interp = _image_geometry(x, y, z)
        _set_limits(ax, x, y)
        if self.image is None:
            from matplotlib import colormaps
            from matplotlib.cm import ScalarMappable
            from matplotlib.colors import Normalize
            from matplotlib.image import AxesImage

            self.mappable = ScalarMappable(norm=Normalize(lo, hi), cmap=colormaps["gray"])
            self.colorbar = _GreyScale(self.cax, self.mappable.get_cmap())
            self.pixels = _pixel_image_class()()
            ax.add_artist(self.pixels)
            self.image = AxesImage(ax, origin="lower")  # maps larger than the axes (filtered)
            ax.set_aspect("auto")
            ax.add_image(self.image)
        else:
            self.mappable.set_clim(lo, hi)
        self.colorbar.update(lo, hi)
        if interp == "nearest":
            self.pixels.rgba = _display_pixels(ax, ax.get_xlim(), ax.get_ylim(), zz, extent, lo, hi,
                                               self.mappable.get_cmap())
            self.pixels.set_visible(True)
            self.image.set_visible(False)
        else:  # a map larger than the axes: filtered by matplotlib
            self.image.set_data(self.mappable.to_rgba(np.ma.masked_invalid(zz), bytes=True))
            self.image.set_extent(extent)
            self.image.set_interpolation(interp)
            self.image.set_visible(True)
            self.pixels.set_visible(False)
        self.colorbar.set_label(_colour_label(res))
        _overlays(res, ax, n_pixels=z.size, max_labels=max_labels, texts=self.texts)


_LOCAL = threading.local()  # one frame per thread (dask workers run tasks in threads)


def _frame(dpi: float) -> _Frame:
    frames = getattr(_LOCAL, "frames", None)
    if frames is None:
        frames = _LOCAL.frames = {}
    fr = frames.get(dpi)
    if fr is None:
        fr = frames[dpi] = _Frame(dpi)
    return fr


def _encode_png(rgb: np.ndarray, *, level: int = PNG_COMPRESS_LEVEL) -> bytes:
    """PNG bytes of an (h, w, 3) uint8 image, written by Pillow at zlib ``level``."""
    import io

    from PIL import Image  # a dependency of matplotlib

    img = np.ascontiguousarray(rgb, dtype=np.uint8)
    if img.ndim != 3 or img.shape[2] != 3 or img.shape[0] < 1 or img.shape[1] < 1:
        raise ValueError(f"expected an (h, w, 3) image, got shape {img.shape}")
    buf = io.BytesIO()
    Image.fromarray(img).save(buf, format="PNG", compress_level=level)
    return buf.getvalue()


def _png_of(fig: Any) -> bytes:
    """Render ``fig`` and encode its canvas as an RGB PNG (:func:`_encode_png`)."""
    fig.canvas.draw()
    return _encode_png(np.asarray(fig.canvas.buffer_rgba())[..., :3])


def render_png(res: Any, *, max_labels: int = 40, dpi: float | None = None) -> bytes:
    """The figure of ``res`` (content of :func:`plot_result`) as PNG bytes.

    Drawn without pyplot on a fixed-layout Agg figure that is reused from
    map to map in this process and thread (see the module notes), at
    ``dpi`` (default :data:`PLOT_DPI`).
    """
    import matplotlib as mpl

    dpi = PLOT_DPI if dpi is None else float(dpi)
    # the default colours "C0" of lines and patches are looked up in the property cycle,
    # which rcParams deep-copies on every access (~1 ms each, ~50 per figure): name them
    with mpl.rc_context(_EXPLICIT_DEFAULT_COLOURS):
        da = res.data
        x = np.asarray(da[da.dims[-1]].values, float)
        y = np.asarray(da[da.dims[0]].values, float)
        if _even(x) and _even(y):
            fr = _frame(dpi)
            fr.draw(res, max_labels=max_labels)
            return _png_of(fr.fig)
        fig, ax, cax = _fixed_layout_figure(dpi)
        _draw(res, ax, cax=cax, max_labels=max_labels)
        return _png_of(fig)


def save_plot(res: Any, path: str | os.PathLike[str], *, max_labels: int = 40, dpi: float | None = None) -> None:
    """Write the figure of ``res`` as PNG to ``path`` atomically (temp file + os.replace).

    The bytes of :func:`render_png`.
    """
    atomic_write_bytes(path, render_png(res, max_labels=max_labels, dpi=dpi), fsync=False)


_EXPLICIT_DEFAULT_COLOURS: Any = {"lines.color": "#1f77b4", "patch.facecolor": "#1f77b4"}
