"""Full pipeline on generator arrays: simulated pair maps → Analyzer → assembled matrix.

Every pair of gates of the 4-dot (and 8-dot) array with its sensor dot is
measured as a noisy charge-sensor map (SNR 10, T_e = 100 mK, t = 10 µeV),
±1 addition voltage around the point where every dot holds two electrons,
the other gates held there. Each map is analysed by ``stabtool.analysis.Analyzer``
and the results are combined. Truth: ``α = Cdd⁻¹ Cdg`` normalised per row by the
plunger element (conventions file). Acceptance bound (issue): 0.01 per element.

These tests are slow (tens of maps) and opt-in: ``pytest -m slow``.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from _arrays import array_with_sensor, centre_voltages, truth_matrix

from stabtool.analysis import Analyzer
from stabtool.arrays import assemble_virtual_gates, pair_from_map
from stabtool.simulate import Artefacts, simulate_map

HALF_WINDOW = 1.0  # addition voltages on each side of the centre (fewer foreign lines than 1.5 or 2)
PIXELS = 100
SNR = 10.0


def _pipeline(n: int):
    dev = array_with_sensor(n)
    v0 = centre_voltages(dev, 2)
    names = list(dev.gate_names)
    e_c, alpha = dev.ec_eV, dev.lever_arm
    analyzer = Analyzer()
    maps = []
    for i, x in enumerate(names):
        for j in range(i + 1, len(names)):
            y = names[j]
            hx = HALF_WINDOW * e_c[i, i] / alpha[i, i]
            hy = HALF_WINDOW * e_c[j, j] / alpha[j, j]
            fixed = {g: float(v0[k]) for k, g in enumerate(names) if g not in (x, y)}
            sm = simulate_map(dev, x_gate=x, y_gate=y, x_range_V=(v0[i] - hx, v0[i] + hx),
                              y_range_V=(v0[j] - hy, v0[j] + hy), shape=(PIXELS, PIXELS),
                              temperature_K=0.1, tunnel_coupling_ueV=10.0, fixed_V=fixed,
                              artefacts=Artefacts(snr=SNR), rng=100 * i + j)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                maps.append(pair_from_map(sm.data, analyzer=analyzer, source=f"{x}-{y}"))
    vgm = assemble_virtual_gates(maps, plungers=names[:-1], sensors=["SG"])
    return dev, vgm


@pytest.fixture(scope="module")
def array4():
    return _pipeline(4)


@pytest.mark.slow
@pytest.mark.regression
def test_pipeline_matrix_within_bound_4_dots(array4) -> None:
    dev, vgm = array4
    err = np.abs(vgm.matrix - truth_matrix(dev))
    worst = np.unravel_index(np.argmax(err), err.shape)
    assert err.max() <= 0.01, (
        f"worst element {vgm.virtual_gates[worst[0]]}<-{vgm.gates[worst[1]]}: "
        f"{vgm.matrix[worst]:.4f} vs truth {truth_matrix(dev)[worst]:.4f}\n{np.round(err, 3)}")


@pytest.mark.slow
@pytest.mark.regression
def test_pipeline_not_ok_when_wrong_4_dots(array4) -> None:
    """Honesty: a matrix that misses the truth by more than the bound is not reported ok,
    and the truth lies within 5 stated standard errors wherever an uncertainty is given."""
    dev, vgm = array4
    err = np.abs(vgm.matrix - truth_matrix(dev))
    if err.max() > 0.01:
        assert not vgm.quality.ok
    sig = vgm.uncertainty
    finite = np.isfinite(sig) & (sig > 0)
    assert np.all(err[finite] <= 5 * sig[finite]), np.round(np.where(finite, err / np.where(finite, sig, 1), 0), 1)


@pytest.mark.slow
@pytest.mark.regression
def test_pipeline_matrix_within_bound_8_dots() -> None:
    dev, vgm = _pipeline(8)
    err = np.abs(vgm.matrix - truth_matrix(dev))
    assert err.max() <= 0.01, np.round(err, 3)
