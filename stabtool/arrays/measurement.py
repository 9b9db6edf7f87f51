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

__all__ = ["PairMeasurement", "pair_from_analysis", "pair_from_map", "read_pair_json"]

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


def pair_from_analysis(obj: Mapping[str, Any], *, source: str = "") -> PairMeasurement:
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

    Raises
    ------
    InputError
        When the object lacks the gate names or any usable coupling.
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
            m_xy_v, m_yx_v = _num(vgm[0][1]), _num(vgm[1][0])
            if math.isfinite(m_xy_v):
                m_xy = m_xy_v
            if math.isfinite(m_yx_v):
                m_yx = m_yx_v
        errs = _matrix_errors(obj)
        if errs is not None:
            e_xy, e_yx = _num(errs[0][1]), _num(errs[1][0])
            if math.isfinite(e_xy):
                m_xy_err = e_xy
            if math.isfinite(e_yx):
                m_yx_err = e_yx
    except (TypeError, IndexError, KeyError, AttributeError) as exc:
        raise InputError(src, f"malformed slopes/virtual_gate_matrix entry ({exc})") from None
    if not (math.isfinite(m_xy) or math.isfinite(m_yx)):
        raise InputError(src, f"no cross-coupling could be read for gates {xg!r}/{yg!r} "
                         "(virtual_gate_matrix and slopes are null)")
    return PairMeasurement(
        x_gate=xg, y_gate=yg, m_xy=m_xy, m_xy_err=m_xy_err, m_yx=m_yx, m_yx_err=m_yx_err,
        source=source, quality=quality,
    )


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


def pair_from_map(da: Any, *, analyzer: Any = None, source: str | None = None) -> PairMeasurement:
    """Analyse a map (2-D DataArray) and reduce the result to a :class:`PairMeasurement`.

    Parameters
    ----------
    da : xarray.DataArray
        A two-gate map in the stabtool data model.
    analyzer : stabtool.analysis.Analyzer, optional
        The configured pipeline (default ``Analyzer()``).
    source : str, optional
        Name used in messages (default ``da.attrs["source"]``).
    """
    if analyzer is None:
        from ..analysis import Analyzer

        analyzer = Analyzer()
    res = analyzer(da)
    obj = res.to_json()
    if isinstance(obj, str):
        obj = json.loads(obj)
    src = source if source is not None else str(da.attrs.get("source", f"{da.dims[-1]}/{da.dims[0]} map"))
    return pair_from_analysis(obj, source=src)
