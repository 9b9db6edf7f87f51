"""Row offsets measured clear of the lines: broad shallow lines keep unbiased crossings.

A row difference that crosses a broad, nearly horizontal transition line
carries the line's own derivative; when a family of such lines covers most
of a row, the median of the row differences (the row-offset estimate) takes
part of the lines for an offset and subtracting it bends every column
profile across them. The maps here are sums of Fermi steps
(``stabtool.physics.thermal.fermi_occupation``, the thermal line shape of
van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)) whose half-level lines
are known exactly.
"""

from __future__ import annotations

import numpy as np
import pytest

import stabtool.lines.detector as det_mod
from stabtool.lines import detect_lines
from stabtool.mapdata import make_map
from stabtool.physics.thermal import fermi_occupation
from stabtool.preprocess.background import _row_offsets_core

N = 112
#: shallow ("dot2") lines y = c + S2·x and steep ("dot1") lines x = d + y/S1, pixels
S2, S1 = -0.26, -3.2
C2 = (22.0, 52.0, 82.0)
D1 = (30.0, 62.0, 94.0)
W2_PX, W1_PX = 1.1, 0.9  # Fermi widths along y and along x


def _broad_lines_map(offsets: np.ndarray | None = None):
    j, i = np.meshgrid(np.arange(N, dtype=float), np.arange(N, dtype=float))  # x (column), y (row)
    z = np.zeros((N, N))
    for c in C2:
        z += 1.0 - fermi_occupation(i - (c + S2 * j), 0.0, W2_PX)
    for d in D1:
        z += 1.3 * (1.0 - fermi_occupation(j - (d + i / S1), 0.0, W1_PX))
    if offsets is not None:
        z = z + offsets[:, None]
    v = np.arange(N) * 1e-3
    return make_map(z, v, v), z


def test_masked_row_offsets_recover_a_random_walk_where_rows_are_clear_of_lines():
    # offsets are a shift common to the whole row: the pixels left after the mask recover it
    # exactly (no noise); rows with too few pixels left take the median step of the others
    rng = np.random.default_rng(1)
    walk = np.cumsum(rng.normal(0, 0.2, N))
    _, z = _broad_lines_map(walk)
    j, i = np.meshgrid(np.arange(N, dtype=float), np.arange(N, dtype=float))
    near = np.zeros((N, N), bool)
    for c in C2:
        near |= np.abs(i - (c + S2 * j)) <= 8
    for d in D1:
        near |= np.abs(j - (d + i / S1)) <= 5
    off = _row_offsets_core(z, near, 1e-3)
    # rows whose differences are mostly clear of the masked bands: the steps equal the walk's
    d_true = np.diff(walk)
    d_got = np.diff(off)
    kept = (~(near[1:] | near[:-1])).mean(1) >= 0.25
    assert kept.sum() > 20
    np.testing.assert_allclose(d_got[kept], d_true[kept], atol=0.01)


def test_without_a_line_bias_the_masked_offsets_are_the_plain_ones():
    # parallel sharp steps (one pixel wide) plus white noise and a random walk: the plain row
    # medians are not biased beyond their noise, so the mask changes nothing
    rng = np.random.default_rng(2)
    j, i = np.meshgrid(np.arange(N, dtype=float), np.arange(N, dtype=float))
    z = np.floor((j + 0.3 * i) / 24.0) + rng.normal(0, 0.05, (N, N)) + np.cumsum(rng.normal(0, 0.2, N))[:, None]
    near = np.zeros((N, N), bool)
    for c in range(-1, 6):
        near |= np.abs(j + 0.3 * i - 24.0 * c) <= 3
    np.testing.assert_array_equal(_row_offsets_core(z, near, 0.05), _row_offsets_core(z))


def test_unmasked_row_offsets_equal_the_plain_median_formula():
    _, z = _broad_lines_map()
    steps = np.concatenate([[0.0], np.median(np.diff(z, axis=0), axis=1)])
    off = np.cumsum(steps)
    np.testing.assert_allclose(_row_offsets_core(z), off - np.median(off), atol=1e-12)


def _dot2_position_errors_px(det):
    """Signed distance (px, along y) of each dot2 line from the nearest true line at its centre, and slopes."""
    errs, slopes = [], []
    for ln in det.families["dot2"].lines:
        xc, yc = ln.x0 / 1e-3, ln.y0 / 1e-3
        true_y = np.array([c + S2 * xc for c in C2])
        k = int(np.argmin(np.abs(true_y - yc)))
        errs.append(yc - true_y[k])
        slopes.append(ln.slope)
    return np.array(errs), np.array(slopes)


@pytest.mark.regression
def test_broad_shallow_lines_keep_their_slope_and_position_after_the_row_offsets():
    # common practice, no source: sub-pixel edge location to 0.1 px on a noiseless step
    da, _ = _broad_lines_map()
    d = detect_lines(da)
    err, slopes = _dot2_position_errors_px(d)
    assert err.size >= 3
    np.testing.assert_allclose(err, 0.0, atol=0.1)
    np.testing.assert_allclose(slopes, S2, rtol=0.003)  # plain row medians: 0.6–1.6 % here


@pytest.mark.regression
def test_without_the_mask_the_same_map_is_biased(monkeypatch):
    # the mechanism: plain row medians on this map turn the dot2 slopes by more than 0.5 %
    monkeypatch.setattr(det_mod, "ROW_OFFSETS_CLEAR_OF_LINES", False)
    da, _ = _broad_lines_map()
    err, slopes = _dot2_position_errors_px(detect_lines(da))
    assert np.max(np.abs(slopes / S2 - 1)) > 0.005


def test_kept_medians_equal_numpy_median_of_the_kept_entries():
    from stabtool.preprocess._nan import kept_row_medians as _kept_medians

    rng = np.random.default_rng(0)
    for n in (7, 8, 51):  # odd and even rows, every parity of kept / left-out counts
        d = rng.normal(size=(200, n))
        keep = rng.random((200, n)) < rng.random((200, 1))
        cnt = keep.sum(1)
        got = _kept_medians(d, keep, cnt)
        ok = cnt > 0
        want = np.array([np.median(d[i][keep[i]]) for i in np.nonzero(ok)[0]])
        np.testing.assert_array_equal(got[ok], want)
