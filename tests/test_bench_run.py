"""The benchmark machinery end to end, with a stand-in analysis of known error.

The stand-in returns the generator truth with errors planted on purpose
(sizes set by the SNR, a crash, a null lever arm, one confident wrong
answer), so every figure the benchmark reports can be predicted by hand and
checked: coverage, percentiles, the silent-failure rate, the JSON, the plots
and the table. The real analysis is exercised by test_bench_regression.py.
"""

from __future__ import annotations

import copy
import json
import math
from dataclasses import dataclass

import matplotlib.image
import numpy as np
import pytest

from stabtool.bench.grid import build_grid
from stabtool.bench.report import format_table, summarise, write_report
from stabtool.bench.run import canny_hough_seconds, run_bench
from stabtool.cli.main import main
from stabtool.quality import Quality

# ------------------------------------------------------------ stand-ins


# The maps come from the real generator (stabtool.bench.maps.make_case_map,
# run_case's default); only the analysis is a stand-in.
MAP_FACTORY = None


@dataclass(frozen=True)
class StandInResult:
    """What the stand-in analysis returns: analyze-style JSON and a verdict."""

    js: dict
    quality: Quality

    def to_json(self) -> dict:
        return copy.deepcopy(self.js)


def planted_error(snr: float) -> float:
    """Error size planted at ``snr``: 0.01/SNR (virtual gates abs, Cdg rel); ×2 for α, E_C."""
    return 0.01 / snr


class TruthWithNoise:
    """Stand-in analysis: the truth with planted errors (see the module docstring)."""

    def __init__(self, case, truth_json: dict) -> None:
        self.case = case
        self.truth = truth_json

    def __call__(self, da):
        c = self.case
        if c.artefact == "partial-sweep" and c.snr == 1:
            raise RuntimeError("stand-in crash")
        e = planted_error(c.snr)
        js = copy.deepcopy(self.truth)
        m = np.asarray(js["virtual_gate_matrix"], float)
        m[0, 1] += e
        m[1, 0] -= e / 2
        js["virtual_gate_matrix"] = m.tolist()
        cdg_rel = 0.05 if (c.artefact == "jump" and c.snr == 10) else e  # one confident wrong answer
        js["gate_capacitance_aF"] = (np.asarray(js["gate_capacitance_aF"], float) * (1 + cdg_rel)).tolist()
        if c.artefact == "decreasing-anisotropic":
            js["lever_arm"] = None
            js["charging_energy_meV"] = {"dot1": None, "dot2": None, "mutual": None}
        else:
            js["lever_arm"] = (np.asarray(js["lever_arm"], float) * (1 - 2 * e)).tolist()
            ec = dict(js["charging_energy_meV"])
            ec["dot1"] *= 1 + 2 * e
            js["charging_energy_meV"] = ec
        js["timings"] = {"lines": 0.001, "fit": 0.002}
        ok = c.snr >= 3
        q = Quality(ok=ok, warnings=() if ok else ("stand-in: low SNR",))
        return StandInResult(js=js, quality=q)


def standin_factory(case, synthetic):
    """Analyzer factory of the stand-in (module level: picklable for the process pool)."""
    truth = synthetic.truth.to_json()
    return TruthWithNoise(case, truth)


# ------------------------------------------------------------ expectations by hand


@pytest.fixture(scope="module")
def quick_run():
    cases = build_grid(quick=True, seed=3, size_px=48)
    return run_bench(cases, workers=1, analyzer_factory=standin_factory, map_factory=MAP_FACTORY)


def test_every_case_is_recorded_in_order(quick_run):
    assert [o.case.index for o in quick_run.outcomes] == list(range(36))
    crashed = [o for o in quick_run.outcomes if not o.ran]
    assert len(crashed) == 1 and crashed[0].message == "RuntimeError: stand-in crash"
    assert all(o.ok == (o.case.snr >= 3) for o in quick_run.outcomes if o.ran)


def test_errors_per_snr_match_the_planted_errors(quick_run):
    s = summarise(quick_run)
    for key, block in s["by_snr"].items():
        e = planted_error(float(key))
        vg = block["groups"]["virtual_gate"]["abs"]
        assert vg["median"] == pytest.approx(e, rel=1e-6)
        assert vg["p95"] == pytest.approx(e, rel=1e-6)
        la = block["groups"]["lever_arm"]["rel"]
        assert la["median"] == pytest.approx(2 * e, rel=1e-6)
        cdg = block["groups"]["cdg"]["rel"]
        if key == "10":
            # 5 maps at 0.001, one at 0.05: median 0.001, p95 = 0.001 + 0.75 * 0.049 (linear)
            assert cdg["median"] == pytest.approx(e, rel=1e-6)
            assert cdg["p95"] == pytest.approx(e + 0.75 * (0.05 - e), rel=1e-6)
        else:
            assert cdg["p95"] == pytest.approx(e, rel=1e-6)


def test_coverage_counts_crashes_and_nulls(quick_run):
    s = summarise(quick_run)
    by = s["by_snr"]
    # each SNR has 6 maps, one of them "decreasing-anisotropic" (null lever arm)
    assert by["1"]["ran"] == pytest.approx(5 / 6)
    assert by["1"]["groups"]["virtual_gate"]["coverage"] == pytest.approx(5 / 6)
    assert by["1"]["groups"]["lever_arm"]["coverage"] == pytest.approx(4 / 6)
    assert by["30"]["groups"]["lever_arm"]["coverage"] == pytest.approx(5 / 6)
    assert by["30"]["groups"]["virtual_gate"]["coverage"] == 1.0
    assert s["by_artefact"]["decreasing-anisotropic"]["groups"]["charging_energy"]["coverage"] == 0.0
    assert s["overall"]["ok"] == pytest.approx(24 / 36)


def test_silent_failure_rate(quick_run):
    s = summarise(quick_run)
    # the only confident wrong answer: SNR 10, "jump", Cdg off by 5 % with quality ok
    assert s["overall"]["silent_failures"] == 1
    assert s["overall"]["silent_failure_rate"] == pytest.approx(1 / 36)
    assert s["overall"]["silent_failure_rate_of_ok"] == pytest.approx(1 / 24)
    assert s["by_snr"]["10"]["silent_failure_rate"] == pytest.approx(1 / 6)
    assert s["by_artefact"]["jump"]["silent_failures"] == 1
    # at SNR 1 the planted virtual-gate error 0.01 is within the noisy bound 0.02
    assert s["by_snr"]["1"]["groups"]["virtual_gate"]["beyond_bound"] == 0.0
    silent = [o for o in quick_run.outcomes if o.silent.silent]
    assert [(o.case.snr, o.case.artefact) for o in silent] == [(10.0, "jump")]
    assert silent[0].silent.beyond == ("cdg",)


def test_speed_figures(quick_run):
    sp = summarise(quick_run)["speed"]
    assert set(sp["stages"]) >= {"simulate", "pipeline", "pipeline_cpu", "canny_hough", "canny_hough_cpu",
                                 "stage:lines", "stage:fit"}
    assert sp["stages"]["stage:fit"]["median"] == 0.002
    r = sp["ratio_pipeline_to_canny_hough"]
    assert r["n"] == 35 and r["min"] <= r["median"] <= r["p95"] <= r["max"]
    assert sp["cpu_seconds"] > 0 and sp["workers"] == 1
    assert sp["idle_wall_estimate_seconds"] == pytest.approx(sp["cpu_seconds"])


def test_report_files(quick_run, tmp_path):
    _doc, paths = write_report(quick_run, tmp_path, command="stabtool bench --quick", seed=3)
    names = sorted(p.name for p in paths)
    assert names == ["bench.json", "bench_artefacts.png", "bench_coverage.png", "bench_errors.png"]

    def no_nan(token):
        raise AssertionError(f"non-strict JSON constant {token}")

    loaded = json.loads((tmp_path / "bench.json").read_text(), parse_constant=no_nan)
    assert loaded["command"] == "stabtool bench --quick" and loaded["seed"] == 3
    assert loaded["bounds"]["source"] == "issue bounds of the fitter"
    assert len(loaded["cases"]) == 36
    assert loaded["summary"]["by_snr"]["10"]["silent_failures"] == 1
    crashed = [c for c in loaded["cases"] if not c["ran"]]
    assert crashed[0]["errors"]["cdg"]["rel"] is None  # NaN written as null
    for name in names[1:]:
        img = matplotlib.image.imread(tmp_path / name)
        assert img.ndim == 3 and img.shape[0] > 300 and img.shape[1] > 600


def test_table_lists_every_snr_and_artefact(quick_run):
    text = format_table(summarise(quick_run))
    for label in ("SNR 1 ", "SNR 30", "1/f", "telegraph", "jump", "partial", "decr+aniso", "all"):
        assert label in text
    row10 = next(line for line in text.splitlines() if line.startswith("SNR 10"))
    assert "17%" in row10  # 1 silent failure out of 6 maps
    assert "speed (median per map)" in text and "bare Canny+Hough" in text


@pytest.mark.slow  # starting two worker processes takes seconds
def test_pool_of_two_gives_the_same_figures(quick_run):
    cases = build_grid(quick=True, seed=3, size_px=48)[:4]
    pooled = run_bench(cases, workers=2, analyzer_factory=standin_factory, map_factory=MAP_FACTORY)
    assert pooled.workers == 2
    for a, b in zip(pooled.outcomes, quick_run.outcomes[:4]):
        assert a.case == b.case and a.ok == b.ok
        for g in a.comparison.groups:
            ga, gb = a.comparison.groups[g], b.comparison.groups[g]
            assert (math.isnan(ga.abs) and math.isnan(gb.abs)) or ga.abs == gb.abs


def test_canny_hough_reference_is_timed():
    img = np.zeros((64, 64))
    img[:, 32:] = 1.0
    img[5, :] = np.nan
    t = canny_hough_seconds(img, repeats=2)
    assert 0 < t < 5


# ------------------------------------------------------------ the command line


def test_cli_bad_cases_is_one_line_error(tmp_path, capsys):
    assert main(["bench", "--cases", "0", "--out", str(tmp_path / "b")]) == 2
    err = capsys.readouterr().err.strip()
    assert err == "stabtool: error: --cases: the number of cases must be at least 1, got 0"


def test_cli_out_must_be_a_folder(tmp_path, capsys):
    f = tmp_path / "file.txt"
    f.write_text("x")
    assert main(["bench", "--quick", "--out", str(f)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("stabtool: error: ") and "is not a folder" in err and "\n" not in err


def test_cli_runs_and_writes_report(tmp_path, capsys, monkeypatch):
    import stabtool.bench.run as run_mod

    monkeypatch.setattr(run_mod, "default_analyzer_factory", standin_factory)
    out = tmp_path / "bench"
    code = main(["bench", "--cases", "6", "--seed", "5", "--size", "40", "--workers", "1",
                 "--out", str(out)])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "SNR 30" in captured.out and "wrote" in captured.out
    doc = json.loads((out / "bench.json").read_text())
    assert doc["command"] == f"stabtool bench --cases 6 --seed 5 --out {out} --size 40 --workers 1"
    assert doc["n_cases"] == 6 and doc["seed"] == 5
