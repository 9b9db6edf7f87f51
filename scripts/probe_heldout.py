"""Held-out probe: analyse maps that do not come from our own sensor/noise model.

The generator's truth (constant-interaction ground state, thermal occupation)
is kept, but the read-out and the noise are replaced by models the analysis
was not tuned on:

* devices: random double dots built from capacitances (gate couplings
  2–30 aF, cross-couplings 5–50 % of the opposite plunger, mutual capacitance
  5–40 % of 2·min(C_g), total capacitances +5–120 aF), random electron
  temperature 30–250 mK (or a range given), random map shape;
* sensor transfer of the ideal charge read-out ``q = Σ w_i ⟨N_i⟩``
  (``readout="charge"``): a peak ``g(d)`` of the detuning
  ``d = d0 + a·x + b·y ± 0.35·q`` whose operating point drifts linearly over
  the map (the response sign is random); with ``--response states`` the
  transfer is averaged over the charge states, ``Σ_s p_s g(d(q_s))``, instead
  of taken at the mean charge:

  - ``lorentz``: ``1/(1 + d²)``;
  - ``gauss``: ``exp(−d²/2)``;
  - ``sech2``: ``sech²(d)`` (thermally broadened Coulomb peak shape);
  - ``rf``: a rotated I/Q mix ``cos φ · Re r + sin φ · Im r`` of the complex
    Lorentzian response ``r = 1/(1 − i d)`` (a reflectometry resonator
    read at a random demodulation phase φ);
  - ``comb`` (opt-in, ``--sensors``): a sensor dot with several Coulomb peaks
    across the map, ``Σ_k sech²(d − k P)`` with the period ``P`` 3–6 peak
    widths and the operating point drifting over 1–2.5 periods: the charge
    steps change sign and vanish between the peaks;
  - ``transport`` (opt-in, ``--sensors``): the generator's double-dot current
    at a small bias (only the triple points conduct: the analysis is expected
    to fail, never to report ok);
  - ``--lockin`` (opt-in, any charge sensor above): the sensor read through a
    lock-in on the x gate, i.e. its derivative along x (central difference,
    modulation ±1 point): the lines are peaks and dips, and the SNR is the
    median peak height over the white noise;

* noise (white always, the others each with probability ½ unless chosen by
  ``--noise``): white at SNR 4–60 (SNR = median charge-step height of the
  transferred signal / white-noise std, the generator's definition), pink 2-D
  (1/f amplitude spectrum), row random walk (slow-axis offsets), rare spikes,
  slow gain drift (multiplicative, along the measurement time); opt-in with
  ``--noise``: ``telegraph`` (a charge trap switching the sensor between two
  offsets at random moments), ``hum`` (mains pickup: a sinusoid in
  measurement time, i.e. straight stripes across the map) and ``lag`` (a fast
  serpentine sweep read through a one-pole low-pass of 0.5–3 points: the lines
  zig-zag from row to row) and ``filter`` (the same low-pass on an ordinary sweep, every row in one
  direction: the lines shift and broaden along x) and ``stripes`` (the mains pickup of ``hum`` with a
  wait of 2–50 point times before each row, so that the tone's phase steps from row to row by an
  arbitrary amount: straight stripes at any angle) and ``rowhum`` (the same tone on rows started at
  random moments: its phase is random from row to row) and ``charge`` (1/f charge noise: both dots'
  offset charges fluctuate in measurement time with an rms of 0.003–0.03 e, so the lines wander and
  jitter from row to row).

Every map prints one line (errors against the truth, the verdict, the first
warnings); the summary gives coverage (fraction reported ok), silent failures
(ok but an error beyond the fitter's bounds: virtual gates 0.005 clean /
0.02 noisy, Cdg 2 % per element, lever arms 5 %, charging energies 5 %; see
``stabtool.bench.bounds``), and median errors.

Usage::

    python scripts/probe_heldout.py --seeds 0:24
    python scripts/probe_heldout.py --seeds 1,10,11 --verbose --out /tmp/probe
    python scripts/probe_heldout.py --seeds 0:12 --sensors rf --noise pink,drift
    python scripts/probe_heldout.py --seeds 0:24 --start-e=-3:-2.2   # empty corner: absolute labels checked
    python scripts/probe_heldout.py --seeds 0:48 --lockin            # derivative read-out (lines as peaks)
    python scripts/probe_heldout.py --seeds 0:64 --response states   # the sensor averages over charge states
    python scripts/probe_heldout.py --seeds 0:64 --gates-exchanged   # x ↔ y: the slow axis on x, truth mirrored
    python scripts/probe_heldout.py --seeds 0:48 --virtual 0.05      # swept along virtual gates (lines along the axes)
    python scripts/probe_heldout.py --seeds 0:64 --jsonl base.jsonl  # one JSON line per map; then, after a change,
    python scripts/probe_compare.py base.jsonl new.jsonl             # the maps whose verdict or numbers changed

The map factory :func:`make_map` and :func:`evaluate` are importable (for
scratch experiments that patch the analysis).
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import re
import sys
import time
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np

SENSORS = ("lorentz", "gauss", "sech2", "rf")
ALL_SENSORS = SENSORS + ("comb", "transport")
NOISES = ("pink", "walk", "spikes", "drift")
OPT_NOISES = ("telegraph", "hum", "lag", "filter", "stripes", "rowhum", "charge")  # only when asked for by --noise (the default draws stay as they were)
SNRS = (4.0, 8.0, 20.0, 60.0)

# issue bounds of the fitter (same numbers as stabtool.bench.bounds.FITTER_BOUNDS)
VG_CLEAN, VG_NOISY, CLEAN_SNR = 0.005, 0.02, 10.0
CDG_REL, LA_REL, EC_REL = 0.02, 0.05, 0.05


@dataclass
class ProbeMap:
    """One held-out map: data (DataArray), truth (JSON dict) and how it was made."""

    data: Any
    truth: dict
    meta: dict = field(default_factory=dict)


def _device(r: np.random.Generator, mutual_fraction: tuple[float, float] | None = None,
            cross_fraction: tuple[float, float] | None = None, seed: int = 0):
    from stabtool.simulate.device import Device

    cg = r.uniform(2, 30, 2)  # aF
    u = r.uniform(0.05, 0.5, 2)
    if cross_fraction is not None:  # (the default draw stays, so every other draw of the seed is unchanged)
        u = np.random.default_rng([seed, 31]).uniform(*cross_fraction, 2)
    cx = cg[::-1] * u  # M12·M21 = u1·u2: the two families' slopes approach each other as it nears 1
    cm = r.uniform(0.05, 0.4) * min(cg) * 2
    rest = r.uniform(5, 120, 2)
    if mutual_fraction is not None:
        # strongly coupled dots: Cm / C_total of the larger dot (= E_Cm/E_C of the smaller) drawn in range
        f = r.uniform(*mutual_fraction)
        cm = f * float(np.max(cg + cx + rest)) / (1 - f)
    ctot = cg + cx + cm + rest
    return Device(cdg_aF=[[cg[0], cx[0]], [cx[1], cg[1]]], cdd_aF=[[ctot[0], -cm], [-cm, ctot[1]]],
                  gate_names=["GX", "GY"], dot_names=["L", "R"])


def _pink(r: np.random.Generator, shape: tuple[int, int]) -> np.ndarray:
    """Unit-std 2-D noise with a 1/f amplitude spectrum (1/f² power)."""
    ny, nx = shape
    fy = np.fft.fftfreq(ny)[:, None]
    fx = np.fft.rfftfreq(nx)[None, :]
    f = np.hypot(fx, fy)
    f[0, 0] = np.inf
    spec = (r.normal(size=f.shape) + 1j * r.normal(size=f.shape)) / f
    out = np.fft.irfft2(spec, s=shape)
    return out / out.std()


def _transfer(kind: str, d: np.ndarray, phi: float) -> np.ndarray:
    if kind == "lorentz":
        return 1.0 / (1.0 + d**2)
    if kind == "gauss":
        return np.exp(-0.5 * d**2)
    if kind == "sech2":
        return 1.0 / np.cosh(d) ** 2
    if kind == "rf":
        resp = 1.0 / (1.0 - 1j * d)
        return math.cos(phi) * resp.real + math.sin(phi) * resp.imag
    raise ValueError(f"sensor kind {kind!r}: expected one of {ALL_SENSORS}")


def _state_averaged(sig: np.ndarray, read: Any, sm: Any, X: np.ndarray, Y: np.ndarray, sensor: Any) -> np.ndarray:
    """``sig`` with the mixed pixels read state by state: ``Σ_s p_s read(q_s)``."""
    from stabtool.simulate.sensor import SensorModel

    st = sm.states
    w = (sensor or SensorModel()).couplings(2)
    w = w / w.max()
    pix = st.pixels
    ground = sm.truth.charge_state.reshape(-1, 2)[pix].astype(float)
    xv, yv = X.reshape(-1)[pix], Y.reshape(-1)[pix]
    total = np.zeros(pix.size)
    for k in range(st.moves.shape[0]):
        total += st.probability[:, k] * read((ground + st.moves[k]) @ w, xv, yv)
    out = sig.copy()
    out.reshape(-1)[pix] = total
    return out


def make_map(seed: int, *, size: tuple[int, int] = (120, 260), sensors: tuple[str, ...] = SENSORS,
             noise: tuple[str, ...] | None = None, tunnel_coupling_ueV: float = 0.0,
             mutual_fraction: tuple[float, float] | None = None,
             cross_fraction: tuple[float, float] | None = None,
             start_e: tuple[float, float] | None = None,
             coupling_ratio: tuple[float, float] | None = None, lockin: bool = False,
             response: str = "mean", electrons: tuple[float, float] | None = None,
             aspect: tuple[float, float] | None = None,
             temperature: tuple[float, float] | None = None,
             virtual: float | None = None) -> ProbeMap:
    """Build held-out map ``seed`` (deterministic in all arguments).

    Parameters
    ----------
    seed : int
    size : (int, int)
        Range of the pixel count per axis (each axis drawn independently).
    sensors : tuple of str
        Sensor kinds to draw from (see the module docstring).
    noise : tuple of str or None
        Extra noise components (subset of ``pink, walk, spikes, drift``,
        ``telegraph, hum``); None draws each of the first four with probability ½.
    tunnel_coupling_ueV : float
        Interdot tunnel coupling of the rendered truth (0 = none).
    mutual_fraction : (float, float), optional
        Draw ``Cm`` so that ``Cm / C_total`` of the larger dot (``E_Cm/E_C``
        of the smaller one) lies in this range: strongly coupled dots.
    cross_fraction : (float, float), optional
        Draw each gate's coupling to the other dot as this fraction (times the
        ratio of the direct couplings) instead of 0.05–0.5: ``M12·M21`` is the
        product of the two fractions, so 0.5–0.85 gives strong cross-talk with
        the two families' slopes closer together.
    start_e : (float, float), optional
        Draw the induced charge of both dots at the window's low corner in this
        range (default 0.35): below −1 the map shows the empty (0, 0) region
        well below the first lines (few-electron maps).
    coupling_ratio : (float, float), optional
        Draw the ratio of the sensor's coupling to dot 2 over its coupling to
        dot 1 log-uniformly in this range (default 0.65, the generator's): a
        sensor nearer one dot shows that dot's lines strongly and the other
        dot's faintly; near 1 the interdot transition hardly moves the sensor.
    response : {"mean", "states"}
        ``"mean"``: the sensor transfer of the mean charge ``g(q(⟨N⟩))``;
        ``"states"``: the transfer averaged over the charge states,
        ``Σ_s p_s g(q(N_s))`` (a sensor that follows every switch).
    electrons : (float, float), optional
        Draw the number of transitions of each dot across the window in this
        range (default 3.5–6); 10–16 on a 200-pixel axis gives dense maps
        with cells of 12–20 pixels.
    aspect : (float, float), optional
        Draw a factor ``f`` log-uniformly in this range and sweep ``f`` times
        the x span and ``1/f`` times the y span (from the same low corner):
        about ``f²`` times as many dot1 transitions as dot2 ones (default 1,
        a window tuned to show as many of each).
    temperature : (float, float), optional
        Draw the electron temperature (K) uniformly in this range instead
        of 30–250 mK (e.g. 0.3–1 K: hot maps whose lines are several pixels
        broad).
    virtual : float, optional
        Sweep two virtual gates ``VX``, ``VY`` instead of ``GX``, ``GY``: the
        directions of a virtual-gate matrix that is the true one plus an
        error drawn uniformly in ``±virtual`` on each off-diagonal element
        (0: the lines run along the axes). The truth is that of the virtual
        gates (its Cdg off-diagonals are then near minus the mutual
        capacitance times the lever arm, i.e. negative).
    """
    from stabtool.simulate import simulate_map
    from stabtool.simulate.quick import double_dot_window

    r = np.random.default_rng([seed, 7919])
    dev = _device(r, mutual_fraction, cross_fraction, seed)
    n_e = r.uniform(3.5, 6)
    if electrons is not None:  # (the default draw stays, so every other draw of the seed is unchanged)
        n_e = float(np.random.default_rng([seed, 29]).uniform(*electrons))
    e0 = 0.35 if start_e is None else float(np.random.default_rng([seed, 17]).uniform(*start_e))
    x_name, y_name, directions = "GX", "GY", {}
    if virtual is not None:  # (its own draw: every other draw of the seed is unchanged)
        a_ = dev.lever_arm
        m_ = a_ / np.diag(a_)[:, None]
        off = np.random.default_rng([seed, 43]).uniform(-virtual, virtual, 2)
        minv = np.linalg.inv(m_ + np.array([[0.0, off[0]], [off[1], 0.0]]))
        directions = {"x_direction": {"GX": float(minv[0, 0]), "GY": float(minv[1, 0])},
                      "y_direction": {"GX": float(minv[0, 1]), "GY": float(minv[1, 1])}}
        x_name, y_name = "VX", "VY"
        xr_, yr_ = double_dot_window(dev.with_virtual_gates({"VX": directions["x_direction"],
                                                            "VY": directions["y_direction"]}),
                                     x_gate=x_name, y_gate=y_name, electrons=n_e + 0.35 - e0, start_e=e0)
    else:
        xr_, yr_ = double_dot_window(dev, x_gate=x_name, y_gate=y_name, electrons=n_e + 0.35 - e0, start_e=e0)
    if aspect is not None:  # (its own draw: every other draw of the seed is unchanged)
        f = float(np.exp(np.random.default_rng([seed, 37]).uniform(np.log(aspect[0]), np.log(aspect[1]))))
        xr_ = (xr_[0], xr_[0] + f * (xr_[1] - xr_[0]))
        yr_ = (yr_[0], yr_[0] + (yr_[1] - yr_[0]) / f)
    T = float(r.uniform(0.03, 0.25))
    if temperature is not None:  # (its own draw: every other draw of the seed is unchanged)
        T = float(np.random.default_rng([seed, 41]).uniform(*temperature))
    ny, nx = (int(v) for v in r.integers(size[0], size[1] + 1, 2))
    kind = str(r.choice(list(sensors)))
    extras = tuple(n for n in NOISES if r.random() < 0.5) if noise is None else tuple(noise)
    snr = float(r.choice(SNRS))
    phi = float(r.uniform(0, 2 * np.pi))
    readout = "transport" if kind == "transport" else "charge"
    kw: dict[str, Any] = dict(bias_mV=0.02) if kind == "transport" else {}
    if coupling_ratio is not None:
        from stabtool.simulate.sensor import SensorModel

        lo_c, hi_c = np.log(coupling_ratio[0]), np.log(coupling_ratio[1])
        ratio = float(np.exp(np.random.default_rng([seed, 29]).uniform(lo_c, hi_c)))
        kw["sensor"] = SensorModel(coupling_mV=[0.6, 0.6 * ratio])
    if "charge" in extras:
        from stabtool.simulate import Artefacts

        if response == "states":
            raise ValueError("--noise charge with --response states: the state probabilities are those of the "
                             "map without the charge noise")

        # 1/f charge noise on both dots, rms 0.003–0.03 e over the sweep (drawn apart from the map's
        # other draws, so that the rest of the map is the one without it)
        kw["artefacts"] = Artefacts(charge_noise_e=float(np.random.default_rng([seed, 31]).uniform(0.003, 0.03)))
    sm = simulate_map(dev, x_gate=x_name, y_gate=y_name, x_range_V=xr_, y_range_V=yr_, shape=(ny, nx),
                      temperature_K=T, readout=readout, tunnel_coupling_ueV=tunnel_coupling_ueV,
                      rng=seed, **directions, **kw)
    da = sm.data.copy()
    q = np.asarray(da.values, float)
    X, Y = np.meshgrid(np.linspace(0, 1, nx), np.linspace(0, 1, ny))
    if kind == "transport":
        sig = q / max(np.nanpercentile(np.abs(q), 99.9), 1e-300)
        h = 1.0
    else:
        if kind == "comb":
            period = r.uniform(3, 6)
            span = r.uniform(1, 2.5) * period
            ang = r.uniform(0, 2 * np.pi)
            d0, gx, gy = r.uniform(0, period), span * math.cos(ang), span * math.sin(ang)
        else:
            d0, gx, gy = r.uniform(-1.5, 1.5), r.uniform(-2, 2), r.uniform(-2, 2)
        dsign = r.choice([-1, 1])

        def read(qv, xv, yv):
            detune = d0 + gx * xv + gy * yv + dsign * 0.35 * qv
            if kind != "comb":
                return _transfer(kind, detune, phi)
            return sum(1.0 / np.cosh(detune - k * period) ** 2 for k in ks)

        if kind == "comb":
            full = d0 + gx * X + gy * Y + dsign * 0.35 * q
            ks = np.arange(np.floor(full.min() / period) - 1, np.ceil(full.max() / period) + 2)
        sig = read(q, X, Y)
        if response == "states" and sm.states is not None and sm.states.pixels.size:
            sig = _state_averaged(sig, read, sm, X, Y, kw.get("sensor"))
        # step height: median signal change at the x-neighbour charge changes
        dq = np.abs(np.diff(q, axis=1)) > 0.5
        h = float(np.median(np.abs(np.diff(sig, axis=1))[dq])) if dq.any() else 0.1
    if lockin and kind != "transport":
        # a lock-in on the x gate: dS/dx (central difference, modulation ±1 px); the line height is the
        # median largest |derivative| next to the charge changes along x
        sig = np.gradient(sig, axis=1)
        dq = np.abs(np.diff(q, axis=1)) > 0.5
        near = np.maximum(np.abs(sig[:, 1:]), np.abs(sig[:, :-1]))
        h = float(np.median(near[dq])) if dq.any() else 0.1
    sigma = h / snr
    out = sig + r.normal(0, sigma, sig.shape)
    if "pink" in extras:
        out = out + 0.5 * sigma * _pink(r, sig.shape)
    if "walk" in extras:
        out = out + np.cumsum(r.normal(0, 0.3 * sigma, ny))[:, None]
    if "spikes" in extras:
        out = out + (r.random(sig.shape) < 0.001) * r.normal(0, 5 * h, sig.shape)
    if "telegraph" in extras:
        # a charge trap next to the sensor: a two-level offset of 0.3–1 step heights that switches at
        # random moments of the sweep (row-major time), mean dwell 200–5000 points
        t_len = ny * nx
        dwell = r.uniform(200, 5000)
        n_sw = r.poisson(t_len / dwell)
        state = np.zeros(t_len)
        for k in np.sort(r.integers(0, t_len, n_sw)):
            state[k:] = 1 - state[k:]
        out = out + r.uniform(0.3, 1.0) * h * r.choice([-1, 1]) * state.reshape(ny, nx)
    if "hum" in extras:
        # mains pickup: a sinusoid in measurement time, period 6–40 points along the fast axis, amplitude
        # 0.2–0.8 step heights (straight stripes across the map)
        t = np.arange(ny * nx, dtype=float).reshape(ny, nx)
        out = out + r.uniform(0.2, 0.8) * h * np.sin(2 * np.pi * t / r.uniform(6, 40) + r.uniform(0, 2 * np.pi))
    if "stripes" in extras:
        # mains pickup with a wait of 2–50 point times before each row (the gate's return): the tone runs
        # on during the wait, so its phase steps by a fixed amount from row to row (stripes at any angle)
        wait = r.uniform(2, 50)
        t = np.arange(ny)[:, None] * (nx + wait) + np.arange(nx)[None, :]
        out = out + r.uniform(0.2, 0.8) * h * np.sin(2 * np.pi * t / r.uniform(6, 40) + r.uniform(0, 2 * np.pi))
    if "rowhum" in extras:
        # mains pickup on rows started at random moments (software-timed rows): the tone's phase is
        # random from one row to the next
        phase = r.uniform(0, 2 * np.pi, (ny, 1))
        t = np.arange(nx)[None, :]
        out = out + r.uniform(0.2, 0.8) * h * np.sin(2 * np.pi * t / r.uniform(6, 40) + phase)
    if "lag" in extras:
        # a fast serpentine sweep read through a low-pass (an RC filter or a lock-in time constant):
        # rows alternate direction and the one-pole filter of τ = 0.5–3 points lags each row along its
        # own direction, so the lines zig-zag by about ±τ points from row to row
        from scipy.signal import lfilter

        a = math.exp(-1.0 / r.uniform(0.5, 3.0))
        snake = out.copy()
        snake[1::2] = snake[1::2, ::-1]
        flat = lfilter([1 - a], [1, -a], snake.ravel(), zi=[a * snake.flat[0]])[0]
        out = flat.reshape(ny, nx)
        out[1::2] = out[1::2, ::-1].copy()
    if "filter" in extras:
        # an ordinary (row-major, one-direction) sweep read through a one-pole low-pass of 0.5–3 points
        # (a lock-in time constant): every line moves by about τ along x and its x-profile broadens
        from scipy.signal import lfilter

        a = math.exp(-1.0 / r.uniform(0.5, 3.0))
        out = lfilter([1 - a], [1, -a], out, axis=1, zi=a * out[:, :1])[0]
    if "drift" in extras:
        t = (np.arange(ny * nx) / (ny * nx)).reshape(ny, nx)  # measurement time, row-major
        out = (out - np.median(out)) * (1 + r.uniform(-0.3, 0.3) * t + 0.1 * np.sin(2 * np.pi * r.uniform(0.5, 2) * t))
    da.values = out
    da.attrs.pop("stabtool_truth", None)
    sensor = kind + ("+lockin" if lockin and kind != "transport" else "")
    meta = dict(seed=seed, sensor=sensor, noise="+".join(("white",) + extras), snr=snr, T=round(T, 3),
                shape=(ny, nx))
    truth = sm.truth.to_json()
    if virtual is not None and truth.get("device"):
        # the charge-label check reads the capacitances to the two swept gates
        dev_t = dict(truth["device"])
        cols = [list(dev_t["gate_names"]).index(g) for g in (x_name, y_name)]
        dev_t["cdg_aF"] = np.asarray(dev_t["cdg_aF"], float)[:, cols].tolist()
        truth["device"] = dev_t
    return ProbeMap(data=da, truth=truth, meta=meta)


def gates_exchanged(pm: ProbeMap) -> ProbeMap:
    """The same map with its two gates exchanged (x ↔ y, so the slow axis is x), the truth mirrored.

    Mirroring swaps the gates and the dots: M, Cdg and α become P·A·P with
    P = [[0, 1], [1, 0]], the charging energies of dot1 and dot2 swap, and so
    do the device's dots and gates (for the charge labels).
    """
    P = np.array([[0.0, 1.0], [1.0, 0.0]])
    t = dict(pm.truth)
    for key in ("virtual_gate_matrix", "gate_capacitance_aF", "lever_arm"):
        if t.get(key) is not None:
            t[key] = (P @ np.asarray(t[key], float) @ P).tolist()
    if t.get("charging_energy_meV"):
        ec = dict(t["charging_energy_meV"])
        ec["dot1"], ec["dot2"] = ec.get("dot2"), ec.get("dot1")
        t["charging_energy_meV"] = ec
    dev = dict(t.get("device") or {})
    if dev.get("cdg_aF") is not None and np.shape(dev["cdg_aF"]) == (2, 2):
        dev["cdg_aF"] = (P @ np.asarray(dev["cdg_aF"], float) @ P).tolist()
        dev["cdd_aF"] = (P @ np.asarray(dev["cdd_aF"], float) @ P).tolist()
        if dev.get("offset_charge_e") is not None:
            dev["offset_charge_e"] = list(dev["offset_charge_e"])[::-1]
        t["device"] = dev
    else:
        t.pop("device", None)  # (no charge labels checked)
    da = pm.data.transpose(pm.data.dims[1], pm.data.dims[0])
    return ProbeMap(data=da, truth=t, meta=dict(pm.meta))


def _rel(a: Any, b: Any) -> float:
    if a is None or b is None:
        return math.nan
    A, B = np.asarray(a, float), np.asarray(b, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        e = np.abs(A - B) / np.abs(B)
    return float(np.nanmax(e)) if np.any(np.isfinite(e)) else math.nan


def evaluate(result_json: dict, truth: dict, *, snr: float) -> dict:
    """Errors of one result against the truth and the silent-failure verdict.

    Virtual gates: largest absolute off-diagonal error; Cdg, lever arms
    (all elements) and charging energies (E_C1, E_C2, E_Cm): largest
    element-wise relative error. NaN = not reported (never a failure).
    """
    j, t = result_json, truth
    vg = math.nan
    if j.get("virtual_gate_matrix") is not None:
        A, B = np.asarray(j["virtual_gate_matrix"], float), np.asarray(t["virtual_gate_matrix"], float)
        vg = float(max(abs(A[0, 1] - B[0, 1]), abs(A[1, 0] - B[1, 0])))
    cdg = _rel(j.get("gate_capacitance_aF"), t.get("gate_capacitance_aF"))
    la = _rel(j.get("lever_arm"), t.get("lever_arm"))
    ec = math.nan
    if j.get("charging_energy_meV") and t.get("charging_energy_meV"):
        keys = ("dot1", "dot2", "mutual")
        ec = _rel([j["charging_energy_meV"].get(k) for k in keys], [t["charging_energy_meV"].get(k) for k in keys])
    wrong_labels = _wrong_absolute_labels(j, t)
    vg_bound = VG_CLEAN if snr >= CLEAN_SNR else VG_NOISY
    beyond = [name for name, e, b in (("vg", vg, vg_bound), ("cdg", cdg, CDG_REL), ("la", la, LA_REL),
                                      ("ec", ec, EC_REL)) if np.isfinite(e) and e > b]
    ok = bool(j["quality"]["ok"])
    return dict(ok=ok, vg=vg, cdg=cdg, la=la, ec=ec, beyond=beyond, silent=ok and bool(beyond),
                wrong_labels=wrong_labels)


def within_bounds(ev: dict) -> bool:
    """Virtual gates and Cdg reported, and every reported number within the fitter's bounds (an :func:`evaluate`
    result, or a --jsonl record of one)."""
    return not ev["beyond"] and bool(np.isfinite(ev["vg"]) and np.isfinite(ev["cdg"]))


def _wrong_absolute_labels(j: dict, t: dict) -> int:
    """Charge-state regions whose occupation, claimed absolute for a dot, is not the ground state there.

    Ground state: ``argmin_N ½ (e(N − N0) − Cdg V)ᵀ Cdd⁻¹ (e(N − N0) − Cdg V)`` over N ∈ [0, 15]²
    (the conventions' energy with the device's offset charges N0), at each region's centroid.
    """
    cs, dev = j.get("charge_states") or {}, t.get("device") or {}
    absolute = cs.get("absolute") or {}
    claimed = [bool(absolute.get("dot1")), bool(absolute.get("dot2"))]
    if not any(claimed) or not dev:
        return 0
    from stabtool.physics.constants import E_AC

    cdg, cdd = np.asarray(dev["cdg_aF"], float), np.asarray(dev["cdd_aF"], float)
    n0 = np.asarray(dev.get("offset_charge_e") or np.zeros(cdd.shape[0]), float)
    inv = np.linalg.inv(cdd)
    grid = np.array([(a, b) for a in range(16) for b in range(16)], float)
    wrong = 0
    for reg in cs.get("regions") or []:
        d = E_AC * (grid - n0) - cdg @ np.array([reg["x"], reg["y"]])
        n = grid[np.argmin(0.5 * np.einsum("ki,ij,kj->k", d, inv, d))]
        wrong += any(c and reg[key] != int(n[i]) for i, (c, key) in enumerate(zip(claimed, ("n1", "n2"))))
    return wrong


def _fmt(v: float, nd: int = 4) -> str:
    return "  -   " if not np.isfinite(v) else f"{v:.{nd}f}"


def _range(text: str | None) -> tuple[float, float] | None:
    """``'A:B'`` → ``(A, B)``; None stays None."""
    if not text:
        return None
    lo, hi = (float(v) for v in text.split(":"))
    return lo, hi


def blocker_kind(warning: str) -> str:
    """A warning with its numbers blanked (``#``), cut at the first colon or parenthesis, to count alike doubts.

    The detector's warnings keep their ``detector:`` prefix; the cut is made in the rest.
    """
    prefix = "detector: " if warning.startswith("detector: ") else ""
    head = prefix + re.split(r"[:(]", warning[len(prefix):], maxsplit=1)[0]
    return re.sub(r"[-+]?\d+(\.\d+)?(e[-+]?\d+)?", "#", head).strip()


def blocker_census(blockers: list[list[str]]) -> list[tuple[str, tuple[int, int]]]:
    """For maps that were doubtful: each kind of doubt with the number of maps it blocked and of those it blocked alone.

    Most frequent first.
    """
    count: dict[str, list[int]] = {}
    for ws in blockers:
        kinds = {blocker_kind(w) for w in ws}
        for k in kinds:
            c = count.setdefault(k, [0, 0])
            c[0] += 1
            c[1] += len(kinds) == 1
    return sorted(((k, (c[0], c[1])) for k, c in count.items()), key=lambda kv: -kv[1][0])


#: Numbers of the analysis JSON copied into a --jsonl record beside their truth.
RECORD_KEYS = ("virtual_gate_matrix", "gate_capacitance_aF", "addition_voltages_V", "mutual_shifts_V")


def _plain(v: Any) -> Any:
    """JSON form of NumPy scalars and arrays (NaN stays NaN, as Python's json writes it)."""
    return v.tolist() if hasattr(v, "tolist") else str(v)


def _record(ev: dict, j: dict, pm: ProbeMap) -> dict:
    """One --jsonl line: the evaluation of a map, its warnings, and the main numbers with errors and truth."""
    rec = {k: v for k, v in ev.items() if k not in ("pulls_m", "pulls_cdg")}
    rec["warnings"] = list(j["quality"]["warnings"])
    for k in RECORD_KEYS:
        rec[k] = j.get(k)
        rec[k + "_error"] = j.get(k + "_error")
        rec["true_" + k] = pm.truth.get(k)
    return rec


def _parse_seeds(text: str) -> list[int]:
    out: list[int] = []
    for part in text.split(","):
        if ":" in part:
            a, b = part.split(":")
            out.extend(range(int(a), int(b)))
        elif part:
            out.append(int(part))
    return out


def _pulls(j: dict, truth: dict) -> tuple[list[float], list[float]]:
    """(estimate − truth)/stated error of M12, M21 and of the four Cdg elements (finite ones only)."""
    out = []
    for key, idx in (("virtual_gate_matrix", ((0, 1), (1, 0))), ("gate_capacitance_aF", ((0, 0), (0, 1), (1, 0), (1, 1)))):
        val, err, true = j.get(key), j.get(key + "_error"), truth.get(key)
        if val is None or err is None or true is None:
            out.append([])
            continue
        v, e, t = (np.asarray(a, float) for a in (val, err, true))
        with np.errstate(invalid="ignore", divide="ignore"):
            pulls = [(v[i] - t[i]) / e[i] for i in idx]
        out.append([float(q) for q in pulls if np.isfinite(q)])
    return out[0], out[1]


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--seeds", default="0:24", help="seeds: 'A:B' (B excluded) and/or comma list (default 0:24)")
    p.add_argument("--size", default="120:260", help="pixel range per axis 'MIN:MAX' (default 120:260)")
    p.add_argument("--sensors", default=",".join(SENSORS),
                   help=f"sensor kinds to draw from, of {','.join(ALL_SENSORS)} (default: all but transport)")
    p.add_argument("--noise", default=None,
                   help=f"extra noise on every map, subset of {','.join(NOISES + OPT_NOISES)} or 'none' "
                        f"(default: each of {','.join(NOISES)} with p=½)")
    p.add_argument("--tunnel-ueV", type=float, default=0.0, help="interdot tunnel coupling of the truth (µeV)")
    p.add_argument("--mutual", default=None,
                   help="'A:B': draw Cm / C_total of the larger dot in [A, B] (strongly coupled dots)")
    p.add_argument("--cross", default=None,
                   help="'A:B': draw each gate's coupling to the other dot as a fraction in [A, B] (default "
                        "0.05:0.5; M12·M21 is the product), e.g. 0.5:0.85 for strong cross-talk")
    p.add_argument("--start-e", default=None,
                   help="'A:B': induced charge of both dots at the low corner (default 0.35); e.g. --start-e=-3:-2.2 for "
                        "maps with the empty (0,0) region well below the first lines")
    p.add_argument("--coupling", default=None,
                   help="'A:B': draw the sensor's dot-2/dot-1 coupling ratio log-uniformly in [A, B] (default 0.65)")
    p.add_argument("--electrons", default=None,
                   help="'A:B': transitions of each dot across the window (default 3.5:6); e.g. 10:16 for dense maps")
    p.add_argument("--lockin", action="store_true",
                   help="read every sensor through a lock-in on the x gate: the maps are dS/dx (lines as peaks)")
    p.add_argument("--response", default="mean", choices=("mean", "states"),
                   help="sensor response to a fluctuating charge: at the mean charge (default) or averaged over "
                        "the charge states")
    p.add_argument("--aspect", default=None,
                   help="stretch the window: x span × f, y span ÷ f, f log-uniform in 'LO:HI' (e.g. 0.4:2.5)")
    p.add_argument("--temperature", default=None,
                   help="'A:B': electron temperature in K, uniform (default 0.03:0.25); e.g. 0.3:1 for broad lines")
    p.add_argument("--gates-exchanged", action="store_true",
                   help="exchange each map's two gates (x ↔ y: the slow axis on x), the truth mirrored")
    p.add_argument("--virtual", type=float, default=None,
                   help="sweep virtual gates VX, VY made from the true virtual-gate matrix with each off-diagonal "
                        "element off by up to ± this (e.g. 0.05; 0: lines along the axes)")
    p.add_argument("--out", default=None, help="folder for one PNG per map (the analysis plot)")
    p.add_argument("--verbose", action="store_true", help="print every warning of every map")
    p.add_argument("--jsonl", default=None,
                   help="also write one JSON line per map (errors, verdict, blockers, warnings, the matrices "
                        "and their truth) to this file, for scripts/probe_compare.py")
    a = p.parse_args(argv)

    warnings.simplefilter("ignore")
    from stabtool.analysis import Analyzer
    from stabtool.cli.main import _single_threaded_blas

    # one BLAS thread, as `stabtool analyze` runs: the model fit's small matrices gain nothing from
    # threads, and on a busy 2-core machine the threads' waiting took a dense map from 17 s to 70 s
    _single_threaded_blas()

    lo, hi = (int(v) for v in a.size.split(":"))
    sensors = tuple(s for s in a.sensors.split(",") if s)
    bad = [s for s in sensors if s not in ALL_SENSORS]
    if bad:
        p.error(f"--sensors: unknown kind(s) {bad}; expected some of {ALL_SENSORS}")
    noise = None if a.noise is None else tuple(n for n in a.noise.split(",") if n and n != "none")
    if noise and any(n not in NOISES + OPT_NOISES for n in noise):
        p.error(f"--noise: expected some of {NOISES + OPT_NOISES} or 'none', got {a.noise!r}")
    if a.out:
        os.makedirs(a.out, exist_ok=True)
    rows = []
    t_all = time.perf_counter()
    print(f"{'seed':>4} {'sensor':14} {'noise':26} {'snr':>4} {'shape':>9}  ok    vg      cdg     la      ec    "
          f"  t/s  first doubts (warnings that clear ok are marked '!')")
    with open(a.jsonl, "w", encoding="utf-8") if a.jsonl else contextlib.nullcontext() as jsonl:
        for s in _parse_seeds(a.seeds):
            pm = make_map(s, size=(lo, hi), sensors=sensors, noise=noise, tunnel_coupling_ueV=a.tunnel_ueV,
                          mutual_fraction=_range(a.mutual), cross_fraction=_range(a.cross), start_e=_range(a.start_e), coupling_ratio=_range(a.coupling),
                          lockin=a.lockin, response=a.response, electrons=_range(a.electrons),
                          aspect=_range(a.aspect), temperature=_range(a.temperature), virtual=a.virtual)
            if a.gates_exchanged:
                pm = gates_exchanged(pm)
            t0 = time.perf_counter()
            try:
                res = Analyzer(electron_temperature_K=pm.meta["T"])(pm.data)
                j = res.to_json()
            except Exception as exc:  # a crash is an outcome of the probe, not an error of the script
                res, j = None, {"quality": {"ok": False, "warnings": [f"CRASH {type(exc).__name__}: {exc}"]}}
            dt = time.perf_counter() - t0
            ev = evaluate(j, pm.truth, snr=pm.meta["snr"])
            absolute = (j.get("charge_states") or {}).get("absolute") or {}
            ev.update(pm.meta, time=dt, absolute=any(bool(v) for v in absolute.values()))
            ev["crashed"] = res is None
            ev["pulls_m"], ev["pulls_cdg"] = _pulls(j, pm.truth)
            rows.append(ev)
            ws = list(j["quality"]["warnings"])
            ev["blockers"] = []
            if res is not None:
                # what blocks ok first (marked "!"), then the notes
                first, flags = res.quality.doubts_first_flagged()
                if flags is not None:
                    ws = [("! " if f else "") + w for w, f in zip(first, flags)]
                    ev["blockers"] = [w for w, f in zip(first, flags) if f]
            if jsonl is not None:
                jsonl.write(json.dumps(_record(ev, j, pm), default=_plain) + "\n")
                jsonl.flush()
            doubt = ws if a.verbose else [w for w in ws if w.startswith("! ")][:2]
            m = pm.meta
            tag = " SILENT-FAIL(" + ",".join(ev["beyond"]) + ")" if ev["silent"] else ""
            worst = [max(np.abs(ev[k]), default=np.nan) for k in ("pulls_m", "pulls_cdg")]
            pulls = f"  [worst |pull| M {worst[0]:.1f}, Cdg {worst[1]:.1f}]" if np.isfinite(worst).any() else ""
            if ev["wrong_labels"]:
                tag += f" WRONG-ABSOLUTE-LABELS({ev['wrong_labels']} regions)"
            print(f"{s:4d} {m['sensor']:14} {m['noise']:26} {m['snr']:4.0f} {m['shape'][0]:4d}x{m['shape'][1]:<4d} "
                  f"{'OK ' if ev['ok'] else 'no '} {_fmt(ev['vg'])} {_fmt(ev['cdg'])} {_fmt(ev['la'])} {_fmt(ev['ec'])} "
                  f"{dt:5.1f}{tag}  | " + ("\n      - ".join([""] + doubt) if a.verbose else "; ".join(w[:60] for w in doubt)) + pulls,
                  flush=True)
            if a.out and res is not None:
                try:
                    res.save_plot(os.path.join(a.out, f"probe_{s:03d}.png"))
                except Exception as exc:
                    print(f"      (plot failed: {type(exc).__name__}: {exc})")
    n = len(rows)
    if not n:
        return 0
    n_ok = sum(r["ok"] for r in rows)
    n_silent = sum(r["silent"] for r in rows)

    def med(key: str, subset: list[dict]) -> str:
        v = np.array([r[key] for r in subset], float)
        v = v[np.isfinite(v)]
        return f"{np.median(v):.4g} (n={v.size})" if v.size else "-"

    print(f"\nmaps {n}: coverage (ok) {n_ok}/{n} = {n_ok / n:.2f}; silent failures {n_silent}/{n} "
          f"({', '.join(str(r['seed']) for r in rows if r['silent']) or 'none'}); "
          f"median analysis time {np.median([r['time'] for r in rows]):.2f} s, total {time.perf_counter() - t_all:.0f} s")
    for label, sub in (("all", rows), ("ok", [r for r in rows if r["ok"]])):
        print(f"median errors [{label}]: vg {med('vg', sub)}, cdg {med('cdg', sub)}, la {med('la', sub)}, "
              f"ec {med('ec', sub)}")
    within = [r for r in rows if within_bounds(r)]
    print(f"maps whose reported vg and Cdg are within the bounds: {len(within)}/{n} "
          f"(of which ok: {sum(r['ok'] for r in within)})")
    census = blocker_census([r["blockers"] for r in within if not r["ok"]])
    if census:
        print("what keeps those within the bounds from ok (maps; alone = the only doubt):")
        for kind, (count, alone) in census:
            print(f"  {count:4d} ({alone} alone)  {kind}")
    for key, name in (("pulls_m", "virtual-gate off-diagonals"), ("pulls_cdg", "Cdg elements")):
        for label, sub in (("all", rows), ("ok", [r for r in rows if r["ok"]])):
            p_ = np.concatenate([np.asarray(r[key], float) for r in sub] + [np.zeros(0)])
            if p_.size:
                print(f"stated errors, {name} [{label}]: (estimate − truth)/σ median |p| {np.median(np.abs(p_)):.2f}, "
                      f"rms {np.sqrt(np.mean(p_**2)):.2f}, |p| > 3 on {np.sum(np.abs(p_) > 3)}/{p_.size}")
    n_abs = sum(1 for r in rows if r["absolute"])
    bad = [str(r["seed"]) for r in rows if r["wrong_labels"]]
    print(f"absolute charge states claimed on {n_abs}/{n} maps; wrong on {len(bad)} ({', '.join(bad) or 'none'})")
    crashed = [str(r["seed"]) for r in rows if r["crashed"]]
    print(f"analyses that raised an exception: {len(crashed)} ({', '.join(crashed) or 'none'})")
    for k in ALL_SENSORS:
        sub = [r for r in rows if r["sensor"] == k]
        if sub:
            print(f"  sensor {k:9}: {len(sub):3d} maps, ok {sum(r['ok'] for r in sub)}, silent {sum(r['silent'] for r in sub)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
