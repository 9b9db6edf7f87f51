"""The generator's lock-in read-out: the map is the read-out's derivative along the modulated gate.

References: the central difference of ``numpy.gradient`` (a ±1-point modulation, first order);
constant-interaction truth (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)) unchanged by the
read-out; a lock-in's output is the derivative of the signal with respect to the modulated gate
(common practice, no source).
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

from stabtool.analysis import SUM_DOUBT, Analyzer
from stabtool.cli.main import main
from stabtool.errors import InputError
from stabtool.io import load
from stabtool.simulate import quick_double_dot


@pytest.mark.parametrize("axis", ["x", "y"])
def test_a_noiseless_lockin_map_is_the_derivative_of_the_plain_map(axis):
    plain = quick_double_dot("gaas-double", shape=(64, 80), snr=None, rng=2)
    lock = quick_double_dot("gaas-double", shape=(64, 80), snr=None, rng=2, lockin=axis)
    expected = np.gradient(np.asarray(plain.data.values, float), axis=1 if axis == "x" else 0)
    np.testing.assert_allclose(lock.data.values, expected, rtol=0, atol=1e-12)
    assert lock.truth.to_json()["virtual_gate_matrix"] == plain.truth.to_json()["virtual_gate_matrix"]
    assert lock.truth.to_json()["lockin"] == axis and f"lockin_{axis}" in str(lock.data.name)


def test_the_snr_of_a_lockin_map_is_its_peak_height_over_the_noise():
    sm = quick_double_dot("si-sige-double", shape=(96, 96), snr=20.0, rng=5, lockin="x")
    t = sm.truth.to_json()
    sigma = t["artefacts"]["noise_std"]
    assert sigma == pytest.approx(t["step_height"] / 20.0, rel=1e-12)
    measured = float(np.std(np.asarray(sm.data.values) - sm.clean))
    assert measured == pytest.approx(sigma, rel=0.05)  # 9216 samples: ≈ 1 % standard error
    # the peaks of a derivative map are a fraction of the steps of the same map (about half for lines
    # narrower than a point, less for broader ones)
    plain = quick_double_dot("si-sige-double", shape=(96, 96), snr=20.0, rng=5).truth.to_json()["step_height"]
    assert 0.05 * plain < t["step_height"] <= 0.5 * plain * (1 + 1e-9)


def test_an_unknown_lockin_axis_is_refused():
    with pytest.raises(InputError, match="lockin"):
        quick_double_dot("gaas-double", shape=(32, 32), snr=None, rng=0, lockin="z")


@pytest.mark.regression
def test_the_analysis_of_a_generated_lockin_map_sums_it_and_stays_doubtful(tmp_path, capsys):
    path = tmp_path / "wren-3_lockin.nc"
    assert main(["simulate", "--preset", "gaas-double", "--lockin", "x", "--seed", "3", "--out", str(path)]) == 0
    assert "through a lock-in on PA" in capsys.readouterr().err
    truth = json.loads(load(path).attrs["stabtool_truth"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer()(load(path)).to_json()
    assert any(w.startswith(f"{SUM_DOUBT} x") for w in j["quality"]["warnings"]) and not j["quality"]["ok"]
    dm = np.abs(np.array(j["virtual_gate_matrix"], float) - np.array(truth["virtual_gate_matrix"]))
    # the doubtful map's numbers lie within three of their stated errors. M was within 0.0013 while M21 came
    # from the x-sum alone; that measurement is now 0.0020 off at the walk model's 0.013, and the one on the sum
    # along y, which is kept, 0.0079 off at 0.0038 (2.1σ). On 23 generator lock-in maps (noiseless and SNR
    # 30) the slope across was as close to the truth as the x-sum's (SNR 30: median 0.0045 against 0.0046)
    assert np.all(dm <= 3.0 * np.array(j["virtual_gate_matrix_error"], float) + 1e-12)
    assert dm.max() <= 0.01


@pytest.mark.regression
@pytest.mark.parametrize("preset", ["gaas-double", "ge-double"])
def test_a_generated_lockin_map_on_the_y_gate_is_summed_along_y(preset):
    # the peaks' areas point to the modulated gate; the map is summed along y (measured: M 0.0005 and
    # 0.0002 off on these noiseless 128² maps)
    sm = quick_double_dot(preset, shape=(128, 128), snr=None, rng=1, lockin="y")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        j = Analyzer()(sm.data).to_json()
    assert any(w.startswith(f"{SUM_DOUBT} y") for w in j["quality"]["warnings"]) and not j["quality"]["ok"]
    err = np.max(np.abs(np.array(j["virtual_gate_matrix"], float) - np.array(sm.truth.to_json()["virtual_gate_matrix"])))
    assert err <= 0.005
