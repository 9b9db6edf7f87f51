"""Coulomb diamonds of a single dot: gate voltage (x) versus source–drain bias (y).

The current comes from :func:`~stabtool.simulate.transport.single_dot_current`
(sequential tunnelling, bias on the source, drain grounded); the truth holds
the diamond edge slopes ``m₊ = C_G/(C_G + C_D)``, ``m₋ = −C_G/C_S``, the lever
arm ``C_G/C``, ``E_C = e²/C`` and the diamond width ``e/C_G``
(:func:`stabtool.physics.diamonds.diamond_slopes`).
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import xarray as xr

from ..errors import InputError
from ..mapdata import make_map
from ..physics.constants import E_AC, KB_EV_PER_K
from ..physics.diamonds import diamond_slopes
from .transport import single_dot_current

__all__ = ["DiamondMap", "DiamondTruth", "coulomb_diamonds", "DIAMOND_TRUTH_ATTR"]

DIAMOND_TRUTH_ATTR = "stabtool_truth"


@dataclass(frozen=True)
class DiamondTruth:
    """Known answer of a Coulomb-diamond map.

    Attributes
    ----------
    slope_plus, slope_minus : float
        Edge slopes ``dV_sd/dV_G``: ``m₊ = C_G/(C_G + C_D)``, ``m₋ = −C_G/C_S``.
    lever_arm : float
        ``C_G/C`` (eV/V), C the total capacitance.
    charging_energy_meV : float
        ``e²/C``, meV.
    addition_voltage_V : float
        Diamond width along the gate at zero bias, ``e/C_G``, V.
    degeneracy_V : tuple of float
        Zero-bias charge degeneracies inside the gate range, V.
    temperature_K : float
    """

    slope_plus: float
    slope_minus: float
    lever_arm: float
    charging_energy_meV: float
    addition_voltage_V: float
    degeneracy_V: tuple[float, ...]
    temperature_K: float

    def to_json(self) -> dict[str, Any]:
        d = asdict(self)
        d["degeneracy_V"] = list(self.degeneracy_V)
        return d


@dataclass(frozen=True)
class DiamondMap:
    """A synthetic Coulomb-diamond map.

    Attributes
    ----------
    data : xarray.DataArray, dims (bias_name, gate_name)
        Current (pA); bias in V on y, gate in V on x.
    truth : DiamondTruth
    clean : ndarray
        Noiseless current.
    """

    data: xr.DataArray
    truth: DiamondTruth
    clean: np.ndarray


def coulomb_diamonds(
    *,
    c_gate_aF: float = 10.0,
    c_source_aF: float = 30.0,
    c_drain_aF: float = 40.0,
    c_other_aF: float = 0.0,
    gate_range_V: tuple[float, float] = (0.0, 0.06),
    bias_range_mV: tuple[float, float] = (-3.0, 3.0),
    shape: tuple[int, int] = (121, 241),
    temperature_K: float = 0.1,
    offset_charge_e: float = 0.0,
    gate_name: str = "PG",
    bias_name: str = "VSD",
    snr: float | None = None,
    rng: Any = 0,
) -> DiamondMap:
    """Render Coulomb diamonds of a single dot.

    Parameters
    ----------
    c_gate_aF, c_source_aF, c_drain_aF, c_other_aF : float
        Capacitances of the dot, aF (defaults: the worked example of the
        references, giving m₊ = 0.2, m₋ = −1/3, α = 0.125).
    gate_range_V : (float, float)
    bias_range_mV : (float, float)
    shape : (n_bias, n_gate)
    temperature_K : float
    snr : float, optional
        White noise with std = (99th percentile of |I|) / snr.
    """
    for name, v in (("c_gate_aF", c_gate_aF), ("c_source_aF", c_source_aF), ("c_drain_aF", c_drain_aF)):
        if not v > 0:
            raise InputError(name, f"must be > 0, got {v}")
    ny, nx = (int(v) for v in shape)
    vg = np.linspace(*gate_range_V, nx)
    vb = np.linspace(*bias_range_mV, ny) * 1e-3
    kT = KB_EV_PER_K * temperature_K
    cur = single_dot_current(
        vg[None, :], vb[:, None], c_gate_aF=c_gate_aF, c_source_aF=c_source_aF, c_drain_aF=c_drain_aF,
        c_other_aF=c_other_aF, offset_charge_e=offset_charge_e, kT_eV=kT,
    )
    clean = cur.copy()
    gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    if snr is not None:
        cur = cur + gen.normal(0.0, np.percentile(np.abs(clean), 99) / snr, cur.shape)
    slopes = diamond_slopes(c_gate_aF, c_source_aF, c_drain_aF)
    c_total = c_gate_aF + c_source_aF + c_drain_aF + c_other_aF
    # zero-bias degeneracies: induced charge C_G V_G/e + q0 = N - 1/2
    n_lo = c_gate_aF * min(gate_range_V) / E_AC + offset_charge_e
    n_hi = c_gate_aF * max(gate_range_V) / E_AC + offset_charge_e
    ks = np.arange(np.ceil(n_lo - 0.5), np.floor(n_hi - 0.5) + 1) + 0.5
    deg = (ks - offset_charge_e) * E_AC / c_gate_aF
    truth = DiamondTruth(
        slope_plus=slopes.plus,
        slope_minus=slopes.minus,
        lever_arm=c_gate_aF / c_total,
        charging_energy_meV=1e3 * E_AC / c_total,
        addition_voltage_V=E_AC / c_gate_aF,
        degeneracy_V=tuple(float(v) for v in deg),
        temperature_K=float(temperature_K),
    )
    da = make_map(
        cur, vg, vb, x_gate=gate_name, y_gate=bias_name, name="current", units="pA",
        attrs={DIAMOND_TRUTH_ATTR: json.dumps(truth.to_json()), "generator": "stabtool.simulate.coulomb_diamonds"},
    )
    return DiamondMap(data=da, truth=truth, clean=clean)
