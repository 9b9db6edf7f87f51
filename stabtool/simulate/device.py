"""The device record of the synthetic generator: capacitances and names.

A :class:`Device` holds the constant-interaction description of N dots and M
gates: the dot–gate capacitance matrix ``Cdg`` (N×M, aF), the dot
capacitance matrix ``Cdd`` (N×N, aF; diagonal = total capacitance, off
diagonal = −mutual), the gate and dot names and optional background offset
charges. It is frozen; matrices are stored as tuples and returned as arrays
by :attr:`Device.cdg` / :attr:`Device.cdd`.

It can be built from lever arms and charging energies instead
(:meth:`Device.from_lever_arms`) and read from / written to JSON and TOML.

References
----------
W. G. van der Wiel et al., "Electron transport through double quantum dots",
Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1.
"""

from __future__ import annotations

import json
import os
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np
import tomli_w

from ..errors import InputError
from ..physics.ci import charging_energy_matrix_meV, lever_arm_matrix
from ..physics.constants import E_AC

__all__ = ["Device"]


def _matrix(values: Any, name: str, source: str | None) -> tuple[tuple[float, ...], ...]:
    try:
        arr = np.asarray(values, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(source, f"{name} is not a numeric matrix ({exc})") from None
    if arr.ndim != 2 or arr.size == 0:
        raise InputError(source, f"{name} must be a 2-D matrix, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise InputError(source, f"{name} holds non-finite values")
    return tuple(tuple(float(v) for v in row) for row in arr)


@dataclass(frozen=True)
class Device:
    """Constant-interaction description of a gate-defined multi-dot device.

    Parameters
    ----------
    cdg_aF : array_like, shape (n_dots, n_gates)
        Dot–gate capacitances, aF (all ≥ 0).
    cdd_aF : array_like, shape (n_dots, n_dots)
        Dot capacitance matrix, aF: diagonal = total capacitance of each dot
        (leads, gates and other dots included), off-diagonal = −(mutual
        capacitance) ≤ 0. Must be symmetric with every total capacitance at
        least the sum of its parts (gates + mutual), which makes it positive
        definite.
    gate_names : sequence of str, length n_gates
    dot_names : sequence of str, length n_dots
    offset_charge_e : sequence of float, length n_dots, optional
        Background offset charge of each dot in units of e (shifts every
        line of that dot by ``offset/C_g``); default 0.
    name : str
        Device name (an invented label such as ``"kestrel-7"``).
    description : str
        Free text, e.g. where the parameter values come from.
    tunnel_pairs : sequence of (i, j), optional
        Dot pairs (indices) with an interdot tunnel coupling; default: the
        neighbours in dot order (i, i+1).
    virtual_gates : mapping, optional
        ``{name: {physical gate: coefficient}}``: gate columns that are
        linear combinations of physical gates (a virtual gate swept in a
        lab: stepping it by ΔV steps each physical gate g by
        ``coefficient_g·ΔV``). Their ``cdg_aF`` column must equal the same
        combination of the physical columns (it may be negative); build them
        with :meth:`with_virtual_gates`.

    Notes
    -----
    Energy of charge state ``N`` at gate voltages ``V`` (conventions file):
    ``U(N, V) = ½ (eN − Cdg V)ᵀ Cdd⁻¹ (eN − Cdg V)`` with the offset charges
    added to ``eN − Cdg V`` as ``−e q0``.
    """

    cdg_aF: Any
    cdd_aF: Any
    gate_names: Sequence[str]
    dot_names: Sequence[str]
    offset_charge_e: Sequence[float] | None = None
    name: str = "device"
    description: str = ""
    tunnel_pairs: Sequence[Sequence[int]] | None = None
    virtual_gates: Mapping[str, Mapping[str, float]] | None = None
    _source: str | None = field(default=None, repr=False, compare=False)

    def __post_init__(self) -> None:
        src = self._source
        cdg = _matrix(self.cdg_aF, "cdg_aF", src)
        cdd = _matrix(self.cdd_aF, "cdd_aF", src)
        n, m = len(cdg), len(cdg[0])
        gates = tuple(str(g) for g in self.gate_names)
        dots = tuple(str(d) for d in self.dot_names)
        if len(gates) != m:
            raise InputError(src, f"cdg_aF has {m} gate columns but {len(gates)} gate_names {gates}")
        if len(dots) != n:
            raise InputError(src, f"cdg_aF has {n} dot rows but {len(dots)} dot_names {dots}")
        if len(set(gates)) != m:
            raise InputError(src, f"gate_names {gates} are not unique")
        if len(set(dots)) != n:
            raise InputError(src, f"dot_names {dots} are not unique")
        if len(cdd) != n or len(cdd[0]) != n:
            raise InputError(src, f"cdd_aF must be {n}x{n} (one row per dot), got {len(cdd)}x{len(cdd[0])}")
        a_cdg, a_cdd = np.array(cdg), np.array(cdd)
        virt = self._check_virtual(gates, a_cdg, src)
        phys = np.array([g not in virt for g in gates], bool)
        a_cdg = a_cdg[:, phys]
        if np.any(a_cdg < 0):
            raise InputError(src, "cdg_aF holds negative capacitances; every dot-gate capacitance must be >= 0")
        if not np.allclose(a_cdd, a_cdd.T, rtol=1e-9, atol=1e-12):
            raise InputError(src, "cdd_aF is not symmetric")
        off = a_cdd - np.diag(np.diag(a_cdd))
        if np.any(off > 0):
            raise InputError(
                src, "cdd_aF off-diagonal entries must be <= 0 (they are minus the mutual capacitances)"
            )
        parts = a_cdg.sum(axis=1) - off.sum(axis=1)
        bad = np.nonzero(np.diag(a_cdd) < parts * (1 - 1e-9))[0]
        if bad.size:
            i = int(bad[0])
            raise InputError(
                src,
                f"dot {dots[i]!r}: total capacitance {a_cdd[i, i]:.4g} aF is smaller than the sum of its "
                f"gate and mutual capacitances {parts[i]:.4g} aF",
            )
        q0 = tuple(0.0 for _ in range(n)) if self.offset_charge_e is None else tuple(
            float(v) for v in self.offset_charge_e
        )
        if len(q0) != n:
            raise InputError(src, f"offset_charge_e needs {n} values, got {len(q0)}")
        if self.tunnel_pairs is None:
            pairs = tuple((i, i + 1) for i in range(n - 1))
        else:
            pairs = tuple((int(p[0]), int(p[1])) for p in self.tunnel_pairs)
            for i, j in pairs:
                if not (0 <= i < n and 0 <= j < n and i != j):
                    raise InputError(src, f"tunnel pair ({i}, {j}) is not a pair of distinct dot indices 0..{n-1}")
        object.__setattr__(self, "cdg_aF", cdg)
        object.__setattr__(self, "cdd_aF", cdd)
        object.__setattr__(self, "gate_names", gates)
        object.__setattr__(self, "dot_names", dots)
        object.__setattr__(self, "offset_charge_e", q0)
        object.__setattr__(self, "tunnel_pairs", pairs)
        object.__setattr__(self, "name", str(self.name))
        object.__setattr__(self, "description", str(self.description))
        object.__setattr__(self, "virtual_gates", virt)

    def _check_virtual(self, gates: tuple[str, ...], cdg: np.ndarray, src: str | None) -> dict[str, dict[str, float]]:
        """Validate ``virtual_gates`` against the gate list and the capacitance columns."""
        if not self.virtual_gates:
            return {}
        if not isinstance(self.virtual_gates, Mapping):
            raise InputError(src, "virtual_gates must map a gate name to {physical gate: coefficient}")
        virt: dict[str, dict[str, float]] = {}
        for name, comb in self.virtual_gates.items():
            name = str(name)
            if name not in gates:
                raise InputError(src, f"virtual gate {name!r} is not one of gate_names {gates}")
            if not isinstance(comb, Mapping) or not comb:
                raise InputError(src, f"virtual gate {name!r} needs {{physical gate: coefficient}}")
            try:
                virt[name] = {str(g): float(c) for g, c in comb.items()}
            except (TypeError, ValueError):
                raise InputError(src, f"virtual gate {name!r} has a non-numeric coefficient") from None
        for name, comb in virt.items():
            for g, c in comb.items():
                if g not in gates or g in virt:
                    raise InputError(src, f"virtual gate {name!r}: {g!r} is not a physical gate of the device")
                if not np.isfinite(c):
                    raise InputError(src, f"virtual gate {name!r}: coefficient of {g!r} is not finite")
            col = sum(c * cdg[:, gates.index(g)] for g, c in comb.items())
            own = cdg[:, gates.index(name)]
            if not np.allclose(own, col, rtol=1e-9, atol=1e-12 * (1.0 + np.abs(col).max())):
                raise InputError(
                    src, f"the cdg_aF column of virtual gate {name!r} is not the combination {comb} of the physical columns"
                )
        return virt

    @property
    def physical_gate_names(self) -> tuple[str, ...]:
        """Gate names that are not virtual combinations."""
        virt = self.virtual_gates or {}
        return tuple(g for g in self.gate_names if g not in virt)

    def gate_direction(self, gate: str) -> np.ndarray:
        """Physical voltage step per volt of ``gate``, shape (n_gates,) (a unit vector for a physical gate)."""
        d = np.zeros(self.n_gates)
        comb = (self.virtual_gates or {}).get(gate)
        if comb is None:
            d[self.gate_index(gate)] = 1.0
        else:
            for g, c in comb.items():
                d[self.gate_index(g)] = c
        return d

    def with_virtual_gates(self, directions: Mapping[str, Mapping[str, float]]) -> "Device":
        """A copy with extra virtual gate columns ``{name: {physical gate: coefficient}}``.

        The column of a virtual gate is ``Σ_g c_g Cdg[:, g]``, so sweeping it
        with every other gate fixed is the same as stepping the physical
        gates along the direction ``c`` (the lever arms, slopes and
        virtual-gate matrix of the truth follow for that direction).
        """
        if not isinstance(directions, Mapping) or not directions:
            raise InputError("virtual_gates", "expected {name: {physical gate: coefficient}}")
        cols = []
        names = []
        phys = set(self.physical_gate_names)
        for name, comb in directions.items():
            name = str(name)
            if name in self.gate_names:
                raise InputError("virtual_gates", f"{name!r} is already a gate of the device; choose another name")
            if not isinstance(comb, Mapping) or not comb:
                raise InputError("virtual_gates", f"virtual gate {name!r} needs {{physical gate: coefficient}}")
            for g in comb:
                if g not in phys:
                    raise InputError("virtual_gates", f"virtual gate {name!r}: {g!r} is not a physical gate of the device")
            cols.append(sum(float(c) * self.cdg[:, self.gate_index(g)] for g, c in comb.items()))
            names.append(name)
        cdg = np.concatenate([self.cdg, np.stack(cols, axis=1)], axis=1)
        virt = dict(self.virtual_gates or {})
        virt.update({n: {str(g): float(c) for g, c in directions[n].items()} for n in names})
        return Device(
            cdg_aF=cdg,
            cdd_aF=self.cdd,
            gate_names=tuple(self.gate_names) + tuple(names),
            dot_names=self.dot_names,
            offset_charge_e=self.offset_charge_e,
            name=self.name,
            description=self.description,
            tunnel_pairs=self.tunnel_pairs,
            virtual_gates=virt,
        )

    # ------------------------------------------------------------------ arrays
    @property
    def n_dots(self) -> int:
        return len(self.dot_names)

    @property
    def n_gates(self) -> int:
        return len(self.gate_names)

    @property
    def cdg(self) -> np.ndarray:
        """Dot–gate capacitances, shape (n_dots, n_gates), aF."""
        return np.array(self.cdg_aF, dtype=np.float64)

    @property
    def cdd(self) -> np.ndarray:
        """Dot capacitance matrix, shape (n_dots, n_dots), aF."""
        return np.array(self.cdd_aF, dtype=np.float64)

    @property
    def offsets(self) -> np.ndarray:
        """Offset charges, shape (n_dots,), e."""
        return np.array(self.offset_charge_e, dtype=np.float64)

    @property
    def lever_arm(self) -> np.ndarray:
        """Lever-arm matrix ``α = Cdd⁻¹ Cdg``, shape (n_dots, n_gates), eV/V."""
        return lever_arm_matrix(self.cdg, self.cdd)

    @property
    def charging_energy_meV(self) -> np.ndarray:
        """Charging-energy matrix ``E_C = e² Cdd⁻¹``, shape (n_dots, n_dots), meV."""
        return charging_energy_matrix_meV(self.cdd)

    @property
    def ec_eV(self) -> np.ndarray:
        """Charging-energy matrix in eV (``E_AC · Cdd⁻¹``)."""
        return E_AC * np.linalg.inv(self.cdd)

    def gate_index(self, gate: str) -> int:
        """Index of ``gate``; :class:`InputError` naming the known gates otherwise."""
        try:
            return self.gate_names.index(gate)  # type: ignore[union-attr]
        except ValueError:
            raise InputError(
                gate, f"unknown gate; device {self.name!r} has gates {', '.join(self.gate_names)}"
            ) from None

    # ------------------------------------------------------------ construction
    @classmethod
    def from_lever_arms(
        cls,
        lever_arm: Any,
        charging_energy_meV: Any,
        *,
        mutual_meV: Any = None,
        gate_names: Sequence[str],
        dot_names: Sequence[str],
        offset_charge_e: Sequence[float] | None = None,
        name: str = "device",
        description: str = "",
        tunnel_pairs: Sequence[Sequence[int]] | None = None,
    ) -> "Device":
        """Build a device from lever arms and charging energies.

        Parameters
        ----------
        lever_arm : array_like, shape (n_dots, n_gates)
            ``α = Cdd⁻¹ Cdg`` (eV/V).
        charging_energy_meV : array_like, shape (n_dots,) or (n_dots, n_dots)
            Either the full charging-energy matrix ``E_C = e² Cdd⁻¹`` or its
            diagonal (then ``mutual_meV`` gives the off-diagonal).
        mutual_meV : float or array_like (n_dots, n_dots), optional
            Mutual charging energies E_Cm (a scalar applies to neighbours
            i, i+1 only); ignored when a full matrix is given.

        Notes
        -----
        ``Cdd = e² E_C⁻¹`` and ``Cdg = Cdd α`` (conventions file).
        """
        ec = np.asarray(charging_energy_meV, dtype=np.float64)
        n = ec.shape[0]
        if ec.ndim == 1:
            mat = np.diag(ec)
            if mutual_meV is not None:
                mm = np.asarray(mutual_meV, dtype=np.float64)
                if mm.ndim == 0:
                    for i in range(n - 1):
                        mat[i, i + 1] = mat[i + 1, i] = float(mm)
                else:
                    off = mm - np.diag(np.diag(mm))
                    mat = mat + off
            ec = mat
        if ec.shape != (n, n):
            raise InputError("charging_energy_meV", f"expected shape ({n},) or ({n}, {n}), got {ec.shape}")
        cdd = E_AC * np.linalg.inv(ec * 1e-3)
        cdd = 0.5 * (cdd + cdd.T)
        cdg = cdd @ np.asarray(lever_arm, dtype=np.float64)
        return cls(
            cdg_aF=cdg,
            cdd_aF=cdd,
            gate_names=gate_names,
            dot_names=dot_names,
            offset_charge_e=offset_charge_e,
            name=name,
            description=description,
            tunnel_pairs=tunnel_pairs,
        )

    # ---------------------------------------------------------- serialisation
    def to_dict(self) -> dict[str, Any]:
        """Plain-JSON form (lists, floats, str)."""
        return {
            "name": self.name,
            "description": self.description,
            "gate_names": list(self.gate_names),
            "dot_names": list(self.dot_names),
            "cdg_aF": [list(r) for r in self.cdg_aF],
            "cdd_aF": [list(r) for r in self.cdd_aF],
            "offset_charge_e": list(self.offset_charge_e),  # type: ignore[arg-type]
            "tunnel_pairs": [list(p) for p in self.tunnel_pairs],  # type: ignore[union-attr]
            **({"virtual_gates": {k: dict(v) for k, v in self.virtual_gates.items()}} if self.virtual_gates else {}),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any], *, source: str | None = None) -> "Device":
        """Inverse of :meth:`to_dict`; :class:`InputError` naming ``source`` on a bad record.

        Accepts either capacitances (``cdg_aF``, ``cdd_aF``) or lever arms
        (``lever_arm`` + ``charging_energy_meV`` [+ ``mutual_meV``]).
        """
        if not isinstance(d, Mapping):
            raise InputError(source, "a device record must be a table/object")
        known = {
            "name", "description", "gate_names", "dot_names", "cdg_aF", "cdd_aF", "offset_charge_e",
            "tunnel_pairs", "lever_arm", "charging_energy_meV", "mutual_meV", "virtual_gates",
        }
        unknown = sorted(set(d) - known)
        if unknown:
            raise InputError(source, f"unknown device key(s) {unknown}; known keys are {sorted(known)}")
        for key in ("gate_names", "dot_names"):
            if key not in d:
                raise InputError(source, f"device record lacks {key!r}")
        common = dict(
            gate_names=d["gate_names"],
            dot_names=d["dot_names"],
            offset_charge_e=d.get("offset_charge_e"),
            name=d.get("name", "device"),
            description=d.get("description", ""),
            tunnel_pairs=d.get("tunnel_pairs"),
        )
        if d.get("virtual_gates"):
            common["virtual_gates"] = d["virtual_gates"]
        try:
            if "cdg_aF" in d or "cdd_aF" in d:
                if "cdg_aF" not in d or "cdd_aF" not in d:
                    raise InputError(source, "a device record needs both 'cdg_aF' and 'cdd_aF'")
                return cls(cdg_aF=d["cdg_aF"], cdd_aF=d["cdd_aF"], _source=source, **common)
            if "lever_arm" in d and "charging_energy_meV" in d:
                virt = common.pop("virtual_gates", None)
                dev = cls.from_lever_arms(
                    d["lever_arm"], d["charging_energy_meV"], mutual_meV=d.get("mutual_meV"), **common
                )
                return replace(dev, virtual_gates=virt) if virt else dev
        except InputError as exc:
            if exc.source is None or exc.source != source:
                raise InputError(source, exc.fault if exc.source is None else str(exc)) from None
            raise
        except (TypeError, ValueError, np.linalg.LinAlgError) as exc:
            raise InputError(source, f"bad device record: {exc}") from None
        raise InputError(
            source, "a device record needs 'cdg_aF' + 'cdd_aF' or 'lever_arm' + 'charging_energy_meV'"
        )

    def to_json(self) -> str:
        """JSON text of the device."""
        return json.dumps(self.to_dict(), indent=2)

    @classmethod
    def from_json(cls, text: str, *, source: str | None = None) -> "Device":
        """Device from JSON text."""
        try:
            d = json.loads(text)
        except json.JSONDecodeError as exc:
            raise InputError(source, f"not valid JSON: {exc}") from None
        return cls.from_dict(d, source=source)

    def to_toml(self) -> str:
        """TOML text of the device (via ``tomli_w``)."""
        return tomli_w.dumps(self.to_dict())

    @classmethod
    def from_toml(cls, text: str, *, source: str | None = None) -> "Device":
        """Device from TOML text (via :mod:`tomllib`)."""
        try:
            d = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise InputError(source, f"not valid TOML: {exc}") from None
        if "device" in d and isinstance(d["device"], Mapping) and "gate_names" not in d:
            return cls.from_dict(d["device"], source=source)
        return cls.from_dict(d, source=source)

    def save(self, path: str | os.PathLike[str]) -> Path:
        """Write the device to ``path`` (``.json`` or ``.toml``)."""
        p = Path(path)
        if p.suffix.lower() == ".toml":
            p.write_text(self.to_toml(), encoding="utf-8")
        elif p.suffix.lower() == ".json":
            p.write_text(self.to_json() + "\n", encoding="utf-8")
        else:
            raise InputError(p, "device files must end in .json or .toml")
        return p

    @classmethod
    def load(cls, path: str | os.PathLike[str]) -> "Device":
        """Read a device from a ``.json`` or ``.toml`` file."""
        p = Path(path)
        src = str(path)
        try:
            text = p.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise InputError(src, "no such device file") from None
        except OSError as exc:
            raise InputError(src, f"cannot read device file ({exc.strerror})") from None
        if p.suffix.lower() == ".toml":
            return cls.from_toml(text, source=src)
        if p.suffix.lower() == ".json":
            return cls.from_json(text, source=src)
        raise InputError(src, "device files must end in .json or .toml")
