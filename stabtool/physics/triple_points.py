"""Triple-point lattice of a double dot in the constant-interaction model.

The triple points of a double dot (where three charge states are degenerate)
form two interleaved 2-D lattices in gate space: "electron" points
(states ``N, N + ê1, N + ê2``) and "hole" points (``N + ê1, N + ê2,
N + ê1 + ê2``). Translations ``A`` (adds one electron to dot1) and ``B``
(adds one to dot2) map the pattern onto itself:

* ``Cdg · A = e (1, 0)ᵀ`` and ``Cdg · B = e (0, 1)ᵀ``, hence
  ``Cdg = e [A B]⁻¹`` (aF with voltages in V; no energy scale needed);
* the pair vector ``p`` (electron → hole point of one vertex pair) satisfies
  ``α p = (E_Cm / e) (1, 1)ᵀ`` with ``α = Cdd⁻¹ Cdg``. With
  ``α = E_C Cdg / e²`` and ``[A B] = e Cdg⁻¹`` its lattice coordinates are
  ``c = [A B]⁻¹ p = E_Cm E_C⁻¹ (1, 1)ᵀ``.

Inverting ``c``: with ``E_C = E_Cm [[x, 1], [1, y]]``,
``c1 = (y − 1)/(xy − 1)`` and ``c2 = (x − 1)/(xy − 1)``, whose solution is
``x = E_C1/E_Cm = (1 − c2)/c1`` and ``y = E_C2/E_Cm = (1 − c1)/c2``
(derived here; checked against the forward model in the tests). The overall
energy scale ``E_Cm`` stays unknown, but it cancels in the virtual-gate
matrix ``M = diag(1/α_ii) α`` and in the addition voltages and mutual
shifts: with ``K = [[x, 1], [1, y]] · Cdg`` (so ``α = (E_Cm/e²) K``),
``M = diag(1/K_ii) K``, ``ΔV1 = e x / K11``, ``ΔV2 = e y / K22``,
``δ1 = e / K11``, ``δ2 = e / K22``.

References
----------
W. G. van der Wiel, S. De Franceschi, J. M. Elzerman, T. Fujisawa,
S. Tarucha and L. P. Kouwenhoven, "Electron transport through double quantum
dots", Rev. Mod. Phys. 75, 1 (2003), doi:10.1103/RevModPhys.75.1 (triple
points, honeycomb, Eqs. for the electrochemical potentials).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .constants import E_AC

__all__ = [
    "PairDiagram",
    "cdg_from_lattice",
    "charging_ratios_from_pair",
    "diagram_from_pair",
    "lattice_from_cdg",
    "pair_coordinates",
    "pair_vector",
]


def cdg_from_lattice(a_V: np.ndarray, b_V: np.ndarray) -> np.ndarray:
    """Gate capacitances ``Cdg = e [A B]⁻¹`` (aF) from the triple-point lattice.

    Parameters
    ----------
    a_V, b_V : array_like, shape (2,)
        Lattice translations (x, y) in V that add one electron to dot1 (``A``)
        and to dot2 (``B``).

    Returns
    -------
    ndarray, shape (2, 2)
        Rows dots, columns gates (x, y), aF.
    """
    ab = np.column_stack([np.asarray(a_V, float), np.asarray(b_V, float)])
    return E_AC * np.linalg.inv(ab)


def lattice_from_cdg(cdg_aF: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Inverse of :func:`cdg_from_lattice`: ``[A B] = e Cdg⁻¹`` (V)."""
    ab = E_AC * np.linalg.inv(np.asarray(cdg_aF, float))
    return ab[:, 0].copy(), ab[:, 1].copy()


def pair_vector(cdg_aF: np.ndarray, cdd_aF: np.ndarray) -> np.ndarray:
    """Electron → hole triple-point vector ``p = (E_Cm/e) α⁻¹ (1, 1)ᵀ`` in V.

    Parameters
    ----------
    cdg_aF : array_like, shape (2, 2)
    cdd_aF : array_like, shape (2, 2)
        Dot capacitance matrix (off-diagonal = −mutual capacitance), aF.
    """
    cdd = np.asarray(cdd_aF, float)
    ec = E_AC * np.linalg.inv(cdd)  # eV (charge in e, capacitance in aF)
    alpha = np.linalg.solve(cdd, np.asarray(cdg_aF, float))
    return ec[0, 1] * np.linalg.solve(alpha, np.ones(2))


def pair_coordinates(ec: np.ndarray) -> np.ndarray:
    """Lattice coordinates ``c = E_Cm E_C⁻¹ (1, 1)ᵀ`` of the pair vector.

    Parameters
    ----------
    ec : array_like, shape (2, 2)
        Charging-energy matrix (any energy unit; only ratios matter).
    """
    e = np.asarray(ec, float)
    return e[0, 1] * np.linalg.solve(e, np.ones(2))


def charging_ratios_from_pair(c: np.ndarray) -> tuple[float, float]:
    """``(E_C1/E_Cm, E_C2/E_Cm) = ((1 − c2)/c1, (1 − c1)/c2)`` from the pair coordinates.

    Only defined for ``c1, c2 > 0`` and ``c1 + c2 < 1`` (``E_Cm < E_C1, E_C2``);
    otherwise NaN.
    """
    c1, c2 = (float(v) for v in np.asarray(c, float))
    if not (c1 > 0 and c2 > 0 and c1 + c2 < 1):
        return float("nan"), float("nan")
    return (1.0 - c2) / c1, (1.0 - c1) / c2


@dataclass(frozen=True)
class PairDiagram:
    """Scale-free diagram quantities from the lattice and the pair coordinates.

    Attributes
    ----------
    vg_matrix : ndarray, shape (2, 2)
        Virtual-gate matrix ``M = diag(1/α_ii) α``.
    addition_V, mutual_V : ndarray, shape (2,)
        ``(ΔV1, ΔV2)`` and ``(δ1, δ2)``, V.
    ec_ratios : ndarray, shape (2,)
        ``(E_C1/E_Cm, E_C2/E_Cm)``.
    """

    vg_matrix: np.ndarray
    addition_V: np.ndarray
    mutual_V: np.ndarray
    ec_ratios: np.ndarray


def diagram_from_pair(cdg_aF: np.ndarray, c: np.ndarray) -> PairDiagram:
    """Virtual-gate matrix, addition voltages and mutual shifts from ``Cdg`` and ``c``.

    See the module notes: ``K = [[x, 1], [1, y]] Cdg`` with
    ``(x, y) = (E_C1/E_Cm, E_C2/E_Cm)``; ``M = diag(1/K_ii) K``,
    ``ΔV = e (x, y)/diag(K)``, ``δ = e / diag(K)``. NaN where ``c`` is
    unphysical.
    """
    x, y = charging_ratios_from_pair(c)
    k = np.array([[x, 1.0], [1.0, y]]) @ np.asarray(cdg_aF, float)
    d = np.diag(k)
    return PairDiagram(
        vg_matrix=k / d[:, None],
        addition_V=E_AC * np.array([x, y]) / d,
        mutual_V=E_AC / d,
        ec_ratios=np.array([x, y]),
    )
