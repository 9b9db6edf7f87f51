"""Synthetic constant-interaction generator: maps with known truth.

Three steps, each seeded: truth parameters (a :class:`Device`, presets) →
noiseless render (exact ground state, thermal and tunnel-coupled
occupations, sensor / charge / transport read-out) → noise and artefacts
(:class:`Artefacts`).

>>> from stabtool.simulate import presets, simulate_map
>>> dev = presets.get("si-sige-double")
>>> sm = simulate_map(dev, x_gate="PA", y_gate="PB", x_range_V=(0.0, 0.25),
...                   y_range_V=(0.0, 0.25), shape=(64, 64))
>>> sm.truth.to_json()["x_gate"]
'PA'
"""

from . import presets
from .artefacts import Artefacts
from .cells import PlaneCells, plane_cells, rasterize_cells
from .device import Device
from .diamonds import DiamondMap, DiamondTruth, coulomb_diamonds
from .ground_state import brute_force_ground_state, ground_state, relevant_vectors
from .occupation import occupations
from .quick import double_dot_window, quick_double_dot
from .render import SyntheticMap, charge_state_map, simulate_map
from .sensor import SensorModel
from .truth import LineSegment, Truth

__all__ = [
    "Artefacts",
    "Device",
    "DiamondMap",
    "DiamondTruth",
    "LineSegment",
    "PlaneCells",
    "SensorModel",
    "SyntheticMap",
    "Truth",
    "brute_force_ground_state",
    "charge_state_map",
    "coulomb_diamonds",
    "double_dot_window",
    "ground_state",
    "occupations",
    "plane_cells",
    "presets",
    "quick_double_dot",
    "rasterize_cells",
    "relevant_vectors",
    "simulate_map",
]
