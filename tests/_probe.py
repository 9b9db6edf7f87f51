"""The held-out probe's map factory (scripts/probe_heldout.py), importable from the tests.

Probe maps keep the generator's constant-interaction truth but read it through
sensor and noise models the analysis was not tuned on.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "scripts"))
from probe_heldout import make_map

__all__ = ["analysed", "make_map"]


def analysed(pm):
    """The analysis of a probe map at its true electron temperature, warnings silenced."""
    import warnings

    from stabtool.analysis import Analyzer

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return Analyzer(electron_temperature_K=pm.meta["T"])(pm.data)
