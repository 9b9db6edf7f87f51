"""Exact ground-state charge configuration of the constant-interaction model.

The energy of the charge state ``N`` (integers ≥ 0) at gate voltages ``V`` is
(conventions file, van der Wiel et al. 2003)

    U(N, V) = ½ (N − n₀)ᵀ E_C (N − n₀),   n₀ = Cdg V / e + q₀,

with ``E_C = e² Cdd⁻¹`` (eV) and ``n₀`` the continuous ("induced") charge.
Minimising ``U`` over integer ``N`` is a closest-vector problem in the lattice
ℤⁿ with the metric ``E_C``.

Algorithm
---------
1. Start from ``max(0, round(n₀))``.
2. Vectorised descent over all pixels with the moves ``±e_i`` and
   ``±(e_i − e_j)``: apply the best improving move until none improves.
3. Certificate: a lattice point is the closest one to ``n₀`` iff no
   *Voronoi-relevant* vector of the lattice improves it (Voronoi's theorem,
   see Conway & Sloane). The relevant vectors are computed once per device
   (:func:`relevant_vectors`, exact enumeration in a box that is proven large
   enough). Because ``ΔU`` of a move is affine in the pixel position for a
   fixed state, it is enough to check the certificate on the pixels where
   the state changes along x (and the first/last column): the minimum of an
   affine function over the pixels of one row that share a state is reached
   at one of that run's end pixels. Failing pixels are descended again with
   the full relevant set, and the check is repeated until it passes.

4. Maps (:func:`ground_state_rows`): along a row the induced charge moves
   on a straight line, so after solving the first column the state changes
   are located exactly by an event scan over the Voronoi-relevant moves
   (no search at interior pixels); the certificate of step 3 is then run on
   the result as a safety net. For two or more dots on linear axes the
   map is instead built from its exact cells (the lower envelope of the
   states' energy planes, one convex polygon per state; :mod:`.cells`),
   which costs per candidate state and cell rather than per row and event;
   the row scan is the fall-back.

The relevant vectors themselves are found once per device by a
Fincke–Pohst enumeration of the ellipsoid that must contain them
(:func:`_ellipsoid_points`).

Without the ``N ≥ 0`` constraint the result is therefore provably exact at
every pixel. Where the constraint is active (near full depletion) the same
descent is restricted to moves that keep ``N ≥ 0``; this is a local
certificate only, checked against brute-force enumeration in the tests.

References
----------
W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1 (constant-interaction model).
J. H. Conway and N. J. A. Sloane, "Sphere Packings, Lattices and Groups",
Springer (1999), ch. 2 and 21 (Voronoi cells, relevant vectors);
E. Agrell, T. Eriksson, A. Vardy and K. Zeger, "Closest point search in
lattices", IEEE Trans. Inf. Theory 48, 2201 (2002), doi:10.1109/TIT.2002.800499.
U. Fincke and M. Pohst, "Improved methods for calculating vectors of short
length in a lattice, including a complexity analysis", Math. Comp. 44, 463
(1985), doi:10.1090/S0025-5718-1985-0777278-8 (enumeration in an ellipsoid).
"""

from __future__ import annotations

import itertools
from functools import lru_cache
from typing import Any

import numpy as np

from ..errors import InputError
from ..physics.constants import E_AC

__all__ = [
    "induced_charge",
    "ci_energy",
    "relevant_vectors",
    "basic_moves",
    "excitation_energies",
    "ground_state",
    "ground_state_from_induced",
    "ground_state_rows",
    "certify_affine_map",
    "brute_force_ground_state",
]

_TOL = 1e-12  # eV; improvements smaller than this are ties


def induced_charge(cdg_aF: np.ndarray, voltages_V: np.ndarray, offsets_e: np.ndarray | None = None) -> np.ndarray:
    """Continuous induced charge ``n₀ = Cdg V / e + q₀`` in electrons.

    Parameters
    ----------
    cdg_aF : ndarray, shape (n_dots, n_gates)
    voltages_V : ndarray, shape (..., n_gates)
    offsets_e : ndarray, shape (n_dots,), optional

    Returns
    -------
    ndarray, shape (..., n_dots)
    """
    n0 = np.asarray(voltages_V, float) @ (np.asarray(cdg_aF, float).T / E_AC)
    if offsets_e is not None:
        n0 = n0 + np.asarray(offsets_e, float)
    return n0


def ci_energy(n: np.ndarray, n0: np.ndarray, ec_eV: np.ndarray) -> np.ndarray:
    """Constant-interaction energy ``U = ½ (N − n₀)ᵀ E_C (N − n₀)`` in eV.

    Parameters
    ----------
    n : ndarray, shape (..., n_dots)
        Charge states (integers, any dtype).
    n0 : ndarray, broadcastable to ``n``
        Induced charges, e.
    ec_eV : ndarray, shape (n_dots, n_dots)
        Charging-energy matrix ``E_C = e² Cdd⁻¹``, eV.
    """
    d = np.asarray(n, float) - np.asarray(n0, float)
    return 0.5 * np.einsum("...i,ij,...j->...", d, np.asarray(ec_eV, float), d)


def row_min(a: np.ndarray) -> np.ndarray:
    """``a.min(axis=1)``; for few columns, column by column (much faster in NumPy)."""
    if a.shape[1] > 16:  # wide rows: the contiguous reduction wins
        return a.min(axis=1)
    out = a[:, 0].copy()
    for k in range(1, a.shape[1]):
        np.minimum(out, a[:, k], out=out)
    return out


def state_keys(n: np.ndarray) -> np.ndarray:
    """One int64 key per state for states stacked along the last axis (mixed radix, states ≥ 0 or not)."""
    nd = n.shape[-1]
    cols = [n[..., i] for i in range(nd)]
    lo = [int(c.min()) for c in cols]
    span = [int(c.max()) - l + 1 for c, l in zip(cols, lo)]
    key = np.zeros(n.shape[:-1], np.int64)
    radix = 1
    for c, l, sp in zip(cols, lo, span):
        key += (c - l) * radix
        radix *= sp
    return key


def basic_moves(n_dots: int) -> np.ndarray:
    """The moves ``±e_i`` and ``e_i − e_j`` (i ≠ j), shape (2n + n(n−1), n), int."""
    eye = np.eye(n_dots, dtype=np.int64)
    moves = [eye, -eye]
    if n_dots > 1:
        i, j = np.nonzero(~np.eye(n_dots, dtype=bool))
        moves.append(eye[i] - eye[j])
    return np.concatenate(moves, axis=0)


def _ellipsoid_points(a: np.ndarray, lam: float, *, limit: float = 3e6) -> np.ndarray | None:
    """Every integer ``v`` with ``vᵀ a v ≤ lam`` (Fincke–Pohst enumeration, vectorised by level).

    With ``a = RᵀR`` (Cholesky), ``vᵀav = Σ_i R_ii² (v_i + Σ_{j>i} R_ij v_j / R_ii)²``; the
    coordinates are fixed from the last to the first, and at each level the
    admissible range of ``v_i`` follows from the norm left over. None if more
    than ``limit`` partial vectors would be needed.
    """
    n = a.shape[0]
    r = np.linalg.cholesky(a).T  # upper triangular, a = rᵀ r
    d = np.diag(r)
    mu = r / d[:, None]  # mu[i, j] = R_ij / R_ii
    pts = np.zeros((1, 0), np.int64)  # fixed coordinates i+1..n−1
    left = np.array([lam])  # norm still available
    for i in range(n - 1, -1, -1):
        centre = -(pts @ mu[i, i + 1 :]) if pts.shape[1] else np.zeros(pts.shape[0])
        half = np.sqrt(np.maximum(left, 0.0)) / d[i]
        lo = np.ceil(centre - half - 1e-9).astype(np.int64)
        hi = np.floor(centre + half + 1e-9).astype(np.int64)
        k = np.maximum(hi - lo + 1, 0)
        total = int(k.sum())
        if total > limit:
            return None
        parent = np.repeat(np.arange(pts.shape[0]), k)
        vi = np.repeat(lo, k) + (np.arange(total) - np.repeat(np.cumsum(k) - k, k))
        left = left[parent] - d[i] ** 2 * (vi - centre[parent]) ** 2
        keep = left >= -1e-9 * lam
        pts = np.concatenate([vi[keep, None], pts[parent[keep]]], axis=1)
        left = left[keep]
    return pts


@lru_cache(maxsize=64)
def _relevant_cached(ec_key: tuple[tuple[float, ...], ...]) -> np.ndarray:
    a = np.array(ec_key, float)
    n = a.shape[0]
    scale = float(np.max(np.diag(a)))
    a = a / scale
    # Upper bound of the minimum norm in each coset c + 2Z^n: the shortest
    # vector with entries in {-1, 0, 1} and parity c (3^n vectors, once).
    small = np.array(list(itertools.product((-1, 0, 1), repeat=n)), dtype=np.int64)
    small = small[np.any(small != 0, axis=1)]
    sf = small.astype(float)
    snorm = np.einsum("ki,ki->k", sf @ a, sf)
    spar = (small & 1) @ (1 << np.arange(n))
    lam_c = np.full(2**n, np.inf)
    np.minimum.at(lam_c, spar, snorm)
    lam_max = float(np.max(lam_c[1:]))
    # Every shortest coset vector lies in the ellipsoid vᵀAv ≤ λ_max; it is
    # enumerated exhaustively (a proof, not a guess).
    grid = _ellipsoid_points(a, lam_max * (1 + 1e-9) + 1e-12)
    if grid is None:
        raise InputError(
            "cdd_aF",
            "the charging-energy matrix is too ill-conditioned for the exact ground-state search "
            "(more than 3e6 candidate vectors); check the capacitances",
        )
    gf = grid.astype(float)
    norm = np.einsum("kj,kj->k", gf @ a, gf)
    parity = (grid & 1) @ (1 << np.arange(n, dtype=np.int64))
    keep = (parity > 0) & (norm <= lam_c[parity] * (1 + 1e-9) + 1e-12)
    grid, norm, parity = grid[keep], norm[keep], parity[keep]
    # per coset: the minimum norm and how many vectors reach it
    best = np.full(2**n, np.inf)
    np.minimum.at(best, parity, norm)
    tie = norm <= best[parity] * (1 + 1e-9) + 1e-15
    count = np.bincount(parity[tie], minlength=2**n)
    relevant = tie & (count[parity] == 2)  # exactly ±v: Voronoi-relevant
    vecs = np.ascontiguousarray(grid[relevant])
    vecs.setflags(write=False)
    return vecs


def relevant_vectors(ec_eV: np.ndarray) -> np.ndarray:
    """Voronoi-relevant vectors of the lattice ℤⁿ with metric ``E_C``.

    Parameters
    ----------
    ec_eV : ndarray, shape (n, n)
        Positive-definite charging-energy matrix.

    Returns
    -------
    ndarray, shape (k, n), int
        Both signs of every relevant vector (k ≤ 2(2ⁿ − 1)).

    Notes
    -----
    Voronoi's theorem: a nonzero lattice vector ``v`` is relevant iff ``±v``
    are the only shortest vectors of the coset ``v + 2ℤⁿ``. An upper bound
    ``λ`` of every coset's minimum comes from the vectors with entries in
    {−1, 0, 1}; every lattice vector with ``vᵀE_C v ≤ λ`` is then enumerated
    exhaustively (Fincke & Pohst 1985), grouped by coset, and the cosets with
    exactly two shortest vectors give the relevant ones (Conway & Sloane
    1999). Cached per matrix.
    """
    a = np.asarray(ec_eV, float)
    return _relevant_cached(tuple(tuple(float(v) for v in row) for row in a))


def excitation_energies(g: np.ndarray, n0: np.ndarray, ec: np.ndarray, moves: np.ndarray) -> np.ndarray:
    """``U(G + d) − U(G)`` for every pixel and move, shape (P, K); impossible states +inf.

    Built column by column from ``∂U/∂N_i = [E_C (G − n₀)]_i``: cheaper than
    a matrix product when the moves touch one or two dots each.

    Parameters
    ----------
    g : ndarray, shape (P, n), int
    n0 : ndarray, shape (P, n)
    ec : ndarray, shape (n, n)
    moves : ndarray, shape (K, n), int
    """
    p, nd = g.shape
    if moves.shape[0] > 24:
        # many moves (long arrays): one BLAS product is cheaper than column loops
        mf = moves.astype(float)
        du = (g - n0) @ (ec @ mf.T)
        du += 0.5 * np.einsum("ki,ij,kj->k", mf, ec, mf)
        for i in range(nd):
            neg = np.flatnonzero(moves[:, i] < 0)
            for t in np.unique(-moves[neg, i]):  # N_i below t cannot take these moves
                rows = np.flatnonzero(g[:, i] < t)
                if rows.size:
                    du[np.ix_(rows, neg[-moves[neg, i] == t])] = np.inf
        return du
    grad = np.empty((p, nd))
    diff = g - n0
    for i in range(nd):
        col = grad[:, i]
        np.multiply(diff[:, 0], ec[0, i], out=col)
        for j in range(1, nd):
            col += diff[:, j] * ec[j, i]
    mf = moves.astype(float)
    h = 0.5 * np.einsum("ki,ij,kj->k", mf, ec, mf)
    du = np.empty((p, moves.shape[0]))
    for k, d in enumerate(moves):
        nz = np.nonzero(d)[0]
        col = du[:, k]
        col.fill(h[k])
        for i in nz.tolist():
            col += d[i] * grad[:, i]
        neg = nz[d[nz] < 0]
        for i in neg:
            col[g[:, i] < -d[i]] = np.inf
    return du


def _descend(n: np.ndarray, n0: np.ndarray, ec: np.ndarray, moves: np.ndarray, *, chunk: int = 16384) -> np.ndarray:
    """Greedy descent of ``U`` with ``moves`` until no move improves; in place on ``n``."""
    mf = moves.astype(float)
    h = 0.5 * np.einsum("ki,ij,kj->k", mf, ec, mf)  # ½ dᵀ E_C d
    mt = mf.T.copy()
    sparse = bool(np.all(np.count_nonzero(moves, axis=1) <= 2))
    neg_rows = [np.nonzero(moves[:, i] < 0)[0] for i in range(moves.shape[1])]
    active = np.arange(n.shape[0])
    for _ in range(10000):
        if active.size == 0:
            break
        still = []
        for start in range(0, active.size, chunk):
            idx = active[start : start + chunk] if active.size > chunk or start else active
            nn = n[idx]
            if sparse:
                du = excitation_energies(nn, n0[idx], ec, moves)
            else:
                g = (nn - n0[idx]) @ ec  # ∂U/∂N
                du = g @ mt
                du += h
                # forbid moves leading to N < 0
                zero = nn == 0
                if zero.any():
                    for i in range(nn.shape[1]):
                        zi = zero[:, i]
                        if zi.any():
                            du[np.ix_(np.nonzero(zi)[0], neg_rows[i])] = np.inf
            k = np.argmin(du, axis=1)
            best = du[np.arange(idx.size), k]
            imp = best < -_TOL
            if imp.any():
                n[idx[imp]] += moves[k[imp]]
                still.append(idx[imp])
        active = np.concatenate(still) if still else np.empty(0, dtype=np.int64)
    return n


def ground_state_from_induced(
    n0: np.ndarray, ec_eV: np.ndarray, *, certify_rows: tuple[int, int] | None = None
) -> np.ndarray:
    """Ground state ``argmin_{N ≥ 0} U(N)`` for induced charges ``n0``.

    Parameters
    ----------
    n0 : ndarray, shape (..., n_dots)
        Induced charges, e.
    ec_eV : ndarray, shape (n_dots, n_dots)
        Charging-energy matrix, eV.
    certify_rows : (ny, nx), optional
        If the pixels form an (ny, nx) map with ``n0`` affine in the pixel
        indices, only the run ends along x are checked against the full set
        of relevant vectors (see module notes); otherwise every pixel is.

    Returns
    -------
    ndarray, shape (..., n_dots), int64
    """
    n0 = np.asarray(n0, float)
    shape = n0.shape
    nd = shape[-1]
    ec = np.asarray(ec_eV, float)
    flat = n0.reshape(-1, nd)
    n = np.maximum(np.rint(flat), 0).astype(np.int64)
    _descend(n, flat, ec, basic_moves(nd))
    rel = relevant_vectors(ec)
    if certify_rows is not None:
        ny, nx = certify_rows
        grid = flat.reshape(ny, nx, nd)
        step = grid[0, 1] - grid[0, 0] if nx > 1 else np.zeros(nd)
        if np.allclose(grid - grid[:, :1], np.arange(nx)[None, :, None] * step, atol=1e-9 * (1 + np.abs(grid).max())):
            return certify_affine_map(n.reshape(ny, nx, nd), grid[:, 0], step, ec).reshape(shape)
    # certificate at every pixel
    for _ in range(100):
        before = n.copy()
        _descend(n, flat, ec, rel)
        if np.array_equal(before, n):
            break
    return n.reshape(shape)


def ground_state_rows(
    n0_first: np.ndarray, step: np.ndarray, nx: int, ec_eV: np.ndarray, *, certify: bool = True
) -> np.ndarray:
    """Exact ground states of a map whose induced charge is affine along each row.

    Row ``r``, pixel ``k`` has ``n₀ = n0_first[r] + k · step``. The first
    column is solved by :func:`ground_state_from_induced`; each row is then
    scanned: for the current state ``G`` the energy change of every move ``d``
    is affine in ``k``, so the position where the first move becomes
    favourable is computed exactly, the state jumps to ``G + d`` there
    (crossing a facet of the Voronoi cell enters the neighbour's cell), and so
    on to the end of the row. All rows advance together; the cost is
    O(rows × events × moves) plus one cumulative sum over the map, instead of
    a search at every pixel.

    With every Voronoi-relevant vector as a move the scan is exact by
    itself; that is done when they are few (≤ 3 dots). Otherwise the scan
    starts with the moves ``±e_i``, ``e_i − e_j``; the certificate
    (:func:`certify_affine_map`) then names any relevant move that improves
    a pixel, it is added to the move set and the map is scanned again, until
    the certificate passes.

    Parameters
    ----------
    n0_first : ndarray, shape (ny, n)
        Induced charges of the first column.
    step : ndarray, shape (n,)
        Change of ``n₀`` from one column to the next.
    nx : int
        Number of columns.
    ec_eV : ndarray, shape (n, n)
    certify : bool
        Run the certificate even when the scan used every relevant vector.

    Returns
    -------
    ndarray, shape (ny, nx, n), int64
    """
    n0_first = np.asarray(n0_first, float)
    step = np.asarray(step, float)
    ec = np.asarray(ec_eV, float)
    nd = n0_first.shape[1]
    first = ground_state_from_induced(n0_first, ec)
    rel = relevant_vectors(ec)
    basic = basic_moves(nd)
    complete = rel.shape[0] <= basic.shape[0] + 2 * nd
    moves = rel if complete else basic
    for _ in range(20):
        out = _scan_rows(first, n0_first, step, nx, ec, moves)
        if complete and not certify:
            return out
        bad_moves = _certificate_failures(out, n0_first, step, ec, rel)
        if bad_moves.shape[0] == 0:
            return out
        known = {tuple(m) for m in moves.tolist()}
        extra = [m for m in bad_moves.tolist() if tuple(m) not in known]
        if not extra:
            break
        extra_arr = np.array(extra, np.int64)
        moves = np.unique(np.concatenate([moves, extra_arr, -extra_arr]), axis=0)
    return certify_affine_map(out, n0_first, step, ec)


def _scan_rows(
    first: np.ndarray, n0_first: np.ndarray, step: np.ndarray, nx: int, ec: np.ndarray, moves: np.ndarray
) -> np.ndarray:
    """Event scan along x of every row with the given move set (see :func:`ground_state_rows`)."""
    ny, nd = n0_first.shape
    mv = moves
    mv_e = moves.astype(float) @ ec  # (K, n)
    h = 0.5 * np.einsum("kj,kj->k", mv_e, moves.astype(float))
    slope = -(mv_e @ step)  # dΔU/dk, (K,)
    falling = slope < 0
    # crossing position = t + ΔU / rate for falling moves; a move that does not
    # fall is taken at once if it already improves (repairs a wrong turn), never otherwise
    rate = np.where(falling, 1.0 / np.where(falling, -slope, 1.0), 0.0)
    need = -mv.min(axis=0)  # N_i below this may go negative
    mv_et = np.ascontiguousarray(mv_e.T)
    delta = np.zeros((ny, nx, nd), np.int64)
    delta[:, 0] = first
    t = np.zeros(ny)
    rows = np.arange(ny)
    cur = first.copy()
    for _ in range(4 * nx * max(1, nd) + 100):
        if rows.size == 0:
            break
        gc = cur[rows]
        tr = t[rows]
        du = (gc - n0_first[rows] - tr[:, None] * step) @ mv_et
        du += h
        improving = du < -_TOL
        np.maximum(du, 0.0, out=du)
        du *= rate
        du[:, ~falling] = np.inf
        du[improving] = 0.0
        du += tr[:, None]  # crossing position of every move
        low = np.nonzero(np.any(gc < need, axis=1))[0]
        if low.size:
            bad = (gc[low][:, None, :] + mv[None, :, :] < 0).any(axis=-1)
            sub = du[low]
            sub[bad] = np.inf
            du[low] = sub
        k = np.argmin(du, axis=1)
        tc = du[np.arange(rows.size), k]
        go = tc < nx - 1
        if not go.any():
            break
        r = rows[go]
        kk = k[go]
        pix = np.floor(tc[go]).astype(np.int64) + 1
        np.add.at(delta, (r, pix), mv[kk])
        cur[r] += mv[kk]
        t[r] = tc[go]
        rows = r
    return np.cumsum(delta, axis=1)


def _state_keys(n: np.ndarray) -> np.ndarray:
    """One int64 key per state (mixed radix) for states stacked along the last axis."""
    axes = tuple(range(n.ndim - 1))
    lo = n.min(axis=axes)
    span = n.max(axis=axes) - lo + 1
    radix = np.concatenate([[1], np.cumprod(span[:-1])]).astype(np.int64)
    return (n - lo) @ radix


def _check_pixels(g: np.ndarray, n0_first: np.ndarray) -> np.ndarray:
    """Pixels (flat indices) whose check proves the whole map (see :func:`certify_affine_map`)."""
    from scipy.spatial import ConvexHull, QhullError

    ny, nx, nd = g.shape
    edge = np.zeros((ny, nx), bool)
    edge[:, 0] = edge[:, -1] = True
    diff = np.any(g[:, 1:] != g[:, :-1], axis=-1)
    edge[:, 1:] |= diff
    edge[:, :-1] |= diff
    idx = np.nonzero(edge.ravel())[0]
    plane = ny < 3 or bool(
        np.allclose(np.diff(n0_first, 2, axis=0), 0.0, atol=1e-9 * (1 + np.abs(n0_first).max()))
    )
    if not plane:
        return idx
    flat = g.reshape(-1, nd)
    keys = _state_keys(flat[idx])
    order = np.argsort(keys, kind="stable")
    ks = keys[order]
    starts = np.concatenate([[0], np.nonzero(np.diff(ks))[0] + 1, [ks.size]])
    check = []
    for a, b in zip(starts[:-1], starts[1:]):
        grp = idx[order[a:b]]
        if grp.size > 8:
            pts = np.stack([grp // nx, grp % nx], axis=1).astype(float)
            try:
                grp = grp[ConvexHull(pts).vertices]
            except (QhullError, ValueError):
                pass  # degenerate (collinear) set: keep every run end
        check.append(grp)
    return np.concatenate(check)


def _certificate_failures(
    g: np.ndarray, n0_first: np.ndarray, step: np.ndarray, ec: np.ndarray, rel: np.ndarray
) -> np.ndarray:
    """Relevant moves that improve some check pixel (empty: the map is certified)."""
    ny, nx, nd = g.shape
    idx = _check_pixels(g, n0_first)
    n = g.reshape(-1, nd)[idx]
    n0 = n0_first[idx // nx] + (idx % nx)[:, None] * step
    relf = rel.astype(float)
    du = (n - n0) @ (ec @ relf.T) + 0.5 * np.einsum("kj,kj->k", relf @ ec, relf)
    low = np.nonzero(np.any(n < -rel.min(axis=0), axis=1))[0]  # only these can leave N ≥ 0
    if low.size:
        sub = du[low]
        sub[(n[low][:, None, :] + rel[None, :, :] < 0).any(axis=-1)] = np.inf
        du[low] = sub
    k = np.argmin(du, axis=1)
    fail = du[np.arange(idx.size), k] < -_TOL
    return np.unique(rel[k[fail]], axis=0) if fail.any() else np.zeros((0, nd), np.int64)


def certify_affine_map(g: np.ndarray, n0_first: np.ndarray, step: np.ndarray, ec: np.ndarray) -> np.ndarray:
    """Certificate of a candidate ground-state map, corrected until it passes.

    The map has ``n₀ = n0_first[row] + column · step``. If ``n0_first`` is
    affine in the row index too (a plane sweep), ``ΔU_d(p)`` of every move
    ``d`` is affine in the pixel position p for a fixed state ``N``; its
    minimum over the pixels holding ``N`` is then reached at a vertex of
    their convex hull, which is the hull of the run ends along x. Checking
    the Voronoi-relevant moves at those vertices proves every pixel
    (Voronoi's theorem). Otherwise every run end is checked (affine along
    each row). States that fail are searched again at every pixel they hold,
    and the check repeats.

    Parameters
    ----------
    g : ndarray, shape (ny, nx, n), int
        Candidate ground states.
    n0_first : ndarray, shape (ny, n)
    step : ndarray, shape (n,)
    ec : ndarray, shape (n, n)

    Returns
    -------
    ndarray, shape (ny, nx, n), int64
    """
    ny, nx, nd = g.shape
    rel = relevant_vectors(ec)
    n = g.reshape(-1, nd).copy()

    def n0_at(idx: np.ndarray) -> np.ndarray:
        return n0_first[idx // nx] + (idx % nx)[:, None] * step

    for _ in range(50):
        idx = _check_pixels(n.reshape(ny, nx, nd), n0_first)
        sub = n[idx].copy()
        before = sub.copy()
        _descend(sub, n0_at(idx), ec, rel)
        changed = np.any(sub != before, axis=1)
        if not changed.any():
            break
        bad_states = np.unique(before[changed], axis=0)
        redo = np.zeros(n.shape[0], bool)
        for st in bad_states:
            redo |= np.all(n == st, axis=1)
        ridx = np.nonzero(redo)[0]
        sub2 = n[ridx]
        _descend(sub2, n0_at(ridx), ec, rel)
        n[ridx] = sub2
    return n.reshape(ny, nx, nd)


def ground_state(
    device_or_cdg: Any,
    *args: Any,
    offsets_e: np.ndarray | None = None,
) -> np.ndarray:
    """Ground-state charge configuration at each voltage point.

    Call as ``ground_state(device, voltages_V)`` with a
    :class:`~stabtool.simulate.Device` (its offset charges are used), or as
    ``ground_state(cdg_aF, cdd_aF, voltages_V, offsets_e=None)``.

    Parameters
    ----------
    device_or_cdg : Device or ndarray, shape (n_dots, n_gates)
    voltages_V : ndarray, shape (..., n_gates)
        Gate voltages, V (all gates of the device, in its gate order).

    Returns
    -------
    ndarray, shape (..., n_dots), int64
        ``argmin_{N ≥ 0} U(N, V)``.
    """
    if hasattr(device_or_cdg, "cdg") and hasattr(device_or_cdg, "cdd"):
        if len(args) != 1:
            raise TypeError("ground_state(device, voltages_V)")
        cdg, cdd, voltages_V = device_or_cdg.cdg, device_or_cdg.cdd, args[0]
        if offsets_e is None:
            offsets_e = device_or_cdg.offsets
    else:
        if len(args) != 2:
            raise TypeError("ground_state(cdg_aF, cdd_aF, voltages_V)")
        cdg, (cdd, voltages_V) = device_or_cdg, args
    ec = E_AC * np.linalg.inv(np.asarray(cdd, float))
    n0 = induced_charge(cdg, voltages_V, offsets_e)
    v = np.asarray(voltages_V)
    cert = (v.shape[0], v.shape[1]) if v.ndim == 3 else None
    return ground_state_from_induced(n0, ec, certify_rows=cert)


def brute_force_ground_state(
    n0: np.ndarray,
    ec_eV: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    *,
    chunk: int = 4096,
) -> np.ndarray:
    """Reference: enumerate every state with ``lower ≤ N ≤ upper`` (inclusive).

    Parameters
    ----------
    n0 : ndarray, shape (..., n_dots)
    ec_eV : ndarray, shape (n_dots, n_dots)
    lower, upper : array_like of int, shape (n_dots,)

    Returns
    -------
    ndarray, shape (..., n_dots), int64
    """
    n0 = np.asarray(n0, float)
    shape = n0.shape
    nd = shape[-1]
    ec = np.asarray(ec_eV, float)
    axes = [np.arange(int(lo), int(hi) + 1) for lo, hi in zip(lower, upper)]
    states = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, nd)
    sf = states.astype(float)
    h = 0.5 * np.einsum("ki,ij,kj->k", sf, ec, sf)
    flat = n0.reshape(-1, nd)
    out = np.empty(flat.shape, dtype=np.int64)
    lin = (flat @ ec)  # U = ½NᵀEN − Nᵀ E n0 + const
    for s in range(0, flat.shape[0], chunk):
        e = h[None, :] - lin[s : s + chunk] @ sf.T
        out[s : s + chunk] = states[np.argmin(e, axis=1)]
    return out.reshape(shape)
