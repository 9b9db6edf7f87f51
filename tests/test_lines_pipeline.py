"""Line detection on constant-interaction maps with known slopes.

Truth: slopes dV_y/dV_x of the constant-interaction model, s1 = −α11/α12,
s2 = −α21/α22 with α = Cdd⁻¹ Cdg (van der Wiel et al., Rev. Mod. Phys. 75, 1
(2003)), computed by stabtool.physics.ci; ground states by brute-force minimisation of
U(N) = ½ (eN − Cdg V)ᵀ Cdd⁻¹ (eN − Cdg V) over N in [0, 11]² (written here). The sensor is rendered here (a Lorentzian
Coulomb peak swept across the map, so the step polarity flips), independent
of the detector's code.
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from scipy import ndimage as ndi

from stabtool.errors import InputError
from stabtool.lines import LineDetection, LineDetector, detect_lines
from stabtool.mapdata import make_map
from stabtool.physics.ci import double_dot_slopes, lever_arm_matrix
from stabtool.physics.constants import E_AC

#: two device presets (aF): a symmetric one (references.md worked example) and a
#: strongly cross-coupled, asymmetric one
PRESETS = {
    "kestrel": (np.array([[10.0, 3.0], [2.5, 9.0]]), np.array([[80.0, -15.0], [-15.0, 80.0]])),
    "heron": (np.array([[7.0, 3.2], [1.6, 11.0]]), np.array([[70.0, -12.0], [-12.0, 95.0]])),
}


def ground_state(cdg, cdd, v, offsets_e):
    """Brute-force ground state N (n, 2) at voltages v (n, 2), offset charges in e."""
    inv = np.linalg.inv(cdd)
    q = v @ cdg.T + E_AC * offsets_e  # induced charge, aC
    grid = np.array([(a, b) for a in range(12) for b in range(12)], float)
    d = E_AC * grid[None, :, :] - q[:, None, :]
    u = 0.5 * np.einsum("nki,ij,nkj->nk", d, inv, d)
    return grid[np.argmin(u, axis=1)]


def render(preset="kestrel", *, shape=(128, 128), snr=10.0, rng=0, x=(0.0, 0.08), y=(0.0, 0.08),
           blur_px=0.7, row_noise=0.0, jump=None, telegraph=0.0):
    cdg, cdd = PRESETS[preset]
    g = np.random.default_rng(rng)
    ny, nx = shape
    xv, yv = np.linspace(*x, nx), np.linspace(*y, ny)
    X, Y = np.meshgrid(xv, yv)
    V = np.stack([X, Y], -1)
    offs = np.zeros((ny, 2))
    if jump is not None:  # (row, offset charge on dot1, e)
        offs[jump[0]:, 0] += jump[1]
    if telegraph:
        state, rows = 0, []
        for i in range(ny):
            if g.random() < 1 / 12:
                state ^= 1
            rows.append(state)
        offs[:, 0] += telegraph * np.array(rows)
    N = np.empty((ny, nx, 2))
    for i in range(ny):
        N[i] = ground_state(cdg, cdd, V[i], offsets_e=offs[i])
    occ = ndi.gaussian_filter(0.6 * N[..., 0] + 0.4 * N[..., 1], blur_px)
    span_x, span_y = x[1] - x[0], y[1] - y[0]
    eps = occ - 0.4 * (X - x[0]) / span_x - 0.4 * (Y - y[0]) / span_y
    q0 = 0.5 * (eps.max() + eps.min())
    sig = 1.0 / (1.0 + (eps - q0) ** 2 / 4.0)
    step = np.median(np.abs(np.diff(sig, axis=1))[np.abs(np.diff(N[..., 0], axis=1)) > 0])
    data = sig + g.normal(0.0, step / snr, shape)
    if row_noise:
        data += np.cumsum(g.normal(0, row_noise * step, ny))[:, None]
    truth = double_dot_slopes(lever_arm_matrix(cdg, cdd))
    return make_map(data, xv, yv, x_gate="PA", y_gate="PB", units="mV"), truth


def rel_errors(res: LineDetection, truth) -> np.ndarray:
    return np.array([abs(res.family("dot1").slope / truth.dot1 - 1), abs(res.family("dot2").slope / truth.dot2 - 1)])


@pytest.mark.regression
@pytest.mark.parametrize("preset", ["kestrel", "heron"])
def test_clean_maps_slopes_within_half_percent(preset):
    errs = []
    # 192 px over the same voltage range: sharp (unresolved) steps are located
    # to a pixel, so the slope precision grows with the pixels per segment
    for seed in (0, 1):
        da, truth = render(preset, shape=(192, 192), snr=10, rng=seed)
        res = detect_lines(da)
        errs.append(rel_errors(res, truth))
        assert len(res.family("dot1")) >= 3 and len(res.family("dot2")) >= 3
    assert np.median(np.concatenate(errs)) <= 0.005


@pytest.mark.regression
def test_snr3_slopes_within_two_percent():
    errs = []
    for seed in (0, 1, 2, 3):
        da, truth = render("kestrel", shape=(192, 192), snr=3, rng=seed)
        res = detect_lines(da)
        e = rel_errors(res, truth)
        errs.append(e)
        if e.max() > 0.02:  # a map whose slope is off must not be called ok
            assert not res.quality.ok
    assert np.median(np.concatenate(errs)) <= 0.02


@pytest.mark.regression
def test_decreasing_axes_give_the_same_slopes():
    da, truth = render("kestrel", snr=10, rng=3)
    flipped = da.isel(PA=slice(None, None, -1), PB=slice(None, None, -1))
    res = detect_lines(flipped)
    assert np.all(rel_errors(res, truth) <= 0.02)


@pytest.mark.regression
def test_anisotropic_steps_slopes_in_volts():
    # 160 x points over 60 mV, 96 y points over 90 mV: steps differ by 2.5x
    da, truth = render("kestrel", shape=(96, 160), snr=10, rng=4, x=(0.0, 0.06), y=(0.0, 0.09))
    res = detect_lines(da)
    assert np.all(rel_errors(res, truth) <= 0.02)


@pytest.mark.regression
def test_partial_sweep_with_trailing_and_isolated_nans():
    da, truth = render("kestrel", snr=10, rng=5)
    vals = da.values.copy()
    vals[100:] = np.nan
    vals[np.random.default_rng(0).integers(0, 100, 40), np.random.default_rng(1).integers(0, 128, 40)] = np.nan
    res = detect_lines(da.copy(data=vals))
    # 22 % of the rows are gone, so fewer and shorter dot2 segments: 3 %
    assert np.all(rel_errors(res, truth) <= 0.03)
    assert any("missing" in w for w in res.quality.warnings)


@pytest.mark.regression
def test_charge_jump_is_found_and_slopes_survive():
    da, truth = render("kestrel", snr=10, rng=6, jump=(64, 0.45))
    res = detect_lines(da)
    assert any(abs(j.row - 64) <= 2 for j in res.jumps)
    assert any("charge jump" in w for w in res.quality.warnings)
    assert np.all(rel_errors(res, truth) <= 0.02)


@pytest.mark.regression
def test_telegraph_noise_makes_no_false_families():
    da, truth = render("kestrel", snr=10, rng=7, telegraph=0.3)
    res = detect_lines(da)
    # either the slopes are still right, or the verdict says the map is doubtful
    ok_slopes = np.all(rel_errors(res, truth) <= 0.02)
    assert ok_slopes or not res.quality.ok
    # no long line may have a slope outside the three physical families
    s = [ln.slope for ln in res.unassigned if ln.length_V > 0.02]
    assert len(s) <= 2


@pytest.mark.regression
def test_row_offsets_1_over_f():
    da, truth = render("heron", snr=10, rng=8, row_noise=0.5)
    res = detect_lines(da)
    assert np.all(rel_errors(res, truth) <= 0.02)


def test_pure_noise_is_doubtful():
    da = make_map(np.random.default_rng(0).normal(size=(64, 64)), np.linspace(0, 1, 64), np.linspace(0, 1, 64))
    res = detect_lines(da)
    assert not res.quality.ok


def test_detector_is_picklable_and_has_a_readable_repr():
    det = LineDetector(sigma_px=2.0)
    assert pickle.loads(pickle.dumps(det)) == det
    assert repr(det).startswith("LineDetector(sigma_px=2.0,")


def test_bad_options_and_inputs_raise_one_line_errors():
    with pytest.raises(InputError, match="did you mean 'sigma_px'"):
        detect_lines(render(shape=(32, 32))[0], sigma=2)
    with pytest.raises(InputError, match="must be a positive number"):
        LineDetector(min_length_px=-1)
    da = make_map(np.zeros((4, 40)) + np.arange(40), np.arange(40.0), np.arange(4.0))
    with pytest.raises(InputError, match="at least 8"):
        detect_lines(da)


def test_plot_draws_families_with_legend(tmp_path):
    import matplotlib.pyplot as plt

    da, _ = render(snr=10, rng=0)
    res = detect_lines(da)
    ax = res.plot(data=da)
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any(l.startswith("dot1") for l in labels) and any(l.startswith("dot2") for l in labels)
    ax.figure.savefig(tmp_path / "lines.png")
    plt.close(ax.figure)


# ---------------------------------------------------------------- scale selection
def _erf_steps(s_px, *, snr, rng, shape=(128, 128)):
    """Two parallel error-function steps (height 1) whose derivative profile is a Gaussian of σ ``s_px``."""
    from scipy.special import erf

    yy, xx = np.mgrid[0 : shape[0], 0 : shape[1]].astype(float)
    norm = np.hypot(1.0, 0.3)
    v = sum(0.5 * (1 + erf((xx - 0.3 * yy - c) / norm / (np.sqrt(2) * s_px))) for c in (40.0, 90.0))
    v = v + np.random.default_rng(rng).normal(0.0, 1.0 / snr, shape)
    return make_map(v, np.linspace(0, 0.128, shape[1]), np.linspace(0, 0.128, shape[0]), x_gate="PA", y_gate="PB")


@pytest.mark.regression
@pytest.mark.parametrize("s_px", [1.0, 2.0, 3.0])
def test_edge_scale_measures_the_width_of_error_function_steps(s_px):
    from stabtool.lines.edges import edge_scale

    # d/dx ½(1 + erf(x/(√2 s))) is a Gaussian of σ s (from memory)
    clean = edge_scale(_erf_steps(s_px, snr=1e6, rng=0))
    assert clean.width_px == pytest.approx(s_px, rel=0.08)
    assert clean.n_pixels >= 100
    # SNR 3 (step / noise σ): one map scatters by 10–20 % (more for broader steps, measured
    # 0.70–1.16 px at s = 1, 2.5–4.3 px at s = 3); the median of eight maps stays within 20 %
    noisy = [edge_scale(_erf_steps(s_px, snr=3.0, rng=seed)).width_px for seed in range(8)]
    assert np.median(noisy) == pytest.approx(s_px, rel=0.2)


@pytest.mark.regression
def test_edge_scale_reads_sharp_steps_as_narrow_and_keeps_the_base_scale():
    from stabtool.lines.edges import edge_scale

    sc = edge_scale(_erf_steps(0.3, snr=3.0, rng=5))
    assert sc.width_px < 0.6
    assert sc.sigma_px == 1.5


def test_edge_scale_on_pure_noise_has_no_width_and_no_edges_at_large_scales():
    from stabtool.lines.edges import edge_map, edge_scale

    v = np.random.default_rng(6).normal(0.0, 1.0, (128, 128))
    da = make_map(v, np.linspace(0, 0.1, 128), np.linspace(0, 0.1, 128), x_gate="PA", y_gate="PB")
    sc = edge_scale(da)
    assert np.isnan(sc.width_px) and sc.sigma_px == 1.5
    # thresholds follow the noise of the same smoothed derivative: no false edges at σ = 4 px either
    assert edge_map(da, sigma_px=4.0).n_edges == 0
    with pytest.raises(InputError):
        edge_scale(da, max_sigma_px=-1.0)


@pytest.mark.regression
def test_scale_selection_leaves_sharp_line_maps_unchanged():
    da, _ = render("kestrel", shape=(128, 128), snr=3, rng=0)
    a, b = LineDetector()(da), LineDetector(scale_selection=False)(da)
    for fam in ("dot1", "dot2"):
        assert [ln.slope for ln in a.family(fam).lines] == [ln.slope for ln in b.family(fam).lines]


@pytest.mark.regression
def test_broad_lines_at_low_snr_are_found_at_the_selected_scale():
    # occupation blurred by 2 px and noise σ twice the per-pixel step: a step-height SNR of ≈ 3
    counts = {True: [], False: []}
    for seed in (0, 1):
        da, truth = render("kestrel", shape=(128, 128), snr=0.5, rng=seed, blur_px=2.0)
        for sel in (True, False):
            res = LineDetector(scale_selection=sel)(da)
            counts[sel].append(min(len(res.family("dot1")), len(res.family("dot2"))))
            if rel_errors(res, truth).max() > 0.02:
                assert not res.quality.ok
    # both families found on every map at the selected scale (the base scale alone found one
    # family on one of these maps before the contrast floor was set per orientation; its
    # second family's lines are now found too, with slopes 4–25 % off and a doubtful verdict)
    assert min(counts[True]) >= 2


def test_crossings_near_the_map_border_stay_on_the_half_occupation_line():
    # A thermally broadened dot2 step (Fermi width 0.9 px, i.e. a 3.2 px FWHM) whose line runs
    # from row 9 into the bottom edge (row 0.7), read through the flank of a Lorentzian sensor
    # peak (a Coulomb peak, common practice, no source) that the gate also sweeps. Where the
    # border cuts the profile short of the lower plateau, the fit would have to extrapolate it,
    # and the sensor's curvature then moves the crossing (0.37 px at row 1 without the rule).
    # Every reported crossing must lie within 0.1 px of the true half-occupation row, and the
    # line's slope within 1 %.
    from stabtool.lines.hough import PixelSegment
    from stabtool.lines.refine import refine_segments
    from stabtool.mapdata import MapAxes

    ny, nx, w = 40, 60, 0.9
    cols, rows = np.arange(nx), np.arange(ny)
    line = 9.0 - 0.14 * cols  # row of the half-occupation crossing in each column
    occ = 1.0 / (1.0 + np.exp(-(rows[:, None] - line[None, :]) / w))  # Fermi–Dirac, 0 → 1 across the line
    phi = 0.03 * rows[:, None] - 0.5 * occ  # sensor detuning in peak half-widths
    img = 1.0 / (1.0 + (phi - 0.8) ** 2)
    axes = MapAxes(x=cols * 1e-3, y=rows * 1e-3, x_gate="PA", y_gate="PB")
    n = np.hypot(1.0, 0.14)
    seg = PixelSegment(cx=30.0, cy=9.0 - 0.14 * 30, ux=1.0 / n, uy=-0.14 / n, t0=-28.0, t1=28.0,
                       n_pixels=56, rms_px=0.3)
    r = refine_segments([seg], img, axes, families=["dot2"], along_x=[False])[0]
    assert r.refined
    t, p, _ = r.points
    c = np.round(t / 1e-3).astype(int)
    np.testing.assert_allclose(p / 1e-3, line[c], rtol=0, atol=0.1)
    assert r.line.slope == pytest.approx(-0.14, rel=0.01)
