"""Helpers shared by the generator tests."""

from __future__ import annotations

import numpy as np


def random_device(n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """A physical random device of ``n`` dots and ``n + 1`` gates: ``(Cdg, Cdd)`` in aF.

    Cdd is an M-matrix whose diagonal (total capacitance) is at least the sum
    of the gate and mutual capacitances of the dot.
    """
    cm = np.zeros((n, n))
    for i in range(n):
        for j in range(i + 1, n):
            near = abs(i - j) == 1
            cm[i, j] = cm[j, i] = rng.uniform(2, 30) if near else rng.uniform(0, 6)
    cg = rng.uniform(0, 4, (n, n + 1))
    cg[np.arange(n), np.arange(n)] = rng.uniform(5, 15, n)
    ctot = cg.sum(1) + cm.sum(1) + rng.uniform(5, 60, n)
    return cg, np.diag(ctot) - cm


def double_dot_charge_map(cdg_aF, cdd_aF, *, electrons: float, shape: tuple[int, int], temperature_K: float,
                          rng: int = 0):
    """A generator map (charge read-out, gates PA on x and PB on y) of a double dot given by its
    capacitances, over a window of about ``electrons`` transitions of each dot."""
    from stabtool.simulate import simulate_map
    from stabtool.simulate.device import Device
    from stabtool.simulate.quick import double_dot_window

    dev = Device(cdg_aF=cdg_aF, cdd_aF=cdd_aF, gate_names=["PA", "PB"], dot_names=["L", "R"])
    xr_, yr_ = double_dot_window(dev, x_gate="PA", y_gate="PB", electrons=electrons)
    return simulate_map(dev, x_gate="PA", y_gate="PB", x_range_V=xr_, y_range_V=yr_, shape=shape,
                        temperature_K=temperature_K, readout="charge", rng=rng)
