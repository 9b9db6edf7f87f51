"""Charge-jump detection under spiky read-out (stabtool.lines.jumps).

Spikes: isolated single-pixel outliers of a few step heights, as a readout
glitch or a cosmic hit gives (common practice, no source). They must neither
make jumps nor hide a real one.
"""

import numpy as np
import pytest
from test_lines_pipeline import render

from stabtool.lines import detect_charge_jumps


def _with_spikes(da, *, fraction, height, seed):
    g = np.random.default_rng(seed)
    v = np.asarray(da.values, float).copy()
    hit = g.random(v.shape) < fraction
    step = np.nanpercentile(np.abs(np.diff(v, axis=1)), 99)
    v[hit] += g.normal(0.0, height * step, int(hit.sum()))
    return da.copy(data=v)


@pytest.mark.parametrize("snr", [10, 30])
@pytest.mark.parametrize("seed", range(6))
def test_spikes_alone_make_no_jump(seed, snr):
    da, _ = render("kestrel", snr=snr, rng=seed)
    assert detect_charge_jumps(da) == ()
    spiky = _with_spikes(da, fraction=0.004, height=20.0, seed=100 + seed)
    assert detect_charge_jumps(spiky) == ()


@pytest.mark.parametrize("seed", range(8))
def test_a_jump_among_spikes_is_still_found(seed):
    da, _ = render("kestrel", snr=30, rng=seed, jump=(64, 0.45))
    assert any(abs(j.row - 64) <= 2 for j in detect_charge_jumps(da))
    spiky = _with_spikes(da, fraction=0.002, height=20.0, seed=200 + seed)
    rows = [j.row for j in detect_charge_jumps(spiky)]
    assert any(abs(r - 64) <= 2 for r in rows), rows
