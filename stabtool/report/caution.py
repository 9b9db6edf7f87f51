"""The cautions shown wherever virtual-gate matrices and settings leave the tool.

Virtual gates and gate settings go to real devices. Every output that
carries them (``analyze`` text and JSON, ``--save`` files, plots, batch
tables and summaries, ``virtual-gates`` exports) shows one of these, so that
nobody applies an estimate without checking the device's limits (common
practice, no source).
"""

from __future__ import annotations

__all__ = ["MATRIX_CAUTION", "RESULTS_CAUTION", "SHORT_CAUTION"]

#: With a virtual-gate matrix (one map, or assembled for an array).
MATRIX_CAUTION = (
    "This virtual-gate matrix is an estimate with the stated uncertainty; check "
    "gate-voltage limits and the lab's procedures before applying it to a device."
)

#: With many results at once (a batch's table and summary).
RESULTS_CAUTION = (
    "These results are estimates from automated image analysis. Check every gate "
    "voltage against the device's safe limits and follow your lab's procedures "
    "before applying any virtual-gate matrix or setting to a device."
)

#: Two short lines for a plot's key-numbers box.
SHORT_CAUTION = "estimates: check gate limits and\nlab procedures before applying"
