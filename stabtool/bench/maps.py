"""Synthetic maps of the benchmark cases, from the generator.

Each :class:`~stabtool.bench.grid.BenchCase` becomes a sensor-read double-dot
map of its preset, with about four lines of each dot family
(:func:`stabtool.simulate.quick_double_dot`), white noise at the case's SNR
and the case's artefact.

Electron temperature
--------------------
Lever arms from the electron temperature need thermally broadened lines that
the map resolves: the fitter's bound holds for lines at least 3 pixels wide.
At the presets' typical temperatures (≤ 0.15 K) the lines of a 96–128 px map
spanning several electrons are far narrower than one pixel, so each map's
T_e is chosen such that the narrower of the two dot families has a thermal
FWHM (``3.5255 k_B T_e / (e α_ii)``, Fermi–Dirac) of 3–4 pixels along its
own gate, drawn per map: just inside the fitter's "≥ 3 px" condition, and no
hotter than needed, since k_B T_e then reaches a quarter of the mutual
charging energy and smears the triple points. That puts T_e at roughly
0.5–5 K depending on the device's charging energy ("hot" operation;
k_B·1 K = 86 µeV). The value used
and the resulting widths are recorded in ``bench_info``.

Artefacts (one per map, besides white noise)
--------------------------------------------
``none``; ``one-over-f``: 1/f row offsets of 0.3 step heights (std);
``telegraph``: a charge trap switching the sensor by 0.5 step heights;
``jump``: one sudden offset-charge jump; ``partial-sweep``: the last 30 % of
the rows missing (NaN); ``decreasing-anisotropic``: both axes swept
downwards and 3/4 as many rows as columns over the same voltage span, so the
y step is 4/3 of the x step.

The generator's truth record travels in ``data.attrs`` of a generated map;
the benchmark removes it before the analysis sees the map.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr

from ..physics.constants import KB_OVER_E
from ..physics.thermal import FERMI_FWHM_FACTOR
from .grid import BenchCase

__all__ = ["ARTEFACT_SETTINGS", "ELECTRONS", "FWHM_RANGE_PX", "BenchMap", "make_case_map"]

#: Generator :class:`~stabtool.simulate.Artefacts` fields of each artefact scenario.
ARTEFACT_SETTINGS: dict[str, dict[str, Any]] = {
    "none": {},
    "one-over-f": {"row_noise": 0.3},
    "telegraph": {"telegraph": 0.5},
    "jump": {"charge_jumps": 1},
    "partial-sweep": {"interrupted": 0.3},
    "decreasing-anisotropic": {"decreasing_x": True, "decreasing_y": True},
}

#: Thermal FWHM of the narrower dot family, pixels (drawn uniformly per map).
FWHM_RANGE_PX: tuple[float, float] = (3.0, 4.0)
#: Induced-charge span of each dot across the window (≈ lines per family).
ELECTRONS: float = 4.0

#: Attribute of a generated map that holds the truth (removed before analysis).
_TRUTH_ATTRS = ("stabtool_truth",)


@dataclass(frozen=True)
class BenchMap:
    """A benchmark map: what the analysis sees, and the truth it is scored against.

    Attributes
    ----------
    data : xarray.DataArray
        The map, with the generator's truth attributes removed.
    truth : stabtool.simulate.Truth
        The generator truth (``to_json()``, ``temperature_K``).
    bench_info : dict
        Temperature, thermal line widths in pixels, shape, artefact settings.
    """

    data: xr.DataArray
    truth: Any
    bench_info: dict[str, Any] = field(default_factory=dict)


def _shape(case: BenchCase) -> tuple[int, int]:
    n = int(case.size_px)
    if case.artefact == "decreasing-anisotropic":
        return (round(0.75 * n), n)
    return (n, n)


def _temperature(case: BenchCase, shape: tuple[int, int], rng: np.random.Generator) -> tuple[float, float]:
    """T_e giving a thermal FWHM drawn from :data:`FWHM_RANGE_PX` for the narrower family."""
    from ..simulate import double_dot_window, presets

    dev = presets.get(case.preset)
    inf = presets.info(case.preset)
    (x0, x1), (y0, y1) = double_dot_window(dev, x_gate=inf.x_gate, y_gate=inf.y_gate, electrons=ELECTRONS)
    ny, nx = shape
    dx = abs(x1 - x0) / (nx - 1)
    dy = abs(y1 - y0) / (ny - 1)
    from ..physics.ci import lever_arm_matrix

    gi = [dev.gate_names.index(inf.x_gate), dev.gate_names.index(inf.y_gate)]
    alpha = lever_arm_matrix(dev.cdg, dev.cdd)[:, gi]
    # temperature per pixel of FWHM for each family along its own gate
    per_px = np.array([dx * alpha[0, 0], dy * alpha[1, 1]]) / (FERMI_FWHM_FACTOR * KB_OVER_E)
    target = float(rng.uniform(*FWHM_RANGE_PX))
    return target * float(per_px.max()), target


def make_case_map(case: BenchCase) -> BenchMap:
    """Generate the synthetic map of ``case`` (see the module docstring).

    Parameters
    ----------
    case : BenchCase

    Returns
    -------
    BenchMap
    """
    from ..simulate import quick_double_dot

    rng = np.random.default_rng(case.seed)
    shape = _shape(case)
    temperature, fwhm_target = _temperature(case, shape, rng)
    settings = ARTEFACT_SETTINGS[case.artefact]
    sm = quick_double_dot(
        case.preset,
        shape=shape,
        snr=case.snr,
        temperature_K=temperature,
        electrons=ELECTRONS,
        rng=rng,
        **settings,
    )
    da = sm.data.copy()
    da.attrs = {k: v for k, v in da.attrs.items() if k not in _TRUTH_ATTRS}
    truth = sm.truth
    tj = truth.to_json()
    a = np.asarray(tj["lever_arm"], float)
    xs = np.asarray(da[da.dims[-1]].values, float)
    ys = np.asarray(da[da.dims[0]].values, float)
    dx = float(np.median(np.abs(np.diff(xs))))
    dy = float(np.median(np.abs(np.diff(ys))))
    width = KB_OVER_E * float(truth.temperature_K) * FERMI_FWHM_FACTOR
    info = {
        "temperature_K": float(truth.temperature_K),
        "fwhm_px_dot1_x": width / a[0, 0] / dx,
        "fwhm_px_dot2_y": width / a[1, 1] / dy,
        "shape": list(da.shape),
        "dx_mV": 1e3 * dx,
        "dy_mV": 1e3 * dy,
        "artefact_settings": dict(settings),
        "fwhm_target_px": fwhm_target,
    }
    return BenchMap(data=da, truth=truth, bench_info=info)
