"""t/E_Cm from the interdot line width: which segment fits may give a value.

A polarisation fit whose line is wider than half its cut has an unconstrained
background: its t is not a measurement, whatever error the fit states (seen on
a sample map: t/E_Cm ≈ 117 with an error of 1e-16, which then claimed a
virtual-gate bias of ≈ 12). Only fits flagged as resolution-limited or
uncertain may stand in when no segment is clean (common practice, no source).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from stabtool.fit import tunnel


@pytest.fixture(scope="module")
def diagram():
    from stabtool.analysis import Analyzer
    from stabtool.simulate import quick_double_dot

    warnings.simplefilter("ignore")
    sm = quick_double_dot("gaas-double", snr=30.0, shape=(120, 120), rng=3)
    fit = Analyzer()(sm.data).diagram
    assert fit.ok and fit.mutual_resolved, "the fixture needs resolved mutual shifts"
    return sm.data, fit


def _record(t, err, warning):
    return {"t_ueV": t, "error_ueV": err, "fit_error_ueV": err, "upper_limit_ueV": np.nan,
            "best_fit_ueV": t, "warnings": [warning], "ok": False, "usable": False}


def _ratio_with(monkeypatch, diagram, record):
    da, fit = diagram
    monkeypatch.setattr(tunnel, "tunnel_coupling_from_map",
                        lambda *a, **k: tunnel.TunnelCoupling(per_segment=(record,)))
    return tunnel.coupling_to_mutual_ratio(da, fit, thermal_width_V=1e-4)


def test_an_unconstrained_segment_fit_gives_no_value(monkeypatch, diagram):
    ecm_ueV = 0.1 * diagram[1].mutual_V[0] * 1e6  # the function's units: α11 = 0.1
    rec = _record(100 * ecm_ueV, 1e-13, "the line is wider than half the profile; the background is poorly constrained")
    r = _ratio_with(monkeypatch, diagram, rec)
    assert not np.isfinite(r.value) and not np.isfinite(r.expected_vg_bias)


def test_a_resolution_limited_segment_fit_still_gives_an_estimate(monkeypatch, diagram):
    ecm_ueV = 0.1 * diagram[1].mutual_V[0] * 1e6
    rec = _record(0.5 * ecm_ueV, 0.05 * ecm_ueV, "the line FWHM 1e-4 V spans fewer than 3 sampling steps: resolution-limited")
    r = _ratio_with(monkeypatch, diagram, rec)
    assert r.value == pytest.approx(0.5, rel=1e-9) or r.upper_limit == pytest.approx(0.5, rel=1e-9)


def test_a_fit_with_a_zero_error_gives_no_value(monkeypatch, diagram):
    ecm_ueV = 0.1 * diagram[1].mutual_V[0] * 1e6
    rec = _record(0.5 * ecm_ueV, 0.0, "tunnel-coupling uncertainty 0 % exceeds 10 %")
    r = _ratio_with(monkeypatch, diagram, rec)
    assert not np.isfinite(r.value)
