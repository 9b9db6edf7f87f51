"""Exact ground state of the constant-interaction model versus brute-force enumeration.

Reference: direct minimisation of U(N) = ½ (N − n₀)ᵀ E_C (N − n₀) over every
state of a window (van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)).
"""

import importlib

import numpy as np
import pytest

from stabtool.physics.constants import E_AC
from stabtool.simulate import Device, ground_state

from _simulate import random_device

gs = importlib.import_module("stabtool.simulate.ground_state")


@pytest.mark.parametrize("n", [1, 2, 3, 4, 5, 8])
def test_pixelwise_search_matches_brute_force(n):
    rng = np.random.default_rng(100 + n)
    for _ in range(2):
        cg, cdd = random_device(n, rng)
        ec = E_AC * np.linalg.inv(cdd)
        hi, top = (3.4, 5) if n <= 5 else (2.3, 3)
        n0 = rng.uniform(-0.7, hi, (400 if n <= 5 else 150, n))
        ours = gs.ground_state_from_induced(n0, ec)
        brute = gs.brute_force_ground_state(n0, ec, np.zeros(n), np.full(n, top))
        assert brute.max() < top  # the window was large enough to hold the minimum
        np.testing.assert_array_equal(ours, brute)


@pytest.mark.parametrize("n", [2, 3, 5, 8])
def test_row_scan_of_a_plane_sweep_matches_brute_force(n):
    rng = np.random.default_rng(200 + n)
    cg, cdd = random_device(n, rng)
    ec = E_AC * np.linalg.inv(cdd)
    ny, nx = (24, 40) if n <= 5 else (12, 20)
    span, top = (3.0, 5) if n <= 5 else (1.5, 3)
    origin = rng.uniform(-0.5, 0.3, n)
    dx = rng.uniform(0.0, 0.4, n) * span / nx
    dy = rng.uniform(0.0, 0.4, n) * span / ny
    dx[0], dy[min(1, n - 1)] = span / nx, span / ny  # the sweep crosses several lines
    first = origin + np.arange(ny)[:, None] * dy
    ours = gs.ground_state_rows(first, dx, nx, ec)
    n0 = first[:, None, :] + np.arange(nx)[None, :, None] * dx
    brute = gs.brute_force_ground_state(n0, ec, np.zeros(n), np.full(n, top))
    assert brute.max() < top  # the window was large enough to hold the minimum
    np.testing.assert_array_equal(ours, brute)


def test_certificate_repairs_a_wrong_candidate_map():
    rng = np.random.default_rng(7)
    cg, cdd = random_device(3, rng)
    ec = E_AC * np.linalg.inv(cdd)
    first = np.linspace(0, 2.0, 30)[:, None] * np.array([0.2, 1.0, 0.3])
    step = np.array([0.06, 0.01, 0.02])
    truth = gs.ground_state_rows(first, step, 50, ec)
    wrong = truth.copy()
    wrong[10:20, 5:30, 0] += 1  # a block of wrong states
    fixed = gs.certify_affine_map(wrong, first, step, ec)
    np.testing.assert_array_equal(fixed, truth)


def test_relevant_vectors_of_a_double_dot_are_the_six_basic_moves():
    # A 2-D lattice whose basis vectors make an acute angle in the metric
    # (E_Cm > 0) has the 6 Voronoi-relevant vectors ±e1, ±e2, ±(e1 − e2)
    # (Conway & Sloane, Sphere Packings, Lattices and Groups, ch. 21).
    ec = np.array([[5.0, 1.0], [1.0, 4.0]]) * 1e-3
    rel = {tuple(v) for v in gs.relevant_vectors(ec).tolist()}
    assert rel == {(1, 0), (-1, 0), (0, 1), (0, -1), (1, -1), (-1, 1)}


def test_relevant_vector_count_for_a_generic_lattice_is_voronoi_maximum():
    # A generic n-dim lattice has 2(2^n − 1) relevant vectors (Voronoi's
    # bound, attained for generic Gram matrices; Conway & Sloane ch. 2).
    rng = np.random.default_rng(3)
    for n in (3, 4):
        cg, cdd = random_device(n, rng)
        rel = gs.relevant_vectors(E_AC * np.linalg.inv(cdd))
        assert rel.shape[0] <= 2 * (2**n - 1)
        assert len({tuple(v) for v in rel.tolist()}) == rel.shape[0]


@pytest.mark.parametrize("n", [3, 4])
def test_relevant_vectors_follow_voronois_coset_rule(n):
    # Voronoi's theorem (Conway & Sloane, ch. 2 and 21): a nonzero lattice vector v is
    # relevant iff ±v are the only shortest vectors of its coset v + 2Z^n. Reference: every
    # vector of the box [-3, 3]^n (far larger than the shortest coset vectors of these
    # well-conditioned lattices), grouped by coset.
    rng = np.random.default_rng(40 + n)
    for _ in range(3):
        _, cdd = random_device(n, rng)
        ec = E_AC * np.linalg.inv(cdd)
        box = np.stack(np.meshgrid(*[np.arange(-3, 4)] * n, indexing="ij"), axis=-1).reshape(-1, n)
        norm = np.einsum("ki,ij,kj->k", box, ec, box)
        coset = (box & 1) @ (1 << np.arange(n))
        expected, lam = set(), 0.0
        for c in range(1, 2**n):
            members = np.flatnonzero(coset == c)
            lam = max(lam, norm[members].min())
            shortest = members[norm[members] <= norm[members].min() * (1 + 1e-9)]
            if shortest.size == 2:
                expected |= {tuple(box[k]) for k in shortest}
        # the box holds every vector as short as the longest coset minimum: |v_i| ≤ sqrt(λ (E⁻¹)_ii)
        assert np.all(np.sqrt(lam * np.diag(np.linalg.inv(ec))) < 4)
        assert {tuple(v) for v in gs.relevant_vectors(ec).tolist()} == expected


def test_ground_state_with_device_uses_offsets():
    dev = Device(cdg_aF=[[10.0]], cdd_aF=[[40.0]], gate_names=["PG"], dot_names=["D"], offset_charge_e=[0.5])
    # n0 = C_g V / e + q0; the 0→1 transition is at n0 = ½, i.e. V = 0 here
    v = np.array([[-0.001], [0.001]])
    np.testing.assert_array_equal(ground_state(dev, v)[:, 0], [0, 1])
