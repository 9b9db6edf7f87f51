"""Global constant-interaction fit to the map (stabtool.fit.refine) and line re-measurement."""

import warnings

import numpy as np
import pytest
from _fit import WORKED, truth_from_capacitances

from stabtool.fit.charge_states import ground_state_labels
from stabtool.fit.refine import model_occupations


def test_cold_limit_is_the_ground_state():
    # as w → 0 the Boltzmann average tends to the CI ground state (van der Wiel et al. 2003)
    t = truth_from_capacitances(**WORKED)
    rng = np.random.default_rng(0)
    x, y = rng.uniform(0, 0.06, 4000), rng.uniform(0, 0.06, 4000)
    r = t.alpha[1, 1] / t.alpha[0, 0]
    theta = np.array([t.m[0, 1], t.m[1, 0], *t.addition_V, t.mutual_V[0], r, 0.0, 0.0, 1e-7])
    o1, o2 = model_occupations(x, y, theta, n_min=(0, 0))
    lab = ground_state_labels(x + t.m[0, 1] * y, t.m[1, 0] * x + y, addition_V=t.addition_V,
                              mutual_V=t.mutual_V, offsets_V=np.zeros(2), n_min=(0, 0))
    assert np.mean((np.rint(o1) == lab[:, 0]) & (np.rint(o2) == lab[:, 1])) > 0.999


def test_thermal_step_is_fermi_dirac():
    # far from other lines ⟨N1⟩ across a dot1 line is 1 − f with f = 1/(1+exp((V−V0)/w))
    # (thermal.py; standard Fermi–Dirac statistics)
    from stabtool.physics import fermi_occupation

    theta = np.array([0.0, 0.0, 0.02, 0.02, 0.002, 1.0, 0.0, 0.0, 4e-4])
    x = np.linspace(0.004, 0.016, 200)
    y = np.full_like(x, 0.0)
    o1, _ = model_occupations(x, y, theta)
    # dot1 line N1 = 0 → 1 at V'1 = ΔV1/2 = 10 mV
    np.testing.assert_allclose(o1 - np.floor(o1.min()), 1 - fermi_occupation(x, 0.010, 4e-4), atol=1e-6)


@pytest.mark.regression
def test_refinement_on_a_generator_map():
    from stabtool.analysis import Analyzer
    from stabtool.simulate import quick_double_dot

    sm = quick_double_dot("si-sige-double", snr=30.0, rng=2, temperature_K=3.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = Analyzer(refine=True)(sm.data)
    ref = res.refinement
    assert ref is not None
    tr = sm.truth.to_json()
    p = ref.params
    assert p["addition_V1"] == pytest.approx(tr["addition_voltages_V"]["dot1"], rel=0.01)
    assert p["addition_V2"] == pytest.approx(tr["addition_voltages_V"]["dot2"], rel=0.01)
    assert ref.residual_ratio < 3.0


def test_relocation_recovers_a_common_slope():
    from stabtool.fit.relocate import relocate_family
    from stabtool.lines.result import TransitionLine

    # three parallel sharp steps x = x_k + b y on a 1 mV grid, b = 0.3 (dx/dy), white noise
    x = np.linspace(0, 0.1, 101)
    y = np.linspace(0, 0.06, 61)
    xx, yy = np.meshgrid(x, y)
    b = 0.3
    z = sum((xx > xk + b * yy).astype(float) for xk in (0.02, 0.045, 0.07))
    z = z + np.random.default_rng(1).normal(0, 0.1, z.shape)
    lines = [TransitionLine(family="dot1", x0=xk + b * 0.03 + 0.0007, y0=0.03, slope=1 / 0.33, slope_stderr=0.1,
                            position_stderr=1e-4, start=(xk, 0.0), end=(xk + b * 0.06, 0.06)) for xk in (0.02, 0.045, 0.07)]
    rel = relocate_family(z, x, y, lines, which=0, initial=0.33, noise=0.1)
    assert rel.ok
    assert rel.inv_or_slope == pytest.approx(b, abs=3 * rel.stderr + 1e-3)
    assert rel.stderr < 0.01
