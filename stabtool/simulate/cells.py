"""Ground-state cells of a plane sweep: the lower envelope of energy planes.

In a sweep of two gates on linear axes the induced charge is affine in the
pixel position ``p = (u, w)`` (u = column, w = row, both continuous):
``n₀(p) = n₀₀ + u·s_u + w·s_w``. Up to a term common to every state, the
energy of the charge state ``N`` is then a plane over the pixel plane,

    U_N(u, w) = c_N − u·a_N − w·b_N,
    c_N = ½ NᵀE_C N − NᵀE_C n₀₀,  a_N = NᵀE_C s_u,  b_N = NᵀE_C s_w,

and the ground-state map is the lower envelope of these planes: a tiling of
the window by convex polygons (the *cells*), one per state. It is found
without visiting the pixels:

1. candidates: the exact ground states at the four window corners (greedy
   descent with every Voronoi-relevant vector, exact when it stops) and
   every state of the box they span, when it is small (else the ground
   states on a 9 × 9 grid of the window);
2. envelope: the halfspaces ``z ≤ U_N(u, w)``, the window edges and a floor
   bound a 3-D convex polytope whose upper facets are the cells. It is
   computed as the convex hull of the polar-dual points (Qhull, the run of
   ``scipy.spatial.ConvexHull`` without its area/volume pass, :func:`_hull`;
   Barber et al. 1996): each hull facet is a
   vertex of the polytope and names the planes that meet there. Candidates
   that own no cell are dropped (adding states only lowers the envelope);
3. certificate: at every vertex of every cell, no Voronoi-relevant move
   ``v`` (with ``N + v ≥ 0``) lowers the energy. ``ΔU_v(N; p)`` is affine in
   ``p``, so it then holds on the whole cell, and by Voronoi's theorem (a
   lattice point is the closest one iff no relevant vector improves it) the
   cell's state is the true ground state on all of it. The minimum over the
   cell's bounding box rules out most moves at once; the rest are evaluated
   at the vertices. A vertex that fails gives a better state (descent from
   ``N + v`` there), which joins the candidates, and steps 2–3 repeat until
   every vertex passes;
4. the pixels: every pixel row is cut where it crosses the cells' left
   edges and filled run by run (:func:`_labels`).

The cost scales with the number of candidates and cells, not with the
number of pixels times states. Where the constraint ``N ≥ 0`` is active
(near full depletion) the certificate uses the relevant vectors that keep
``N + v ≥ 0``, the same local rule as the row scan of :mod:`.ground_state`;
both are checked against brute-force enumeration in the tests.

Ties: a pixel that lies on a cell boundary (within 1e-7 pixel) is decided by
its energies; states within ``_TOL`` of the lowest count as degenerate, and
the lexicographically smallest of them is taken (the first one in the
enumeration order of :func:`~.ground_state.brute_force_ground_state`).

References
----------
W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1 (constant-interaction model).
J. H. Conway and N. J. A. Sloane, "Sphere Packings, Lattices and Groups",
Springer (1999), ch. 2 and 21 (Voronoi cells, relevant vectors).
C. B. Barber, D. P. Dobkin and H. Huhdanpaa, "The Quickhull algorithm for
convex hulls", ACM Trans. Math. Softw. 22, 469 (1996),
doi:10.1145/235815.235821 (Qhull, halfspace intersection).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from itertools import pairwise
from typing import Any

import numpy as np

from .ground_state import _TOL, relevant_vectors

__all__ = ["PlaneCells", "plane_cells", "rasterize_cells", "ground_state_plane"]

_BOX_MAX = 4096  # candidate box (states) handed to Qhull in one go
_ROUNDS = 40  # certificate rounds before giving up (the caller falls back)
_GRID = 9  # seed grid (per axis) when the corner box is too large
_EPS_ROW = 1e-9  # pixels: a vertex this close to a row lies on it
_EPS_TIE = 1e-7  # pixels: a pixel this close to a cell boundary is decided by its energies
_BLAS_ONE_THREAD = 200_000  # m·n·k below which OpenBLAS runs a product on one thread


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
    planes : ndarray, shape (S, 3)
        ``(c, a, b)`` of each cell's energy ``U = c − u·a − w·b`` (eV, up to a
        constant common to all states).
    """

    states: np.ndarray
    polygons: tuple[np.ndarray, ...]
    neighbours: tuple[tuple[int, int], ...]
    shape: tuple[int, int]
    planes: np.ndarray = field(default_factory=lambda: np.zeros((0, 3)))


@dataclass(frozen=True)
class _Setup:
    """Per-device constants of the certificate (relevant vectors and their energies)."""

    rel: np.ndarray  # (K, n) int
    ev: np.ndarray  # (K, n): E_C v for every relevant v
    evt: np.ndarray  # (n, K): the same, as columns
    h: np.ndarray  # (K,): ½ vᵀE_C v
    need: np.ndarray  # (n,): N_i below this may leave N ≥ 0 with some v
    below: np.ndarray  # (n, max need + 1, K) bool: [i, t] = move k takes N_i = t below zero


@lru_cache(maxsize=32)
def _setup_cached(key: bytes, n: int) -> _Setup:
    ec = np.frombuffer(key, dtype=float).reshape(n, n)
    rel = relevant_vectors(ec)
    relf = rel.astype(float)
    ev = relf @ ec
    need = np.maximum(-rel.min(axis=0), 0)
    t = np.arange(int(need.max()) + 1)
    below = rel.T[:, None, :] + t[None, :, None] < 0  # (n, t, K); False for t ≥ need_i
    return _Setup(rel, ev, np.ascontiguousarray(ev.T), 0.5 * np.einsum("kj,kj->k", ev, relf), need, below)


def _setup(ec: np.ndarray) -> _Setup:
    ec = np.ascontiguousarray(ec, dtype=float)
    return _setup_cached(ec.tobytes(), ec.shape[0])


def _invalid_moves(states: np.ndarray, st: _Setup) -> np.ndarray | None:
    """(S, K) bool: move k would take state s below zero (None if no state is that low)."""
    low = states < st.need
    if not low.any():
        return None
    cols = np.flatnonzero(low.any(axis=0))  # only these coordinates can go below zero
    t = np.minimum(states[:, cols], st.need[cols])
    return st.below[cols, t].any(axis=1)


def _matmul(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a @ b`` in row blocks small enough for a single BLAS thread.

    A threaded product of this size gains little and, on a loaded machine,
    can wait milliseconds for its worker threads.
    """
    rows = max(1, _BLAS_ONE_THREAD // max(1, a.shape[1] * b.shape[1]))
    if a.shape[0] <= rows:
        return a @ b
    out = np.empty((a.shape[0], b.shape[1]))
    for s in range(0, a.shape[0], rows):
        np.matmul(a[s : s + rows], b, out=out[s : s + rows])
    return out


def _descend_points(n: np.ndarray, n0: np.ndarray, st: _Setup) -> np.ndarray:
    """Greedy descent with every relevant vector, in place (exact ground state when it stops)."""
    for _ in range(10000):
        du = _matmul(n - n0, st.evt)
        du += st.h
        bad = _invalid_moves(n, st)
        if bad is not None:
            du[bad] = np.inf
        k = np.argmin(du, axis=1)
        imp = du[np.arange(k.size), k] < -_TOL
        if not imp.any():
            break
        n[imp] += st.rel[k[imp]]
    return n


def _planes(states: np.ndarray, n0_00: np.ndarray, su: np.ndarray, sw: np.ndarray, ec: np.ndarray) -> np.ndarray:
    """``(c, a, b)`` of ``U_N = c − u·a − w·b`` for every state, shape (S, 3)."""
    sf = states.astype(float)
    es = sf @ ec
    out = es @ np.stack([-n0_00, su, sw], axis=1)
    out[:, 0] += 0.5 * np.einsum("ki,ki->k", es, sf)
    return out


def _energy_at(planes: np.ndarray, uv: np.ndarray) -> np.ndarray:
    """Energy of every plane at every point, shape (S, P)."""
    pts = np.empty((3, uv.shape[0]))
    pts[0] = 1.0
    pts[1] = -uv[:, 0]
    pts[2] = -uv[:, 1]
    return _matmul(planes, pts)


def _hull(points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Triangulated convex hull of 3-D points: (simplices (F, 3), equations (F, 4)), one Qhull call.

    The same Qhull run as ``scipy.spatial.ConvexHull(points, qhull_options="Qt")``
    without the hull's area and volume (a further pass over the facets that
    is not needed here); falls back to ``ConvexHull`` if SciPy's internal
    interface differs.
    """
    from scipy.spatial import ConvexHull

    points = np.ascontiguousarray(points, dtype=float)
    try:
        from scipy.spatial._qhull import _Qhull
    except ImportError:
        _Qhull = None
    if _Qhull is not None:
        try:
            qh = _Qhull(b"i", points, b"Qt", required_options=b"Qt")
        except TypeError:
            pass
        else:
            try:
                qh.triangulate()
                simp, _, eq, _, _ = qh.get_simplex_facet_array()
            finally:
                qh.close()
            return simp, eq
    hull = ConvexHull(points, qhull_options="Qt")
    return hull.simplices, hull.equations


def _envelope(planes: np.ndarray, shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Vertices of the lower envelope of ``planes`` over the window.

    Returns
    -------
    (uv, vertex, cell) or None
        ``uv`` (V, 2) vertex positions in pixels; ``vertex``, ``cell`` (P,):
        one entry per (vertex, cell whose plane passes through it). None if
        Qhull fails.

    Notes
    -----
    The halfspaces ``z ≤ U_N(u, w)``, the window and a floor below the
    envelope bound a convex polytope. By polar duality about an interior
    point ``x₀`` each halfspace ``Aᵢx ≤ gᵢ`` becomes the point
    ``Aᵢ / (gᵢ − Aᵢx₀)``, and each facet ``n·p + d = 0`` of the convex hull of
    these points becomes the vertex ``x₀ − n/d`` where the facet's halfspaces
    meet (the construction behind Qhull's halfspace intersection).
    """
    from scipy.spatial import QhullError

    ny, nx = shape
    umax, wmax = float(nx - 1), float(ny - 1)
    m = planes.shape[0]
    # halfspaces A x ≤ g with x = (s, t, z), s = u/umax, t = w/wmax: the planes
    # z ≤ c − a s − b t taken relative to the first plane (a plane common to all
    # states does not move the envelope) and scaled to O(1) for Qhull, then the
    # window 0 ≤ s, t ≤ 1 and a floor below the envelope
    rows = planes - planes[0]
    rows *= np.array([1.0, umax, wmax])
    scale = float(np.abs(rows).max())
    if scale > 0:
        rows /= scale
    cc, ra, rb = rows[:, 0], rows[:, 1], rows[:, 2]
    low = float((cc - np.maximum(ra, 0.0) - np.maximum(rb, 0.0)).min()) - 1.0  # below every corner
    mid = cc - 0.5 * (ra + rb)  # the planes at the window centre
    x0 = np.array([0.5, 0.5, 0.5 * (float(mid.min()) + low)])  # inside
    # the dual points Aᵢ / (gᵢ − Aᵢx₀): planes (a, b, 1), window edges (∓1, 0, 0), (0, ∓1, 0), floor (0, 0, −1)
    inv = 1.0 / (mid - x0[2])
    dual = np.empty((m + 5, 3))
    np.multiply(rows[:, 1:], inv[:, None], out=dual[:m, :2])
    dual[:m, 2] = inv
    dual[m:] = [[-2.0, 0, 0], [2.0, 0, 0], [0, -2.0, 0], [0, 2.0, 0], [0, 0, -1.0 / (x0[2] - low)]]
    try:
        simp, eq = _hull(dual)
    except (QhullError, ValueError):
        return None
    if np.any(eq[:, 3] >= 0):
        return None
    top = simp.max(axis=1) != m + 4  # not on the floor (the floor has the largest index)
    simp, eq = simp[top], eq[top]
    st = x0[:2] - eq[:, :2] / eq[:, 3:]
    np.clip(st, 0.0, 1.0, out=st)
    edge = simp >= m  # on a window edge: put the vertex exactly there
    if edge.any():
        r, c = np.nonzero(edge)
        j = simp[r, c] - m
        st[r, j // 2] = (j % 2).astype(float)
    st *= np.array([umax, wmax])
    flat = simp.ravel()
    keep = flat < m
    return st, np.repeat(np.arange(simp.shape[0]), 3)[keep], flat[keep]


def _box(corner: np.ndarray) -> np.ndarray | None:
    """Every state between the element-wise min and max of ``corner`` (lexicographic order), or None if large."""
    lo, hi = corner.min(axis=0), corner.max(axis=0)
    span = hi - lo + 1
    if float(np.prod(span.astype(float))) > _BOX_MAX:
        return None
    total = int(np.prod(span))
    out = np.empty((total, corner.shape[1]), np.int64)
    inner = total
    for i, (a, k) in enumerate(zip(lo.tolist(), span.tolist())):
        inner //= k  # states per step of coordinate i (the later coordinates run faster)
        out.reshape(total // (inner * k), k, inner, -1)[:, :, :, i] = np.arange(a, a + k)[:, None]
    return out


def _polygons(uv: np.ndarray, vid: np.ndarray, cid: np.ndarray, n_cells: int) -> tuple[np.ndarray, np.ndarray]:
    """Cell vertices sorted counter-clockwise: (points (P, 2), start offsets (S + 1,))."""
    p = uv[vid]
    cnt = np.bincount(cid, minlength=n_cells)
    inv = 1.0 / np.maximum(cnt, 1)
    cu = np.bincount(cid, weights=p[:, 0], minlength=n_cells) * inv
    cw = np.bincount(cid, weights=p[:, 1], minlength=n_cells) * inv
    ang = np.arctan2(p[:, 1] - cw[cid], p[:, 0] - cu[cid])
    order = np.argsort(cid * 8.0 + ang)  # angle in (−π, π]: cells stay apart
    return p[order], np.concatenate([[0], np.cumsum(cnt)])


def _certificate_failures(
    states: np.ndarray, pts: np.ndarray, starts: np.ndarray, sweep: tuple[np.ndarray, np.ndarray, np.ndarray],
    st: _Setup,
) -> np.ndarray:
    """Better states found at the cell vertices that fail the Voronoi test, shape (F, n) (F = 0: certified).

    ``ΔU_v(N; p) = α − u·β − w·γ`` with ``α = ½vᵀE_Cv + vᵀE_C(N − n₀₀)``,
    ``β = vᵀE_C s_u``, ``γ = vᵀE_C s_w``. Its minimum over a cell's bounding
    box rules most moves out at once; the rest are evaluated at the vertices.
    """
    n0_00, su, sw = sweep
    m, nd = states.shape
    cnt = np.diff(starts)
    beta, gamma = st.ev @ su, st.ev @ sw
    # [N − n₀₀, −u_max, −u_min, −w_max, −w_min, 1] · [E_C v; β⁺; β⁻; γ⁺; γ⁻; ½vᵀE_Cv] = min of ΔU over the box
    lhs = np.empty((m, nd + 5))
    np.subtract(states, n0_00, out=lhs[:, :nd])
    lhs[:, nd] = np.maximum.reduceat(pts[:, 0], starts[:-1])
    lhs[:, nd + 1] = np.minimum.reduceat(pts[:, 0], starts[:-1])
    lhs[:, nd + 2] = np.maximum.reduceat(pts[:, 1], starts[:-1])
    lhs[:, nd + 3] = np.minimum.reduceat(pts[:, 1], starts[:-1])
    lhs[:, nd : nd + 4] *= -1.0
    lhs[:, nd + 4] = 1.0
    rhs = np.concatenate(
        [st.evt, np.maximum(beta, 0)[None], np.minimum(beta, 0)[None], np.maximum(gamma, 0)[None],
         np.minimum(gamma, 0)[None], st.h[None]]
    )
    flat = np.flatnonzero(_matmul(lhs, rhs) < -_TOL)
    if flat.size == 0:
        return np.zeros((0, nd), np.int64)
    ci, vi = np.divmod(flat, rhs.shape[1])
    kmax = int(cnt.max())
    vidx = starts[:-1, None] + np.minimum(np.arange(kmax)[None, :], cnt[:, None] - 1)  # padded with the last vertex
    alpha = (_matmul(lhs[:, :nd], st.evt) + st.h).ravel()[flat]
    pu, pw = pts[vidx, 0][ci], pts[vidx, 1][ci]  # (F, kmax)
    vals = alpha[:, None] - pu * beta[vi][:, None] - pw * gamma[vi][:, None]
    fail = np.flatnonzero((vals < -_TOL).any(axis=1))
    if fail.size:
        fail = fail[(states[ci[fail]] + st.rel[vi[fail]]).min(axis=1) >= 0]  # moves that keep N + v ≥ 0
    if fail.size == 0:
        return np.zeros((0, nd), np.int64)
    j = np.argmin(vals[fail], axis=1)
    p_u, p_w = pu[fail, j], pw[fail, j]
    better = states[ci[fail]] + st.rel[vi[fail]]
    return _descend_points(better, n0_00 + p_u[:, None] * su + p_w[:, None] * sw, st)


def _solve(
    n0_00: np.ndarray, step_u: np.ndarray, step_w: np.ndarray, shape: tuple[int, int], ec: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None:
    """Certified envelope: (states, planes, polygon points, polygon starts) of the cells, or None."""
    ny, nx = shape
    st = _setup(ec)
    corners = np.array([[0.0, 0.0], [nx - 1.0, 0.0], [0.0, ny - 1.0], [nx - 1.0, ny - 1.0]])
    n0c = n0_00 + corners[:, :1] * step_u + corners[:, 1:] * step_w
    seed = _descend_points(np.maximum(np.rint(n0c), 0).astype(np.int64), n0c, st)
    box = _box(seed)
    if box is None:
        # many states: start from the ground states on a grid; the rounds below add the rest
        g = np.linspace(0.0, 1.0, _GRID)
        grid = np.stack(np.meshgrid(g * (nx - 1), g * (ny - 1)), axis=-1).reshape(-1, 2)
        n0g = n0_00 + grid[:, :1] * step_u + grid[:, 1:] * step_w
        states = np.unique(_descend_points(np.maximum(np.rint(n0g), 0).astype(np.int64), n0g, st), axis=0)
        planes = _planes(states, n0_00, step_u, step_w, ec)
    else:
        states = box
        planes = _planes(box, n0_00, step_u, step_w, ec)
    for _ in range(_ROUNDS):
        env = _envelope(planes, shape)
        if env is None:
            return None
        uv, vid, cid = env
        # keep the states that own a cell: a state above the envelope stays above it
        present = np.zeros(states.shape[0], bool)
        present[cid] = True
        used = np.flatnonzero(present)
        cid = (np.cumsum(present) - 1)[cid]  # renumbered among the used states (as np.unique's inverse)
        states, planes = states[used], planes[used]
        pts, starts = _polygons(uv, vid, cid, used.size)
        better = _certificate_failures(states, pts, starts, (n0_00, step_u, step_w), st)
        if better.shape[0] == 0:
            return states, planes, pts, starts
        known = {tuple(s) for s in states.tolist()}
        new = [s for s in {tuple(b) for b in better.tolist()} if s not in known]
        if not new:
            return None  # a better state is already a candidate: the envelope is inaccurate
        new_arr = np.array(sorted(new), np.int64)
        states = np.concatenate([states, new_arr])
        planes = np.concatenate([planes, _planes(new_arr, n0_00, step_u, step_w, ec)])
    return None


def _lexicographic_rank(states: np.ndarray) -> np.ndarray:
    order = np.lexsort(states.T[::-1])
    rank = np.empty(order.size, np.int64)
    rank[order] = np.arange(order.size)
    return rank


def _by_energy(planes: np.ndarray, rank: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Cell index of the lowest energy at the given pixels (ties: lexicographically smallest state)."""
    e = planes[:, 0] - cols[:, None] * planes[:, 1] - rows[:, None] * planes[:, 2]
    tie = e <= e.min(axis=1, keepdims=True) + _TOL
    return np.argmin(np.where(tie, rank, rank.size), axis=1)


def _labels(
    pts: np.ndarray, starts: np.ndarray, planes: np.ndarray, rank: np.ndarray, shape: tuple[int, int]
) -> np.ndarray:
    """Cell index of every pixel, shape (ny·nx,), from the counter-clockwise cell polygons.

    Along a pixel row the cells' chords tile the window, so pixel ``c`` belongs
    to the cell whose chord starts last at or before ``c``. The chord starts
    are the crossings of the row with the cells' left edges (counter-clockwise:
    the edges that go down); each marks its first pixel, the latest start wins
    a pixel marked twice, and the row is filled run by run. Pixels on a
    boundary (a start within ``_EPS_TIE`` of the pixel, two starts that close
    to each other, or a horizontal edge on the row) are decided by energy.
    """
    ny, nx = shape
    n_cells = starts.size - 1
    cnt = np.diff(starts)
    cell_of = np.repeat(np.arange(n_cells), cnt)
    nxt = np.arange(pts.shape[0]) + 1
    nz = cnt > 0
    nxt[starts[1:][nz] - 1] = starts[:-1][nz]  # closing edge of each polygon
    pu, pw = pts[:, 0], pts[:, 1]
    qu, qw = pu[nxt], pw[nxt]
    dw = qw - pw
    e = np.flatnonzero(dw < -1e-12)  # left edges
    lo = np.maximum(np.ceil(qw[e] - _EPS_ROW), 0).astype(np.int64)
    hi = np.minimum(np.floor(pw[e] + _EPS_ROW), ny - 1).astype(np.int64)
    k = np.maximum(hi - lo + 1, 0)
    row = np.arange(int(k.sum())) + np.repeat(lo - (np.cumsum(k) - k), k)
    # per crossing: the edge's (w_start, Δw, u_start, Δu, cell), one repeat for all
    per = np.repeat(np.stack([pw[e], dw[e], pu[e], qu[e] - pu[e], cell_of[e]]), k, axis=1)
    t = (row - per[0]) / per[1]
    np.maximum(t, 0.0, out=t)
    np.minimum(t, 1.0, out=t)
    start = per[2] + t * per[3]
    col = np.maximum(np.ceil(start - _EPS_TIE), 0).astype(np.int64)
    cell = per[4].astype(np.int64)
    inside = col < nx
    if not inside.all():
        row, col, start, cell = row[inside], col[inside], start[inside], cell[inside]
    # every row must begin with a chord at column 0; rows that do not are decided by energy
    row_ok = np.zeros(ny, bool)
    row_ok[row[col == 0]] = True
    key = row * nx + col
    # sort by pixel, then by start (start − col + 1 lies in [0, 1 + ε); starts this close are flagged below)
    # (stable: a merge sort that runs fast on the presorted runs of the edges, one run per edge)
    order = np.argsort(key * 4.0 + (start - col + 1.0), kind="stable")
    key, start, cell = key[order], start[order], cell[order]
    last = np.ones(key.size, bool)
    last[:-1] = key[1:] != key[:-1]
    close = np.zeros(key.size, bool)  # two cells start within _EPS_TIE of each other
    close[1:] = ~last[:-1] & (start[1:] - start[:-1] < _EPS_TIE)
    on_pixel = (start != 0.0) & (np.abs(start - np.rint(start)) < _EPS_TIE)
    fix = [key[last & (close | on_pixel)]]
    key, cell = key[last], cell[last]
    # (nearly) horizontal edges lying on a row, other than the window's own edges
    flat_h = np.flatnonzero((np.abs(dw) <= 1e-6) & ~((pw == qw) & ((pw == 0.0) | (pw == ny - 1.0))))
    if flat_h.size:
        wr = np.rint(pw[flat_h])
        on_row = (np.abs(pw[flat_h] - wr) < _EPS_TIE) & (np.abs(qw[flat_h] - wr) < _EPS_TIE) & (wr >= 0) & (wr < ny)
        for j in np.flatnonzero(on_row):
            i = flat_h[j]
            c0 = max(int(np.floor(min(pu[i], qu[i]))), 0)
            c1 = min(int(np.ceil(max(pu[i], qu[i]))), nx - 1)
            fix.append(int(wr[j]) * nx + np.arange(c0, c1 + 1))
    if not row_ok.all():
        bad = np.flatnonzero(~row_ok)
        keep = row_ok[key // nx]
        key = np.concatenate([key[keep], bad * nx])
        cell = np.concatenate([cell[keep], np.zeros(bad.size, np.int64)])
        order = np.argsort(key, kind="stable")
        key, cell = key[order], cell[order]
        fix.append((bad[:, None] * nx + np.arange(nx)).ravel())
    lengths = np.diff(np.append(key, ny * nx))
    label = np.repeat(cell, lengths)
    pix = np.unique(np.concatenate(fix)) if len(fix) > 1 else fix[0]
    if pix.size:
        label[pix] = _by_energy(planes, rank, (pix // nx).astype(float), (pix % nx).astype(float))
    return label


def _neighbours(pts: np.ndarray, starts: np.ndarray) -> tuple[tuple[int, int], ...]:
    """Pairs of cells that share two distinct vertices (an edge of positive length)."""
    cell = np.repeat(np.arange(starts.size - 1), np.diff(starts))
    _, vkey = np.unique(np.round(pts * 1e7), axis=0, return_inverse=True)
    by_vertex: dict[int, set[int]] = {}
    for v, c in zip(vkey.ravel().tolist(), cell.tolist()):
        by_vertex.setdefault(v, set()).add(c)
    count: dict[tuple[int, int], int] = {}
    for cs in by_vertex.values():
        srt = sorted(cs)
        for i in range(len(srt)):
            for j in range(i + 1, len(srt)):
                count[(srt[i], srt[j])] = count.get((srt[i], srt[j]), 0) + 1
    return tuple(sorted(k for k, c in count.items() if c >= 2))


def _solve_plane(n0_00: Any, step_u: Any, step_w: Any, shape: tuple[int, int], ec_eV: Any) -> Any:
    """:func:`_solve` on float arrays; None for maps under 2 × 2 pixels or when it fails."""
    ny, nx = shape
    if ny < 2 or nx < 2:
        return None
    return _solve(np.asarray(n0_00, float), np.asarray(step_u, float), np.asarray(step_w, float), (ny, nx),
                  np.asarray(ec_eV, float))


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
        At least 2 × 2 pixels.
    ec_eV : ndarray, shape (n, n)

    Returns
    -------
    PlaneCells or None
        None when the envelope cannot be certified (the caller must fall back
        to another method).
    """
    ny, nx = (int(v) for v in shape)
    res = _solve_plane(n0_00, step_u, step_w, (ny, nx), ec_eV)
    if res is None:
        return None
    states, planes, pts, starts = res
    polys = tuple(pts[a:b].copy() for a, b in pairwise(starts.tolist()))
    return PlaneCells(states=states, polygons=polys, neighbours=_neighbours(pts, starts), shape=(ny, nx), planes=planes)


def rasterize_cells(cells: PlaneCells) -> np.ndarray | None:
    """Ground state at every pixel from the cells, shape (ny, nx, n_dots).

    Each cell cuts every pixel row it meets in one chord; the rows are
    filled chord by chord (:func:`_labels`). Pixels within 1e-7 pixel of a
    chord end are decided by their energies (ties: the lexicographically
    smallest state). Returns None if the cells carry no energy planes
    (``planes``) for their states.
    """
    ny, nx = cells.shape
    if cells.planes.shape[0] != cells.states.shape[0]:
        return None
    cnt = np.array([p.shape[0] if p.shape[0] >= 3 else 0 for p in cells.polygons], np.int64)
    pts = np.concatenate([p for p in cells.polygons if p.shape[0] >= 3] or [np.zeros((0, 2))])
    starts = np.concatenate([[0], np.cumsum(cnt)])
    label = _labels(pts, starts, cells.planes, _lexicographic_rank(cells.states), (ny, nx))
    if label.size != ny * nx:
        return None
    return np.take(cells.states, label, axis=0).reshape(ny, nx, -1)


def ground_state_plane(
    n0_00: np.ndarray, step_u: np.ndarray, step_w: np.ndarray, shape: tuple[int, int], ec_eV: np.ndarray
) -> np.ndarray | None:
    """Ground states of a plane sweep from its cells, shape (ny, nx, n); None if the cells fail."""
    ny, nx = (int(v) for v in shape)
    res = _solve_plane(n0_00, step_u, step_w, (ny, nx), ec_eV)
    if res is None:
        return None
    states, planes, pts, starts = res
    label = _labels(pts, starts, planes, _lexicographic_rank(states), (ny, nx))
    if label.size != ny * nx:
        return None
    return np.take(states, label, axis=0).reshape(ny, nx, -1)
