"""``batch`` and ``drift`` read files holding several quantities as ``analyze --var`` does."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import xarray as xr

from stabtool.cli.main import main

sys.path.insert(0, str(Path(__file__).parent))
from test_drift_series import JUMP_AT, night


def _two_quantities(path, m, *, stack=None):
    """``m`` saved as 'sensor' beside a 'leakage' map of the same gates (a second instrument)."""
    coords = {d: m[d].values for d in m.dims}
    leak = np.random.default_rng(0).normal(size=m.shape)
    if stack is None:
        ds = xr.Dataset({"sensor": (m.dims, m.values), "leakage": (m.dims, leak)}, coords=coords)
    else:
        vals = np.stack([s.values for s in stack])
        ds = xr.Dataset({"sensor": (("rep",) + m.dims, vals), "leakage": (("rep",) + m.dims, vals * 0 + leak)},
                        coords=coords)
    ds.to_netcdf(path, engine="h5netcdf")
    return path


def test_batch_fails_each_file_without_var_and_analyses_them_with_it(tmp_path, capsys):
    maps, _, _ = night(n=3, seed=400)
    folder = tmp_path / "night"
    folder.mkdir()
    for k, m in enumerate(maps):
        _two_quantities(folder / f"sweep_{k}.nc", m)
    assert main(["batch", str(folder), "--out", str(tmp_path / "a"), "--workers", "1", "--quiet"]) == 1
    rows = (tmp_path / "a" / "results.csv").read_text().splitlines()[1:]
    assert all(",failed," in r and "several 2-D variables" in r for r in rows)
    assert main(["batch", str(folder), "--out", str(tmp_path / "b"), "--workers", "1", "--quiet",
                 "--var", "sensor"]) == 0
    rows = (tmp_path / "b" / "results.csv").read_text().splitlines()[1:]
    assert len(rows) == 3 and not any(",failed," in r for r in rows)
    # the same numbers as analyze --var
    capsys.readouterr()
    assert main(["analyze", str(folder / "sweep_1.nc"), "--var", "sensor", "--json", "--quiet"]) == 0
    want = json.loads(capsys.readouterr().out)["virtual_gate_matrix"]
    recs = [json.loads(p.read_text()) for p in (tmp_path / "b" / ".records").glob("*.json")]
    got = [r["result"]["virtual_gate_matrix"] for r in recs if r.get("file", "").endswith("sweep_1.nc")]
    assert got == [want]
    # a resume with another quantity is refused (other settings)
    assert main(["batch", str(folder), "--out", str(tmp_path / "b"), "--resume", "--var", "leakage"]) == 2


def test_drift_reads_the_named_quantity_of_a_stacked_file(tmp_path, capsys):
    maps, _, _ = night(n=7, seed=300)
    f = _two_quantities(tmp_path / "night.nc", maps[0], stack=maps)
    assert main(["drift", str(f), "--out", str(tmp_path / "d"), "--var", "sensor"]) == 0
    assert "7 sweeps of PA/PB" in capsys.readouterr().out
    data = json.loads((tmp_path / "d" / "drift.json").read_text())
    assert [j["index"] for j in data["jumps"]] == [JUMP_AT]
    assert data["sweeps"][3]["file"] == f"{f}[rep=3]"
