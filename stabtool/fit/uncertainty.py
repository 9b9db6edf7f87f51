"""Propagation of parameter covariances to derived quantities.

Linear (first-order) propagation ``Σ_f = J Σ_p Jᵀ`` with the Jacobian ``J``
of the derived quantity taken by central finite differences.

References
----------
JCGM 100:2008, "Evaluation of measurement data — Guide to the expression of
uncertainty in measurement" (GUM), section 5.1 (law of propagation of
uncertainty).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = ["numeric_jacobian", "propagate"]


def numeric_jacobian(
    func: Callable[[np.ndarray], np.ndarray], p: np.ndarray, *, rel_step: float = 1e-6
) -> np.ndarray:
    """Central-difference Jacobian of ``func`` at ``p``.

    Parameters
    ----------
    func : callable
        Maps a parameter vector, shape (n,), to a flat array, shape (m,).
    p : ndarray, shape (n,)
    rel_step : float
        Step relative to ``max(|p_i|, 1e-6)``.

    Returns
    -------
    ndarray, shape (m, n)
    """
    p = np.asarray(p, float)
    f0 = np.asarray(func(p), float).ravel()
    jac = np.zeros((f0.size, p.size))
    for i in range(p.size):
        h = rel_step * max(abs(p[i]), 1e-6)
        pp, pm = p.copy(), p.copy()
        pp[i] += h
        pm[i] -= h
        jac[:, i] = (np.asarray(func(pp), float).ravel() - np.asarray(func(pm), float).ravel()) / (2 * h)
    return jac


def propagate(
    func: Callable[[np.ndarray], np.ndarray], p: np.ndarray, cov: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Value and one-standard-error of ``func(p)`` for parameter covariance ``cov``.

    Returns
    -------
    value, stderr : ndarray
        Both with the shape of ``func(p)``; the standard error is the square
        root of the diagonal of ``J cov Jᵀ`` (NaN where it is not finite).
    """
    value = np.asarray(func(np.asarray(p, float)), float)
    jac = numeric_jacobian(func, p)
    var = np.einsum("ij,jk,ik->i", jac, np.asarray(cov, float), jac)
    with np.errstate(invalid="ignore"):
        err = np.sqrt(np.where(var >= 0, var, np.nan))
    return value, err.reshape(value.shape)
