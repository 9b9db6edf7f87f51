"""Specification of the triple-point lattice fit of transport maps.

Physics: constant-interaction model, W. G. van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003),
doi:10.1103/RevModPhys.75.1 — a translation that adds one electron to dot i changes the induced
charge ``Cdg·V/e`` by the unit vector ê_i, hence ``Cdg = e [A B]⁻¹``; the electron → hole
triple-point vector ``p`` satisfies ``α p = (E_Cm/e)(1, 1)ᵀ``. The conventions' identity
``Cdg = e · [[ΔV1, δ1], [δ2, ΔV2]]⁻¹ · M`` is the independent check of the lattice formulas.
"""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr
from scipy import constants

from stabtool.errors import InputError
from stabtool.fit.transport_lattice import (
    find_transport_spots,
    fit_lattice_points,
    fit_transport_lattice,
)
from stabtool.physics import ci
from stabtool.physics.triple_points import (
    cdg_from_lattice,
    charging_ratios_from_pair,
    diagram_from_pair,
    lattice_from_cdg,
    pair_coordinates,
    pair_vector,
)
from stabtool.simulate import presets, simulate_map
from stabtool.simulate.artefacts import Artefacts
from stabtool.simulate.quick import double_dot_window

E_AC = constants.e * 1e18  # elementary charge in aC (scipy.constants)

# a double dot built from capacitances (aF), cross-capacitances 15 % / 10 %, mutual 6 aF
CDG = np.array([[4.0, 0.6], [0.35, 3.5]])
CDD = np.array([[30.0, -6.0], [-6.0, 28.0]])


def _alpha_ec(cdg: np.ndarray, cdd: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return np.linalg.solve(cdd, cdg), E_AC * np.linalg.inv(cdd)  # α (eV/V), E_C (eV)


# ----------------------------------------------------------------------------- formulas
def test_lattice_translations_add_one_electron_each():
    # van der Wiel et al. (2003): induced charge Cdg·V/e; A adds (1, 0), B adds (0, 1)
    a, b = lattice_from_cdg(CDG)
    np.testing.assert_allclose(CDG @ a / E_AC, [1.0, 0.0], atol=1e-12)
    np.testing.assert_allclose(CDG @ b / E_AC, [0.0, 1.0], atol=1e-12)
    np.testing.assert_allclose(cdg_from_lattice(a, b), CDG, rtol=1e-12)


def test_cdg_from_lattice_agrees_with_the_conventions_identity():
    # conventions: Cdg = e · D⁻¹ · M with D = [[ΔV1, δ1], [δ2, ΔV2]], from the CI formulas in physics.ci
    alpha, ec = _alpha_ec(CDG, CDD)
    ec_meV = 1e3 * ec
    m = ci.virtual_gate_matrix(alpha)
    dv = ci.addition_voltages(ec_meV, alpha)
    dm = ci.mutual_shifts(ec_meV, alpha)
    a, b = lattice_from_cdg(CDG)
    np.testing.assert_allclose(cdg_from_lattice(a, b), ci.cdg_from_diagram(dv, dm, m), rtol=1e-12)


def test_pair_vector_balances_both_electrochemical_potentials():
    # van der Wiel et al. (2003): from the electron to the hole triple point μ1 and μ2 both rise by E_Cm
    alpha, ec = _alpha_ec(CDG, CDD)
    p = pair_vector(CDG, CDD)
    np.testing.assert_allclose(alpha @ p, ec[0, 1] * np.ones(2), rtol=1e-12)
    a, b = lattice_from_cdg(CDG)
    np.testing.assert_allclose(np.linalg.solve(np.column_stack([a, b]), p), pair_coordinates(ec), rtol=1e-12)


def test_charging_ratios_invert_the_pair_coordinates():
    _, ec = _alpha_ec(CDG, CDD)
    x, y = charging_ratios_from_pair(pair_coordinates(ec))
    np.testing.assert_allclose([x, y], [ec[0, 0] / ec[0, 1], ec[1, 1] / ec[0, 1]], rtol=1e-12)
    # outside the honeycomb (E_Cm ≥ E_C) there is no solution
    assert all(np.isnan(charging_ratios_from_pair([0.6, 0.5])))
    assert all(np.isnan(charging_ratios_from_pair([-0.1, 0.2])))


def test_diagram_from_pair_matches_the_ci_formulas():
    alpha, ec = _alpha_ec(CDG, CDD)
    d = diagram_from_pair(CDG, pair_coordinates(ec))
    np.testing.assert_allclose(d.vg_matrix, ci.virtual_gate_matrix(alpha), rtol=1e-12)
    np.testing.assert_allclose(d.addition_V, ci.addition_voltages(1e3 * ec, alpha), rtol=1e-12)
    np.testing.assert_allclose(d.mutual_V, ci.mutual_shifts(1e3 * ec, alpha), rtol=1e-12)


# ----------------------------------------------------------------------------- exact point sets
def _grid(cdg: np.ndarray, n: int = 5, origin=(0.013, -0.021)) -> np.ndarray:
    a, b = lattice_from_cdg(cdg)
    nm = np.array([(i, j) for i in range(n) for j in range(n)], float)
    return np.asarray(origin) + nm @ np.array([a, b])


def test_exact_lattice_recovered():
    pts = _grid(CDG)
    np.random.default_rng(0).shuffle(pts)
    r = fit_lattice_points(pts)
    np.testing.assert_allclose(r.cdg_aF, CDG, rtol=1e-9)
    assert r.quality.ok, r.quality.warnings
    assert not r.pair_resolved and r.vg_matrix is None
    assert r.n_cells == 25


def test_exact_pairs_recover_virtual_gates():
    pts = _grid(CDG)
    p = pair_vector(CDG, CDD)
    both = np.vstack([pts, pts + p])
    np.random.default_rng(1).shuffle(both)
    r = fit_lattice_points(both)
    alpha, ec = _alpha_ec(CDG, CDD)
    assert r.pair_resolved
    np.testing.assert_allclose(r.cdg_aF, CDG, rtol=1e-9)
    np.testing.assert_allclose(r.pair_V, p, rtol=1e-9)
    np.testing.assert_allclose(r.vg_matrix, ci.virtual_gate_matrix(alpha), rtol=1e-9)
    np.testing.assert_allclose(r.addition_V, ci.addition_voltages(1e3 * ec, alpha), rtol=1e-9)
    np.testing.assert_allclose(r.mutual_V, ci.mutual_shifts(1e3 * ec, alpha), rtol=1e-9)
    assert r.quality.ok and r.pair_quality.ok, r.quality.warnings


def test_stray_spots_are_outliers():
    pts = _grid(CDG)
    rng = np.random.default_rng(2)
    lo, hi = pts.min(axis=0), pts.max(axis=0)
    stray = lo + (hi - lo) * rng.random((6, 2))
    r = fit_lattice_points(np.vstack([pts, stray]))
    np.testing.assert_allclose(r.cdg_aF, CDG, rtol=1e-9)
    assert r.n_outliers <= 6 and len(r.points_V) >= 25


def test_dot_order_follows_the_steeper_lines():
    # swapping the gates swaps dot1 and dot2 (conventions: dot1 = the steeper lines)
    pts = _grid(CDG)[:, ::-1]
    r = fit_lattice_points(pts)
    np.testing.assert_allclose(r.cdg_aF, CDG[::-1, ::-1], rtol=1e-9)


def test_ambiguous_basis_is_doubtful():
    # cross-capacitance ratios 0.3 (a linear-array preset): several bases have each gate coupled more to
    # its own dot; the lattice alone cannot tell the dots apart
    cdg = np.array([[3.58, 1.10], [1.16, 3.88]])
    r = fit_lattice_points(_grid(cdg))
    assert not r.quality.ok
    assert any("ambiguous" in w for w in r.quality.warnings)


def test_a_known_lever_arm_matrix_fixes_the_dot_assignment():
    # Cdd = Cdg α⁻¹ is symmetric only in the physical basis (another basis gives U·Cdd, U unimodular)
    cdg = np.array([[3.58, 1.10], [1.16, 3.88]])
    cdd = np.array([[32.0, -6.0], [-6.0, 33.0]])
    alpha = np.linalg.solve(cdd, cdg)
    r = fit_lattice_points(_grid(cdg), lever_arm=alpha * 1.03)  # a 3 % scale error does not matter
    np.testing.assert_allclose(r.cdg_aF, cdg, rtol=1e-9)
    assert r.quality.ok, r.quality.warnings
    with pytest.raises(InputError, match="lever_arm"):
        fit_lattice_points(_grid(cdg), lever_arm=np.zeros((2, 2)))


def test_too_few_points_fail_or_doubtful():
    r = fit_lattice_points(_grid(CDG, n=5)[:3])
    assert not r and not r.quality.ok
    assert "at least 4" in r.quality.warnings[0]
    r = fit_lattice_points(_grid(CDG, n=2))  # 4 points, 4 cells, no degrees of freedom to spare
    assert not r.quality.ok


# ----------------------------------------------------------------------------- input errors
def test_bad_input_raises_input_error():
    with pytest.raises(InputError, match="2-D"):
        fit_transport_lattice(xr.DataArray(np.zeros(10), dims=["x"]))
    da = xr.DataArray(np.zeros((10, 10)), dims=["y", "x"], coords={"y": np.arange(10.0),
                                                                   "x": np.r_[0.0, 2.0, 1.0, 3:10]})
    with pytest.raises(InputError, match="monotonic"):
        fit_transport_lattice(da, source="run3.nc")
    ok = xr.DataArray(np.zeros((10, 10)), dims=["y", "x"], coords={"y": np.arange(10.0), "x": np.arange(10.0)})
    with pytest.raises(InputError, match="threshold_sigmas"):
        find_transport_spots(ok, threshold_sigmas=0)


def test_empty_map_gives_a_failed_result():
    da = xr.DataArray(np.random.default_rng(0).normal(size=(40, 40)), dims=["y", "x"],
                      coords={"y": np.linspace(0, 0.1, 40), "x": np.linspace(0, 0.1, 40)})
    r = fit_transport_lattice(da)
    assert not r and not r.quality.ok


# ----------------------------------------------------------------------------- generator maps
def _transport(preset: str, *, shape=(200, 200), bias_mV=0.02, snr=20.0, electrons=6.0, decreasing=False,
               directions=None, temperature_K=None, rng=0):
    dev = presets.get(preset)
    info = presets.info(preset)
    xr_, yr_ = double_dot_window(dev, x_gate=info.x_gate, y_gate=info.y_gate, electrons=electrons)
    kw: dict = {}
    xg, yg = info.x_gate, info.y_gate
    if directions is not None:
        kw = {"x_direction": directions[0], "y_direction": directions[1]}
        xg, yg = "VX", "VY"
    return simulate_map(dev, x_gate=xg, y_gate=yg, x_range_V=xr_, y_range_V=yr_, shape=shape,
                        temperature_K=info.temperature_K if temperature_K is None else temperature_K,
                        readout="transport", bias_mV=bias_mV,
                        artefacts=Artefacts(snr=snr, decreasing_x=decreasing, decreasing_y=decreasing), rng=rng, **kw)


def _check_cdg(sm, r, *, rel=0.02, sigmas=3.0):
    truth = np.array(sm.truth.to_json()["gate_capacitance_aF"])
    assert r, r.quality.warnings
    np.testing.assert_allclose(r.cdg_aF, truth, rtol=rel)
    assert np.all(np.abs(r.cdg_aF - truth) <= sigmas * r.cdg_aF_error), (r.cdg_aF, truth, r.cdg_aF_error)


def test_generator_map_gives_cdg():
    sm = _transport("ge-double", shape=(160, 160), electrons=5.0)
    r = fit_transport_lattice(sm.data)
    _check_cdg(sm, r)
    assert r.pair_resolved
    # M from the pair vector of current spots is biased beyond its stated error: never ok
    assert r.vg_matrix is None or not r.pair_quality.ok


def test_too_few_triple_points_in_a_small_window_are_doubtful():
    sm = _transport("ge-double", shape=(80, 80), electrons=1.6)
    r = fit_transport_lattice(sm.data)
    assert not r.quality.ok


@pytest.mark.regression
@pytest.mark.parametrize("preset", ["si-sige-double", "gaas-double", "si-mos-double", "ge-double"])
@pytest.mark.parametrize("bias_mV", [0.02, 0.3])
def test_presets_small_and_large_bias(preset, bias_mV):
    sm = _transport(preset, shape=(240, 240), bias_mV=bias_mV)
    r = fit_transport_lattice(sm.data)
    _check_cdg(sm, r)


@pytest.mark.regression
@pytest.mark.parametrize("snr", [5.0, 60.0])
def test_noise_levels(snr):
    sm = _transport("si-mos-double", shape=(240, 240), snr=snr, rng=3)
    _check_cdg(sm, fit_transport_lattice(sm.data))


@pytest.mark.regression
def test_decreasing_axes():
    sm = _transport("si-sige-double", shape=(240, 240), decreasing=True)
    r = fit_transport_lattice(sm.data)
    _check_cdg(sm, r)
    ref = fit_transport_lattice(_transport("si-sige-double", shape=(240, 240)).data)
    np.testing.assert_allclose(r.cdg_aF, ref.cdg_aF, rtol=1e-6)


@pytest.mark.regression
def test_skewed_window():
    # sweep combinations of the plungers (a rotated, skewed window): Cdg in the swept directions
    sm = _transport("ge-double", shape=(240, 240), directions=({"PA": 1.0, "PB": 0.2}, {"PB": 1.0, "PA": 0.1}))
    _check_cdg(sm, fit_transport_lattice(sm.data))


@pytest.mark.regression
@pytest.mark.parametrize("seed", range(12))
def test_never_ok_beyond_two_percent_on_random_devices(seed):
    # random devices of the held-out probe family (capacitances drawn broadly), small bias
    from stabtool.simulate.device import Device

    r_ = np.random.default_rng([seed, 11])
    cg = r_.uniform(2, 30, 2)
    cx = cg[::-1] * r_.uniform(0.05, 0.5, 2)
    cm = r_.uniform(0.05, 0.4) * min(cg) * 2
    ctot = cg + cx + cm + r_.uniform(5, 120, 2)
    dev = Device(cdg_aF=[[cg[0], cx[0]], [cx[1], cg[1]]], cdd_aF=[[ctot[0], -cm], [-cm, ctot[1]]],
                 gate_names=["GX", "GY"], dot_names=["L", "R"])
    xr_, yr_ = double_dot_window(dev, x_gate="GX", y_gate="GY", electrons=5.0)
    sm = simulate_map(dev, x_gate="GX", y_gate="GY", x_range_V=xr_, y_range_V=yr_, shape=(160, 160),
                      temperature_K=float(r_.uniform(0.03, 0.25)), readout="transport", bias_mV=0.02,
                      artefacts=Artefacts(snr=float(r_.choice([8.0, 20.0]))), rng=seed)
    r = fit_transport_lattice(sm.data)
    truth = np.array(sm.truth.to_json()["gate_capacitance_aF"])
    if r.quality.ok:
        np.testing.assert_allclose(r.cdg_aF, truth, rtol=0.02)


@pytest.mark.regression
def test_interrupted_sweep_with_missing_rows():
    dev = presets.get("ge-double")
    xr_, yr_ = double_dot_window(dev, x_gate="PA", y_gate="PB", electrons=6.0)
    sm = simulate_map(dev, x_gate="PA", y_gate="PB", x_range_V=xr_, y_range_V=yr_, shape=(240, 240),
                      temperature_K=0.1, readout="transport", bias_mV=0.02,
                      artefacts=Artefacts(snr=20.0, interrupted=0.15), rng=4)
    assert np.isnan(sm.data.values).any()
    _check_cdg(sm, fit_transport_lattice(sm.data))


@pytest.mark.regression
@pytest.mark.parametrize("bias_mV", [0.02, 0.3])
def test_analyze_reads_cdg_off_a_transport_map(bias_mV):
    # spots at small bias, bias triangles (about 7 % of the map) at 0.3 mV: both are transport maps
    # whose lattice gives Cdg = e [A B]^-1 (van der Wiel et al., RMP 75, 1 (2003)); the JSON carries it
    from stabtool.analysis import Analyzer

    sm = _transport("gaas-double", bias_mV=bias_mV)
    res = Analyzer()(sm.data)
    assert res.transport is not None and res.transport.consistent
    j = res.to_json()
    truth = np.array(sm.truth.to_json()["gate_capacitance_aF"])
    cdg, err = np.array(j["gate_capacitance_aF"], float), np.array(j["gate_capacitance_aF_error"], float)
    np.testing.assert_allclose(cdg, truth, rtol=0.02)
    assert np.all(np.abs(cdg - truth) <= 3 * err)
    assert len(j["triple_points_V"]) == len(res.transport.points_V)
    assert any(w.startswith("transport map:") for w in j["quality"]["warnings"])
    # virtual gates only from resolved triple-point pairs, never from the slopes of the bias
    # triangles' edges that the failed line fit saw (at 0.3 mV those give M12 ≈ 0.13 for 0.31)
    if res.transport.vg_matrix is None or not res.transport.pair_quality.ok:
        assert j["virtual_gate_matrix"] == [[None, None], [None, None]]
        assert not any("line slopes" in w for w in j["quality"]["warnings"])
    else:
        np.testing.assert_allclose(j["virtual_gate_matrix"], sm.truth.to_json()["virtual_gate_matrix"], atol=0.02)
