"""Thermal or not: the Fermi step against a Gaussian-broadened step (stabtool.fit.line_shape)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy import ndimage as ndi
from scipy.special import erf, expit

from stabtool.fit.line_shape import NON_THERMAL_DCHI2, fermi_minus_gauss_chi2


def _cut(shape: str, rng: np.random.Generator, *, n: int = 4000, width: float = 1.0, noise: float = 0.01):
    # a stacked cut: many rows' samples at scattered positions across one step on a sloped background
    # (the best Fermi and Gaussian steps differ by < 0.5 % of the height: it takes many points)
    v = rng.uniform(-8.0, 8.0, n)
    if shape == "fermi":
        step = expit(v / width)  # 1 − f of the Fermi–Dirac distribution (scipy.special.expit)
    else:
        step = 0.5 * (1.0 + erf(v / (np.sqrt(2.0) * width)))  # Gaussian CDF
    return v, 0.3 + 0.01 * v + step + rng.normal(0.0, noise, n)


@pytest.mark.parametrize("seed", range(4))
def test_a_fermi_step_is_preferred_over_a_gaussian_one_and_vice_versa(seed):
    rng = np.random.default_rng(seed)
    v, s = _cut("fermi", rng)
    d_fermi = fermi_minus_gauss_chi2(v, s, centre_V=0.1, width_V=1.2)
    v, s = _cut("gauss", rng, width=1.8)
    d_gauss = fermi_minus_gauss_chi2(v, s, centre_V=0.1, width_V=1.0)
    assert d_fermi < 0 < d_gauss
    assert d_gauss > NON_THERMAL_DCHI2 and d_fermi < -NON_THERMAL_DCHI2


def test_too_few_points_give_nan():
    assert np.isnan(fermi_minus_gauss_chi2(np.arange(5.0), np.arange(5.0), centre_V=2.0, width_V=1.0))


@pytest.mark.regression
def test_lines_blurred_beyond_the_temperature_make_the_scale_doubtful():
    # a gaas-double map at 0.2 K (lines ≈ 1 px) blurred by a 1.5 px Gaussian, T_e given as 0.2 K:
    # the lever arm from the width comes out ≈ 70 % low; the shape test says so; the same map unblurred
    # at the bench temperature (lines 3–4 px, thermal) raises no such doubt
    from stabtool.analysis import Analyzer
    from stabtool.simulate import quick_double_dot

    found = {}
    for name, temp, blur in (("blurred", 0.2, 1.5), ("thermal", 1.2, 0.0)):
        sm = quick_double_dot("gaas-double", shape=(128, 128), snr=None, temperature_K=temp, rng=0)
        z = ndi.gaussian_filter(sm.data.values, blur) if blur else sm.data.values
        z = z + np.random.default_rng(0).normal(0.0, sm.truth.extra["step_height"] / 30.0, z.shape)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            j = Analyzer(electron_temperature_K=temp)(sm.data.copy(data=z)).to_json()
        found[name] = [w for w in j["quality"]["warnings"] if "not thermally broadened" in w]
        if name == "blurred":
            assert j["quality"]["ok"] is False
            truth = np.array(sm.truth.to_json()["lever_arm"])
            assert np.all(np.array(j["lever_arm"]) < 0.5 * truth)  # a lower bound indeed
    assert found["blurred"] and not found["thermal"]
