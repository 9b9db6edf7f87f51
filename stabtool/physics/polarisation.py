"""Charge polarisation across an interdot transition of a double dot.

Two charge states coupled by the tunnel coupling ``t`` and detuned by ``ε``
form a two-level system with splitting ``Ω = √(ε² + 4t²)`` (so the anticrossing
gap at ``ε = 0`` is ``2t``: this is the convention here). In thermal
equilibrium the probability of the charge state favoured at ``ε > 0`` is

``P(ε) = ½ [1 + (ε/Ω) tanh(Ω / 2kT)]``.

A charge sensor reads ``g = g0 + δg · P(ε) + (∂g/∂ε) ε``. With ``t = 0`` the
line is a Fermi function of width ``kT`` (derivative FWHM 3.5255 kT); at
``T = 0`` the FWHM of ``dP/dε`` is ``4t √(2^(2/3) − 1) ≈ 3.0656 t``.

References
----------
L. DiCarlo, H. J. Lynch, A. C. Johnson, L. I. Childress, K. Crockett,
C. M. Marcus, M. P. Hanson and A. C. Gossard, "Differential charge sensing and
charge delocalization in a tunable double quantum dot", Phys. Rev. Lett. 92,
226801 (2004), doi:10.1103/PhysRevLett.92.226801 (formula recalled from
memory; some papers write ``Ω = √(ε² + t²)``, i.e. their t is our 2t).
"""

from __future__ import annotations

import numpy as np
from scipy import constants as _c
from scipy import optimize

from .constants import KB_EV_PER_K

__all__ = [
    "ZERO_T_FWHM_FACTOR",
    "detuning_lever_arm",
    "ghz_to_ueV",
    "polarisation",
    "polarisation_derivative",
    "polarisation_fwhm_eV",
    "ueV_to_ghz",
]

#: FWHM of dP/dε at T = 0 in units of t: 4 √(2^(2/3) − 1).
ZERO_T_FWHM_FACTOR: float = 4.0 * np.sqrt(2.0 ** (2.0 / 3.0) - 1.0)


def polarisation(eps_eV: np.ndarray, t_eV: float, temperature_K: float) -> np.ndarray:
    """``P(ε) = ½[1 + (ε/Ω) tanh(Ω/2kT)]``, ``Ω = √(ε² + 4t²)``; energies in eV.

    ``temperature_K = 0`` gives the ground state ``½(1 + ε/Ω)``; ``t = 0`` and
    ``T = 0`` together give a step ``½(1 + sign ε)``.
    """
    eps = np.asarray(eps_eV, float)
    omega = np.sqrt(eps**2 + 4.0 * float(t_eV) ** 2)
    kt = KB_EV_PER_K * float(temperature_K)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(omega > 0, eps / np.where(omega > 0, omega, 1.0), 0.0)
        th = np.tanh(omega / (2.0 * kt)) if kt > 0 else np.where(omega > 0, 1.0, 0.0)
    return 0.5 * (1.0 + ratio * th)


def polarisation_derivative(eps_eV: np.ndarray, t_eV: float, temperature_K: float) -> np.ndarray:
    """``dP/dε`` in 1/eV (analytic)."""
    eps = np.asarray(eps_eV, float)
    t2 = 4.0 * float(t_eV) ** 2
    omega = np.sqrt(eps**2 + t2)
    kt = KB_EV_PER_K * float(temperature_K)
    if kt <= 0:
        return 0.5 * t2 / omega**3
    th = np.tanh(omega / (2 * kt))
    sech2 = 1.0 / np.cosh(np.clip(omega / (2 * kt), -350, 350)) ** 2
    return 0.5 * (t2 / omega**3 * th + eps**2 / omega**2 * sech2 / (2 * kt))


def polarisation_fwhm_eV(t_eV: float, temperature_K: float) -> float:
    """FWHM of ``dP/dε`` in eV (numerical root of the half maximum; the peak is at ε = 0)."""
    kt = KB_EV_PER_K * float(temperature_K)
    t = abs(float(t_eV))
    if t == 0 and kt == 0:
        return 0.0
    if t == 0:
        return 4.0 * np.log(1.0 + np.sqrt(2.0)) * kt
    peak = float(polarisation_derivative(np.array([0.0]), t, temperature_K)[0])
    scale = max(t, kt)
    f = lambda e: float(polarisation_derivative(np.array([e]), t, temperature_K)[0]) - 0.5 * peak
    hi = scale
    while f(hi) > 0:
        hi *= 2.0
    return 2.0 * optimize.brentq(f, 0.0, hi, xtol=1e-15 * scale + 1e-18, rtol=1e-12)


def ghz_to_ueV(f_GHz: float) -> float:
    """Energy ``h f`` in µeV of a frequency in GHz (scipy.constants)."""
    return f_GHz * 1e9 * _c.h / _c.e * 1e6


def ueV_to_ghz(e_ueV: float) -> float:
    """Frequency in GHz of an energy in µeV."""
    return e_ueV * 1e-6 * _c.e / _c.h / 1e9


def detuning_lever_arm(alpha: np.ndarray, direction: np.ndarray) -> float:
    """``|dε/ds|`` in eV per V along the unit gate-space direction ``direction``.

    With ``ε = μ1 − μ2`` and ``μ_i = … − e [α V]_i`` (conventions of the
    constant-interaction model), ``dε/ds = −e (α_1,: − α_2,:) · u``.

    Parameters
    ----------
    alpha : ndarray, shape (2, 2)
        Lever-arm matrix (rows dots, columns gates x, y), eV/V.
    direction : ndarray, shape (2,)
        Direction (ux, uy) in the (x, y) gate plane; normalised here.
    """
    a = np.asarray(alpha, float)
    u = np.asarray(direction, float)
    u = u / np.hypot(*u)
    return float(abs((a[0] - a[1]) @ u))
