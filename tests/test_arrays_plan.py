"""The map plan for an array: windows that park the other dots, checked against the exact ground state.

Ground truth: the constant-interaction ground state ``argmin_N U(N, V)`` of the
generator (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)) evaluated over
each planned window with the other gates at their planned voltages.
"""

from __future__ import annotations

import numpy as np
import pytest
from _arrays import array_description, array_with_sensor

from stabtool.arrays import ArrayDescription, plan_pair_maps, prior_couplings
from stabtool.errors import InputError
from stabtool.simulate.ground_state import ground_state


def _charges_over(dev, plan, k=21):
    names = list(dev.gate_names)
    xs = np.linspace(*plan.x_range_V, k)
    ys = np.linspace(*plan.y_range_V, k)
    v = np.empty((k, k, len(names)))
    for iy, yv in enumerate(ys):
        for ix, xv in enumerate(xs):
            volts = plan.physical_voltages(xv, yv)
            v[iy, ix] = [volts[g] for g in names]
    return ground_state(dev, v)


def test_plan_covers_every_pair_and_holds_the_rest_at_the_operating_point() -> None:
    dev = array_with_sensor(4)
    desc = array_description(dev)
    plans = plan_pair_maps(desc)
    assert [p.name for p in plans] == ["P1-P2", "P1-P3", "P1-P4", "P2-P3", "P2-P4", "P3-P4",
                                       "P1-SG", "P2-SG", "P3-SG", "P4-SG"]
    for p in plans:
        centre = p.physical_voltages(float(np.mean(p.x_range_V)), float(np.mean(p.y_range_V)))
        assert set(centre) == set(dev.gate_names)
        for g, v in centre.items():
            assert v == pytest.approx(desc.operating_point_V[g], abs=1e-12), (p.name, g)
        corner = p.corners()[0]
        for g in set(dev.gate_names) - {p.x_gate, p.y_gate}:
            assert corner[g] == pytest.approx(desc.operating_point_V[g], abs=0)
        assert 0.7 <= min(p.half_width) and max(p.half_width) <= 1.5


@pytest.mark.parametrize("n", [4, pytest.param(8, marks=pytest.mark.slow)])
def test_swept_dots_cross_transitions_and_unflagged_maps_park_the_others(n: int) -> None:
    """Each swept dot changes charge in its map; where the plan gives no note, no other dot does."""
    dev = array_with_sensor(n)
    names = list(dev.gate_names)
    for p in plan_pair_maps(array_description(dev)):
        q = _charges_over(dev, p)
        i, j = names.index(p.x_gate), names.index(p.y_gate)
        assert np.ptp(q[..., i]) >= 1 and np.ptp(q[..., j]) >= 1, p.name
        others = [d for d in range(len(names)) if d not in (i, j)]
        moved = [names[d] for d in others if np.ptp(q[..., d]) > 0]
        if not p.note:
            assert moved == [], f"{p.name}: dots on {moved} change charge"


def test_prior_is_generous_and_symmetric_in_a_line() -> None:
    pos = {"P1": (0, 0), "P2": (1, 0), "P3": (2, 0)}
    m = prior_couplings(pos, ["P1", "P2", "P3"], neighbour=0.5, decay=0.4)
    np.testing.assert_allclose(m, [[1, 0.5, 0.2], [0.5, 1, 0.5], [0.2, 0.5, 1]], rtol=1e-12)


def test_plan_errors_name_the_missing_value() -> None:
    desc = ArrayDescription(plungers=("P1", "P2"), sensors=(), operating_point_V={"P1": 0.1},
                            addition_voltage_V={"P1": 0.04, "P2": 0.04}, positions={"P1": (0, 0), "P2": (1, 0)})
    with pytest.raises(InputError, match="operating_point_V.*P2"):
        plan_pair_maps(desc)


def test_both_orientations_plans_each_pair_twice_with_axes_swapped() -> None:
    dev = array_with_sensor(4)
    one = plan_pair_maps(array_description(dev))
    two = plan_pair_maps(array_description(dev), both_orientations=True)
    assert len(two) == 2 * len(one)
    swapped = {p.name: p for p in two[len(one):]}
    for p in one:
        q = swapped[f"{p.y_gate}-{p.x_gate}"]
        assert q.x_range_V == pytest.approx(p.y_range_V, abs=1e-6) and q.y_range_V == pytest.approx(p.x_range_V, abs=1e-6)
