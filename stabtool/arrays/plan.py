"""Plan the pairwise two-gate maps of a dot array (windows and the other gates' voltages).

A map of gates (x, y) measures ``M[dot(x), y]`` and ``M[dot(y), x]`` only if
the lines in it belong to those two dots. Every other dot ``d`` sees its
electrochemical potential move by ``α_dx ΔV_x + α_dy ΔV_y`` during the sweep;
in units of its own addition voltage ``ΔV_d = E_C,d/(e α_dd)`` that is

    ``u_d = M[d, x] ΔV_x/ΔV_d + M[d, y] ΔV_y/ΔV_d``      (M normalised per row).

Held at the middle of its charge cell (the operating point), dot ``d`` keeps
its charge while ``|u_d| < ½`` (neighbours' charges fixed). The plan therefore
chooses, for every pair, the largest symmetric window (in addition voltages of
the two swept dots, capped at ``max_half_width``) for which every other dot's
predicted excursion at the four corners stays below ``margin`` (< ½), using a
rough prior of the cross-couplings (from the device design or a first
neighbour map); then each axis alone is widened as far as the other dots
allow (long lines help the slopes of the nearly vertical/horizontal lines of
weakly coupled gates). The prediction includes the relief when a swept dot
gains an electron (``E_Cm/E_C`` of the parked dot). The other gates are held
at the operating point.

Weakly coupled pairs (far apart in the array, or a plunger and a distant
sensor gate) have lines within a degree or two of the sweep axes. The crossing
points of lines sharper than a pixel are quantised by the pixel grid in the
same way along the whole of such a line, so its slope comes out biased towards
the axis by many of its stated errors (8-dot generator array, 100 px maps at
100 mK: elements of 0.013–0.08 read as 0.000–0.06, up to 35 stated σ; finer
pixels shrink the bias but not the ratio to the stated error, broad lines at
0.6 K remove it). Those pairs are therefore swept along tilted axes — the y
axis also steps the x gate by up to ``tilt`` per volt (and vice versa) — so
that their lines cross the pixel grid at an angle like a neighbour pair's
(≥ 7° from both axes on the generator arrays, instead of 0.5°); the exact 2×2
change of basis
(:func:`stabtool.arrays.measurement.untilt_elements`) gives back the physical
elements. Sweeping combinations of gates is how virtual-gate sweeps are run
in any case (common practice, no source). Pairs whose
window must shrink below ``min_half_width`` (fewer than one line of each swept
dot on each side of the centre) are kept but carry a note: expect lines of
another dot in that map, and do not trust it alone.

This is the usual practice of measuring each pair "with the rest of the
array parked in a fixed charge state" (common practice, no source); see also
T. Hensgens et al., Nature 548, 70 (2017), doi:10.1038/nature23022, and
C. Volk et al., npj Quantum Inf. 5, 29 (2019), doi:10.1038/s41534-019-0146-y,
for pairwise virtual-gate calibration of arrays.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

__all__ = ["ArrayDescription", "PairMapPlan", "plan_pair_maps", "prior_couplings"]


@dataclass(frozen=True)
class ArrayDescription:
    """What a lab knows about an array before calibrating its virtual gates.

    Attributes
    ----------
    plungers : tuple of str
        Plunger gate of each dot (one dot per plunger).
    sensors : tuple of str
        Sensor gates (each the plunger of a sensor dot).
    operating_point_V : mapping gate → V
        Voltages that hold every dot (and the sensor dot) in the middle of
        its charge cell; every gate of ``plungers`` and ``sensors`` needs one.
        Other gates listed here (barriers) are held at these values too.
    addition_voltage_V : mapping gate → V
        Approximate addition voltage of each plunger's (and sensor's) dot on
        its own gate, V.
    positions : mapping gate → (float, float)
        Position of each plunger's/sensor's dot in the array (any unit where
        neighbouring dots are 1 apart); used only by the default prior.
    prior : ndarray, shape (n_rows, n_rows), optional
        Rough cross-couplings ``M[d, g]`` (rows and columns: plungers then
        sensors). Default: :func:`prior_couplings` from ``positions``.
    mutual_prior : ndarray, shape (n_rows, n_rows), optional
        Rough ``E_Cm(d, k)/E_C(d)``: the shift of dot d, in its addition
        voltages, when dot k gains one electron. Default: ``0.35 · prior``
        between array dots and 0 where a sensor dot is involved (ignoring this
        relief only makes the plan more cautious).
    """

    plungers: tuple[str, ...]
    sensors: tuple[str, ...]
    operating_point_V: Mapping[str, float]
    addition_voltage_V: Mapping[str, float]
    positions: Mapping[str, tuple[float, float]] = field(default_factory=dict)
    prior: np.ndarray | None = None
    mutual_prior: np.ndarray | None = None

    @property
    def rows(self) -> tuple[str, ...]:
        """Plungers then sensors."""
        return tuple(self.plungers) + tuple(self.sensors)


@dataclass(frozen=True)
class PairMapPlan:
    """One planned two-gate map.

    Attributes
    ----------
    x_gate, y_gate : str
        The two physical gates of the pair (x fast). The map measures
        ``M[dot(x), y]`` and ``M[dot(y), x]``.
    x_range_V, y_range_V : (float, float)
        Sweep ranges of the two axes, V. For physical axes (no tilt) these
        are the gate voltages; for tilted axes they are offsets ``u``, ``v``
        of the sweep parameters around the operating point (see
        :meth:`physical_voltages`).
    fixed_V : dict gate → V
        Voltages of every gate that is not swept as itself: the other gates,
        and, for tilted axes, also the operating point of x and y.
    half_width : (float, float)
        Half-widths in addition voltages of the two swept dots.
    worst_excursion : float
        Largest predicted ``|u_d|`` of another dot (in its addition voltages).
    note : str
        Empty, or why the map may hold lines of another dot.
    x_direction, y_direction : dict gate → coefficient
        Physical gate steps per volt of the x (y) sweep parameter:
        ``{x_gate: 1}`` (``{y_gate: 1}``) for a plain map; a tilted axis also
        moves the other gate of the pair, e.g. ``{"P1": 1, "P8": 0.25}``.
    """

    x_gate: str
    y_gate: str
    x_range_V: tuple[float, float]
    y_range_V: tuple[float, float]
    fixed_V: dict[str, float]
    half_width: tuple[float, float]
    worst_excursion: float
    note: str = ""
    x_direction: dict[str, float] = field(default_factory=dict)
    y_direction: dict[str, float] = field(default_factory=dict)

    @property
    def name(self) -> str:
        """``"<x>-<y>"``."""
        return f"{self.x_gate}-{self.y_gate}"

    @property
    def tilted(self) -> bool:
        """True when a sweep axis moves both gates of the pair."""
        return any(len(d) > 1 for d in (self.x_direction, self.y_direction))

    @property
    def x_axis(self) -> str:
        """Name of the x sweep axis: the gate itself, or ``"<x>_tilt_<y>"`` in a tilted map
        (a sweep parameter, offset from the operating point; unique to the pair, because the
        same gate is tilted by other amounts in other maps)."""
        return f"{self.x_gate}_tilt_{self.y_gate}" if self.tilted else self.x_gate

    @property
    def y_axis(self) -> str:
        """Name of the y sweep axis: the gate itself, or ``"<y>_tilt_<x>"`` in a tilted map."""
        return f"{self.y_gate}_tilt_{self.x_gate}" if self.tilted else self.y_gate

    @property
    def directions(self) -> dict[str, dict[str, float]]:
        """``{axis name: {physical gate: coefficient}}`` of both axes (the input of
        :func:`stabtool.arrays.pair_from_map` / :func:`~stabtool.arrays.pair_from_analysis`)."""
        return {self.x_axis: dict(self.x_direction or {self.x_gate: 1.0}),
                self.y_axis: dict(self.y_direction or {self.y_gate: 1.0})}

    def physical_voltages(self, x: float, y: float) -> dict[str, float]:
        """Every gate's physical voltage at sweep position (x, y) of this map, V.

        Plain axes: x and y are the gate voltages. Tilted axes:
        ``V_g = fixed_V[g] + x_direction[g]·x + y_direction[g]·y``.
        """
        out = dict(self.fixed_V)
        if not self.tilted:
            out[self.x_gate], out[self.y_gate] = float(x), float(y)
            return out
        for d, val in ((self.x_direction, x), (self.y_direction, y)):
            for g, c in d.items():
                out[g] = out.get(g, 0.0) + float(c) * float(val)
        return out

    def corners(self) -> tuple[dict[str, float], ...]:
        """Physical voltages at the four corners of the window (check them against gate limits)."""
        return tuple(self.physical_voltages(x, y) for y in self.y_range_V for x in self.x_range_V)


_GRID = np.linspace(-1.0, 1.0, 121)


def _count(v: np.ndarray) -> np.ndarray:
    """Signed number of a swept dot's transitions between the cell middle and ``v`` (addition voltages)."""
    return np.sign(v) * np.floor(np.abs(v) + 0.5)


@dataclass(frozen=True)
class _Excursion:
    """Predicted excursion of the parked dots over a window (half-widths in addition voltages).

    Every dot k's potential, in its own addition voltages, moves by
    ``φ_k = A_k·hx·gx + B_k·hy·gy`` over the window (``gx, gy ∈ [−1, 1]``);
    a parked dot d sees ``u_d = φ_d − r_di·n(φ_i) − r_dj·n(φ_j)`` with ``n``
    the swept dots' signed number of transitions. Returns (max |u|, index of that dot).
    """

    others: list[int]
    swept: tuple[int, int]
    a: np.ndarray  # A_k for every row k
    b: np.ndarray  # B_k for every row k
    rel: np.ndarray  # (n_rows, n_rows) mutual relief

    def __call__(self, hx: float, hy: float) -> tuple[float, int]:
        if not self.others:
            return 0.0, -1
        gx, gy = _GRID[None, :], _GRID[:, None]
        i, j = self.swept
        ni = _count(self.a[i] * hx * gx + self.b[i] * hy * gy)
        nj = _count(self.a[j] * hx * gx + self.b[j] * hy * gy)
        o = np.asarray(self.others)
        u = (self.a[o, None, None] * hx * gx[None] + self.b[o, None, None] * hy * gy[None]
             - self.rel[o, i, None, None] * ni[None] - self.rel[o, j, None, None] * nj[None])
        worst = np.abs(u).reshape(len(self.others), -1).max(axis=1)
        return float(worst.max()), self.others[int(np.argmax(worst))]


def _grow(fits: Callable[[float], bool], lo: float, hi: float) -> float:
    """Largest value in [lo, hi] for which ``fits`` holds (``fits(lo)`` assumed; bisection, 2⁻²⁰ of the span)."""
    if fits(hi):
        return hi
    for _ in range(20):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if fits(mid) else (lo, mid)
    return lo


def _fits_square(exc: "_Excursion", limit: float) -> Callable[[float], bool]:
    """``v ↦`` the square window of half-width ``v`` keeps the other dots within ``limit``."""
    return lambda v: bool(exc(v, v)[0] <= limit)


def _fits_x(exc: "_Excursion", hy: float, limit: float) -> Callable[[float], bool]:
    """``v ↦`` the window of half-widths (``v``, ``hy``) keeps the other dots within ``limit``."""
    return lambda v: bool(exc(v, hy)[0] <= limit)


def _fits_y(exc: "_Excursion", hx: float, limit: float) -> Callable[[float], bool]:
    """``v ↦`` the window of half-widths (``hx``, ``v``) keeps the other dots within ``limit``."""
    return lambda v: bool(exc(hx, v)[0] <= limit)


def prior_couplings(
    positions: Mapping[str, tuple[float, float]],
    rows: Sequence[str],
    *,
    neighbour: float = 0.5,
    decay: float = 0.45,
    floor: float = 0.02,
    sensors: Sequence[str] = (),
    to_sensor_gate: float = 0.2,
) -> np.ndarray:
    """A deliberately generous guess of the cross-couplings from the dots' positions.

    ``M0[d, g] = max(neighbour · decay^(r − 1), floor)`` for dot–gate distance
    ``r ≥ 1`` (closer than 1, e.g. a sensor between two dots: ``neighbour``).
    Neighbour ratios of 0.2–0.6 are typical of gate-defined arrays (common
    practice, no source); the guess errs on the large side so that the plan
    keeps other dots parked. A sensor gate is usually far from the array dots
    and weakly coupled to them: ``M0[d, s] = max(to_sensor_gate · decay^(r − 1), floor)``
    for array dot d and sensor gate s.

    Returns
    -------
    ndarray, shape (len(rows), len(rows)); 1 on the diagonal.
    """
    missing = [g for g in rows if g not in positions]
    if missing:
        raise InputError("positions", f"no position for gate(s) {', '.join(missing)}")
    p = np.array([np.asarray(positions[g], float).reshape(-1)[:2] if np.size(positions[g]) >= 2
                  else (float(np.ravel(positions[g])[0]), 0.0) for g in rows])
    r = np.linalg.norm(p[:, None, :] - p[None, :, :], axis=-1)
    m = np.maximum(neighbour * decay ** np.maximum(r - 1.0, 0.0), floor)
    is_s = np.array([g in set(sensors) for g in rows])
    m_s = np.maximum(to_sensor_gate * decay ** np.maximum(r - 1.0, 0.0), floor)
    sel = (~is_s)[:, None] & is_s[None, :]
    m[sel] = m_s[sel]
    np.fill_diagonal(m, 1.0)
    return m


def plan_pair_maps(
    desc: ArrayDescription,
    *,
    pairs: Sequence[tuple[str, str]] | None = None,
    max_half_width: float = 1.5,
    min_half_width: float = 0.7,
    margin: float = 0.42,
    both_orientations: bool = False,
    tilt: float = 0.25,
) -> tuple[PairMapPlan, ...]:
    """Plan one map per gate pair: windows and fixed voltages that park the other dots.

    Parameters
    ----------
    desc : ArrayDescription
    pairs : sequence of (x, y), optional
        Default: every plunger–plunger pair and every plunger–sensor pair
        (the sensor on y), so that every element — far couplings included —
        is measured in a map where its dot is one of the two swept dots.
    max_half_width : float
        Largest half-width, in addition voltages of the swept dot (1.5 gives
        up to three transitions of each swept dot).
    min_half_width : float
        Below this the map still gets planned (at this size) with a note.
    margin : float
        Largest allowed excursion of another dot, in its addition voltages
        (< 0.5, the distance from the cell middle to its edge).
    both_orientations : bool
        Also plan every pair with x and y swapped (the default pairs only):
        twice the maps, but every element is measured twice by maps in which
        the detector sees its lines turned by 90°, so the assembly's χ² tests
        whether the stated errors hold.
    tilt : float
        Weakly coupled pairs are swept on tilted axes: where the prior
        coupling ``m = M0[dot(x), y]`` is below ``tilt``, the y axis also steps
        x by ``tilt − m`` per volt (``y_direction = {x: tilt − m, y: 1}``), so
        that dot(x)'s lines look like those of a pair coupled by about
        ``tilt``; likewise the x axis steps y where ``M0[dot(y), x] < tilt``.
        Otherwise the lines
        of such a pair lie within a degree or two of an axis, where the
        crossing points of sharp lines are quantised by the pixel grid in a
        way that does not average out along the line (the slopes come out
        biased towards the axis, by many of their stated errors). 0: plain
        axes for every pair. :func:`~stabtool.arrays.pair_from_map` converts
        the tilted map's elements back to the physical gates.

    Returns
    -------
    tuple of PairMapPlan

    Examples
    --------
    >>> desc = ArrayDescription(
    ...     plungers=("P1", "P2", "P3"), sensors=("SG",),
    ...     operating_point_V={"P1": 0.07, "P2": 0.07, "P3": -0.01, "SG": 0.04},
    ...     addition_voltage_V={"P1": 0.042, "P2": 0.039, "P3": 0.042, "SG": 0.037},
    ...     positions={"P1": (0, 0), "P2": (1, 0), "P3": (2, 0), "SG": (1, 0.8)})
    >>> [p.name for p in plan_pair_maps(desc)][:3]
    ['P1-P2', 'P1-P3', 'P2-P3']
    """
    rows = desc.rows
    if len(set(rows)) != len(rows):
        raise InputError("plungers", "a gate is listed twice among plungers/sensors")
    for name, mp in (("operating_point_V", desc.operating_point_V), ("addition_voltage_V", desc.addition_voltage_V)):
        missing = [g for g in rows if g not in mp]
        if missing:
            raise InputError(name, f"no value for gate(s) {', '.join(missing)}")
    if not 0.0 < margin < 0.5:
        raise InputError("margin", f"must be in (0, 0.5), got {margin}")
    if not 0.0 <= tilt < 1.0:
        raise InputError("tilt", f"must be in [0, 1), got {tilt}")
    if not 0.0 < min_half_width <= max_half_width:
        raise InputError("min_half_width", "need 0 < min_half_width <= max_half_width")
    m0 = desc.prior if desc.prior is not None else prior_couplings(desc.positions, rows, sensors=desc.sensors)
    m0 = np.abs(np.asarray(m0, float))
    if m0.shape != (len(rows), len(rows)):
        raise InputError("prior", f"expected shape {(len(rows), len(rows))}, got {m0.shape}")
    if desc.mutual_prior is not None:
        rel = np.abs(np.asarray(desc.mutual_prior, float))
        if rel.shape != m0.shape:
            raise InputError("mutual_prior", f"expected shape {m0.shape}, got {rel.shape}")
    else:
        rel = 0.35 * m0
        ns = len(desc.plungers)
        rel[ns:, :] = 0.0
        rel[:, ns:] = 0.0
    add = np.array([float(desc.addition_voltage_V[g]) for g in rows])
    if np.any(~np.isfinite(add) | (add <= 0)):
        raise InputError("addition_voltage_V", "addition voltages must be positive")
    if pairs is None:
        pl, se = list(desc.plungers), list(desc.sensors)
        pairs = list(itertools.combinations(pl, 2)) + [(p, s) for s in se for p in pl]
        if both_orientations:
            pairs += [(y, x) for x, y in pairs]
    idx = {g: k for k, g in enumerate(rows)}
    out = []
    for x, y in pairs:
        if x not in idx or y not in idx or x == y:
            raise InputError("pairs", f"pair ({x!r}, {y!r}) is not two different plunger/sensor gates")
        i, j = idx[x], idx[y]
        others = [d for d in range(len(rows)) if d not in (i, j)]
        # tilted axes where a family would lie within a few degrees of an axis: the lines of dot(x)
        # get slope −(1 + tilt·M[x,y])/(M[x,y] + tilt) instead of −1/M[x,y] (y axis moves x too),
        # likewise dot(y) with the x axis moving y
        t_y = max(tilt - m0[i, j], 0.0)  # coefficient of x on the y axis (for dot(x)'s lines)
        t_x = max(tilt - m0[j, i], 0.0)  # coefficient of y on the x axis (for dot(y)'s lines)
        ax, ay, bx, by = 1.0, t_x, t_y, 1.0
        exc = _Excursion(
            others=others, swept=(i, j),
            a=(m0[:, i] * ax + m0[:, j] * ay) * add[i] / add,
            b=(m0[:, i] * bx + m0[:, j] * by) * add[j] / add,
            rel=rel,
        )
        h = _grow(_fits_square(exc, margin), 0.0, max_half_width)
        note = ""
        if h < min_half_width:
            k = exc(min_half_width, min_half_width)[1]
            note = (f"window limited by dot {rows[k]}: a window of ±{min_half_width:g} addition voltages "
                    "probably shows its lines too")
            h = min_half_width
        # then widen each axis alone as far as the other dots allow (long lines help the slopes)
        limit = max(margin, exc(h, h)[0])
        hx = _grow(_fits_x(exc, h, limit), h, max_half_width)
        hy = _grow(_fits_y(exc, hx, limit), h, max_half_width)
        ex = exc(hx, hy)[0]
        cx, cy = float(desc.operating_point_V[x]), float(desc.operating_point_V[y])
        if t_x or t_y:
            fixed = {g: float(v) for g, v in desc.operating_point_V.items()}
            xr, yr = (-hx * add[i], hx * add[i]), (-hy * add[j], hy * add[j])
            xd = {x: 1.0, y: float(t_x)} if t_x else {x: 1.0}
            yd = {x: float(t_y), y: 1.0} if t_y else {y: 1.0}
        else:
            fixed = {g: float(v) for g, v in desc.operating_point_V.items() if g not in (x, y)}
            xr, yr = (cx - hx * add[i], cx + hx * add[i]), (cy - hy * add[j], cy + hy * add[j])
            xd, yd = {x: 1.0}, {y: 1.0}
        out.append(PairMapPlan(
            x_gate=x, y_gate=y, x_range_V=xr, y_range_V=yr,
            fixed_V=fixed, half_width=(hx, hy), worst_excursion=ex, note=note,
            x_direction=xd, y_direction=yd,
        ))
    return tuple(out)
