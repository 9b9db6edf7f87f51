"""Statistics of the benchmark: percentiles, truth comparison, the silent-failure rule.

Percentiles are checked against numpy.percentile and
scipy.stats.scoreatpercentile (both linear interpolation, Hyndman & Fan
type 7); the comparison against the worked virtual-gate example of the
references file; the silent-failure rule against the bounds of the fitter
issue (virtual-gate elements 0.005 clean / 0.02 noisy, Cdg 2 %, lever arms
5 %, charging energies 5 %).
"""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest
from scipy import stats as sps

from stabtool.bench.bounds import BOUNDS_SOURCE, FITTER_BOUNDS, FitterBounds
from stabtool.bench.compare import compare_with_truth, extract_elements
from stabtool.bench.stats import error_stats, nan_percentile, silent_failure
from stabtool.physics.ci import (
    charging_energy_matrix_meV,
    double_dot_slopes,
    lever_arm_matrix,
    virtual_gate_matrix,
)

# ------------------------------------------------------------ percentiles


@pytest.mark.parametrize("n", [1, 2, 7, 24, 101])
def test_percentiles_match_numpy_and_scipy(n):
    x = np.random.default_rng(n).lognormal(size=n)
    qs = [0, 5, 25, 50, 75, 95, 100]
    got = nan_percentile(x, qs)
    np.testing.assert_allclose(got, np.percentile(x, qs), rtol=1e-12, atol=0)
    for q, g in zip(qs, got):
        assert g == pytest.approx(sps.scoreatpercentile(x, q), rel=1e-12, abs=0)


def test_percentile_hand_values():
    # 1..5: median 3; p95 = 4 + 0.8 * (5 - 4) = 4.8 (linear interpolation by hand).
    assert nan_percentile([5, 1, 4, 2, 3], 50) == 3.0
    assert nan_percentile([5, 1, 4, 2, 3], 95) == pytest.approx(4.8, abs=1e-12)


def test_percentile_ignores_nan_and_keeps_inf():
    x = [0.1, np.nan, 0.3, 0.2, np.nan]
    assert nan_percentile(x, 50) == pytest.approx(np.nanpercentile(x, 50), abs=1e-15)
    # an infinite error (estimate of an exactly-zero truth) stays infinite, not NaN
    assert nan_percentile([1.0, 2.0, np.inf], 100) == np.inf
    assert nan_percentile([1.0, 2.0, np.inf], 50) == 2.0
    assert nan_percentile([1.0, np.inf, np.inf], 75) == np.inf


def test_percentile_empty_and_bad_q():
    assert math.isnan(nan_percentile([], 50))
    assert math.isnan(nan_percentile([np.nan, np.nan], 95))
    with pytest.raises(ValueError, match="percentile q"):
        nan_percentile([1.0], 101)


def test_error_stats_against_statistics_and_scipy():
    x = np.random.default_rng(3).exponential(size=40)
    x[[3, 17]] = np.nan
    s = error_stats(x)
    clean = x[~np.isnan(x)]
    assert s.n == 38
    assert s.median == pytest.approx(statistics.median(clean), rel=1e-12)
    assert s.p95 == pytest.approx(sps.scoreatpercentile(clean, 95), rel=1e-12)
    assert s.p5 <= s.p25 <= s.median <= s.p75 <= s.p95


# ------------------------------------------------------------ comparison with truth


def _truth_json(cdg, cdd):
    """Analyze-style JSON of a CI device, from stabtool.physics."""
    a = lever_arm_matrix(cdg, cdd)
    ec = charging_energy_matrix_meV(cdd)
    s = double_dot_slopes(a)
    return {
        "slopes": {"dot1": s.dot1, "dot2": s.dot2, "interdot": s.interdot},
        "virtual_gate_matrix": virtual_gate_matrix(a).tolist(),
        "gate_capacitance_aF": np.asarray(cdg, float).tolist(),
        "lever_arm": a.tolist(),
        "charging_energy_meV": {"dot1": ec[0, 0], "dot2": ec[1, 1], "mutual": ec[0, 1]},
    }


# Worked example of the references file (N dots, lever arms and virtual gates):
# Cdg = [[10, 3], [2.5, 9]] aF, C11 = C22 = 80 aF, Cm = 15 aF.
CDG = np.array([[10.0, 3.0], [2.5, 9.0]])
CDD = np.array([[80.0, -15.0], [-15.0, 80.0]])


def test_extraction_reads_the_worked_example():
    el = extract_elements(_truth_json(CDG, CDD))
    # slopes dot1 −2.2333, dot2 −0.45752, interdot +1.2500; M12 0.44776, M21 0.45752
    assert el["slopes"]["dot1"] == pytest.approx(-2.2333, abs=5e-4)
    assert el["slopes"]["dot2"] == pytest.approx(-0.45752, abs=5e-5)
    assert el["interdot_slope"]["interdot"] == pytest.approx(1.2500, abs=5e-4)
    assert el["virtual_gate"]["M12"] == pytest.approx(0.44776, abs=5e-5)
    assert el["virtual_gate"]["M21"] == pytest.approx(0.45752, abs=5e-5)
    assert el["lever_arm"]["a11"] == pytest.approx(0.13563, abs=5e-5)
    assert el["cdg"]["C21"] == 2.5


def test_comparison_errors_by_hand():
    truth = _truth_json(CDG, CDD)
    est = _truth_json(CDG, CDD)
    est["virtual_gate_matrix"][0][1] += 0.01
    est["gate_capacitance_aF"][1][1] *= 1.03  # 3 % on C22
    est["charging_energy_meV"]["mutual"] = None  # not reported
    est["lever_arm"] = None
    c = compare_with_truth(est, truth)
    vg = c.groups["virtual_gate"]
    assert vg.abs == pytest.approx(0.01, abs=1e-12)
    assert vg.rel == pytest.approx(0.01 / 0.44776, rel=1e-4)
    assert vg.complete
    assert c.groups["cdg"].rel == pytest.approx(0.03, rel=1e-9)
    assert c.groups["cdg"].abs == pytest.approx(0.27, rel=1e-9)
    ec = c.groups["charging_energy"]
    assert not ec.complete and ec.n_reported == 2 and ec.rel == pytest.approx(0.0, abs=1e-12)
    la = c.groups["lever_arm"]
    assert not la.complete and la.n_reported == 0 and math.isnan(la.rel)
    assert c.groups["slopes"].rel == pytest.approx(0.0, abs=1e-12)


def test_no_result_compares_as_all_missing():
    c = compare_with_truth(None, _truth_json(CDG, CDD))
    for g in c.groups.values():
        assert not g.complete and g.n_reported == 0 and math.isnan(g.abs)


def test_zero_truth_nonzero_estimate_is_infinite_relative_error():
    truth = _truth_json(CDG, CDD)
    truth["gate_capacitance_aF"][0][1] = 0.0
    est = _truth_json(CDG, CDD)  # C12 = 3 aF where the truth says 0
    c = compare_with_truth(est, truth)
    assert c.elements["cdg"]["C12"].rel == math.inf
    assert c.groups["cdg"].abs == pytest.approx(3.0)


# ------------------------------------------------------------ the silent-failure rule


def _comparison(*, vg=0.0, cdg=0.0, lever=0.0, ec=0.0):
    truth = _truth_json(CDG, CDD)
    est = _truth_json(CDG, CDD)
    est["virtual_gate_matrix"][1][0] += vg
    est["gate_capacitance_aF"][0][0] *= 1 + cdg
    est["lever_arm"] = None if lever is None else (np.asarray(truth["lever_arm"]) * (1 + lever)).tolist()
    est["charging_energy_meV"]["dot2"] *= 1 + ec
    return compare_with_truth(est, truth)


def test_bounds_are_the_fitter_issue_numbers():
    b = FITTER_BOUNDS
    assert BOUNDS_SOURCE == "issue bounds of the fitter"
    assert (b.virtual_gate_clean, b.virtual_gate_noisy, b.clean_snr) == (0.005, 0.02, 10.0)
    assert (b.cdg_rel, b.lever_arm_rel, b.charging_energy_rel) == (0.02, 0.05, 0.05)
    assert b.virtual_gate(10) == 0.005 and b.virtual_gate(30) == 0.005
    assert b.virtual_gate(5) == 0.02 and b.virtual_gate(1) == 0.02


@pytest.mark.parametrize(
    "kw, snr, silent, beyond",
    [
        ({}, 30, False, ()),
        ({"vg": 0.006}, 10, True, ("virtual_gate",)),  # 0.006 > 0.005 at SNR >= 10
        ({"vg": 0.006}, 5, False, ()),  # but within 0.02 below SNR 10
        ({"vg": 0.004}, 30, False, ()),
        ({"vg": 0.021}, 3, True, ("virtual_gate",)),
        ({"cdg": 0.021}, 30, True, ("cdg",)),
        ({"cdg": 0.019}, 1, False, ()),
        ({"lever": 0.051}, 30, True, ("lever_arm",)),
        ({"lever": -0.049}, 30, False, ()),
        ({"lever": None}, 30, False, ()),  # null lever arms are honest, not silent
        ({"ec": 0.06}, 2, True, ("charging_energy",)),
        ({"vg": 0.03, "cdg": 0.05}, 10, True, ("virtual_gate", "cdg")),
    ],
)
def test_silent_failure_rule(kw, snr, silent, beyond):
    c = _comparison(**kw)
    v = silent_failure(c, ok=True, snr=snr)
    assert v.silent is silent
    assert bool(v) is silent
    assert v.beyond == beyond
    assert len(v.reasons) == len(beyond)
    # the same errors with a doubtful verdict are never silent, but stay "beyond"
    v2 = silent_failure(c, ok=False, snr=snr)
    assert v2.silent is False and v2.beyond == beyond


def test_silent_failure_uses_given_bounds():
    c = _comparison(cdg=0.03)
    assert silent_failure(c, ok=True, snr=30).silent
    assert not silent_failure(c, ok=True, snr=30, bounds=FitterBounds(cdg_rel=0.05)).silent


def test_slope_errors_alone_are_not_silent_failures():
    truth = _truth_json(CDG, CDD)
    est = _truth_json(CDG, CDD)
    est["slopes"]["interdot"] *= 1.5  # no per-map fitter bound on slopes
    v = silent_failure(compare_with_truth(est, truth), ok=True, snr=30)
    assert not v.silent and v.beyond == ()
