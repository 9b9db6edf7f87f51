"""The known answer of a synthetic map: :class:`Truth`, the line list and the 2×2 quantities.

``Truth.to_json()`` uses the keys and units of ``stabtool analyze --json``
(conventions file) for the double-dot quantities, plus the generator's own
keys (temperature, tunnel coupling, lines, artefacts, device). The truth is
stored as a JSON string in ``DataArray.attrs["stabtool_truth"]`` so a saved
map carries its own answer; :meth:`Truth.from_attrs` reads it back and
recomputes the charge-state map from the stored device and the map's axes.

Arrays of more than two dots
----------------------------
dot1/dot2 are the two dots most coupled to the x and y gates
(:func:`select_dots`). The 2×2 quantities are the sub-blocks of ``α`` and
``E_C`` for those two dots: they describe the diagram while every other dot
keeps its charge. The other dots sit in their own ground state; wherever their
occupation changes inside the window their transitions appear as lines of
family ``"other"`` in :attr:`Truth.lines`, and ``notes`` says so. The
effective gate capacitances ``e² E_C,sub⁻¹ α_sub`` (what a diagram of the two
dots determines, by the identity ``Cdg = e·[[ΔV1, δ1], [δ2, ΔV2]]⁻¹·M``) are
reported as ``gate_capacitance_aF``; for a double dot they equal ``Cdg``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field, replace
from typing import Any, Mapping

import numpy as np
import xarray as xr

from ..errors import InputError
from ..physics.ci import (
    addition_voltages,
    cdg_from_diagram,
    double_dot_slopes,
    mutual_shifts,
    virtual_gate_matrix,
)
from ..physics.constants import E_AC
from .device import Device
from .ground_state import relevant_vectors

__all__ = ["LineSegment", "Truth", "select_dots", "double_dot_truth", "line_segments", "TRUTH_ATTR"]

#: Attribute of the DataArray that holds the truth JSON.
TRUTH_ATTR = "stabtool_truth"


@dataclass(frozen=True)
class LineSegment:
    """One charge-transition segment in volts.

    Attributes
    ----------
    family : str
        ``"dot1"``, ``"dot2"``, ``"interdot"`` or ``"other"``.
    dots : tuple of str
        Dots whose charge changes across the segment.
    start, end : (x, y) tuples, V
    states : (tuple, tuple)
        Charge states on the two sides (full dot vector each).
    """

    family: str
    dots: tuple[str, ...]
    start: tuple[float, float]
    end: tuple[float, float]
    states: tuple[tuple[int, ...], tuple[int, ...]]

    @property
    def slope(self) -> float:
        """dV_y/dV_x of the segment."""
        dx = self.end[0] - self.start[0]
        dy = self.end[1] - self.start[1]
        return float(dy / dx) if dx != 0 else float(np.inf)

    @property
    def length_V(self) -> float:
        return float(np.hypot(self.end[0] - self.start[0], self.end[1] - self.start[1]))

    def to_dict(self) -> dict[str, Any]:
        return {
            "family": self.family,
            "dots": list(self.dots),
            "start": list(self.start),
            "end": list(self.end),
            "states": [list(self.states[0]), list(self.states[1])],
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "LineSegment":
        return cls(
            family=str(d["family"]),
            dots=tuple(d["dots"]),
            start=(float(d["start"][0]), float(d["start"][1])),
            end=(float(d["end"][0]), float(d["end"][1])),
            states=(tuple(int(v) for v in d["states"][0]), tuple(int(v) for v in d["states"][1])),
        )


def select_dots(device: Device, x_gate: str, y_gate: str) -> tuple[int, int]:
    """Indices ``(dot1, dot2)`` of the two dots most coupled to gates x and y.

    dot1 is the one whose lines are steeper in (x, y), i.e. with the larger
    ``|α_ix/α_iy|`` (conventions file).
    """
    gx, gy = device.gate_index(x_gate), device.gate_index(y_gate)
    a = device.lever_arm
    if device.n_dots == 1:
        return (0, 0)
    ix = int(np.argmax(a[:, gx]))
    order = np.argsort(-a[:, gy])
    iy = int(order[0] if order[0] != ix else order[1])
    def steep(i: int) -> float:
        return abs(a[i, gx]) / max(abs(a[i, gy]), 1e-300)
    return (ix, iy) if steep(ix) >= steep(iy) else (iy, ix)


def double_dot_truth(device: Device, x_gate: str, y_gate: str) -> dict[str, Any]:
    """The conventions-file quantities of the (dot1, dot2) pair in the (x, y) plane."""
    i1, i2 = select_dots(device, x_gate, y_gate)
    gx, gy = device.gate_index(x_gate), device.gate_index(y_gate)
    alpha = device.lever_arm[np.ix_([i1, i2], [gx, gy])]
    ec = device.charging_energy_meV[np.ix_([i1, i2], [i1, i2])]
    s = double_dot_slopes(alpha)
    m = virtual_gate_matrix(alpha)
    dv = addition_voltages(ec, alpha)
    dm = mutual_shifts(ec, alpha)
    cdg = cdg_from_diagram(dv, dm, m)
    return {
        "x_gate": x_gate,
        "y_gate": y_gate,
        "dot1": device.dot_names[i1],
        "dot2": device.dot_names[i2],
        "slopes": {"dot1": s.dot1, "dot2": s.dot2, "interdot": s.interdot},
        "virtual_gate_matrix": m.tolist(),
        "addition_voltages_V": {"dot1": float(dv[0]), "dot2": float(dv[1])},
        "mutual_shifts_V": {"dot1": float(dm[0]), "dot2": float(dm[1])},
        "gate_capacitance_aF": cdg.tolist(),
        "lever_arm": alpha.tolist(),
        "charging_energy_meV": {"dot1": float(ec[0, 0]), "dot2": float(ec[1, 1]), "mutual": float(ec[0, 1])},
    }


def _family(d: np.ndarray, i1: int, i2: int) -> str:
    nz = np.nonzero(d)[0]
    if nz.size == 1 and abs(d[nz[0]]) == 1:
        return "dot1" if nz[0] == i1 else "dot2" if nz[0] == i2 else "other"
    if nz.size == 2 and set(nz.tolist()) == {i1, i2} and d[i1] == -d[i2] and abs(d[i1]) == 1:
        return "interdot"
    return "other"


def line_segments(
    device: Device,
    ground: np.ndarray,
    *,
    x: np.ndarray,
    y: np.ndarray,
    x_gate: str,
    y_gate: str,
    fixed_V: Mapping[str, float],
) -> tuple[LineSegment, ...]:
    """Exact segments of the boundaries between the charge states found in a map.

    For every pair of neighbouring states ``(A, B)`` in ``ground`` the
    boundary ``U(A) = U(B)`` is a straight line in (V_x, V_y); the segment is
    the part of it where A (and B) stay the ground state against every
    competitor ``A + v`` (v a Voronoi-relevant vector), clipped to the
    window. Endpoints are therefore exact triple points or window edges.

    Parameters
    ----------
    ground : ndarray, shape (ny, nx, n_dots)
        Ground states with ``x``, ``y`` the axes (any order).
    """
    i1, i2 = select_dots(device, x_gate, y_gate)
    gx, gy = device.gate_index(x_gate), device.gate_index(y_gate)
    ec = device.ec_eV
    cdg = device.cdg
    v0 = np.array([float(fixed_V.get(g, 0.0)) for g in device.gate_names])
    v0[gx] = v0[gy] = 0.0
    n0c = cdg @ v0 / E_AC + device.offsets
    cx, cy = cdg[:, gx] / E_AC, cdg[:, gy] / E_AC
    xlo, xhi = float(np.min(x)), float(np.max(x))
    ylo, yhi = float(np.min(y)), float(np.max(y))
    pairs = _neighbour_pairs(ground)
    rel = relevant_vectors(ec).astype(float)
    xc, yc = 0.5 * (xlo + xhi), 0.5 * (ylo + yhi)
    out = []
    for a_t, b_t in pairs:
        a, b = np.array(a_t, float), np.array(b_t, float)
        # U(a) − U(c) = k0 + kx x + ky y for c = b and every competitor a + v
        comp = a + rel
        ok = np.all(comp >= 0, axis=1) & ~np.all(comp == b, axis=1)
        cs = np.concatenate([b[None, :], comp[ok]], axis=0)
        d = a[None, :] - cs  # (m, n)
        ed = d @ ec
        k0 = 0.5 * (a @ ec @ a - np.einsum("mi,ij,mj->m", cs, ec, cs)) - ed @ n0c
        kx, ky = -(ed @ cx), -(ed @ cy)
        nrm = np.hypot(kx[0], ky[0])
        if nrm == 0:
            continue
        f = k0[0] + kx[0] * xc + ky[0] * yc
        p0 = np.array([xc - f * kx[0] / nrm**2, yc - f * ky[0] / nrm**2])
        u = np.array([-ky[0], kx[0]]) / nrm
        # constraints c0 + c1 s <= 0 along the line p0 + s u
        c0 = np.concatenate([[xlo - p0[0], p0[0] - xhi, ylo - p0[1], p0[1] - yhi], (k0 + kx * p0[0] + ky * p0[1])[1:]])
        c1 = np.concatenate([[-u[0], u[0], -u[1], u[1]], (kx * u[0] + ky * u[1])[1:]])
        flat = np.abs(c1) < 1e-300
        if np.any(flat & (c0 > 1e-15)):
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            sv = -c0 / c1
        hi = float(np.min(sv[(c1 > 0) & ~flat], initial=np.inf))
        lo = float(np.max(sv[(c1 < 0) & ~flat], initial=-np.inf))
        if not hi > lo:
            continue
        s0, s1 = p0 + lo * u, p0 + hi * u
        if s1[0] < s0[0] or (s1[0] == s0[0] and s1[1] < s0[1]):
            s0, s1 = s1, s0
        dd = b - a
        dots = tuple(device.dot_names[i] for i in np.nonzero(dd)[0])
        out.append(
            LineSegment(
                family=_family(dd, i1, i2),
                dots=dots,
                start=(float(s0[0]), float(s0[1])),
                end=(float(s1[0]), float(s1[1])),
                states=(a_t, b_t),
            )
        )
    return tuple(out)


def _neighbour_pairs(ground: np.ndarray) -> list[tuple[tuple[int, ...], tuple[int, ...]]]:
    """Sorted unique pairs of different states that touch along x or y."""
    nd = ground.shape[-1]
    lo = ground.reshape(-1, nd).min(axis=0)
    span = ground.reshape(-1, nd).max(axis=0) - lo + 1
    radix = np.concatenate([[1], np.cumprod(span[:-1])]).astype(np.int64)
    key = (ground - lo) @ radix
    total = int(np.prod(span))
    found = []
    for ka, kb in ((key[:, 1:], key[:, :-1]), (key[1:, :], key[:-1, :])):
        m = ka != kb
        a, b = ka[m], kb[m]
        found.append(np.minimum(a, b) * total + np.maximum(a, b))
    codes = np.unique(np.concatenate(found))

    def state(k: int) -> tuple[int, ...]:
        digits = []
        for r in span:
            digits.append(int(k % r))
            k //= r
        return tuple(int(v) for v in np.array(digits) + lo)

    return [(state(int(c // total)), state(int(c % total))) for c in codes]


@dataclass(frozen=True)
class Truth:
    """Everything known about a synthetic map.

    Attributes
    ----------
    quantities : dict
        The conventions-file keys (x_gate, y_gate, slopes, virtual_gate_matrix,
        addition_voltages_V, mutual_shifts_V, gate_capacitance_aF, lever_arm,
        charging_energy_meV) plus dot1/dot2 names.
    temperature_K, tunnel_coupling_ueV, bias_mV : float
    readout : str
    lines : tuple of LineSegment
    artefacts : dict
        Artefacts applied, with their realised parameters (e.g. noise std).
    device : Device
    fixed_V : dict
        Voltages of the gates that are not swept, V.
    notes : tuple of str
    charge_state : ndarray, shape (ny, nx, n_dots), int
        Ground state at every pixel, in the map's stored order.
    extra : dict
        Sensor parameters, SNR definition, step height etc.
    """

    quantities: Mapping[str, Any]
    temperature_K: float
    tunnel_coupling_ueV: float
    bias_mV: float
    readout: str
    lines: tuple[LineSegment, ...]
    artefacts: Mapping[str, Any]
    device: Device
    fixed_V: Mapping[str, float]
    notes: tuple[str, ...] = ()
    charge_state: np.ndarray = field(default_factory=lambda: np.zeros((0, 0, 0), int), repr=False, compare=False)
    extra: Mapping[str, Any] = field(default_factory=dict)

    def __getattr__(self, name: str) -> Any:  # convenient access: truth.slopes, truth.lever_arm ...
        q = object.__getattribute__(self, "quantities")
        if name in q:
            return q[name]
        raise AttributeError(name)

    @property
    def x_gate(self) -> str:
        return str(self.quantities["x_gate"])

    @property
    def y_gate(self) -> str:
        return str(self.quantities["y_gate"])

    def lines_of(self, family: str) -> tuple[LineSegment, ...]:
        """Segments of one family."""
        return tuple(s for s in self.lines if s.family == family)

    def to_json(self) -> dict[str, Any]:
        """JSON-ready dict: the ``analyze --json`` keys plus generator keys."""
        d = dict(self.quantities)
        d.update(
            {
                "temperature_K": self.temperature_K,
                "tunnel_coupling_ueV": self.tunnel_coupling_ueV,
                "bias_mV": self.bias_mV,
                "readout": self.readout,
                "lines": [s.to_dict() for s in self.lines],
                "artefacts": dict(self.artefacts),
                "device": self.device.to_dict(),
                "fixed_V": dict(self.fixed_V),
                "notes": list(self.notes),
                **dict(self.extra),
            }
        )
        return d

    def to_json_string(self) -> str:
        return json.dumps(self.to_json(), allow_nan=True)

    @classmethod
    def from_json(cls, d: Mapping[str, Any] | str, *, charge_state: np.ndarray | None = None) -> "Truth":
        """Inverse of :meth:`to_json` (charge state given separately)."""
        if isinstance(d, str):
            d = json.loads(d)
        keys = (
            "x_gate", "y_gate", "dot1", "dot2", "slopes", "virtual_gate_matrix", "addition_voltages_V",
            "mutual_shifts_V", "gate_capacitance_aF", "lever_arm", "charging_energy_meV",
        )
        own = {
            "temperature_K", "tunnel_coupling_ueV", "bias_mV", "readout", "lines", "artefacts", "device",
            "fixed_V", "notes",
        }
        return cls(
            quantities={k: d[k] for k in keys if k in d},
            temperature_K=float(d["temperature_K"]),
            tunnel_coupling_ueV=float(d["tunnel_coupling_ueV"]),
            bias_mV=float(d.get("bias_mV", 0.0)),
            readout=str(d["readout"]),
            lines=tuple(LineSegment.from_dict(s) for s in d["lines"]),
            artefacts=dict(d["artefacts"]),
            device=Device.from_dict(d["device"]),
            fixed_V={k: float(v) for k, v in d["fixed_V"].items()},
            notes=tuple(d.get("notes", ())),
            charge_state=np.zeros((0, 0, 0), int) if charge_state is None else charge_state,
            extra={k: v for k, v in d.items() if k not in own and k not in keys},
        )

    @classmethod
    def from_attrs(cls, da: xr.DataArray) -> "Truth":
        """Recover the truth of a saved synthetic map (charge states recomputed).

        Raises :class:`InputError` when the map carries no truth.
        """
        text = da.attrs.get(TRUTH_ATTR)
        if text is None:
            raise InputError(da.attrs.get("source"), f"the map carries no generator truth (attribute {TRUTH_ATTR!r})")
        try:
            t = cls.from_json(str(text))
        except (json.JSONDecodeError, KeyError, TypeError, ValueError) as exc:
            raise InputError(da.attrs.get("source"), f"the generator truth cannot be read ({exc})") from None
        from .render import charge_state_map  # local import: render imports truth

        x = np.asarray(da[da.dims[-1]].values, float)
        y = np.asarray(da[da.dims[0]].values, float)
        cs = charge_state_map(t.device, x_gate=t.x_gate, y_gate=t.y_gate, x=x, y=y, fixed_V=t.fixed_V)
        return replace(t, charge_state=cs)
