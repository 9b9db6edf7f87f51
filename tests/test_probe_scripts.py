"""The held-out probe's record of each map (``--jsonl``) and the comparison of two runs.

A change of the analysis is judged on the probe by comparing a run before and
after it; the records must carry what that judgement needs (the verdict, the
errors against the truth and the silent-failure flag), and the comparison must
show every map that changed, a new silent failure marked.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "scripts"))
import probe_compare
import probe_heldout


@pytest.fixture(scope="module")
def records(tmp_path_factory):
    out = tmp_path_factory.mktemp("probe") / "run.jsonl"
    assert probe_heldout.main(["--seeds", "3", "--size", "60:70", "--jsonl", str(out)]) == 0
    return out


def test_every_map_gets_a_record_with_its_verdict_errors_and_truth(records):
    (rec,) = [json.loads(line) for line in records.read_text().splitlines()]
    assert rec["seed"] == 3
    for key in ("ok", "silent", "beyond", "vg", "cdg", "warnings", "blockers", "snr", "sensor"):
        assert key in rec
    assert rec["true_virtual_gate_matrix"] is not None  # the truth beside the reported matrix
    assert "virtual_gate_matrix_error" in rec


def test_a_run_compared_with_itself_shows_no_change(records, capsys):
    assert probe_compare.main([str(records), str(records)]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out == ["1 maps: ok {0} → {0}, silent 0 → 0, within the bounds {1} → {1}".format(
        *probe_compare.counts([json.loads(records.read_text())])[::2])]


def test_a_new_silent_failure_is_counted_and_marked(records, tmp_path):
    rec = json.loads(records.read_text())
    worse = dict(rec, ok=True, silent=True, beyond=["vg"], vg=0.05, warnings=rec["warnings"] + ["a new note"])
    other = tmp_path / "new.jsonl"
    other.write_text(json.dumps(worse) + "\n")
    lines = probe_compare.compare(probe_compare.load(str(records)), probe_compare.load(str(other)))
    assert "silent 0 → 1" in lines[0]
    assert lines[1].startswith("  seed 3:") and lines[1].endswith("SILENT")
    assert lines[2] == "      + a new note"


def test_the_cross_talk_option_draws_strong_cross_talk_and_leaves_the_rest_of_the_seed_alone():
    import numpy as np

    plain, strong = probe_heldout.make_map(3), probe_heldout.make_map(3, cross_fraction=(0.5, 0.85))
    m_plain = np.asarray(plain.truth["virtual_gate_matrix"], float)
    m_strong = np.asarray(strong.truth["virtual_gate_matrix"], float)
    # the default draw puts each fraction in 0.05–0.5, so M12·M21 = u1·u2 ≤ ¼; the option in 0.25–0.72
    assert m_plain[0, 1] * m_plain[1, 0] <= 0.25
    assert 0.25 <= m_strong[0, 1] * m_strong[1, 0] <= 0.85**2
    # the sensor, noise and temperature of the seed are drawn as without the option
    assert {k: plain.meta[k] for k in ("sensor", "noise", "snr", "T")} == \
        {k: strong.meta[k] for k in ("sensor", "noise", "snr", "T")}
