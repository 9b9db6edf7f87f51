"""Gate capacitances from the lattice of triple points in a double-dot transport map.

In a transport map of a series double dot at small source–drain bias current
flows only at the triple points (spots), at larger bias inside small bias
triangles. The spots form a 2-D lattice; its translations ``A`` (one more
electron on dot1) and ``B`` (one more on dot2) give
``Cdg = e [A B]⁻¹`` without any energy scale
(:func:`stabtool.physics.triple_points.cdg_from_lattice`). When the two
triple points of a vertex pair are resolved, the pair vector also fixes the
virtual-gate matrix, the addition voltages and the mutual shifts
(:func:`stabtool.physics.triple_points.diagram_from_pair`).

Notes
-----
1. Spots (:mod:`stabtool.fit.transport_spots`): the current is oriented (its sign follows the bias), row and
   column medians are removed (slow-axis offsets; the map is mostly empty),
   the map is smoothed (Gaussian, σ = 1 pixel) and thresholded at
   ``median + 5 σ_s`` with ``σ_s`` the robust (MAD) spread of the smoothed
   map itself, or at a tenth of the median spot peak if that is higher (on
   a clean map the faint tails would join the two points of a pair).
   Connected regions (touching the border: dropped) are the spots; their
   positions are current-weighted centroids (weights: smoothed current
   above the threshold), in volts. A bias triangle is one region (or two
   for an electron/hole pair); its weighted centroid is a lattice point
   like a spot's, since the CI pattern repeats exactly under ``A`` and ``B``.
   When the lattice fit is doubtful, it is repeated on the map without
   isolated one-pixel outliers (> 6 robust σ, no neighbour above 3 σ:
   spikes) and that result is kept if it is better.
2. Pairs: the shortest frequent nearest-neighbour vector ``d`` is an
   electron/hole pair vector when it joins ≥ 60 % of the spots in disjoint,
   non-chaining pairs, is at most half the shortest lattice vector and its
   lattice coordinates fit the honeycomb (step 5); the lattice is then
   searched on the pair midpoints.
3. Lattice search: difference vectors to the nearest neighbours are
   clustered; every pair of frequent vectors is tried as a cell
   (fractional coordinates clustered on the torus); of the cells that put
   ≥ 50 % of the spots within 0.12 cell of the site and are at least half
   occupied, the one explaining the most spots wins (among near-equals the
   most densely occupied, then the smallest). The rest are outliers
   (spikes, stray spots).
4. Least squares: ``P = O + n A + m B + s p`` (``s`` = 0 electron, 1 hole
   point) for x and y separately, with outlier rejection (5 robust σ); the
   covariance of ``(A, B, p)`` comes from the residual scatter (at least
   half a pixel per point: the sampling of small spots gives errors
   correlated along the lattice) and is propagated to every reported
   number by a numerical Jacobian.
5. Basis: the lattice is reduced (Lagrange–Gauss) and all unimodular
   integer combinations with coefficients up to ±4 are tried. Every basis
   ``(r1 + k r2, r2)`` of positive rows is again positive, so positivity
   alone never selects one; the bases kept have all four elements
   positive, ``det Cdg > 0`` (dot1 = the steeper lines) and each gate
   coupled more to its own dot than the other dot is (``C11 > C21``,
   ``C22 > C12``; common practice, no source: a plunger couples most to its
   own dot). Exactly one: ok; several (common when cross-capacitances
   exceed about a third of the direct ones): the one with the smallest
   ``max(C21/C11, C12/C22)`` is reported, doubtful; none: doubtful. A
   lever-arm matrix given by the caller (e.g. from bias triangles) decides
   instead: the basis whose ``Cdd = Cdg α⁻¹`` is symmetric.
6. Pair: the pair vector ``p`` (oriented so that its lattice coordinates
   ``c`` satisfy ``c1, c2 > 0``, ``c1 + c2 < 1``) gives ``M``, ``ΔV`` and
   ``δ``; without resolved pairs they are not determined (None). From
   current spots this ``M`` carries a bias beyond its stated error (the
   current between the two points of a pair pulls their centroids
   together), so it has its own verdict (``pair_quality``), doubtful.

References
----------
W. G. van der Wiel, S. De Franceschi, J. M. Elzerman, T. Fujisawa,
S. Tarucha and L. P. Kouwenhoven, "Electron transport through double quantum
dots", Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1.
J. L. Lagrange (1773) / C. F. Gauss (1801), reduction of binary quadratic
forms (2-D lattice reduction; from memory).
"""

from __future__ import annotations

import itertools
from collections.abc import Callable
from dataclasses import dataclass, field, replace

import numpy as np
import xarray as xr

from ..errors import InputError
from ..physics.constants import E_AC
from ..physics.triple_points import cdg_from_lattice, diagram_from_pair
from ..quality import Quality
from .model import MAX_CDG_REL_ERROR
from .transport_spots import THRESHOLD_SIGMAS, TransportSpots, _axes, _spots, find_transport_spots
from .uncertainty import propagate

__all__ = ["TransportLattice", "TransportSpots", "find_transport_spots", "fit_lattice_points", "fit_transport_lattice"]

_NAN = float("nan")
#: largest relative asymmetry of Cdg α⁻¹ accepted when a lever-arm matrix picks the basis
LEVER_ARM_ASYMMETRY = 0.1
#: smallest position error of a spot, in pixels (sampling of small spots; correlated along the lattice)
PIXEL_FLOOR = 0.5
#: a site explains a spot within this fraction of the cell (each lattice coordinate)
SITE_TOLERANCE = 0.12
#: fraction of the spots a lattice must explain (the rest: spikes, stray spots)
MIN_EXPLAINED = 0.5
#: fewest distinct cells for an ok verdict
MIN_CELLS = 4
#: the pair is resolved when each lattice coordinate of p exceeds this many standard errors
PAIR_SIGMAS = 5.0


@dataclass(frozen=True)
class TransportLattice:
    """Result of :func:`fit_transport_lattice`.

    Attributes
    ----------
    points_V : ndarray, shape (n, 2)
        Spots used as lattice points (x, y), V (outliers excluded).
    labels : ndarray, shape (n, 3), int
        ``(n_A, n_B, site)`` of each point in the physical basis.
    basis_V : ndarray, shape (2, 2)
        Rows ``A`` and ``B`` (x, y components), V.
    basis_V_error : ndarray, shape (2, 2)
    cdg_aF, cdg_aF_error : ndarray, shape (2, 2)
        Gate capacitances, rows dots, columns gates (x, y), aF; one standard error.
    pair_resolved : bool
        Two triple points per cell were found.
    pair_V, pair_V_error : ndarray, shape (2,)
        Electron → hole vector ``p`` (NaN when not resolved).
    vg_matrix, vg_matrix_error : ndarray (2, 2) or None
        Virtual-gate matrix (conventions) when the pair fixes it.
    addition_V, addition_V_error, mutual_V, mutual_V_error : ndarray (2,) or None
        ``(ΔV1, ΔV2)`` and ``(δ1, δ2)``, V, when determined.
    position_scatter_V : ndarray, shape (2,)
        Residual standard deviation of the points (x, y), V.
    n_cells : int
        Distinct cells holding a point.
    n_outliers : int
        Spots not explained by the lattice.
    consistent : bool
        The lattice explains the spots: at least ``MIN_CELLS`` cells, at most
        a quarter of the spots (or 2) off it, scatter under 5 % of a cell.
        Without it the capacitances are not worth printing.
    quality : Quality
        Verdict on the gate capacitances (and the lattice).
    pair_quality : Quality
        Verdict on the pair-derived numbers (``vg_matrix``, ``addition_V``, ``mutual_V``).
    """

    points_V: np.ndarray
    labels: np.ndarray
    basis_V: np.ndarray
    basis_V_error: np.ndarray
    cdg_aF: np.ndarray
    cdg_aF_error: np.ndarray
    pair_resolved: bool = False
    pair_V: np.ndarray = field(default_factory=lambda: np.full(2, _NAN))
    pair_V_error: np.ndarray = field(default_factory=lambda: np.full(2, _NAN))
    vg_matrix: np.ndarray | None = None
    vg_matrix_error: np.ndarray | None = None
    addition_V: np.ndarray | None = None
    addition_V_error: np.ndarray | None = None
    mutual_V: np.ndarray | None = None
    mutual_V_error: np.ndarray | None = None
    position_scatter_V: np.ndarray = field(default_factory=lambda: np.full(2, _NAN))
    n_cells: int = 0
    n_outliers: int = 0
    consistent: bool = False
    quality: Quality = field(default_factory=Quality)
    pair_quality: Quality = field(default_factory=Quality)

    def __bool__(self) -> bool:
        return bool(np.all(np.isfinite(self.cdg_aF)))


def _failed(points: np.ndarray, reason: str, q: Quality | None = None) -> TransportLattice:
    nan2 = np.full((2, 2), _NAN)
    qq = (q or Quality()).with_warning(reason)
    return TransportLattice(points_V=points, labels=np.zeros((0, 3), int), basis_V=nan2, basis_V_error=nan2,
                            cdg_aF=nan2, cdg_aF_error=nan2, quality=qq)


# ----------------------------------------------------------------------------- lattice search
def _canonical(d: np.ndarray) -> np.ndarray:
    flip = (d[:, 0] < 0) | ((d[:, 0] == 0) & (d[:, 1] < 0))
    return np.where(flip[:, None], -d, d)


def _candidates(q: np.ndarray, k: int = 8) -> list[tuple[np.ndarray, int]]:
    """Frequent nearest-neighbour difference vectors (normalised coordinates), with support."""
    n = q.shape[0]
    d = q[None, :, :] - q[:, None, :]
    dist = np.hypot(d[..., 0], d[..., 1])
    np.fill_diagonal(dist, np.inf)
    kk = min(k, n - 1)
    nn = np.argsort(dist, axis=1)[:, :kk]
    vecs = _canonical(d[np.arange(n)[:, None], nn].reshape(-1, 2))
    vecs = vecs[np.argsort(np.hypot(vecs[:, 0], vecs[:, 1]))]
    clusters: list[list[np.ndarray]] = []
    means: list[np.ndarray] = []
    for v in vecs:
        for i, m in enumerate(means):
            if np.hypot(*(v - m)) < 0.2 * np.hypot(*m):
                clusters[i].append(v)
                means[i] = np.mean(clusters[i], axis=0)
                break
        else:
            clusters.append([v])
            means.append(v.copy())
    out = [(m, len(c)) for m, c in zip(means, clusters) if len(c) >= max(2, int(0.1 * n))]
    out.sort(key=lambda t: -t[1])
    return out[:12]


def _wrap(f: np.ndarray) -> np.ndarray:
    return f - np.round(f)


def _sites(frac: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cluster fractional coordinates on the torus into ``k`` sites: (sites, assignment, residual)."""

    def circ_mean(f: np.ndarray) -> np.ndarray:
        ang = 2 * np.pi * f
        return np.arctan2(np.sin(ang).mean(axis=0), np.cos(ang).mean(axis=0)) / (2 * np.pi)

    sites = circ_mean(frac)[None, :]
    if k == 2:
        r0 = np.max(np.abs(_wrap(frac - sites[0])), axis=1)
        sites = np.vstack([sites[0], frac[int(np.argmax(r0))]])
    assign = np.zeros(frac.shape[0], int)
    for _ in range(8):
        res = np.stack([np.max(np.abs(_wrap(frac - s)), axis=1) for s in sites])
        assign = np.argmin(res, axis=0)
        new = []
        for j in range(len(sites)):
            sel = assign == j
            if not sel.any():
                return sites, assign, np.full(frac.shape[0], np.inf)
            # robust: centre on the current site, average the wrapped offsets of the near members
            off = _wrap(frac[sel] - sites[j])
            near = np.max(np.abs(off), axis=1) < 2 * SITE_TOLERANCE
            new.append(sites[j] + (off[near].mean(axis=0) if near.any() else 0.0))
        sites = np.array(new)
    res = np.stack([np.max(np.abs(_wrap(frac - s)), axis=1) for s in sites])
    assign = np.argmin(res, axis=0)
    return sites, assign, res[assign, np.arange(frac.shape[0])]


@dataclass(frozen=True)
class _Cell:
    basis: np.ndarray  # rows u, v (normalised coordinates)
    sites: np.ndarray
    assign: np.ndarray
    inlier: np.ndarray
    labels: np.ndarray  # (n, 2) integer cell labels


def _hull_area(q: np.ndarray) -> float:
    from scipy.spatial import ConvexHull, QhullError

    try:
        return float(ConvexHull(q).volume)
    except (QhullError, ValueError):
        return 0.0


def _pairs(q: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Resolved electron/hole pairs: a short difference vector ``d`` joining disjoint pairs of spots.

    Returns ``(d, first, second)`` (indices of the paired spots, ``q[second] ≈ q[first] + d``) when
    at least 60 % of the spots are paired and the pairs do not chain (a chain P, P + d, P + 2d means
    ``d`` is a lattice translation), else None.
    """
    cands = _candidates(q)
    if not cands:
        return None
    d = min(cands, key=lambda t: np.hypot(*t[0]))[0]
    tol = 0.3 * np.hypot(*d)
    n = q.shape[0]
    dist = np.hypot(*(q[None, :, :] - (q[:, None, :] + d)).transpose(2, 0, 1))  # [i, j]: |q_j − q_i − d|
    first, second = [], []
    used = np.zeros(n, bool)
    for i in np.argsort(dist.min(axis=1)):
        j = int(np.argmin(dist[i]))
        if dist[i, j] < tol and not used[i] and not used[j] and i != j:
            first.append(int(i))
            second.append(j)
            used[i] = used[j] = True
    if 2 * len(first) < 0.6 * n or len(first) < 2:
        return None
    ends = np.zeros(n, bool)
    ends[second] = True
    chained = sum(1 for i in range(n) if ends[i] and dist[i].min() < tol)  # a pair end that starts another
    if chained > 0.2 * len(first):
        return None
    return d, np.array(first), np.array(second)


def _search(q: np.ndarray) -> _Cell | None:
    """The cell (one site) explaining most spots; spikes and other stray spots are outliers."""
    cands = _candidates(q)
    n = q.shape[0]
    trials = []
    for (u, _), (v, _) in itertools.combinations(cands, 2):
        area = abs(u[0] * v[1] - u[1] * v[0])
        if area < 0.2 * np.hypot(*u) * np.hypot(*v):
            continue  # nearly parallel
        trials.append((area, u, v))
    trials.sort(key=lambda t: t[0])
    need = max(4, int(np.ceil(MIN_EXPLAINED * n)))
    accepted: list[tuple[int, float, float, _Cell]] = []
    for area, u, v in trials:
        basis = np.array([u, v])
        frac = np.linalg.solve(basis.T, (q - q[0]).T).T
        sites, assign, res = _sites(frac, 1)
        inl = res < SITE_TOLERANCE
        if inl.sum() < need:
            continue
        cells = np.round(frac - sites[assign]).astype(int)
        n_cells = len({tuple(c) for c in cells[inl]})
        expected = _hull_area(q[inl]) / area  # cells in the hull of the explained spots, about
        if n_cells < 0.5 * expected - 2:
            continue  # a cell too small for the spots: most of its sites would be empty
        occupancy = inl.sum() / max(expected, 1.0)
        accepted.append((int(inl.sum()), float(occupancy), float(area), _Cell(basis, sites, assign, inl, cells)))
    if not accepted:
        return None
    # most spots explained; among near-equals (≥ 95 % of the best count) the densest occupied
    # cells (a cell with empty sites overfits), then the smallest
    top = max(a[0] for a in accepted)
    near = [a for a in accepted if a[0] >= 0.95 * top]
    occ = max(a[1] for a in near)
    dense = [a for a in near if a[1] >= 0.85 * occ]
    return min(dense, key=lambda a: a[2])[3]


def _in_honeycomb(c: np.ndarray) -> bool:
    """Lattice coordinates of a pair vector (modulo the lattice) inside ``c1, c2 > 0, c1 + c2 < 1``."""
    cc = c - np.floor(c)
    return bool(cc[0] > 0 and cc[1] > 0 and cc[0] + cc[1] < 1)


def _two_sites(q: np.ndarray, cell: _Cell, origin: np.ndarray, d: np.ndarray) -> _Cell:
    """Labels of every spot in a cell found on pair midpoints: sites at ``∓ d/2`` about the midpoint site."""
    frac = np.linalg.solve(cell.basis.T, (q - origin).T).T
    half = 0.5 * np.linalg.solve(cell.basis.T, d)
    sites = np.array([cell.sites[0] - half, cell.sites[0] + half])
    res = np.stack([np.max(np.abs(_wrap(frac - s)), axis=1) for s in sites])
    assign = np.argmin(res, axis=0)
    r = res[assign, np.arange(len(q))]
    labels = np.round(frac - sites[assign]).astype(int)
    return _Cell(cell.basis, sites, assign, r < SITE_TOLERANCE, labels)


# ----------------------------------------------------------------------------- least squares
@dataclass(frozen=True)
class _LSQ:
    theta: np.ndarray  # (n_par, 2): rows O, A, B[, p]; columns x, y
    cov: np.ndarray  # (2, n_par, n_par): per coordinate
    sigma: np.ndarray  # (2,)
    keep: np.ndarray
    dof: int


def _lsq(p: np.ndarray, lab: np.ndarray, site: np.ndarray, with_pair: bool,
         floor: np.ndarray | None = None) -> _LSQ | None:
    cols = [np.ones(len(p)), lab[:, 0].astype(float), lab[:, 1].astype(float)]
    if with_pair:
        cols.append(site.astype(float))
    x = np.column_stack(cols)
    keep = np.ones(len(p), bool)
    for _ in range(4):
        if keep.sum() <= x.shape[1] + 1 or np.linalg.matrix_rank(x[keep]) < x.shape[1]:
            return None
        theta, *_ = np.linalg.lstsq(x[keep], p[keep], rcond=None)
        r = p - x @ theta
        dof = int(keep.sum() - x.shape[1])
        sig = np.sqrt(np.sum(r[keep] ** 2, axis=0) / dof)
        mad = 1.4826 * np.median(np.abs(r[keep]), axis=0)
        scale = np.maximum(np.maximum(sig, mad), 1e-15 * np.max(np.abs(p)))
        new = np.all(np.abs(r) <= 5 * np.maximum(mad, 1e-12 * np.max(np.abs(p))), axis=1) | np.all(np.abs(r) <= 3 * scale, axis=1)
        if np.array_equal(new, keep):
            break
        keep = new
    xtx_inv = np.linalg.inv(x[keep].T @ x[keep])
    sig_used = sig if floor is None else np.maximum(sig, floor)
    cov = np.stack([s**2 * xtx_inv for s in sig_used])
    return _LSQ(theta, cov, sig, keep, dof)


def _propagate(f: Callable[[np.ndarray], np.ndarray], theta: np.ndarray, cov: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Value and standard error of ``f(theta)`` (any array); ``theta`` (npar, 2) holds the x and
    y fits, independent with covariances ``cov[0]``, ``cov[1]``
    (:func:`stabtool.fit.uncertainty.propagate` on the stacked parameters)."""
    npar = theta.shape[0]
    flat = np.concatenate([theta[:, 0], theta[:, 1]])
    block = np.zeros((2 * npar, 2 * npar))
    block[:npar, :npar], block[npar:, npar:] = cov[0], cov[1]

    def f_flat(q: np.ndarray) -> np.ndarray:
        return np.asarray(f(np.column_stack([q[:npar], q[npar:]])), float).ravel()

    val = np.asarray(f(theta), float)
    _, err = propagate(f_flat, flat, block)
    return val, err.reshape(val.shape)


# ----------------------------------------------------------------------------- basis
def _gauss_reduce(a: np.ndarray, b: np.ndarray, metric: np.ndarray) -> np.ndarray:
    """Lagrange–Gauss reduction of (a, b); returns the integer matrix W with [a' b'] = [a b] W."""
    w = np.eye(2, dtype=int)

    def norm(v: np.ndarray) -> float:
        return float(v @ metric @ v)

    u, v = a.copy(), b.copy()
    for _ in range(100):
        if norm(u) > norm(v):
            u, v = v, u
            w = w[:, ::-1]
        mu = int(np.round((u @ metric @ v) / norm(u)))
        if mu == 0:
            break
        v = v - mu * u
        w = w.copy()
        w[:, 1] = w[:, 1] - mu * w[:, 0]
    return w


def _colmax(cdg: np.ndarray) -> float:
    """Largest cross-coupling of a gate relative to its own dot: ``max(C21/C11, C12/C22)``."""
    return float(max(cdg[1, 0] / cdg[0, 0], cdg[0, 1] / cdg[1, 1]))


def _asymmetry(cdg: np.ndarray, alpha: np.ndarray) -> float:
    """Relative asymmetry of ``Cdd = Cdg α⁻¹`` (inf when its off-diagonal is clearly positive)."""
    cdd = cdg @ np.linalg.inv(alpha)
    scale = float(np.sqrt(abs(cdd[0, 0] * cdd[1, 1])))
    if not scale > 0 or cdd[0, 0] <= 0 or cdd[1, 1] <= 0:
        return float("inf")
    off = 0.5 * (cdd[0, 1] + cdd[1, 0])
    if off > LEVER_ARM_ASYMMETRY * scale:
        return float("inf")  # a positive off-diagonal: a negative mutual capacitance
    return float(abs(cdd[0, 1] - cdd[1, 0]) / scale)


def _physical_bases(ab: np.ndarray, kmax: int = 4) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """Unimodular W (entries up to ±kmax) giving ``Cdg = e ([A B] W)⁻¹`` with all elements positive
    and det > 0: (those with C11 > C21 and C22 > C12, all), each sorted by :func:`_colmax`."""
    dominant, positive = [], []
    rng = range(-kmax, kmax + 1)
    for a, b, c, d in itertools.product(rng, rng, rng, rng):
        if a * d - b * c not in (1, -1):
            continue
        w = np.array([[a, b], [c, d]])
        cdg = np.linalg.inv(ab @ w)
        if np.all(cdg > 0) and np.linalg.det(cdg) > 0:
            positive.append((_colmax(cdg), w))
            if cdg[0, 0] > cdg[1, 0] and cdg[1, 1] > cdg[0, 1]:
                dominant.append((_colmax(cdg), w))
    dominant.sort(key=lambda t: t[0])
    positive.sort(key=lambda t: t[0])
    return [w for _, w in dominant], [w for _, w in positive]


# ----------------------------------------------------------------------------- public
def fit_transport_lattice(
    da: xr.DataArray,
    *,
    threshold_sigmas: float = THRESHOLD_SIGMAS,
    spots: TransportSpots | None = None,
    lever_arm: np.ndarray | None = None,
    source: str = "data",
) -> TransportLattice:
    """Gate capacitances (and, with resolved pairs, virtual gates) from the triple-point lattice.

    Parameters
    ----------
    da : xarray.DataArray, dims (y_gate, x_gate)
        Transport current of a series double dot against two gate voltages
        (V); any unit and sign, axes may decrease, NaN allowed.
    threshold_sigmas : float
        Spot threshold in robust σ of the smoothed map.
    spots : TransportSpots, optional
        Spots already found by :func:`find_transport_spots` (not recomputed).
    lever_arm : array_like, shape (2, 2), optional
        A known lever-arm matrix (e.g. :func:`stabtool.fit.bias_triangles.fit_bias_triangles`
        on a map at larger bias): it picks the dot assignment when the lattice
        alone cannot (see :func:`fit_lattice_points`).
    source : str
        Name of the map in error messages.

    Returns
    -------
    TransportLattice
        Tests false (NaN Cdg) when no lattice is found; ``quality.ok`` is
        False whenever a number is doubtful.

    Raises
    ------
    InputError
        Not a 2-D map, fewer than 8×8 pixels, non-monotonic axes, no finite value.

    Notes
    -----
    ``Cdg · A = e (1, 0)ᵀ`` and ``Cdg · B = e (0, 1)ᵀ`` for the translations
    that add one electron to dot1 and dot2, hence ``Cdg = e [A B]⁻¹``; the
    electron → hole vector ``p`` of a resolved pair has lattice coordinates
    ``c = [A B]⁻¹ p = E_Cm E_C⁻¹ (1, 1)ᵀ`` (module
    :mod:`stabtool.physics.triple_points`). The algorithm is in the module
    Notes.

    References
    ----------
    W. G. van der Wiel et al., "Electron transport through double quantum
    dots", Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1.
    """
    xs, ys, vals = _axes(da, source)
    if not (np.isfinite(threshold_sigmas) and threshold_sigmas > 0):
        raise InputError("threshold_sigmas", f"expected a positive number, got {threshold_sigmas}")
    if spots is None:
        spots = _spots(xs, ys, vals, float(threshold_sigmas))
    px = (float(np.median(np.diff(xs))), float(np.median(np.diff(ys))))

    def fit(sp: TransportSpots) -> TransportLattice:
        return fit_lattice_points(sp.points_V, window_V=(xs[-1] - xs[0], ys[-1] - ys[0]),
                                  position_floor_V=(PIXEL_FLOOR * px[0], PIXEL_FLOOR * px[1]), lever_arm=lever_arm)

    res = fit(spots)
    if not res.quality.ok:
        # isolated one-pixel outliers (spikes) may outnumber the triple points; a triple point that is
        # smaller than a pixel looks the same, so the despiked map is only a second try
        alt = fit(_spots(xs, ys, vals, float(threshold_sigmas), despike=True))
        if (alt.quality.ok or (alt and not res)
                or (alt and res and alt.n_outliers < res.n_outliers and len(alt.points_V) >= len(res.points_V))):
            res = replace(alt, quality=alt.quality.with_warning(
                "isolated one-pixel outliers (spikes) removed before the spot search", doubtful=False))
    if res.vg_matrix is not None:
        res = replace(res, pair_quality=res.pair_quality.with_warning(
            "virtual gates from the electron/hole pair vector of current spots: the current between the two "
            "triple points pulls their centroids together (seen on generator maps: mutual shifts 2-4 % low, "
            "|ΔM| up to 0.008, about twice the stated error); not trustworthy at the 0.005 level"))
    return res


def fit_lattice_points(points_V: np.ndarray, *, window_V: tuple[float, float] | None = None,
                       position_floor_V: tuple[float, float] = (0.0, 0.0),
                       lever_arm: np.ndarray | None = None) -> TransportLattice:
    """Lattice fit of given triple-point positions (the core of :func:`fit_transport_lattice`).

    Parameters
    ----------
    points_V : array_like, shape (n, 2)
        Point positions (x, y), V.
    window_V : (float, float), optional
        Extent of the map (x, y), V: the normalisation of the search (default:
        the extent of the points).
    position_floor_V : (float, float)
        Smallest standard error of a point position (x, y), V, used in the
        covariance when the residual scatter is smaller (the pixel sampling
        of small spots gives errors correlated along the lattice, which the
        scatter does not show).
    lever_arm : array_like, shape (2, 2), optional
        A known lever-arm matrix (rows dots, columns gates x, y), e.g. from
        bias triangles at a known bias: the basis whose ``Cdd = Cdg α⁻¹`` is
        symmetric (within 10 %) with a non-positive off-diagonal is taken; the
        lattice alone leaves the dot assignment open when cross-capacitances
        are large.
    """
    alpha = None
    if lever_arm is not None:
        alpha = np.asarray(lever_arm, float)
        if alpha.shape != (2, 2) or not np.all(np.isfinite(alpha)) or abs(np.linalg.det(alpha)) == 0:
            raise InputError("lever_arm", f"expected a finite, invertible 2x2 matrix, got {lever_arm!r}")
    pts = np.asarray(points_V, float).reshape(-1, 2)
    pts = pts[np.all(np.isfinite(pts), axis=1)]
    n = pts.shape[0]
    if n < 4:
        return _failed(pts, f"{n} current spot(s): a triple-point lattice needs at least 4")
    floor = np.abs(np.asarray(position_floor_V, float))
    span = np.asarray(window_V if window_V is not None else np.ptp(pts, axis=0), float)
    span = np.where(span > 0, span, np.max(np.abs(span)) or 1.0)
    centre = pts.mean(axis=0)
    qn = (pts - centre) / span
    pairing = _pairs(qn)
    if pairing is not None:
        d, first, second = pairing
        unpaired = np.setdiff1d(np.arange(n), np.concatenate([first, second]))
        qm = np.vstack([0.5 * (qn[first] + qn[second]), qn[unpaired]])
        cell = _search(qm)
        if cell is not None:
            c = np.linalg.solve(cell.basis.T, d)
            shortest = min(np.hypot(*cell.basis[0]), np.hypot(*cell.basis[1]), np.hypot(*(cell.basis[0] + cell.basis[1])),
                           np.hypot(*(cell.basis[0] - cell.basis[1])))
            if np.hypot(*d) > 0.5 * shortest or not any(_in_honeycomb(sg * c) for sg in (1.0, -1.0)):
                cell = None  # the short vector is no electron/hole pair of this lattice
            else:
                cell = _two_sites(qn, cell, qm[0], d)
        if cell is None:
            pairing = None
    if pairing is None:
        cell = _search(qn)
    if cell is None:
        return _failed(pts, f"the {n} current spots form no consistent 2-D lattice (none of the tried cells "
                            f"explains {100 * MIN_EXPLAINED:.0f} % of them)")
    q = Quality()
    two = bool(len(cell.sites) == 2)
    inl = cell.inlier
    fit = _lsq(pts[inl], cell.labels[inl], cell.assign[inl], two, floor)
    if fit is None:
        return _failed(pts, "too few lattice points to fit both translations")
    ab_raw = fit.theta[1:3].T  # columns A, B (volts)
    # physical basis
    metric = np.diag(1.0 / span**2)
    w0 = _gauss_reduce(ab_raw[:, 0], ab_raw[:, 1], metric)
    red = ab_raw @ w0
    dominant, positive = _physical_bases(red)
    if alpha is not None and positive:
        # a known lever-arm matrix: Cdd = Cdg α⁻¹ must be symmetric (the wrong bases give U·Cdd)
        asym = [_asymmetry(E_AC * np.linalg.inv(red @ w), alpha) for w in positive]
        order = np.argsort(asym)
        best_asym = float(asym[order[0]])
        next_asym = float(asym[order[1]]) if len(order) > 1 else np.inf
        if best_asym < LEVER_ARM_ASYMMETRY and next_asym > 3 * LEVER_ARM_ASYMMETRY:
            dominant = [positive[int(order[0])]]
            q = q.with_warning(f"dot assignment from the given lever-arm matrix (Cdg α⁻¹ symmetric within "
                               f"{100 * best_asym:.0f} %)", doubtful=False)
        else:
            q = q.with_warning(f"the given lever-arm matrix does not single out a basis (asymmetry of Cdg α⁻¹: "
                               f"best {100 * best_asym:.0f} %, next {100 * next_asym:.0f} %)")
    if len(dominant) == 1:
        w = dominant[0]
    elif dominant:
        w = dominant[0]
        q = q.with_warning(f"dot assignment ambiguous: {len(dominant)} bases of the lattice give positive gate "
                           "capacitances with each gate coupled more to its own dot (C11 > C21, C22 > C12); "
                           "the one with the smallest cross-coupling is reported")
    elif positive:
        w = positive[0]
        q = q.with_warning("no basis of the lattice has each gate coupled more to its own dot "
                           "(C11 > C21, C22 > C12): dot assignment doubtful")
    else:
        w = np.eye(2, dtype=int)
        q = q.with_warning("no basis of the lattice gives positive gate capacitances: dot assignment unknown")
    wt = w0 @ w  # [A B]_phys = [A B]_raw wt
    wt_inv = np.rint(np.linalg.inv(wt)).astype(int)
    pts_in = pts[inl][fit.keep]
    lab_raw = cell.labels[inl][fit.keep]
    site = cell.assign[inl][fit.keep]
    lab = (wt_inv @ lab_raw.T).T
    theta = fit.theta.copy()
    theta[1:3] = (ab_raw @ wt).T

    # pair: orient electron → hole so that c = [A B]⁻¹ p lies in the honeycomb triangle
    pair_ok = False
    if two:
        ab = theta[1:3].T
        p_raw = theta[3]
        c_raw = np.linalg.solve(ab, p_raw)
        best = None
        for sgn in (1.0, -1.0):
            cc = sgn * c_raw
            cc = cc - np.floor(cc)
            if cc[0] > 0 and cc[1] > 0 and cc[0] + cc[1] < 1:
                best = (sgn, ab @ cc)
        if best is None:
            q = q.with_warning(f"two triple points per cell, but the pair vector (lattice coordinates "
                               f"{c_raw[0]:.3f}, {c_raw[1]:.3f}) fits no honeycomb: inconsistent lattice")
        else:
            sgn, pv = best
            site = site if sgn > 0 else 1 - site
            o_e = theta[0] if sgn > 0 else theta[0] + p_raw
            frac = np.linalg.solve(ab, (pts_in - o_e - np.outer(site, pv)).T).T
            refit = _lsq(pts_in, np.rint(frac).astype(int), site, True, floor)
            if refit is not None:
                lab = np.rint(frac).astype(int)[refit.keep]
                pts_in, site, fit = pts_in[refit.keep], site[refit.keep], refit
                theta = refit.theta.copy()
                pair_ok = True
            else:
                q = q.with_warning("the lattice fit in the physical basis failed")
    cov = fit.cov
    if not pair_ok:
        # the raw fit: its basis rows were transformed linearly (A', B') = wtᵀ (A, B)
        tmat = np.eye(fit.theta.shape[0])
        tmat[1:3, 1:3] = wt.T
        cov = np.stack([tmat @ cv @ tmat.T for cv in fit.cov])

    def cdg_of(t: np.ndarray) -> np.ndarray:
        return cdg_from_lattice(t[1], t[2])

    cdg, cdg_err = _propagate(cdg_of, theta, cov)
    basis = theta[1:3].copy()
    basis_err = np.sqrt(np.stack([np.diag(cv)[1:3] for cv in cov], axis=1))
    sigma = fit.sigma
    cells = {tuple(v) for v in lab.tolist()}
    n_cells = len(cells)
    n_out = int(n - len(pts_in))
    # ----------------------------------------------------------- verdict
    span_a = np.ptp(lab[:, 0]) if len(lab) else 0
    span_b = np.ptp(lab[:, 1]) if len(lab) else 0
    consistent = n_cells >= MIN_CELLS
    if n_cells < MIN_CELLS:
        q = q.with_warning(f"only {n_cells} lattice cell(s) hold triple points (at least {MIN_CELLS} needed)")
    if span_a < 1 or span_b < 1:
        q = q.with_warning("the points span a single row of cells: one translation is not measured")
    if fit.dof < 3:
        q = q.with_warning(f"{fit.dof} degrees of freedom in the lattice fit: errors not reliable")
    if n_out > max(2, 0.25 * n):
        consistent = False
        q = q.with_warning(f"{n_out} of {n} current spots are off the lattice: inconsistent lattice")
    elif n_out:
        q = q.with_warning(f"{n_out} of {n} current spots off the lattice were ignored", doubtful=False)
    cell_len = np.hypot(*(basis / span).T)
    scat_rel = float(np.max(np.hypot(*(sigma / span)) / np.min(cell_len)))
    if scat_rel > 0.05:
        consistent = False
        q = q.with_warning(f"the points scatter by {100 * scat_rel:.1f} % of a cell about the lattice: "
                           "inconsistent lattice")
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.abs(cdg_err / cdg)
    if not np.all(np.isfinite(rel)):
        q = q.with_warning("gate-capacitance errors cannot be computed")
    elif np.max(rel) > MAX_CDG_REL_ERROR:
        q = q.with_warning(f"gate-capacitance error {100 * np.max(rel):.1f} % is above the "
                           f"{100 * MAX_CDG_REL_ERROR:.0f} % an ok result may state")
    out: dict = {"points_V": pts_in, "labels": np.column_stack([lab, site if two else np.zeros(len(lab), int)]),
                 "basis_V": basis, "basis_V_error": basis_err, "cdg_aF": cdg, "cdg_aF_error": cdg_err,
                 "position_scatter_V": sigma, "n_cells": n_cells, "n_outliers": n_out, "consistent": consistent}
    if two and pair_ok:
        pv, pe = theta[3].copy(), np.sqrt(np.array([cov[0][3, 3], cov[1][3, 3]]))

        def c_of(t: np.ndarray) -> np.ndarray:
            return np.linalg.solve(t[1:3].T, t[3])

        c, c_err = _propagate(c_of, theta, cov)
        out.update(pair_resolved=True, pair_V=pv, pair_V_error=pe)
        if np.all(c > PAIR_SIGMAS * c_err):
            def diag_of(t: np.ndarray) -> np.ndarray:
                d = diagram_from_pair(cdg_of(t), c_of(t))
                return np.concatenate([d.vg_matrix.ravel(), d.addition_V, d.mutual_V])

            val, err = _propagate(diag_of, theta, cov)
            if np.all(np.isfinite(val)) and np.all(np.isfinite(err)):
                out.update(vg_matrix=val[:4].reshape(2, 2), vg_matrix_error=err[:4].reshape(2, 2),
                           addition_V=val[4:6], addition_V_error=err[4:6], mutual_V=val[6:8],
                           mutual_V_error=err[6:8])
            else:
                q = q.with_warning("pair vector unphysical within its errors: virtual gates not determined",
                                   doubtful=False)
        else:
            q = q.with_warning("triple-point pairs barely resolved: virtual gates not determined", doubtful=False)
    elif not two:
        q = q.with_warning("triple-point pairs not resolved: virtual gates, addition voltages and mutual "
                           "shifts not determined (Cdg only)", doubtful=False)
    return TransportLattice(quality=q, **out)
