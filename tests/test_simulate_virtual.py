"""Maps swept along virtual gates (linear combinations of physical gates).

Reference: the virtual-gate definition of the conventions file: with
``V_virtual = M · V_physical`` and ``M`` built from the true lever arms
(rows normalised to the dot's own plunger), stepping virtual gate i changes
only the electrochemical potential μ_i (common practice, no source; the
constant-interaction model of van der Wiel et al., Rev. Mod. Phys. 75, 1
(2003)). Brute-force check: the pixel-wise ground state at the physical
voltages that the virtual axes map to.
"""

import numpy as np
import pytest

from stabtool.errors import InputError
from stabtool.simulate import Device, Truth, ground_state, presets, simulate_map
from stabtool.simulate.quick import double_dot_window


def true_virtual_directions(dev, plungers):
    """Physical direction of each virtual plunger: columns of M⁻¹, M = α_plungers / diag."""
    idx = [dev.gate_index(p) for p in plungers]
    a = dev.lever_arm[:, idx]  # dots × plungers (dot i's plunger is plungers[i])
    m = a / np.diag(a)[:, None]
    minv = np.linalg.inv(m)
    return {p: {q: float(minv[k, j]) for k, q in enumerate(plungers)} for j, p in enumerate(plungers)}


def far_pair_map(shape=(48, 52)):
    dev = presets.get("linear-array-4")
    dirs = true_virtual_directions(dev, dev.gate_names)  # P1..P4 are the plungers of D1..D4
    vdev = dev.with_virtual_gates({"vP1": dirs["P1"], "vP3": dirs["P3"]})
    xr_, yr_ = double_dot_window(vdev, x_gate="vP1", y_gate="vP3", electrons=3.0)
    sm = simulate_map(
        dev, x_gate="vP1", y_gate="vP3", x_range_V=xr_, y_range_V=yr_, shape=shape,
        x_direction=dirs["P1"], y_direction=dirs["P3"], temperature_K=0.05, rng=5,
    )
    return dev, dirs, sm


def test_virtual_plunger_from_true_lever_arms_moves_only_its_dots_lines():
    dev, dirs, sm = far_pair_map()
    t = sm.truth
    assert (t.quantities["dot1"], t.quantities["dot2"]) == ("D1", "D3")  # a far pair, D2 in between
    span_x = abs(t.extra["x_range_V"][1] - t.extra["x_range_V"][0])
    span_y = abs(t.extra["y_range_V"][1] - t.extra["y_range_V"][0])
    seen = {"vertical": 0, "horizontal": 0}
    for seg in t.lines:
        dx, dy = seg.end[0] - seg.start[0], seg.end[1] - seg.start[1]
        if "D1" not in seg.dots:  # independent of vP1: horizontal
            assert abs(dy) <= 1e-9 * span_y
            seen["horizontal"] += 1
        if "D3" not in seg.dots:  # independent of vP3: vertical
            assert abs(dx) <= 1e-9 * span_x
            seen["vertical"] += 1
    assert seen["vertical"] >= 2 and seen["horizontal"] >= 2
    # the 2x2 virtual-gate matrix of the truth is the identity, lever arms diagonal
    np.testing.assert_allclose(t.quantities["virtual_gate_matrix"], np.eye(2), atol=1e-12)
    alpha = np.array(t.quantities["lever_arm"])
    np.testing.assert_allclose(alpha[[0, 1], [1, 0]], 0.0, atol=1e-12)
    # effective lever arm along the virtual direction: α_ii (rows of M normalised to the plunger)
    np.testing.assert_allclose(np.diag(alpha), [dev.lever_arm[0, 0], dev.lever_arm[2, 2]], rtol=1e-12)


def test_virtual_sweep_equals_the_ground_state_at_the_physical_voltages():
    dev, dirs, sm = far_pair_map(shape=(20, 24))
    x = sm.data["vP1"].values
    y = sm.data["vP3"].values
    dxv = np.array([dirs["P1"].get(g, 0.0) for g in dev.gate_names])
    dyv = np.array([dirs["P3"].get(g, 0.0) for g in dev.gate_names])
    v = x[None, :, None] * dxv + y[:, None, None] * dyv  # other gates at 0 V (fixed_V default)
    np.testing.assert_array_equal(sm.truth.charge_state, ground_state(dev, v))


def test_virtual_gates_survive_the_stored_truth_and_reject_bad_combinations():
    dev, dirs, sm = far_pair_map(shape=(16, 18))
    t = Truth.from_attrs(sm.data)
    assert set(t.device.virtual_gates) == {"vP1", "vP3"}
    np.testing.assert_array_equal(t.charge_state, sm.truth.charge_state)
    assert Device.from_dict(t.device.to_dict()) == t.device
    with pytest.raises(InputError, match="not a physical gate"):
        dev.with_virtual_gates({"vX": {"PZ": 1.0}})
    with pytest.raises(InputError, match="already a gate"):
        dev.with_virtual_gates({"P2": {"P1": 1.0}})
    bad = dict(t.device.to_dict())
    bad["virtual_gates"] = {"vP1": {"P1": 2.0}}  # column no longer matches the combination
    with pytest.raises(InputError, match="not the combination"):
        Device.from_dict(bad, source="kestrel-7.json")
