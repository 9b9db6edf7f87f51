"""Virtual ↔ physical gate voltages: points, whole sweeps, corners and gate limits.

With the square virtual-gate matrix S of a :class:`VirtualGateMatrix`
(``V′ = S V``; gates that are no dot's plunger keep their physical value),
a physical point maps to ``V′ = S V`` and a virtual point to ``V = S⁻¹ V′``.
A virtual sweep is given as offsets ``ΔV′`` of one or two virtual gates from a
physical operating point ``V0``; its physical voltages are
``V = V0 + S⁻¹ ΔV′``. The map is affine, so over a rectangular virtual sweep
every physical gate takes its extreme values at the sweep's corners: checking
the corners against the gate limits checks the whole sweep.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import xarray as xr

from ..errors import InputError
from ..physics.virtual_gates import inverse_propagated_sigma
from .assemble import VirtualGateMatrix

__all__ = [
    "LimitCheck",
    "LimitViolation",
    "SweepCorner",
    "VirtualSweep",
    "check_limits",
    "physical_to_virtual",
    "virtual_sweep",
    "virtual_to_physical",
]

ArrayOrMapping = np.ndarray | Sequence[float] | Mapping[str, float]


def _vector(values: ArrayOrMapping, names: Sequence[str], what: str) -> np.ndarray:
    if isinstance(values, Mapping):
        missing = [n for n in names if n not in values]
        extra = [k for k in values if k not in names]
        if extra:
            raise InputError(what, f"unknown gate(s) {', '.join(map(str, extra))}; expected {', '.join(names)}")
        if missing:
            raise InputError(what, f"missing value(s) for {', '.join(missing)}")
        return np.array([float(values[n]) for n in names])
    arr = np.asarray(values, dtype=float)
    if arr.shape[-1:] != (len(names),):
        raise InputError(what, f"last axis must have {len(names)} entries ({', '.join(names)}), got shape {arr.shape}")
    return arr


def physical_to_virtual(
    vgm: VirtualGateMatrix, physical: ArrayOrMapping
) -> np.ndarray | dict[str, float]:
    """Virtual voltages ``V′ = S V`` of physical voltages.

    Parameters
    ----------
    vgm : VirtualGateMatrix
    physical : mapping gate → V, or array_like, shape (..., n_gates)
        Physical voltages, columns in ``vgm.gates`` order.

    Returns
    -------
    dict (for a mapping) keyed by ``vgm.square_names()``, else ndarray of shape
    (..., n_gates) in that order.
    """
    v = _vector(physical, vgm.gates, "physical")
    out = v @ vgm.square().T
    if isinstance(physical, Mapping):
        return dict(zip(vgm.square_names(), map(float, out)))
    return out


def virtual_to_physical(
    vgm: VirtualGateMatrix, virtual: ArrayOrMapping
) -> np.ndarray | dict[str, float]:
    """Physical voltages ``V = S⁻¹ V′`` of virtual voltages.

    Parameters
    ----------
    vgm : VirtualGateMatrix
    virtual : mapping name → V, or array_like, shape (..., n_gates)
        Virtual voltages keyed/ordered by ``vgm.square_names()`` (``v<plunger>``
        for dots, the gate's own name for the other gates).

    Returns
    -------
    dict (for a mapping) keyed by ``vgm.gates``, else ndarray (..., n_gates).
    """
    names = vgm.square_names()
    v = _vector(virtual, names, "virtual")
    out = v @ np.linalg.inv(vgm.square()).T
    if isinstance(virtual, Mapping):
        return dict(zip(vgm.gates, map(float, out)))
    return out


@dataclass(frozen=True)
class SweepCorner:
    """One corner of a virtual sweep.

    Attributes
    ----------
    virtual : dict
        Offsets of the swept virtual gates at this corner, V.
    physical : dict
        Physical voltage of every gate, V.
    sigma : dict
        Standard error of each physical voltage from the matrix uncertainty
        (first order; unmeasured elements contribute nothing), V.
    """

    virtual: dict[str, float]
    physical: dict[str, float]
    sigma: dict[str, float]


@dataclass(frozen=True, eq=False)
class VirtualSweep:
    """The physical voltages of every point of a 1-D or 2-D virtual sweep.

    Attributes
    ----------
    x_name, y_name : str
        Swept virtual gates (``y_name`` is None for a 1-D sweep).
    physical : xarray.DataArray
        Dims ``(y_name, x_name, "gate")`` (or ``(x_name, "gate")``), the
        virtual offsets as coordinates, ``gate`` = physical gate names; V.
    origin : dict
        Physical operating point, V.
    corners : tuple of SweepCorner
        The 2 (1-D) or 4 (2-D) corners.
    """

    x_name: str
    y_name: str | None
    physical: xr.DataArray
    origin: dict[str, float]
    corners: tuple[SweepCorner, ...]

    def extremes(self) -> dict[str, tuple[float, float]]:
        """(min, max) physical voltage of every gate over the sweep, V."""
        return {
            g: (min(c.physical[g] for c in self.corners), max(c.physical[g] for c in self.corners))
            for g in self.physical["gate"].values.tolist()
        }


def _sweep_values(
    spec: tuple[str, Sequence[float] | np.ndarray], names: Sequence[str], what: str
) -> tuple[str, np.ndarray]:
    if not (isinstance(spec, tuple) and len(spec) == 2):
        raise InputError(what, "expected (virtual_gate_name, values)")
    name, values = spec
    if name not in names:
        hint = f"; did you mean 'v{name}'?" if f"v{name}" in names else ""
        raise InputError(what, f"{name!r} is not a virtual gate of this matrix ({', '.join(names)}){hint}")
    vals = np.asarray(values, dtype=float).ravel()
    if vals.size < 1 or not np.all(np.isfinite(vals)):
        raise InputError(what, f"values of {name!r} must be finite, at least one")
    return str(name), vals


def virtual_sweep(
    vgm: VirtualGateMatrix,
    *,
    x: tuple[str, Sequence[float] | np.ndarray],
    y: tuple[str, Sequence[float] | np.ndarray] | None = None,
    origin: Mapping[str, float] | None = None,
) -> VirtualSweep:
    """Physical voltages of a virtual sweep, point by point, and its corners.

    Parameters
    ----------
    vgm : VirtualGateMatrix
    x, y : (name, values)
        Swept virtual gate (a name of ``vgm.square_names()``) and its offsets
        from the operating point, V. ``y`` is optional (1-D sweep).
    origin : mapping gate → V, optional
        Physical operating point (every gate); default all gates at 0 V, in
        which case the offsets are absolute virtual voltages.

    Returns
    -------
    VirtualSweep

    Notes
    -----
    ``V = V0 + S⁻¹ ΔV′``; the corner errors are the first-order propagation of
    the matrix uncertainty (:func:`~stabtool.physics.virtual_gates.inverse_propagated_sigma`).
    """
    names = vgm.square_names()
    xn, xv = _sweep_values(x, names, "x")
    yn: str | None = None
    yv = np.zeros(0)
    if y is not None:
        yn, yv = _sweep_values(y, names, "y")
    if yn is not None and yn == xn:
        raise InputError("y", f"x and y sweep the same virtual gate {xn!r}")
    v0 = np.zeros(len(vgm.gates)) if origin is None else _vector(origin, vgm.gates, "origin")
    s = vgm.square()
    s_inv = np.linalg.inv(s)
    ix = names.index(xn)
    col_x = s_inv[:, ix]
    if yn is None:
        phys = v0[None, :] + xv[:, None] * col_x[None, :]
        da = xr.DataArray(phys, dims=(xn, "gate"), coords={xn: xv, "gate": list(vgm.gates)},
                          name="physical_voltage", attrs={"units": "V"})
        corner_pts = [{xn: float(xv.min())}, {xn: float(xv.max())}]
    else:
        iy = names.index(yn)
        col_y = s_inv[:, iy]
        phys = (v0[None, None, :] + xv[None, :, None] * col_x[None, None, :]
                + yv[:, None, None] * col_y[None, None, :])
        da = xr.DataArray(phys, dims=(yn, xn, "gate"),
                          coords={yn: yv, xn: xv, "gate": list(vgm.gates)},
                          name="physical_voltage", attrs={"units": "V"})
        corner_pts = [{xn: float(a), yn: float(b)}
                      for b in (yv.min(), yv.max()) for a in (xv.min(), xv.max())]
    corners = []
    s_sig = vgm.square_uncertainty()
    for pt in corner_pts:
        dvp = np.zeros(len(names))
        for k, val in pt.items():
            dvp[names.index(k)] = val
        step = s_inv @ dvp
        sig = inverse_propagated_sigma(s, s_sig, step)
        corners.append(SweepCorner(
            virtual=dict(pt),
            physical={g: float(v0[j] + step[j]) for j, g in enumerate(vgm.gates)},
            sigma={g: float(sig[j]) for j, g in enumerate(vgm.gates)},
        ))
    return VirtualSweep(
        x_name=xn, y_name=yn, physical=da,
        origin={g: float(v0[j]) for j, g in enumerate(vgm.gates)},
        corners=tuple(corners),
    )


@dataclass(frozen=True)
class LimitViolation:
    """A physical gate voltage of a sweep corner outside the allowed range."""

    gate: str
    value: float
    low: float
    high: float
    corner: dict[str, float]

    def message(self) -> str:
        side = "below" if self.value < self.low else "above"
        pt = ", ".join(f"{k}={v:+.6g} V" for k, v in self.corner.items())
        return (f"gate {self.gate} would reach {self.value:.6g} V, {side} its limit "
                f"[{self.low:.6g}, {self.high:.6g}] V (at the corner {pt})")


@dataclass(frozen=True)
class LimitCheck:
    """Result of checking a sweep against gate limits; tests true when no limit is violated.

    Attributes
    ----------
    violations : tuple of LimitViolation
    near : tuple of str
        Gates that stay inside their limits but come within two standard
        errors (of the matrix uncertainty) of one.
    """

    violations: tuple[LimitViolation, ...]
    near: tuple[str, ...]

    @property
    def ok(self) -> bool:
        return not self.violations

    def __bool__(self) -> bool:
        return self.ok

    def message(self) -> str:
        """One line per violation (and per near miss); empty when all is well."""
        lines = [f"LIMIT VIOLATION: {v.message()}" for v in self.violations]
        lines += [f"near a limit: {n}" for n in self.near]
        return "\n".join(lines)


def check_limits(sweep: VirtualSweep, limits: Mapping[str, tuple[float, float]]) -> LimitCheck:
    """Check the physical voltages of a virtual sweep against per-gate limits.

    Parameters
    ----------
    sweep : VirtualSweep
    limits : mapping gate → (low, high), V
        Gates without a limit are not checked.

    Returns
    -------
    LimitCheck
    """
    gates = sweep.physical["gate"].values.tolist()
    violations: list[LimitViolation] = []
    near: list[str] = []
    for g, lim in limits.items():
        if g not in gates:
            raise InputError("limits", f"unknown gate {g!r}; gates of the matrix: {', '.join(gates)}")
        lo, hi = float(lim[0]), float(lim[1])
        if not lo < hi:
            raise InputError("limits", f"gate {g}: lower limit {lo} is not below upper limit {hi}")
        worst: LimitViolation | None = None
        for c in sweep.corners:
            v = c.physical[g]
            if v < lo or v > hi:
                if worst is None or max(lo - v, v - hi) > max(lo - worst.value, worst.value - hi):
                    worst = LimitViolation(g, v, lo, hi, c.virtual)
            else:
                s = c.sigma[g]
                if math.isfinite(s) and s > 0 and (v - 2 * s < lo or v + 2 * s > hi):
                    msg = (f"gate {g} reaches {v:.6g} ± {s:.2g} V at {c.virtual}, within 2σ of "
                           f"its limit [{lo:.6g}, {hi:.6g}] V")
                    if not any(n.startswith(f"gate {g} ") for n in near):
                        near.append(msg)
        if worst is not None:
            violations.append(worst)
    return LimitCheck(violations=tuple(violations), near=tuple(near))
