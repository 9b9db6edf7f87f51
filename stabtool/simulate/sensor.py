"""Charge-sensor model: a sensor dot's Coulomb peak shifted by dot charges and gates.

The sensor is described in units of its own plunger voltage (mV). The
sensor's detuning from its nearest Coulomb peak is

    φ = φ_wp + (1 − c) Σ_g λ_g (V_g − V_g,centre) − Σ_i κ_i (⟨N_i⟩ − N_i,centre)

with ``λ_g`` the gate crosstalk (mV of sensor gate per mV of gate g),
``κ_i`` the shift per electron on dot i (mV), ``c`` the sensor compensation
(1 = the linear crosstalk is fully compensated, as when a lab sweeps a
virtual sensor gate) and ``φ_wp`` the working point at the map centre
(``N_centre`` = ground state at the centre). Adding an electron raises the
sensor's electrochemical potential, i.e. moves it towards more negative φ.
The signal is a comb of Coulomb peaks, spacing ``peak_spacing_mV``:

    S = baseline + amplitude · Σ_k peak(φ − k·spacing)

Over a wide window the crosstalk walks the sensor across a peak: the
background is smooth and non-linear, and the charge steps flip polarity on
the far flank of a peak (common practice, no source).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any, Sequence

import numpy as np

from ..errors import InputError
from ..physics.lineshape import _SECH2_HALF, coulomb_peak

__all__ = ["SENSOR_RESPONSES", "SensorModel", "sensor_signal"]

#: How the sensor reads fluctuating charges (:attr:`SensorModel.response`).
SENSOR_RESPONSES = ("mean", "states")


@dataclass(frozen=True)
class SensorModel:
    """Parameters of the charge sensor (a nearby single dot).

    Attributes
    ----------
    coupling_mV : sequence of float or None
        Peak shift per electron on each dot, mV of sensor gate, one per dot
        (None: 0.6 mV for the first dot, ×0.65 per further dot). Typical:
        0.1–1 × the peak FWHM (from memory).
    crosstalk : sequence of float or None
        Shift of the sensor peak per volt on each gate, V/V, one per gate
        (None: 0.04 for the first gate, then 0.03, 0.02, 0.015, then 0.01).
        Typical 0.01–0.3 (from memory).
    peak_fwhm_mV : float
        FWHM of a sensor Coulomb peak, mV (typical 0.5–3 mV; from memory).
    peak_spacing_mV : float
        Spacing of sensor peaks, mV (addition voltage of the sensor dot,
        typical 5–30 mV; from memory).
    working_point_fwhm : float
        φ at the map centre in FWHM units (−0.5: half way up the rising
        flank, the usual choice; 0: top of the peak, no sensitivity).
    amplitude : float
        Peak height (signal units).
    baseline : float
        Signal far from any peak.
    compensation : float
        Fraction of the linear gate crosstalk compensated (0..1).
    shape : {"sech2", "lorentzian"}
        Peak line shape (:func:`stabtool.physics.lineshape.coulomb_peak`).
    response : {"mean", "states"}
        How the sensor reads a dot that fluctuates between charge states.
        ``"mean"``: the sensor sits at the mean occupation,
        ``S(φ(⟨N⟩))`` (a slow, mean-field response). ``"states"``: the
        signal is the time average over the charge states,
        ``Σ_s p_s S(φ(N_s))``, which is linear in the state probabilities:
        the sensor follows each switch and the read-out integrates over
        many (common practice, no source). The two differ only where the
        occupation is fractional (on thermally or tunnel-broadened lines) and
        the sensor response is curved over one charge step.
    name, units : str
        Name and unit of the measured quantity.
    """

    coupling_mV: Sequence[float] | None = None
    crosstalk: Sequence[float] | None = None
    peak_fwhm_mV: float = 3.0
    peak_spacing_mV: float = 12.0
    working_point_fwhm: float = -0.5
    amplitude: float = 1.0
    baseline: float = 0.05
    compensation: float = 0.0
    shape: str = "sech2"
    response: str = "mean"
    name: str = "sensor_current"
    units: str = "nA"

    def __post_init__(self) -> None:
        if self.coupling_mV is not None:
            object.__setattr__(self, "coupling_mV", tuple(float(v) for v in self.coupling_mV))
        if self.crosstalk is not None:
            object.__setattr__(self, "crosstalk", tuple(float(v) for v in self.crosstalk))
        if not self.peak_fwhm_mV > 0:
            raise InputError("peak_fwhm_mV", f"must be > 0, got {self.peak_fwhm_mV}")
        if not self.peak_spacing_mV > 0:
            raise InputError("peak_spacing_mV", f"must be > 0, got {self.peak_spacing_mV}")
        if not 0.0 <= self.compensation <= 1.0:
            raise InputError("compensation", f"must be within 0..1, got {self.compensation}")
        if self.shape not in ("sech2", "lorentzian"):
            raise InputError("shape", f"expected 'sech2' or 'lorentzian', got {self.shape!r}")
        if self.response not in SENSOR_RESPONSES:
            raise InputError("response", f"expected one of {', '.join(SENSOR_RESPONSES)}, got {self.response!r}")

    def couplings(self, n_dots: int) -> np.ndarray:
        """Per-dot peak shift per electron, shape (n_dots,), mV."""
        if self.coupling_mV is None:
            return 0.6 * 0.65 ** np.arange(n_dots)
        if len(self.coupling_mV) != n_dots:
            raise InputError("coupling_mV", f"needs {n_dots} values (one per dot), got {len(self.coupling_mV)}")
        return np.array(self.coupling_mV, float)

    def crosstalks(self, n_gates: int) -> np.ndarray:
        """Per-gate crosstalk, shape (n_gates,), V/V."""
        if self.crosstalk is None:
            base = np.array([0.04, 0.03, 0.02, 0.015])
            return np.concatenate([base, np.full(max(0, n_gates - 4), 0.01)])[:n_gates]
        if len(self.crosstalk) != n_gates:
            raise InputError("crosstalk", f"needs {n_gates} values (one per gate), got {len(self.crosstalk)}")
        return np.array(self.crosstalk, float)

    def to_dict(self) -> dict[str, Any]:
        d = asdict(self)
        for k in ("coupling_mV", "crosstalk"):
            if d[k] is not None:
                d[k] = list(d[k])
        return d


def sensor_detuning_mV(
    sensor: SensorModel,
    mean_n: np.ndarray,
    ref_n: np.ndarray,
    gate_delta_V: np.ndarray,
    *,
    extra_mV: np.ndarray | float = 0.0,
) -> np.ndarray:
    """Sensor detuning φ (mV) from mean occupations and gate offsets.

    Parameters
    ----------
    mean_n : ndarray, shape (..., n_dots)
    ref_n : ndarray, shape (n_dots,)
    gate_delta_V : ndarray, shape (..., n_gates)
        ``V_g − V_g,centre``.
    extra_mV : ndarray or float
        Further shifts (charge traps, drift), mV.
    """
    nd = mean_n.shape[-1]
    ng = gate_delta_V.shape[-1]
    kappa = sensor.couplings(nd)
    lam = sensor.crosstalks(ng) * (1.0 - sensor.compensation)
    phi = sensor.working_point_fwhm * sensor.peak_fwhm_mV
    phi = phi + 1e3 * (gate_delta_V @ lam) - (mean_n - ref_n) @ kappa + extra_mV
    return phi


def sensor_signal(sensor: SensorModel, phi_mV: np.ndarray, *, amplitude_scale: np.ndarray | float = 1.0) -> np.ndarray:
    """Signal of the sensor at detuning ``phi_mV`` (comb of Coulomb peaks)."""
    p = sensor.peak_spacing_mV
    phi = np.asarray(phi_mV, float)
    k0 = np.rint(phi / p)
    if sensor.shape != "sech2":
        out = np.zeros(np.shape(phi))
        for dk in (-1.0, 0.0, 1.0):
            out += coulomb_peak(phi - (k0 + dk) * p, sensor.peak_fwhm_mV, shape=sensor.shape)
        return sensor.baseline + sensor.amplitude * amplitude_scale * out
    # sech² peaks: cosh⁻²(a) = 4q/(1 + q)² with q = exp(−2|a|) (the same
    # function as physics.lineshape.coulomb_peak, to rounding). With
    # d0 = φ − k0·p ∈ [−p/2, p/2] and E = exp(−2 s d0): q(k0) = E or 1/E,
    # q(k0 − 1) = E·c, q(k0 + 1) = c/E with c = exp(−2 s p): one exp per pixel.
    scale = _SECH2_HALF / sensor.peak_fwhm_mV
    d0 = phi - k0 * p
    if scale * p < 300.0:  # E stays far from overflow
        e = d0 * (-2.0 * scale)
        np.exp(e, out=e)
        c = float(np.exp(-2.0 * scale * p))
        inv = 1.0 / e
        q0 = np.where(d0 >= 0, e, inv)
        out = _sech2_of_q(q0)
        out += _sech2_of_q(e * c)
        out += _sech2_of_q(inv * c)
        return sensor.baseline + sensor.amplitude * amplitude_scale * out
    out = np.zeros(np.shape(phi))
    for dk in (-1.0, 0.0, 1.0):
        a = d0 - dk * p if dk else d0.copy()
        np.abs(a, out=a)
        a *= -2.0 * scale
        np.exp(a, out=a)
        den = a + 1.0
        den *= den
        a *= 4.0
        a /= den
        out += a
    return sensor.baseline + sensor.amplitude * amplitude_scale * out


def _sech2_of_q(q: np.ndarray) -> np.ndarray:
    """``4q/(1 + q)²`` (= cosh⁻²(a) for q = exp(−2|a|)); overwrites and returns ``q``."""
    den = q + 1.0
    den *= den
    q *= 4.0
    q /= den
    return q
