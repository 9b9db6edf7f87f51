"""Charge-state labels (N1, N2) of every map region from the fitted lattice.

The ground state of the constant-interaction energy (in units of e α11 · V)
``F(N) = ½ ΔV1 N1² + δ1 N1 N2 + ½ r ΔV2 N2² − N1 (V'_1 − c1) − r N2 (V'_2 − c2)``
with ``r = α22/α11 = δ1/δ2`` reproduces the fitted lines: the dot1 line
N1−1 → N1 lies at ``V'_1 = ΔV1 (N1 − ½) + δ1 N2 + c1`` and the dot2 line at
``V'_2 = ΔV2 (N2 − ½) + δ2 N1 + c2``.

Absolute occupations: when the map extends at least ``EMPTY_MARGIN_CELLS``
addition voltages below the lowest detected line of a dot and no further
line was found there, that dot is taken as empty below its lowest line.

References
----------
W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

__all__ = ["EMPTY_MARGIN_CELLS", "ChargeStates", "ground_state_labels", "label_charge_states", "lines_seen_where_empty"]

#: Cells (addition voltages) of line-free map needed below the lowest line to call a dot empty.
EMPTY_MARGIN_CELLS = 2.0
#: Confidence an absolute assignment must exceed (else the labels stay relative and ``withheld`` is set).
#: Held-out probe maps at SNR 4–5 (confidence ≤ 0.5): 4 of 9 such claims were wrong, whole dots
#: numbered one or two too high where a line near the low corner went undetected (seeds 239 and 285
#: of the ordinary probe, which have no empty corner at all); above 0.5, 2 of 20, on a few small
#: regions at the map's border.
MIN_ABSOLUTE_CONFIDENCE = 0.5


def ground_state_labels(
    u: np.ndarray,
    v: np.ndarray,
    *,
    addition_V: np.ndarray,
    mutual_V: np.ndarray,
    offsets_V: np.ndarray,
    n_min: tuple[int | None, int | None] = (None, None),
) -> np.ndarray:
    """Ground-state (N1, N2) at virtual coordinates ``(u, v)``.

    Parameters
    ----------
    u, v : ndarray
        Virtual coordinates V'_1, V'_2 (same shape), V.
    addition_V, mutual_V, offsets_V : ndarray, shape (2,)
        ``(ΔV1, ΔV2)``, ``(δ1, δ2)``, ``(c1, c2)`` of the lattice.
    n_min : pair of int or None
        Lowest allowed N1 / N2 (None: unbounded).

    Returns
    -------
    ndarray of int, shape ``u.shape + (2,)``
    """
    dv1, dv2 = addition_V
    d1, d2 = mutual_V
    r = d1 / d2 if d2 > 0 and d1 > 0 else 1.0
    a = np.array([[dv1, d1], [d1, r * dv2]])
    uu = np.asarray(u, float) - offsets_V[0]
    vv = r * (np.asarray(v, float) - offsets_V[1])
    ainv = np.linalg.inv(a)
    # continuous minimiser (of F without the ½ terms); the ground state is within −1…+2 of its floor
    b1 = np.floor(ainv[0, 0] * uu + ainv[0, 1] * vv).astype(int)
    b2 = np.floor(ainv[1, 0] * uu + ainv[1, 1] * vv).astype(int)
    best1 = np.zeros(b1.shape, int)
    best2 = np.zeros(b2.shape, int)
    best_f = np.full(b1.shape, np.inf)
    # the terms of F that depend on N2 only, per candidate offset (the same products as in F)
    cand2 = []
    for db in (-1, 0, 1, 2):
        n2 = b2 + db
        if n_min[1] is not None:
            n2 = np.maximum(n2, n_min[1])
        cand2.append((n2, 0.5 * r * dv2 * n2**2, n2 * vv))
    f = np.empty(b1.shape)
    better = np.empty(b1.shape, bool)
    for da in (-1, 0, 1, 2):
        n1 = b1 + da
        if n_min[0] is not None:
            n1 = np.maximum(n1, n_min[0])
        f1 = 0.5 * dv1 * n1**2  # terms of F that depend on N1 only
        g1 = n1 * uu
        d1n1 = d1 * n1
        for n2, q2, h2 in cand2:
            # F = f1 + δ1 N1 N2 + ½ r ΔV2 N2² − N1 u − N2 v, summed left to right
            np.multiply(d1n1, n2, out=f)
            np.add(f1, f, out=f)
            f += q2
            f -= g1
            f -= h2
            np.less(f, best_f - 1e-15, out=better)
            np.copyto(best1, n1, where=better)
            np.copyto(best2, n2, where=better)
            np.copyto(best_f, f, where=better)
    return np.stack([best1, best2], -1)


@dataclass(frozen=True)
class ChargeStates:
    """Charge-state labels of a map.

    Attributes
    ----------
    labels : ndarray of int, shape (ny, nx, 2)
        (N1, N2) of every pixel: absolute where ``absolute`` says so for that
        dot, otherwise relative to the lowest state seen in the map (0).
    absolute : tuple of bool
        Whether the N1 / N2 labels are absolute occupations.
    confidence : tuple of float
        0–1 confidence of the absolute assignment per dot (0 when relative).
    few_electron : bool
        Both dots' occupations are absolute and the empty state (0, 0) is in
        the map: the map covers the few-electron regime.
    regions : tuple of dict
        One entry per state present: ``{"n1", "n2", "x", "y", "pixels"}`` with
        the region's centroid in volts.
    withheld : bool
        The map reaches far enough below a dot's lowest line to call it empty,
        but the caller did not allow absolute occupations (a doubtful line
        labelling) or the confidence is not above ``MIN_ABSOLUTE_CONFIDENCE``
        (a low SNR: a line near the low corner may have been missed): the
        labels are relative.
    """

    labels: np.ndarray
    absolute: tuple[bool, bool] = (False, False)
    confidence: tuple[float, float] = (0.0, 0.0)
    few_electron: bool = False
    regions: tuple[dict, ...] = field(default_factory=tuple)
    withheld: bool = False

    def to_json(self) -> dict:
        return {
            "absolute": {"dot1": bool(self.absolute[0]), "dot2": bool(self.absolute[1])},
            "absolute_withheld": bool(self.withheld),
            "confidence": {"dot1": float(self.confidence[0]), "dot2": float(self.confidence[1])},
            "few_electron": bool(self.few_electron),
            "regions": [dict(r) for r in self.regions],
        }


def label_charge_states(
    x: np.ndarray,
    y: np.ndarray,
    m: np.ndarray,
    *,
    addition_V: np.ndarray,
    mutual_V: np.ndarray,
    offsets_V: np.ndarray,
    lowest_line: tuple[int, int],
    snr: float = np.inf,
    valid: np.ndarray | None = None,
    allow_absolute: bool = True,
    min_confidence: float = MIN_ABSOLUTE_CONFIDENCE,
) -> ChargeStates:
    """Label every pixel with (N1, N2) and decide whether the labels are absolute.

    Parameters
    ----------
    x, y : ndarray, shape (nx,), (ny,)
        Map axes, V.
    m : ndarray, shape (2, 2)
        Virtual-gate matrix.
    addition_V, mutual_V, offsets_V : ndarray, shape (2,)
        Lattice of :class:`~stabtool.fit.lattice.LatticeFit`.
    lowest_line : (int, int)
        Lowest detected transition label of dot1 (N1 after the transition)
        and of dot2.
    snr : float
        Signal-to-noise ratio of the detection; a low SNR lowers the
        confidence that no line was missed in the empty corner.
    valid : ndarray of bool, shape (ny, nx), optional
        Pixels that were measured (False for NaN).
    allow_absolute : bool
        False when the line labelling itself is doubtful (the lattice does not
        settle which line is which): an empty corner then counts lines from a
        label that may be off by one, so the labels stay relative
        (``withheld`` says that the map would otherwise have been called empty).
    min_confidence : float
        Absolute labels need a confidence above this (default
        ``MIN_ABSOLUTE_CONFIDENCE``; 0 keeps every assignment the margin allows).

    Notes
    -----
    Confidence per dot: ``min(1, margin / (EMPTY_MARGIN_CELLS + 1)) ·
    min(1, snr / 10)`` where ``margin`` is how many addition voltages of the
    map lie below the lowest line (common practice, no source). Absolute
    labels need a confidence above ``MIN_ABSOLUTE_CONFIDENCE``.
    """
    xx, yy = np.meshgrid(x, y)
    u = m[0, 0] * xx + m[0, 1] * yy
    v = m[1, 0] * xx + m[1, 1] * yy
    free = ground_state_labels(u, v, addition_V=addition_V, mutual_V=mutual_V, offsets_V=offsets_V)
    if valid is None:
        valid = np.ones(u.shape, bool)
    absolute = []
    conf = []
    withheld = False
    for i in range(2):
        below = free[..., i][valid]
        margin = float(lowest_line[i] - 1 - below.min()) if below.size else 0.0
        # margin in cells: how many further transitions the map would show below the lowest one
        ok = margin >= EMPTY_MARGIN_CELLS
        c = min(1.0, margin / (EMPTY_MARGIN_CELLS + 1.0)) * min(1.0, float(snr) / 10.0) if ok else 0.0
        # below MIN_ABSOLUTE_CONFIDENCE a line missed in the empty corner is about as likely as not
        sure = allow_absolute and c > min_confidence
        withheld = withheld or (ok and not sure)
        ok = ok and sure
        absolute.append(bool(ok))
        conf.append(float(c) if ok else 0.0)
    n_min: tuple[int | None, int | None] = (
        lowest_line[0] - 1 if absolute[0] else None,
        lowest_line[1] - 1 if absolute[1] else None,
    )
    if n_min == (None, None):
        labels = free  # same search, no bound
    else:
        labels = ground_state_labels(u, v, addition_V=addition_V, mutual_V=mutual_V, offsets_V=offsets_V,
                                     n_min=n_min)
    for i in range(2):
        shift = (lowest_line[i] - 1) if absolute[i] else int(labels[..., i][valid].min())
        labels[..., i] -= shift
    regions = []
    flat = labels[valid]
    if flat.size:
        # one integer key per state, sorted like (N1, N2): counts and centroids in one pass each
        lo = flat.min(axis=0)
        span2 = int(flat[:, 1].max() - lo[1]) + 1
        key = (flat[:, 0] - lo[0]) * span2 + (flat[:, 1] - lo[1])
        n_keys = int(key.max()) + 1
        if n_keys <= 4 * key.size:  # a table over the key range (no sort): the same sums, in pixel order
            counts = np.bincount(key, minlength=n_keys)
            keys = np.flatnonzero(counts)
            sx = np.bincount(key, xx[valid], n_keys)[keys]
            sy = np.bincount(key, yy[valid], n_keys)[keys]
            counts = counts[keys]
        else:
            keys, inverse, counts = np.unique(key, return_inverse=True, return_counts=True)
            sx = np.bincount(inverse, xx[valid], keys.size)
            sy = np.bincount(inverse, yy[valid], keys.size)
        for kk, cnt, cx, cy in zip(keys, counts, sx, sy):
            regions.append({"n1": int(kk // span2 + lo[0]), "n2": int(kk % span2 + lo[1]), "x": float(cx / cnt),
                            "y": float(cy / cnt), "pixels": int(cnt)})
    few = bool(all(absolute) and flat.size and np.any(np.all(flat == 0, axis=-1)))
    return ChargeStates(labels=labels, absolute=(absolute[0], absolute[1]), confidence=(conf[0], conf[1]),
                        few_electron=few, regions=tuple(regions), withheld=withheld)


#: A transition of the other dot counts as seen in a dot's empty region when a detected segment of its
#: family passes within this many pixels.
SEEN_WITHIN_PX = 2.5
#: The other dot's transitions must cross at least this many pixels of the empty region for the check.
SEEN_MIN_PIXELS = 8


def lines_seen_where_empty(labels: np.ndarray, valid: np.ndarray, dot: int,
                           segments_px: np.ndarray) -> tuple[int, float]:
    """How much of the other dot's transitions in ``dot``'s empty region the detected lines cover.

    An empty corner is read from the absence of lines below a dot's lowest
    one. A sensor blind in that part of the map (a peak-shaped sensor on its
    flat top, a sensor between two of its own Coulomb peaks) shows no lines
    there either; but then the other dot's lines, which cross the region
    where ``dot`` holds no electron, vanish too. This counts the pixels of the
    other dot's predicted transitions inside the deeper half of the region
    (``labels[..., dot] == 0``, farther from the occupied part than half the
    region's largest depth; the other dot's label changes along x for dot1's
    steep lines and along y for dot2's) and the fraction of them within
    ``SEEN_WITHIN_PX`` of a detected segment of its family.

    Parameters
    ----------
    labels : ndarray of int, shape (ny, nx, 2)
        Absolute labels for ``dot`` (0 = empty).
    valid : ndarray of bool, shape (ny, nx)
    dot : int
        0 (dot1) or 1 (dot2).
    segments_px : ndarray, shape (k, 4)
        The other dot's detected segments as (x0, y0, x1, y1) in pixel indices.

    Returns
    -------
    (int, float)
        Predicted transition pixels in the region, and the fraction seen
        (NaN when there are none).
    """
    from scipy.ndimage import distance_transform_edt

    other = 1 - dot
    empty = valid & (labels[..., dot] == 0)
    if empty.any():
        # the deeper half of the region (farther from the occupied part than half its largest depth): the
        # part the empty call rests on (next to the lowest line a fading sensor still shows some lines)
        depth = distance_transform_edt(empty)
        empty &= depth > 0.5 * depth.max()
    lab = labels[..., other]
    if other == 0:  # dot1 lines: changes between x-neighbours, at (row, col + ½)
        change = (lab[:, 1:] != lab[:, :-1]) & empty[:, 1:] & empty[:, :-1]
        r, c = np.nonzero(change)
        px, py = c + 0.5, r.astype(float)
    else:  # dot2 lines: changes between y-neighbours, at (row + ½, col)
        change = (lab[1:, :] != lab[:-1, :]) & empty[1:, :] & empty[:-1, :]
        r, c = np.nonzero(change)
        px, py = c.astype(float), r + 0.5
    n = int(px.size)
    if n == 0:
        return 0, float("nan")
    from ..lines._geometry import segment_distances

    seg = np.asarray(segments_px, float).reshape(-1, 4)
    if seg.shape[0] == 0:
        return n, 0.0
    dist = segment_distances(np.stack([px, py], axis=1), seg[:, :2], seg[:, 2:]).min(axis=1)
    return n, float(np.mean(dist <= SEEN_WITHIN_PX))
