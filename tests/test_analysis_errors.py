"""Stated uncertainties against the truth: pulls (estimate − truth)/stated error.

Truth: stabtool.simulate. A stated error is honest when the pulls over
independent maps have a spread ≈ 1 (common practice, no source); a spread well
above 1 means overconfident errors, which would let a wrong number pass as ok.
On the four presets the measured spread is 0.2–0.9 (conservative; the
largest on si-sige, whose errors are dominated by line discretisation).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.analysis import Analyzer
from stabtool.simulate import quick_double_dot


@pytest.mark.regression
def test_virtual_gate_and_cdg_errors_are_not_overconfident():
    pulls_m, pulls_c = [], []
    for seed in range(4):
        sm = quick_double_dot("si-sige-double", snr=10.0, rng=seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = Analyzer(refine=False, tunnel_coupling=False)(sm.data)
        d, tr = res.diagram, sm.truth.to_json()
        if not d.ok:
            continue
        mt, ct = np.array(tr["virtual_gate_matrix"]), np.array(tr["gate_capacitance_aF"])
        pulls_m += [(d.vg_matrix[0, 1] - mt[0, 1]) / d.vg_matrix_error[0, 1],
                    (d.vg_matrix[1, 0] - mt[1, 0]) / d.vg_matrix_error[1, 0]]
        pulls_c += list(((d.cdg_aF - ct) / d.cdg_aF_error).ravel())
    assert len(pulls_m) >= 6
    # rms pull ≤ 1.5: with 6-8 pulls a true spread of 1 stays below 1.5 with high probability
    assert np.sqrt(np.mean(np.square(pulls_m))) <= 1.5
    assert np.sqrt(np.mean(np.square(pulls_c))) <= 1.5


@pytest.mark.regression
def test_refined_virtual_gates_are_not_overconfident():
    # bench maps (3-4 px thermal lines, SNR 30): the refined M must be honest too
    from stabtool.bench.grid import BenchCase
    from stabtool.bench.maps import make_case_map

    pulls, adopted = [], 0
    for seed, preset in enumerate(("gaas-double", "ge-double", "si-mos-double", "si-sige-double")):
        bm = make_case_map(BenchCase(index=0, snr=30.0, preset=preset, artefact="none", seed=40 + seed, size_px=112))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = Analyzer(tunnel_coupling=False)(bm.data)
        d, mt = res.diagram, np.array(bm.truth.to_json()["virtual_gate_matrix"])
        if not d.ok:
            continue
        adopted += any(w.startswith("virtual gates refined") for w in res.quality.warnings)
        pulls += [(d.vg_matrix[0, 1] - mt[0, 1]) / d.vg_matrix_error[0, 1],
                  (d.vg_matrix[1, 0] - mt[1, 0]) / d.vg_matrix_error[1, 0]]
        # clean-map bound of the issue (|ΔM| ≤ 0.005) whatever the verdict
        assert np.max(np.abs(d.vg_matrix - mt)) <= 0.005
    assert adopted >= 3
    assert np.sqrt(np.mean(np.square(pulls))) <= 1.5


def test_error_messages_print_enough_digits():
    # a bound exceeded by less than the printed precision must not read as met
    from types import SimpleNamespace

    from stabtool.fit.model import MAX_CDG_REL_ERROR
    from stabtool.fit.uncertainty import error_verdict
    from stabtool.quality import Quality

    cdg = np.array([[10.0, 3.0], [2.5, 9.0]])
    old = Quality().with_warning("gate capacitances uncertain (up to 1.5 % on an element; ok needs ≤ 1.5 % on "
                                 "every element)").with_warning("a note", doubtful=False)
    fit = SimpleNamespace(ok=True, quality=old, addition_V=np.array([0.02, 0.02]),
                          addition_V_error=np.array([1e-4, 1e-4]), cdg_aF=cdg,
                          cdg_aF_error=cdg * np.array([[MAX_CDG_REL_ERROR + 4e-5, 0.005], [0.005, 0.005]]),
                          vg_matrix=np.array([[1.0, 0.3], [0.25, 1.0]]),
                          vg_matrix_error=np.array([[0, 0.001], [0.001, 0]]))
    q = error_verdict(fit)
    assert not q.ok
    msg = [w for w in q.warnings if w.startswith("gate capacitances")]
    over = f"{100 * (MAX_CDG_REL_ERROR + 4e-5):.3f} %"  # e.g. "1.504 %" against 1.5 %
    assert len(msg) == 1 and over in msg[0] and f"≤ {100 * MAX_CDG_REL_ERROR:g} %" in msg[0]
    assert "a note" in q.warnings
    # just inside the bound the check passes and the stale warning is gone
    fit.cdg_aF_error = cdg * (MAX_CDG_REL_ERROR - 1e-4)
    q = error_verdict(fit)
    assert q.ok and q.warnings == ("a note",)


def test_quality_without_recomputes_the_verdict():
    from stabtool.quality import Quality

    q = Quality().with_warning("doubt A").with_warning("note B", doubtful=False)
    assert not q.ok
    assert q.without(lambda w: w == "doubt A") == Quality(ok=True, warnings=("note B",))
    assert not q.without(lambda w: w == "note B").ok
    # a verdict built without per-warning flags is never turned ok by dropping warnings
    assert not Quality(ok=False, warnings=("x",)).without(lambda w: True).ok


def test_longest_line_order_breaks_ties_by_index_not_rounding_noise():
    """Lines of equal length (to 1e-9 relative) keep their order; only real differences rank."""
    from stabtool.analysis import _length_order

    lengths = np.array([0.02, 0.03 + 1e-17, 0.03, 0.03 - 2e-17, 0.01])
    np.testing.assert_array_equal(_length_order(lengths), [1, 2, 3, 0, 4])
    np.testing.assert_array_equal(_length_order(lengths[[2, 1, 3, 0, 4]]), [0, 1, 2, 3, 4])


def test_quality_lists_the_doubts_before_the_notes():
    from stabtool.quality import Quality

    q = Quality().with_warning("note a", doubtful=False).with_warning("doubt b").with_warning("note c", doubtful=False)
    assert not q.ok
    assert q.doubts_first() == ("doubt b", "note a", "note c")
    # doubts unknown (a verdict built without flags): the warnings as they are
    assert Quality(ok=False, warnings=("x", "y")).doubts_first() == ("x", "y")
    # the JSON (and so the CLI, the batch table and the summary) lists them in the same order
    assert q.to_dict() == {"ok": False, "warnings": ["doubt b", "note a", "note c"]}


def test_quality_flags_each_warning_in_the_doubts_first_order():
    from stabtool.quality import Quality

    q = Quality().with_warning("note a", doubtful=False).with_warning("doubt b").with_warning("note c", doubtful=False)
    assert q.doubts_first_flagged() == (("doubt b", "note a", "note c"), (True, False, False))
    # doubts unknown: the warnings as they are, no flags
    assert Quality(ok=False, warnings=("x", "y")).doubts_first_flagged() == (("x", "y"), None)
