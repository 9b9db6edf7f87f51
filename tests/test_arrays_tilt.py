"""Tilted sweep axes: weakly coupled pairs are planned so that no line lies along an axis,
and the elements measured on tilted axes convert back to the physical gates exactly.

Truth: the generator's lever arms ``α = Cdd⁻¹ Cdg`` (constant-interaction model,
van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1),
including the columns of virtual gates built by ``Device.with_virtual_gates``
(an independent implementation of the sweep directions).
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from _arrays import array_description, array_with_sensor, sensor_model, truth_matrix

from stabtool.analysis import Analyzer
from stabtool.arrays import pair_from_analysis, pair_from_map, plan_pair_maps
from stabtool.arrays.measurement import untilt_elements
from stabtool.errors import InputError
from stabtool.physics.ci import lever_arm_matrix
from stabtool.simulate import Artefacts, simulate_map


def test_untilt_hand_computed_example() -> None:
    """Rows (1, 0.05) and (0.03, 1) seen through a = (1, 0.25), b = (0.2, 1) (worked by hand):
    row_x·A = (1.0125, 0.25) → 0.25/1.0125 = 0.246913580…; row_y·A = (0.28, 1.006) → 0.28/1.006 = 0.278330…
    The change of basis must give back 0.05 and 0.03; error factor det A/(b_y − m a_y)² with
    det A = 1 − 0.25·0.2 = 0.95 (common linear algebra, no source)."""
    m_uv_xy, m_uv_yx = 0.25 / 1.0125, 0.28 / 1.006
    m_xy, e_xy, m_yx, e_yx = untilt_elements(m_uv_xy, 1e-3, m_uv_yx, 2e-3, a=(1.0, 0.25), b=(0.2, 1.0))
    assert m_xy == pytest.approx(0.05, abs=1e-12)
    assert m_yx == pytest.approx(0.03, abs=1e-12)
    assert e_xy == pytest.approx(0.95 / (1 - m_uv_xy * 0.25) ** 2 * 1e-3, rel=1e-12)
    assert e_yx == pytest.approx(0.95 / (1 - m_uv_yx * 0.2) ** 2 * 2e-3, rel=1e-12)
    # the stated error is the first-order propagation: compare with a finite difference
    h = 1e-7
    d = (untilt_elements(m_uv_xy + h, 0, m_uv_yx, 0, a=(1.0, 0.25), b=(0.2, 1.0))[0] - m_xy) / h
    assert e_xy == pytest.approx(abs(d) * 1e-3, rel=1e-5)


def test_untilt_plain_axes_is_the_identity() -> None:
    out = untilt_elements(0.3, 0.01, 0.2, 0.02, a=(1.0, 0.0), b=(0.0, 1.0))
    assert out == pytest.approx((0.3, 0.01, 0.2, 0.02), abs=1e-15)
    with pytest.raises(InputError, match="parallel"):
        untilt_elements(0.3, 0.01, 0.2, 0.02, a=(1.0, 0.5), b=(2.0, 1.0))


def test_tilted_elements_of_the_generator_convert_to_the_physical_truth() -> None:
    """The generator's own α for virtual sweep columns, reduced and converted, equals the truth."""
    dev = array_with_sensor(8)
    names = list(dev.gate_names)
    truth = truth_matrix(dev)
    for x, y in [("P1", "P8"), ("P2", "SG"), ("P3", "P6")]:
        xd, yd = {x: 1.0, y: 0.23}, {x: 0.18, y: 1.0}
        vdev = dev.with_virtual_gates({"U": xd, "V": yd})
        al = lever_arm_matrix(vdev.cdg, vdev.cdd)
        i, j = names.index(x), names.index(y)
        u, v = list(vdev.gate_names).index("U"), list(vdev.gate_names).index("V")
        m_uv_xy, m_uv_yx = al[i, v] / al[i, u], al[j, u] / al[j, v]
        obj = {"x_gate": "U", "y_gate": "V", "virtual_gate_matrix": [[1.0, m_uv_xy], [m_uv_yx, 1.0]],
               "virtual_gate_matrix_error": [[0.0, 1e-3], [1e-3, 0.0]], "quality": {"ok": True, "warnings": []}}
        pm = pair_from_analysis(obj, directions={"U": xd, "V": yd})
        assert (pm.x_gate, pm.y_gate) == (x, y)
        assert pm.m_xy == pytest.approx(truth[i, j], abs=1e-12)
        assert pm.m_yx == pytest.approx(truth[j, i], abs=1e-12)


def test_directions_that_are_not_two_gates_are_refused() -> None:
    obj = {"x_gate": "U", "y_gate": "V", "virtual_gate_matrix": [[1.0, 0.2], [0.3, 1.0]]}
    with pytest.raises(InputError, match="exactly two gates"):
        pair_from_analysis(obj, source="m.json", directions={"U": {"P1": 1, "P2": 0.2}, "V": {"P3": 1}})


@pytest.mark.parametrize("n", [4, pytest.param(8, marks=pytest.mark.slow)])
def test_planned_lines_are_never_nearly_parallel_to_an_axis(n: int) -> None:
    """With the default tilt every family of every planned map makes at least 7° with both axes
    on a square pixel grid (truth α); with plain axes the weakly coupled pairs do not
    (below 3° for 4 dots, below 1° for 8)."""

    def smallest_angle(plans):
        al = lever_arm_matrix(dev.cdg, dev.cdd)
        out = 90.0
        for p in plans:
            a, b = np.zeros(len(names)), np.zeros(len(names))
            for g, c in (p.x_direction or {p.x_gate: 1.0}).items():
                a[names.index(g)] = c
            for g, c in (p.y_direction or {p.y_gate: 1.0}).items():
                b[names.index(g)] = c
            span = np.ptp(p.x_range_V) / np.ptp(p.y_range_V)
            for d in (names.index(p.x_gate), names.index(p.y_gate)):
                ang = np.degrees(np.arctan(abs((al[d] @ a) / (al[d] @ b)) * span))
                out = min(out, ang, 90.0 - ang)
        return out

    dev = array_with_sensor(n)
    names = list(dev.gate_names)
    assert smallest_angle(plan_pair_maps(array_description(dev))) >= 7.0
    assert smallest_angle(plan_pair_maps(array_description(dev), tilt=0.0)) < (3.0 if n == 4 else 1.0)


@pytest.mark.regression
def test_tilted_map_through_the_analysis_meets_the_bound() -> None:
    """One planned tilted map of a weakly coupled pair (P1–P4 of the 4-dot array, SNR 10):
    both elements within 0.005 of the truth and within 4 stated standard errors."""
    dev = array_with_sensor(4)
    names = list(dev.gate_names)
    (p,) = plan_pair_maps(array_description(dev), pairs=[("P1", "P4")])
    assert p.tilted and p.x_axis == "P1_tilt_P4" and p.y_axis == "P4_tilt_P1"
    sm = simulate_map(dev, x_gate=p.x_axis, y_gate=p.y_axis, x_range_V=p.x_range_V, y_range_V=p.y_range_V,
                      x_direction=p.x_direction, y_direction=p.y_direction, fixed_V=p.fixed_V, shape=(100, 100),
                      temperature_K=0.1, tunnel_coupling_ueV=10.0, artefacts=Artefacts(snr=10.0),
                      sensor=sensor_model(dev), rng=3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pm = pair_from_map(sm.data, analyzer=Analyzer(), source=p.name, directions=p.directions)
    truth = truth_matrix(dev)
    i, j = names.index("P1"), names.index("P4")
    for val, err, t in ((pm.m_xy, pm.m_xy_err, truth[i, j]), (pm.m_yx, pm.m_yx_err, truth[j, i])):
        assert abs(val - t) <= 0.005, (val, t)
        assert abs(val - t) <= 4 * err, (val, err, t)


def test_cli_converts_tilted_axes(tmp_path, capsys) -> None:
    """``--axis`` tells the command how a map's axes stepped the gates; the matrix comes out in
    physical gates (same hand-computed pair as above); a malformed ``--axis`` is a one-line error."""
    import json

    from stabtool.cli.main import main

    obj = {"x_gate": "PA_tilt", "y_gate": "PB_tilt",
           "virtual_gate_matrix": [[1.0, 0.25 / 1.0125], [0.28 / 1.006, 1.0]],
           "virtual_gate_matrix_error": [[0.0, 1e-3], [1e-3, 0.0]], "quality": {"ok": True, "warnings": []}}
    f = tmp_path / "a.json"
    f.write_text(json.dumps(obj))
    out = tmp_path / "m.json"
    code = main(["virtual-gates", str(f), "--axis", "PA_tilt=PA:1,PB:0.25", "--axis", "PB_tilt=PA:0.2,PB:1",
                 "--out", str(out), "--quiet"])
    assert code == 0
    saved = json.loads(out.read_text())
    gates = saved["physical_gates"]
    m = np.array(saved["matrix"], float)
    assert gates[:2] == ["PA", "PB"]
    assert m[0, 1] == pytest.approx(0.05, abs=1e-12) and m[1, 0] == pytest.approx(0.03, abs=1e-12)
    capsys.readouterr()
    assert main(["virtual-gates", str(f), "--axis", "PA_tilt=PA"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("stabtool: error: --axis: ") and "GATE:COEFFICIENT" in err and "Traceback" not in err
