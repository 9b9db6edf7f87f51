"""Maps that reach the empty (0, 0) region: absolute occupations and triple points only where lines meet.

The ground state is the argmin over N ≥ 0 of the constant-interaction energy
``½ (e(N − N0) − Cdg V)ᵀ Cdd⁻¹ (e(N − N0) − Cdg V)`` (van der Wiel et al.,
Rev. Mod. Phys. 75, 1 (2003)), evaluated here by brute force.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from _probe import analysed, make_map

from stabtool.analysis import Analyzer
from stabtool.physics.constants import E_AC
from stabtool.simulate import simulate_map
from stabtool.simulate.device import Device
from stabtool.simulate.quick import double_dot_window

DEVICE = Device(cdg_aF=[[10.0, 2.0], [1.8, 9.0]], cdd_aF=[[70.0, -12.0], [-12.0, 75.0]], gate_names=["PA", "PB"],
                dot_names=["L", "R"], name="kestrel-7")


def _ground_state(x: float, y: float) -> tuple[int, int]:
    inv = np.linalg.inv(DEVICE.cdd)
    n = np.array([(a, b) for a in range(12) for b in range(12)], float)
    d = E_AC * (n - DEVICE.offsets) - DEVICE.cdg @ np.array([x, y])
    k = int(np.argmin(np.einsum("ki,ij,kj->k", d, inv, d)))
    return int(n[k, 0]), int(n[k, 1])


@pytest.fixture(scope="module")
def result():
    # the window starts 2.6 electrons below the first transition of each dot: an empty corner of
    # more than two addition voltages (stabtool.fit.charge_states.EMPTY_MARGIN_CELLS)
    xr_, yr_ = double_dot_window(DEVICE, x_gate="PA", y_gate="PB", electrons=7.0, start_e=-2.6)
    sm = simulate_map(DEVICE, x_gate="PA", y_gate="PB", x_range_V=xr_, y_range_V=yr_, shape=(160, 160),
                      temperature_K=0.05, readout="charge", rng=2)
    da = sm.data.copy(data=sm.data.values + np.random.default_rng(3).normal(0, 0.02, sm.data.shape))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Analyzer()(da)


def test_the_empty_corner_gives_the_ground_state_occupations(result):
    cs = result.to_json()["charge_states"]
    assert cs["absolute"] == {"dot1": True, "dot2": True} and cs["few_electron"]
    assert not cs["absolute_withheld"]
    big = [r for r in cs["regions"] if r["pixels"] >= 50]
    assert len(big) >= 9
    for r in big:
        assert (r["n1"], r["n2"]) == _ground_state(r["x"], r["y"]), r


def test_triple_points_sit_where_charge_states_meet(result):
    pts = np.asarray(result.to_json()["triple_points_V"], float)
    assert len(pts) >= 4
    dv = result.diagram.addition_V
    ang = np.linspace(0, 2 * np.pi, 12, endpoint=False)
    for x, y in pts:
        # around a triple point the ground state takes at least two values within a fifth of a cell
        # (none inside the empty region, where no line is)
        around = {_ground_state(x + 0.2 * dv[0] * np.cos(a), y + 0.2 * dv[1] * np.sin(a)) for a in ang}
        assert len(around) >= 2, (x, y, around)


def test_only_interdot_segments_along_a_pair_of_triple_points_count_as_interdot():
    # the interdot line joins the two triple points of a cell (van der Wiel et al. 2003, Fig. 3);
    # a short segment through a vertex at another angle is not one (drawn "set aside" in the plot)
    from dataclasses import replace

    from stabtool.analysis import AnalysisResult
    from stabtool.lines.result import TransitionLine
    from stabtool.simulate import quick_double_dot

    sm = quick_double_dot("gaas-double", shape=(200, 200), snr=30, rng=3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = Analyzer()(sm.data)
    truth = sm.truth.to_json()["slopes"]["interdot"]
    found = res.diagram.interdot
    assert len(found) >= 1 and res.interdot_on_pairs.all()
    assert all(abs(ln.slope / truth - 1) < 0.25 for ln in found)
    # the same result with a vertical and a flat segment through its first triple point added
    x0, y0 = res.triple_points[0]
    h = 0.3 * res.diagram.addition_V.min()
    junk = (TransitionLine(family="interdot", x0=x0, y0=y0, slope=float("inf"), slope_stderr=1.0,
                           position_stderr=1e-4, start=(x0, y0 - h), end=(x0, y0 + h)),
            TransitionLine(family="interdot", x0=x0, y0=y0, slope=0.0, slope_stderr=1.0,
                           position_stderr=1e-4, start=(x0 - h, y0), end=(x0 + h, y0)))
    more = AnalysisResult(**{**{f: getattr(res, f) for f in res.__dataclass_fields__},
                             "diagram": replace(res.diagram, interdot=found + junk)})
    assert more.interdot_on_pairs.tolist() == [True] * len(found) + [False, False]


def _claimed_labels_off_the_ground_state(pm) -> list:
    """Regions whose occupation, claimed absolute for a dot, is not the ground state at the region's centroid."""
    res = analysed(pm)
    cs = res.to_json()["charge_states"]
    dev = pm.truth["device"]
    cdg, inv = np.asarray(dev["cdg_aF"], float), np.linalg.inv(np.asarray(dev["cdd_aF"], float))
    n0 = np.asarray(dev.get("offset_charge_e") or [0.0, 0.0], float)
    grid = np.array([(a, b) for a in range(16) for b in range(16)], float)
    claimed = [bool((cs.get("absolute") or {}).get(k)) for k in ("dot1", "dot2")]
    wrong = []
    for reg in cs["regions"]:
        d = E_AC * (grid - n0) - cdg @ np.array([reg["x"], reg["y"]])
        truth = grid[np.argmin(np.einsum("ki,ij,kj->k", d, inv, d))]
        if any(claimed[i] and reg[key] != int(truth[i]) for i, key in enumerate(("n1", "n2"))):
            wrong.append((reg, truth))
    return wrong


def test_no_absolute_labels_when_the_model_fit_disagrees_with_the_lines():
    # A held-out probe map (scripts/probe_heldout.py, seed 23 with the empty corner well inside the
    # window: gauss sensor, row walk, spikes, gain drift, SNR 60). The model fit to the map disagrees
    # with the line-based lattice there, and the lattice's absolute labelling was wrong on three
    # regions. Absolute occupations, where claimed, must be the constant-interaction ground state.
    assert _claimed_labels_off_the_ground_state(make_map(23, start_e=(-3.0, -2.2))) == []


@pytest.mark.parametrize("seed", [239, 285])
def test_no_absolute_labels_at_snr_four_where_a_low_line_went_undetected(seed):
    # ordinary probe maps (no empty corner in the window) at SNR 4: a line near the low corner went
    # undetected and the dots were called empty, with whole dots numbered one or two too high
    assert _claimed_labels_off_the_ground_state(make_map(seed)) == []


def test_no_absolute_labels_from_a_lattice_known_to_worse_than_ten_percent():
    # Probe seed 9 with mains pickup (SNR 4): a gate capacitance known to 108 % came with absolute
    # labels wrong on 14 regions.
    assert _claimed_labels_off_the_ground_state(make_map(9, noise=("hum",))) == []


def test_no_absolute_labels_where_the_sensor_is_blind_to_the_other_dot_too():
    # Probe map with a sensor swept across its own Coulomb peaks (--sensors comb, seed 4, SNR 8): over the
    # lower third of the map the sensor sits between two peaks and shows no line. Two cells below the
    # lowest dot-2 line were line-free, and dot 2 was called empty there, wrong on 19 regions; the dot-1
    # lines crossing that region vanish as well, which a working sensor in a true empty corner shows.
    pm = make_map(4, sensors=("comb",))
    res = analysed(pm)
    assert not any(res.to_json()["charge_states"]["absolute"].values())
    assert [w for w in res.quality.warnings if "the sensor may be blind in that part of the map" in w]
    assert _claimed_labels_off_the_ground_state(pm) == []


@pytest.mark.slow  # about 15 s: the hot map's model fit
def test_no_absolute_labels_while_lines_of_a_slope_of_their_own_are_set_aside():
    # A hot probe map (seed 35 at 0.3–1 K: 0.46 K, gauss sensor, SNR 60, lines 2.6 px broad). Its
    # first dot-1 line, next to the empty corner, is 9 % steeper than the family's others and was
    # named with another as a stray set ("another dot?"); without it the dots were called empty one
    # line too early and 17 regions were labelled one dot-1 electron short. An empty corner means
    # no line below the lowest ones, which an unexplained line contradicts.
    pm = make_map(35, temperature=(0.3, 1.0))
    res = analysed(pm)
    assert res.stray_lines, "the map no longer has a stray set: the rule is not exercised"
    assert _claimed_labels_off_the_ground_state(pm) == []
    cs = res.to_json()["charge_states"]
    assert cs["absolute_withheld"] and cs["absolute"] == {"dot1": False, "dot2": False}
    assert any("slope of their own" in w and "charge states are relative" in w for w in res.quality.warnings)


def test_the_lattice_uncertainty_rule_reads_the_relative_gate_capacitance_errors():
    from types import SimpleNamespace

    from stabtool.analysis import ABSOLUTE_MAX_CDG_REL, _lattice_too_uncertain

    cdg = np.array([[10.0, 2.0], [1.5, 9.0]])
    fit = SimpleNamespace(cdg_aF=cdg, cdg_aF_error=0.5 * ABSOLUTE_MAX_CDG_REL * cdg)
    assert not _lattice_too_uncertain(fit)
    fit.cdg_aF_error = np.array([[0.1, 0.3], [0.1, 0.1]])  # 15 % on the 2 aF element
    assert _lattice_too_uncertain(fit)
    fit.cdg_aF_error = np.array([[0.1, np.nan], [0.1, 0.1]])
    assert _lattice_too_uncertain(fit)


def test_an_empty_corner_map_whose_two_mutual_shifts_disagree_is_not_ok(monkeypatch):
    # Probe seed 16 with the empty corner in the window (gauss sensor, pink noise, row walk, SNR 8):
    # the lines' δ2 = 2.15 ± 0.17 mV and the model fit's 2.60 ± 0.17 mV (true 2.64) are ≈ 6 σ apart
    # under the correlation their mean assumes; the mean (2.33 mV) was reported ok with a gate
    # capacitance 3.5 % off at a stated 0.9 %. An ok map keeps Cdg within the 2 % bound. (With the
    # model fit on 2500 pixels, as when this was found: on 10 000 the fit lands within 0.3 % of the
    # truth and the map no longer has the error the rule is for.)
    from stabtool.fit import refine

    monkeypatch.setattr(refine, "MAX_POINTS", 2500)
    pm = make_map(16, start_e=(-3.0, -2.2))
    res = analysed(pm)
    cdg = np.asarray(res.to_json()["gate_capacitance_aF"], float)
    worst = float(np.max(np.abs(cdg / np.asarray(pm.truth["gate_capacitance_aF"], float) - 1)))
    assert not res.quality.ok or worst <= 0.02, f"ok with Cdg {100 * worst:.1f} % off"
    assert worst > 0.02  # (the map still has the error the rule is for)
