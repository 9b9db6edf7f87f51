"""Thermal broadening of dot–reservoir transitions (Fermi–Dirac).

Across a dot-i line, along gate i, the occupation is
``f = 1 / (1 + exp((V − V0)/w))`` with ``w = k_B T_e / (e α_ii)``; the FWHM of
``−df/dV`` is ``4 ln(1 + √2) w ≈ 3.5255 w``.

References
----------
Standard Fermi–Dirac statistics; see e.g. L. P. Kouwenhoven et al.,
"Electron transport in quantum dots", in Mesoscopic Electron Transport,
NATO ASI Series E 345 (1997) for its use on Coulomb-blockade lines.
Constants from :mod:`scipy.constants` (CODATA).
"""

from __future__ import annotations

import numpy as np

from .constants import KB_OVER_E

__all__ = ["FERMI_FWHM_FACTOR", "fermi_occupation", "thermal_width_V", "lever_arm_from_width"]

#: FWHM of −df/dx for f = 1/(1+exp(x)), in units of the width: 4 ln(1 + √2).
FERMI_FWHM_FACTOR: float = 4.0 * np.log(1.0 + np.sqrt(2.0))


def fermi_occupation(v: np.ndarray, v0: float, width: float) -> np.ndarray:
    """Occupation ``1 / (1 + exp((v − v0)/width))``, overflow-safe.

    ``width`` > 0 gives an occupation that falls from 1 to 0 as ``v`` grows;
    for an electron added with increasing gate voltage use ``1 − f``.
    """
    z = (np.asarray(v, float) - v0) / width
    return 0.5 * (1.0 - np.tanh(0.5 * z))


def thermal_width_V(temperature_K: float, lever_arm: float) -> float:
    """Fermi width in gate voltage ``w = k_B T / (e α)`` in V."""
    return KB_OVER_E * temperature_K / lever_arm


def lever_arm_from_width(width_V: float, temperature_K: float) -> float:
    """Lever arm from a fitted Fermi width: ``α = k_B T / (e w)``."""
    return KB_OVER_E * temperature_K / width_V
