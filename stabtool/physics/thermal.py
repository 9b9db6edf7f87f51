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

__all__ = [
    "FERMI_FWHM_FACTOR",
    "broadened_occupation",
    "fermi_occupation",
    "lever_arm_from_fwhm",
    "lever_arm_from_width",
    "saturated_temperature",
    "thermal_fwhm_V",
    "thermal_width_V",
]

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


def broadened_occupation(v: np.ndarray, v0: float, width: float, gamma: float) -> np.ndarray:
    """Occupation of a level of Lorentzian half-width ``gamma`` at temperature width ``width``.

    The Fermi function convolved with a Lorentzian of half width at half
    maximum ``gamma`` (both in gate volts):
    ``n(V) = ½ − (1/π) Im ψ(½ + (γ + i(V − V0)) / (2π w))``, with ψ the
    digamma function. ``gamma → 0`` gives :func:`fermi_occupation`;
    ``width → 0`` gives ``½ − arctan((V − V0)/γ)/π``.

    Parameters
    ----------
    v : array_like
        Gate voltages, V.
    v0 : float
        Level position, V.
    width : float
        Thermal width ``k_B T/(e α)``, V (> 0).
    gamma : float
        Lorentzian (tunnel/lifetime) half width ``ħΓ/2 / (e α)``, V (>= 0).

    Notes
    -----
    Standard result for a resonant level coupled to a Fermi reservoir
    (Lorentzian density of states integrated against the Fermi function);
    the digamma closed form follows from the series of the Fermi function
    over Matsubara poles (common practice, no source).
    """
    from scipy.special import psi

    v = np.asarray(v, float)
    if gamma <= 0:
        return fermi_occupation(v, v0, width)
    z = 0.5 + (gamma + 1j * (v - v0)) / (2.0 * np.pi * width)
    return 0.5 - np.imag(psi(z)) / np.pi


def saturated_temperature(
    bath_K: np.ndarray | float, saturation_K: float, *, exponent: float = 2.0
) -> np.ndarray:
    """Electron temperature that saturates at low bath temperature.

    ``T_e = (T^n + T_sat^n)^(1/n)``; ``n = 2`` (addition in quadrature) is the
    default.

    Notes
    -----
    A phenomenological interpolation between ``T_e = T`` (linear regime) and
    ``T_e = T_sat`` (plateau set by electrical noise and heat leaks). The
    quadrature form is common practice, no source; other exponents interpolate
    more sharply (large n) or more softly (small n).
    """
    t = np.asarray(bath_K, float)
    return (t**exponent + float(saturation_K) ** exponent) ** (1.0 / exponent)


def thermal_fwhm_V(temperature_K: float, lever_arm: float) -> float:
    """FWHM of the Fermi line's derivative in gate voltage, ``4 ln(1+√2) k_B T/(e α)``, V."""
    return FERMI_FWHM_FACTOR * thermal_width_V(temperature_K, lever_arm)


def lever_arm_from_fwhm(fwhm_V: float, temperature_K: float) -> float:
    """Lever arm from a derivative FWHM: ``α = 3.5255 k_B T/(e · FWHM)``."""
    return FERMI_FWHM_FACTOR * KB_OVER_E * temperature_K / fwhm_V
