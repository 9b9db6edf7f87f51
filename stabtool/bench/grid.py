"""The case grid of the benchmark: SNR × device preset × artefact.

A :class:`BenchCase` is a small, picklable description of one synthetic map
(what to generate, with which seed); the map itself is generated inside the
worker that analyses it (:func:`stabtool.bench.cases.make_case_map`).

Grid order
----------
Case ``i`` takes SNR ``SNRS[i % 6]``, artefact ``ARTEFACTS[(i // 6) % 6]`` and
preset ``PRESETS[(i // 36 + s + 2 a + a // 2) % 4]`` (``s``, ``a``: SNR and
artefact indices). Every block of 36 consecutive cases therefore covers each
(SNR, artefact) pair once, with each preset 9 times and every SNR and every
artefact on at least three presets; every block of 144 covers each
(SNR, preset, artefact) triple once; cases beyond
144 repeat the grid with fresh seeds. A truncated grid (``n_cases`` < 144)
stays balanced over SNR and artefact.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from ..errors import InputError

__all__ = [
    "ARTEFACTS",
    "ARTEFACT_LABELS",
    "DEFAULT_SIZE_PX",
    "FULL_GRID_SIZE",
    "PRESETS",
    "QUICK_CASES",
    "SNRS",
    "BenchCase",
    "build_grid",
]

#: Signal-to-noise ratios (charge-step height / white-noise std).
SNRS: tuple[float, ...] = (1.0, 2.0, 3.0, 5.0, 10.0, 30.0)
#: Device presets of the generator.
PRESETS: tuple[str, ...] = ("gaas-double", "si-mos-double", "si-sige-double", "ge-double")
#: Artefact scenarios (one switched on per map besides white noise).
ARTEFACTS: tuple[str, ...] = (
    "none",
    "one-over-f",
    "telegraph",
    "jump",
    "partial-sweep",
    "decreasing-anisotropic",
)
#: Short labels of the artefacts for tables and plots.
ARTEFACT_LABELS: dict[str, str] = {
    "none": "none",
    "one-over-f": "1/f",
    "telegraph": "telegraph",
    "jump": "jump",
    "partial-sweep": "partial",
    "decreasing-anisotropic": "decr+aniso",
}
FULL_GRID_SIZE = len(SNRS) * len(PRESETS) * len(ARTEFACTS)
#: Pixels along each axis of the default maps (chosen for the 5-minute budget).
DEFAULT_SIZE_PX = 112
#: Number of cases of ``--quick`` (each SNR × artefact pair once).
QUICK_CASES = len(SNRS) * len(ARTEFACTS)


@dataclass(frozen=True)
class BenchCase:
    """One map of the benchmark.

    Attributes
    ----------
    index : int
        Position in the grid (0-based).
    snr : float
        Target signal-to-noise ratio.
    preset : str
        Generator device preset.
    artefact : str
        Artefact scenario, one of :data:`ARTEFACTS`.
    seed : int
        Seed of this map (derived from the run seed and ``index``).
    size_px : int
        Pixels along the longer axis.
    """

    index: int
    snr: float
    preset: str
    artefact: str
    seed: int
    size_px: int = DEFAULT_SIZE_PX

    def to_dict(self) -> dict:
        """JSON form."""
        return asdict(self)

    @property
    def label(self) -> str:
        """Short one-line description, e.g. ``#7 gaas-double SNR 3 telegraph``."""
        return f"#{self.index} {self.preset} SNR {self.snr:g} {ARTEFACT_LABELS[self.artefact]}"


def _case_seed(seed: int, index: int) -> int:
    return int(np.random.SeedSequence([int(seed), int(index)]).generate_state(1)[0])


def build_grid(
    *,
    n_cases: int | None = None,
    seed: int = 0,
    quick: bool = False,
    size_px: int = DEFAULT_SIZE_PX,
    snrs: tuple[float, ...] = SNRS,
    presets: tuple[str, ...] = PRESETS,
    artefacts: tuple[str, ...] = ARTEFACTS,
) -> tuple[BenchCase, ...]:
    """Build the benchmark cases.

    Parameters
    ----------
    n_cases : int, optional
        Number of maps. Default: the full grid (144 maps) or, with ``quick``,
        one map per (SNR, artefact) pair (36 maps).
    seed : int
        Run seed; each map's seed is derived from it and the case index, so
        the same ``(seed, n_cases)`` always gives the same maps.
    quick : bool
        Use the quick default size (see ``n_cases``).
    size_px : int
        Pixels along each axis (at least 32).
    snrs, presets, artefacts : tuple
        The grid axes (defaults :data:`SNRS`, :data:`PRESETS`, :data:`ARTEFACTS`).

    Returns
    -------
    tuple of BenchCase
        In grid order (see the module docstring).
    """
    if n_cases is None:
        n_cases = len(snrs) * len(artefacts) if quick else len(snrs) * len(presets) * len(artefacts)
    if int(n_cases) < 1:
        raise InputError("--cases", f"the number of cases must be at least 1, got {n_cases}")
    if int(size_px) < 32:
        raise InputError("--size", f"maps need at least 32 pixels per axis, got {size_px}")
    unknown = [a for a in artefacts if a not in ARTEFACT_LABELS]
    if unknown:
        raise InputError("artefacts", f"unknown artefact(s) {unknown}; expected some of {list(ARTEFACTS)}")
    ns, na, npre = len(snrs), len(artefacts), len(presets)
    cases = []
    for i in range(int(n_cases)):
        si = i % ns
        ai = (i // ns) % na
        pi = (i // (ns * na) + si + 2 * ai + ai // 2) % npre
        cases.append(
            BenchCase(
                index=i,
                snr=float(snrs[si]),
                preset=presets[pi],
                artefact=artefacts[ai],
                seed=_case_seed(seed, i),
                size_px=int(size_px),
            )
        )
    return tuple(cases)
