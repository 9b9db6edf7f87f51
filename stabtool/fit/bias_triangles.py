"""Bias-triangle energy reference: triangle geometry at a known bias → lever arms.

In a transport map of a series double dot at source–drain bias ``V_sd`` the
current flows inside triangles (``μ_S ≥ μ1 ≥ μ2 ≥ μ_D``). The three vertices
of one triangle give the whole lever-arm matrix,
``α⁻¹ = [C − A, A − B] / V_sd``
(:func:`stabtool.physics.diamonds.lever_arm_matrix_from_triangle`); without
cross-capacitances this is the textbook ``α_ii = |e V_sd|/δV_gi``.

Notes
-----
1. The interior current is the median of the smoothed ``|I|`` above 5 noise
   levels (and above 3 % of its 99.5th percentile, which drops thermal tails); ``|I|`` is clipped at that level (so the bright resonant base does
   not bleed outwards), smoothed (Gaussian, σ = 1 pixel) and contoured at half
   the interior current: edges sit at the half-rise of the current.
2. Connected regions above the level (at least 30 pixels, not touching the
   map border) are candidate triangles; their iso-current contour is found
   with sub-pixel precision (:func:`skimage.measure.find_contours`).
3. A first triangle is the largest-area triangle on the contour's convex
   hull; contour points are then assigned to the nearest side (the 15 % of
   each side next to the vertices excluded, where thermal rounding is), a
   straight line is fitted to each side (total least squares, in volts), and
   the refined vertices are the intersections of the three lines.
4. The base ``BC`` is the side with the highest current (the elastic
   interdot resonance); ``A`` is the opposite vertex; of the two legs from
   ``A`` the steeper one (a dot1 line, conventions) ends in ``B``. If no side
   is clearly brighter the longest side is taken as the base, with a warning.
5. The lever-arm matrices of all triangles are averaged; their scatter gives
   the standard errors.

Thermal rounding biases the size: where the interdot (inelastic) rate limits
the current, the current reaches half its interior value a few ``k_B T``
outside each lead edge, so the triangle looks larger by roughly
``2 · 4 k_B T/(e |V_sd|)`` and the lever arms come out low by as much
(seen on the generator: −1.5 % at 10 mK and −9 % at 100 mK for 0.4 mV). The
result is marked doubtful when this estimate exceeds 3 % (common practice,
no source: use ``e|V_sd| ≫ k_B T``).

References
----------
W. G. van der Wiel et al., "Electron transport through double quantum dots",
Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import xarray as xr
from scipy import ndimage
from scipy.spatial import ConvexHull, QhullError

from ..errors import InputError
from ..physics.diamonds import lever_arm_matrix_from_triangle
from ..quality import Quality

__all__ = ["BiasTriangle", "BiasTriangleFit", "fit_bias_triangles"]

_NAN = float("nan")


@dataclass(frozen=True)
class BiasTriangle:
    """One triangle: vertices ``a`` (right angle in μ space), ``b`` (end of the dot1 leg),
    ``c`` (end of the dot2 leg), each (x, y) in V, and its lever-arm matrix."""

    a: tuple[float, float]
    b: tuple[float, float]
    c: tuple[float, float]
    lever_arm: tuple[tuple[float, float], tuple[float, float]]
    base_contrast: float
    n_pixels: int


@dataclass(frozen=True)
class BiasTriangleFit:
    """Result of :func:`fit_bias_triangles`.

    Attributes
    ----------
    lever_arm, lever_arm_stderr : tuple of tuples, 2×2
        Mean lever-arm matrix (rows dots, columns gates x, y) and its standard
        error (NaN with a single triangle).
    bias_V : float
    triangles : tuple of BiasTriangle
    quality : Quality
    thermal_bias_rel : float
        Estimated relative underestimate of the lever arms from thermal
        rounding, ``8 k_B T/(e|V_sd|)`` (NaN without T_e); not included in
        ``lever_arm_stderr``.
    """

    lever_arm: tuple[tuple[float, float], tuple[float, float]]
    lever_arm_stderr: tuple[tuple[float, float], tuple[float, float]]
    bias_V: float
    triangles: tuple[BiasTriangle, ...] = ()
    quality: Quality = field(default_factory=Quality)
    thermal_bias_rel: float = _NAN

    def __bool__(self) -> bool:
        return bool(np.all(np.isfinite(self.lever_arm)))


def _mat2(m: np.ndarray) -> tuple[tuple[float, float], tuple[float, float]]:
    return ((float(m[0, 0]), float(m[0, 1])), (float(m[1, 0]), float(m[1, 1])))


def _to_volts(rc: np.ndarray, xs: np.ndarray, ys: np.ndarray) -> np.ndarray:
    """Contour (row, col) → (x, y) volts (axes ascending)."""
    x = np.interp(rc[:, 1], np.arange(xs.size), xs)
    y = np.interp(rc[:, 0], np.arange(ys.size), ys)
    return np.stack([x, y], axis=1)


def _max_area_triangle(pts: np.ndarray) -> np.ndarray | None:
    try:
        hull = ConvexHull(pts)
    except (QhullError, ValueError):
        return None
    h = pts[hull.vertices]
    if h.shape[0] > 60:
        h = h[np.linspace(0, h.shape[0] - 1, 60).astype(int)]
    i, j, k = np.array(np.meshgrid(*(np.arange(h.shape[0]),) * 3, indexing="ij")).reshape(3, -1)
    keep = (i < j) & (j < k)
    i, j, k = i[keep], j[keep], k[keep]
    area = 0.5 * np.abs((h[j, 0] - h[i, 0]) * (h[k, 1] - h[i, 1]) - (h[k, 0] - h[i, 0]) * (h[j, 1] - h[i, 1]))
    m = int(np.argmax(area))
    return np.stack([h[i[m]], h[j[m]], h[k[m]]])


def _refine(pts: np.ndarray, tri: np.ndarray, scale: np.ndarray) -> np.ndarray | None:
    """Fit a line to each side's contour points and intersect them (in scaled coordinates)."""
    p = pts / scale
    t = tri / scale
    lines = []
    for s in range(3):
        a, b = t[s], t[(s + 1) % 3]
        d = b - a
        ln = np.hypot(*d)
        u = d / ln
        n = np.array([-u[1], u[0]])
        rel = p - a
        along = rel @ u / ln
        dist = np.abs(rel @ n)
        # nearest side
        dists = []
        for s2 in range(3):
            a2, b2 = t[s2], t[(s2 + 1) % 3]
            d2 = (b2 - a2) / np.hypot(*(b2 - a2))
            dists.append(np.abs((p - a2) @ np.array([-d2[1], d2[0]])))
        nearest = np.argmin(np.stack(dists), axis=0) == s
        sel = nearest & (along > 0.15) & (along < 0.85) & (dist < 0.1 * ln)
        if np.count_nonzero(sel) < 4:
            return None
        q = p[sel]
        c = q.mean(axis=0)
        _, _, vt = np.linalg.svd(q - c)
        lines.append((c, vt[0]))
    out = []
    for s in range(3):  # vertex s is the intersection of sides s-1 and s
        (c1, d1), (c2, d2) = lines[(s - 1) % 3], lines[s]
        m = np.stack([d1, -d2], axis=1)
        if abs(np.linalg.det(m)) < 1e-9:
            return None
        tt = np.linalg.solve(m, c2 - c1)
        out.append((c1 + tt[0] * d1) * scale)
    return np.array(out)


def _steepness(d: np.ndarray) -> float:
    """|dy/dx| of a direction (inf for vertical)."""
    return float(abs(d[1] / d[0])) if d[0] != 0 else float("inf")


def _side_current(amp: np.ndarray, xs: np.ndarray, ys: np.ndarray, a: np.ndarray, b: np.ndarray, centre: np.ndarray) -> float:
    """Mean |I| along side ab, sampled slightly inside the triangle."""
    t = np.linspace(0.2, 0.8, 25)
    pts = a[None, :] + t[:, None] * (b - a)[None, :]
    pts = pts + 0.05 * (centre - pts)
    ix = np.interp(pts[:, 0], xs, np.arange(xs.size))
    iy = np.interp(pts[:, 1], ys, np.arange(ys.size))
    return float(np.mean(ndimage.map_coordinates(amp, [iy, ix], order=1)))


def fit_bias_triangles(
    data: xr.DataArray, *, bias_V: float, electron_temperature_K: float | None = None, level: float | None = None
) -> BiasTriangleFit:
    """Lever-arm matrix from the bias triangles of a double-dot transport map.

    Parameters
    ----------
    data : xarray.DataArray, dims (y_gate, x_gate)
        Current (any unit, any sign) against the two plunger gates, V.
    bias_V : float
        Signed source–drain bias, V (source potential minus drain potential).
    electron_temperature_K : float, optional
        Electron temperature, K: sizes the thermal enlargement of the
        triangles (see Notes). Without it the result is marked doubtful.
    level : float, optional
        Iso-current level of the triangle edges (data units); default half the
        interior current.

    Returns
    -------
    BiasTriangleFit
        NaN lever arms (tests false) when no closed triangle is found.
    """
    from skimage import measure

    if not isinstance(data, xr.DataArray) or data.ndim != 2:
        raise InputError("data", "expected a 2-D DataArray (y_gate, x_gate)")
    if not (np.isfinite(bias_V) and bias_V != 0):
        raise InputError("bias_V", f"expected a non-zero source-drain bias in V, got {bias_V}")
    ydim, xdim = data.dims
    xs = np.asarray(data[xdim].values, float)
    ys = np.asarray(data[ydim].values, float)
    vals = np.asarray(data.values, float)
    if xs[0] > xs[-1]:
        xs, vals = xs[::-1], vals[:, ::-1]
    if ys[0] > ys[-1]:
        ys, vals = ys[::-1], vals[::-1]
    vals = np.where(np.isfinite(vals), vals, 0.0)
    # orient the current (its sign follows the bias) without rectifying the noise
    big = np.abs(vals) >= np.percentile(np.abs(vals), 99)
    raw = vals * (1.0 if np.sum(vals[big]) >= 0 else -1.0)
    dif = np.diff(raw, axis=1).ravel()
    noise = float(1.4826 * np.median(np.abs(dif - np.median(dif))) / np.sqrt(2)) if dif.size else 0.0
    pre = ndimage.gaussian_filter(raw, 1.0)
    noise_s = noise / (2 * np.sqrt(np.pi))  # white noise after a σ = 1 px Gaussian
    nan2 = ((_NAN, _NAN), (_NAN, _NAN))
    inside = pre[pre > max(5 * noise_s, 0.03 * float(np.percentile(pre, 99.5)))]
    if inside.size < 30:
        return BiasTriangleFit(nan2, nan2, float(bias_V), (), Quality(False, ("no current above the noise: no bias triangle",)))
    interior = float(np.median(inside))
    # clip the bright resonant base to the interior current so smoothing does not bleed it outwards
    amp = ndimage.gaussian_filter(np.minimum(raw, interior + noise), 1.0)
    if level is None:
        level = 0.5 * interior
    mask = amp > level
    labels, n = ndimage.label(mask)
    scale = np.array([abs(xs[-1] - xs[0]), abs(ys[-1] - ys[0])])
    tris: list[BiasTriangle] = []
    q = Quality()
    ambiguous = 0
    for k in range(1, n + 1):
        comp = labels == k
        npx = int(comp.sum())
        rows, cols = np.nonzero(comp)
        if npx < 30 or rows.min() == 0 or cols.min() == 0 or rows.max() == comp.shape[0] - 1 or cols.max() == comp.shape[1] - 1:
            continue
        sub = np.where(ndimage.binary_dilation(comp, iterations=2), amp, 0.0)
        contours = measure.find_contours(sub, level)
        if not contours:
            continue
        pts = _to_volts(max(contours, key=len), xs, ys)
        tri = _max_area_triangle(pts / scale)
        if tri is None:
            continue
        tri = tri * scale
        for _ in range(2):
            ref = _refine(pts, tri, scale)
            if ref is None:
                break
            tri = ref
        centre = tri.mean(axis=0)
        cur = [_side_current(pre, xs, ys, tri[s], tri[(s + 1) % 3], centre) for s in range(3)]
        order = np.argsort(cur)
        contrast = cur[order[2]] / max(cur[order[1]], 1e-300)
        if contrast > 1.3:
            base = int(order[2])
        else:
            lengths = [np.hypot(*((tri[(s + 1) % 3] - tri[s]) / scale)) for s in range(3)]
            base = int(np.argmax(lengths))
            ambiguous += 1
        a = tri[(base + 2) % 3]
        p1, p2 = tri[base], tri[(base + 1) % 3]

        b, c = (p1, p2) if _steepness(p1 - a) > _steepness(p2 - a) else (p2, p1)
        alpha = lever_arm_matrix_from_triangle(a, b, c, bias_V)
        tris.append(BiasTriangle(tuple(a), tuple(b), tuple(c), _mat2(alpha), float(contrast), npx))
    if not tris:
        return BiasTriangleFit(nan2, nan2, float(bias_V), (), Quality(False, ("no closed bias triangle inside the map",)))
    mats = np.array([t.lever_arm for t in tris])
    mean = mats.mean(axis=0)
    if len(tris) > 1:
        err = mats.std(axis=0, ddof=1) / np.sqrt(len(tris))
        rel = np.abs(mats.std(axis=0, ddof=1) / np.diag(mean).reshape(2, 1))
        if np.max(rel) > 0.1:
            q = q.with_warning(f"the {len(tris)} triangles disagree by up to {100 * np.max(rel):.0f} % of the diagonal lever arms")
    else:
        err = np.full((2, 2), _NAN)
        q = q.with_warning("a single bias triangle: no uncertainty can be given", doubtful=True)
    if ambiguous:
        q = q.with_warning(
            f"{ambiguous} triangle(s) without a brighter resonant base; the longest side was taken as the base"
        )
    px = np.array([abs(xs[1] - xs[0]), abs(ys[1] - ys[0])])
    small = [t for t in tris if min(np.hypot(*((np.array(t.c) - np.array(t.a)) / px)), np.hypot(*((np.array(t.b) - np.array(t.a)) / px))) < 8]
    if small:
        q = q.with_warning(f"{len(small)} triangle(s) with legs under 8 pixels: resolution-limited")
    sysrel = _NAN
    if electron_temperature_K is None:
        q = q.with_warning(
            "electron temperature not given: the thermal enlargement of the triangles (lever arms "
            "biased low by about 8 k_B T/(e|V_sd|)) cannot be bounded"
        )
    else:
        from ..physics.constants import KB_OVER_E

        sysrel = 8.0 * KB_OVER_E * float(electron_temperature_K) / abs(bias_V)
        if sysrel > 0.03:
            q = q.with_warning(
                f"thermal rounding may enlarge the triangles by about {100 * sysrel:.0f} % "
                f"(8 k_B T/(e|V_sd|)); lever arms may be that much too low: increase the bias"
            )
    if np.any(np.diag(mean) <= 0):
        q = q.with_warning("non-positive diagonal lever arm: the triangle orientation or the bias sign is wrong")
    return BiasTriangleFit(_mat2(mean), _mat2(err), float(bias_V), tuple(tris), q, float(sysrel))
