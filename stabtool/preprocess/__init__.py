"""Pre-processing of a map before line detection.

Background removal, slow-axis row-offset correction, derivatives in volts,
NaN-aware denoising and a robust noise estimate. Each step takes and returns
an :class:`xarray.DataArray` in the stabtool map model.
"""

from .background import correct_row_offsets, default_background_sigma, remove_background
from .derivative import Gradient, denoise, derivatives
from .noise import estimate_noise_level

__all__ = [
    "remove_background",
    "correct_row_offsets",
    "default_background_sigma",
    "Gradient",
    "derivatives",
    "denoise",
    "estimate_noise_level",
]
