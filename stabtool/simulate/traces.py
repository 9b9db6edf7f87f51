"""Synthetic 1-D calibration traces: a Fermi step through a sensor background.

Three steps, as for the maps: truth parameters (:class:`TraceTruth`) →
noiseless render (:func:`render_trace`) → noise (:func:`simulate_trace`).
The occupation uses :func:`stabtool.physics.thermal.broadened_occupation`
(pure Fermi–Dirac when ``gamma_ueV = 0``) with the width
``w = k_B T_e/(e α)`` of :func:`stabtool.physics.thermal.thermal_width_V`,
and ``T_e`` from the bath temperature by
:func:`stabtool.physics.thermal.saturated_temperature`.

:func:`write_sample_calibration` writes the sample temperature series of the
invented device "kestrel-7", gate "PA", used by the README workflow.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from ..physics.thermal import broadened_occupation, saturated_temperature, thermal_width_V

__all__ = ["SimulatedTrace", "TraceTruth", "render_trace", "simulate_trace", "write_sample_calibration"]


@dataclass(frozen=True)
class TraceTruth:
    """Truth of one calibration trace.

    Attributes
    ----------
    lever_arm : float
        α of the swept gate on the dot (eV/V).
    bath_K : float
        Fridge (bath) temperature, K.
    saturation_K : float
        Electron-temperature floor (``T_e = sqrt(T² + T_sat²)``), K; 0 for none.
    centre_V : float
        Transition centre, V.
    step : float
        Signal change across the step from low to high gate voltage (signed).
    offset, slope, curvature : float
        Sensor background ``offset + slope (V − centre) + curvature (V − centre)²``
        (signal, signal/V, signal/V²).
    gamma_ueV : float
        Lorentzian half width of the level (tunnel/lifetime broadening), µeV.
    """

    lever_arm: float = 0.08
    bath_K: float = 0.1
    saturation_K: float = 0.0
    centre_V: float = -0.3
    step: float = -0.4
    offset: float = 2.0
    slope: float = 30.0
    curvature: float = 0.0
    gamma_ueV: float = 0.0

    @property
    def electron_K(self) -> float:
        """Electron temperature, K."""
        return float(saturated_temperature(self.bath_K, self.saturation_K))

    @property
    def width_V(self) -> float:
        """Fermi width ``k_B T_e/(e α)``, V."""
        return thermal_width_V(self.electron_K, self.lever_arm)


@dataclass(frozen=True)
class SimulatedTrace:
    """A generated trace with its truth (``v`` in V, ``signal`` in signal units)."""

    v: np.ndarray
    signal: np.ndarray
    truth: TraceTruth
    noise: float


def render_trace(v: np.ndarray, truth: TraceTruth) -> np.ndarray:
    """Noiseless signal at gate voltages ``v`` (V)."""
    v = np.asarray(v, float)
    gamma_V = truth.gamma_ueV * 1e-6 / truth.lever_arm
    occ = broadened_occupation(v, truth.centre_V, truth.width_V, gamma_V)
    d = v - truth.centre_V
    return truth.offset + truth.slope * d + truth.curvature * d**2 + truth.step * (1.0 - occ)


def simulate_trace(
    truth: TraceTruth,
    *,
    span_widths: float = 30.0,
    n_points: int = 301,
    noise: float = 0.01,
    descending: bool = False,
    rng: np.random.Generator | int | None = None,
) -> SimulatedTrace:
    """Render a trace centred on the transition and add white Gaussian noise.

    Parameters
    ----------
    truth : TraceTruth
    span_widths : float
        Sweep span in units of the Fermi width ``w``.
    n_points : int
        Number of gate voltages.
    noise : float
        Standard deviation of the white noise (signal units).
    descending : bool
        Sweep from high to low voltage.
    rng : Generator or int, optional
    """
    rng = np.random.default_rng(rng)
    half = 0.5 * span_widths * truth.width_V
    # the sweep is not centred exactly on the transition
    shift = rng.uniform(-0.15, 0.15) * half
    v = np.linspace(truth.centre_V - half + shift, truth.centre_V + half + shift, n_points)
    if descending:
        v = v[::-1]
    s = render_trace(v, truth) + rng.normal(0.0, noise, v.size)
    return SimulatedTrace(v=v, signal=s, truth=truth, noise=noise)


def write_sample_calibration(
    folder: str | os.PathLike[str],
    *,
    lever_arm: float = 0.074,
    saturation_K: float = 0.045,
    rng: int = 7,
) -> list[Path]:
    """Write the sample calibration traces of device "kestrel-7", gate "PA".

    Writes one CSV per bath temperature (columns ``PA (mV),sensor (nA)``, with
    ``# device: kestrel-7``, ``# gate: PA`` and ``# temperature_K: ...``
    comment lines) and a single NetCDF file holding the whole series.

    Returns
    -------
    list of Path
        The files written.
    """
    import xarray as xr

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    gen = np.random.default_rng(rng)
    temps = [0.02, 0.05, 0.1, 0.15, 0.2, 0.3, 0.4]
    written: list[Path] = []
    traces = []
    base = TraceTruth(lever_arm=lever_arm, saturation_K=saturation_K, centre_V=-0.3125, step=-0.35,
                      offset=1.8, slope=25.0)
    for t in temps:
        tr = replace(base, bath_K=t, centre_V=base.centre_V + gen.normal(0, 2e-5))
        # fixed sweep window as in the lab: ±4 mV around the transition, 801 points
        v = np.linspace(-0.3165, -0.3085, 801)
        s = render_trace(v, tr) + gen.normal(0.0, 0.006, v.size)
        traces.append((t, v, s))
        path = folder / f"kestrel-7_PA_fermi_{int(round(t * 1000)):03d}mK.csv"
        with open(path, "w", encoding="utf-8") as fh:
            fh.write("# device: kestrel-7\n# gate: PA\n")
            fh.write(f"# temperature_K: {t}\n")
            fh.write("PA (mV),sensor (nA)\n")
            fh.writelines(f"{vi * 1e3:.6f},{si:.6f}\n" for vi, si in zip(v, s))
        written.append(path)
    ds = xr.Dataset(attrs={"device": "kestrel-7", "gate": "PA"})
    v = traces[0][1]
    ds = ds.assign_coords(PA=("PA", v * 1e3, {"units": "mV"}))
    ds = ds.assign_coords(temperature=("temperature", np.array(temps), {"units": "K"}))
    ds["sensor"] = (("temperature", "PA"), np.stack([s for _, _, s in traces]), {"units": "nA"})
    nc = folder / "kestrel-7_PA_fermi_series.nc"
    ds.to_netcdf(nc, engine="h5netcdf")
    written.append(nc)
    return written
