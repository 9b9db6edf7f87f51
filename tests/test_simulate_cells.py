"""Exact cells of a plane sweep and the block test of the thermal mask, against brute force.

Reference: direct minimisation of U(N) = ½ (N − n₀)ᵀ E_C (N − n₀) over every
state of a window (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)); the
excitation energies of the thermal average evaluated at every pixel.
"""

import importlib

import numpy as np
import pytest

from stabtool.physics.constants import E_AC, KB_EV_PER_K
from stabtool.simulate import presets
from stabtool.simulate.cells import plane_cells, rasterize_cells
from stabtool.simulate.occupation import averaging_cut, near_transition_mask, occupations
from stabtool.simulate.quick import double_dot_window
from stabtool.simulate.render import _ground_map, _induced

from _simulate import random_device

gs = importlib.import_module("stabtool.simulate.ground_state")


@pytest.mark.parametrize("n", [2, 3, 4, 5, 8])
def test_cells_of_a_plane_sweep_match_brute_force(n):
    rng = np.random.default_rng(300 + n)
    for _ in range(2):
        cg, cdd = random_device(n, rng)
        ec = E_AC * np.linalg.inv(cdd)
        ny, nx = (31, 47) if n <= 5 else (19, 23)
        span, top = (3.0, 5) if n <= 5 else (1.6, 3)
        origin = rng.uniform(-0.6, 0.3, n)  # starts in or near full depletion (N ≥ 0 active)
        du = rng.uniform(-0.1, 0.4, n) * span / nx
        dw = rng.uniform(-0.1, 0.4, n) * span / ny
        du[0], dw[min(1, n - 1)] = span / nx, span / ny
        cells = plane_cells(origin, du, dw, (ny, nx), ec)
        assert cells is not None
        ours = rasterize_cells(cells)
        n0 = origin + np.arange(nx)[None, :, None] * du + np.arange(ny)[:, None, None] * dw
        brute = gs.brute_force_ground_state(n0, ec, np.zeros(n), np.full(n, top))
        assert brute.max() < top  # the window held the minimum
        np.testing.assert_array_equal(ours, brute)
        # the cells tile the window: areas add up, one cell per state found in the map
        area = sum(
            0.5 * abs(np.dot(p[:, 0], np.roll(p[:, 1], -1)) - np.dot(p[:, 1], np.roll(p[:, 0], -1)))
            for p in cells.polygons if len(p) >= 3
        )
        assert area == pytest.approx((nx - 1) * (ny - 1), rel=1e-9)
        assert {tuple(s) for s in brute.reshape(-1, n).tolist()} <= {tuple(s) for s in cells.states.tolist()}


def test_eight_dot_preset_map_from_cells_matches_brute_force():
    arr = presets.get("linear-array-8")
    xr_, yr_ = double_dot_window(arr, x_gate="P4", y_gate="P5", electrons=3.0)
    x, y = np.linspace(*xr_, 18), np.linspace(yr_[1], yr_[0], 16)  # decreasing y axis
    fixed = {g: 0.0 for g in arr.gate_names if g not in ("P4", "P5")}
    ours = _ground_map(arr, x, y, "P4", "P5", fixed)
    n0 = _induced(arr, x, y, "P4", "P5", fixed)
    lo, hi = ours.reshape(-1, 8).min(0), ours.reshape(-1, 8).max(0)
    brute = gs.brute_force_ground_state(n0, arr.ec_eV, np.maximum(lo - 1, 0), hi + 1)
    np.testing.assert_array_equal(ours, brute)


def test_row_scan_without_certificate_is_exact_for_two_and_three_dots():
    # with every Voronoi-relevant vector as a move the event scan needs no certificate
    rng = np.random.default_rng(11)
    for n in (2, 3):
        cg, cdd = random_device(n, rng)
        ec = E_AC * np.linalg.inv(cdd)
        first = rng.uniform(-0.5, 0.2, n) + np.arange(30)[:, None] * rng.uniform(0.0, 0.12, n)
        first[:, -1] += np.arange(30) * 0.1
        step = rng.uniform(0.0, 0.02, n)
        step[0] = 0.08
        ours = gs.ground_state_rows(first, step, 45, ec, certify=False)
        n0 = first[:, None, :] + np.arange(45)[None, :, None] * step
        brute = gs.brute_force_ground_state(n0, ec, np.zeros(n), np.full(n, 6))
        np.testing.assert_array_equal(ours, brute)


@pytest.mark.parametrize("preset,T", [("si-sige-double", 0.1), ("gaas-double", 0.1), ("linear-array-4", 0.3)])
def test_thermal_block_mask_keeps_every_pixel_that_needs_averaging(preset, T):
    dev = presets.get(preset)
    inf = presets.info(preset)
    xr_, yr_ = double_dot_window(dev, x_gate=inf.x_gate, y_gate=inf.y_gate)
    x, y = np.linspace(*xr_, 90), np.linspace(*yr_, 70)
    fixed = {g: 0.0 for g in dev.gate_names if g not in (inf.x_gate, inf.y_gate)}
    ground = _ground_map(dev, x, y, inf.x_gate, inf.y_gate, fixed)
    n0 = _induced(dev, x, y, inf.x_gate, inf.y_gate, fixed)
    kT = KB_EV_PER_K * T
    cut = averaging_cut(kT)
    nd = dev.n_dots
    du = gs.excitation_energies(ground.reshape(-1, nd), n0.reshape(-1, nd), dev.ec_eV, gs.basic_moves(nd))
    needed = (du.min(axis=1) < cut).reshape(ground.shape[:2])  # pixel-by-pixel rule
    for block in (4, 16):
        exact = near_transition_mask(n0, ground, dev.ec_eV, cut_eV=cut, block=block)
        np.testing.assert_array_equal(exact, needed)  # block subdivision = the pixel-by-pixel rule
        coarse = near_transition_mask(n0, ground, dev.ec_eV, cut_eV=cut, block=block, finest=4)
        assert not np.any(needed & ~coarse)  # a superset: never skips a pixel that needs averaging
    assert 0.01 < needed.mean() < 0.9  # the test map has both kinds of pixels
    mask = near_transition_mask(n0, ground, dev.ec_eV, cut_eV=cut, block=8)
    full = occupations(n0, dev.ec_eV, ground, kT_eV=kT).mean
    fast = occupations(n0, dev.ec_eV, ground, kT_eV=kT, near=mask).mean
    np.testing.assert_allclose(fast, full, rtol=0, atol=1e-12)
