"""Formulas of the constant-interaction model and of line shapes, one place each.

Every formula used elsewhere in stabtool lives here, with its source.
"""

from .constants import E_AC, KB_EV_PER_K, KB_OVER_E
from .ci import (
    addition_voltages,
    cdg_from_diagram,
    charging_energy_matrix_meV,
    diagram_matrix,
    double_dot_slopes,
    lever_arm_matrix,
    mutual_shifts,
    simple_double_dot,
    virtual_gate_matrix,
)
from .thermal import (
    FERMI_FWHM_FACTOR,
    fermi_occupation,
    lever_arm_from_width,
    thermal_width_V,
)

__all__ = [
    "E_AC",
    "KB_EV_PER_K",
    "KB_OVER_E",
    "addition_voltages",
    "cdg_from_diagram",
    "charging_energy_matrix_meV",
    "diagram_matrix",
    "double_dot_slopes",
    "lever_arm_matrix",
    "mutual_shifts",
    "simple_double_dot",
    "virtual_gate_matrix",
    "FERMI_FWHM_FACTOR",
    "fermi_occupation",
    "lever_arm_from_width",
    "thermal_width_V",
]
