"""Charge-state labels against the constant-interaction ground state (stabtool.fit.charge_states)."""

import numpy as np
import pytest
from _fit import WORKED, truth_from_capacitances

from stabtool.fit.charge_states import ground_state_labels, label_charge_states
from stabtool.physics import E_AC


def _brute_force(t, x, y):
    """argmin_N ½ (eN − Cdg V)ᵀ Cdd⁻¹ (eN − Cdg V) over N ∈ [0, 8]² (conventions file)."""
    inv = np.linalg.inv(t.cdd)
    n = np.array([(a, b) for a in range(9) for b in range(9)], float)
    xx, yy = np.meshgrid(x, y)
    q = np.stack([xx, yy], -1) @ t.cdg.T  # aC
    d = E_AC * n[:, None, None, :] - q[None]
    u = 0.5 * np.einsum("kyxi,ij,kyxj->kyx", d, inv, d)
    return n[np.argmin(u, axis=0)].astype(int)


def test_labels_match_the_ci_ground_state():
    t = truth_from_capacitances(**WORKED)
    x = np.linspace(-0.005, 0.06, 90)
    y = np.linspace(-0.005, 0.06, 80)
    truth = _brute_force(t, x, y)
    xx, yy = np.meshgrid(x, y)
    u = xx + t.m[0, 1] * yy
    v = t.m[1, 0] * xx + yy
    # lines at V' = ΔV (N − ½) + δ N_other with no offset for this Cdg V convention
    lab = ground_state_labels(u, v, addition_V=t.addition_V, mutual_V=t.mutual_V, offsets_V=np.zeros(2),
                              n_min=(0, 0))
    assert np.mean(np.all(lab == truth, axis=-1)) > 0.999


def test_empty_corner_gives_absolute_occupations():
    t = truth_from_capacitances(**WORKED)
    x = np.linspace(-0.04, 0.06, 100)
    y = np.linspace(-0.04, 0.06, 100)
    # lowest detected lines have label 3 (lattice labels are relative); the map
    # extends > 2 cells below them, so they are the 0 → 1 transitions
    off = np.array([-3 * t.addition_V[0] - 3 * t.mutual_V[0], -3 * t.addition_V[1] - 3 * t.mutual_V[1]])
    cs = label_charge_states(x, y, t.m, addition_V=t.addition_V, mutual_V=t.mutual_V, offsets_V=off,
                             lowest_line=(4, 4), snr=50.0)
    assert cs.absolute == (True, True)
    assert cs.labels.min() == 0
    assert cs.few_electron
    assert all(0 < c <= 1 for c in cs.confidence)
    # a window whose lowest corner lies just below its lowest lines: labels stay relative
    xs, ys = x[50:], y[50:]
    free = ground_state_labels(xs[0] + t.m[0, 1] * ys[0], t.m[1, 0] * xs[0] + ys[0], addition_V=t.addition_V,
                               mutual_V=t.mutual_V, offsets_V=off)
    cs2 = label_charge_states(xs, ys, t.m, addition_V=t.addition_V, mutual_V=t.mutual_V, offsets_V=off,
                              lowest_line=(int(free[0]) + 1, int(free[1]) + 1), snr=50.0)
    assert cs2.absolute == (False, False)


def test_a_doubtful_labelling_keeps_the_occupations_relative():
    # an empty corner counts electrons from the lowest line's label; when the lattice leaves the
    # labelling in doubt (held-out maps: every wrong absolute label, up to 1.0 confident, came with
    # such a doubt) the labels stay relative, and the result says an empty corner was withheld
    t = truth_from_capacitances(**WORKED)
    x = np.linspace(-0.04, 0.06, 100)
    y = np.linspace(-0.04, 0.06, 100)
    off = np.array([-3 * t.addition_V[0] - 3 * t.mutual_V[0], -3 * t.addition_V[1] - 3 * t.mutual_V[1]])
    kw = dict(addition_V=t.addition_V, mutual_V=t.mutual_V, offsets_V=off, lowest_line=(4, 4), snr=50.0)
    sure = label_charge_states(x, y, t.m, **kw)
    held = label_charge_states(x, y, t.m, allow_absolute=False, **kw)
    assert sure.absolute == (True, True) and not sure.withheld
    assert held.absolute == (False, False) and held.withheld
    assert held.confidence == (0.0, 0.0) and not held.few_electron
    assert held.labels.min() == 0  # relative to the lowest state seen
    assert held.to_json()["absolute_withheld"] is True


def test_regions_list_every_state_with_its_pixel_count_and_centroid():
    t = truth_from_capacitances(**WORKED)
    x = np.linspace(-0.005, 0.06, 70)
    y = np.linspace(-0.005, 0.06, 60)
    valid = np.ones((60, 70), bool)
    valid[50:, 40:] = False  # an interrupted sweep: unmeasured pixels belong to no region
    cs = label_charge_states(x, y, t.m, addition_V=t.addition_V, mutual_V=t.mutual_V, offsets_V=np.zeros(2),
                             lowest_line=(1, 1), valid=valid)
    xx, yy = np.meshgrid(x, y)
    # reference: numpy's unique over label pairs, centroids by boolean masks
    keys, counts = np.unique(cs.labels[valid], axis=0, return_counts=True)
    assert [(r["n1"], r["n2"]) for r in cs.regions] == [tuple(k) for k in keys]
    for r, k, c in zip(cs.regions, keys, counts):
        sel = np.all(cs.labels == k, axis=-1) & valid
        assert r["pixels"] == c
        assert r["x"] == pytest.approx(xx[sel].mean(), rel=1e-12)
        assert r["y"] == pytest.approx(yy[sel].mean(), rel=1e-12)


def test_a_low_snr_keeps_the_occupations_relative():
    # at SNR 4 a line near the low corner is easily missed (held-out probe maps: 4 of 9 claims with a
    # confidence ≤ 0.5 were wrong, on maps with no empty corner at all); the claim needs a confidence
    # above MIN_ABSOLUTE_CONFIDENCE, which min(1, snr/10) caps at snr/10
    from stabtool.fit.charge_states import MIN_ABSOLUTE_CONFIDENCE

    t = truth_from_capacitances(**WORKED)
    x = np.linspace(-0.04, 0.06, 100)
    y = np.linspace(-0.04, 0.06, 100)
    off = np.array([-3 * t.addition_V[0] - 3 * t.mutual_V[0], -3 * t.addition_V[1] - 3 * t.mutual_V[1]])
    kw = dict(addition_V=t.addition_V, mutual_V=t.mutual_V, offsets_V=off, lowest_line=(4, 4))
    low = label_charge_states(x, y, t.m, snr=4.0, **kw)
    assert low.absolute == (False, False) and low.withheld
    high = label_charge_states(x, y, t.m, snr=10.0 * MIN_ABSOLUTE_CONFIDENCE + 2.0, **kw)
    assert high.absolute == (True, True) and all(c > MIN_ABSOLUTE_CONFIDENCE for c in high.confidence)


def _stripe_labels(ny=90, nx=120):
    """Labels of a map whose lower 60 rows hold no dot-2 electron, with dot-1 lines at columns 30, 60, 90."""
    lab = np.zeros((ny, nx, 2), int)
    lab[..., 0] = np.searchsorted([30, 60, 90], np.arange(nx), side="right")[None, :]
    lab[60:, :, 1] = 1
    return lab


@pytest.mark.parametrize("first_row, seen_expected", [(0.0, 1.0), (45.0, 0.0)])
def test_the_other_dots_lines_must_be_seen_in_the_deeper_half_of_an_empty_region(first_row, seen_expected):
    # An empty region is read from missing lines. Where the sensor works, the other dot's lines cross it
    # (constant-interaction honeycomb: dot-1 transitions continue at N2 = 0) and are detected down to
    # row 0 (all seen). A sensor blind in the lower part of the map shows dot-1 segments only down to
    # row 45, 15 rows below the lowest dot-2 line; the deeper half of the region (rows 0-29) shows none.
    from stabtool.fit.charge_states import lines_seen_where_empty

    lab = _stripe_labels()
    valid = np.ones(lab.shape[:2], bool)
    segments = np.array([[c - 0.5, first_row, c - 0.5, 89.0] for c in (30, 60, 90)])
    n, seen = lines_seen_where_empty(lab, valid, 1, segments)
    assert n > 30 and seen == seen_expected
    assert lines_seen_where_empty(lab, valid, 1, np.empty((0, 4))) == (n, 0.0)
