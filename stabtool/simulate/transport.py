"""Transport read-out: a series double dot (triple points, bias triangles) and
Coulomb diamonds of a single dot.

Double dot
----------
Source – dot1 – dot2 – drain in series, sequential tunnelling. Near a triple
point current flows through a three-state cycle. Electron cycle:
``A → A+e1`` (an electron enters dot1 from the source), ``A+e1 → A+e2``
(interdot), ``A+e2 → A`` (it leaves dot2 to the drain); hole cycle:
``A+e2 → A+e1+e2 → A+e1 → A+e2``. Each step has a forward rate
``Γ F(c)`` and a backward rate ``Γ F(−c)`` with ``c`` the energy cost
(lead steps: ``F`` the Fermi function; interdot: a resonance
``γ²/(c² + γ²)`` of width ``γ = max(γ_el, 2t)`` plus a small inelastic
floor, times ``1/(1 + e^{c/kT})``), so detailed balance holds and no
current flows at zero bias. The net current of a three-state ring is
``I = (k₀k₁k₂ − k₀′k₁′k₂′)/D`` with ``D`` the sum of the spanning-tree
weights of the three states (Kirchhoff's theorem for master equations; Hill,
"Free energy transduction in biology", 1977 [from memory]). The source and
drain electrochemical potentials are ``±eV_sd/2``; the leads' capacitive
pull on the dots is neglected, so bias triangles have the textbook
size: ``α1 = eV_sd/δV_g1`` (van der Wiel et al. 2003).

Coulomb diamonds
----------------
Single dot with gate, source and drain capacitances; bias on the source,
drain grounded (:mod:`stabtool.physics.diamond`). The master equation of
the sequential-tunnelling birth–death chain over the charge states gives the
current exactly (Beenakker 1991).

References
----------
W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1.
C. W. J. Beenakker, Phys. Rev. B 44, 1646 (1991), doi:10.1103/PhysRevB.44.1646.
"""

from __future__ import annotations

import numpy as np

from ..physics.constants import E_AC

__all__ = ["double_dot_current", "single_dot_current"]

_INELASTIC = 0.03  # interdot rate floor relative to the resonance (phonon emission), common practice


def _fermi(c: np.ndarray, kT: float) -> np.ndarray:
    if kT <= 0:
        return np.where(c < 0, 1.0, np.where(c > 0, 0.0, 0.5))
    return 0.5 * (1.0 - np.tanh(0.5 * c / kT))


def _energy(n: np.ndarray, n0: np.ndarray, ec: np.ndarray) -> np.ndarray:
    d = n - n0
    return 0.5 * np.einsum("...i,ij,...j->...", d, ec, d)


def double_dot_current(
    n0: np.ndarray,
    ec_eV: np.ndarray,
    ground: np.ndarray,
    *,
    i1: int,
    i2: int,
    kT_eV: float,
    bias_eV: float,
    tunnel_eV: float = 0.0,
    gamma_eV: float = 2e-6,
    current_pA: float = 10.0,
) -> np.ndarray:
    """Current through a series double dot (dot ``i1`` at the source, ``i2`` at the drain).

    Parameters
    ----------
    n0 : ndarray, shape (..., n_dots)
        Induced charges, e.
    ec_eV : ndarray, shape (n_dots, n_dots)
    ground : ndarray, shape (..., n_dots), int
    kT_eV : float
        Electron temperature (a floor of 1 µeV keeps the rates smooth at T = 0).
    bias_eV : float
        ``e V_sd``: source at ``+eV_sd/2``, drain at ``−eV_sd/2``.
    tunnel_eV, gamma_eV : float
        Interdot coupling t and elastic resonance width, eV.
    current_pA : float
        Current of a fully open cycle (lead rates Γ = 1), pA.

    Returns
    -------
    ndarray, shape (...)
        Current, pA (positive from source to drain).
    """
    kT = max(kT_eV, 1e-6)
    n0 = np.asarray(n0, float)
    g = np.asarray(ground, float)
    nd = n0.shape[-1]
    e1 = np.zeros(nd)
    e2 = np.zeros(nd)
    e1[i1] = 1.0
    e2[i2] = 1.0
    mu_s, mu_d = 0.5 * bias_eV, -0.5 * bias_eV
    gam = max(gamma_eV, 2.0 * tunnel_eV, 1e-9)

    def interdot(c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        r = gam**2 / (c * c + gam**2) + _INELASTIC
        return r * _fermi(c, kT), r * _fermi(-c, kT)

    def lead(c: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        return _fermi(c, kT), _fermi(-c, kT)

    total = np.zeros(n0.shape[:-1])
    bases = [(g, "e"), (g - e1, "e"), (g - e2, "e"), (g - e1, "h"), (g - e2, "h"), (g - e1 - e2, "h")]
    for a, kind in bases:
        if kind == "e":
            s0, s1, s2 = a, a + e1, a + e2
        else:
            s0, s1, s2 = a + e2, a + e1 + e2, a + e1
        valid = np.all(a >= 0, axis=-1)
        if not valid.any():
            continue
        u0, u1, u2 = _energy(s0, n0, ec_eV), _energy(s1, n0, ec_eV), _energy(s2, n0, ec_eV)
        if kind == "e":
            # s0→s1 source in, s1→s2 interdot, s2→s0 drain out
            k0, k0b = lead(u1 - u0 - mu_s)
            k1, k1b = interdot(u2 - u1)
            k2, k2b = lead(u0 - u2 + mu_d)
        else:
            # s0→s1 source in (dot1), s1→s2 drain out (dot2), s2→s0 interdot
            k0, k0b = lead(u1 - u0 - mu_s)
            k1, k1b = lead(u2 - u1 + mu_d)
            k2, k2b = interdot(u0 - u2)
        p0 = k0b * k2 + k1 * k2 + k1b * k0b
        p1 = k0 * k1b + k2b * k1b + k2 * k0
        p2 = k2b * k1 + k0 * k1 + k0b * k2b
        den = p0 + p1 + p2
        cur = (k0 * k1 * k2 - k0b * k1b * k2b) / np.where(den > 0, den, 1.0)
        total += np.where(valid, cur, 0.0)
    return current_pA * total


def single_dot_current(
    gate_V: np.ndarray,
    bias_V: np.ndarray,
    *,
    c_gate_aF: float,
    c_source_aF: float,
    c_drain_aF: float,
    c_other_aF: float = 0.0,
    offset_charge_e: float = 0.0,
    kT_eV: float,
    gamma_source: float = 1.0,
    gamma_drain: float = 1.0,
    current_pA: float = 10.0,
) -> np.ndarray:
    """Sequential-tunnelling current of a single dot, bias on the source.

    Parameters
    ----------
    gate_V, bias_V : ndarray, broadcastable
    c_gate_aF, c_source_aF, c_drain_aF, c_other_aF : float
        Capacitances, aF (total ``C`` = their sum).
    kT_eV : float
        Electron temperature (floored at 1 µeV).

    Returns
    -------
    ndarray
        Current in pA, positive for electrons flowing source → drain
        (negative bias on the source raises its Fermi level).

    Notes
    -----
    ``μ(N) = E_C (N − ½) − e (C_G V_G + C_S V_sd)/C − E_C q₀``; the source
    Fermi level is ``−eV_sd`` and the drain's 0 (electron energies).
    """
    kT = max(kT_eV, 1e-6)
    c = c_gate_aF + c_source_aF + c_drain_aF + c_other_aF
    ec = E_AC / c  # eV
    vg, vb = np.broadcast_arrays(np.asarray(gate_V, float), np.asarray(bias_V, float))
    ng = (c_gate_aF * vg + c_source_aF * vb) / E_AC + offset_charge_e  # induced charge
    mu_s, mu_d = -vb, np.zeros_like(vb)
    base = np.floor(ng)
    lo = np.maximum(base - 3, 0)
    nstates = 8
    # birth–death chain over N = lo .. lo+nstates-1
    logp = np.zeros(vg.shape + (nstates,))
    mus = []
    rates = []
    for k in range(1, nstates):
        n = lo + k
        mu = ec * (n - 0.5) - ec * ng  # electrochemical potential of the N-th electron
        fs, fd = 0.5 * (1 - np.tanh(0.5 * (mu - mu_s) / kT)), 0.5 * (1 - np.tanh(0.5 * (mu - mu_d) / kT))
        up = gamma_source * fs + gamma_drain * fd
        down = gamma_source * (1 - fs) + gamma_drain * (1 - fd)
        logp[..., k] = logp[..., k - 1] + np.log(np.maximum(up, 1e-300)) - np.log(np.maximum(down, 1e-300))
        mus.append((fs, fd))
        rates.append((up, down))
    logp -= logp.max(axis=-1, keepdims=True)
    p = np.exp(logp)
    p /= p.sum(axis=-1, keepdims=True)
    cur = np.zeros(vg.shape)
    for k in range(1, nstates):
        fs, _ = mus[k - 1]
        # net source → dot rate for the N-1 → N transition
        cur += p[..., k - 1] * gamma_source * fs - p[..., k] * gamma_source * (1 - fs)
    return current_pA * cur
