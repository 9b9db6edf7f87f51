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
from .diamonds import (
    DiamondCapacitances,
    DiamondSlopes,
    addition_energy_meV,
    diamond_capacitances,
    diamond_lever_arm,
    diamond_lever_arm_stderr,
    diamond_slopes,
    lever_arm_from_bias_triangle,
    lever_arm_matrix_from_triangle,
)
from .polarisation import (
    ZERO_T_FWHM_FACTOR,
    detuning_lever_arm,
    ghz_to_ueV,
    polarisation,
    polarisation_derivative,
    polarisation_fwhm_eV,
    ueV_to_ghz,
)
from .thermal import (
    FERMI_FWHM_FACTOR,
    broadened_occupation,
    fermi_occupation,
    lever_arm_from_fwhm,
    lever_arm_from_width,
    saturated_temperature,
    thermal_fwhm_V,
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
    "broadened_occupation",
    "lever_arm_from_fwhm",
    "saturated_temperature",
    "thermal_fwhm_V",
    "DiamondCapacitances",
    "DiamondSlopes",
    "addition_energy_meV",
    "diamond_capacitances",
    "diamond_lever_arm",
    "diamond_lever_arm_stderr",
    "diamond_slopes",
    "lever_arm_from_bias_triangle",
    "lever_arm_matrix_from_triangle",
    "ZERO_T_FWHM_FACTOR",
    "detuning_lever_arm",
    "ghz_to_ueV",
    "polarisation",
    "polarisation_derivative",
    "polarisation_fwhm_eV",
    "ueV_to_ghz",
]
