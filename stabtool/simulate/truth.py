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
    pa, pb = _neighbour_pairs(ground)
    if pa.shape[0] == 0:
        return ()
    rel = relevant_vectors(ec).astype(float)
    xc, yc = 0.5 * (xlo + xhi), 0.5 * (ylo + yhi)
    a, b = pa.astype(float), pb.astype(float)
    npair, nd = a.shape
    # competitors of every pair: b first, then a + v for every relevant v
    comp = a[:, None, :] + rel[None, :, :]
    valid = np.all(comp >= 0, axis=2) & ~np.all(comp == b[:, None, :], axis=2)
    cs = np.concatenate([b[:, None, :], comp], axis=1)  # (P, m, n)
    valid = np.concatenate([np.ones((npair, 1), bool), valid], axis=1)
    # U(a) − U(c) = k0 + kx x + ky y for each competitor c
    d = a[:, None, :] - cs
    ed = d @ ec
    ua = np.einsum("pi,ij,pj->p", a, ec, a)
    uc = np.einsum("pmi,pmi->pm", cs @ ec, cs)  # BLAS product first: einsum of three operands is slow
    k0 = 0.5 * (ua[:, None] - uc) - ed @ n0c
    kx, ky = -(ed @ cx), -(ed @ cy)
    nrm = np.hypot(kx[:, 0], ky[:, 0])
    okn = nrm > 0
    nrm_s = np.where(okn, nrm, 1.0)
    f = k0[:, 0] + kx[:, 0] * xc + ky[:, 0] * yc
    p0x = xc - f * kx[:, 0] / nrm_s**2
    p0y = yc - f * ky[:, 0] / nrm_s**2
    ux, uy = -ky[:, 0] / nrm_s, kx[:, 0] / nrm_s
    # constraints c0 + c1 s <= 0 along the line p0 + s u (invalid competitors: 0·s − 1 <= 0)
    c0 = np.concatenate(
        [
            np.stack([xlo - p0x, p0x - xhi, ylo - p0y, p0y - yhi], axis=1),
            np.where(valid[:, 1:], k0[:, 1:] + kx[:, 1:] * p0x[:, None] + ky[:, 1:] * p0y[:, None], -1.0),
        ],
        axis=1,
    )
    c1 = np.concatenate(
        [
            np.stack([-ux, ux, -uy, uy], axis=1),
            np.where(valid[:, 1:], kx[:, 1:] * ux[:, None] + ky[:, 1:] * uy[:, None], 0.0),
        ],
        axis=1,
    )
    flat = np.abs(c1) < 1e-300
    dead = np.any(flat & (c0 > 1e-15), axis=1) | ~okn
    with np.errstate(divide="ignore", invalid="ignore"):
        sv = -c0 / c1
    hi = np.min(np.where((c1 > 0) & ~flat, sv, np.inf), axis=1)
    lo = np.max(np.where((c1 < 0) & ~flat, sv, -np.inf), axis=1)
    keep = ~dead & (hi > lo)
    s0 = np.stack([p0x + lo * ux, p0y + lo * uy], axis=1)
    s1 = np.stack([p0x + hi * ux, p0y + hi * uy], axis=1)
    swap = (s1[:, 0] < s0[:, 0]) | ((s1[:, 0] == s0[:, 0]) & (s1[:, 1] < s0[:, 1]))
    s0, s1 = np.where(swap[:, None], s1, s0), np.where(swap[:, None], s0, s1)
    out = []
    names = device.dot_names
    for k in np.flatnonzero(keep):
        dd = pb[k] - pa[k]
        out.append(
            LineSegment(
                family=_family(dd, i1, i2),
                dots=tuple(names[int(i)] for i in np.nonzero(dd)[0]),
                start=(float(s0[k, 0]), float(s0[k, 1])),
                end=(float(s1[k, 0]), float(s1[k, 1])),
                states=(tuple(int(v) for v in pa[k]), tuple(int(v) for v in pb[k])),
            )
        )
    return tuple(out)


def _neighbour_pairs(ground: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sorted unique pairs of different states that touch along x or y.

    Returns
    -------
    a, b : ndarray, shape (P, n_dots), int
        The two states of each pair (``key(a) < key(b)``, sorted by key).
    """
    nd = ground.shape[-1]
    cols = [ground[..., i] for i in range(nd)]  # per-column reductions: fast in NumPy
    lo = np.array([int(c.min()) for c in cols], np.int64)
    span = np.array([int(c.max()) for c in cols], np.int64) - lo + 1
    radix = np.concatenate([[1], np.cumprod(span[:-1])]).astype(np.int64)
    key = np.zeros(ground.shape[:-1], np.int64)
    for i in range(nd):  # elementwise: integer matmul has no BLAS
        key += (cols[i] - lo[i]) * radix[i]
    total = int(np.prod(span))
    found = []
    for ka, kb in ((key[:, 1:], key[:, :-1]), (key[1:, :], key[:-1, :])):
        m = ka != kb
        a, b = ka[m], kb[m]
        found.append(np.minimum(a, b) * total + np.maximum(a, b))
    codes = np.unique(np.concatenate(found))

    def state(k: np.ndarray) -> np.ndarray:
        return (k[:, None] // radix[None, :]) % span[None, :] + lo[None, :]

    return state(codes // total), state(codes % total)


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
        assert not isinstance(d, str)
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
