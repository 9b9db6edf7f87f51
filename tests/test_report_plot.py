"""The per-map figure (stabtool.report.plot): what it must show, and the PNG it writes."""

from __future__ import annotations

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


@pytest.fixture(scope="module")
def result():
    sm = quick_double_dot("ge-double", snr=10.0, rng=1, shape=(96, 96))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Analyzer(refine=False)(sm.data)


def _labels(ax):
    return [h.get_label() for h in ax.get_legend().legend_handles], [t.get_text() for t in ax.get_legend().get_texts()]


def test_the_figure_carries_families_triple_points_charge_states_and_key_numbers(result):
    _fig, ax, cax = _fixed_layout_figure(PLOT_DPI)
    _draw(result, ax, cax=cax)
    _, legend = _labels(ax)
    d = result.diagram
    n1 = int(np.sum(d.line_groups[0] >= 0))
    assert f"dot1 ({n1})" in legend and any(t.startswith("dot2 (") for t in legend)
    assert "triple points" in legend and any(t.startswith("(N1,N2):") for t in legend)
    texts = [t.get_text() for t in ax.texts]
    # one label per charge region larger than 0.2 % of the map (as many as plot_result draws, ≤ 40)
    big = [r for r in result.charge_states.regions if r["pixels"] >= 0.002 * result.data.size]
    assert sum(t.startswith("(") and t.endswith(")") for t in texts) == min(len(big), 40)
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
