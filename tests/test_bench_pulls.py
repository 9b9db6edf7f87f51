"""Pulls (estimate − truth)/stated σ of the benchmark (stabtool.bench.pulls)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from stabtool.bench.pulls import PULL_GROUPS, pulls_of, stated_errors, summarise_pulls


def _result(m12, m21, sm, cdg, scdg):
    return {
        "virtual_gate_matrix": [[1.0, m12], [m21, 1.0]],
        "virtual_gate_matrix_error": [[0.0, sm], [sm, 0.0]],
        "gate_capacitance_aF": cdg,
        "gate_capacitance_aF_error": scdg,
        "lever_arm": None,
        "lever_arm_error": None,
        "charging_energy_meV": {"dot1": None, "dot2": None, "mutual": None},
        "charging_energy_meV_error": {"dot1": None, "dot2": None, "mutual": None},
    }


TRUTH = {
    "virtual_gate_matrix": [[1.0, 0.3], [0.25, 1.0]],
    "gate_capacitance_aF": [[10.0, 3.0], [2.5, 9.0]],
    "lever_arm": [[0.1, 0.03], [0.02, 0.09]],
    "charging_energy_meV": {"dot1": 2.0, "dot2": 2.2, "mutual": 0.4},
}


def test_pull_is_error_over_stated_sigma():
    res = _result(0.31, 0.24, 0.005, [[10.2, 3.0], [2.5, 9.0]], [[0.1, 0.1], [0.1, 0.1]])
    p = pulls_of(res, TRUTH)
    assert p["virtual_gate"]["M12"] == pytest.approx((0.31 - 0.3) / 0.005)
    assert p["virtual_gate"]["M21"] == pytest.approx((0.24 - 0.25) / 0.005)
    assert p["cdg"]["C11"] == pytest.approx(2.0)
    # not reported (null) → NaN, never a made-up pull
    assert all(math.isnan(v) for v in p["lever_arm"].values())
    assert stated_errors(res)["cdg"]["C22"] == pytest.approx(0.1)


def test_zero_or_missing_error_gives_no_pull():
    res = _result(0.31, 0.24, 0.0, [[10.2, 3.0], [2.5, 9.0]], None)
    p = pulls_of(res, TRUTH)
    assert math.isnan(p["virtual_gate"]["M12"]) and math.isnan(p["cdg"]["C11"])


def test_honest_gaussian_errors_have_unit_rms_pull():
    # estimates drawn with exactly the stated σ: n·rms² follows χ²(n) (scipy.stats), so the rms
    # must lie in the central 99.9 % interval of √(χ²(n)/n)
    rng = np.random.default_rng(5)
    maps = []
    for _ in range(200):
        s = rng.uniform(0.002, 0.01)
        m12, m21 = 0.3 + rng.normal(0, s), 0.25 + rng.normal(0, s)
        maps.append(pulls_of(_result(m12, m21, s, None, None), TRUTH))
    summ = summarise_pulls(maps)
    vg = summ["virtual_gate"]
    assert vg.n == 400
    lo, hi = np.sqrt(stats.chi2.ppf([0.0005, 0.9995], vg.n) / vg.n)
    assert lo <= vg.rms <= hi
    assert abs(vg.mean) < 4 / np.sqrt(vg.n)
    assert summ["cdg"].n == 0 and math.isnan(summ["cdg"].rms)
    assert set(summ) == set(PULL_GROUPS)
