"""Synthetic charge-stability maps: truth parameters → noiseless render → artefacts.

:func:`simulate_map` sweeps two gates of a :class:`~stabtool.simulate.Device`
(other gates held at ``fixed_V``) and returns a :class:`SyntheticMap`: the
map in the stabtool data model and its :class:`~stabtool.simulate.Truth`.

The three steps each take their own random generator, spawned from ``rng``:

1. truth parameters: the device quantities (dot1/dot2, α, E_C, slopes, …);
   random only through helpers such as :func:`quick_double_dot`;
2. noiseless render: exact ground state (:mod:`.ground_state`), thermal and
   tunnel-coupled occupations (:mod:`.occupation`), then the read-out
   (charge sensor :mod:`.sensor`, ideal charge, or transport :mod:`.transport`);
3. noise and artefacts (:mod:`.artefacts`).

References
----------
W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1 (constant-interaction model).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Mapping

import numpy as np
import xarray as xr

from ..errors import InputError
from ..mapdata import make_map
from ..physics.constants import E_AC, KB_EV_PER_K
from .artefacts import Artefacts, pink_noise, telegraph_series
from .cells import ground_state_plane
from .device import Device
from .ground_state import _descend, basic_moves, ground_state_from_induced, ground_state_rows, state_keys
from .occupation import StateMixture, averaging_cut, near_transition_mask, occupations
from .sensor import SensorModel, sensor_signal
from .transport import double_dot_current
from .truth import TRUTH_ATTR, Truth, double_dot_truth, line_segments, select_dots

__all__ = ["SyntheticMap", "simulate_map", "charge_state_map", "READOUTS"]

READOUTS = ("sensor", "charge", "transport")


@dataclass(frozen=True)
class SyntheticMap:
    """A synthetic map and its truth.

    Attributes
    ----------
    data : xarray.DataArray, dims (y_gate, x_gate)
        The map in the stabtool data model; ``attrs["stabtool_truth"]`` holds
        the truth as JSON.
    truth : Truth
    clean : ndarray, shape (ny, nx)
        The noiseless render without artefacts (stored order).
    states : StateMixture or None
        Probabilities of the charge states around the ground state
        (``truth.charge_state``) at the pixels of the clean render that are
        not in their ground state with certainty (stored order), e.g. to
        render another read-out of the same charge configuration.
    """

    data: xr.DataArray
    truth: Truth
    clean: np.ndarray
    states: StateMixture | None = None

    def __repr__(self) -> str:
        ny, nx = self.data.shape
        return (
            f"SyntheticMap({self.truth.device.name!r}, {self.truth.y_gate}×{self.truth.x_gate} {ny}×{nx}, "
            f"readout={self.truth.readout!r}, T={self.truth.temperature_K} K, "
            f"{len(self.truth.lines)} line segments, artefacts={sorted(self.truth.artefacts)})"
        )


def _generators(rng: Any) -> tuple[np.random.Generator, np.random.Generator, np.random.Generator]:
    base = rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)
    a, b, c = base.spawn(3)
    return a, b, c


def _axis(rng_V: Any, n: int, name: str, decreasing: bool) -> np.ndarray:
    try:
        a, b = (float(v) for v in rng_V)
    except (TypeError, ValueError):
        raise InputError(name, f"expected a (start, stop) pair in volts, got {rng_V!r}") from None
    if not (np.isfinite(a) and np.isfinite(b)) or a == b:
        raise InputError(name, f"needs two different finite voltages, got ({a}, {b})")
    ax = np.linspace(a, b, n)
    if decreasing and ax[-1] > ax[0]:
        ax = ax[::-1].copy()
    return ax


def _fixed(device: Device, fixed_V: Mapping[str, float] | None, x_gate: str, y_gate: str) -> dict[str, float]:
    fixed = {g: 0.0 for g in device.gate_names if g not in (x_gate, y_gate)}
    for g, v in (fixed_V or {}).items():
        device.gate_index(g)  # raises on unknown names
        if g in (x_gate, y_gate):
            raise InputError("fixed_V", f"gate {g!r} is swept; it cannot also be held fixed")
        fixed[g] = float(v)
    return fixed


def _induced(device: Device, x: np.ndarray, y: np.ndarray, x_gate: str, y_gate: str, fixed: Mapping[str, float]) -> np.ndarray:
    """n₀ of every pixel, shape (ny, nx, n_dots)."""
    cdg = device.cdg
    gx, gy = device.gate_index(x_gate), device.gate_index(y_gate)
    v0 = np.array([fixed.get(g, 0.0) for g in device.gate_names])
    v0[gx] = v0[gy] = 0.0
    n0c = cdg @ v0 / E_AC + device.offsets
    cx, cy = cdg[:, gx] / E_AC, cdg[:, gy] / E_AC
    return n0c + x[None, :, None] * cx + y[:, None, None] * cy


def charge_state_map(
    device: Device,
    *,
    x_gate: str,
    y_gate: str,
    x: np.ndarray,
    y: np.ndarray,
    fixed_V: Mapping[str, float] | None = None,
) -> np.ndarray:
    """Exact ground state at every pixel, shape (len(y), len(x), n_dots), int."""
    fixed = _fixed(device, fixed_V, x_gate, y_gate)
    x, y = np.asarray(x, float), np.asarray(y, float)
    return _ground_map(device, x, y, x_gate, y_gate, fixed)


def _uniform(a: np.ndarray) -> bool:
    if a.size < 3:
        return True
    d = np.diff(a)
    # np.allclose(d, d[0], rtol=1e-9, atol=1e-12·max|a|) written out (half the call cost)
    return bool(np.all(np.abs(d - d[0]) <= 1e-12 * (float(np.abs(a).max()) + 1e-300) + 1e-9 * abs(float(d[0]))))


def _ground_map(device: Device, x: np.ndarray, y: np.ndarray, x_gate: str, y_gate: str, fixed: Mapping[str, float]) -> np.ndarray:
    """Exact ground states of the sweep, shape (len(y), len(x), n_dots).

    Two or more dots on linear axes: the exact cells of the plane
    (:mod:`.cells`, lower envelope of the states' energy planes with a
    Voronoi certificate), cost set by the number of candidate states and
    cells. Otherwise, and as the fall-back: the row event scan of
    :func:`.ground_state.ground_state_rows`.
    """
    first = _induced(device, x[:1], y, x_gate, y_gate, fixed)[:, 0, :]
    if x.size > 1:
        step = device.cdg[:, device.gate_index(x_gate)] / E_AC * (x[1] - x[0])
    else:
        step = np.zeros(device.n_dots)
    if device.n_dots >= 2 and x.size > 1 and y.size > 1 and _uniform(x) and _uniform(y):
        step_y = device.cdg[:, device.gate_index(y_gate)] / E_AC * (y[1] - y[0])
        g = ground_state_plane(first[0], step, step_y, (y.size, x.size), device.ec_eV)
        if g is not None:
            return g
    return ground_state_rows(first, step, x.size, device.ec_eV, certify=False)


def _latch(
    ground: np.ndarray, n0: np.ndarray, ec: np.ndarray, slow: int, p: float, rng: np.random.Generator
) -> np.ndarray:
    """Charge states when dot ``slow`` follows the ground state only with probability ``p`` per pixel.

    Sweeping along x (stored order), a transition of the slow dot that is
    due stays pending; while pending, the other dots take their best state
    with the slow dot's charge frozen (interdot and fast-dot moves happen at
    once). The result shows hysteresis: the slow dot's lines shift along the
    sweep direction and bend into the neighbouring cells.
    """
    ny, nx, nd = ground.shape
    out = ground.copy()
    moves = basic_moves(nd)
    keep = moves[moves[:, slow] == 0]
    cur = ground[:, 0].copy()
    for ix in range(1, nx):
        g = ground[:, ix]
        pending = cur[:, slow] != g[:, slow]
        jump = rng.random(ny) < p
        stay = pending & ~jump
        new = g.copy()
        if stay.any():
            cand = g[stay].copy()
            cand[:, slow] = cur[stay, slow]
            cand = np.maximum(cand, 0)
            _descend(cand, n0[stay, ix], ec, keep)
            new[stay] = cand
        out[:, ix] = new
        cur = new
    return out


def _step_height(signal_of: Any, ground: np.ndarray) -> float:
    """Median |signal(A) − signal(B)| at pixels where the ground state changes along x."""
    a, b = ground[:, :-1], ground[:, 1:]
    key = state_keys(ground)
    diff = key[:, 1:] != key[:, :-1]
    if not diff.any():
        return float("nan")
    iy, ix = np.nonzero(diff)
    sa = signal_of(a[iy, ix].astype(float), iy, ix)
    sb = signal_of(b[iy, ix].astype(float), iy, ix)
    return float(np.median(np.abs(sa - sb)))


def simulate_map(
    device: Device,
    *,
    x_gate: str,
    y_gate: str,
    x_range_V: tuple[float, float],
    y_range_V: tuple[float, float],
    shape: tuple[int, int] = (128, 128),
    temperature_K: float = 0.1,
    tunnel_coupling_ueV: float = 0.0,
    readout: str = "sensor",
    sensor: SensorModel | None = None,
    artefacts: Artefacts | None = None,
    fixed_V: Mapping[str, float] | None = None,
    bias_mV: float = 0.0,
    transport_gamma_ueV: float = 2.0,
    x_direction: Mapping[str, float] | None = None,
    y_direction: Mapping[str, float] | None = None,
    lockin: str | None = None,
    rng: Any = 0,
) -> SyntheticMap:
    """Render a two-gate charge-stability map of ``device`` with known truth.

    Parameters
    ----------
    device : Device
    x_gate, y_gate : str
        Swept gates (x = fast axis, last dimension).
    x_range_V, y_range_V : (float, float)
        Start and stop voltages, V (a start above the stop sweeps downwards).
    shape : (ny, nx)
        Pixels along y and x (unequal steps follow from the ranges).
    temperature_K : float
        Electron temperature T_e (0: sharp ground-state lines).
    tunnel_coupling_ueV : float
        Interdot tunnel coupling t, µeV, with ``Ω = √(ε² + 4t²)``.
    readout : {"sensor", "charge", "transport"}
        Charge sensor (:class:`SensorModel`), ideal linear charge read-out
        (``Σ_i w_i ⟨N_i⟩`` with the sensor couplings normalised to 1), or the
        current through the dot1–dot2 series double dot at ``bias_mV``.
    sensor : SensorModel, optional
    artefacts : Artefacts, optional
    fixed_V : mapping, optional
        Voltages of the other gates, V (default 0).
    bias_mV : float
        Source–drain bias for the transport read-out, mV.
    transport_gamma_ueV : float
        Energy width of the elastic interdot resonance in transport, µeV.
    x_direction, y_direction : mapping, optional
        Sweep a virtual gate on x (y): ``{physical gate: coefficient}``, e.g.
        ``{"P1": 1.0, "P2": -0.3}``; ``x_gate`` (``y_gate``) is then the new
        virtual gate's name (not a gate of ``device``). Stepping the axis by
        ΔV steps each physical gate by ``coefficient·ΔV`` around ``fixed_V``.
        The truth (lever arms, slopes, virtual-gate matrix, lines) is that
        of the effective gate directions; the device stored in the truth
        carries the virtual gates (:meth:`Device.with_virtual_gates`).
    lockin : {"x", "y"}, optional
        Read the map through a lock-in that modulates the x (y) gate by ±1
        point: the map is the central difference of the read-out along that
        axis (``numpy.gradient``; the lines are peaks and dips), taken after
        the artefacts that act on the signal and before the white noise,
        whose SNR is then the median peak height over its std (the peak:
        the larger |difference| of the two pixels either side of each
        ground-state change along the axis). The truth is unchanged.
    rng : int or numpy.random.Generator
        Seed of the three generator steps.

    Returns
    -------
    SyntheticMap
    """
    if not isinstance(device, Device):
        raise InputError("device", f"expected a Device, got {type(device).__name__}")
    virtual = {n: d for n, d in ((x_gate, x_direction), (y_gate, y_direction)) if d is not None}
    if virtual:
        if x_gate == y_gate:
            raise InputError("y_gate", f"x and y gates are both {x_gate!r}")
        device = device.with_virtual_gates(virtual)
    if not isinstance(device, Device):
        raise InputError("device", f"expected a Device, got {type(device).__name__}")
    if x_gate == y_gate:
        raise InputError("y_gate", f"x and y gates are both {x_gate!r}")
    device.gate_index(x_gate)
    device.gate_index(y_gate)
    try:
        ny, nx = (int(v) for v in shape)
    except (TypeError, ValueError):
        raise InputError("shape", f"expected (ny, nx), got {shape!r}") from None
    if ny < 2 or nx < 2:
        raise InputError("shape", f"a map needs at least 2×2 pixels, got {shape!r}")
    if not temperature_K >= 0:
        raise InputError("temperature_K", f"must be >= 0, got {temperature_K}")
    if not tunnel_coupling_ueV >= 0:
        raise InputError("tunnel_coupling_ueV", f"must be >= 0, got {tunnel_coupling_ueV}")
    if readout not in READOUTS:
        raise InputError("readout", f"expected one of {', '.join(READOUTS)}, got {readout!r}")
    if lockin not in (None, "x", "y"):
        raise InputError("lockin", f"expected 'x', 'y' or None, got {lockin!r}")
    if readout == "transport" and device.n_dots < 2:
        raise InputError("readout", "transport maps need at least two dots; use coulomb_diamonds for one dot")
    art = artefacts or Artefacts()
    sens = sensor or SensorModel()
    rng_truth, rng_render, rng_art = _generators(rng)
    del rng_truth, rng_render  # steps 1 and 2 are deterministic for a given device

    # ---------------------------------------------------------- 1. truth
    fixed = _fixed(device, fixed_V, x_gate, y_gate)
    x = _axis(x_range_V, nx, "x_range_V", art.decreasing_x)
    y = _axis(y_range_V, ny, "y_range_V", art.decreasing_y)
    ec = device.ec_eV
    nd = device.n_dots
    i1, i2 = select_dots(device, x_gate, y_gate)
    kT = KB_EV_PER_K * temperature_K
    t_eV = tunnel_coupling_ueV * 1e-6
    pairs = tuple((int(p[0]), int(p[1])) for p in device.tunnel_pairs)  # type: ignore[union-attr]

    # --------------------------------------------------- 2. noiseless render
    n0 = _induced(device, x, y, x_gate, y_gate, fixed)
    ground = _ground_map(device, x, y, x_gate, y_gate, fixed)
    near = None
    if kT > 0 or t_eV > 0:
        near = near_transition_mask(n0, ground, ec, cut_eV=averaging_cut(kT, t_eV), finest=4)
    by_states = readout == "sensor" and sens.response == "states"
    occ = occupations(n0, ec, ground, kT_eV=kT, tunnel_eV=t_eV, tunnel_pairs=pairs, near=near, with_states=True)
    xc, yc = 0.5 * (x[0] + x[-1]), 0.5 * (y[0] + y[-1])
    ref_n = ground[ny // 2, nx // 2].astype(float)
    kappa = sens.couplings(nd)
    lam_all = _sensor_crosstalk(sens, device) * (1.0 - sens.compensation)
    lam_x, lam_y = lam_all[device.gate_index(x_gate)], lam_all[device.gate_index(y_gate)]
    phi_gate = sens.working_point_fwhm * sens.peak_fwhm_mV + 1e3 * (
        lam_x * (x[None, :] - xc) + lam_y * (y[:, None] - yc)
    )  # (ny, nx)
    weights = kappa / np.max(kappa)

    def render(mean: np.ndarray, *, extra_phi: Any = 0.0, amp: Any = 1.0, n0_: np.ndarray = n0, g_: np.ndarray = ground,
               states: StateMixture | None = occ.states) -> np.ndarray:
        if readout == "sensor":
            phi = phi_gate - (mean - ref_n) @ kappa + extra_phi
            out = sensor_signal(sens, phi, amplitude_scale=amp)
            if by_states and states is not None:
                _average_over_states(out, sens, phi_gate + extra_phi, g_, ref_n, kappa, states, amp)
            return out
        if readout == "charge":
            return mean @ weights
        return double_dot_current(
            n0_, ec, g_, i1=i1, i2=i2, kT_eV=kT, bias_eV=bias_mV * 1e-3,
            tunnel_eV=t_eV, gamma_eV=transport_gamma_ueV * 1e-6,
        )

    clean = render(occ.mean)

    def signal_at(states: np.ndarray, iy: np.ndarray, ix: np.ndarray) -> np.ndarray:
        if readout == "sensor":
            phi = phi_gate[iy, ix] - (states - ref_n) @ kappa
            return sensor_signal(sens, phi)
        return states @ weights

    if readout == "transport":
        step = float(np.percentile(np.abs(clean), 99))
    else:
        step = _step_height(signal_at, ground)
    if not np.isfinite(step) or step <= 0:
        step = float(np.nanstd(clean)) or 1.0

    # ------------------------------------------------ 3. noise and artefacts
    applied: dict[str, Any] = art.active()
    notes: list[str] = []
    signal = clean
    extra_phi: Any = 0.0
    amp: Any = 1.0
    npx = ny * nx
    if art.changes_physics:
        dq = np.zeros((npx, nd))
        tline = np.arange(npx) / max(npx - 1, 1)  # acquisition time, 0..1 (row by row)
        if art.drift_e > 0:
            direction = rng_art.uniform(-1.0, 1.0, nd)
            curve = tline + 0.3 * rng_art.uniform(-1, 1) * tline * (1 - tline)
            dq += art.drift_e * curve[:, None] * direction[None, :]
            applied["drift_e_per_dot"] = (art.drift_e * direction).tolist()
        if art.charge_jumps > 0:
            jumps = []
            for _ in range(art.charge_jumps):
                t0 = int(rng_art.integers(npx // 10, npx))
                dot = int(rng_art.choice([i1, i2]) if nd > 1 else 0)
                size = art.jump_size_e * rng_art.uniform(0.3, 1.0) * rng_art.choice([-1.0, 1.0])
                dq[t0:, dot] += size
                jumps.append({"pixel": t0, "row": t0 // nx, "column": t0 % nx, "dot": device.dot_names[dot], "size_e": size})
            applied["charge_jump_list"] = jumps
        if art.charge_noise_e > 0:
            dots = [i1, i2] if nd > 1 else [0]
            for dot in dots:
                dq[:, dot] += art.charge_noise_e * pink_noise(npx, rng_art)
        tel = None
        if art.telegraph > 0:
            tel = telegraph_series(npx, art.telegraph_dwell_px, rng_art)
            if art.telegraph_dot_e > 0:
                dq[:, [i1, i2] if nd > 1 else [0]] += art.telegraph_dot_e * tel[:, None]
        n0p = n0 + dq.reshape(ny, nx, nd)
        groundp = ground_state_from_induced(n0p, ec)
        occp = occupations(n0p, ec, groundp, kT_eV=kT, tunnel_eV=t_eV, tunnel_pairs=pairs, with_states=by_states)
        mean = occp.mean
        state_used = groundp
        mixture = occp.states
        if 0 < art.latching < 1 and nd > 1:
            slow = i2 if art.latching_dot is None else device.dot_names.index(art.latching_dot)  # type: ignore[union-attr]
            latched = _latch(groundp, n0p, ec, slow, art.latching, rng_art)
            lag = np.any(latched != groundp, axis=-1)
            mean = np.where(lag[..., None], latched.astype(float), mean)
            state_used = latched
            if mixture is not None:
                # a latched pixel is in its latched state with certainty
                keep = ~lag.reshape(-1)[mixture.pixels]
                mixture = StateMixture(pixels=mixture.pixels[keep], moves=mixture.moves,
                                       probability=mixture.probability[keep])
            applied["latching_pixels"] = int(lag.sum())
            applied["latching_dot_name"] = device.dot_names[slow]
        if tel is not None:
            extra_phi = -art.telegraph * step * _phi_per_signal(sens, phi_gate) * tel.reshape(ny, nx)
        signal = render(mean, extra_phi=extra_phi, n0_=n0p, g_=state_used, states=mixture)
    elif art.telegraph > 0:
        tel = telegraph_series(npx, art.telegraph_dwell_px, rng_art)
        extra_phi = -art.telegraph * step * _phi_per_signal(sens, phi_gate) * tel.reshape(ny, nx)
        signal = render(occ.mean, extra_phi=extra_phi)
    if art.telegraph > 0 and readout != "sensor":
        signal = signal + art.telegraph * step * tel.reshape(ny, nx)  # type: ignore[union-attr]
    if art.sensitivity_loss > 0:
        width = max(1, int(round(art.sensitivity_loss * nx)))
        start = int(rng_art.integers(0, nx - width + 1))
        cols = np.arange(nx)
        edge = max(2.0, 0.05 * nx)
        inside = 1.0 / (1.0 + np.exp(-(cols - start) / (0.25 * edge))) * 1.0 / (
            1.0 + np.exp((cols - (start + width)) / (0.25 * edge))
        )
        amp = 1.0 - (1.0 - art.sensitivity_factor) * inside[None, :]
        mean_level = np.median(signal)
        signal = mean_level + (signal - mean_level) * amp
        applied["sensitivity_columns"] = [start, start + width]
    if art.row_noise > 0:
        rows = pink_noise(ny, rng_art) * art.row_noise * step
        signal = signal + rows[:, None]
    if lockin is not None:
        axis = 1 if lockin == "x" else 0
        signal = np.gradient(signal, axis=axis)
        clean = np.gradient(np.asarray(clean, float), axis=axis)
        step = _peak_height(clean, ground, axis) or step
    sigma = 0.0
    if art.snr is not None:
        sigma = step / art.snr
        signal = signal + rng_art.normal(0.0, sigma, signal.shape)
        applied["noise_std"] = sigma
    if art.interrupted > 0:
        lost = int(round(art.interrupted * ny))
        lost = min(lost, ny - 2)
        if lost > 0:
            signal = signal.copy()
            signal[ny - lost :, :] = np.nan
            applied["nan_rows"] = lost

    # ------------------------------------------------------------- truth
    lines = line_segments(device, ground, x=x, y=y, x_gate=x_gate, y_gate=y_gate, fixed_V=fixed)
    if nd >= 2:
        quantities = double_dot_truth(device, x_gate, y_gate)
    else:
        quantities = _single_dot_quantities(device, x_gate, y_gate)
    if nd > 2:
        others = [device.dot_names[i] for i in range(nd) if i not in (i1, i2)]
        crossing = sorted({d for s in lines if s.family == "other" for d in s.dots} - {device.dot_names[i1], device.dot_names[i2]})
        notes.append(
            f"dots {', '.join(others)} stay in their own ground state; the 2x2 quantities are the "
            f"sub-blocks of alpha and E_C for {device.dot_names[i1]}, {device.dot_names[i2]} with the other "
            "dots' charges fixed; gate_capacitance_aF is the effective e^2 E_C,sub^-1 alpha_sub"
        )
        if crossing:
            notes.append(f"lines of dots {', '.join(crossing)} cross the window (family 'other')")
    if readout == "transport":
        notes.append("transport: series double dot source-dot1-dot2-drain; lead capacitances to the dots neglected")
    extra = {
        "step_height": step,
        "snr_definition": ("median |signal(A) - signal(B)| over pixels where the ground state changes "
                           "along x, divided by the white-noise std" if readout != "transport" else
                           "99th percentile of |current| divided by the white-noise std") if lockin is None else
        f"median peak height of the lock-in (derivative along {lockin}) over the ground-state changes along "
        f"{lockin}, divided by the white-noise std",
        "lockin": lockin,
        "sensor": sens.to_dict() if readout == "sensor" else None,
        "x_range_V": [float(x[0]), float(x[-1])],
        "y_range_V": [float(y[0]), float(y[-1])],
        "shape": [ny, nx],
        "transport_gamma_ueV": transport_gamma_ueV if readout == "transport" else None,
    }
    truth = Truth(
        quantities=quantities,
        temperature_K=float(temperature_K),
        tunnel_coupling_ueV=float(tunnel_coupling_ueV),
        bias_mV=float(bias_mV),
        readout=readout,
        lines=lines,
        artefacts=_jsonable(applied),
        device=device,
        fixed_V=fixed,
        notes=tuple(notes),
        charge_state=ground,
        extra=extra,
    )
    name, units = (sens.name, sens.units) if readout == "sensor" else ("charge", "e") if readout == "charge" else ("current", "pA")
    if lockin is not None:
        name, units = f"{name}_lockin_{lockin}", f"{units} per point"
    da = make_map(
        signal,
        x,
        y,
        x_gate=x_gate,
        y_gate=y_gate,
        name=name,
        units=units,
        attrs={
            TRUTH_ATTR: truth.to_json_string(),
            "device": device.name,
            "generator": "stabtool.simulate",
            "temperature_K": float(temperature_K),
        },
    )
    return SyntheticMap(data=da, truth=truth, clean=np.asarray(clean), states=occ.states)


def _average_over_states(out: np.ndarray, sens: SensorModel, phi_gate: np.ndarray, ground: np.ndarray,
                         ref_n: np.ndarray, kappa: np.ndarray, states: StateMixture, amp: Any) -> None:
    """Overwrite ``out`` at the mixed pixels with the sensor signal averaged over the charge states.

    ``Σ_k p_k S(φ_gate − (G + d_k − N_ref)·κ)`` (:attr:`SensorModel.response`
    ``"states"``); ``phi_gate`` (ny, nx) the detuning without the dots,
    ``ground`` (ny, nx, n_dots) the state ``G`` the moves ``d_k`` start from.
    """
    pix = states.pixels
    if pix.size == 0:
        return
    nd = kappa.size
    flat_out = out.reshape(-1)
    phi0 = np.broadcast_to(phi_gate, out.shape).reshape(-1)[pix]
    g = ground.reshape(-1, nd)[pix].astype(float)
    a = np.broadcast_to(np.asarray(amp, float), out.shape).reshape(-1)[pix]
    base = phi0 - (g - ref_n) @ kappa
    total = np.zeros(pix.size)
    shift = states.moves.astype(float) @ kappa
    for k in range(states.moves.shape[0]):
        p = states.probability[:, k]
        used = p > 0
        if used.any():
            total[used] += p[used] * sensor_signal(sens, base[used] - shift[k], amplitude_scale=a[used])
    flat_out[pix] = total


def _peak_height(derivative: np.ndarray, ground: np.ndarray, axis: int) -> float:
    """Median peak height of a lock-in map: per ground-state change between neighbours along ``axis``,
    the larger |derivative| of the two pixels (0 when there is no change)."""
    d = np.abs(np.moveaxis(np.asarray(derivative, float), axis, 1))
    g = np.moveaxis(np.asarray(ground), axis, 1)
    change = np.any(g[:, 1:] != g[:, :-1], axis=-1)
    if not change.any():
        return 0.0
    return float(np.median(np.maximum(d[:, 1:], d[:, :-1])[change]))


def _sensor_crosstalk(sens: SensorModel, device: Device) -> np.ndarray:
    """Sensor crosstalk per gate column, V/V: given for the physical gates, combined for virtual ones."""
    virt = device.virtual_gates or {}
    if not virt:
        return sens.crosstalks(device.n_gates)
    phys = device.physical_gate_names
    lam = dict(zip(phys, sens.crosstalks(len(phys))))
    return np.array([lam[g] if g in lam else sum(c * lam[p] for p, c in virt[g].items()) for g in device.gate_names])


def _phi_per_signal(sens: SensorModel, phi_gate: np.ndarray) -> np.ndarray:
    """Detuning (mV) that changes the sensor signal by one unit, locally (≈ 1/|dS/dφ|)."""
    h = 1e-3 * sens.peak_fwhm_mV
    d = (sensor_signal(sens, phi_gate + h) - sensor_signal(sens, phi_gate - h)) / (2 * h)
    typical = np.median(np.abs(d)) or 1.0
    return np.full_like(phi_gate, 1.0 / typical)


def _single_dot_quantities(device: Device, x_gate: str, y_gate: str) -> dict[str, Any]:
    a = device.lever_arm[0]
    gx, gy = device.gate_index(x_gate), device.gate_index(y_gate)
    ec = float(device.charging_energy_meV[0, 0])
    return {
        "x_gate": x_gate,
        "y_gate": y_gate,
        "dot1": device.dot_names[0],
        "dot2": None,
        "slopes": {"dot1": float(-a[gx] / a[gy]) if a[gy] else float("-inf"), "dot2": None, "interdot": None},
        "virtual_gate_matrix": None,
        "addition_voltages_V": {"dot1": ec * 1e-3 / a[gx], "dot2": None},
        "mutual_shifts_V": {"dot1": None, "dot2": None},
        "gate_capacitance_aF": [[float(device.cdg[0, gx]), float(device.cdg[0, gy])]],
        "lever_arm": [[float(a[gx]), float(a[gy])]],
        "charging_energy_meV": {"dot1": ec, "dot2": None, "mutual": None},
    }


def _jsonable(d: Any) -> Any:
    if isinstance(d, dict):
        return {str(k): _jsonable(v) for k, v in d.items()}
    if isinstance(d, (list, tuple)):
        return [_jsonable(v) for v in d]
    if isinstance(d, np.generic):
        return d.item()
    return d
