"""Re-measured lines sharper than a pixel (stabtool.fit.relocate).

A step narrower than the sample spacing, sampled at points, is located only
to within the pixel (the position of a point-sampled edge: common practice,
no source). A line that stays within one pixel column over its length fixes
its slope only to about ±1 pixel over that length, however low the noise; a
family of such short pieces (a map swept along virtual gates, whose lines
run almost along the axes) must say so in its stated slope error.
"""

from __future__ import annotations

import numpy as np
import pytest

from stabtool.fit.relocate import pixel_limited, quantised_crossings, relocate_family
from stabtool.lines.result import TransitionLine

#: true dx/dy of the pieces, pixels per pixel: 0.6 px across a 20-row piece
TILT = 0.03


def _sharp_pieces(tilt: float, rng: int, n_pieces: int = 12, rows: int = 20, noise: float = 0.05):
    """A map of ``n_pieces`` point-sampled unit steps x = x0 + tilt·(y − y0), each ``rows`` rows tall.

    Pieces are stacked in row bands (one per band, as the band pieces of a
    staircase) at random sub-pixel offsets; 1 V per pixel on both axes.
    """
    g = np.random.default_rng(rng)
    ny, nx = n_pieces * rows, 40
    yy, xx = np.mgrid[0:ny, 0:nx].astype(float)
    z = np.zeros((ny, nx))
    lines = []
    for k in range(n_pieces):
        band = (yy >= k * rows) & (yy < (k + 1) * rows)
        y_mid = k * rows + (rows - 1) / 2
        x_mid = 20.0 + g.uniform(-0.5, 0.5)
        edge = x_mid + tilt * (yy - y_mid)
        z[band] = (xx[band] > edge[band]).astype(float)
        y0, y1 = k * rows + 1.0, (k + 1) * rows - 2.0
        lines.append(TransitionLine(family="dot1", x0=x_mid, y0=y_mid, slope=np.inf, slope_stderr=0.05,
                                    position_stderr=0.3, start=(x_mid, y0), end=(x_mid, y1)))
    z += g.normal(0.0, noise, z.shape)
    return z, np.arange(nx, dtype=float), np.arange(ny, dtype=float), lines


def test_crossings_midway_between_samples_are_quantised_and_spread_ones_are_not():
    axis = np.arange(50, dtype=float) * 2e-3
    g = np.random.default_rng(0)
    mid = (g.integers(0, 48, 400) + 0.5 + g.normal(0, 0.03, 400)) * 2e-3
    spread = g.uniform(0, 48, 400) * 2e-3
    assert quantised_crossings(mid, axis)
    assert not quantised_crossings(spread, axis)
    # a decreasing axis reads the same
    assert quantised_crossings(mid, axis[::-1])
    # quantised points limit the slope only of lines that move on by fewer than two samples along
    # themselves: 20 mV tall lines at 0.02 and at 0.3 scan volts per cross volt (0.2 and 3 samples)
    spans = [(0.0, 0.02)] * 5
    assert pixel_limited(mid, axis, spans, 0.02)
    assert not pixel_limited(mid, axis, spans, 0.3)
    assert not pixel_limited(spread, axis, spans, 0.02)


@pytest.mark.parametrize("rng", range(6))
def test_slope_of_sharp_short_pieces_is_stated_with_the_pixel_resolution(rng):
    z, x, y, lines = _sharp_pieces(TILT, rng)
    rel = relocate_family(z, x, y, lines, which=0, initial=0.0, noise=0.05)
    assert rel.ok
    # the truth lies within 3 stated errors (points read as independent, seeds 0, 2 and 5 gave
    # 0.0005 ± 0.0010, 0.0000 ± 0.0009 and −0.0010 ± 0.0008; with the quantisation rms alone as
    # the points' scatter, ± 0.0075: still 4σ)
    assert abs(rel.inv_or_slope - TILT) <= 3 * rel.stderr, (rel.inv_or_slope, rel.stderr)
    # and the error stays below what one piece alone allows: ±1 px over its 12 central rows, 1/(12·√3)
    assert rel.stderr < 1 / (12 * np.sqrt(3))
