"""One analysed two-gate map of an array, reduced to the two matrix elements it measures.

A map of gates (x, y) measures two elements of the array's normalised
virtual-gate matrix (see :mod:`stabtool.physics.virtual_gates`):

* ``m_xy = M[dot(x), y] = α_{dot(x),y} / α_{dot(x),x}`` from the lines of the
  dot whose plunger is x ("dot1" of the conventions file), and
* ``m_yx = M[dot(y), x] = α_{dot(y),x} / α_{dot(y),y}`` from the lines of the
  dot whose plunger is y ("dot2").

These are the off-diagonal elements of the 2×2 ``virtual_gate_matrix`` of
``stabtool analyze --json``. For a map of a plunger against the sensor gate,
"dot2" is the sensor dot.

A map may be swept along tilted axes (see :mod:`stabtool.arrays.plan`): the
x sweep parameter u steps the gates by ``a = (a_x, a_y)`` per volt, the y
parameter v by ``b = (b_x, b_y)``. The analysis then measures the matrix in
(u, v), ``M_uv = M A`` restricted to the pair (``A = [a b]``, columns), and
:func:`untilt_elements` gives back the physical elements:

    ``M[dot(x), y] = (m a_x − b_x)/(b_y − m a_y)``,  ``m = M_uv[dot(x), v]``;
    ``M[dot(y), x] = (m′ b_y − a_y)/(a_x − m′ b_x)``, ``m′ = M_uv[dot(y), u]``,

with first-order errors ``det A/(b_y − m a_y)²·σ_m`` and
``det A/(a_x − m′ b_x)²·σ_m′`` (change of basis of the row vectors, common
linear algebra, no source).
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ..errors import InputError
from ..physics.virtual_gates import element_from_x_dot_slope, element_from_y_dot_slope
from ..quality import Quality

__all__ = ["PairMeasurement", "pair_from_analysis", "pair_from_map", "read_pair_json", "untilt_elements"]

#: Map attribute that may describe tilted sweep axes: ``{axis: {gate: coefficient}}`` (or its JSON text).
SWEEP_DIRECTIONS_ATTR = "stabtool_sweep_directions"

# Keys under which an analysis may store the element errors of its 2×2 matrix.
_MATRIX_ERROR_KEYS = (
    "virtual_gate_matrix_errors",
    "virtual_gate_matrix_error",
    "virtual_gate_matrix_err",
    "virtual_gate_matrix_sigma",
)


@dataclass(frozen=True)
class PairMeasurement:
    """The two cross-couplings measured by one map of gates (x, y).

    Attributes
    ----------
    x_gate, y_gate : str
        Gates on x and y.
    m_xy, m_xy_err : float
        ``M[dot(x), y]`` and its standard error (NaN when not measured).
    m_yx, m_yx_err : float
        ``M[dot(y), x]`` and its standard error (NaN when not measured).
    source : str
        Where it came from (file name), used in messages and the output.
    quality : Quality
        Verdict of the analysis that produced it.
    """

    x_gate: str
    y_gate: str
    m_xy: float
    m_xy_err: float
    m_yx: float
    m_yx_err: float
    source: str = ""
    quality: Quality = field(default_factory=Quality)

    def __post_init__(self) -> None:
        if not self.x_gate or not self.y_gate:
            raise InputError(self.source or None, "x_gate and y_gate must be non-empty gate names")
        if self.x_gate == self.y_gate:
            raise InputError(self.source or None, f"x and y gates are the same gate {self.x_gate!r}")

    @classmethod
    def from_slopes(
        cls,
        x_gate: str,
        y_gate: str,
        *,
        dot1_slope: float,
        dot1_slope_err: float,
        dot2_slope: float,
        dot2_slope_err: float,
        source: str = "",
        quality: Quality | None = None,
    ) -> PairMeasurement:
        """Build from the slopes dV_y/dV_x of the dot1 (x-plunger) and dot2 (y-plunger) lines.

        ``m_xy = −1/s1`` (error ``σ_s1/s1²``), ``m_yx = −s2`` (error ``σ_s2``).
        """
        a = element_from_x_dot_slope(dot1_slope, dot1_slope_err)
        b = element_from_y_dot_slope(dot2_slope, dot2_slope_err)
        return cls(
            x_gate=x_gate,
            y_gate=y_gate,
            m_xy=a.value,
            m_xy_err=a.sigma,
            m_yx=b.value,
            m_yx_err=b.sigma,
            source=source,
            quality=quality if quality is not None else Quality(),
        )

    def to_dict(self) -> dict[str, Any]:
        """JSON form (NaN as null)."""
        return {
            "source": self.source,
            "x_gate": self.x_gate,
            "y_gate": self.y_gate,
            "m_xy": _json_float(self.m_xy),
            "m_xy_err": _json_float(self.m_xy_err),
            "m_yx": _json_float(self.m_yx),
            "m_yx_err": _json_float(self.m_yx_err),
            "quality": self.quality.to_dict(),
        }


def _json_float(v: float) -> float | None:
    return None if v is None or not math.isfinite(v) else float(v)


def _finite_or(v: Any, default: float) -> float:
    """The JSON number ``v`` when it is finite, else ``default``."""
    x = _num(v)
    return x if math.isfinite(x) else default


def _num(v: Any) -> float:
    """A JSON number (or null) as float; null → NaN."""
    if v is None:
        return float("nan")
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise TypeError(f"{v!r} is not a number")
    return float(v)


def _matrix_errors(obj: Mapping[str, Any]) -> Any:
    for key in _MATRIX_ERROR_KEYS:
        if key in obj and obj[key] is not None:
            return obj[key]
    unc = obj.get("uncertainties")
    if isinstance(unc, Mapping) and unc.get("virtual_gate_matrix") is not None:
        return unc["virtual_gate_matrix"]
    return None


def pair_from_analysis(
    obj: Mapping[str, Any],
    *,
    source: str = "",
    directions: Mapping[str, Mapping[str, float]] | None = None,
) -> PairMeasurement:
    """Reduce an analysis result (the JSON object of ``stabtool analyze --json``) to a pair.

    Parameters
    ----------
    obj : mapping
        Needs ``x_gate``, ``y_gate`` and either ``virtual_gate_matrix`` or
        ``slopes``. Errors are taken from an explicit matrix-error entry when
        present (``virtual_gate_matrix_errors`` or
        ``uncertainties.virtual_gate_matrix``), else propagated from
        ``slope_errors``.
    source : str
        File name used in messages.
    directions : mapping, optional
        ``{axis name: {gate: coefficient}}`` for a map swept along tilted
        axes (:attr:`stabtool.arrays.PairMapPlan.directions`); the result is
        converted to the two physical gates (:func:`untilt_elements`). Axes
        not listed are physical gates.

    Raises
    ------
    InputError
        When the object lacks the gate names or any usable coupling, or the
        directions do not describe two independent combinations of two gates.
    """
    src = source or None
    if not isinstance(obj, Mapping):
        raise InputError(src, "expected a JSON object with x_gate, y_gate and virtual_gate_matrix")
    xg, yg = obj.get("x_gate"), obj.get("y_gate")
    if not isinstance(xg, str) or not isinstance(yg, str):
        raise InputError(src, "missing 'x_gate'/'y_gate' (gate names); is this the output of "
                         "'stabtool analyze --json'?")
    q = obj.get("quality")
    quality = Quality()
    if isinstance(q, Mapping):
        quality = Quality(ok=bool(q.get("ok", False)), warnings=tuple(str(w) for w in q.get("warnings", ())))
    try:
        slopes = obj.get("slopes") or {}
        slope_err = obj.get("slope_errors") or {}
        from_slopes = PairMeasurement.from_slopes(
            xg, yg,
            dot1_slope=_num(slopes.get("dot1")),
            dot1_slope_err=_num(slope_err.get("dot1")),
            dot2_slope=_num(slopes.get("dot2")),
            dot2_slope_err=_num(slope_err.get("dot2")),
            source=source,
            quality=quality,
        )
        m_xy, m_xy_err = from_slopes.m_xy, from_slopes.m_xy_err
        m_yx, m_yx_err = from_slopes.m_yx, from_slopes.m_yx_err
        vgm = obj.get("virtual_gate_matrix")
        if vgm is not None:
            m_xy, m_yx = _finite_or(vgm[0][1], m_xy), _finite_or(vgm[1][0], m_yx)
        errs = _matrix_errors(obj)
        if errs is not None:
            m_xy_err, m_yx_err = _finite_or(errs[0][1], m_xy_err), _finite_or(errs[1][0], m_yx_err)
    except (TypeError, IndexError, KeyError, AttributeError) as exc:
        raise InputError(src, f"malformed slopes/virtual_gate_matrix entry ({exc})") from None
    if not (math.isfinite(m_xy) or math.isfinite(m_yx)):
        raise InputError(src, f"no cross-coupling could be read for gates {xg!r}/{yg!r} "
                         "(virtual_gate_matrix and slopes are null)")
    pm = PairMeasurement(
        x_gate=xg, y_gate=yg, m_xy=m_xy, m_xy_err=m_xy_err, m_yx=m_yx, m_yx_err=m_yx_err,
        source=source, quality=quality,
    )
    if directions and (xg in directions or yg in directions):
        pm = _untilt(pm, directions, src)
    return pm


def untilt_elements(
    m_uv_xy: float,
    m_uv_xy_err: float,
    m_uv_yx: float,
    m_uv_yx_err: float,
    *,
    a: tuple[float, float],
    b: tuple[float, float],
) -> tuple[float, float, float, float]:
    """Physical elements of a pair from the elements measured on tilted axes.

    Parameters
    ----------
    m_uv_xy, m_uv_xy_err : float
        ``M_uv[dot(x), v]`` (normalised on u) and its standard error.
    m_uv_yx, m_uv_yx_err : float
        ``M_uv[dot(y), u]`` (normalised on v) and its standard error.
    a, b : (float, float)
        Steps of the (x, y) gates per volt of the u (x axis) and v (y axis)
        sweep parameters; ``a = (1, 0), b = (0, 1)`` for a plain map.

    Returns
    -------
    (m_xy, m_xy_err, m_yx, m_yx_err) : floats
        ``M[dot(x), y]``, ``M[dot(y), x]`` and their first-order errors (NaN
        where the input is NaN or the conversion is singular).
    """
    ax, ay = (float(v) for v in a)
    bx, by = (float(v) for v in b)
    det = ax * by - ay * bx
    if not math.isfinite(det) or det == 0.0:
        raise InputError("directions", "the two sweep directions are parallel (no 2-D map)")
    nan = float("nan")
    m_xy = e_xy = m_yx = e_yx = nan
    den = by - m_uv_xy * ay
    if math.isfinite(m_uv_xy) and den != 0.0:
        m_xy = (m_uv_xy * ax - bx) / den
        e_xy = abs(det) / den**2 * abs(m_uv_xy_err) if math.isfinite(m_uv_xy_err) else nan
    den = ax - m_uv_yx * bx
    if math.isfinite(m_uv_yx) and den != 0.0:
        m_yx = (m_uv_yx * by - ay) / den
        e_yx = abs(det) / den**2 * abs(m_uv_yx_err) if math.isfinite(m_uv_yx_err) else nan
    return m_xy, e_xy, m_yx, e_yx


def _untilt(pm: PairMeasurement, directions: Mapping[str, Mapping[str, float]], src: Any) -> PairMeasurement:
    """Convert a pair measured on axes named in ``directions`` to its physical gates."""
    dirs = {}
    for axis in (pm.x_gate, pm.y_gate):
        d = directions.get(axis, {axis: 1.0})
        if not isinstance(d, Mapping) or not d:
            raise InputError(src, f"sweep direction of axis {axis!r} must be {{gate: coefficient}}")
        try:
            dirs[axis] = {str(g): float(c) for g, c in d.items()}
        except (TypeError, ValueError):
            raise InputError(src, f"sweep direction of axis {axis!r} has a non-numeric coefficient") from None
    dx, dy = dirs[pm.x_gate], dirs[pm.y_gate]
    gates = list(dict.fromkeys(list(dx) + list(dy)))
    if len(gates) != 2:
        raise InputError(src, f"tilted axes {pm.x_gate!r}/{pm.y_gate!r} must combine exactly two gates, "
                         f"got {', '.join(gates)}")
    xg = max(dx, key=lambda g: abs(dx[g]))
    yg = gates[1] if gates[0] == xg else gates[0]
    if abs(dy.get(yg, 0.0)) <= abs(dy.get(xg, 0.0)):
        raise InputError(src, f"axis {pm.y_gate!r} must move {yg!r} more than {xg!r}")
    a = (dx.get(xg, 0.0), dx.get(yg, 0.0))
    b = (dy.get(xg, 0.0), dy.get(yg, 0.0))
    m_xy, e_xy, m_yx, e_yx = untilt_elements(pm.m_xy, pm.m_xy_err, pm.m_yx, pm.m_yx_err, a=a, b=b)
    return PairMeasurement(x_gate=xg, y_gate=yg, m_xy=m_xy, m_xy_err=e_xy, m_yx=m_yx, m_yx_err=e_yx,
                           source=pm.source, quality=pm.quality)


def read_pair_json(path: str | os.PathLike[str]) -> PairMeasurement:
    """Read one ``stabtool analyze --json`` output file as a :class:`PairMeasurement`."""
    p = Path(path)
    try:
        obj = json.loads(p.read_text())
    except FileNotFoundError:
        raise InputError(p, "file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(p, f"cannot read ({exc.__class__.__name__})") from None
    except json.JSONDecodeError as exc:
        raise InputError(p, f"not valid JSON (line {exc.lineno}: {exc.msg})") from None
    return pair_from_analysis(obj, source=str(p))


def pair_from_map(
    da: Any,
    *,
    analyzer: Any = None,
    source: str | None = None,
    directions: Mapping[str, Mapping[str, float]] | None = None,
) -> PairMeasurement:
    """Analyse a map (2-D DataArray) and reduce the result to a :class:`PairMeasurement`.

    Parameters
    ----------
    da : xarray.DataArray
        A two-gate map in the stabtool data model.
    analyzer : stabtool.analysis.Analyzer, optional
        The configured pipeline (default ``Analyzer()``).
    source : str, optional
        Name used in messages (default ``da.attrs["source"]``).
    directions : mapping, optional
        Sweep directions of tilted axes (see :func:`pair_from_analysis`).
        Default: the map's attribute ``stabtool_sweep_directions`` (a mapping
        or its JSON text), if present.
    """
    if analyzer is None:
        from ..analysis import Analyzer

        analyzer = Analyzer()
    res = analyzer(da)
    obj = res.to_json()
    if isinstance(obj, str):
        obj = json.loads(obj)
    src = source if source is not None else str(da.attrs.get("source", f"{da.dims[-1]}/{da.dims[0]} map"))
    if directions is None:
        attr = getattr(da, "attrs", {}).get(SWEEP_DIRECTIONS_ATTR)
        if isinstance(attr, str):
            try:
                attr = json.loads(attr)
            except json.JSONDecodeError:
                raise InputError(src, f"attribute {SWEEP_DIRECTIONS_ATTR} is not valid JSON") from None
        if attr is not None and not isinstance(attr, Mapping):
            raise InputError(src, f"attribute {SWEEP_DIRECTIONS_ATTR} must be {{axis: {{gate: coefficient}}}}")
        directions = attr
    return pair_from_analysis(obj, source=src, directions=directions)
