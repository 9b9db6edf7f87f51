"""A ready-made synthetic double-dot map for tests of other stabtool modules.

:func:`quick_double_dot` picks a window of a preset that holds about five
lines of each dot family (and the interdot lines and triple points between
them), starting just above full depletion, and renders it with
:func:`~stabtool.simulate.simulate_map`.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..physics.constants import E_AC
from . import presets
from .artefacts import Artefacts
from .device import Device
from .render import SyntheticMap, simulate_map
from .sensor import SensorModel
from .truth import select_dots

__all__ = ["quick_double_dot", "double_dot_window"]


def double_dot_window(
    device: Device,
    *,
    x_gate: str,
    y_gate: str,
    electrons: float = 5.0,
    start_e: float = 0.35,
    fixed_V: dict[str, float] | None = None,
) -> tuple[tuple[float, float], tuple[float, float]]:
    """Sweep ranges (V) in which the induced charges of dot1 and dot2 run from
    ``start_e`` to ``start_e + electrons`` (so about ``electrons`` lines of each
    dot family cross the window).

    Solves ``Cdg_sub · V = e · n`` for the corners, with the other gates at
    ``fixed_V`` (default 0 V) and the offset charges of the device.
    """
    i1, i2 = select_dots(device, x_gate, y_gate)
    gx, gy = device.gate_index(x_gate), device.gate_index(y_gate)
    cdg = device.cdg
    v0 = np.array([(fixed_V or {}).get(g, 0.0) for g in device.gate_names])
    v0[gx] = v0[gy] = 0.0
    base = (cdg @ v0 / E_AC + device.offsets)[[i1, i2]]
    sub = cdg[np.ix_([i1, i2], [gx, gy])] / E_AC
    lo = np.linalg.solve(sub, np.full(2, start_e) - base)
    hi = np.linalg.solve(sub, np.full(2, start_e + electrons) - base)
    return (float(lo[0]), float(hi[0])), (float(lo[1]), float(hi[1]))


def quick_double_dot(
    preset: str = "si-sige-double",
    *,
    shape: tuple[int, int] = (128, 128),
    snr: float | None = 10.0,
    temperature_K: float | None = None,
    tunnel_coupling_ueV: float = 0.0,
    readout: str = "sensor",
    sensor: SensorModel | None = None,
    electrons: float = 5.0,
    bias_mV: float = 0.0,
    lockin: str | None = None,
    rng: Any = 0,
    **artefact_kwargs: Any,
) -> SyntheticMap:
    """Synthetic map of a preset double dot with ≈ ``electrons`` lines per dot family.

    Parameters
    ----------
    preset : str
        A name from :func:`stabtool.simulate.presets.names` (arrays sweep
        their first two plungers).
    shape : (ny, nx)
    snr : float or None
        White-noise SNR (step height / noise std; None: noiseless).
    temperature_K : float, optional
        Electron temperature (default: the preset's typical value).
    tunnel_coupling_ueV : float
    readout : {"sensor", "charge", "transport"}
    sensor : SensorModel, optional
        Default: :class:`SensorModel` with 85 % crosstalk compensation, so
        the sensor stays on one flank over most of the window.
    electrons : float
        Induced-charge span of each dot across the window.
    bias_mV : float
        Source–drain bias of the transport read-out, mV.
    lockin : {"x", "y"}, optional
        Read through a lock-in on that gate (the map is the read-out's
        derivative along it; ``snr`` is then the median peak height over the
        noise): see :func:`~stabtool.simulate.simulate_map`.
    rng : int or Generator
        Seed; also jitters the window start by up to ±0.15 e.
    **artefact_kwargs
        Further :class:`Artefacts` fields (``row_noise=0.3``, ``interrupted=0.1`` …).

    Returns
    -------
    SyntheticMap
    """
    dev = presets.get(preset)
    inf = presets.info(preset)
    gen = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    start = 0.35 + gen.uniform(-0.15, 0.15)
    xr_, yr_ = double_dot_window(dev, x_gate=inf.x_gate, y_gate=inf.y_gate, electrons=electrons, start_e=start)
    art = Artefacts(snr=snr, **artefact_kwargs)
    return simulate_map(
        dev,
        x_gate=inf.x_gate,
        y_gate=inf.y_gate,
        x_range_V=xr_,
        y_range_V=yr_,
        shape=shape,
        temperature_K=inf.temperature_K if temperature_K is None else temperature_K,
        tunnel_coupling_ueV=tunnel_coupling_ueV,
        readout=readout,
        sensor=SensorModel(compensation=0.85) if sensor is None else sensor,
        artefacts=art,
        bias_mV=bias_mV,
        lockin=lockin,
        rng=gen,
    )
