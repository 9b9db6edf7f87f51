"""Constant-interaction (CI) model of gate-defined quantum dots.

Conventions (see the project's conventions file): ``Cdg`` is the dot–gate
capacitance matrix (n_dots, n_gates) in aF; ``Cdd`` the dot capacitance
matrix (diagonal = total capacitance, off-diagonal = −mutual) in aF. Lever
arms ``α = Cdd⁻¹ Cdg``; charging energies ``E_C = e² Cdd⁻¹``.

References
----------
W. G. van der Wiel, S. De Franceschi, J. M. Elzerman, T. Fujisawa,
S. Tarucha and L. P. Kouwenhoven, "Electron transport through double quantum
dots", Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1.

T. Hensgens et al., "Quantum simulation of a Fermi–Hubbard model using a
semiconductor quantum dot array", Nature 548, 70 (2017),
doi:10.1038/nature23022 (virtual gates).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .constants import E_AC

__all__ = [
    "lever_arm_matrix",
    "charging_energy_matrix_meV",
    "DoubleDotSlopes",
    "double_dot_slopes",
    "virtual_gate_matrix",
    "addition_voltages",
    "mutual_shifts",
    "diagram_matrix",
    "cdg_from_diagram",
    "staircase_mean_element",
    "mutual_shift_from_staircase",
    "SimpleDoubleDot",
    "simple_double_dot",
]


def lever_arm_matrix(cdg: np.ndarray, cdd: np.ndarray) -> np.ndarray:
    """Lever-arm matrix ``α = Cdd⁻¹ Cdg`` (dimensionless, eV per V).

    Parameters
    ----------
    cdg : ndarray, shape (n_dots, n_gates)
        Dot–gate capacitances, aF.
    cdd : ndarray, shape (n_dots, n_dots)
        Dot capacitance matrix, aF.
    """
    return np.linalg.solve(np.asarray(cdd, float), np.asarray(cdg, float))


def charging_energy_matrix_meV(cdd: np.ndarray) -> np.ndarray:
    """Charging-energy matrix ``E_C = e² Cdd⁻¹`` in meV.

    Diagonal: E_C1, E_C2, ...; off-diagonal: mutual charging energies E_Cm.
    """
    return 1e3 * E_AC * np.linalg.inv(np.asarray(cdd, float))


@dataclass(frozen=True)
class DoubleDotSlopes:
    """Slopes dV_y/dV_x of the three line families of a double dot."""

    dot1: float
    dot2: float
    interdot: float


def double_dot_slopes(alpha: np.ndarray) -> DoubleDotSlopes:
    """Slopes of dot1, dot2 and interdot lines from a 2×2 lever-arm matrix.

    ``s1 = −α11/α12``, ``s2 = −α21/α22``, ``s3 = −(α11 − α21)/(α12 − α22)``.
    A zero denominator gives ±inf (a vertical line).
    """
    a = np.asarray(alpha, float)
    with np.errstate(divide="ignore"):
        s1 = -a[0, 0] / a[0, 1] if a[0, 1] != 0 else -np.inf
        s2 = -a[1, 0] / a[1, 1]
        den = a[0, 1] - a[1, 1]
        s3 = -(a[0, 0] - a[1, 0]) / den if den != 0 else np.inf
    return DoubleDotSlopes(float(s1), float(s2), float(s3))


def virtual_gate_matrix(alpha: np.ndarray) -> np.ndarray:
    """Normalised virtual-gate matrix ``M_ij = α_ij / α_ii``.

    ``V_virtual = M · V_physical``; rows are virtual gates (one per dot, the
    plunger of dot i being gate i), columns physical gates. For a double dot
    ``M = [[1, −1/s1], [−s2, 1]]``. Stepping virtual gate i moves only μ_i
    to first order (Hensgens et al. 2017; Volk et al., npj Quantum Inf. 5,
    29 (2019)).

    Parameters
    ----------
    alpha : ndarray, shape (n_dots, n_gates), n_gates >= n_dots
    """
    a = np.asarray(alpha, float)
    diag = np.diag(a[:, : a.shape[0]])
    return a / diag[:, None]


def addition_voltages(ec_meV: np.ndarray, alpha: np.ndarray) -> np.ndarray:
    """Addition voltages ``ΔV_i = E_C,ii / (e α_ii)`` in V (one per dot)."""
    ec = np.asarray(ec_meV, float) * 1e-3
    a = np.asarray(alpha, float)
    n = ec.shape[0]
    return np.diag(ec) / np.diag(a[:, :n])


def mutual_shifts(ec_meV: np.ndarray, alpha: np.ndarray) -> np.ndarray:
    """Mutual shifts of a double dot ``δ_i = E_Cm / (e α_ii)`` in V.

    ``δ1`` is the shift along x of a dot1 line when N2 changes by one;
    ``δ2`` the shift along y of a dot2 line when N1 changes by one.
    """
    ec = np.asarray(ec_meV, float) * 1e-3
    a = np.asarray(alpha, float)
    return np.array([ec[0, 1] / a[0, 0], ec[1, 0] / a[1, 1]])


def diagram_matrix(addition_V: np.ndarray, mutual_V: np.ndarray) -> np.ndarray:
    """The matrix ``D = [[ΔV1, δ1], [δ2, ΔV2]]`` (V) read off a diagram.

    ``D = diag(1/(e α_ii)) · E_C``.
    """
    dv = np.asarray(addition_V, float)
    dm = np.asarray(mutual_V, float)
    return np.array([[dv[0], dm[0]], [dm[1], dv[1]]])


def cdg_from_diagram(
    addition_V: np.ndarray, mutual_V: np.ndarray, vg_matrix: np.ndarray
) -> np.ndarray:
    """Gate capacitances from a diagram: ``Cdg = e · D⁻¹ · M`` in aF.

    Follows from ``Cdg = Cdd α = e² E_C⁻¹ α`` with ``E_C = diag(e α_ii) D``
    and ``α = diag(α_ii) M``: no energy scale is needed.
    """
    d = diagram_matrix(addition_V, mutual_V)
    return E_AC * np.linalg.solve(d, np.asarray(vg_matrix, float))


def staircase_mean_element(m_own: float, m_other: float, addition_other_V: float, mutual_own_V: float) -> float:
    """The virtual-gate element of a straight line through a dot's staircase of band pieces.

    A dot-i line shifts by ``δ_i`` (in its virtual coordinate) each time
    ``N_j`` steps up by one, every ``ΔV_j`` of the other coordinate; a
    straight line across many bands takes the mean, ``u_i − k v_j = const``
    with ``k = δ_i/ΔV_j`` (``u = M V``), i.e. the element
    ``(M_ij − k)/(1 − k M_ji)``. It is the bare ratio ``Cdg_ij/Cdg_ii`` of
    ``Cdg = e · D⁻¹ · M`` (row i of ``D⁻¹ M`` is proportional to
    ``[1 − k M_ji, M_ij − k]``): along the mean line the dot-j steps cancel
    the mutual charging term (constant-interaction model, van der Wiel et
    al., Rev. Mod. Phys. 75, 1 (2003); the identity of the conventions).

    Parameters
    ----------
    m_own, m_other : float
        ``M_ij`` of this dot's lines and ``M_ji`` of the other dot's.
    addition_other_V, mutual_own_V : float
        ``ΔV_j`` of the other dot and ``δ_i`` of this one, V.
    """
    k = mutual_own_V / addition_other_V
    return (m_own - k) / (1.0 - k * m_other)


def mutual_shift_from_staircase(m_pieces: float, m_straight: float, m_other: float, addition_other_V: float) -> float:
    """``δ_i`` from a staircase's band pieces and a straight line through it (inverse of :func:`staircase_mean_element`).

    ``δ_i = ΔV_j (M_pieces − M_straight)/(1 − M_straight M_ji)``, V.
    """
    return addition_other_V * (m_pieces - m_straight) / (1.0 - m_straight * m_other)


@dataclass(frozen=True)
class SimpleDoubleDot:
    """Quantities of the van der Wiel et al. (2003) double dot without cross-capacitances.

    Energies in meV, voltages in V.
    """

    ec1_meV: float
    ec2_meV: float
    ecm_meV: float
    addition_V1: float
    addition_V2: float
    splitting_V1: float
    splitting_V2: float


def simple_double_dot(cg1: float, cg2: float, cm: float, c1: float, c2: float) -> SimpleDoubleDot:
    """Closed-form double-dot quantities of van der Wiel et al., RMP 75, 1 (2003).

    Parameters
    ----------
    cg1, cg2 : float
        Gate capacitances of dot 1 to gate 1 and dot 2 to gate 2, aF.
    cm : float
        Mutual capacitance, aF.
    c1, c2 : float
        Total capacitances of the dots, aF (including ``cm``).

    Notes
    -----
    ``E_C1 = (e²/C1) / (1 − Cm²/(C1 C2))``, ``E_Cm = (e²/Cm) / (C1 C2/Cm² − 1)``,
    ``ΔV_g1 = e/C_g1`` and the triple-point splitting
    ``ΔV_g1^m = e Cm / (C_g1 C2)``.
    """
    ec1 = (E_AC / c1) / (1 - cm**2 / (c1 * c2))
    ec2 = (E_AC / c2) / (1 - cm**2 / (c1 * c2))
    ecm = (E_AC / cm) / (c1 * c2 / cm**2 - 1) if cm != 0 else 0.0
    return SimpleDoubleDot(
        ec1_meV=1e3 * ec1,
        ec2_meV=1e3 * ec2,
        ecm_meV=1e3 * ecm,
        addition_V1=E_AC / cg1,
        addition_V2=E_AC / cg2,
        splitting_V1=E_AC * cm / (cg1 * c2),
        splitting_V2=E_AC * cm / (cg2 * c1),
    )
