"""Accuracy regression: a small fixed-seed subset of ``stabtool bench`` with the real analysis.

A few generator maps (several presets, clean and noisy, one artefact) go
through the full analysis with the true electron temperature as energy
reference; every number must lie within the bounds of the fitter issue
(stabtool.bench.bounds: virtual-gate elements 0.005 at SNR ≥ 10 and 0.02
below, Cdg 2 %, lever arms 5 % for lines ≥ 3 px wide, charging energies 5 %),
and no map may be a silent failure. No timing is asserted.
"""

from __future__ import annotations

import pytest

from stabtool.bench.bounds import FITTER_BOUNDS
from stabtool.bench.grid import BenchCase
from stabtool.bench.run import run_bench

pytest.importorskip("stabtool.analysis", reason="the analysis pipeline is not in this tree yet")

#: (preset, SNR, artefact, seed): clean maps of three presets, one noisy map, one with 1/f noise.
CASES = (
    ("si-sige-double", 30.0, "none", 11),
    ("gaas-double", 30.0, "none", 12),
    ("si-mos-double", 10.0, "none", 13),
    ("ge-double", 10.0, "one-over-f", 14),
    ("si-sige-double", 3.0, "none", 15),
)


@pytest.fixture(scope="module")
def outcomes():
    cases = [
        BenchCase(index=i, snr=snr, preset=preset, artefact=art, seed=seed, size_px=112)
        for i, (preset, snr, art, seed) in enumerate(CASES)
    ]
    return run_bench(cases, workers=1).outcomes


def _id(case):
    return f"{case[0]}-snr{case[1]:g}-{case[2]}"


#: Cases that miss the fitter bounds today (reported doubtful, so not silent).
#: Strict: when one starts passing, the marker must go.
KNOWN_OUT_OF_BOUNDS = {
    3: "1/f row offsets with weak dot2 steps on a hot map (1.03 K, t = 0): broken dot2 segments (slopes scatter "
    "by 47 %), and a model fit with an interdot tunnel coupling of 115 ± 15 µeV is adopted: M21 0.019 off "
    "(stated 0.020), Cdg 5.5 % off",
    4: "SNR 3 with broad lines: the scale-selected edge map finds the dot2 lines, but slopes of single "
    "15–25 px segments are 10–60 % off (dot2 family ≈ 30 %): no two dot2 lines bound a band, no virtual-gate result",
}


def _cases_with_known_failures():
    return [
        pytest.param(i, id=_id(c), marks=pytest.mark.xfail(strict=True, reason=KNOWN_OUT_OF_BOUNDS[i]))
        if i in KNOWN_OUT_OF_BOUNDS
        else pytest.param(i, id=_id(c))
        for i, c in enumerate(CASES)
    ]


@pytest.mark.regression
@pytest.mark.parametrize("i", _cases_with_known_failures())
def test_every_number_within_the_fitter_bounds(outcomes, i):
    o = outcomes[i]
    assert o.ran, o.message
    limits = FITTER_BOUNDS.for_snr(o.case.snr)
    for group, limit in limits.items():
        g = o.comparison.groups[group]
        assert g.complete, f"{o.case.label}: {group} not reported ({o.warnings})"
        err = g.abs if group == "virtual_gate" else g.rel
        assert err <= limit, f"{o.case.label}: {group} error {err:.4g} > {limit:g}"


@pytest.mark.regression
@pytest.mark.parametrize("i", range(len(CASES)), ids=[_id(c) for c in CASES])
def test_no_silent_failure(outcomes, i):
    o = outcomes[i]
    assert not o.silent.silent, f"{o.case.label}: {'; '.join(o.silent.reasons)}"


@pytest.mark.regression
@pytest.mark.xfail(
    strict=True,
    reason="the clean SNR-30 maps with 3–4 px broad lines state Cdg uncertainties of 1.7 % (si-sige) and "
    "3.1 % (gaas) (> 1 %: the line-based and refined mutual shifts disagree beyond their correlated errors "
    "on a curved sensor), and gaas a virtual-gate error of 0.0031 (> 0.005 / 2σ)",
)
def test_clean_maps_are_reported_ok(outcomes):
    for o in outcomes:
        if o.case.snr >= FITTER_BOUNDS.clean_snr and o.case.artefact == "none":
            assert o.ok, f"{o.case.label}: {o.warnings}"
