"""Reading analysis JSON, writing/reading the matrix (JSON, CSV) and ``stabtool virtual-gates``."""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np
import pytest

from stabtool.arrays import (
    CAUTION,
    PairMeasurement,
    assemble_virtual_gates,
    pair_from_analysis,
    read_matrix_json,
    read_pair_json,
    write_matrix_csv,
    write_matrix_json,
)
from stabtool.cli.main import main
from stabtool.errors import InputError


def _analysis_json(x: str, y: str, s1: float, e1: float, s2: float, e2: float, *, ok: bool = True) -> dict:
    """The keys of ``stabtool analyze --json`` this module reads (conventions file)."""
    return {
        "x_gate": x, "y_gate": y,
        "slopes": {"dot1": s1, "dot2": s2, "interdot": 1.25},
        "slope_errors": {"dot1": e1, "dot2": e2, "interdot": 0.05},
        "virtual_gate_matrix": [[1.0, -1.0 / s1], [-s2, 1.0]],
        "quality": {"ok": ok, "warnings": [] if ok else ["few lines"]},
    }


def test_pair_from_analysis_uses_the_conventions_matrix() -> None:
    # references file worked example: slopes −2.2333 / −0.45752 → M = [[1, 0.44776], [0.45752, 1]]
    obj = _analysis_json("PA", "PB", -2.2333, 0.02, -0.45752, 0.004)
    pm = pair_from_analysis(obj, source="pa_pb.json")
    assert (pm.x_gate, pm.y_gate, pm.source) == ("PA", "PB", "pa_pb.json")
    np.testing.assert_allclose([pm.m_xy, pm.m_yx], [0.44776, 0.45752], rtol=1e-4)
    # errors propagated from the slope errors: σ(−1/s) = σ_s/s², σ(−s) = σ_s
    np.testing.assert_allclose([pm.m_xy_err, pm.m_yx_err], [0.02 / 2.2333**2, 0.004], rtol=1e-12)
    # an explicit matrix error (extra key of the analysis) takes precedence
    obj["virtual_gate_matrix_error"] = [[0, 0.003], [0.005, 0]]
    pm = pair_from_analysis(obj)
    assert (pm.m_xy_err, pm.m_yx_err) == (0.003, 0.005)


def test_pair_from_analysis_keeps_a_missing_family_as_nan() -> None:
    obj = _analysis_json("PA", "PB", -2.0, 0.02, -0.4, 0.004)
    obj["slopes"]["dot2"] = None
    obj["slope_errors"]["dot2"] = None
    obj["virtual_gate_matrix"] = [[1.0, 0.5], [None, 1.0]]
    pm = pair_from_analysis(obj)
    assert pm.m_xy == 0.5 and math.isnan(pm.m_yx)


@pytest.mark.parametrize(
    "obj, fault",
    [
        ({"slopes": {}}, "missing 'x_gate'/'y_gate'"),
        ({"x_gate": "PA", "y_gate": "PB", "slopes": {"dot1": None, "dot2": None}}, "no cross-coupling"),
        ({"x_gate": "PA", "y_gate": "PB", "slopes": {"dot1": "steep"}}, "malformed"),
        ({"x_gate": "PA", "y_gate": "PA", "virtual_gate_matrix": [[1, 0.3], [0.3, 1]]}, "same gate"),
    ],
)
def test_bad_analysis_json(obj: dict, fault: str, tmp_path: Path) -> None:
    p = tmp_path / "bad.json"
    p.write_text(json.dumps(obj))
    with pytest.raises(InputError, match=fault) as info:
        read_pair_json(p)
    assert str(p) in str(info.value) and "\n" not in str(info.value)


def test_unreadable_json_names_the_file(tmp_path: Path) -> None:
    p = tmp_path / "broken.json"
    p.write_text("{not json")
    with pytest.raises(InputError, match=r"broken.json: not valid JSON \(line 1"):
        read_pair_json(p)


def _vgm():
    maps = [
        PairMeasurement("PA", "PB", 0.30, 0.01, 0.42, 0.02, source="a.json"),
        PairMeasurement("PB", "PA", 0.40, 0.01, 0.28, 0.01, source="b.json"),
        PairMeasurement("PB", "PC", 0.33, 0.01, 0.36, 0.01, source="c.json"),
        PairMeasurement("PA", "SG", 0.10, 0.01, 0.21, 0.01, source="d.json"),
    ]
    return assemble_virtual_gates(maps, sensors=["SG"])


def test_json_round_trip_and_fields(tmp_path: Path) -> None:
    vgm = _vgm()
    p = write_matrix_json(vgm, tmp_path / "m.json")
    obj = json.loads(p.read_text())
    assert obj["caution"] == CAUTION and "check gate-voltage limits" in obj["caution"]
    assert obj["virtual_gates"] == ["vPA", "vPB", "vPC", "vSG"]
    assert obj["physical_gates"] == ["PA", "PB", "PC", "SG"]
    assert obj["uncertainty"][0][2] is None  # unmeasured → null
    assert {"virtual_gate": "vPA", "physical_gate": "PC"} in obj["unmeasured"]
    assert [m["source"] for m in obj["maps_used"]] == ["a.json", "b.json", "c.json", "d.json"]
    # per-element statistics of every element measured more than once (PA–PB in both maps)
    elems = {(e["virtual_gate"], e["physical_gate"]): e for e in obj["inconsistency"]["elements"]}
    assert set(elems) == {("vPA", "PB"), ("vPB", "PA")}
    assert elems["vPA", "PB"]["dof"] == 1 and elems["vPA", "PB"]["maps"] == ["a.json", "b.json"]
    # 0.30±0.01 vs 0.28±0.01: χ² = (0.02)²/(2·0.01²) = 2 (hand computation)
    assert elems["vPA", "PB"]["chi2"] == pytest.approx(2.0, rel=1e-9)
    assert obj["sensor_compensation"]["SG"]["PA"]["value"] == pytest.approx(-0.21)
    assert obj["quality"]["ok"] is False
    back = read_matrix_json(p)
    np.testing.assert_allclose(back.matrix, vgm.matrix, rtol=0, atol=0)
    np.testing.assert_allclose(back.uncertainty, vgm.uncertainty, rtol=0, atol=0)
    assert back.gates == vgm.gates and back.plungers == vgm.plungers and back.sensor_gates == ("SG",)
    assert back.total_chi2 == pytest.approx(vgm.total_chi2)


def test_csv_long_format(tmp_path: Path) -> None:
    vgm = _vgm()
    p = write_matrix_csv(vgm, tmp_path / "m.csv")
    rows = list(csv.DictReader(p.open()))
    assert len(rows) == 4 * 4
    r = {(row["virtual_gate"], row["physical_gate"]): row for row in rows}
    assert float(r["vPA", "PB"]["value"]) == pytest.approx(vgm.element("PA", "PB"), abs=1e-15)
    assert r["vPA", "PB"]["n_maps"] == "2" and r["vPA", "PC"]["measured"] == "no"
    assert r["vPA", "PC"]["uncertainty"] == "" and r["vPA", "PA"]["value"] == "1.0"


def test_read_matrix_rejects_other_json(tmp_path: Path) -> None:
    p = tmp_path / "x.json"
    p.write_text(json.dumps({"x_gate": "PA"}))
    with pytest.raises(InputError, match="not a virtual-gate matrix file"):
        read_matrix_json(p)


# ------------------------------------------------------------------ CLI
@pytest.fixture()
def pair_files(tmp_path: Path) -> list[str]:
    specs = [("PA", "PB", -3.0, 0.05, -0.35, 0.01), ("PB", "PC", -2.8, 0.05, -0.38, 0.01),
             ("PA", "SG", -8.0, 0.5, -0.2, 0.01)]
    out = []
    for x, y, *rest in specs:
        p = tmp_path / f"{x}_{y}.json"
        p.write_text(json.dumps(_analysis_json(x, y, *rest)))
        out.append(str(p))
    return out


def test_cli_writes_matrix_and_prints_caution(pair_files, tmp_path: Path, capsys) -> None:
    out, out_csv = tmp_path / "matrix.json", tmp_path / "matrix.csv"
    code = main(["virtual-gates", *pair_files, "--sensor", "SG", "--out", str(out), "--csv", str(out_csv)])
    cap = capsys.readouterr()
    assert code == 0
    assert "caution:" in cap.err and "check gate-voltage limits" in cap.err
    assert "vPA" in cap.out and "0.3333" in cap.out  # −1/s1 = 1/3 for the PA–PB map
    obj = json.loads(out.read_text())
    assert obj["matrix"][0][1] == pytest.approx(1 / 3) and obj["caution"] == CAUTION
    assert out_csv.read_text().startswith("virtual_gate,physical_gate,")


def test_cli_json_on_stdout_caution_on_stderr(pair_files, capsys) -> None:
    assert main(["virtual-gates", *pair_files, "--sensor", "SG", "--json"]) == 0
    cap = capsys.readouterr()
    obj = json.loads(cap.out)  # stdout is exactly one JSON object
    assert obj["kind"] == "stabtool.virtual_gate_matrix" and obj["caution"] == CAUTION
    assert "caution:" in cap.err


def test_cli_sweep_limits(pair_files, tmp_path: Path, capsys) -> None:
    out = tmp_path / "matrix.json"
    assert main(["virtual-gates", *pair_files, "--sensor", "SG", "--out", str(out)]) == 0
    capsys.readouterr()
    args = ["virtual-gates", str(out), "--sweep", "vPB=-20mV:20mV", "--sweep", "vPA=-10mV:10mV:11",
            "--origin", "PA=0.5", "--origin", "PB=600mV", "--origin", "SG=1.2"]
    assert main(args + ["--limits", "PB=0:0.7"]) == 0
    cap = capsys.readouterr()
    assert "all within range" in cap.out and cap.out.count("[vPB=") == 4
    sweep_csv = tmp_path / "sweep.csv"
    code = main(args + ["--limits", "PB=0:0.61", "--sweep-csv", str(sweep_csv)])
    cap = capsys.readouterr()
    assert code == 1
    assert "LIMIT VIOLATION: gate PB would reach" in cap.err and "do not run it" in cap.err
    rows = list(csv.reader(sweep_csv.open()))
    assert len(rows) == 1 + 2 * 11 and rows[0][:2] == ["vPB offset (V)", "vPA offset (V)"]


@pytest.mark.parametrize(
    "extra, fault",
    [
        (["--limits", "PB=0:1"], "--sweep: --origin, --limits and --sweep-csv need a --sweep"),
        (["--sweep", "vPB=1:0"], "LO must be below HI"),
        (["--sweep", "vPB=-1:1", "--origin", "PZ=0"], "unknown gate 'PZ'"),
        (["--sweep", "vPB=-1kV:1"], "unknown voltage unit"),
        (["--plungers", "PA,PA"], "listed twice"),
    ],
)
def test_cli_bad_input_exit_2(pair_files, extra, fault, capsys) -> None:
    code = main(["virtual-gates", *pair_files, "--sensor", "SG", *extra])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("stabtool: error: ") and fault in err and "Traceback" not in err


@pytest.mark.parametrize("option", ["--out", "--csv"])
def test_cli_output_onto_an_input_is_refused_and_the_input_kept(pair_files, option, capsys) -> None:
    before = Path(pair_files[0]).read_text()
    code = main(["virtual-gates", *pair_files, "--sensor", "SG", option, pair_files[0]])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1
    assert err.startswith(f"stabtool: error: {pair_files[0]}: is an input of this run")
    assert Path(pair_files[0]).read_text() == before


def test_cli_missing_file(tmp_path: Path, capsys) -> None:
    code = main(["virtual-gates", str(tmp_path / "nope.json")])
    assert code == 2 and "nope.json: file not found" in capsys.readouterr().err
