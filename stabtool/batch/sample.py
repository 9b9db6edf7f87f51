"""An invented overnight run of device "kestrel-7" for demos, the README and tests.

:func:`make_overnight_sample` writes a folder of small synthetic maps of the
plunger gates ``PA`` (x) and ``PB`` (y) as a lab would find it in the
morning: two survey maps at the start, then the same window swept again and
again while the device slowly drifts and, once, jumps; one sweep was
interrupted. The maps come in every supported format; the NetCDF files carry
the generator truth (``stabtool_truth``) and the pattern offset that was put
in (``sample_pattern_offset_mV``), so the numbers can be checked.

The drift is physical: the offset charges of the dots change by
``Δq = −Cdg·ΔV/e`` so that the whole charge pattern moves by ``ΔV`` in gate
space, and the truth written with each map follows the moved pattern.
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = ["OvernightSample", "make_overnight_sample", "DEVICE_NAME"]

DEVICE_NAME = "kestrel-7"


@dataclass(frozen=True)
class OvernightSample:
    """What :func:`make_overnight_sample` wrote.

    Attributes
    ----------
    files : tuple of Path
        Every map file, in time order.
    repeated : tuple of Path
        The repeated sweeps of one window (the drift series), in time order.
    offsets_mV : ndarray, shape (n_repeated, 2)
        Pattern offset (x = PA, y = PB) put into each repeated sweep, mV,
        relative to the first one.
    jump_index : int
        Position in ``repeated`` of the first sweep after the jump.
    interrupted : Path
        The sweep that stopped early (its last rows are missing).
    step_mV : tuple of float
        Voltage steps (x, y) of the repeated sweeps, mV.
    """

    files: tuple[Path, ...]
    repeated: tuple[Path, ...]
    offsets_mV: np.ndarray
    jump_index: int
    interrupted: Path
    step_mV: tuple[float, float]


def _device(offset_shift_V: np.ndarray | None = None):
    from ..physics.constants import E_AC
    from ..simulate import presets

    base = presets.get("si-sige-double")
    q = base.offsets.copy()
    if offset_shift_V is not None:
        gx, gy = base.gate_index("PA"), base.gate_index("PB")
        q = q - base.cdg[:, [gx, gy]] @ np.asarray(offset_shift_V, dtype=float) / E_AC
    return dataclasses.replace(
        base,
        name=DEVICE_NAME,
        offset_charge_e=tuple(float(v) for v in q),
        description="invented device for the sample overnight run; " + base.description,
    )


def make_overnight_sample(
    folder: str | os.PathLike[str],
    *,
    n_maps: int = 30,
    seed: int = 7,
    start: str = "2026-11-30T22:00:00",
    interval_min: float = 20.0,
    drift_mV_per_h: tuple[float, float] = (0.45, -0.3),
    jump_mV: tuple[float, float] = (3.0, 1.6),
    shape: tuple[int, int] = (96, 96),
) -> OvernightSample:
    """Write an invented overnight run of ``n_maps`` small maps into ``folder``.

    Parameters
    ----------
    folder : path
        Created if missing; existing files of the same names are replaced.
    n_maps : int
        Total number of maps, at least 6: two survey maps, the rest repeated
        sweeps of one window.
    seed : int
        Seed of every random choice (noise, artefacts, formats).
    start : str
        ISO time of the first map; each map's start time is in its ``time``
        attribute (and in the CSV/NPZ metadata).
    interval_min : float
        Minutes between repeated sweeps.
    drift_mV_per_h : (float, float)
        Slow drift of the pattern along PA and PB, mV per hour.
    jump_mV : (float, float)
        Sudden pattern jump along PA and PB (a charge rearrangement), mV,
        about two thirds into the night.
    shape : (ny, nx)
        Pixels of the repeated sweeps (the survey maps are somewhat larger).

    Returns
    -------
    OvernightSample
    """
    from ..io import save_map
    from ..simulate import Artefacts, SensorModel, double_dot_window, presets, simulate_map

    if n_maps < 6:
        raise InputError("n_maps", f"an overnight sample needs at least 6 maps, got {n_maps}")
    out = Path(folder)
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    info = presets.info("si-sige-double")
    t0 = datetime.fromisoformat(start)
    base_dev = _device()
    sensor = SensorModel(compensation=0.85)
    files: list[Path] = []

    def save(da, name: str, when: datetime, extra: dict | None = None) -> Path:
        da.attrs.update({"device": DEVICE_NAME, "time": when.isoformat(timespec="seconds"),
                         "cooldown": "CD-3", "note": "invented sample run"})
        if extra:
            da.attrs.update(extra)
        path = out / name
        if path.suffix == ".csv":
            save_map(da, path, layout="long")
        elif path.suffix == ".tsv":
            save_map(da, path, layout="grid")
        else:
            save_map(da, path)
        files.append(path)
        return path

    # ----------------------------------------------------------- survey maps
    xr7, yr7 = double_dot_window(base_dev, x_gate="PA", y_gate="PB", electrons=7.0, start_e=0.3)
    sm = simulate_map(base_dev, x_gate="PA", y_gate="PB", x_range_V=xr7, y_range_V=yr7,
                      shape=(shape[0] + 32, shape[1] + 32), temperature_K=info.temperature_K,
                      sensor=sensor, artefacts=Artefacts(snr=12.0, row_noise=0.15), rng=rng)
    save(sm.data, "kestrel-7_survey_2200.nc", t0)
    xr5, yr5 = double_dot_window(base_dev, x_gate="PA", y_gate="PB", electrons=4.0, start_e=0.5)
    sm = simulate_map(base_dev, x_gate="PA", y_gate="PB", x_range_V=(xr5[1], xr5[0]),
                      y_range_V=yr5, shape=(shape[0] + 16, shape[1]),
                      temperature_K=info.temperature_K, sensor=sensor,
                      artefacts=Artefacts(snr=9.0, row_noise=0.2, decreasing_x=True), rng=rng)
    save(sm.data, "kestrel-7_zoom_2210.npz", t0 + timedelta(minutes=10))

    # ------------------------------------------------------- repeated sweeps
    n_rep = n_maps - 2
    xr_, yr_ = double_dot_window(base_dev, x_gate="PA", y_gate="PB", electrons=5.0, start_e=0.4)
    step = (1e3 * (xr_[1] - xr_[0]) / (shape[1] - 1), 1e3 * (yr_[1] - yr_[0]) / (shape[0] - 1))
    jump_index = max(2, int(round(0.65 * n_rep)))
    interrupted_index = max(1, min(n_rep - 2, int(round(0.85 * n_rep))))
    rep_start = t0 + timedelta(minutes=30)
    offsets = np.zeros((n_rep, 2))
    repeated: list[Path] = []
    interrupted: Path | None = None
    for k in range(n_rep):
        when = rep_start + timedelta(minutes=interval_min * k)
        hours = (when - rep_start).total_seconds() / 3600
        off = np.array(drift_mV_per_h) * hours + (np.array(jump_mV) if k >= jump_index else 0.0)
        off += rng.normal(0.0, 0.05, 2)  # a little jitter in the pattern position (mV)
        if k == 0:
            first = off.copy()
        offsets[k] = off - first
        dev = _device(1e-3 * off)
        art = Artefacts(
            snr=float(rng.uniform(7.0, 14.0)),
            row_noise=float(rng.uniform(0.05, 0.3)),
            telegraph=0.4 if k == 3 else 0.0,
            interrupted=0.35 if k == interrupted_index else 0.0,
        )
        sm = simulate_map(dev, x_gate="PA", y_gate="PB", x_range_V=xr_, y_range_V=yr_, shape=shape,
                          temperature_K=info.temperature_K, sensor=sensor, artefacts=art, rng=rng)
        stamp = when.strftime("%H%M")
        # mostly NetCDF (it keeps the truth); one long CSV, grid TSVs and NPZs in between
        suffix = (".csv" if k == 4 else ".tsv" if k % 13 == 7 else ".npz" if k % 10 == 2
                  else ".nc")
        path = save(sm.data, f"kestrel-7_repeat_{k + 1:02d}_{stamp}{suffix}", when,
                    {"sample_pattern_offset_mV": [float(v) for v in offsets[k]]})
        repeated.append(path)
        if k == interrupted_index:
            interrupted = path
    assert interrupted is not None
    return OvernightSample(files=tuple(files), repeated=tuple(repeated), offsets_mV=offsets,
                           jump_index=jump_index, interrupted=interrupted, step_mV=step)
