"""The held-out probe's map factory (scripts/probe_heldout.py), importable from the tests.

Probe maps keep the generator's constant-interaction truth but read it through
sensor and noise models the analysis was not tuned on.
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "scripts"))
from probe_heldout import make_map

__all__ = ["make_map"]
