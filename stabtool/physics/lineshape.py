"""Coulomb-peak line shapes of a charge-sensor dot.

``sech2``: a thermally broadened peak of a single level,
``G ∝ cosh⁻²(x/2w)`` (−df/dE of the Fermi function), FWHM = 3.5255 w.
``lorentzian``: a lifetime (tunnel) broadened peak ``G ∝ 1/(1 + (2x/FWHM)²)``.

References
----------
C. W. J. Beenakker, "Theory of Coulomb-blockade oscillations in the
conductance of a quantum dot", Phys. Rev. B 44, 1646 (1991),
doi:10.1103/PhysRevB.44.1646 (resonant-tunnelling peak ∝ cosh⁻², from memory).
"""

from __future__ import annotations

import numpy as np

__all__ = ["coulomb_peak"]

_SECH2_HALF = 2.0 * np.arccosh(np.sqrt(2.0))  # cosh⁻²(u) = ½ at u = acosh(√2)


def coulomb_peak(x: np.ndarray, fwhm: float, *, shape: str = "sech2") -> np.ndarray:
    """Peak of unit height at ``x = 0`` with full width at half maximum ``fwhm``.

    Parameters
    ----------
    x : array_like
        Distance from the peak centre (any unit).
    fwhm : float
        Full width at half maximum (same unit as ``x``).
    shape : {"sech2", "lorentzian"}
    """
    u = np.asarray(x, float) / fwhm
    if shape == "sech2":
        c = np.cosh(np.clip(_SECH2_HALF * u, -350, 350))
        return 1.0 / (c * c)
    if shape == "lorentzian":
        return 1.0 / (1.0 + 4.0 * u * u)
    raise ValueError(f"unknown peak shape {shape!r}; expected 'sech2' or 'lorentzian'")
