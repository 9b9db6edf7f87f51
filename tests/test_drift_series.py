"""Drift across a night: ordering, offsets versus time, jumps, slow drift, verdict, CLI."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest

from stabtool.batch.drift import measure_drift, order_sweeps
from stabtool.cli.main import main
from stabtool.errors import InputError
from stabtool.io import save_map

sys.path.insert(0, str(Path(__file__).parent))
from test_drift_registration import steps, sweep

RATE_PX_PER_H = (0.6, -0.4)  # slow drift, pixels per hour
JUMP_PX = (3.0, 1.5)  # sudden jump before sweep JUMP_AT, pixels
JUMP_AT = 5
N = 8


def night(*, jump=True, rate=RATE_PX_PER_H, n=N, seed=100):
    """Sweeps every 30 min with a known pattern offset; returns maps and offsets (V)."""
    ref = sweep(seed=seed)
    sx, sy = steps(ref)
    maps, truth = [], []
    for k in range(n):
        hours = 0.5 * k
        px = np.array(rate) * hours + (np.array(JUMP_PX) if jump and k >= JUMP_AT else 0.0)
        off = (px[0] * sx, px[1] * sy)
        da = sweep(off, seed=seed + k)
        da.attrs["time"] = f"2026-11-30T{22 + (30 * k) // 60:02d}:{(30 * k) % 60:02d}:00" if k < 4 \
            else f"2026-12-01T{(30 * k) // 60 - 2:02d}:{(30 * k) % 60:02d}:00"
        da.attrs["source"] = f"sweep_{k:02d}.nc"
        maps.append(da)
        truth.append(off)
    return maps, np.array(truth), (sx, sy)


@pytest.mark.regression
def test_offsets_jump_and_drift_rate_are_recovered_from_a_shuffled_night():
    maps, truth, (sx, sy) = night()
    order = [3, 0, 7, 5, 1, 6, 2, 4]  # given out of order: the time attribute decides
    res = measure_drift([maps[i] for i in order])
    assert res.files == tuple(f"sweep_{k:02d}.nc" for k in range(N))
    assert res.time_unit == "h"
    np.testing.assert_allclose(res.t, 0.5 * np.arange(N), atol=1e-12)
    np.testing.assert_allclose(res.offset_x_V, truth[:, 0] - truth[0, 0], atol=0.25 * sx)
    np.testing.assert_allclose(res.offset_y_V, truth[:, 1] - truth[0, 1], atol=0.25 * sy)
    assert [j.index for j in res.jumps] == [JUMP_AT]
    assert res.jumps[0].size_x_V == pytest.approx(JUMP_PX[0] * sx, abs=0.4 * sx)
    assert res.jumps[0].size_y_V == pytest.approx(JUMP_PX[1] * sy, abs=0.4 * sy)
    assert res.rate_x_V == pytest.approx(RATE_PX_PER_H[0] * sx, abs=0.15 * sx)
    assert res.rate_y_V == pytest.approx(RATE_PX_PER_H[1] * sy, abs=0.15 * sy)
    assert res.significant_drift
    assert res.quality.ok, res.quality.warnings
    assert any("jump" in w for w in res.quality.warnings)  # reported, not doubtful


@pytest.mark.regression
def test_a_stable_device_shows_no_jump_and_no_resolved_drift():
    maps, _, _ = night(jump=False, rate=(0.0, 0.0), n=5, seed=200)
    res = measure_drift(maps)
    assert res.jumps == ()
    assert not res.significant_drift
    assert "stable" in res.verdict()
    assert res.quality.ok


def test_unrelated_maps_are_doubtful_not_a_confident_drift():
    rng = np.random.default_rng(0)
    ref = sweep(seed=1)
    noise = [ref.copy(data=rng.normal(size=ref.shape)) for _ in range(3)]
    res = measure_drift([ref, *noise], order="given")
    assert not res.quality.ok
    assert any("register poorly" in w for w in res.quality.warnings)


def test_without_times_sweeps_are_ordered_by_natural_file_name():
    labels = ["run10.nc", "run2.nc", "run1.nc"]
    assert order_sweeps(labels, [None, None, None]) == [2, 1, 0]
    times = ["2026-11-30T23:00:00", "2026-11-30T22:00:00", None]
    assert order_sweeps(labels, times) == [2, 1, 0]  # one time missing: file names decide
    assert order_sweeps(labels, times[:2] + ["2026-11-30T21:00:00"]) == [2, 1, 0]


def test_fewer_than_two_sweeps_is_an_input_error():
    with pytest.raises(InputError, match="at least 2 sweeps"):
        measure_drift([sweep(seed=1)])


def _night_folder(tmp_path, maps, *, mixed_formats=False):
    """The sweeps written to ``tmp_path/night`` (NetCDF, or NetCDF and NPZ alternately)."""
    folder = tmp_path / "night"
    folder.mkdir()
    for k, da in enumerate(maps):
        save_map(da, folder / f"sweep_{k:02d}{'.npz' if mixed_formats and not k % 2 else '.nc'}")
    return folder


@pytest.mark.regression
def test_cli_writes_csv_json_png_and_reports_the_jump(tmp_path, capsys):
    maps, truth, (sx, _) = night(n=7, seed=300)
    folder = _night_folder(tmp_path, maps, mixed_formats=True)
    code = main(["drift", str(folder), "--out", str(tmp_path / "out")])
    assert code == 0
    out = capsys.readouterr().out
    assert "7 sweeps of PA/PB" in out and "1 jump" in out
    data = json.loads((tmp_path / "out" / "drift.json").read_text())
    last = data["sweeps"][-1]
    assert last["offset_x_mV"] == pytest.approx(1e3 * (truth[-1, 0] - truth[0, 0]), abs=1e3 * 0.25 * sx)
    assert [j["index"] for j in data["jumps"]] == [JUMP_AT]
    csv_lines = (tmp_path / "out" / "drift.csv").read_text().splitlines()
    assert len(csv_lines) == 8 and csv_lines[0].startswith("file,time,t_h,offset_x_mV")
    assert (tmp_path / "out" / "drift.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_cli_leaves_a_survey_of_another_window_out_of_the_repeats(tmp_path, capsys):
    # a night's folder holds an earlier, wider survey beside the repeats: taken as the reference
    # it made every repeat "overlap less than half of the first window" and the verdict doubtful
    # (common practice, no source: drift is measured between sweeps of the same window)
    maps, truth, (sx, _) = night(n=6, seed=300)
    folder = _night_folder(tmp_path, maps)
    (x0, x1), (y0, y1) = (float(maps[0]["PA"].min()), float(maps[0]["PA"].max())), \
        (float(maps[0]["PB"].min()), float(maps[0]["PB"].max()))
    survey = sweep(window=((x0 - (x1 - x0), x1 + (x1 - x0)), (y0 - (y1 - y0), y1 + (y1 - y0))), seed=9)
    survey.attrs["time"] = "2026-11-30T21:30:00"
    save_map(survey, folder / "survey.nc")
    code = main(["drift", str(folder), "--out", str(tmp_path / "out")])
    out = capsys.readouterr().out
    assert code == 0
    assert "6 sweeps of PA/PB" in out and "survey.nc" in out.splitlines()[-2]
    data = json.loads((tmp_path / "out" / "drift.json").read_text())
    assert data["quality"]["ok"] and [j["index"] for j in data["jumps"]] == [JUMP_AT]
    assert any("survey.nc" in w and "left out" in w for w in data["quality"]["warnings"])
    assert data["sweeps"][-1]["offset_x_mV"] == pytest.approx(1e3 * (truth[-1, 0] - truth[0, 0]), abs=1e3 * 0.25 * sx)


def test_cli_names_the_faulty_input(tmp_path, capsys):
    code = main(["drift", str(tmp_path / "nothing_here"), "--out", str(tmp_path / "out")])
    assert code == 2
    err = capsys.readouterr().err
    assert "nothing_here" in err and "no such file" in err


def test_the_batch_measures_drift_from_the_workers_feature_images_without_reloading(tmp_path, monkeypatch):
    """The batch worker keeps each map's feature image: the drift of the batch is that of the files,
    with no map loaded a second time, and no feature file left behind."""
    import stabtool.batch.drift as drift_mod
    from stabtool.analysis import Analyzer
    from stabtool.batch import run_batch

    maps, _, _ = night(n=4)
    paths = []
    for k, da in enumerate(maps):
        p = tmp_path / "in" / f"sweep_{k:02d}.nc"
        p.parent.mkdir(exist_ok=True)
        save_map(da, p)
        paths.append(p)
    direct = measure_drift([str(p) for p in paths], order="given")
    loads = []
    real_load = drift_mod._load
    monkeypatch.setattr(drift_mod, "_load", lambda item: loads.append(item) or real_load(item))
    rep = run_batch([str(p) for p in paths], Analyzer(refine=False, tunnel_coupling=False), tmp_path / "out",
                    workers=1, progress=False, plots=False, summary=False, netcdf=False)
    assert rep.n_failed == 0 and len(rep.drift) == 1
    assert loads == []
    (res, _png), = rep.drift
    for name in ("offset_x_V", "offset_y_V", "match", "overlap", "step_x_V", "step_y_V"):
        np.testing.assert_array_equal(getattr(res, name), getattr(direct, name))
    assert list(res.files) == list(direct.files)
    assert not list((tmp_path / "out").rglob("*.npy"))


def test_cli_reads_each_file_once_and_measures_what_the_files_give(tmp_path, monkeypatch, capsys):
    """Finding the series and measuring the drift share one read per file (the feature images are
    kept on disk meanwhile, none left behind); the offsets are those of the files read directly."""
    import stabtool.batch.drift as drift_mod
    import stabtool.io

    maps, _, _ = night(n=5, seed=301)
    folder = _night_folder(tmp_path, maps)
    direct = measure_drift(sorted(str(p) for p in folder.iterdir()))
    reads = []
    real = stabtool.io.load
    monkeypatch.setattr(stabtool.io, "load", lambda path, *a, **k: reads.append(path) or real(path, *a, **k))
    monkeypatch.setattr(drift_mod, "_load", lambda item: pytest.fail(f"{item} loaded again"))
    assert main(["drift", str(folder), "--out", str(tmp_path / "out"), "--quiet"]) == 0
    assert sorted(map(str, reads)) == sorted(str(p) for p in folder.iterdir())
    data = json.loads((tmp_path / "out" / "drift.json").read_text())
    assert [s["offset_x_mV"] for s in data["sweeps"]] == pytest.approx(1e3 * direct.offset_x_V, abs=1e-9)
    assert not list(tmp_path.rglob("*.npy"))


def test_cli_names_a_corrupt_file_among_the_sweeps(tmp_path, capsys):
    maps, _, _ = night(n=3, seed=302)
    folder = _night_folder(tmp_path, maps)
    (folder / "sweep_99.nc").write_bytes(b"\x89HDF\r\n\x1a\n" + b"\x00" * 64)
    code = main(["drift", str(folder), "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "sweep_99.nc" in err[0] and "Traceback" not in err[0]
