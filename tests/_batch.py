"""Helpers of the batch and drift tests: a stand-in pipeline and map writers.

The stand-in exercises the batch machinery (ordering, isolation, resume,
workers) independently of the real analysis: it loads the map with the real
loader and reports simple statistics of it, so its numbers are checkable
against numpy directly.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from stabtool.io import load, save_map
from stabtool.mapdata import make_map


@dataclass(frozen=True)
class StandInResult:
    x_gate: str
    y_gate: str
    mean: float
    nan_fraction: float

    def to_json(self) -> dict:
        ok = self.nan_fraction < 0.05
        return {
            "x_gate": self.x_gate,
            "y_gate": self.y_gate,
            "signal_mean": self.mean,
            "virtual_gate_matrix": [[1.0, 0.5], [0.25, 1.0]],
            "quality": {"ok": ok, "warnings": [] if ok else [f"{100 * self.nan_fraction:.0f} % missing"]},
        }

    def save_plot(self, path: str) -> None:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        fig = Figure(figsize=(2, 2), dpi=50)
        FigureCanvasAgg(fig)
        fig.add_subplot().text(0.5, 0.5, f"{self.mean:.3g}")
        fig.savefig(path, format="png")


@dataclass(frozen=True)
class StandInAnalyzer:
    """Picklable pipeline: loads a map, reports its mean; optional delay and crash."""

    delay_s: float = 0.0
    crash_on: str = ""  # a file-name fragment that makes the worker process die
    hang_on: str = ""  # a file-name fragment whose analysis runs for two minutes, swallowing exceptions

    def analyze_file(self, path: str) -> StandInResult:
        if self.crash_on and self.crash_on in os.path.basename(path):
            os._exit(13)  # simulate a segfault in a worker: no exception, the process is gone
        if self.hang_on and self.hang_on in os.path.basename(path):
            end = time.monotonic() + 120.0
            while time.monotonic() < end:  # a fit that does not stop, with a catch-all fallback inside
                try:
                    time.sleep(0.01)
                except Exception:  # noqa: BLE001, S110 - what a careless fallback in an analysis does
                    pass
        if self.delay_s:
            time.sleep(self.delay_s)
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            da = load(path)
        v = da.values
        return StandInResult(str(da.dims[1]), str(da.dims[0]), float(np.nanmean(v)),
                             float(np.mean(~np.isfinite(v))))


def write_plain_maps(folder: Path, n: int, *, seed: int = 0, shape=(24, 30)) -> list[Path]:
    """n small random maps in rotating formats; returns their paths."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    suffixes = [".nc", ".csv", ".npz", ".tsv"]
    out = []
    for i in range(n):
        sig = rng.normal(size=shape) + i
        da = make_map(sig, np.linspace(0, 30, shape[1]), np.linspace(0, 24, shape[0]),
                      x_gate="PA", y_gate="PB", x_units="mV", y_units="mV", units="nA")
        p = folder / f"map{i:03d}{suffixes[i % len(suffixes)]}"
        save_map(da, p)
        out.append(p)
    return out
