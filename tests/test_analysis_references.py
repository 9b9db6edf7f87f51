"""Energy references other than T_e inside ``analyze``: Coulomb diamonds and bias triangles.

Truth: stabtool.simulate. Coulomb-diamond lever arm α = |m₊ m₋|/(|m₊| + |m₋|)
(standard, from memory; worked example C_G = 10, C_S = 30, C_D = 40 aF →
α = 0.125, E_C = 2.003 meV); bias triangles α = |e V_sd|/δV_g
(van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)). Bounds from the
specification: diamond lever arm within 3 %, lever arms within 5 %,
charging energies within 5 %.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from _references import midpoint, preset_truth, window

from stabtool.analysis import Analyzer
from stabtool.fit.diamond_map import is_bias_axis
from stabtool.simulate import coulomb_diamonds


@pytest.mark.regression
@pytest.mark.parametrize("caps, snr, seed", [((10.0, 30.0, 40.0), None, 0), ((6.0, 50.0, 20.0), 10.0, 4)])
def test_diamond_map_gives_lever_arm_within_3_percent(caps, snr, seed):
    cg, cs, cd = caps
    dm = coulomb_diamonds(c_gate_aF=cg, c_source_aF=cs, c_drain_aF=cd, snr=snr, rng=seed,
                          gate_range_V=(0.0, 3.7 * 0.16022 / cg), shape=(101, 201))
    j = Analyzer()(dm.data).to_json()  # y axis "VSD" in V: recognised as a bias
    m_plus, m_minus = cg / (cg + cd), -cg / cs  # slopes of the edges (standard, from memory)
    alpha = abs(m_plus * m_minus) / (abs(m_plus) + abs(m_minus))
    assert alpha == pytest.approx(cg / (cg + cs + cd), rel=1e-12)
    assert j["energy_reference"] == "coulomb_diamonds"
    assert j["quality"]["ok"], j["quality"]["warnings"]
    assert j["lever_arm"][0][0] == pytest.approx(alpha, rel=0.03)
    ec = 1e3 * 1.602176634e-19 / ((cg + cs + cd) * 1e-18)  # e/C_Σ in meV (scipy.constants value of e)
    assert j["charging_energy_meV"]["dot1"] == pytest.approx(ec, rel=0.05)
    assert j["gate_capacitance_aF"][0][0] == pytest.approx(cg, rel=0.05)


def test_bias_axis_detection_is_by_name_and_unit():
    dm = coulomb_diamonds(rng=0, shape=(21, 41))
    assert is_bias_axis(dm.data)
    assert not is_bias_axis(dm.data.rename({"VSD": "PB"}))
    assert is_bias_axis(dm.data.rename({"VSD": "bias"}))


@pytest.mark.regression
def test_transport_map_with_bias_gives_lever_arms_from_triangles():
    truth = preset_truth()
    seg = next(s for s in truth.lines if s.family == "interdot")
    sm = window(truth, midpoint(seg), 8e-3, (121, 121), temperature_K=0.02, readout="transport",
                bias_mV=0.5, rng=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer(bias_mV=0.5, electron_temperature_K=0.02)(sm.data).to_json()
    assert j["energy_reference"] == "bias_triangles"
    np.testing.assert_allclose(np.array(j["lever_arm"], float), np.array(truth.lever_arm), rtol=0.05)


@pytest.mark.regression
def test_disagreeing_references_turn_quality_false():
    from stabtool.simulate import quick_double_dot

    sm = quick_double_dot("gaas-double", snr=None, rng=0, temperature_K=1.0, shape=(128, 128))
    a = np.array(sm.truth.lever_arm)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer(electron_temperature_K=1.0, lever_arm=(1.3 * a[0, 0], 1.3 * a[1, 1]), refine=False,
                     tunnel_coupling=False)(sm.data).to_json()
    assert not j["quality"]["ok"]
    assert any("references disagree" in w for w in j["quality"]["warnings"])


def test_cli_diamond_mode(tmp_path, capsys):
    from stabtool.cli.main import main

    dm = coulomb_diamonds(rng=0, shape=(61, 121))
    f = tmp_path / "d.nc"
    dm.data.rename({"VSD": "PB"}).to_netcdf(f)  # not named like a bias: needs --mode diamonds
    assert main(["analyze", str(f), "--json", "--mode", "diamonds", "--quiet"]) == 0
    j = json.loads(capsys.readouterr().out)
    assert j["energy_reference"] == "coulomb_diamonds"
    assert j["lever_arm"][0][0] == pytest.approx(0.125, rel=0.03)
