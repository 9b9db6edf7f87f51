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
from typing import Any

import numpy as np

from ..physics.constants import E_AC

__all__ = ["MIN_PLUNGER_CDG_AF", "error_verdict", "implausible_capacitances", "numeric_jacobian", "propagate",
           "relative_cdg_errors"]


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


#: Warnings of :func:`stabtool.fit.model.fit_diagram` that depend only on the stated errors
#: (re-evaluated by :func:`error_verdict` whenever the errors change).
_ERROR_WARNING_PREFIXES = (
    "gate capacitances uncertain",
    "gate capacitance Cdg",
    "virtual-gate matrix uncertain",
    "dot1 addition voltage uncertain",
    "dot2 addition voltage uncertain",
)


def _pct(value: float, bound: float) -> str:
    """A percentage with enough digits that a value above ``bound`` never prints as equal to it."""
    for digits in (1, 2, 3, 4):
        a, b = f"{100 * value:.{digits}f}", f"{100 * bound:.{digits}f}"
        if (value > bound) == (float(a) > float(b)) and a != b:
            return a
    return f"{100 * value:.4g}"


def relative_cdg_errors(fit: Any) -> np.ndarray:
    """``|σ(Cdg) / Cdg|`` of every element of ``fit.cdg_aF`` (NaN where an element is 0 or unknown)."""
    cdg, err = np.asarray(fit.cdg_aF, float), np.asarray(fit.cdg_aF_error, float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.abs(err / np.where(cdg != 0, np.abs(cdg), np.nan))


#: A gate capacitance below ``−NEGATIVE_CDG_SIGMAS`` stated errors is reported as unphysical.
NEGATIVE_CDG_SIGMAS = 3.0
#: ... unless both off-diagonal virtual-gate elements ``|M_ij|`` are below this: the gates look virtual
#: (plungers of neighbouring dots have cross-talk of 0.1–0.5; the held-out probe draws 0.05–0.5 for each)
VIRTUAL_GATE_CROSSTALK = 0.1
#: ... and ``|Cdg_ij|`` is below this fraction of the other dot's own ``Cdg_jj`` (on virtual gates it is
#: about ``C_m/C_j`` of it; the probe's most strongly coupled dots have ``C_m/C_j`` up to 0.45)
VIRTUAL_GATE_MAX_CROSS = 0.5


#: The smallest capacitance a dot has to the gate that moves it most, aF: e / 0.1 aF = 1.6 V between
#: its transitions. Plungers of gate-defined dots give 1–100 aF, lines tens to a few hundred mV apart
#: (common practice, no source); gate voltages in mV read as V make every capacitance 1000× smaller.
MIN_PLUNGER_CDG_AF = 0.1


def implausible_capacitances(cdg_aF: np.ndarray, cdg_err_aF: np.ndarray) -> list[str]:
    """One doubtful warning per dot whose capacitance to its own gate is below :data:`MIN_PLUNGER_CDG_AF`
    by more than 3 stated errors (a gate axis in mV read as V, below the loader's 20 V check)."""
    cdg, err = np.asarray(cdg_aF, float), np.asarray(cdg_err_aF, float)
    out = []
    for i in range(min(cdg.shape)):
        v, e = float(cdg[i, i]), float(err[i, i])
        if np.isfinite(v) and v > 0 and v + 3 * (e if np.isfinite(e) else 0.0) < MIN_PLUNGER_CDG_AF:
            out.append(
                f"gate capacitance Cdg{i + 1}{i + 1} = {v:.3g} aF (transitions {E_AC / v:.3g} V apart) is "
                f"below the {MIN_PLUNGER_CDG_AF:g} aF of any gate that moves a dot: are the gate voltages in "
                "volts? (mV read as V makes every capacitance 1000 times smaller)"
            )
    return out


def negative_capacitances(cdg_aF: np.ndarray, cdg_err_aF: np.ndarray,
                          vg_matrix: np.ndarray | None = None) -> list[tuple[str, bool]]:
    """One warning (text, doubtful) for every gate capacitance significantly below zero.

    A physical gate's capacitance to a dot is positive (the constant-interaction
    model, van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003)); a diagram that
    gives ``Cdg_ij < −3σ`` on such gates has its charge lattice mislabelled
    (seen on held-out maps: a mutual shift taken as half the addition
    voltage, strongly coupled dots labelled with the wrong cell; 12 of 579
    probe maps with a Cdg, every one of them 150–700 % off on some element).

    A virtual gate (a combination of physical gates, swept so that it moves
    its own dot only) has ``Cdg = Cdd·α`` with the cross lever arm ``α_ij``
    near zero: ``Cdg_ij = C_i α_ij − C_m α_jj`` is then negative, by about
    the mutual capacitance times ``α_jj``. Physical gates give
    ``M_ij = α_ij/α_ii ≥ C_m α_jj/(C_i α_ii) > 0``; a negative element on a
    map whose two cross-talks ``|M_12|``, ``|M_21|`` are both below
    ``VIRTUAL_GATE_CROSSTALK`` (``vg_matrix`` given: both families along
    their axes, the signature of virtual gates) and with a
    size below ``VIRTUAL_GATE_MAX_CROSS`` of ``Cdg_jj`` (about ``C_m/C_j`` of
    it) is therefore a note that the gates look virtual, not a doubt.
    """
    cdg, err = np.asarray(cdg_aF, float), np.asarray(cdg_err_aF, float)
    m = None if vg_matrix is None else np.asarray(vg_matrix, float)
    virtual = m is not None and m.shape == (2, 2) and bool(np.all(np.abs(m[[0, 1], [1, 0]]) < VIRTUAL_GATE_CROSSTALK))
    out = []
    for (i, j), v in np.ndenumerate(cdg):
        e = err[i, j]
        if np.isfinite(v) and np.isfinite(e) and v < -NEGATIVE_CDG_SIGMAS * e:
            gate = f"the {('x', 'y')[j]} gate" if j < 2 else f"gate {j + 1}"
            head = f"gate capacitance Cdg{i + 1}{j + 1} (dot {i + 1}, {gate}) = {v:.3g} ± {e:.2g} aF is negative"
            own = cdg[j, j] if j < cdg.shape[0] else np.nan
            if m is not None and virtual and i != j and -v < VIRTUAL_GATE_MAX_CROSS * own:
                note = (f"{head}, as on virtual gates: with the cross-talk M{i + 1}{j + 1} = {m[i, j]:.3g} "
                        "near zero it is minus the mutual capacitance times the other dot's lever arm "
                        "(a physical gate's capacitance is positive)")
                out.append((note, False))
            else:
                doubt = (f"{head} (a gate's capacitance to a dot is positive): the charge lattice is "
                         "probably mislabelled")
                out.append((doubt, True))
    return out


def error_verdict(fit: Any) -> Any:
    """Quality of a diagram fit with its error-based checks redone on its current errors.

    The checks of :func:`stabtool.fit.model.fit_diagram` that read only the
    stated errors (Cdg relative error ≤ ``MAX_CDG_REL_ERROR``, virtual-gate
    error ≤ ``MAX_VG_ERROR``, addition-voltage error ≤ 5 %) are removed from
    ``fit.quality`` and evaluated again, with messages that print enough
    digits for an exceeded bound never to look met (``1.54 % > 1.5 %``, not
    ``1.5 % … ≤ 1.5 %``). The other warnings and their verdicts are kept.

    Parameters
    ----------
    fit : DiagramFit

    Returns
    -------
    Quality
    """
    from .model import MAX_CDG_REL_ERROR, MAX_VG_ERROR

    q = fit.quality.without(lambda w: w.startswith(_ERROR_WARNING_PREFIXES))
    if not fit.ok:
        return fit.quality
    for i, name in enumerate(("dot1", "dot2")):
        rel = fit.addition_V_error[i] / fit.addition_V[i]
        if rel > 0.05:
            q = q.with_warning(f"{name} addition voltage uncertain ({_pct(rel, 0.05)} % > 5 %)")
    rel_cdg = relative_cdg_errors(fit)
    if not np.all(rel_cdg <= MAX_CDG_REL_ERROR):
        worst = float(np.nanmax(rel_cdg)) if np.any(np.isfinite(rel_cdg)) else float("nan")
        q = q.with_warning(
            f"gate capacitances uncertain (up to {_pct(worst, MAX_CDG_REL_ERROR)} % on an element; "
            f"ok needs ≤ {100 * MAX_CDG_REL_ERROR:g} % on every element)"
        )
    for msg, doubtful in negative_capacitances(fit.cdg_aF, fit.cdg_aF_error, fit.vg_matrix):
        q = q.with_warning(msg, doubtful=doubtful)
    for msg in implausible_capacitances(fit.cdg_aF, fit.cdg_aF_error):
        q = q.with_warning(msg)
    vg = float(np.nanmax(fit.vg_matrix_error))
    if not vg <= MAX_VG_ERROR:
        q = q.with_warning(f"virtual-gate matrix uncertain (error up to {vg:.4f}; ok needs ≤ {MAX_VG_ERROR:g})")
    return q
