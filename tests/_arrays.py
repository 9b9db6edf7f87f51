"""Fixtures for the dot-array tests: generator arrays with a charge-sensor dot.

The presets ``linear-array-4`` / ``linear-array-8`` hold the array dots and
their plungers only. The tests add the charge sensor as one more dot ``S``
with its own plunger ``SG`` (the sensor's Coulomb-peak condition μ_S = 0 is
that dot's transition line), weakly coupled to the plungers near it, so the
virtual sensor gate (sensor compensation) is part of the truth
``α = Cdd⁻¹ Cdg`` normalised per row by the plunger element.
"""

from __future__ import annotations

import numpy as np

from stabtool.arrays import ArrayDescription, PairMeasurement
from stabtool.physics.ci import lever_arm_matrix, virtual_gate_matrix
from stabtool.physics.constants import E_AC
from stabtool.simulate import Device, SensorModel, presets

#: Lever arm of the sensor dot to its own gate (about), eV/V, and its charging energy (about), meV
#: (invented, inside the Si/SiGe ranges of the references file).
SENSOR_ALPHA = 0.08
SENSOR_EC_MEV = 3.0


def array_with_sensor(n: int) -> Device:
    """Preset ``linear-array-<n>`` plus a sensor dot S (plunger SG) beside the two middle dots.

    Capacitances added to the preset (aF, invented): sensor total capacitance
    e/(3 mV) ≈ 53 aF with 8 % of it to SG (sensor lever arm ≈ 0.08); sensor
    to the plungers 0.22 × C_S,SG next to it, ×0.45 per further dot; the dots
    to SG 5 % of their plunger capacitance next to the sensor, ×0.4 per
    further dot; sensor–dot mutual capacitance 2 aF next to it, ×0.3 per
    further dot. The dots' total capacitances grow by what is added.
    """
    base = presets.get(f"linear-array-{n}")
    cdg0, cdd0 = base.cdg, base.cdd
    site = n / 2 - 0.5  # between the two middle dots
    dist = np.abs(np.arange(n) - site) - 0.5  # 0 for the two nearest dots
    c_s = E_AC / SENSOR_EC_MEV * 1e3  # aF
    c_s_sg = SENSOR_ALPHA * c_s
    dots_sg = 0.05 * np.diag(cdg0) * 0.4**dist
    mutual = 2.0 * 0.3**dist
    cdg = np.zeros((n + 1, n + 1))
    cdg[:n, :n] = cdg0
    cdg[:n, n] = dots_sg
    cdg[n, :n] = 0.22 * c_s_sg * 0.45**dist
    cdg[n, n] = c_s_sg
    cdd = np.zeros((n + 1, n + 1))
    cdd[:n, :n] = cdd0 + np.diag(dots_sg + mutual)
    cdd[:n, n] = cdd[n, :n] = -mutual
    cdd[n, n] = c_s
    offsets = np.append(np.asarray(base.offset_charge_e), 0.3)
    return Device(
        cdg_aF=cdg,
        cdd_aF=cdd,
        gate_names=tuple(base.gate_names) + ("SG",),
        dot_names=tuple(base.dot_names) + ("S",),
        offset_charge_e=offsets,
        name=f"{base.name}+sensor",
        description=base.description + "; plus an invented sensor dot S on gate SG",
    )


#: Peak shift of the charge sensor per electron on the nearest dots, mV, and its decay per dot of
#: distance (invented; inside the 0.1–1 FWHM range quoted in stabtool.simulate.SensorModel).
SENSOR_SHIFT_MV = 0.6
SENSOR_SHIFT_DECAY = 0.65


def sensor_model(dev: Device, *, every: int = 4) -> SensorModel:
    """Charge read-out whose peak shift per electron falls with the distance to the nearest sensor.

    Arrays are built with a charge sensor per few dots (common practice, no
    source): here one beside each group of ``every`` dots, between its two
    middle dots — for 4 dots that is the sensor dot S itself; for 8 dots S
    (modelled as a dot, between dots 4 and 5) plus two read-out sensors
    between dots 2–3 and 6–7 that are not modelled as dots. The dots nearest
    a sensor and S shift the read-out peak by ``SENSOR_SHIFT_MV``, every
    further dot by ``× SENSOR_SHIFT_DECAY``. (The generator's default indexes
    the shift by dot number, which would make S, the last dot, invisible.)
    """
    n = dev.n_dots - 1
    sites = [n / 2 - 0.5] + [k + every / 2 - 0.5 for k in range(0, n, every)]
    dist = np.min([np.abs(np.arange(n) - s) for s in sites], axis=0) - 0.5
    shift = np.append(SENSOR_SHIFT_MV * SENSOR_SHIFT_DECAY**dist, SENSOR_SHIFT_MV)
    return SensorModel(coupling_mV=tuple(float(v) for v in shift))


def truth_matrix(dev: Device) -> np.ndarray:
    """``α = Cdd⁻¹ Cdg`` (stabtool.physics.lever_arm_matrix) normalised per row by the plunger."""
    return virtual_gate_matrix(lever_arm_matrix(dev.cdg, dev.cdd))


def centre_voltages(dev: Device, n_electrons: int = 2) -> np.ndarray:
    """Gate voltages where every dot's induced charge is exactly ``n_electrons``.

    There ``U(N) = ½ (N − n₀)ᵀ E_C (N − n₀)`` is 0 for ``N = n₀`` and every
    other state costs at least ~E_C/2: the middle of that charge state's cell.
    Needs as many gates as dots (square Cdg).
    """
    target = np.full(dev.n_dots, float(n_electrons)) - dev.offsets
    return np.linalg.solve(dev.cdg / E_AC, target)


def noisy_pairs(dev: Device, pairs: list[tuple[str, str]], *, sigma: float, rng: np.random.Generator,
                ) -> list[PairMeasurement]:
    """Pairwise results from the truth plus Gaussian noise on the slopes.

    Each map (x, y) reports the slopes of the lines of the dot whose plunger
    is x (dot1) and y (dot2), ``s1 = −α_1x/α_1y``, ``s2 = −α_2x/α_2y``, with
    slope errors chosen so that each matrix element has standard error
    ``sigma`` (σ_s1 = σ·s1², σ_s2 = σ) and slopes drawn with those errors.
    """
    alpha = lever_arm_matrix(dev.cdg, dev.cdd)
    gate = {g: k for k, g in enumerate(dev.gate_names)}
    out = []
    for x, y in pairs:
        d1, d2 = gate[x], gate[y]  # the dot whose plunger is gate k is dot k here
        s1 = -alpha[d1, gate[x]] / alpha[d1, gate[y]]
        s2 = -alpha[d2, gate[x]] / alpha[d2, gate[y]]
        e1, e2 = sigma * s1**2, sigma
        out.append(PairMeasurement.from_slopes(
            x, y,
            dot1_slope=s1 + rng.normal(0.0, e1), dot1_slope_err=e1,
            dot2_slope=s2 + rng.normal(0.0, e2), dot2_slope_err=e2,
            source=f"{x}-{y}",
        ))
    return out


def array_description(dev: Device) -> ArrayDescription:
    """The planning description of a generator array: plungers in a row, the sensor gate SG
    above the middle, operating point at two electrons per dot, addition voltages E_C/α."""
    names = list(dev.gate_names)
    n = len(names) - 1
    pos = {g: (float(k), 0.0) for k, g in enumerate(names[:-1])}
    pos["SG"] = (n / 2 - 0.5, 0.8)
    return ArrayDescription(
        plungers=tuple(names[:-1]), sensors=("SG",),
        operating_point_V=dict(zip(names, map(float, centre_voltages(dev, 2)))),
        addition_voltage_V={g: float(dev.ec_eV[k, k] / dev.lever_arm[k, k]) for k, g in enumerate(names)},
        positions=pos)
