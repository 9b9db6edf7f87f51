"""Lines of a third dot among a family's segments: found, named and set aside (stabtool.fit.model).

On a map of two plungers of a dot array, the transitions of a third dot
cross the window at a slope of their own, −α_k1/α_k2 with α = Cdd⁻¹ Cdg
(constant-interaction model; shared references, "N dots, lever arms and
virtual gates"). The detector sorts them into the dot family of nearest
slope; the fitter sets them aside as off the family slope, and the analysis
names them as a set of parallel stray lines with their common slope.
"""

import numpy as np
import pytest

from stabtool.analysis import analyze
from stabtool.fit.model import STRAY_CLEARANCE_PX, _own_line, parallel_stray_lines
from stabtool.lines.result import TransitionLine
from stabtool.simulate import presets, quick_double_dot


def _line(slope: float, err: float, x0: float = 0.0) -> TransitionLine:
    return TransitionLine(family="dot2", x0=x0, y0=0.0, slope=slope, slope_stderr=err, position_stderr=1e-5,
                          start=(x0, 0.0), end=(x0 + 0.01, 0.01 * slope))


def test_two_parallel_off_slope_segments_are_one_stray_set_with_their_mean_slope():
    lines = [_line(-0.45, 0.003, x) for x in range(5)] + [_line(-0.39, 0.003, 7), _line(-0.39, 0.003, 9)]
    stray = parallel_stray_lines(lines, -0.45, steep=False)
    assert stray is not None
    assert stray.indices == (5, 6)
    assert stray.slope == pytest.approx(-0.39, rel=1e-12)
    # two equal errors: the mean's error is σ/√2 (the angle ↔ slope conversion cancels at one slope)
    assert stray.slope_stderr == pytest.approx(0.003 / np.sqrt(2), rel=1e-9)


def test_one_off_slope_segment_or_two_that_are_not_parallel_are_no_stray_set():
    base = [_line(-0.45, 0.003, x) for x in range(5)]
    assert parallel_stray_lines(base + [_line(-0.39, 0.003)], -0.45, steep=False) is None
    # −0.39 and −0.30 differ by 4.6°, far beyond 3 combined errors (0.65°) + 0.5°
    assert parallel_stray_lines(base + [_line(-0.39, 0.003), _line(-0.30, 0.003)], -0.45, steep=False) is None
    # nor segments on the family slope, however many
    assert parallel_stray_lines(base, -0.45, steep=False) is None


def test_steep_family_stray_set_is_found_from_the_inverse_slopes():
    lines = [_line(-2.2, 0.02, x) for x in range(4)] + [_line(-3.1, 0.05, 5), _line(-3.12, 0.05, 6)]
    stray = parallel_stray_lines(lines, 1 / -2.2, steep=True)
    assert stray is not None and stray.indices == (4, 5)
    assert stray.slope == pytest.approx(-3.11, abs=0.01)


def _segment(x0: float, y0: float, x1: float, y1: float) -> TransitionLine:
    slope = (y1 - y0) / (x1 - x0)
    return TransitionLine(family="dot1", x0=x0, y0=y0, slope=slope, slope_stderr=0.01, position_stderr=1e-5,
                          start=(x0, y0), end=(x1, y1))


def test_a_chord_through_a_staircase_of_pieces_is_not_a_line_of_its_own():
    # 1 mV pixels; dot1 pieces of slope −3 (10 px up, 3.33 px left) that step 2 px right at each
    # dot2 line (a staircase of mutual shifts): the Hough chord through them has the staircase
    # slope (−7.5) but runs along the pieces
    px = np.array([1e-3, 1e-3])
    run, step = 10e-3 / 3, 2e-3
    x0 = [0.05 + k * (step - run) for k in range(4)]
    pieces = [_segment(x0[k], 0.010 * k, x0[k] - run, 0.010 * (k + 1)) for k in range(4)]
    chord = _segment(x0[0] - run / 2, 0.005, x0[3] - run / 2, 0.035)
    assert not _own_line(chord, pieces, px)
    # the same chord moved clear of the pieces by twice the clearance is one
    shift = 2 * STRAY_CLEARANCE_PX * 1e-3
    moved = _segment(chord.start[0] + shift, chord.start[1], chord.end[0] + shift, chord.end[1])
    assert _own_line(moved, pieces, px)


def _third_dot_slope(preset: str) -> float:
    """Slope dV_P2/dV_P1 of D3's lines: −α31/α32, α = Cdd⁻¹ Cdg (shared references, CI model)."""
    d = presets.get(preset)
    alpha = np.linalg.inv(np.asarray(d.cdd_aF, float)) @ np.asarray(d.cdg_aF, float)
    return float(-alpha[2, 0] / alpha[2, 1])


@pytest.fixture(scope="module")
def array_result():
    # linear-array-4 swept on P1–P2: D3's lines (slope −0.390) run beside D2's (−0.449) and are sorted into dot2
    # the stray set is named from the lines alone: the model fit (14 s here) would only make the test slow
    sm = quick_double_dot("linear-array-4", shape=(150, 150), snr=30, rng=0)
    with pytest.warns(Warning):
        return analyze(sm.data, refine=False)


def test_a_third_dots_lines_in_an_array_window_are_named_with_their_slope(array_result):
    res = array_result
    stray = [w for w in res.quality.warnings if "share a slope of their own" in w]
    assert len(stray) == 1 and stray[0].startswith("3 dot2 segments")
    value, err = (float(v) for v in stray[0].split("(", 1)[1].split(";", 1)[0].split(" ± "))
    truth = _third_dot_slope("linear-array-4")
    assert truth == pytest.approx(-0.390, abs=1e-3)
    assert abs(value - truth) <= 3 * err + 0.002
    assert not res.quality.ok
    # the JSON carries the set with its segments in volts
    (js,) = res.to_json()["stray_lines"]
    assert js["family"] == "dot2" and js["n_segments"] == 3 and js["n_clear"] == 3
    assert js["slope"] == pytest.approx(value, abs=1e-3) and js["slope_error"] == pytest.approx(err, rel=0.05)
    seg = np.array(js["segments_V"])
    assert seg.shape == (3, 4)
    assert np.allclose((seg[:, 3] - seg[:, 1]) / (seg[:, 2] - seg[:, 0]), truth, atol=0.01)


def test_the_figure_draws_the_named_set_in_its_own_colour_and_legend_entry(array_result):
    import matplotlib.pyplot as plt
    from matplotlib.colors import to_rgb

    from stabtool.report.plot import STRAY_COLOUR, plot_result

    fig = plot_result(array_result)
    ax = fig.axes[0]
    drawn = [c for c in ax.collections if c.get_label().startswith("another dot?")]
    assert len(drawn) == 1 and len(drawn[0].get_segments()) == 3
    assert np.allclose(drawn[0].get_edgecolor()[0][:3], to_rgb(STRAY_COLOUR))
    assert any(t.get_text() == "another dot? (slope -0.391)" for t in ax.get_legend().get_texts())
    plt.close(fig)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_a_double_dot_without_other_dots_has_no_stray_lines(seed):
    sm = quick_double_dot("si-sige-double", shape=(150, 150), snr=30, rng=seed)
    res = analyze(sm.data)
    assert not [w for w in res.quality.warnings if "share a slope of their own" in w]
    assert res.to_json()["stray_lines"] == []


@pytest.mark.parametrize("seed", [2, 5])
def test_streaks_of_a_derivative_maps_sum_are_not_named(seed):
    # a lock-in read-out on PA with row (1/f) noise: the analysis sums the map along x, and the summed noise leaves
    # streaks along x whose short segments scatter by a few degrees (before this rule, 6 and 12 of
    # them were named as a set at slopes −0.053 and −0.036 on these two maps)
    sm = quick_double_dot("si-sige-double", shape=(150, 150), snr=20, lockin="x", row_noise=0.5, rng=seed)
    with pytest.warns(Warning):
        res = analyze(sm.data)
    assert any("summed along x" in w for w in res.quality.warnings)
    assert res.stray_lines == ()
