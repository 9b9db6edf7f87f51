"""Dot arrays: the N×M virtual-gate matrix from pairwise two-gate maps.

* :mod:`.plan` — which pairwise maps to measure (windows, other gates parked);
* :mod:`.measurement` — one analysed map reduced to the two elements it measures;
* :mod:`.assemble` — combination into the full matrix, with consistency statistics;
* :mod:`.convert` — virtual ↔ physical voltages, sweeps, corners, gate limits;
* :mod:`.export` — JSON / CSV output and reading a saved matrix back.
"""

from .assemble import (
    CAUTION,
    ElementEstimate,
    Rejection,
    VirtualGateMatrix,
    assemble_virtual_gates,
    virtual_name,
)
from .convert import (
    LimitCheck,
    LimitViolation,
    SweepCorner,
    VirtualSweep,
    check_limits,
    physical_to_virtual,
    virtual_sweep,
    virtual_to_physical,
)
from .export import matrix_to_dict, read_matrix_json, write_matrix_csv, write_matrix_json
from .measurement import (
    PairMeasurement,
    pair_from_analysis,
    pair_from_map,
    read_pair_json,
    untilt_elements,
)
from .plan import ArrayDescription, PairMapPlan, plan_pair_maps, prior_couplings

__all__ = [
    "CAUTION",
    "ArrayDescription",
    "ElementEstimate",
    "LimitCheck",
    "LimitViolation",
    "PairMapPlan",
    "PairMeasurement",
    "Rejection",
    "SweepCorner",
    "VirtualGateMatrix",
    "VirtualSweep",
    "assemble_virtual_gates",
    "check_limits",
    "matrix_to_dict",
    "pair_from_analysis",
    "pair_from_map",
    "physical_to_virtual",
    "plan_pair_maps",
    "prior_couplings",
    "read_matrix_json",
    "read_pair_json",
    "untilt_elements",
    "virtual_name",
    "virtual_sweep",
    "virtual_to_physical",
    "write_matrix_csv",
    "write_matrix_json",
]
