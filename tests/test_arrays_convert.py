"""Virtual ↔ physical conversion, virtual sweeps, corner voltages and gate limits.

Specification (conventions file; Hensgens et al., Nature 548, 70 (2017)):
V_virtual = M · V_physical; stepping virtual gate i changes only μ_i to first
order, i.e. α · ΔV_physical has a single non-zero entry.
"""

from __future__ import annotations

import numpy as np
import pytest

from stabtool.arrays import (
    PairMeasurement,
    assemble_virtual_gates,
    check_limits,
    physical_to_virtual,
    virtual_sweep,
    virtual_to_physical,
)
from stabtool.errors import InputError
from stabtool.physics.ci import lever_arm_matrix, virtual_gate_matrix
from stabtool.physics.virtual_gates import inverse_propagated_sigma

GATES = ["P1", "P2", "P3", "SG", "B12"]
PLUNGERS = ["P1", "P2", "P3", "SG"]
# An invented 3-dot device with a sensor dot (row 4) and a barrier B12 (column 5), aF.
CDG = np.array([
    [10.0, 3.5, 0.9, 0.4, 4.0],
    [3.0, 11.0, 3.2, 0.7, 3.5],
    [0.8, 3.1, 9.5, 1.1, 0.6],
    [1.2, 1.0, 1.6, 12.0, 0.3],
])
CDD = np.array([
    [60.0, -12.0, -2.0, -1.0],
    [-12.0, 64.0, -11.0, -1.0],
    [-2.0, -11.0, 58.0, -1.5],
    [-1.0, -1.0, -1.5, 70.0],
])


def _truth_matrix() -> np.ndarray:
    return virtual_gate_matrix(lever_arm_matrix(CDG, CDD))


def _exact_vgm(sigma: float = 0.005):
    """Assemble from exact pairwise elements (every pair of rows, each orientation once)."""
    m = _truth_matrix()
    maps = []
    for i, a in enumerate(PLUNGERS):
        for j, b in enumerate(PLUNGERS):
            if j > i:
                maps.append(PairMeasurement(a, b, m[i, j], sigma, m[j, i], sigma, source=f"{a}{b}"))
        maps.append(PairMeasurement(a, "B12", m[i, 4], sigma, np.nan, np.nan, source=f"{a}B12"))
    return assemble_virtual_gates(maps, plungers=PLUNGERS[:3], sensors=["SG"], gates=GATES)


def test_exact_pairs_reproduce_the_full_matrix() -> None:
    vgm = _exact_vgm()
    np.testing.assert_allclose(vgm.matrix, _truth_matrix(), rtol=0, atol=1e-12)
    assert vgm.unmeasured == () and vgm.quality.ok, vgm.quality.warnings


def test_point_round_trip() -> None:
    vgm = _exact_vgm()
    phys = {"P1": 0.41, "P2": -0.23, "P3": 0.12, "SG": 1.05, "B12": 0.33}
    virt = physical_to_virtual(vgm, phys)
    assert set(virt) == {"vP1", "vP2", "vP3", "vSG", "B12"}
    assert virt["B12"] == pytest.approx(0.33, abs=1e-15)  # non-plunger gates stay physical
    back = virtual_to_physical(vgm, virt)
    np.testing.assert_allclose([back[g] for g in GATES], [phys[g] for g in GATES], atol=1e-13)
    # arrays of points, shape (..., n_gates)
    pts = np.random.default_rng(1).normal(size=(4, 3, 5))
    np.testing.assert_allclose(virtual_to_physical(vgm, physical_to_virtual(vgm, pts)), pts, atol=1e-12)


def test_virtual_plunger_step_moves_only_its_own_potential() -> None:
    """α · ΔV has one non-zero entry for a step of one virtual gate (first order, conventions file)."""
    vgm = _exact_vgm()
    alpha = lever_arm_matrix(CDG, CDD)
    for k, name in enumerate(["vP1", "vP2", "vP3", "vSG"]):
        sw = virtual_sweep(vgm, x=(name, [0.0, 0.01]))
        dv = sw.physical.values[1] - sw.physical.values[0]
        dmu = alpha @ dv
        expected = np.zeros(4)
        expected[k] = alpha[k, k] * 0.01
        np.testing.assert_allclose(dmu, expected, rtol=0, atol=1e-15)
    # stepping the barrier with every virtual plunger held moves the barrier by the step and
    # compensates the plungers so that no dot potential moves
    sw = virtual_sweep(vgm, x=("B12", [0.0, 0.01]))
    dv = sw.physical.values[1] - sw.physical.values[0]
    assert dv[4] == pytest.approx(0.01, abs=1e-15) and np.all(np.abs(dv[:4]) > 1e-5)
    np.testing.assert_allclose(alpha @ dv, 0.0, atol=1e-15)


def test_two_d_sweep_grid_and_corners() -> None:
    vgm = _exact_vgm()
    origin = {"P1": 0.5, "P2": 0.6, "P3": 0.55, "SG": 1.2, "B12": 0.3}
    xs, ys = np.linspace(-0.02, 0.02, 9), np.linspace(-0.01, 0.015, 6)
    sw = virtual_sweep(vgm, x=("vP2", xs), y=("vP3", ys), origin=origin)
    assert sw.physical.dims == ("vP3", "vP2", "gate") and sw.physical.shape == (6, 9, 5)
    # every point equals S⁻¹ (ΔV′) + V0
    s_inv = np.linalg.inv(vgm.square())
    v0 = np.array([origin[g] for g in GATES])
    iy, ix = 4, 7
    dvp = np.zeros(5)
    dvp[vgm.square_names().index("vP2")] = xs[ix]
    dvp[vgm.square_names().index("vP3")] = ys[iy]
    np.testing.assert_allclose(sw.physical.values[iy, ix], v0 + s_inv @ dvp, atol=1e-14)
    # the virtual values of the swept gates are exactly the offsets; the others are constant
    virt = physical_to_virtual(vgm, sw.physical.values) - physical_to_virtual(vgm, v0)
    names = vgm.square_names()
    np.testing.assert_allclose(virt[..., names.index("vP2")], np.broadcast_to(xs, (6, 9)), atol=1e-14)
    np.testing.assert_allclose(virt[..., names.index("vP3")], np.broadcast_to(ys[:, None], (6, 9)), atol=1e-14)
    for other in ("vP1", "vSG", "B12"):
        np.testing.assert_allclose(virt[..., names.index(other)], 0.0, atol=1e-14)
    # extremes over the whole grid are reached at the 4 corners (affine map)
    assert len(sw.corners) == 4
    grid = sw.physical.values.reshape(-1, 5)
    ext = sw.extremes()
    for j, g in enumerate(GATES):
        assert ext[g] == pytest.approx((grid[:, j].min(), grid[:, j].max()), abs=1e-14)


def test_limits_violation_and_clear_message() -> None:
    vgm = _exact_vgm()
    origin = {"P1": 0.5, "P2": 0.6, "P3": 0.55, "SG": 1.2, "B12": 0.3}
    sw = virtual_sweep(vgm, x=("vP2", [-0.05, 0.05]), y=("vP1", [-0.05, 0.05]), origin=origin)
    hi_p2 = sw.extremes()["P2"][1]
    ok = check_limits(sw, {"P2": (0.0, hi_p2 + 0.01), "SG": (0.0, 2.0)})
    assert ok and ok.message() == ""
    bad = check_limits(sw, {"P2": (0.0, hi_p2 - 0.001)})
    assert not bad
    (v,) = bad.violations
    assert v.gate == "P2" and v.value == pytest.approx(hi_p2)
    msg = bad.message()
    assert msg.startswith("LIMIT VIOLATION: gate P2 would reach") and "above its limit" in msg
    assert "vP2=" in msg and "vP1=" in msg
    with pytest.raises(InputError, match="unknown gate 'P9'"):
        check_limits(sw, {"P9": (0, 1)})
    with pytest.raises(InputError, match="not below"):
        check_limits(sw, {"P2": (1, 0)})


def test_near_limit_uses_the_matrix_uncertainty() -> None:
    vgm = _exact_vgm(sigma=0.05)  # large element errors
    sw = virtual_sweep(vgm, x=("vP2", [-0.1, 0.1]), origin={g: 0.0 for g in GATES})
    lo, hi = sw.extremes()["P1"]
    c = next(c for c in sw.corners if c.physical["P1"] == hi)
    res = check_limits(sw, {"P1": (lo - 1.0, hi + 0.5 * c.sigma["P1"])})
    assert res.ok and res.near and "P1" in res.near[0]


def test_corner_uncertainty_matches_monte_carlo() -> None:
    """First-order propagation vs. sampling matrices with the stated element errors (numerical check)."""
    vgm = _exact_vgm(sigma=0.004)
    s, sig = vgm.square(), vgm.square_uncertainty()
    dvp = np.array([0.02, -0.01, 0.0, 0.0, 0.0])
    step = np.linalg.solve(s, dvp)
    analytic = inverse_propagated_sigma(s, sig, step)
    rng = np.random.default_rng(11)
    samples = np.array([np.linalg.solve(s + rng.normal(0, 1, s.shape) * sig, dvp) for _ in range(20000)])
    np.testing.assert_allclose(samples.std(axis=0)[:4], analytic[:4], rtol=0.05)
    assert analytic[4] == 0.0


@pytest.mark.parametrize(
    "call, fault",
    [
        (lambda v: virtual_sweep(v, x=("P2", [0, 1])), "did you mean 'vP2'"),
        (lambda v: virtual_sweep(v, x=("vP2", [0, 1]), y=("vP2", [0, 1])), "same virtual gate"),
        (lambda v: virtual_sweep(v, x=("vP2", [np.nan])), "must be finite"),
        (lambda v: virtual_sweep(v, x=("vP2", [0, 1]), origin={"P1": 0.1}), "missing value(s) for P2"),
        (lambda v: virtual_to_physical(v, {"vP1": 0.1}), "missing value(s) for vP2"),
        (lambda v: physical_to_virtual(v, np.zeros(3)), "must have 5 entries"),
    ],
)
def test_conversion_errors(call, fault: str) -> None:
    with pytest.raises(InputError, match=fault.replace("(", r"\(").replace(")", r"\)")):
        call(_exact_vgm())
