"""stabtool: charge-stability diagrams of gate-defined quantum dots into numbers.

Loaders bring maps into xarray; an image pipeline finds the charge-transition
lines; a constant-interaction fitter recovers virtual gates, capacitances,
lever arms and charging energies; a synthetic generator supplies test truth.
"""

from importlib.metadata import PackageNotFoundError, version as _version

from .errors import (
    FitError,
    InputError,
    PartialSweepWarning,
    QualityWarning,
    StabtoolError,
    StabtoolWarning,
)
from .mapdata import MapAxes, make_map, map_axes, validate_map
from .lines import LineDetection, LineDetector, detect_lines
from .io import load, save_json, save_map
from .arrays import (
    ArrayDescription,
    PairMeasurement,
    VirtualGateMatrix,
    assemble_virtual_gates,
    check_limits,
    plan_pair_maps,
    physical_to_virtual,
    virtual_sweep,
    virtual_to_physical,
)
from .calibrate import LeverArmCalibration, calibrate_traces, read_lever_arm_file
from .fit.fermi import FermiStepFit, fit_fermi_step
from .analysis import AnalysisResult, Analyzer, analyze
from .io.traces import load_traces
from .batch import BatchReport, DriftResult, make_overnight_sample, measure_drift, run_batch

try:
    __version__ = _version("stabtool")
except PackageNotFoundError:  # pragma: no cover - running from a source tree
    __version__ = "0.0.0+unknown"

__all__ = [
    "__version__",
    "FitError",
    "InputError",
    "PartialSweepWarning",
    "QualityWarning",
    "StabtoolError",
    "StabtoolWarning",
    "MapAxes",
    "make_map",
    "map_axes",
    "validate_map",
    "Analyzer",
    "AnalysisResult",
    "analyze",
    "load",
    "save_map",
    "save_json",
    "PairMeasurement",
    "VirtualGateMatrix",
    "ArrayDescription",
    "assemble_virtual_gates",
    "plan_pair_maps",
    "check_limits",
    "physical_to_virtual",
    "virtual_sweep",
    "virtual_to_physical",
    "LeverArmCalibration",
    "calibrate_traces",
    "read_lever_arm_file",
    "FermiStepFit",
    "fit_fermi_step",
    "load_traces",
    "run_batch",
    "BatchReport",
    "measure_drift",
    "DriftResult",
    "make_overnight_sample",
    "LineDetection",
    "LineDetector",
    "detect_lines",
]
