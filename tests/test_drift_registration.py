"""Registration of one sweep to another: the pattern offset in volts.

Sweeps with a known pattern offset are made physically: by the
constant-interaction model (van der Wiel et al., Rev. Mod. Phys. 75, 1
(2003)) the dots' electrochemical potentials depend on ``Cdg·V + e·q0``, so
changing the offset charges by ``Δq0 = −Cdg·ΔV/e`` moves every transition
line by exactly ``ΔV`` in gate space.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from stabtool.batch.drift import _tukey, register_maps
from stabtool.errors import InputError
from stabtool.physics.constants import E_AC
from stabtool.simulate import Artefacts, SensorModel, double_dot_window, presets, simulate_map

PRESET = "si-sige-double"


def drifted_device(shift_V=(0.0, 0.0)):
    """The preset double dot with its charge pattern moved by ``shift_V`` along (PA, PB)."""
    dev = presets.get(PRESET)
    cdg = dev.cdg[:, [dev.gate_index("PA"), dev.gate_index("PB")]]
    q = dev.offsets - cdg @ np.asarray(shift_V, dtype=float) / E_AC
    return dataclasses.replace(dev, offset_charge_e=tuple(q))


def sweep(shift_V=(0.0, 0.0), *, window=None, shape=(64, 64), snr=12.0, seed=0, **art):
    dev = drifted_device(shift_V)
    if window is None:
        window = double_dot_window(presets.get(PRESET), x_gate="PA", y_gate="PB", electrons=4.0)
    xr_, yr_ = window
    return simulate_map(dev, x_gate="PA", y_gate="PB", x_range_V=xr_, y_range_V=yr_, shape=shape,
                        temperature_K=0.1, sensor=SensorModel(compensation=0.85),
                        artefacts=Artefacts(snr=snr, **art), rng=seed).data


def steps(da):
    return float(abs(np.diff(da["PA"].values).mean())), float(abs(np.diff(da["PB"].values).mean()))


@pytest.mark.regression
@pytest.mark.parametrize("shift_px", [(1.37, -0.62), (-3.2, 2.45)])
def test_known_pattern_offset_is_recovered_within_a_fraction_of_a_pixel(shift_px):
    ref = sweep(seed=1)
    sx, sy = steps(ref)
    shift_V = (shift_px[0] * sx, shift_px[1] * sy)
    reg = register_maps(ref, sweep(shift_V, seed=2))
    assert reg.offset_x_V == pytest.approx(shift_V[0], abs=0.2 * sx)
    assert reg.offset_y_V == pytest.approx(shift_V[1], abs=0.2 * sy)
    assert reg.match > 0.5 and reg.overlap == pytest.approx(1.0)


@pytest.mark.regression
def test_a_shifted_but_correctly_labelled_window_shows_no_pattern_offset():
    """The offset is measured in volts: moving the sweep window is not drift."""
    (x0, x1), (y0, y1) = double_dot_window(presets.get(PRESET), x_gate="PA", y_gate="PB", electrons=4.0)
    ref = sweep(seed=3)
    sx, sy = steps(ref)
    moved = sweep(window=((x0 + 5.3 * sx, x1 + 5.3 * sx), (y0 - 3.6 * sy, y1 - 3.6 * sy)), seed=4)
    reg = register_maps(ref, moved)
    assert reg.offset_x_V == pytest.approx(0.0, abs=0.2 * sx)
    assert reg.offset_y_V == pytest.approx(0.0, abs=0.2 * sy)
    assert 0.75 < reg.overlap < 0.95


@pytest.mark.regression
def test_other_step_and_a_decreasing_axis_are_handled_in_volts():
    ref = sweep(seed=5)
    sx, sy = steps(ref)
    shift_V = (2.3 * sx, 1.1 * sy)
    moving = sweep(shift_V, shape=(80, 72), seed=6, decreasing_x=True)
    assert moving["PA"].values[0] > moving["PA"].values[-1]
    reg = register_maps(ref, moving)
    assert reg.offset_x_V == pytest.approx(shift_V[0], abs=0.2 * sx)
    assert reg.offset_y_V == pytest.approx(shift_V[1], abs=0.2 * sy)


@pytest.mark.regression
def test_a_sweep_with_missing_rows_still_registers():
    ref = sweep(seed=7)
    sx, sy = steps(ref)
    shift_V = (-1.4 * sx, 0.8 * sy)
    reg = register_maps(ref, sweep(shift_V, seed=8, interrupted=0.4))
    assert reg.offset_x_V == pytest.approx(shift_V[0], abs=0.2 * sx)
    assert reg.offset_y_V == pytest.approx(shift_V[1], abs=0.2 * sy)
    assert 0.55 < reg.overlap < 0.7  # about 60 % of the rows were measured


def test_sweeps_of_other_gates_are_refused():
    ref = sweep(seed=1)
    other = ref.rename({"PA": "SG"})
    with pytest.raises(InputError, match="same gates"):
        register_maps(ref, other)


def test_tukey_window_matches_scipy():
    from scipy.signal.windows import tukey  # reference implementation

    for n in (5, 64, 97):
        np.testing.assert_allclose(_tukey(n, 0.3), tukey(n, 0.3), atol=1e-12)


def test_reused_transforms_give_the_same_registration_as_fresh_ones():
    """The series keeps each sweep's windowed FFT: offsets, match and overlap are those of a fresh run,
    also when the crop box changes between pairs (missing rows) and an image array is reused."""
    from stabtool.batch.drift import _register_images

    rng = np.random.default_rng(3)
    base = rng.normal(size=(48, 56))
    ref = base.copy()
    mov = np.roll(base, (2, -3), axis=(0, 1)) + 0.1 * rng.normal(size=base.shape)
    cut = mov.copy()
    cut[40:] = np.nan  # an interrupted sweep: another crop box for the pairs with it
    cache: dict = {}
    for a, b in ((ref, mov), (ref, cut), (mov, cut), (ref, mov), (cut, mov)):
        fresh = _register_images(a, b, upsample=20)
        again = _register_images(a, b, upsample=20, cache=cache)
        np.testing.assert_array_equal(np.array(again), np.array(fresh))
    # np.roll by (2, −3) moves the pattern 2 rows up the array and 3 columns back: (dy, dx) = (2, −3)
    assert _register_images(ref, mov, upsample=20)[:2] == pytest.approx((2.0, -3.0), abs=0.1)
