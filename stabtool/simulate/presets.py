"""Preset devices with parameter values in realistic ranges.

Each preset is built from lever arms and charging energies
(:meth:`Device.from_lever_arms`); the ranges they sit in and where those
come from:

* GaAs double dot — lever arm 0.03–0.1 eV/V, E_C 1–3 meV, T_e 20–100 mK,
  tunnel coupling 0–60 µeV (M. Pioro-Ladrière et al., Phys. Rev. B 72,
  125307 (2005); ranges from memory).
* Si-MOS double dot — lever arm 0.1–0.3 eV/V, E_C 5–30 meV (C. H. Yang et
  al., arXiv:1204.0843 (2012); from memory).
* Si/SiGe double dot — lever arm 0.05–0.15 eV/V, E_C up to ≈ 6.6 meV
  (D. M. Zajac et al., arXiv:1502.01624 (2015); from memory); T_e 50–150 mK
  (from memory).
* Ge hole double dot — E_C 1–4 meV, lever arm 0.05–0.2 eV/V (from memory,
  low confidence).
* Cross-capacitance ratios 0.2–0.6 to the nearest neighbour and 0.05–0.2 to
  the next nearest; E_Cm/E_C 0.1–0.3 (from memory).
* Linear arrays (4 and 8 dots) are built from capacitances with Si/SiGe-like
  values and those ratios (see ``_array``).

Each preset's gates are plungers (``PA``, ``PB`` … or ``P1`` … ``Pn``) plus,
for the double dots, a central barrier ``BC`` weakly coupled to both dots.
Offset charges are chosen so that with every gate at 0 V the swept double
dot is empty and the other dots of an array hold one to two electrons.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .device import Device

__all__ = ["PresetInfo", "names", "get", "info"]


@dataclass(frozen=True)
class PresetInfo:
    """Typical operating values of a preset.

    Attributes
    ----------
    temperature_K : float
        Typical electron temperature.
    tunnel_coupling_ueV : float
        Typical interdot tunnel coupling.
    x_gate, y_gate : str
        Gates swept by default.
    source : str
        Where the parameter ranges come from.
    """

    temperature_K: float
    tunnel_coupling_ueV: float
    x_gate: str
    y_gate: str
    source: str


def _double(name: str, a11: float, a12: float, a21: float, a22: float, ec1: float, ec2: float, ecm: float,
            barrier: float, source: str) -> Device:
    alpha = np.array([[a11, a12, barrier * a11], [a21, a22, barrier * a22]])
    return Device.from_lever_arms(
        alpha,
        [ec1, ec2],
        mutual_meV=ecm,
        gate_names=("PA", "PB", "BC"),
        dot_names=("D1", "D2"),
        name=name,
        description=source,
    )


def _array(n: int) -> Device:
    """Linear array built from capacitances, so that ``Cdd`` stays physical.

    Plunger capacitance 3.5 aF to its own dot; cross-capacitance ratios 0.3
    (nearest), 0.08 (next nearest), 0.03, 0.01 (from memory: 0.2–0.6 and
    0.05–0.2); mutual capacitance 6 aF to the neighbours, 0.8 aF to the next
    nearest; total capacitance 32 aF, i.e. E_C ≈ 5 meV, E_Cm/E_C ≈ 0.2 and a
    lever arm ≈ 0.12 eV/V.
    """
    ratios = [1.0, 0.30, 0.08, 0.03]
    mutual = [0.0, 6.0, 0.8]
    var = 1.0 + 0.05 * np.sin(1.7 * np.arange(n) + 0.4)  # small dot-to-dot variation, deterministic
    cdg = np.zeros((n, n))
    cdd = np.zeros((n, n))
    for i in range(n):
        for j in range(n):
            d = abs(i - j)
            cdg[i, j] = 3.5 * var[i] * (ratios[d] if d < len(ratios) else 0.01)
            if 0 < d < len(mutual):
                cdd[i, j] = -mutual[d]
    for i in range(n):
        cdd[i, i] = 32.0 * var[i]
    # with all gates at 0 V: the first two dots empty, the others between 1 and 2 electrons
    offsets = np.full(n, 1.5)
    offsets[:2] = -0.1
    return Device(
        cdg_aF=cdg,
        cdd_aF=cdd,
        gate_names=tuple(f"P{i + 1}" for i in range(n)),
        dot_names=tuple(f"D{i + 1}" for i in range(n)),
        offset_charge_e=offsets.tolist(),
        name=f"linear-array-{n}",
        description="Si/SiGe-like linear array from capacitances: plunger 3.5 aF, cross ratios 0.3/0.08, "
        "mutual 6 aF (neighbours), total 32 aF (E_C ~ 5 meV); ranges from memory "
        "(Zajac et al. arXiv:1502.01624 for E_C)",
    )


_SOURCES = {
    "si-sige-double": "Si/SiGe: lever arm 0.05-0.15 eV/V, E_C up to ~6.6 meV (Zajac et al., arXiv:1502.01624, "
    "from memory); cross ratio ~0.3, E_Cm/E_C ~0.19 (from memory)",
    "gaas-double": "GaAs: lever arm 0.03-0.1 eV/V, E_C 1-3 meV, t 0-60 ueV (Pioro-Ladriere et al., "
    "PRB 72, 125307 (2005), from memory)",
    "si-mos-double": "Si-MOS: lever arm 0.1-0.3 eV/V, E_C 5-30 meV (Yang et al., arXiv:1204.0843, from memory)",
    "ge-double": "Ge holes: E_C 1-4 meV, lever arm 0.05-0.2 eV/V (from memory, low confidence)",
}

_INFO = {
    "si-sige-double": PresetInfo(0.1, 10.0, "PA", "PB", _SOURCES["si-sige-double"]),
    "gaas-double": PresetInfo(0.06, 20.0, "PA", "PB", _SOURCES["gaas-double"]),
    "si-mos-double": PresetInfo(0.15, 15.0, "PA", "PB", _SOURCES["si-mos-double"]),
    "ge-double": PresetInfo(0.1, 10.0, "PA", "PB", _SOURCES["ge-double"]),
    "linear-array-4": PresetInfo(0.1, 10.0, "P1", "P2", "Si/SiGe-like linear array (from memory)"),
    "linear-array-8": PresetInfo(0.1, 10.0, "P1", "P2", "Si/SiGe-like linear array (from memory)"),
}


def _build(name: str) -> Device:
    if name == "si-sige-double":
        return _double(name, 0.100, 0.032, 0.026, 0.092, 5.2, 4.8, 0.95, 0.15, _SOURCES[name])
    if name == "gaas-double":
        return _double(name, 0.070, 0.022, 0.018, 0.064, 1.7, 1.55, 0.32, 0.2, _SOURCES[name])
    if name == "si-mos-double":
        return _double(name, 0.200, 0.060, 0.050, 0.180, 12.0, 11.0, 2.2, 0.1, _SOURCES[name])
    if name == "ge-double":
        return _double(name, 0.110, 0.040, 0.035, 0.100, 2.6, 2.4, 0.55, 0.15, _SOURCES[name])
    if name == "linear-array-4":
        return _array(4)
    if name == "linear-array-8":
        return _array(8)
    raise InputError("preset", f"unknown preset {name!r}; known presets: {', '.join(names())}")


def names() -> tuple[str, ...]:
    """Names of the presets."""
    return tuple(_INFO)


def get(name: str) -> Device:
    """The preset device ``name`` (see :func:`names`)."""
    return _build(name)


def info(name: str) -> PresetInfo:
    """Typical temperature, tunnel coupling and swept gates of preset ``name``."""
    if name not in _INFO:
        raise InputError("preset", f"unknown preset {name!r}; known presets: {', '.join(names())}")
    return _INFO[name]
