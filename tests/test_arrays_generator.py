"""The assembled matrix on generator arrays (4 and 8 dots plus a sensor dot).

Truth: ``α = Cdd⁻¹ Cdg`` of the generator device (stabtool.physics.lever_arm_matrix),
normalised per row by the plunger element (conventions file; Hensgens et al.,
Nature 548, 70 (2017)). Pairwise results here are the truth plus realistic
noise (element errors of 0.003, the analysis target for clean maps being 0.005);
the full pipeline on simulated maps is tested in test_arrays_pipeline.py.

The charge states along a virtual sweep come from the generator's exact
ground state (stabtool.simulate.ground_state), independent of this module.
"""

from __future__ import annotations

import numpy as np
import pytest
from _arrays import array_with_sensor, centre_voltages, noisy_pairs, truth_matrix

from stabtool.arrays import assemble_virtual_gates, virtual_sweep
from stabtool.simulate import ground_state
from stabtool.simulate.ground_state import ci_energy, induced_charge

SIGMA = 0.003  # standard error of one element from one map


def _all_pairs(dev, *, both_orientations: bool = True) -> list[tuple[str, str]]:
    g = list(dev.gate_names)
    pairs = [(a, b) for i, a in enumerate(g) for b in g[i + 1:]]
    if both_orientations:
        pairs += [(b, a) for a, b in pairs]
    return pairs


def _assembled(n: int, seed: int):
    dev = array_with_sensor(n)
    rng = np.random.default_rng(seed)
    maps = noisy_pairs(dev, _all_pairs(dev), sigma=SIGMA, rng=rng)
    plungers = [g for g in dev.gate_names if g != "SG"]
    return dev, assemble_virtual_gates(maps, plungers=plungers, sensors=["SG"])


@pytest.mark.regression
@pytest.mark.parametrize("n", [4, 8])
def test_matrix_matches_generator_truth(n: int) -> None:
    dev, vgm = _assembled(n, seed=n)
    truth = truth_matrix(dev)
    assert vgm.gates == tuple(dev.gate_names) and vgm.plungers == tuple(dev.gate_names)
    assert vgm.matrix.shape == (n + 1, n + 1)
    # every element within 0.01 of the truth (issue's acceptance bound)
    np.testing.assert_allclose(vgm.matrix, truth, rtol=0, atol=0.01)
    # the stated uncertainties describe the actual errors: two maps per element, σ/√2 each
    # (to first order; σ_s/s² is evaluated at the noisy slope)
    off = ~np.eye(n + 1, dtype=bool)
    strong = off & (truth > 0.1)  # where σ_s/s² is a good first-order error
    np.testing.assert_allclose(vgm.uncertainty_internal[strong], SIGMA / np.sqrt(2), rtol=0.1)
    pulls = (vgm.matrix - truth)[off] / vgm.uncertainty[off]
    assert np.all(np.abs(pulls) < 4.5)
    assert 0.5 < np.std(pulls) < 1.5
    assert 0.6 < vgm.overall_birge_ratio < 1.4
    assert vgm.quality.ok, vgm.quality.warnings
    # sensor compensation: the SG step per volt on each plunger is −M[S, g]
    comp = vgm.sensor_compensation("SG")
    for j, g in enumerate(dev.gate_names[:-1]):
        assert comp[g][0] == pytest.approx(-truth[n, j], abs=0.01)


@pytest.mark.regression
def test_nearest_neighbour_maps_only_leave_far_elements_flagged() -> None:
    """With only neighbour and sensor maps, the far couplings (truth 0.04–0.1) are unmeasured:
    they are 0, NaN-uncertain, named, and the result is not ok."""
    dev = array_with_sensor(4)
    g = dev.gate_names
    pairs = [(g[i], g[i + 1]) for i in range(3)] + [(p, "SG") for p in g[:4]]
    maps = noisy_pairs(dev, pairs, sigma=SIGMA, rng=np.random.default_rng(3))
    vgm = assemble_virtual_gates(maps, plungers=g[:4], sensors=["SG"])
    assert ("P1", "P3") in vgm.unmeasured and ("P1", "P4") in vgm.unmeasured
    assert vgm.element("P1", "P3") == 0.0 and np.isnan(vgm.uncertainty[0, 2])
    assert truth_matrix(dev)[0, 2] > 0.05  # the flag matters: truth is far from 0
    assert not vgm.quality.ok


def _potentials(dev, volts: np.ndarray, states: np.ndarray) -> np.ndarray:
    """Electrochemical potentials μ_i = U(N) − U(N − ê_i) (eV) from the generator's energy function."""
    n0 = induced_charge(dev.cdg, volts, dev.offsets)
    ec = dev.ec_eV
    u = ci_energy(states, n0, ec)
    eye = np.eye(dev.n_dots, dtype=states.dtype)
    return np.stack([u - ci_energy(states - eye[i], n0, ec) for i in range(dev.n_dots)], axis=-1)


def _max_drift_within_plateaus(mu: np.ndarray, states: np.ndarray) -> np.ndarray:
    """Per dot, the largest change of μ over a run of points with the same charge state (eV)."""
    change = np.nonzero(np.any(np.diff(states, axis=0) != 0, axis=1))[0] + 1
    worst = np.zeros(mu.shape[1])
    for run in np.split(np.arange(states.shape[0]), change):
        if run.size > 1:
            worst = np.maximum(worst, mu[run].max(axis=0) - mu[run].min(axis=0))
    return worst


@pytest.mark.regression
@pytest.mark.parametrize("n", [4, pytest.param(8, marks=pytest.mark.slow)])  # 9-dot ground state: ~25 s
def test_virtual_plunger_sweep_moves_only_its_own_dot(n: int) -> None:
    """Along a sweep of one virtual plunger, every other dot's potential (hence its lines) stays
    put between charge transitions; only the swept dot's potential moves and its charge grows.
    The other dots (and the sensor dot) keep their charge: they only feel the mutual charging
    energy of the electrons added to the swept dot."""
    dev, vgm = _assembled(n, seed=10 + n)
    k = n // 2 - 1  # a middle dot, next to the sensor
    alpha = dev.lever_arm
    e_c = dev.ec_eV
    v_add = e_c[k, k] / alpha[k, k]  # addition voltage in virtual volts: μ_k moves by α_kk per virtual volt
    offsets = np.linspace(-1.6 * v_add, 1.6 * v_add, 321)
    v0 = centre_voltages(dev, 2)
    origin = dict(zip(dev.gate_names, v0))

    sw = virtual_sweep(vgm, x=(f"vP{k + 1}", offsets), origin=origin)
    volts = sw.physical.values
    # as a one-row map: the generator then certifies the ground state at the run ends only
    states = ground_state(dev.cdg, dev.cdd, volts[None], offsets_e=dev.offsets)[0]
    own = states[:, k]
    assert np.all(np.diff(own) >= 0) and own[-1] - own[0] >= 3  # its own dot fills up
    others = np.delete(states, k, axis=1)
    np.testing.assert_array_equal(others, np.full_like(others, 2))
    drift = _max_drift_within_plateaus(_potentials(dev, volts, states), states)
    # own potential sweeps ~ one addition energy per plateau; the others move < 1 % of E_C
    assert drift[k] > 0.5 * e_c[k, k]
    assert np.all(np.delete(drift, k) < 0.01 * np.delete(np.diag(e_c), k))

    # control: sweeping the physical plunger alone drags the neighbours' potentials along
    phys = v0[None, :] + offsets[:, None] * np.eye(n + 1)[k][None, :]
    plain = ground_state(dev.cdg, dev.cdd, phys[None], offsets_e=dev.offsets)[0]
    drift_plain = _max_drift_within_plateaus(_potentials(dev, phys, plain), plain)
    assert drift_plain[k - 1] > 0.1 * e_c[k - 1, k - 1] and drift_plain[k + 1] > 0.1 * e_c[k + 1, k + 1]


def _line_spread(moving: np.ndarray, other: np.ndarray) -> int:
    """Largest spread, in columns, of the transitions of ``moving`` along each row at a fixed
    charge of ``other`` (interdot transitions, where both change, are left out), grouped by the
    charge states on both sides: 0–1 for vertical lines."""
    cols: dict[tuple[int, int, int], list[int]] = {}
    for iy in range(moving.shape[0]):
        for c in np.nonzero(np.diff(moving[iy]))[0]:
            if other[iy, c] != other[iy, c + 1]:
                continue
            key = (moving[iy, c], moving[iy, c + 1], other[iy, c])
            cols.setdefault(key, []).append(int(c))
    return max((max(v) - min(v) for v in cols.values()), default=0)


@pytest.mark.regression
def test_virtual_two_d_sweep_has_vertical_and_horizontal_lines() -> None:
    """In a (vP2, vP3) sweep the dot-2 lines are vertical and the dot-3 lines horizontal (apart
    from the jogs where the other dot's charge changes): every dot-2 transition between the same
    charge states sits in the same column to within one pixel, and likewise for dot 3 in rows."""
    dev, vgm = _assembled(4, seed=21)
    alpha, e_c = dev.lever_arm, dev.ec_eV
    v2, v3 = e_c[1, 1] / alpha[1, 1], e_c[2, 2] / alpha[2, 2]
    xs, ys = np.linspace(-1.6 * v2, 1.6 * v2, 81), np.linspace(-1.6 * v3, 1.6 * v3, 81)
    v0 = centre_voltages(dev, 2)
    origin = dict(zip(dev.gate_names, v0))
    sw = virtual_sweep(vgm, x=("vP2", xs), y=("vP3", ys), origin=origin)
    st = ground_state(dev.cdg, dev.cdd, sw.physical.values, offsets_e=dev.offsets)
    n2, n3 = st[..., 1], st[..., 2]
    assert len(np.unique(n2)) >= 3 and len(np.unique(n3)) >= 3
    for j in (0, 3, 4):  # dots 1, 4 and the sensor dot never change
        assert np.all(st[..., j] == 2)
    assert _line_spread(n2, n3) <= 1
    assert _line_spread(n3.T, n2.T) <= 1

    # control: the same window on the physical gates P2, P3 has tilted lines
    gx, gy = np.meshgrid(xs, ys)
    phys = np.broadcast_to(v0, gx.shape + (5,)).copy()
    phys[..., 1] += gx
    phys[..., 2] += gy
    pst = ground_state(dev.cdg, dev.cdd, phys, offsets_e=dev.offsets)
    assert _line_spread(pst[..., 1], pst[..., 2]) > 5
