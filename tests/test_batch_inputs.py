"""Batch inputs: files, folders and globs become one ordered list of distinct map files."""

from __future__ import annotations

from pathlib import Path

import pytest

from stabtool.batch.inputs import discover_inputs, natural_key
from stabtool.errors import InputError


def _touch(p: Path) -> Path:
    p.parent.mkdir(parents=True, exist_ok=True)
    p.write_text("x")
    return p


def test_folder_is_searched_recursively_in_natural_order_skipping_hidden_and_unknown(tmp_path):
    for name in ["run10.nc", "run2.csv", "run1.npz", "notes.pdf", "sub/run3.tsv", ".records/a.nc"]:
        _touch(tmp_path / name)
    found = [p.relative_to(tmp_path).as_posix() for p in discover_inputs([tmp_path])]
    assert found == ["run1.npz", "run2.csv", "run10.nc", "sub/run3.tsv"]


def test_explicit_files_are_kept_whatever_their_suffix_and_listed_once(tmp_path):
    a = _touch(tmp_path / "a.nc")
    odd = _touch(tmp_path / "odd.bin")
    found = discover_inputs([odd, a, tmp_path / "a.nc", tmp_path])
    assert found[0] == odd and found[1] == a
    assert len(found) == len({p.resolve() for p in found})


def test_glob_patterns_expand_and_the_output_folder_is_excluded(tmp_path):
    _touch(tmp_path / "night" / "m1.nc")
    _touch(tmp_path / "night" / "m2.nc")
    _touch(tmp_path / "night" / "out" / "m3.nc")
    found = discover_inputs([str(tmp_path / "night" / "**" / "*.nc")], exclude=[tmp_path / "night" / "out"])
    assert [p.name for p in found] == ["m1.nc", "m2.nc"]


def test_a_folder_named_inside_the_output_folder_is_read_as_given(tmp_path):
    # `stabtool batch data/night1 --out data`: the results land beside night1, not among its maps
    _touch(tmp_path / "data" / "night1" / "m1.nc")
    _touch(tmp_path / "data" / "night1" / "m2.nc")
    _touch(tmp_path / "data" / "results.nc")  # a result of the output folder itself stays out
    found = discover_inputs([tmp_path / "data" / "night1"], exclude=[tmp_path / "data"])
    assert [p.name for p in found] == ["m1.nc", "m2.nc"]
    assert discover_inputs([tmp_path / "data"], exclude=[tmp_path / "data" / "night1"])[0].name == "results.nc"


def test_an_earlier_batchs_results_inside_the_folder_are_not_read_as_maps(tmp_path):
    _touch(tmp_path / "night" / "m1.nc")
    _touch(tmp_path / "night" / "m2.csv")
    for name in ("results.csv", "results.nc", ".records/batch.json"):
        _touch(tmp_path / "night" / "res" / name)
    _touch(tmp_path / "night" / "other" / "m3.nc")  # a folder without records is searched
    found = [p.relative_to(tmp_path / "night").as_posix() for p in discover_inputs([tmp_path / "night"])]
    assert found == ["m1.nc", "m2.csv", "other/m3.nc"]


def test_the_output_folder_may_not_be_an_input_folder(tmp_path, capsys):
    from stabtool.cli.main import main

    night = tmp_path / "night"
    _touch(night / "m1.nc")
    for command in ("batch", "drift"):
        for out in (night, tmp_path / "night" / "."):
            assert main([command, str(night), "--out", str(out)]) == 2
            err = capsys.readouterr().err
            assert err.count("\n") == 1 and "--out is an input folder" in err
    assert sorted(p.name for p in night.iterdir()) == ["m1.nc"]


@pytest.mark.parametrize("bad, fault", [("missing.nc", "no such file or folder"),
                                        ("nothing*.nc", "matches no map file")])
def test_missing_paths_and_empty_globs_are_input_errors_naming_them(tmp_path, bad, fault):
    with pytest.raises(InputError, match=fault) as info:
        discover_inputs([str(tmp_path / bad)])
    assert bad in str(info.value)


def test_an_empty_folder_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="no map file found"):
        discover_inputs([tmp_path])


def test_natural_key_orders_numbers_by_value():
    names = ["s10", "s9", "s100", "S1"]
    assert sorted(names, key=natural_key) == ["S1", "s9", "s10", "s100"]
