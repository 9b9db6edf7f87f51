"""Lever arms from fine 1-D calibration traces and temperature series.

``traces → Fermi fits → (temperature series | known T_e) → LeverArmCalibration``;
:func:`read_lever_arm_file` reads the JSON written by ``stabtool calibrate``.
"""

from .pipeline import Calibrator, calibrate_traces, fit_trace, lever_arm_from_trace
from .result import (
    LeverArmCalibration,
    TraceRecord,
    read_lever_arm_file,
    user_lever_arm,
    write_lever_arm_file,
)
from .series import SATURATION_MODEL, TemperatureSeriesFit, fit_temperature_series
from .shape import ShapeComparison, compare_line_shapes

__all__ = [
    "SATURATION_MODEL",
    "Calibrator",
    "LeverArmCalibration",
    "ShapeComparison",
    "TemperatureSeriesFit",
    "TraceRecord",
    "calibrate_traces",
    "compare_line_shapes",
    "fit_temperature_series",
    "fit_trace",
    "lever_arm_from_trace",
    "read_lever_arm_file",
    "user_lever_arm",
    "write_lever_arm_file",
]
