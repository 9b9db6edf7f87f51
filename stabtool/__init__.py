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
]
