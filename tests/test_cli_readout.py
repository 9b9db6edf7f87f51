"""``--readout``: the user says what the map measures, for one map (``analyze``) and for a night (``batch``)."""

from __future__ import annotations

import csv
from pathlib import Path

import pytest
from _readout import lockin

from stabtool.analysis import READOUTS, SUM_DOUBT
from stabtool.cli._options import READOUT_CHOICES
from stabtool.cli.main import main
from stabtool.io import save_map
from stabtool.simulate import quick_double_dot


def test_the_command_line_offers_exactly_the_analysis_readouts():
    assert READOUT_CHOICES == READOUTS


def _lockin_file(folder: Path) -> Path:
    sm = quick_double_dot("gaas-double", shape=(96, 96), snr=None, rng=1)
    path = folder / "kestrel-9_lockin.nc"
    save_map(lockin(sm.data), path)
    return path


def _row(out: Path) -> dict:
    with open(out / "results.csv", newline="") as fh:
        (row,) = list(csv.DictReader(fh))
    return row


def test_batch_passes_the_readout_to_every_map_and_resume_keeps_it(tmp_path, capsys):
    src = tmp_path / "night"
    src.mkdir()
    _lockin_file(src)
    out = tmp_path / "out"
    assert main(["batch", str(src), "--out", str(out), "--workers", "1", "--quiet",
                 "--readout", "derivative-x"]) == 0
    row = _row(out)
    assert f"{SUM_DOUBT} x" in row["warnings"], row["warnings"]
    assert row["status"] == "doubtful"  # a summed map is never ok
    # resuming with another read-out would mix two analyses in one table: refused, one line, exit 2
    capsys.readouterr()
    assert main(["batch", str(src), "--out", str(out), "--workers", "1", "--quiet", "--resume",
                 "--readout", "charge"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and "other analysis settings" in err and "Traceback" not in err
    assert _row(out) == row  # nothing already written is lost


def test_batch_with_readout_charge_does_not_sum(tmp_path):
    src = tmp_path / "night"
    src.mkdir()
    _lockin_file(src)
    out = tmp_path / "out"
    assert main(["batch", str(src), "--out", str(out), "--workers", "1", "--quiet", "--readout", "charge"]) == 0
    assert SUM_DOUBT not in _row(out)["warnings"]


def test_batch_rejects_an_unknown_readout_before_writing_anything(tmp_path, capsys):
    with pytest.raises(SystemExit) as exc:  # argparse: usage line, then one error line
        main(["batch", str(tmp_path), "--out", str(tmp_path / "out"), "--readout", "phase"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert "'phase'" in err[-1] and "Traceback" not in "\n".join(err)
    assert not (tmp_path / "out").exists()
