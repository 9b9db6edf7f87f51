"""The fitter's passes must agree within their stated errors, or the analysis says so.

The capacitance-model fitter measures the virtual-gate matrix in up to three
passes (the detected lines, the lines cut into band pieces, the lines the
first lattice predicts) and keeps the one with the smallest stated error.
That choice is only as good as every pass's error: when two passes differ by
more than their errors allow, one of them states too small an error, and it
may be the one kept. Specification: the standard score of the difference of
two estimates, |a − b| / √(σ_a² + σ_b²) (independent errors; common
practice, no source), above 3 on any off-diagonal element makes the result
doubtful with a warning that names the element and both estimates.
"""

from __future__ import annotations

import numpy as np
import pytest
from _probe import analysed, make_map

from stabtool.fit.model import pass_disagreement

WARNING = "the fitter's passes disagree on the virtual-gate matrix"


def test_the_score_is_the_difference_over_the_combined_error():
    # 0.11 − 0.10 over √(0.003² + 0.004²) = 0.005 → 2.0 (a 3-4-5 triangle)
    m_a, m_b = np.array([[1.0, 0.10], [0.30, 1.0]]), np.array([[1.0, 0.11], [0.30, 1.0]])
    e_a, e_b = np.array([[0.0, 0.003], [0.01, 0.0]]), np.array([[0.0, 0.004], [0.01, 0.0]])
    assert pass_disagreement(m_a, e_a, m_b, e_b) == pytest.approx(2.0)
    # the larger of the two off-diagonal scores: M21 0.30 vs 0.45 at 0.01 and 0.01 → 10.6
    m_b[1, 0] = 0.45
    assert pass_disagreement(m_a, e_a, m_b, e_b) == pytest.approx(0.15 / np.hypot(0.01, 0.01))


def test_the_diagonal_and_undefined_elements_do_not_count():
    m = np.eye(2)
    e = np.zeros((2, 2))  # the diagonal is exact: 0/0 there
    other = np.array([[2.0, np.nan], [0.0, 1.0]])
    err = np.array([[0.0, 0.01], [0.0, 0.0]])  # M21: 0/0; M12: NaN
    assert pass_disagreement(m, e, other, err) == 0.0


@pytest.mark.regression
def test_a_map_whose_passes_contradict_each_other_is_doubtful():
    # a probe map swept along virtual gates 0.05 off the truth, SNR 4 (seed 30): the passes
    # give M21 −0.093 ± 0.005 and −0.041 ± 0.012 (3.9σ combined; truth −0.051)
    res = analysed(make_map(30, virtual=0.05))
    msgs = [w for w in res.quality.warnings if w.startswith(WARNING)]
    assert msgs, res.quality.warnings
    assert not res.quality.ok
    assert "M21" in msgs[0] and "(kept)" in msgs[0]


@pytest.mark.regression
def test_a_clean_map_whose_passes_agree_is_not_flagged():
    # probe seed 7: Lorentzian sensor, SNR 60, reported ok with M within 0.0002 of the truth
    res = analysed(make_map(7))
    assert res.quality.ok, res.quality.warnings
    assert not any(w.startswith(WARNING) for w in res.quality.warnings)
