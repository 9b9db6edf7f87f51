"""The benchmark's case grid: balanced, reproducible, validated."""

from __future__ import annotations

from collections import Counter

import pytest

from stabtool.bench.grid import ARTEFACTS, FULL_GRID_SIZE, PRESETS, QUICK_CASES, SNRS, build_grid
from stabtool.errors import InputError


def test_grid_axes_are_the_issue_grid():
    assert SNRS == (1.0, 2.0, 3.0, 5.0, 10.0, 30.0)
    assert PRESETS == ("gaas-double", "si-mos-double", "si-sige-double", "ge-double")
    assert len(ARTEFACTS) == 6 and ARTEFACTS[0] == "none"
    assert FULL_GRID_SIZE == 144 and QUICK_CASES == 36


def test_full_grid_has_every_triple_once():
    cases = build_grid(seed=1)
    assert len(cases) == 144
    triples = Counter((c.snr, c.preset, c.artefact) for c in cases)
    assert len(triples) == 144 and set(triples.values()) == {1}
    assert [c.index for c in cases] == list(range(144))


def test_quick_grid_has_every_snr_artefact_pair_once():
    cases = build_grid(quick=True)
    assert len(cases) == 36
    pairs = Counter((c.snr, c.artefact) for c in cases)
    assert len(pairs) == 36 and set(pairs.values()) == {1}
    # presets spread over the quick set too
    assert set(Counter(c.preset for c in cases).values()) == {9}
    for snr in SNRS:
        assert len({c.preset for c in cases if c.snr == snr}) >= 3
    for art in ARTEFACTS:
        assert len({c.preset for c in cases if c.artefact == art}) >= 3


def test_truncated_grid_stays_balanced_over_snr():
    cases = build_grid(n_cases=12)
    assert Counter(c.snr for c in cases) == {s: 2 for s in SNRS}


def test_seeds_are_reproducible_and_distinct():
    a, b, c = build_grid(seed=7), build_grid(seed=7), build_grid(seed=8)
    assert [x.seed for x in a] == [x.seed for x in b]
    assert len({x.seed for x in a}) == len(a)
    assert all(x.seed != y.seed for x, y in zip(a, c))


def test_cases_beyond_the_grid_repeat_it_with_new_seeds():
    cases = build_grid(n_cases=2 * 144)
    first, second = cases[:144], cases[144:]
    assert [(c.snr, c.preset, c.artefact) for c in first] == [(c.snr, c.preset, c.artefact) for c in second]
    assert not {c.seed for c in first} & {c.seed for c in second}


@pytest.mark.parametrize("kw, match", [
    ({"n_cases": 0}, r"--cases: the number of cases must be at least 1, got 0"),
    ({"size_px": 16}, r"--size: maps need at least 32 pixels per axis, got 16"),
    ({"artefacts": ("none", "cosmic-rays")}, r"unknown artefact\(s\) \['cosmic-rays'\]"),
])
def test_bad_grid_options_are_one_line_input_errors(kw, match):
    with pytest.raises(InputError, match=match) as e:
        build_grid(**kw)
    assert "\n" not in str(e.value)
