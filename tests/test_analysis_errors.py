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
