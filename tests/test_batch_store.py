"""Batch storage: content hashes, atomic records, flat tables in CSV and NetCDF."""

from __future__ import annotations

import csv
import hashlib
import json

import numpy as np
import pytest
import xarray as xr

from stabtool.batch.store import (
    BatchRecord,
    ResultStore,
    atomic_write_text,
    content_hash,
    flatten_result,
)
from stabtool.errors import InputError


def test_content_hash_is_the_sha256_of_the_bytes_whatever_the_name(tmp_path):
    data = b"PA,PB,I\n0,0,1\n" * 1000
    (tmp_path / "a.csv").write_bytes(data)
    (tmp_path / "b.csv").write_bytes(data)
    expected = hashlib.sha256(data).hexdigest()[:16]  # reference: hashlib
    assert content_hash(tmp_path / "a.csv") == expected == content_hash(tmp_path / "b.csv")
    (tmp_path / "b.csv").write_bytes(data + b"1")
    assert content_hash(tmp_path / "b.csv") != expected


def test_content_hash_of_a_missing_file_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="cannot be read"):
        content_hash(tmp_path / "gone.nc")


def test_atomic_write_replaces_whole_files_and_leaves_no_temporary(tmp_path):
    target = tmp_path / "t.json"
    atomic_write_text(target, "old")
    atomic_write_text(target, "new content")
    assert target.read_text() == "new content"
    assert [p.name for p in tmp_path.iterdir()] == ["t.json"]


def test_flatten_result_names_columns_by_path_and_keeps_matrices_cell_by_cell():
    res = {
        "x_gate": "PA",
        "slopes": {"dot1": -2.5, "dot2": -0.4, "interdot": None},
        "virtual_gate_matrix": [[1.0, 0.4], [0.45, 1.0]],
        "quality": {"ok": False, "warnings": ["few lines", "noisy"]},
        "lines": [{"slope": 1}, {"slope": 2}, {"slope": 3}],
        "value": np.float32(0.5),
        "bad": float("nan"),
    }
    flat = flatten_result(res)
    assert flat["slopes.dot1"] == -2.5 and flat["slopes.interdot"] is None
    assert flat["virtual_gate_matrix.0.1"] == 0.4 and flat["virtual_gate_matrix.1.0"] == 0.45
    assert flat["quality.warnings"] == "few lines | noisy"
    assert flat["quality.ok"] is False
    assert flat["lines.n"] == 3
    assert flat["value"] == pytest.approx(0.5) and isinstance(flat["value"], float)
    assert flat["bad"] is None  # NaN is "unknown", stored as an empty cell


def _rec(i: int, status: str = "ok", **result) -> BatchRecord:
    base = {"x_gate": "PA", "y_gate": "PB", "slopes": {"dot1": -2.0 - i},
            "quality": {"ok": status == "ok", "warnings": [] if status == "ok" else ["doubt"]}}
    base.update(result)
    return BatchRecord(file=f"m{i}.nc", hash=f"{i:016x}", status=status, order=i,
                       result=None if status == "failed" else base,
                       reason="corrupt" if status == "failed" else None, elapsed_s=0.1)


def test_records_round_trip_and_tables_hold_one_row_per_record(tmp_path):
    store = ResultStore(tmp_path)
    store.create()
    recs = [_rec(2), _rec(0, "doubtful"), _rec(1, "failed")]
    for r in recs:
        store.write(r)
    loaded = store.load()
    assert set(loaded) == {r.hash for r in recs}
    assert loaded[recs[0].hash] == recs[0]
    store.write_tables(loaded.values())
    with open(tmp_path / "results.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [r["file"] for r in rows] == ["m0.nc", "m1.nc", "m2.nc"]  # input order
    assert [r["status"] for r in rows] == ["doubtful", "failed", "ok"]
    assert rows[1]["reason"] == "corrupt" and rows[1]["slopes.dot1"] == ""
    assert float(rows[2]["slopes.dot1"]) == -4.0
    assert rows[0]["warnings"] == "doubt"
    ds = xr.open_dataset(tmp_path / "results.nc", engine="h5netcdf")
    assert list(ds["file"].values) == ["m0.nc", "m1.nc", "m2.nc"]
    np.testing.assert_allclose(ds["slopes.dot1"].values, [-2.0, np.nan, -4.0])
    assert ds["hash"].values[2] == recs[0].hash


def test_a_record_is_rewritten_in_place_not_duplicated(tmp_path):
    store = ResultStore(tmp_path)
    store.create()
    store.write(_rec(0, "failed"))
    store.write(_rec(0, "ok"))
    loaded = store.load()
    assert len(loaded) == 1 and next(iter(loaded.values())).status == "ok"
    assert json.loads(store.record_path(_rec(0).hash).read_text())["status"] == "ok"


def test_stray_temporary_files_from_a_kill_are_ignored_and_removed(tmp_path):
    store = ResultStore(tmp_path)
    store.create()
    store.write(_rec(0))
    (store.records_dir / ".tmp-abc.json").write_text('{"file": "half')
    assert len(store.load()) == 1
    store.create()
    assert not list(store.records_dir.glob(".tmp-*"))


def test_unknown_status_is_rejected():
    with pytest.raises(ValueError, match="status"):
        BatchRecord(file="a", hash="b", status="great")


def test_a_record_row_is_flattened_once_and_handed_out_as_a_copy():
    res = {"x_gate": "PA", "y_gate": "PB", "slopes": {"dot1": -2.5, "dot2": np.float64("nan")},
           "virtual_gate_matrix": np.array([[1.0, 0.4], [0.3, 1.0]]), "quality": {"ok": False, "warnings": ["a", "b"]}}
    rec = BatchRecord(file="m.nc", hash="0" * 16, status="doubtful", result=res)
    row = rec.row()
    # the flat columns are those of flatten_result (numpy types to plain JSON, NaN to None)
    assert row["slopes.dot1"] == -2.5 and row["slopes.dot2"] is None
    assert row["virtual_gate_matrix.0.1"] == 0.4 and type(row["virtual_gate_matrix.0.1"]) is float
    assert row["warnings"] == "a | b" and row["x_gate"] == "PA"
    row["slopes.dot1"] = 0.0  # a caller editing its row does not change the record's
    assert rec.row()["slopes.dot1"] == -2.5
    assert rec == BatchRecord(file="m.nc", hash="0" * 16, status="doubtful", result=res)


def _plain(result):
    from stabtool.batch.store import _jsonable

    return _jsonable(result)


def test_a_record_with_a_plain_result_is_stored_as_the_converted_one():
    """The workers send plain JSON; storing it as it is gives the same record as converting it again."""
    result = {"slopes": {"dot1": -2.5, "dot2": None}, "m": [[1.0, 0.4], [0.45, 1.0]], "ok": True}
    rec = BatchRecord(file="a.nc", hash="h1", status="ok", elapsed_s=float("nan"), result=_plain(result))
    assert rec.to_dict(plain_result=True) == rec.to_dict()
    assert json.dumps(rec.to_dict(plain_result=True)) == json.dumps(rec.to_dict())


def test_the_table_rebuilt_with_its_cache_is_the_table_written_afresh(tmp_path):
    """The batch rebuilds results.csv as maps arrive, reusing rendered lines: same bytes as a fresh write."""
    from stabtool.batch.store import write_csv

    def rec(i, extra=None):
        result = {"slopes": {"dot1": -2.5 + i, "dot2": 0.1 * i}, "quality": {"ok": i % 2 == 0, "warnings": []}}
        if extra:
            result["new_number"] = extra  # a column the first records do not have
        return BatchRecord(file=f"m{i}.nc", hash=f"h{i}", status="ok", order=i, elapsed_s=0.5, result=result)

    cache: dict = {}
    records = [rec(i) for i in (3, 1, 2)]
    write_csv(tmp_path / "run.csv", records, cache=cache)
    for more in ([rec(0)], [rec(5, extra=7.5)], [BatchRecord(file="m1.nc", hash="h1", status="failed", order=1)]):
        records = [r for r in records if r.hash not in {m.hash for m in more}] + more  # incl. a rerun of h1
        write_csv(tmp_path / "run.csv", records, cache=cache)
        write_csv(tmp_path / "fresh.csv", records)
        assert (tmp_path / "run.csv").read_bytes() == (tmp_path / "fresh.csv").read_bytes()
    rows = list(csv.DictReader((tmp_path / "run.csv").open()))
    assert [r["hash"] for r in rows] == ["h0", "h1", "h2", "h3", "h5"]  # input order
    assert rows[1]["status"] == "failed" and rows[4]["new_number"] == "7.5" and rows[0]["new_number"] == ""
