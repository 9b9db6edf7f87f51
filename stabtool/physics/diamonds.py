"""Transport energy references: Coulomb diamonds and bias triangles.

Coulomb diamonds of a single dot (gate voltage V_G on x, source–drain bias
V_sd on y, bias applied to the source, drain grounded): the two edge
families have slopes ``dV_sd/dV_G``

* ``m₊ = C_G/(C_G + C_D)`` (dot level aligned with the source),
* ``m₋ = −C_G/C_S`` (dot level aligned with the drain),

and the lever arm follows from the slopes alone,
``α = C_G/C_Σ = |m₊ m₋|/(|m₊| + |m₋|)``; with the diamond width ``ΔV_G`` at
zero bias, ``E_add = e α ΔV_G`` (the diamond tip sits at ``|V_sd| = E_add/e``)
and ``C_G = e/ΔV_G``.

Bias triangles of a double dot at source–drain bias ``V_sd``: a triangle
spans ``δV_g`` along gate g, and ``α = |e V_sd| / (e δV_g)``.

References
----------
L. P. Kouwenhoven, D. G. Austing and S. Tarucha, "Few-electron quantum dots",
Rep. Prog. Phys. 64, 701 (2001), doi:10.1088/0034-4885/64/6/201 (diamond
slopes, from memory).
R. Hanson, L. P. Kouwenhoven, J. R. Petta, S. Tarucha and L. M. K.
Vandersypen, "Spins in few-electron quantum dots", Rev. Mod. Phys. 79, 1217
(2007), doi:10.1103/RevModPhys.79.1217.
W. G. van der Wiel et al., "Electron transport through double quantum dots",
Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1 (bias triangles,
``α1 = C_g1/C1 = |e| V_sd/δV_g1``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .constants import E_AC

__all__ = [
    "DiamondCapacitances",
    "DiamondSlopes",
    "addition_energy_meV",
    "diamond_capacitances",
    "diamond_lever_arm",
    "diamond_lever_arm_stderr",
    "diamond_slopes",
    "lever_arm_from_bias_triangle",
    "lever_arm_matrix_from_triangle",
]


@dataclass(frozen=True)
class DiamondSlopes:
    """Edge slopes ``dV_sd/dV_G`` of a Coulomb diamond (dimensionless)."""

    plus: float
    minus: float


def diamond_slopes(c_gate: float, c_source: float, c_drain: float) -> DiamondSlopes:
    """Slopes ``m₊ = C_G/(C_G + C_D)``, ``m₋ = −C_G/C_S`` (capacitances in any common unit)."""
    return DiamondSlopes(plus=c_gate / (c_gate + c_drain), minus=-c_gate / c_source)


def diamond_lever_arm(m_plus: float, m_minus: float) -> float:
    """Lever arm ``α = |m₊ m₋| / (|m₊| + |m₋|)`` from the two edge slopes."""
    a, b = abs(m_plus), abs(m_minus)
    return a * b / (a + b)


def diamond_lever_arm_stderr(m_plus: float, m_minus: float, err_plus: float, err_minus: float) -> float:
    """Standard error of :func:`diamond_lever_arm` (independent slope errors).

    ``∂α/∂|m₊| = (α/|m₊|)²``, ``∂α/∂|m₋| = (α/|m₋|)²``.
    """
    alpha = diamond_lever_arm(m_plus, m_minus)
    ga = (alpha / abs(m_plus)) ** 2
    gb = (alpha / abs(m_minus)) ** 2
    return float(np.hypot(ga * err_plus, gb * err_minus))


@dataclass(frozen=True)
class DiamondCapacitances:
    """Capacitance ratios from the diamond slopes (each over C_Σ) and absolute values.

    ``gate``, ``source``, ``drain`` are ``C_G/C_Σ``, ``C_S/C_Σ``, ``C_D/C_Σ``;
    the ``*_aF`` values need the diamond width ``ΔV_G`` (NaN without it).
    """

    gate: float
    source: float
    drain: float
    total_aF: float = float("nan")
    gate_aF: float = float("nan")
    source_aF: float = float("nan")
    drain_aF: float = float("nan")


def diamond_capacitances(m_plus: float, m_minus: float, *, width_V: float | None = None) -> DiamondCapacitances:
    """Capacitance ratios ``C_G:C_S:C_D`` over ``C_Σ`` and, with ``ΔV_G``, in aF.

    ``C_G/C_Σ = α``, ``C_S/C_Σ = α/|m₋|``, ``C_D/C_Σ = α/|m₊| − α``;
    ``C_G = e/ΔV_G``.
    """
    alpha = diamond_lever_arm(m_plus, m_minus)
    rs = alpha / abs(m_minus)
    rd = alpha / abs(m_plus) - alpha
    if width_V is None or not np.isfinite(width_V):
        return DiamondCapacitances(alpha, rs, rd)
    cg = E_AC / width_V
    ctot = cg / alpha
    return DiamondCapacitances(alpha, rs, rd, ctot, cg, rs * ctot, rd * ctot)


def addition_energy_meV(lever_arm: float, width_V: float) -> float:
    """Addition energy ``E_add = e α ΔV_G`` in meV (``ΔV_G`` in V)."""
    return 1e3 * lever_arm * width_V


def lever_arm_from_bias_triangle(bias_V: float, triangle_size_V: float) -> float:
    """Bias-triangle lever arm ``α = |e V_sd| / (e δV_g)`` (van der Wiel et al. 2003)."""
    return abs(bias_V) / abs(triangle_size_V)


def lever_arm_matrix_from_triangle(
    a: np.ndarray, b: np.ndarray, c: np.ndarray, bias_V: float
) -> np.ndarray:
    """Full 2×2 lever-arm matrix from the three vertices of one bias triangle.

    The triangle is the region ``μ_S ≥ μ1 ≥ μ2 ≥ μ_D`` (signed bias
    ``eV_sd = μ_S − μ_D``). In electrochemical-potential space it has a right
    angle at ``A = (μ1 = μ_S, μ2 = μ_D)``; ``B`` (``μ1 = μ2 = μ_S``) closes the
    leg along the dot1 line ``μ1 = μ_S``, ``C`` (``μ1 = μ2 = μ_D``) the leg along
    the dot2 line ``μ2 = μ_D``; ``BC`` is the resonant base ``μ1 = μ2``. With
    ``Δμ = −e α ΔV``:

    ``α⁻¹ = [C − A, A − B] / V_sd`` (vertices as columns, (x, y) in V).

    Without cross-capacitances this reduces to ``α_ii = |e V_sd|/δV_gi``
    (van der Wiel et al., RMP 75, 1 (2003)); the general form is derived here
    from the same constant-interaction model.

    Parameters
    ----------
    a, b, c : array_like, shape (2,)
        Vertices (x, y) in V.
    bias_V : float
        Signed source–drain bias, V.
    """
    a, b, c = (np.asarray(p, float) for p in (a, b, c))
    inv = np.stack([c - a, a - b], axis=1) / float(bias_V)
    return np.linalg.inv(inv)
