"""Virtual-gate matrices of dot arrays: elements from slopes, combination, inversion.

Conventions (see the project's conventions file): the normalised virtual-gate
matrix has elements ``M_dg = α_dg / α_d,p(d)`` where ``p(d)`` is the plunger of
dot ``d``; rows are virtual gates (one per dot, the charge sensor counted as a
dot whose plunger is the sensor gate), columns physical gates, and
``V_virtual = M · V_physical``.

In a two-gate map of gates (x, y) a transition line of dot ``d`` obeys
``α_dx dV_x + α_dy dV_y = 0``, so its slope is ``s = dV_y/dV_x = −α_dx/α_dy``
whatever the other gates and dots do (they only shift the line). Hence

* a line of the dot whose plunger is x gives ``M[dot(x), y] = −1/s``;
* a line of the dot whose plunger is y gives ``M[dot(y), x] = −s``.

Pairwise maps therefore measure single elements of the full N×M matrix
directly, and maps that share an element are combined by the inverse-variance
weighted mean, with the Birge ratio as the measure of their consistency.

References
----------
T. Hensgens et al., "Quantum simulation of a Fermi–Hubbard model using a
semiconductor quantum dot array", Nature 548, 70 (2017),
doi:10.1038/nature23022 (virtual gates of an array).

C. Volk et al., "Loading a quantum-dot based 'Qubyte' register", npj Quantum
Inf. 5, 29 (2019), doi:10.1038/s41534-019-0146-y [DOI from memory] (matrix
assembled from pairwise maps).

R. T. Birge, "The calculation of errors by the method of least squares",
Phys. Rev. 40, 207 (1932), doi:10.1103/PhysRev.40.207 (the ratio
``sqrt(χ²/(n − 1))`` of external to internal error).

Particle Data Group, "Review of Particle Physics", Introduction, section on
averaging (scale factor ``S = sqrt(χ²/(N − 1))`` applied when S > 1)
[from memory].
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.special import chdtrc  # χ² survival function, = scipy.stats.chi2.sf(x, dof) without importing scipy.stats

__all__ = [
    "Estimate",
    "WeightedMean",
    "element_from_x_dot_slope",
    "element_from_y_dot_slope",
    "inverse_propagated_sigma",
    "inverse_variance_mean",
    "square_virtual_matrix",
]


@dataclass(frozen=True)
class WeightedMean:
    """Inverse-variance weighted mean of n estimates of one quantity.

    Attributes
    ----------
    mean : float
        ``Σ w_k x_k / Σ w_k`` with ``w_k = 1/σ_k²``.
    sigma_internal : float
        ``1/sqrt(Σ w_k)``: the uncertainty if the estimates agree within
        their stated errors.
    sigma : float
        The reported uncertainty: ``sigma_internal · max(1, birge_ratio)``
        (the scale factor of the Particle Data Group [from memory]).
    chi2 : float
        ``Σ w_k (x_k − mean)²``.
    dof : int
        ``n − 1``.
    birge_ratio : float
        ``sqrt(chi2/dof)`` (Birge 1932); NaN when ``dof == 0``. About 1 when
        the estimates scatter as their errors say; well above 1 when they
        disagree.
    p_value : float
        Probability of a χ² this large or larger if the errors are right
        (``scipy.stats.chi2.sf``); NaN when ``dof == 0``.
    n : int
        Number of estimates.
    """

    mean: float
    sigma_internal: float
    sigma: float
    chi2: float
    dof: int
    birge_ratio: float
    p_value: float
    n: int


def inverse_variance_mean(values: Sequence[float], sigmas: Sequence[float]) -> WeightedMean:
    """Combine estimates of one quantity by inverse-variance weighting.

    Parameters
    ----------
    values, sigmas : sequence of float, length n >= 1
        Estimates and their one-standard-error uncertainties (finite, > 0).

    Returns
    -------
    WeightedMean

    Notes
    -----
    ``x̄ = Σ w x / Σ w``, ``σ_int = (Σ w)^(−1/2)``, ``χ² = Σ w (x − x̄)²`` with
    ``w = σ^(−2)``; Birge ratio ``R = sqrt(χ²/(n − 1))`` (Birge, Phys. Rev.
    40, 207 (1932)). The reported ``sigma`` is ``σ_int · max(1, R)``.
    """
    x = np.asarray(values, dtype=float)
    s = np.asarray(sigmas, dtype=float)
    if x.ndim != 1 or x.shape != s.shape or x.size == 0:
        raise ValueError("values and sigmas must be 1-D sequences of the same length >= 1")
    if not (np.all(np.isfinite(s)) and np.all(s > 0) and np.all(np.isfinite(x))):
        raise ValueError("values must be finite and sigmas finite and > 0")
    w = 1.0 / s**2
    mean = float(np.sum(w * x) / np.sum(w))
    sigma_int = float(1.0 / np.sqrt(np.sum(w)))
    chi2 = float(np.sum(w * (x - mean) ** 2))
    dof = int(x.size - 1)
    if dof > 0:
        birge = float(np.sqrt(chi2 / dof))
        p = float(chdtrc(dof, chi2))
    else:
        birge = float("nan")
        p = float("nan")
    scale = birge if dof > 0 and birge > 1.0 else 1.0
    return WeightedMean(
        mean=mean,
        sigma_internal=sigma_int,
        sigma=sigma_int * scale,
        chi2=chi2,
        dof=dof,
        birge_ratio=birge,
        p_value=p,
        n=int(x.size),
    )


@dataclass(frozen=True)
class Estimate:
    """A value with its one-standard-error uncertainty (NaN when unknown)."""

    value: float
    sigma: float


def element_from_x_dot_slope(slope: float, slope_err: float) -> Estimate:
    """``M[dot(x), y] = −1/s`` and its standard error ``σ_s/s²`` (first order).

    ``s`` is the slope dV_y/dV_x of the lines of the dot whose plunger is the
    x gate ("dot1" of the conventions file).
    """
    s = float(slope)
    if np.isinf(s):  # a vertical line: no coupling to y, error unknown
        return Estimate(0.0, float("nan"))
    if not np.isfinite(s) or s == 0.0:
        return Estimate(float("nan"), float("nan"))
    return Estimate(-1.0 / s, abs(float(slope_err)) / s**2)


def element_from_y_dot_slope(slope: float, slope_err: float) -> Estimate:
    """``M[dot(y), x] = −s`` and its standard error ``σ_s``.

    ``s`` is the slope dV_y/dV_x of the lines of the dot whose plunger is the
    y gate ("dot2" of the conventions file).
    """
    s = float(slope)
    if not np.isfinite(s):
        return Estimate(float("nan"), float("nan"))
    return Estimate(-s, abs(float(slope_err)))


def square_virtual_matrix(matrix: np.ndarray, plunger_columns: Sequence[int]) -> np.ndarray:
    """Complete an N×M virtual-gate matrix to an invertible M×M one.

    Gates that are no dot's plunger (barriers, …) keep their physical value
    as their own virtual gate: their rows are unit vectors. Row order of the
    result: the N dot rows first, then one row per remaining gate in column
    order.

    Parameters
    ----------
    matrix : ndarray, shape (n_dots, n_gates)
    plunger_columns : sequence of int, length n_dots
        Column of each dot's plunger (distinct).

    Returns
    -------
    ndarray, shape (n_gates, n_gates)
    """
    m = np.asarray(matrix, dtype=float)
    n_dots, n_gates = m.shape
    plungers = [int(c) for c in plunger_columns]
    if len(plungers) != n_dots or len(set(plungers)) != n_dots:
        raise ValueError("plunger_columns must name one distinct column per dot")
    others = [c for c in range(n_gates) if c not in plungers]
    extra = np.zeros((len(others), n_gates))
    extra[np.arange(len(others)), others] = 1.0
    return np.vstack([m, extra])


def inverse_propagated_sigma(
    square: np.ndarray, sigma_square: np.ndarray, physical_step: np.ndarray
) -> np.ndarray:
    """Standard error of ``ΔV = S⁻¹ ΔV′`` from independent errors of S.

    Parameters
    ----------
    square : ndarray, shape (n, n)
        Virtual-gate matrix S (``V′ = S V``).
    sigma_square : ndarray, shape (n, n)
        Standard errors of its elements (0 where exact; NaN entries are
        treated as 0 — an unmeasured element has no stated error).
    physical_step : ndarray, shape (..., n)
        ``ΔV = S⁻¹ ΔV′``, physical volts.

    Returns
    -------
    ndarray, shape (..., n)
        First-order standard error of each physical voltage step, V.

    Notes
    -----
    ``∂(S⁻¹ v)/∂S_kl = −S⁻¹[:, k] (S⁻¹ v)_l``, so with independent element
    errors ``σ²(ΔV_g) = Σ_k (S⁻¹)_gk² Σ_l ΔV_l² σ_kl²`` (linear error
    propagation).
    """
    s_inv = np.linalg.inv(np.asarray(square, float))
    sig = np.nan_to_num(np.asarray(sigma_square, float), nan=0.0)
    dv = np.asarray(physical_step, float)
    # inner[..., k] = Σ_l ΔV_l² σ_kl²
    inner = (dv**2) @ (sig**2).T
    return np.sqrt(inner @ (s_inv**2).T)
