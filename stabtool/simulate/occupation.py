"""Thermal and tunnel-coupled dot occupations around the ground state.

At electron temperature ``T_e > 0`` each pixel's occupations are averaged
over the charge states near the ground state ``G`` (``G`` itself and
``G + d`` for the moves ``d = ±e_i, e_i − e_j, ±(e_i + e_j)``: every state
that is degenerate with ``G`` on a line or at a triple point, and the one
a mutual charging energy above a triple point's three, which a hot map
(``k_B T_e`` a fifth of ``E_Cm`` or more) needs; states further away cost
a charging energy) with Boltzmann weights ``exp(−(U − U_G)/k_B T_e)``. The dots
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

Only pixels and states within ``averaging_cut`` = 30 k_BT + 40 t of the
ground state are averaged (a state above it weighs < e⁻³⁰ ≈ 1e−13); the
pixels are found by block subdivision (:func:`near_transition_mask`), so the
cost follows the length of the transition lines, not the area of the map.

References
----------
L. DiCarlo et al., "Differential charge sensing and charge delocalization in
a tunable double quantum dot", Phys. Rev. Lett. 92, 226801 (2004),
doi:10.1103/PhysRevLett.92.226801.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .ground_state import basic_moves, excitation_energies, row_min

__all__ = ["candidate_moves", "Occupations", "StateMixture", "occupations", "averaging_cut", "near_transition_mask"]

_N_QUANTUM = 8


def averaging_cut(kT_eV: float, tunnel_eV: float = 0.0) -> float:
    """Excitation energy (eV) above which a pixel needs no averaging: ``30 k_BT + 40 t``.

    ``exp(−30) ≈ 1e−13`` of a charge is below any read-out resolution.
    """
    return 30.0 * kT_eV + 40.0 * tunnel_eV


def near_transition_mask(
    n0: np.ndarray,
    ground: np.ndarray,
    ec_eV: np.ndarray,
    *,
    cut_eV: float,
    block: int = 16,
    finest: int = 2,
) -> np.ndarray:
    """Pixels of a plane sweep that lie within ``cut_eV`` of a transition.

    Parameters
    ----------
    n0 : ndarray, shape (ny, nx, n_dots)
        Induced charges; must be affine in the pixel indices (a sweep of two
        gates on linear axes).
    ground : ndarray, shape (ny, nx, n_dots), int
        Exact ground states.
    ec_eV : ndarray, shape (n_dots, n_dots)
    cut_eV : float
        See :func:`averaging_cut`.
    block : int
        Size of the first blocks in pixels (halved at each level).
    finest : int
        Blocks are split down to this size. With 2 (default) the pixels of
        the last undecided blocks are tested one by one and the mask is
        exact; with a larger value those blocks are returned whole (a
        superset, for a caller that tests its pixels anyway).

    Returns
    -------
    ndarray, shape (ny, nx), bool
        True where some candidate excitation ``U(G + d) − U(G)`` (d a move
        of :func:`candidate_moves`) is below ``cut_eV``, i.e. where the
        thermal (and tunnel) average is needed: exactly those pixels for
        ``finest=2``, a superset otherwise; never fewer.

    Notes
    -----
    Block subdivision: a rectangular block whose four corners share the
    ground state ``G`` holds ``G`` at every pixel. Proof: the set of gate
    voltages where ``G`` is the ground state, ``{V : U(G, V) ≤ U(N', V) for
    all N' ≥ 0}``, is an intersection of half-spaces because
    ``U(G, V) − U(N', V)`` is affine in ``V``; it is convex, and the pixels
    of the block lie in the convex hull of its corners (the sweep is affine
    in the pixel indices). For fixed ``G`` the excitation energy
    ``ΔU_d = U(G + d) − U(G)`` of each move is affine too (``+∞`` when
    ``G + d`` has a negative entry), so ``min_d ΔU_d`` is concave and its
    minimum over the block is reached at a corner. Hence a block whose
    corners share ``G`` and have ``min_d ΔU_d ≥ cut`` needs no averaging
    anywhere. Other blocks are split in four down to 2 × 2 pixels, whose
    pixels are tested one by one. The cost scales with the length of the
    transition lines times the cut width, not with the area of the map.
    """
    ny, nx, nd = ground.shape
    ec = np.asarray(ec_eV, float)
    n0f = np.asarray(n0, float).reshape(-1, nd)
    gf = ground.reshape(-1, nd)
    # (the moves ±(e_i + e_j) of candidate_moves need no test of their own: U(G ± (e_i + e_j)) − U(G)
    # is the sum of the excitations ±e_i and ±e_j plus the mutual charging energy E_C,ij ≥ 0)
    moves = basic_moves(nd)
    dmin = np.full(ny * nx, np.nan)

    want = np.zeros(ny * nx, bool)

    def far_at(flat_idx: np.ndarray) -> np.ndarray:
        want[flat_idx] = True
        want[~np.isnan(dmin)] = False
        todo = np.flatnonzero(want)
        if todo.size:
            dmin[todo] = row_min(excitation_energies(gf[todo], n0f[todo], ec, moves))
            want[todo] = False
        return dmin[flat_idx] >= cut_eV

    cover = np.zeros((ny + 1, nx + 1), np.int64)  # 2-D difference array of the far blocks
    pixel_far = None
    b = max(2, int(block))
    grid_r, grid_c = np.meshgrid(np.arange(0, max(ny - 1, 1), b), np.arange(0, max(nx - 1, 1), b), indexing="ij")
    r0, c0 = grid_r.ravel(), grid_c.ravel()
    while r0.size:
        r1, c1 = np.minimum(r0 + b, ny - 1), np.minimum(c0 + b, nx - 1)
        if b <= max(2, finest) and finest > 2:
            break  # remaining blocks stay "near" (superset)
        if b <= 2:
            # last level: every pixel of the remaining blocks on its own
            dr, dc = np.meshgrid(np.arange(3), np.arange(3), indexing="ij")
            rr = np.minimum(r0[:, None] + dr.ravel()[None, :], r1[:, None]).ravel()
            cc = np.minimum(c0[:, None] + dc.ravel()[None, :], c1[:, None]).ravel()
            idx = rr * nx + cc
            far_px = idx[far_at(idx)]
            pixel_far = np.zeros(ny * nx, bool)
            pixel_far[far_px] = True
            break
        corners = np.stack([r0 * nx + c0, r0 * nx + c1, r1 * nx + c0, r1 * nx + c1], axis=1)
        far = far_at(corners.ravel()).reshape(-1, 4)
        gc = gf[corners]  # (B, 4, nd)
        same = np.all(gc == gc[:, :1], axis=(1, 2))
        done = same & far.all(axis=1)
        for rs, cs, sign in ((r0, c0, 1), (r0, c1 + 1, -1), (r1 + 1, c0, -1), (r1 + 1, c1 + 1, 1)):
            np.add.at(cover, (rs[done], cs[done]), sign)
        r0, c0, r1, c1 = r0[~done], c0[~done], r1[~done], c1[~done]
        h = b // 2
        # split in four (sub-blocks that start beyond the block's far edge are dropped)
        sub_r = np.concatenate([r0, r0 + h, r0, r0 + h])
        sub_c = np.concatenate([c0, c0, c0 + h, c0 + h])
        lim_r = np.concatenate([r1, r1, r1, r1])
        lim_c = np.concatenate([c1, c1, c1, c1])
        ok = (sub_r < lim_r) & (sub_c < lim_c)
        r0, c0 = sub_r[ok], sub_c[ok]
        b = h
    covered = np.cumsum(np.cumsum(cover, axis=0), axis=1)[:ny, :nx] > 0
    if pixel_far is not None:
        covered |= pixel_far.reshape(ny, nx)
    return ~covered


def candidate_moves(n_dots: int) -> np.ndarray:
    """Moves to the states averaged over: ``0``, ``±e_i``, ``e_i − e_j`` and ``±(e_i + e_j)``, shape (K, n_dots)."""
    eye = np.eye(n_dots, dtype=np.int64)
    i, j = np.triu_indices(n_dots, 1)
    pairs = eye[i] + eye[j]
    return np.concatenate([np.zeros((1, n_dots), np.int64), basic_moves(n_dots), pairs, -pairs], axis=0)


@dataclass(frozen=True)
class Occupations:
    """Mean dot occupations of a map.

    Attributes
    ----------
    mean : ndarray, shape (..., n_dots)
        Thermal (and tunnel-coupled) expectation of N_i, electrons.
    ground : ndarray, shape (..., n_dots), int
        Ground state.
    states : StateMixture or None
        The probability of each charge state ``G + d`` at the pixels that
        are averaged (``occupations(..., with_states=True)``); the other
        pixels are in their ground state.
    """

    mean: np.ndarray
    ground: np.ndarray
    states: StateMixture | None = None


@dataclass(frozen=True)
class StateMixture:
    """Charge-state probabilities at the averaged pixels of a map.

    Attributes
    ----------
    pixels : ndarray of int, shape (P,)
        Flat indices of the averaged pixels (the others are in their ground
        state with probability 1).
    moves : ndarray of int, shape (K, n_dots)
        The states ``G + moves[k]`` (:func:`candidate_moves`; ``moves[0] = 0``).
    probability : ndarray, shape (P, K)
        Probability of state ``G + moves[k]`` at each pixel (rows sum to 1).
    """

    pixels: np.ndarray
    moves: np.ndarray
    probability: np.ndarray


def occupations(
    n0: np.ndarray,
    ec_eV: np.ndarray,
    ground: np.ndarray,
    *,
    kT_eV: float,
    tunnel_eV: float = 0.0,
    tunnel_pairs: tuple[tuple[int, int], ...] = (),
    near: np.ndarray | None = None,
    with_states: bool = False,
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
    near : ndarray of bool, shape (...), optional
        Pixels that may lie within :func:`averaging_cut` of a transition
        (:func:`near_transition_mask`); the others are taken as proven
        far and keep their ground state. Default: every pixel is tested.
    with_states : bool
        Also return the probability of each charge state at the averaged
        pixels (:class:`StateMixture`), e.g. for a sensor read-out that
        averages over the states rather than responding to ``⟨N⟩``.
    """
    shape = np.shape(n0)
    nd = shape[-1]
    g = np.asarray(ground).reshape(-1, nd)
    moves = candidate_moves(nd)

    def mixture(pix: np.ndarray, prob: np.ndarray) -> StateMixture | None:
        return StateMixture(pixels=pix, moves=moves, probability=prob) if with_states else None

    no_states = mixture(np.zeros(0, np.int64), np.zeros((0, moves.shape[0])))
    if kT_eV <= 0 and tunnel_eV <= 0:
        return Occupations(mean=g.reshape(shape).astype(float), ground=g.reshape(shape), states=no_states)
    ec = np.asarray(ec_eV, float)
    flat = np.asarray(n0, float).reshape(-1, nd)
    mf = moves.astype(float)
    # only pixels with an excited state within 30 kT (+ 40 t) need averaging:
    # exp(-30) ≈ 1e-13 of a charge is below any read-out resolution
    cut = averaging_cut(kT_eV, tunnel_eV)
    if near is None:
        cand = np.arange(g.shape[0])
    else:
        cand = np.flatnonzero(np.asarray(near, bool).reshape(-1))
    du_all = excitation_energies(g[cand], flat[cand], ec, moves[1:])
    keep = row_min(du_all) < cut
    near = cand[keep]
    mean = g.astype(float)
    if near.size == 0:
        return Occupations(mean=mean.reshape(shape), ground=g.reshape(shape), states=no_states)
    if tunnel_eV <= 0 or not tunnel_pairs:
        # classical Boltzmann average over the moves below the cut (the others
        # weigh < exp(−30) each): ⟨N⟩ = G + Σ_d w_d d / (1 + Σ_d w_d)
        sub = du_all if keep.all() else du_all[keep]
        pix, mv = np.nonzero(sub < cut)
        w = np.exp(sub[pix, mv] * (-1.0 / kT_eV))
        z = np.bincount(pix, weights=w, minlength=near.size) + 1.0
        out = g[near].astype(float)
        for i in range(nd):
            di = moves[1:, i].astype(float)[mv]
            nz = di != 0
            out[:, i] += np.bincount(pix[nz], weights=w[nz] * di[nz], minlength=near.size) / z
        mean[near] = out
        states = None
        if with_states:
            prob = np.zeros((near.size, moves.shape[0]))
            prob[:, 0] = 1.0
            prob[pix, mv + 1] = w
            states = mixture(near, prob / z[:, None])
        return Occupations(mean=mean.reshape(shape), ground=g.reshape(shape), states=states)
    du = np.zeros((near.size, moves.shape[0]))
    du[:, 1:] = du_all[keep]
    gn = g[near]
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
    prob_all = np.zeros((near.size, moves.shape[0])) if with_states else None
    if quantum.any():
        mean[near[quantum]], prob_q = _quantum_mean(
            gn[quantum], du[quantum], moves, coupled, kT_eV=kT_eV, tunnel_eV=tunnel_eV
        )
        if prob_all is not None:
            prob_all[quantum] = prob_q
    classical = ~quantum
    if kT_eV > 0 and classical.any():
        # Boltzmann weights relative to the ground state (weight 1, move 0):
        # ⟨N⟩ = G + Σ_d w_d d / (1 + Σ_d w_d); du ≥ 0 up to rounding, exp(-inf) = 0
        w = du[:, 1:] if classical.all() else du[classical][:, 1:]
        w *= -1.0 / kT_eV
        np.exp(w, out=w)
        z = w.sum(axis=1)
        z += 1.0
        if prob_all is not None:
            prob_all[classical, 0] = 1.0 / z
            prob_all[classical, 1:] = w / z[:, None]
        shift = w @ mf[1:]
        shift /= z[:, None]
        shift += gn if classical.all() else gn[classical]
        mean[near if classical.all() else near[classical]] = shift
    elif prob_all is not None and classical.any():
        prob_all[classical, 0] = 1.0  # (no temperature: the ground state)
    states = mixture(near, prob_all) if prob_all is not None else None
    return Occupations(mean=mean.reshape(shape), ground=g.reshape(shape), states=states)


def _quantum_mean(
    g: np.ndarray, du: np.ndarray, moves: np.ndarray, coupled: np.ndarray, *, kT_eV: float, tunnel_eV: float
) -> tuple[np.ndarray, np.ndarray]:
    """Thermal expectation of N in the lowest candidate states with tunnelling, and the states' probabilities.

    Returns ``(mean (P, n_dots), probability (P, K))``: the probability of each
    candidate charge state is the diagonal of the thermal density matrix in the
    charge basis.
    """
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
    full = np.zeros((g.shape[0], moves.shape[0]))
    np.put_along_axis(full, sel, prob, axis=1)
    return g + np.einsum("ps,psi->pi", prob, dn), full
