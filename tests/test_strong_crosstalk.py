"""Strong cross-talk: a window in which no two lines of a dot share a charge band.

In virtual coordinates (``V' = M V``, conventions) the next transition of the same band lies
``ΔV1/(1 − M12 M21)`` along x and ``M21`` times that along y (constant-interaction model, van der
Wiel et al., Rev. Mod. Phys. 75, 1 (2003)): with ``M12·M21`` near ½ a window of four transitions
each way holds every dot1 line in other bands. The cell then comes from the positions alone
(``stabtool.fit.lattice._across_step``) and is fitted to every line.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.fit.lattice import MIN_ACROSS_TRANSITIONS, FamilySegments, _across_step


def _pieces(dv: float, dm: float, n_transitions: int) -> FamilySegments:
    # transition N1 = n seen in bands N2 = n and n + 1 (two pieces δ apart), no band shared
    pos = np.array([dv * (n - 0.5) + dm * m for n in range(n_transitions) for m in (n, n + 1)])
    k = pos.size
    lo = np.arange(k) * 1.0  # extents far apart: no two segments overlap
    return FamilySegments(pos=pos, pos_err=np.full(k, 1e-7), lo=lo, hi=lo + 0.5, lever=np.zeros(k))


def test_the_step_across_bands_is_the_spacing_of_the_transitions_not_of_their_pieces():
    dv, dm = 6e-3, 0.3e-3
    step = _across_step(_pieces(dv, dm, 4))
    # the medians of the pieces of N1 = n lie at ΔV (n − ½) + δ (n + ½): spaced ΔV + δ (a start only)
    assert step == pytest.approx(dv + dm, rel=1e-9)
    # two transitions cannot tell ΔV from 2 ΔV: no step
    assert MIN_ACROSS_TRANSITIONS == 3
    assert _across_step(_pieces(dv, dm, 2)) is None


def test_one_transitions_staircase_over_shared_bands_is_not_taken_for_a_cell_step():
    # two dot1 transitions (ΔV1 = 24 mV), each seen in the same three bands (ΔV2 = 23 mV) with
    # δ1 = 4.6 mV = 0.19 ΔV1 between its pieces (a generator map at SNR 2.5 whose same-band pairs
    # were lost): the pieces look like six transitions 4.7 mV apart, but their extents go back and
    # forth with the positions instead of moving one way as a shear makes them
    dv1, dm1, dv2 = 24e-3, 4.6e-3, 23e-3
    pos = np.array([dv1 * n + dm1 * m for n in range(2) for m in range(3)])
    mid = np.array([dv2 * m + 0.011 * n for n in range(2) for m in range(3)])
    k = pos.size
    fam = FamilySegments(pos=pos, pos_err=np.full(k, 1e-7), lo=mid - 0.004, hi=mid + 0.004, lever=np.zeros(k))
    assert _across_step(fam) is None


@pytest.mark.regression
def test_a_strongly_cross_coupled_double_dot_gets_its_cell_from_lines_in_different_bands():
    from _simulate import double_dot_charge_map

    from stabtool.analysis import Analyzer

    # M12 = 0.62, M21 = 0.91 (product 0.57); four transitions of each dot across the window
    sm = double_dot_charge_map([[10.0, 6.0], [8.0, 9.0]], [[63.0, -3.0], [-3.0, 58.0]], electrons=4.0,
                               shape=(140, 140), temperature_K=0.1, rng=1)
    q = np.asarray(sm.data.values, float)
    da = sm.data.copy(data=q + np.random.default_rng(2).normal(0, 1 / 30, q.shape))  # SNR 30
    da.attrs.pop("stabtool_truth", None)
    truth = sm.truth.quantities
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = Analyzer()(da).to_json()
    # the fitter's bounds (clean map): M within 0.005, Cdg within 2 %
    m, m_true = np.asarray(out["virtual_gate_matrix"], float), np.asarray(truth["virtual_gate_matrix"], float)
    assert np.max(np.abs(m - m_true)) < 0.005
    cdg, cdg_true = np.asarray(out["gate_capacitance_aF"], float), np.asarray(truth["gate_capacitance_aF"], float)
    assert np.max(np.abs(cdg / cdg_true - 1)) < 0.02
    for dot in ("dot1", "dot2"):
        assert out["addition_voltages_V"][dot] == pytest.approx(truth["addition_voltages_V"][dot], rel=0.01)
    assert not any("bound the same charge band" in w for w in out["quality"]["warnings"])
