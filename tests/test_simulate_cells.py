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
from stabtool.simulate.cells import ground_state_plane as cells_ground_state_plane
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


@pytest.mark.parametrize("box_max", [4096, 1])
def test_eight_dot_random_device_map_matches_brute_force(monkeypatch, box_max):
    # box_max = 1 forces the path without the candidate box (grid seeds, certificate rounds)
    cells_mod = importlib.import_module("stabtool.simulate.cells")
    monkeypatch.setattr(cells_mod, "_BOX_MAX", box_max)
    rng = np.random.default_rng(808)
    _, cdd = random_device(8, rng)
    ec = E_AC * np.linalg.inv(cdd)
    ny, nx = 30, 34
    origin = rng.uniform(-0.2, 0.4, 8)
    du = rng.uniform(0.0, 0.2, 8) * 1.8 / nx
    dw = rng.uniform(0.0, 0.2, 8) * 1.8 / ny
    du[3], dw[4] = 1.8 / nx, 1.8 / ny  # the middle pair is swept across several lines
    ours = cells_mod.ground_state_plane(origin, du, dw, (ny, nx), ec)
    n0 = origin + np.arange(nx)[None, :, None] * du + np.arange(ny)[:, None, None] * dw
    brute = gs.brute_force_ground_state(n0, ec, np.zeros(8), np.full(8, 3))
    assert brute.max() < 3  # the window held the minimum
    assert len({tuple(s) for s in brute.reshape(-1, 8).tolist()}) > 8  # several cells
    np.testing.assert_array_equal(ours, brute)


def test_exact_ties_go_to_the_lexicographically_smallest_state():
    # Dyadic E_C, induced charges and steps make every energy exact in floating point, so a
    # pixel can sit exactly on a cell boundary. Brute-force enumeration in lexicographic order
    # with argmin then returns the first (smallest) degenerate state; the cells must agree.
    ec = np.array([[4.0, 1.0, 0.5], [1.0, 4.0, 1.0], [0.5, 1.0, 4.0]]) / 256  # eV
    su = np.array([1 / 32, 1 / 128, 0.0])
    sw = np.array([1 / 128, 1 / 32, 1 / 256])
    ny, nx = 24, 32
    row, col = 12, 20
    n_here, v = np.array([1, 1, 1]), np.array([0, 0, 1])
    # shift n0 along dot 3 so that U(N) = U(N + v) at the pixel: ½vᵀEv + vᵀE(N − n0) = 0
    base = np.array([0.25, 0.25, 0.75])
    n0_pix = base + col * su + row * sw
    shift = (0.5 * v @ ec @ v + v @ ec @ (n_here - n0_pix)) / ec[2, 2]
    n00 = base + np.array([0.0, 0.0, shift])
    n0 = n00 + np.arange(nx)[None, :, None] * su + np.arange(ny)[:, None, None] * sw
    states = np.stack(np.meshgrid(*[np.arange(5)] * 3, indexing="ij"), axis=-1).reshape(-1, 3)
    energy = gs.ci_energy(states, n0[row, col], ec)
    degenerate = states[energy == energy.min()]
    np.testing.assert_array_equal(degenerate, [[1, 1, 1], [1, 1, 2]])  # an exact two-fold tie
    brute = gs.brute_force_ground_state(n0, ec, np.zeros(3), np.full(3, 4))
    assert brute.max() < 4
    ours = cells_ground_state_plane(n00, su, sw, (ny, nx), ec)
    np.testing.assert_array_equal(ours[row, col], [1, 1, 1])
    np.testing.assert_array_equal(ours, brute)
    cells = plane_cells(n00, su, sw, (ny, nx), ec)
    np.testing.assert_array_equal(rasterize_cells(cells), brute)


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


def test_candidate_box_lists_every_state_in_lexicographic_order():
    # reference: itertools.product enumerates a box in lexicographic order
    import itertools

    from stabtool.simulate.cells import _box

    corner = np.array([[0, 2, 1, 3], [1, 0, 3, 3], [2, 2, 1, 3], [0, 1, 2, 3]])
    expected = np.array(list(itertools.product(range(3), range(3), range(1, 4), range(3, 4))))
    np.testing.assert_array_equal(_box(corner), expected)
    assert _box(np.array([[0] * 8, [5] * 8])) is None  # 6⁸ states: too many for one hull


def test_hull_facets_are_those_of_scipy_convex_hull():
    # reference: scipy.spatial.ConvexHull (Qhull, triangulated output)
    from scipy.spatial import ConvexHull

    from stabtool.simulate.cells import _hull

    pts = np.random.default_rng(7).normal(size=(200, 3))
    simp, eq = _hull(pts)
    ref = ConvexHull(pts, qhull_options="Qt")
    np.testing.assert_array_equal(np.sort(simp, axis=1), np.sort(ref.simplices, axis=1))
    np.testing.assert_allclose(eq, ref.equations, rtol=0, atol=1e-12)
    # every point lies inside or on every facet plane: n·p + d ≤ 0
    assert np.all(pts @ eq[:, :3].T + eq[:, 3] <= 1e-12)
