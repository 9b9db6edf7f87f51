"""The per-map figure (stabtool.report.plot): what it must show, and the PNG it writes."""

from __future__ import annotations

import json
import warnings
from dataclasses import replace

import numpy as np
import pytest

from stabtool.analysis import Analyzer
from stabtool.report.plot import (
    FIGSIZE_IN,
    PLOT_DPI,
    _draw,
    _fixed_layout_figure,
    plot_result,
    save_plot,
)
from stabtool.simulate import quick_double_dot


def _analysed(preset, *, snr, rng, shape):
    sm = quick_double_dot(preset, snr=snr, rng=rng, shape=shape)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Analyzer(refine=False)(sm.data)


@pytest.fixture(scope="module")
def result():
    return _analysed("ge-double", snr=10.0, rng=1, shape=(96, 96))


def _labels(ax):
    return [h.get_label() for h in ax.get_legend().legend_handles], [t.get_text() for t in ax.get_legend().get_texts()]


def _boxes(ax):
    """Display extents of the key-number box, the doubts box and the legend (after a draw)."""
    renderer = ax.figure.canvas.get_renderer()
    out = [t.get_bbox_patch().get_window_extent(renderer) for t in ax.texts
           if t.get_visible() and (t.get_text().startswith("M12 = ") or t.get_text().startswith("! "))]
    return out + [ax.get_legend().get_window_extent(renderer)]


def _check_labels(ax, res):
    """Every charge region ≥ 0.2 % of the map (≤ 40) has its label, clear of the boxes and inside
    its own region, or it is left out because a box covers the region's centre."""
    fig = ax.figure
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    boxes = _boxes(ax)
    cs = res.charge_states
    big = sorted((r for r in cs.regions if r["pixels"] >= 0.002 * res.data.size), key=lambda r: -r["pixels"])[:40]
    shown = {t.get_text(): t for t in ax.texts if t.get_visible() and t.get_text().startswith("(")}
    x = res.data[res.data.dims[-1]].values
    y = res.data[res.data.dims[0]].values
    for r in big:
        name = f"({r['n1']},{r['n2']})"
        if name not in shown:
            centre = ax.transData.transform((1e3 * r["x"], 1e3 * r["y"]))
            assert any(b.padded(40).contains(*centre) for b in boxes), f"label {name} missing"
            continue
        t = shown[name]
        ext = t.get_bbox_patch().get_window_extent(renderer)
        assert not any(ext.overlaps(b) for b in boxes), f"label {name} under a box"
        tx, ty = (v / 1e3 for v in t.get_position())
        ix, iy = int(np.argmin(np.abs(x - tx))), int(np.argmin(np.abs(y - ty)))
        if (tx, ty) != (r["x"], r["y"]):  # moved: onto a pixel of its own region
            assert tuple(cs.labels[iy, ix]) == (r["n1"], r["n2"])
    assert len(shown) == len({t for t in shown if any(t == f"({r['n1']},{r['n2']})" for r in big)})


def test_a_charge_label_under_the_key_box_moves_into_the_clear_part_of_its_region(result):
    """The key-number box (top left) used to hide the label of a region whose centre lay under it."""
    from stabtool.report.plot import _Frame

    cs = result.charge_states
    x = result.data[result.data.dims[-1]].values
    y = result.data[result.data.dims[0]].values
    # the region that holds the pixel near the top-left corner, its centroid put there
    ix = int(np.argmin(np.abs(x - (x.min() + 0.04 * np.ptp(x)))))
    iy = int(np.argmin(np.abs(y - (y.max() - 0.04 * np.ptp(y)))))
    n1, n2 = (int(v) for v in cs.labels[iy, ix])
    regions = tuple(dict(r, x=float(x[ix]), y=float(y[iy]), pixels=max(r["pixels"], 10 ** 6))
                    if (r["n1"], r["n2"]) == (n1, n2) else r for r in cs.regions)
    res = replace(result, charge_states=replace(cs, regions=regions))
    frame = _Frame(PLOT_DPI)
    frame.draw(res, max_labels=40)
    _check_labels(frame.ax, res)
    corner = frame.ax.transData.transform((1e3 * x[ix], 1e3 * y[iy]))
    assert any(b.contains(*corner) for b in _boxes(frame.ax))  # the premise: the centre is under the box


def test_a_reused_figure_draws_a_decreasing_axis_as_the_increasing_one(result):
    """The map is drawn at display resolution by the frame: a sweep stored downwards looks the same."""
    from stabtool.report.plot import _Frame, _png_of

    frame = _Frame(PLOT_DPI)
    frame.draw(result, max_labels=40)
    up = _pixels(_png_of(frame.fig))
    da = result.data.isel({result.data.dims[-1]: slice(None, None, -1), result.data.dims[0]: slice(None, None, -1)})
    cs = replace(result.charge_states, labels=result.charge_states.labels[::-1, ::-1])
    frame.draw(replace(result, data=da, charge_states=cs), max_labels=40)
    np.testing.assert_array_equal(_pixels(_png_of(frame.fig)), up)


def test_the_figure_carries_families_triple_points_charge_states_and_key_numbers(result):
    _fig, ax, cax = _fixed_layout_figure(PLOT_DPI)
    _draw(result, ax, cax=cax)
    _, legend = _labels(ax)
    d = result.diagram
    n1 = int(np.sum(d.line_groups[0] >= 0))
    assert f"dot1 ({n1})" in legend and any(t.startswith("dot2 (") for t in legend)
    assert "triple points" in legend and any(t.startswith("(N1,N2):") for t in legend)
    texts = [t.get_text() for t in ax.texts]
    # one label per charge region larger than 0.2 % of the map (≤ 40), unless a box hides the region
    _check_labels(ax, result)
    key = next(t for t in texts if t.startswith("M12 = "))
    assert "ΔV1 = " in key and "Cdg = " in key and "quality: " in key
    assert cax.get_ylabel().startswith(result.data.name or "signal")
    # the map image spans the voltage window (mV), whatever the drawing method
    x = result.data[result.data.dims[-1]].values
    np.testing.assert_allclose(ax.get_xlim(), (1e3 * x.min(), 1e3 * x.max()))


def test_save_plot_writes_a_png_of_the_stated_size(result, tmp_path):
    from PIL import Image

    path = tmp_path / "map.png"
    save_plot(result, path)
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    with Image.open(path) as im:
        assert im.size == (round(FIGSIZE_IN[0] * PLOT_DPI), round(FIGSIZE_IN[1] * PLOT_DPI))
    assert not list(tmp_path.glob("*.tmp*"))  # written atomically, no temporary left


def test_a_decreasing_axis_is_drawn_in_volts(result):
    da = result.data.isel({result.data.dims[-1]: slice(None, None, -1)})  # x swept downwards
    _fig, ax, cax = _fixed_layout_figure(PLOT_DPI)
    img = _draw(replace(result, data=da), ax, cax=cax)
    x = da[da.dims[-1]].values
    np.testing.assert_allclose(ax.get_xlim(), (1e3 * x.min(), 1e3 * x.max()))
    # imshow puts the first column of the (reordered) data at the lowest voltage
    left = np.asarray(img.get_array())[:, 0]
    np.testing.assert_allclose(left, result.data.values[:, 0])


def test_plot_result_draws_the_same_on_a_pyplot_figure(result):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = plot_result(result)
    try:
        assert "triple points" in _labels(fig.axes[0])[1]
    finally:
        plt.close(fig)


@pytest.fixture(scope="module")
def other_result():
    return _analysed("gaas-double", snr=4.0, rng=7, shape=(80, 120))


def _pixels(png: bytes) -> np.ndarray:
    import io

    from PIL import Image

    with Image.open(io.BytesIO(png)) as im:
        return np.asarray(im.convert("RGB"))


def test_a_reused_figure_draws_a_map_as_a_fresh_one_would(result, other_result):
    """The batch renders every map of a process on one figure: nothing of the previous map may remain."""
    from stabtool.report.plot import _Frame, _png_of

    def png(frame, res):
        frame.draw(res, max_labels=40)
        return _png_of(frame.fig)

    fresh = png(_Frame(PLOT_DPI), result)
    reused = _Frame(PLOT_DPI)
    png(reused, other_result)  # another window, colour range, label count and verdict first
    again = png(reused, result)
    np.testing.assert_array_equal(_pixels(again), _pixels(fresh))
    _check_labels(reused.ax, result)


def test_the_png_bytes_decode_to_the_same_rgb_pixels():
    """Pillow reads the PNG (ISO/IEC 15948) back to the pixels given, channel order kept."""
    from stabtool.report.plot import _encode_png

    rng = np.random.default_rng(0)
    rgb = rng.integers(0, 256, size=(7, 11, 3), dtype=np.uint8)
    rgb[3:] = rgb[2]  # rows equal to the one above (Up filter gives zeros)
    np.testing.assert_array_equal(_pixels(_encode_png(rgb)), rgb)
    one_row = rgb[:1, :5]
    np.testing.assert_array_equal(_pixels(_encode_png(one_row)), one_row)


def test_cached_text_lands_where_matplotlib_draws_it():
    """Text blitted from the cache covers the same pixels as matplotlib's own text, to one pixel."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from stabtool.report.plot import _fast_canvas

    out = []
    for canvas in (FigureCanvasAgg, _fast_canvas):
        fig = Figure(figsize=(3, 2), dpi=PLOT_DPI)
        canvas(fig)
        fig.text(0.1, 0.5, "ΔV1 = 52.0 ± 0.04 mV", fontsize=9)
        fig.text(0.9, 0.1, "PB (mV)", rotation=90, fontsize=10)
        fig.canvas.draw()
        fig.canvas.draw()  # the second draw comes from the cache
        out.append(255.0 - np.asarray(fig.canvas.buffer_rgba())[..., 0])  # ink per pixel
    ref, got = out
    # the same glyphs: the same total ink (antialiasing spreads it differently at sub-pixel offsets)
    assert got.sum() == pytest.approx(ref.sum(), rel=0.02)
    for axis in (0, 1):
        r, g = np.flatnonzero((ref > 64).any(axis=axis)), np.flatnonzero((got > 64).any(axis=axis))
        assert abs(int(r[0]) - int(g[0])) <= 1 and abs(int(r[-1]) - int(g[-1])) <= 1


def test_doubts_box_wraps_warnings_at_words_and_marks_cuts():
    from stabtool.report.plot import _doubt_lines

    long = "virtual-gate matrix error 0.0055 with the possible tunnel-coupling bias 0.0104 is 0.0117, " \
           "more than the 0.0067 an ok map allows"
    text = _doubt_lines([long, "second doubt"], width=60)
    lines = text.split("\n")
    assert all(len(line) <= 60 for line in lines)
    # every word of the first warning is shown whole, in order, before the second warning
    first = " ".join(line[2:] for line in lines[:2]).removesuffix(" …")
    assert first.split() == long.split()[: len(first.split())]
    assert lines[0].startswith("! ") and lines[1].startswith("  ") and lines[-1] == "! second doubt"
    cut = _doubt_lines(["word " * 100], width=60, per_warning=2)
    assert cut.count("\n") == 1 and cut.endswith("…")
    assert _doubt_lines([f"doubt {i}" for i in range(10)], max_lines=6).count("\n") == 5


def test_doubts_box_marks_doubts_with_bang_and_notes_with_a_dot():
    from stabtool.quality import Quality
    from stabtool.report.plot import _doubt_lines

    q = Quality().with_warning("a note", doubtful=False).with_warning("the doubt").with_warning("another note",
                                                                                                doubtful=False)
    warnings, flags = q.doubts_first_flagged()
    text = _doubt_lines(warnings, doubtful=flags)
    assert text.splitlines() == ["! the doubt", "· a note", "· another note"]
    # without known flags every warning is shown as a doubt
    assert _doubt_lines(["x", "y"]).splitlines() == ["! x", "! y"]


@pytest.mark.parametrize("verdict_ok", [False, True])
def test_the_warnings_sit_under_the_map_not_on_it(result, verdict_ok):
    """Doubts (red) or an ok map's notes (grey) are drawn below the axes: no line or label of the
    map is hidden under them (they once covered the map's lower left corner)."""
    from stabtool.quality import Quality
    from stabtool.report.plot import _Frame

    q = Quality().with_warning("a note", doubtful=False)
    q = q if verdict_ok else q.with_warning("the doubt")
    frame = _Frame(PLOT_DPI)
    frame.draw(replace(result, quality=q), max_labels=40)
    frame.fig.canvas.draw()
    renderer = frame.fig.canvas.get_renderer()
    boxes = [t for t in frame.ax.texts if t.get_visible() and t.get_text().lstrip().startswith(("!", "·"))]
    assert len(boxes) == 1
    text = boxes[0].get_text()
    assert text.splitlines() == (["· a note"] if verdict_ok else ["! the doubt", "· a note"])
    ext = boxes[0].get_bbox_patch().get_window_extent(renderer)
    assert ext.y1 < frame.ax.bbox.y0 and ext.y0 >= 0  # below the map, inside the figure
    assert ext.x0 >= frame.ax.bbox.x0 - 5 and ext.x1 <= frame.fig.bbox.x1


def test_the_text_summary_lists_the_doubts_first_and_marks_them(result):
    from stabtool.quality import Quality
    from stabtool.report.text import summary_text

    res = result
    q = Quality().with_warning("a note", doubtful=False).with_warning("the doubt")
    text = summary_text(replace(res, quality=q))
    tail = text.splitlines()[-3:]
    assert tail[0].startswith("quality: DOUBTFUL") and tail[1:] == ["  ! the doubt", "  · a note"]


def test_the_text_summary_counts_the_lines_set_aside_as_the_figure_does(result):
    # the count line names the detected lines and how many the result does not rest on: dot lines the
    # lattice left out, interdot segments on no pair of triple points (the figure draws those dotted)
    from stabtool.report.text import summary_text

    d = result.diagram
    aside = [int(np.sum(d.line_groups[i] < 0)) for i in range(2)]
    aside.append(int(np.sum(~np.asarray(result.interdot_on_pairs))))
    counts = next(t for t in summary_text(result).splitlines() if t.startswith("lines: "))
    for fam, lines, n_aside in zip(("dot1", "dot2", "interdot"), (d.lines1, d.lines2, d.interdot), aside):
        assert f"{fam} {len(lines)}" + (f" ({n_aside} set aside)" if n_aside else "") in counts
    # and one that leaves nothing aside says nothing of the kind
    kept = replace(result, diagram=replace(d, line_groups=(np.zeros(len(d.lines1), int), np.zeros(len(d.lines2), int)),
                                           interdot=[]))
    assert "set aside" not in next(t for t in summary_text(kept).splitlines() if t.startswith("lines: "))
    _fig, ax, cax = _fixed_layout_figure(PLOT_DPI)
    _draw(result, ax, cax=cax)
    _, legend = _labels(ax)
    assert f"dot1 ({len(d.lines1) - aside[0]})" in legend


def test_every_output_of_a_matrix_carries_the_caution(result, tmp_path, capsys):
    # virtual gates go to real devices: the text, the JSON of analyze and its saved file say so
    from stabtool.cli.main import main
    from stabtool.io import load_dataset, save_map
    from stabtool.report.caution import MATRIX_CAUTION
    from stabtool.report.text import summary_text

    assert f"  caution: {MATRIX_CAUTION}" in summary_text(result).splitlines()
    path = tmp_path / "map.nc"
    save_map(result.data, path)
    assert main(["analyze", str(path), "--json", "--quiet", "--save", str(tmp_path / "out.nc")]) == 0
    assert json.loads(capsys.readouterr().out)["caution"] == MATRIX_CAUTION
    assert load_dataset(tmp_path / "out.nc").attrs["caution"] == MATRIX_CAUTION


def test_the_text_summary_tells_a_missing_reference_from_one_that_could_not_set_the_scale(result):
    # no reference given: the summary says which options give one; a reference given whose lines
    # could not set the scale (too sharp for the temperature): it points to the notes instead
    from stabtool.analysis import EnergyScale
    from stabtool.quality import Quality
    from stabtool.report.text import summary_text

    bare = replace(result, scale=EnergyScale())
    assert "give --electron-temperature or --lever-arm" in summary_text(bare)
    refused = replace(result, scale=EnergyScale(quality=Quality().with_warning(
        "dot1 lines are 0.8 px wide (FWHM): resolution-limited, no lever arm from the temperature", doubtful=False)))
    text = summary_text(refused)
    assert "the energy reference given could not set the scale" in text
    assert "give --electron-temperature" not in text


def test_areas_left_out_of_the_model_fit_are_hatched_and_in_the_legend(result):
    # an area the model fit left out (sharp residual structure) is drawn as its box in volts; a
    # result without one draws nothing of the kind
    import matplotlib.pyplot as plt
    from matplotlib.colors import to_rgb

    from stabtool.fit.refine import Refinement
    from stabtool.report.plot import LEFT_OUT_COLOUR

    ref = Refinement(ok=True, params={}, errors={}, cov=np.zeros((9, 9)), residual_ratio=1.0, noise=1.0,
                     step=(1.0, 1.0), width_resolved=False, stride=(1, 1), left_out_px=((0, 24, 10, 34),))
    fig = plot_result(replace(result, refinement=ref))
    ax = fig.axes[0]
    hatched = [c for c in ax.collections if c.get_label() == "left out of the model fit"]
    assert len(hatched) == 1 and "left out of the model fit" in _labels(ax)[1]
    (path,) = hatched[0].get_paths()
    box = path.get_extents()
    x = 1e3 * result.data[result.data.dims[-1]].values
    y = 1e3 * result.data[result.data.dims[0]].values
    assert box.x0 == pytest.approx(min(x[10], x[33])) and box.x1 == pytest.approx(max(x[10], x[33]))
    assert box.y0 == pytest.approx(min(y[0], y[23])) and box.y1 == pytest.approx(max(y[0], y[23]))
    assert np.allclose(hatched[0].get_edgecolor()[0][:3], to_rgb(LEFT_OUT_COLOUR))
    plt.close(fig)
    fig = plot_result(result)
    assert not [c for c in fig.axes[0].collections if c.get_label() == "left out of the model fit"]
    plt.close(fig)
