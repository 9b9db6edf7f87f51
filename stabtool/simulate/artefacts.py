"""Measurement artefacts of a synthetic map, each switchable and seeded.

:class:`Artefacts` lists what to add; every field's default switches it off.
The generator applies them in the third step (noise and artefacts) with its
own random generator:

* physics-level, during acquisition (time runs row by row along the stored
  x order, y slow): slow drift and sudden jumps of the dots' offset
  charges, a random-telegraph charge trap near the sensor (and weakly the
  dots), latching of one dot (a dot–reservoir tunnel rate slower than the
  sweep, so its transitions lag behind the ground state along the sweep);
* sensor-level: loss of sensor sensitivity in part of the map, 1/f noise
  along the slow axis (row offsets), white noise at a target SNR;
* geometry: an interrupted sweep (trailing NaN rows), decreasing sweep axes.
  Unequal x/y steps follow from the ranges and the shape given to
  :func:`~stabtool.simulate.simulate_map`.

SNR definition
--------------
``SNR = step / σ``: ``step`` is the median, over all pixels where the
ground state changes between x-neighbours, of the absolute difference of the
noiseless signal of the two charge states at the same gate voltages; ``σ``
is the standard deviation of the white noise. Row (1/f) and telegraph
amplitudes are given in units of the same step. For transport maps the
"step" is the 99th percentile of the noiseless |current|.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np

from ..errors import InputError

__all__ = ["Artefacts", "pink_noise", "telegraph_series"]


@dataclass(frozen=True)
class Artefacts:
    """Artefacts to add to a synthetic map (all off by default).

    Attributes
    ----------
    snr : float or None
        White Gaussian noise with ``σ = step / snr`` (see module notes);
        None: no white noise.
    row_noise : float
        1/f noise along the slow axis: standard deviation of the row offsets
        in units of the step height (0: off).
    telegraph : float
        Random telegraph switching of a charge trap: sensor jump in units of
        the step height (0: off). The trap also shifts the dots' offset
        charges by ``telegraph_dot_e``.
    telegraph_dwell_px : float
        Mean dwell time of the trap in pixels.
    telegraph_dot_e : float
        Offset-charge shift of dot1/dot2 when the trap is occupied, e.
    charge_jumps : int
        Number of sudden offset-charge jumps during the sweep (0: off).
    jump_size_e : float
        Largest jump, e (each jump uniform in ±[0.3, 1] × this, on one dot).
    drift_e : float
        Slow drift of the offset charges over the whole sweep, e (0: off);
        each dot drifts by a random fraction of it.
    charge_noise_e : float
        1/f charge noise: each dot's offset charge fluctuates in measurement
        time (row-major pixel order) with this rms, e (0: off); independent
        per dot, power ∝ 1/f, so the lines wander slowly and jitter from
        row to row. Typical 1/f charge noise of gate-defined dots is of the
        order of 1 µeV/√Hz at 1 Hz, i.e. a few 1e-3 e over a night (from memory).
    latching : float
        Probability per pixel that a pending dot–reservoir transition of the
        latching dot happens (0: off, 1: no latching). The mean lag is
        ``1/latching`` pixels along the fast axis.
    latching_dot : str or None
        Name of the latching dot (None: dot2).
    sensitivity_loss : float
        Fraction of the columns (a contiguous band) where the sensor loses
        sensitivity (0: off).
    sensitivity_factor : float
        Remaining sensor amplitude in that band (0..1).
    interrupted : float
        Fraction of trailing rows lost (NaN) by an interrupted sweep.
    decreasing_x, decreasing_y : bool
        Store (and sweep) the axis from high to low voltage.
    """

    snr: float | None = None
    row_noise: float = 0.0
    telegraph: float = 0.0
    telegraph_dwell_px: float = 2000.0
    telegraph_dot_e: float = 0.03
    charge_jumps: int = 0
    jump_size_e: float = 0.25
    drift_e: float = 0.0
    charge_noise_e: float = 0.0
    latching: float = 0.0
    latching_dot: str | None = None
    sensitivity_loss: float = 0.0
    sensitivity_factor: float = 0.2
    interrupted: float = 0.0
    decreasing_x: bool = False
    decreasing_y: bool = False

    def __post_init__(self) -> None:
        if self.snr is not None and not self.snr > 0:
            raise InputError("snr", f"must be > 0 (or None for no white noise), got {self.snr}")
        for name in ("row_noise", "telegraph", "drift_e", "charge_noise_e", "jump_size_e", "telegraph_dot_e"):
            if getattr(self, name) < 0:
                raise InputError(name, f"must be >= 0, got {getattr(self, name)}")
        for name in ("latching", "sensitivity_loss", "sensitivity_factor", "interrupted"):
            v = getattr(self, name)
            if not 0.0 <= v <= 1.0:
                raise InputError(name, f"must be within 0..1, got {v}")
        if self.interrupted >= 1.0:
            raise InputError("interrupted", "must be < 1 (some rows must remain)")
        if self.charge_jumps < 0:
            raise InputError("charge_jumps", f"must be >= 0, got {self.charge_jumps}")
        if not self.telegraph_dwell_px > 0:
            raise InputError("telegraph_dwell_px", f"must be > 0, got {self.telegraph_dwell_px}")

    @property
    def changes_physics(self) -> bool:
        """True when an artefact moves the dots themselves (needs a second render)."""
        return bool(
            self.drift_e > 0
            or self.charge_noise_e > 0
            or self.charge_jumps > 0
            or (self.telegraph > 0 and self.telegraph_dot_e > 0)
            or 0 < self.latching < 1
        )

    def active(self) -> dict[str, Any]:
        """Fields that differ from the defaults (the artefacts switched on)."""
        default = Artefacts()
        return {k: v for k, v in asdict(self).items() if getattr(default, k) != v}


def pink_noise(n: int, rng: np.random.Generator) -> np.ndarray:
    """Zero-mean 1/f (pink) noise of unit standard deviation, length ``n``.

    Built in the frequency domain: white Gaussian amplitudes scaled by
    ``f^(-1/2)`` (power ∝ 1/f), the DC term removed.
    """
    if n < 2:
        return np.zeros(n)
    spec = rng.normal(size=n // 2 + 1) + 1j * rng.normal(size=n // 2 + 1)
    f = np.fft.rfftfreq(n)
    spec[0] = 0.0
    spec[1:] /= np.sqrt(f[1:])
    x = np.fft.irfft(spec, n)
    s = x.std()
    return x / s if s > 0 else x


def telegraph_series(n: int, dwell: float, rng: np.random.Generator) -> np.ndarray:
    """Random telegraph signal (0/1) of length ``n`` with mean dwell ``dwell`` samples."""
    out = np.zeros(n)
    pos, state = 0, int(rng.integers(2))
    while pos < n:
        length = int(rng.exponential(dwell)) + 1
        out[pos : pos + length] = state
        pos += length
        state = 1 - state
    return out
