"""Row offsets (slow-axis noise) must not turn into transition lines.

A row offset is a step common to every pixel of a row (1/f noise of the
sensor, switching between sweeps); it is one pixel sharp along y and does not
stop at any transition line. Thermal transition lines are smooth along y
(Fermi profile, van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1). The lines of the dot2 family are located column
by column along y, where row offsets look like steps too: with strong offsets
the map the lines are measured on must be the row-corrected one.

The tests of the analysis check its row-offset gate
(:func:`stabtool.preprocess.background.row_offset_test` deciding which map the
lines are measured on).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.analysis import Analyzer
from stabtool.lines import detect_lines
from stabtool.mapdata import make_map
from stabtool.physics.thermal import fermi_occupation
from stabtool.simulate import quick_double_dot

N = 96


def _pink_rows(n: int, rng: np.random.Generator, std: float) -> np.ndarray:
    """1/f row offsets (power ∝ 1/f), standard deviation ``std``."""
    f = np.fft.rfftfreq(n)
    spec = rng.normal(size=f.size) + 1j * rng.normal(size=f.size)
    spec[0] = 0.0
    spec[1:] /= np.sqrt(f[1:])
    rows = np.fft.irfft(spec, n)
    return std * rows / rows.std()


def _fermi_lines(noise: float, rng: np.random.Generator) -> np.ndarray:
    """Three shallow and three steep thermal lines (Fermi steps, 1 px wide) plus white noise."""
    j, i = np.meshgrid(np.arange(N, dtype=float), np.arange(N, dtype=float))  # x (column), y (row)
    z = np.zeros((N, N))
    for c in (18.0, 46.0, 74.0):
        z += 1.0 - fermi_occupation(i - (c - 0.3 * j), 0.0, 1.0)
    for d in (24.0, 54.0, 84.0):
        z += 1.0 - fermi_occupation(j - (d - i / 3.0), 0.0, 1.0)
    return z + rng.normal(0.0, noise, z.shape)


def test_row_offset_test_is_calibrated_on_white_noise():
    # The row steps are medians of n row differences of white noise: standard error σ·√(π/n)
    # (asymptotic variance of a sample median, π σ_d²/(2n), σ_d² = 2σ²; from memory, e.g.
    # Kendall & Stuart). The test's robust scatter is in units of that error, so ≈ 1.
    from stabtool.preprocess.background import row_offset_test

    rng = np.random.default_rng(3)
    z = rng.normal(0.0, 0.5, (200, 150))
    t = row_offset_test(z, 0.5)
    assert 0.8 < t.scatter_z < 1.25
    assert t.n_sharp == 0 and not t.significant


def test_row_offset_test_tells_row_offsets_from_lines():
    from stabtool.preprocess.background import row_offset_test

    rng = np.random.default_rng(4)
    sigma = 0.1
    lines = _fermi_lines(sigma, rng)
    # thermal lines bias the row medians smoothly: not taken for offsets
    assert not row_offset_test(lines, sigma).significant
    # dense 1/f offsets of 3 σ (std): significant through the scatter
    dense = row_offset_test(lines + _pink_rows(N, rng, 3 * sigma)[:, None], sigma)
    assert dense.significant and dense.scatter_z > 3.0
    # a few sharp switches of 2 σ (sensor switching between sweeps): significant through the count
    sw = np.zeros(N)
    sw[[20, 41, 60, 77]] = 2 * sigma * np.array([1, -1, 1, -1])
    sparse = row_offset_test(lines + np.cumsum(sw)[:, None], sigma)
    assert sparse.significant and sparse.n_sharp >= 3


@pytest.mark.regression
def test_dot2_slope_recovered_on_a_map_with_strong_row_offsets():
    # 1/f row offsets of one charge-step height (std), SNR 30: the dot2 lines are found at
    # their true slope (before the gate they came out nearly horizontal, M21 off by 89 %).
    # Truth: M21 = −s2 = α21/α22 of the generator (constant-interaction model).
    sm = quick_double_dot("ge-double", shape=(N, N), snr=30.0, rng=0, row_noise=1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer(refine=False)(sm.data).to_json()
    m21 = j["virtual_gate_matrix"][1][0]
    truth = sm.truth.to_json()["virtual_gate_matrix"][1][0]
    assert m21 == pytest.approx(truth, rel=0.005)  # measured 0.1 %
    assert any("row offsets" in w for w in j["quality"]["warnings"])


def test_row_offsets_alone_give_no_lines():
    # white noise plus 1/f row offsets (3 σ) and sensor switching (4 σ steps): no transition line
    rng = np.random.default_rng(5)
    rows = _pink_rows(N, rng, 3.0) + 4.0 * (np.cumsum(rng.random(N) < 0.05) % 2)
    z = rng.normal(0.0, 1.0, (N, N)) + rows[:, None]
    v = np.arange(N) * 1e-3
    da = make_map(z, v, v)
    det = detect_lines(da)
    assert all(len(f.lines) == 0 for f in det.families.values())
    assert not det.unassigned
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer()(da).to_json()
    assert not j["quality"]["ok"]
    assert all(v is None for row in j["virtual_gate_matrix"] for v in row)
