"""Ground-state cells of a plane sweep: exact polygons, then pixels.

In a sweep of two gates on linear axes the induced charge is affine in the
pixel position ``p = (u, w)`` (u = column, w = row, both continuous):
``n₀(p) = n₀₀ + u·s_x + w·s_y``. For a fixed charge state ``N`` and a move
``v`` the energy change

    ΔU_v(N; p) = U(N + v, p) − U(N, p) = ½ vᵀE_C v + vᵀE_C (N − n₀(p))

is therefore affine in ``p``, and the region where ``N`` is the ground state,
``{p : U(N, p) ≤ U(N', p) for all N' ≥ 0}``, is an intersection of
half-planes: a convex polygon (its *cell*). The map is a tiling of the
window by such cells, so it is found without visiting the pixels:

1. the ground state at one corner pixel is found by the pixel-wise search
   of :mod:`.ground_state` (descent plus Voronoi certificate);
2. the cell of a state ``N`` is the window rectangle clipped by the
   half-planes ``ΔU_v(N; p) ≥ 0`` for every Voronoi-relevant vector ``v``
   with ``N + v ≥ 0`` (Voronoi's theorem: they decide whether ``N`` is the
   closest lattice point; constraints that hold at the four window corners
   hold in the whole window, by convexity, and are skipped; the rest are
   applied most-violated first until every remaining one holds at every
   vertex of the polygon, which proves it holds on the polygon);
3. each edge of a cell that comes from a move ``v`` is shared with the cell
   of ``N + v`` (crossing a facet of a Voronoi cell enters the neighbour's
   cell), so a breadth-first walk from the corner's state visits every cell
   that meets the window;
4. the cell areas must add up to the window area (otherwise the result is
   rejected and the caller falls back to the row scan); then every pixel
   row is cut at the cells' chords (exact intersections of the row with
   the polygon edges) and filled.

The cost scales with the number of cells, not with the number of pixels or
with the size of a brute-force window of states. Where the constraint
``N ≥ 0`` is active (near full depletion) step 2 uses the relevant vectors
that keep ``N + v ≥ 0``, the same local rule as the row scan; both are
checked against brute-force enumeration in the tests.

References
----------
W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1 (constant-interaction model).
J. H. Conway and N. J. A. Sloane, "Sphere Packings, Lattices and Groups",
Springer (1999), ch. 2 and 21 (Voronoi cells, relevant vectors).
I. E. Sutherland and G. W. Hodgman, "Reentrant polygon clipping",
Commun. ACM 17, 32 (1974), doi:10.1145/360767.360802 (polygon clipping).
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass

import numpy as np

from .ground_state import _TOL, relevant_vectors

__all__ = ["PlaneCells", "plane_cells", "rasterize_cells", "ground_state_plane"]

_EDGE = -1  # label of a window edge
_PER_ROUND = 6  # constraints clipped per vectorised check


@dataclass(frozen=True)
class PlaneCells:
    """Ground-state cells of a plane sweep, in pixel coordinates.

    Attributes
    ----------
    states : ndarray, shape (S, n_dots), int64
        The charge state of each cell.
    polygons : tuple of ndarray, each shape (k, 2)
        Cell vertices ``(u, w)`` (column, row; continuous pixel indices),
        counter-clockwise.
    neighbours : tuple of (int, int)
        Pairs of cell indices that share an edge of positive length.
    shape : (ny, nx)
    """

    states: np.ndarray
    polygons: tuple[np.ndarray, ...]
    neighbours: tuple[tuple[int, int], ...]
    shape: tuple[int, int]


def _clip(poly: list[tuple[float, float, int]], vals: list[float], label: int) -> list[tuple[float, float, int]]:
    """Sutherland–Hodgman step: keep the part of a convex polygon where ``vals ≥ 0``.

    ``poly`` holds (u, w, label of the edge leaving this vertex); ``vals`` the
    constraint at each vertex (affine, so the crossing is interpolated).
    """
    out: list[tuple[float, float, int]] = []
    k = len(poly)
    for i in range(k):
        pu, pw, pl = poly[i]
        qu, qw, _ = poly[(i + 1) % k]
        vp, vq = vals[i], vals[(i + 1) % k]
        inp, inq = vp >= 0.0, vq >= 0.0
        if inp:
            out.append((pu, pw, pl))
            if not inq:
                t = vp / (vp - vq)
                out.append((pu + t * (qu - pu), pw + t * (qw - pw), label))
        elif inq:
            t = vp / (vp - vq)
            out.append((pu + t * (qu - pu), pw + t * (qw - pw), pl))
    return out


def _seed_state(n0: np.ndarray, ec: np.ndarray, rel: np.ndarray, ev: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Ground state at one point: descent with every relevant vector (Voronoi: exact when it stops)."""
    n = np.maximum(np.rint(n0), 0).astype(np.int64)
    for _ in range(10000):
        du = h + (n - n0) @ ev.T
        du[np.any(n + rel < 0, axis=1)] = np.inf
        j = int(np.argmin(du))
        if du[j] >= -_TOL:
            break
        n = n + rel[j]
    return n


def plane_cells(
    n0_00: np.ndarray, step_u: np.ndarray, step_w: np.ndarray, shape: tuple[int, int], ec_eV: np.ndarray
) -> PlaneCells | None:
    """Exact ground-state cells of a plane sweep (see module notes).

    Parameters
    ----------
    n0_00 : ndarray, shape (n,)
        Induced charge at pixel (row 0, column 0), e.
    step_u, step_w : ndarray, shape (n,)
        Change of the induced charge per column and per row.
    shape : (ny, nx)
    ec_eV : ndarray, shape (n, n)

    Returns
    -------
    PlaneCells or None
        None when the cells do not tile the window (the caller must fall back
        to another method).
    """
    ny, nx = (int(v) for v in shape)
    ec = np.asarray(ec_eV, float)
    n0_00 = np.asarray(n0_00, float)
    rel = relevant_vectors(ec)
    relf = rel.astype(float)
    ev = relf @ ec  # (K, n)
    h = 0.5 * np.einsum("kj,kj->k", ev, relf)
    bu, bw = -(ev @ np.asarray(step_u, float)), -(ev @ np.asarray(step_w, float))
    bvec = np.stack([bu, bw])  # (2, K)
    umax, wmax = float(nx - 1), float(ny - 1)
    corners = np.array([[0.0, 0.0], [umax, 0.0], [umax, wmax], [0.0, wmax]])
    corner_lin = corners[:, :1] * bu + corners[:, 1:] * bw  # (4, K)
    evt = ev.T.copy()
    need = -rel.min(axis=0)
    window_area = umax * wmax
    tol = _TOL

    seed = _seed_state(n0_00, ec, rel, ev, h)
    index: dict[tuple[int, ...], int] = {tuple(seed.tolist()): 0}
    states = [seed]
    polys: list[np.ndarray] = []
    edges: set[tuple[int, int]] = set()
    queue = deque([0])
    total = 0.0
    max_cells = 4 * (nx + ny) * (nx + ny) + 64
    # moves that formed cell edges so far: tried first (cheap), then every
    # remaining constraint is checked at the vertices
    valid_cache: dict[tuple[int, ...], np.ndarray] = {}
    where = {tuple(v): k for k, v in enumerate(rel.tolist())}
    opposite = np.array([where[tuple((-v).tolist())] for v in rel], np.int64)  # index of −v
    entry: dict[int, int] = {}  # cell → constraint of the facet it was entered through
    learned = np.zeros(rel.shape[0], bool)
    learned[np.count_nonzero(rel, axis=1) <= 2] = True
    while queue:
        ci = queue.popleft()
        n = states[ci]
        a = h + (n - n0_00) @ evt  # ΔU_v at pixel (0, 0), (K,)
        at_corners = a + corner_lin
        active = at_corners.min(axis=0) < -tol
        if np.any(n < need):
            key = tuple(np.minimum(n, need).tolist())
            ok = valid_cache.get(key)
            if ok is None:
                ok = valid_cache[key] = ~np.any(n + rel < 0, axis=1)
            active &= ok
        poly: list[tuple[float, float, int]] = [(0.0, 0.0, _EDGE), (umax, 0.0, _EDGE), (umax, wmax, _EDGE), (0.0, wmax, _EDGE)]
        pts = corners
        back = entry.get(ci)
        if back is not None and active[back]:
            # the facet shared with the cell it was found from is a true edge: cut it first
            aj, uj, wj = float(a[back]), float(bu[back]), float(bw[back])
            poly = _clip(poly, [aj + uj * p[0] + wj * p[1] for p in poly], back)
            pts = np.array([(p[0], p[1]) for p in poly]) if len(poly) >= 3 else corners
        for subset in (active & learned, active):
            sel = np.flatnonzero(subset)
            if sel.size == 0 or len(poly) < 3:
                continue
            a_s, b_s = a[sel], bvec[:, sel]
            for _ in range(sel.size + 1):
                mins = (pts @ b_s).min(axis=0)
                mins += a_s
                bad = np.flatnonzero(mins < -tol)
                if bad.size == 0:
                    break
                if bad.size > _PER_ROUND:  # the most violated few, clipped in turn
                    bad = bad[np.argpartition(mins[bad], _PER_ROUND - 1)[:_PER_ROUND]]
                for j in bad[np.argsort(mins[bad])].tolist():
                    k_ = int(sel[j])
                    aj, uj, wj = float(a[k_]), float(bu[k_]), float(bw[k_])
                    vals = [aj + uj * p[0] + wj * p[1] for p in poly]
                    if min(vals) >= -tol:
                        continue  # already cut away by an earlier clip of this round
                    learned[k_] = True
                    poly = _clip(poly, vals, k_)
                    if len(poly) < 3:
                        break
                if len(poly) < 3:
                    break
                pts = np.array([(p[0], p[1]) for p in poly])
        if len(poly) < 3:
            polys.append(np.zeros((0, 2)))
            continue
        polys.append(np.array([(p[0], p[1]) for p in poly]))
        k = len(poly)
        area = 0.0
        for i in range(k):
            pu_i, pw_i, lab = poly[i]
            qu, qw, _ = poly[(i + 1) % k]
            area += pu_i * qw - qu * pw_i  # shoelace
            if lab == _EDGE:
                continue
            du, dw = qu - pu_i, qw - pw_i
            if du * du + dw * dw < 1e-18:
                continue
            nb = tuple((n + rel[lab]).tolist())
            nj = index.get(nb)
            if nj is None:
                nj = len(states)
                index[nb] = nj
                states.append(np.array(nb, np.int64))
                queue.append(nj)
                entry[nj] = opposite[lab]
                if nj > max_cells:
                    return None
            edges.add((min(ci, nj), max(ci, nj)))
        total += 0.5 * abs(area)
    if not abs(total - window_area) <= 1e-7 * max(window_area, 1.0):
        return None
    return PlaneCells(
        states=np.array(states, np.int64).reshape(len(states), -1),
        polygons=tuple(polys),
        neighbours=tuple(sorted(edges)),
        shape=(ny, nx),
    )


def rasterize_cells(cells: PlaneCells) -> np.ndarray | None:
    """Ground state at every pixel from the cells, shape (ny, nx, n_dots); None if a row is not covered.

    Each cell cuts every pixel row it meets in one chord ``[u_lo, u_hi]``
    (exact intersections with its edges); the first pixel of the chord is
    marked with the cell and the marks are carried along the row.
    """
    ny, nx = cells.shape
    eps = 1e-9  # pixels; a pixel this close to a boundary is a tie
    keep = [i for i, p in enumerate(cells.polygons) if p.shape[0] >= 3]
    if not keep:
        return None
    kmax = max(cells.polygons[i].shape[0] for i in keep)
    # pad every polygon to kmax vertices by repeating its last vertex (zero-length edges)
    poly = np.empty((len(keep), kmax, 2))
    for r, i in enumerate(keep):
        p = cells.polygons[i]
        poly[r, : p.shape[0]] = p
        poly[r, p.shape[0] :] = p[-1]
    w0 = np.maximum(np.ceil(poly[:, :, 1].min(axis=1) - eps), 0).astype(np.int64)
    w1 = np.minimum(np.floor(poly[:, :, 1].max(axis=1) + eps), ny - 1).astype(np.int64)
    count = np.maximum(w1 - w0 + 1, 0)
    owner = np.repeat(np.arange(len(keep)), count)  # one entry per (cell, row)
    rows = (np.arange(owner.size) - np.repeat(np.cumsum(count) - count, count) + w0[owner]).astype(float)
    p = poly[owner]  # (R, kmax, 2)
    q = np.roll(p, -1, axis=1)
    dw = q[..., 1] - p[..., 1]
    slant = np.abs(dw) > 1e-300
    t = np.clip((rows[:, None] - p[..., 1]) / np.where(slant, dw, 1.0), 0.0, 1.0)
    u = p[..., 0] + t * (q[..., 0] - p[..., 0])
    hit = (rows[:, None] >= np.minimum(p[..., 1], q[..., 1]) - eps) & (
        rows[:, None] <= np.maximum(p[..., 1], q[..., 1]) + eps
    )
    u_lo = np.where(slant, u, np.minimum(p[..., 0], q[..., 0]))  # horizontal edges: both ends
    u_hi = np.where(slant, u, np.maximum(p[..., 0], q[..., 0]))
    left = np.min(np.where(hit, u_lo, np.inf), axis=1)
    right = np.max(np.where(hit, u_hi, -np.inf), axis=1)
    c0 = np.maximum(np.ceil(left - eps), 0)
    c1 = np.minimum(np.floor(right + eps), nx - 1)
    ok = c0 <= c1
    mark = np.full((ny, nx), -1, np.int64)
    mark[rows[ok].astype(np.int64), c0[ok].astype(np.int64)] = np.asarray(keep)[owner[ok]]
    if np.any(mark[:, 0] < 0):
        return None
    pos = np.where(mark >= 0, np.arange(nx)[None, :], 0)
    np.maximum.accumulate(pos, axis=1, out=pos)
    label = np.take_along_axis(mark, pos, axis=1)
    return cells.states[label]


def ground_state_plane(
    n0_00: np.ndarray, step_u: np.ndarray, step_w: np.ndarray, shape: tuple[int, int], ec_eV: np.ndarray
) -> np.ndarray | None:
    """Ground states of a plane sweep from its cells, shape (ny, nx, n); None if the cells fail."""
    cells = plane_cells(n0_00, step_u, step_w, shape, ec_eV)
    if cells is None:
        return None
    return rasterize_cells(cells)
