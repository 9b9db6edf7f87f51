"""Thermal and tunnel-coupled dot occupations around the ground state.

At electron temperature ``T_e > 0`` each pixel's occupations are averaged
over the charge states near the ground state ``G`` (``G`` itself and
``G + d`` for the moves ``d = ±e_i, e_i − e_j``; these include every state
that is degenerate with ``G`` on a line or at a triple point) with Boltzmann weights ``exp(−(U − U_G)/k_B T_e)``. The dots
exchange electrons with reservoirs at electrochemical potential 0, so ``U`` is
the grand-canonical energy and a dot–reservoir line has exactly the
Fermi–Dirac profile ``f = 1/(1 + exp(μ_i/k_B T_e))`` with
``μ_i = ... − e α_ii V_i``: along gate i the width is ``w = k_B T_e/(e α_ii)``
(conventions file). Spin degeneracy is ignored (it would shift each line by
``k_B T ln 2`` without changing its width).

Interdot tunnel coupling ``t`` (per coupled dot pair, ``Device.tunnel_pairs``)
couples two charge states that differ by moving one electron between the
pair. Convention: the two-level Hamiltonian is ``H = [[ε/2, t], [t, −ε/2]]``,
so the level splitting is ``Ω = √(ε² + 4t²)`` (``2t`` at zero detuning) and
the thermal polarisation ``P(ε) = ½[1 + (ε/Ω) tanh(Ω/2k_BT)]``
(DiCarlo et al. 2004). Near a degeneracy the Hamiltonian of the lowest eight
candidate states is diagonalised and the thermal density matrix gives the
occupations; elsewhere the Boltzmann average is used.

References
----------
L. DiCarlo et al., "Differential charge sensing and charge delocalization in
a tunable double quantum dot", Phys. Rev. Lett. 92, 226801 (2004),
doi:10.1103/PhysRevLett.92.226801.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .ground_state import basic_moves, excitation_energies

__all__ = ["candidate_moves", "Occupations", "occupations"]

_N_QUANTUM = 8


def candidate_moves(n_dots: int) -> np.ndarray:
    """Moves to the states averaged over: ``0``, ``±e_i`` and ``e_i − e_j``, shape (K, n_dots)."""
    return np.concatenate([np.zeros((1, n_dots), np.int64), basic_moves(n_dots)], axis=0)


@dataclass(frozen=True)
class Occupations:
    """Mean dot occupations of a map.

    Attributes
    ----------
    mean : ndarray, shape (..., n_dots)
        Thermal (and tunnel-coupled) expectation of N_i, electrons.
    ground : ndarray, shape (..., n_dots), int
        Ground state.
    """

    mean: np.ndarray
    ground: np.ndarray


def occupations(
    n0: np.ndarray,
    ec_eV: np.ndarray,
    ground: np.ndarray,
    *,
    kT_eV: float,
    tunnel_eV: float = 0.0,
    tunnel_pairs: tuple[tuple[int, int], ...] = (),
) -> Occupations:
    """Mean occupations at temperature ``kT_eV`` with interdot tunnel coupling ``tunnel_eV``.

    Parameters
    ----------
    n0 : ndarray, shape (..., n_dots)
        Induced charges, e.
    ec_eV : ndarray, shape (n_dots, n_dots)
    ground : ndarray, shape (..., n_dots), int
        Ground states (from :func:`~stabtool.simulate.ground_state.ground_state_from_induced`).
    kT_eV : float
        k_B T_e, eV (0 for the ground state only).
    tunnel_eV : float
        Interdot tunnel coupling t, eV (``Ω = √(ε² + 4t²)``).
    tunnel_pairs : tuple of (i, j)
        Dot pairs that are tunnel coupled.
    """
    shape = np.shape(n0)
    nd = shape[-1]
    g = np.asarray(ground).reshape(-1, nd)
    if kT_eV <= 0 and tunnel_eV <= 0:
        return Occupations(mean=g.reshape(shape).astype(float), ground=g.reshape(shape))
    ec = np.asarray(ec_eV, float)
    flat = np.asarray(n0, float).reshape(-1, nd)
    moves = candidate_moves(nd)
    mf = moves.astype(float)
    # only pixels with an excited state within 30 kT (+ 40 t) need averaging:
    # exp(-30) ≈ 1e-13 of a charge is below any read-out resolution
    cut = 30.0 * kT_eV + 40.0 * tunnel_eV
    du_all = excitation_energies(g, flat, ec, moves[1:])
    near = np.nonzero(du_all.min(axis=1) < cut)[0]
    du = np.zeros((near.size, moves.shape[0]))
    du[:, 1:] = du_all[near]
    gn = g[near]
    mean = g.astype(float)
    if near.size == 0:
        return Occupations(mean=mean.reshape(shape), ground=g.reshape(shape))
    quantum = np.zeros(near.size, bool)
    if tunnel_eV > 0 and tunnel_pairs:
        coupled = np.zeros((moves.shape[0], moves.shape[0]), bool)
        diff = moves[:, None, :] - moves[None, :, :]
        for i, j in tunnel_pairs:
            hop = np.zeros(nd, np.int64)
            hop[i], hop[j] = 1, -1
            coupled |= np.all(diff == hop, axis=-1) | np.all(diff == -hop, axis=-1)
        ka, kb = np.nonzero(np.triu(coupled))
        for a, b in zip(ka, kb):
            quantum |= np.maximum(du[:, a], du[:, b]) < cut
        if quantum.any():
            mean[near[quantum]] = _quantum_mean(
                gn[quantum], du[quantum], moves, coupled, kT_eV=kT_eV, tunnel_eV=tunnel_eV
            )
    classical = ~quantum
    if kT_eV > 0 and classical.any():
        w = np.exp(du[classical] * (-1.0 / kT_eV))  # du ≥ 0 up to rounding; exp(-inf) = 0
        w /= w.sum(axis=1, keepdims=True)
        mean[near[classical]] = gn[classical] + w @ mf
    return Occupations(mean=mean.reshape(shape), ground=g.reshape(shape))


def _quantum_mean(
    g: np.ndarray, du: np.ndarray, moves: np.ndarray, coupled: np.ndarray, *, kT_eV: float, tunnel_eV: float
) -> np.ndarray:
    """Thermal expectation of N in the lowest candidate states with tunnelling."""
    k = min(_N_QUANTUM, moves.shape[0])
    if k < moves.shape[0]:
        sel = np.argpartition(du, k - 1, axis=1)[:, :k]
    else:
        sel = np.broadcast_to(np.arange(k), du.shape).copy()
    e = np.take_along_axis(du, sel, axis=1)
    finite = np.isfinite(e)
    e = np.where(finite, e, 1e3)  # impossible states pushed far up, uncoupled below
    ham = np.zeros((sel.shape[0], k, k))
    ham[:, np.arange(k), np.arange(k)] = e
    cpl = coupled[sel[:, :, None], sel[:, None, :]] & finite[:, :, None] & finite[:, None, :]
    ham += tunnel_eV * cpl
    evals, evecs = np.linalg.eigh(ham)
    evals -= evals[:, :1]
    if kT_eV > 0:
        w = np.exp(-evals / kT_eV)
    else:
        w = np.zeros_like(evals)
        w[:, 0] = 1.0
    w /= w.sum(axis=1, keepdims=True)
    prob = np.einsum("pk,psk->ps", w, evecs**2)  # probability of each charge state
    dn = moves[sel].astype(float)  # (P, k, nd)
    return g + np.einsum("ps,psi->pi", prob, dn)
