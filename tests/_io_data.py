"""Small hand-made maps for the loader tests (format tests, no physics)."""

from __future__ import annotations

import numpy as np

from stabtool.mapdata import make_map


def small_map(*, nan_tail: bool = True, decreasing_y: bool = True):
    """5 × 7 map of gates PA (x) and PB (y) in mV, quantity sensor in nA."""
    x = np.linspace(-10.0, 20.0, 7)
    y = np.linspace(5.0, -5.0, 5) if decreasing_y else np.linspace(-5.0, 5.0, 5)
    sig = np.add.outer(np.arange(5.0) * 0.5, np.arange(7.0) ** 2) + 0.125
    if nan_tail:
        sig[-1, 4:] = np.nan
    return make_map(
        sig, x, y, x_gate="PA", y_gate="PB", name="sensor", units="nA",
        x_units="mV", y_units="mV",
        attrs={"device": "kestrel-7", "stabtool_truth": '{"alpha": [[0.1, 0.02], [0.03, 0.09]]}'},
    )


def write_long(path, rows, header="PA (mV),PB (mV),sensor (nA)"):
    text = header + "\n" + "\n".join(",".join(str(v) for v in r) for r in rows) + "\n"
    path.write_text(text)
    return path
