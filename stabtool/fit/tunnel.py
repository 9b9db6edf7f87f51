"""Interdot tunnel coupling of a double-dot map: polarisation-line cuts across the interdot lines.

Given the electron temperature and the lever-arm matrix α (so the detuning
scale is known), every interdot segment predicted by the fitted lattice is
cut along the detuning gradient ``u ∝ α_1,: − α_2,:`` (the normal of the
interdot line in gate space), the cuts parallel to it over the central part
of the segment are averaged (:func:`stabtool.fit.polarisation.detuning_profile`)
and the polarisation line is fitted with ``t`` free
(:func:`stabtool.fit.polarisation.fit_polarisation_line`).

Notes
-----
* Gap convention: ``Ω = √(ε² + 4t²)``, the anticrossing gap is ``2t``
  (:mod:`stabtool.physics.polarisation`).
* The detuning lever arm ``|α_1,: − α_2,:|`` carries the error of the energy
  reference; its effect on ``t`` is propagated by refitting each profile with
  the lever arm moved by ± one standard error (close to the thermal width a
  small scale error moves ``t`` a lot, so this is not a small correction).
* Segments whose cut would leave the map or reach the neighbouring dot lines
  (more than 35 % of a cell in virtual coordinates) are skipped.
* Segments whose fit succeeded and whose only doubt is their own
  statistical error are combined by an inverse-variance mean;
  the error is the larger of the propagated one and the scatter between
  segments. When no segment resolves ``t`` (thermally broadened line) only
  the profile-likelihood 2σ upper limit is reported and ``t`` is null.

References
----------
L. DiCarlo et al., Phys. Rev. Lett. 92, 226801 (2004),
doi:10.1103/PhysRevLett.92.226801 (polarisation line, formula from memory).
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from ..errors import InputError
from ..physics.polarisation import polarisation_fwhm_eV
from ..quality import Quality
from .model import DiagramFit
from .polarisation import detuning_profile, fit_polarisation_line

__all__ = ["BIAS_PER_T_OVER_ECM", "CouplingRatio", "TunnelCoupling", "coupling_to_mutual_ratio", "interdot_segments",
           "tunnel_coupling_from_map"]

_NAN = float("nan")
#: Largest cut half-length, as a fraction of the cell in virtual coordinates.
_CUT_FRACTION = 0.35


@dataclass(frozen=True)
class TunnelCoupling:
    """Interdot tunnel coupling ``t`` (gap 2t) measured on a map.

    Attributes
    ----------
    value_ueV, error_ueV : float
        ``t`` and its standard error (µeV); NaN when not resolved.
    upper_limit_ueV : float
        2σ upper limit when ``t`` is not resolved (NaN otherwise).
    per_segment : tuple of dict
        Midpoint (V), ``t``, error, verdict of each cut.
    detuning_lever_arm : float
        ``|α_1,: − α_2,:|``, eV/V.
    quality : Quality
        Doubtful when resolved segments disagree or none could be fitted;
        an unresolved (upper-limit) result is a note, not a doubt.
    """

    value_ueV: float = _NAN
    error_ueV: float = _NAN
    upper_limit_ueV: float = _NAN
    per_segment: tuple[dict, ...] = ()
    detuning_lever_arm: float = _NAN
    quality: Quality = field(default_factory=Quality)

    def __bool__(self) -> bool:
        return bool(np.isfinite(self.value_ueV))

    def to_json(self) -> dict:
        return {
            "value_ueV": self.value_ueV, "error_ueV": self.error_ueV, "upper_limit_ueV": self.upper_limit_ueV,
            "detuning_lever_arm": self.detuning_lever_arm, "segments": list(self.per_segment),
            "quality": self.quality.to_dict(),
        }


def interdot_segments(fit: DiagramFit, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Interdot segments predicted by the fitted lattice inside the map.

    Returns
    -------
    ndarray, shape (k, 2, 2)
        ``[[x_a, y_a], [x_b, y_b]]`` per segment, in V (both ends inside the map).
    """
    lat = fit.lattice
    if not fit.ok or lat is None or not fit.mutual_resolved:
        return np.zeros((0, 2, 2))
    dv, dm, c = fit.addition_V, fit.mutual_V, fit.offsets_V
    minv = np.linalg.inv(fit.vg_matrix)
    labels = np.vstack([lat.labels1, lat.labels2])
    lo, hi = labels.min(axis=0) - 1, labels.max(axis=0) + 1
    segs = []
    for n1 in range(int(lo[0]), int(hi[0]) + 1):
        for n2 in range(int(lo[1]), int(hi[1]) + 1):
            a = np.array([dv[0] * (n1 - 0.5) + dm[0] * n2 + c[0], dv[1] * (n2 + 0.5) + dm[1] * (n1 - 1) + c[1]])
            pa, pb = minv @ a, minv @ (a + dm)
            if all(x.min() <= p[0] <= x.max() and y.min() <= p[1] <= y.max() for p in (pa, pb)):
                segs.append((pa, pb))
    return np.array(segs, float).reshape(-1, 2, 2)


def _upper_from(q: Quality) -> float:
    for m in q.warnings:
        hit = re.search(r"t < ([0-9.eE+\-]+) µeV", m)
        if hit:
            return float(hit.group(1))
    return _NAN


def tunnel_coupling_from_map(
    da: xr.DataArray,
    fit: DiagramFit,
    *,
    lever_arm: np.ndarray,
    lever_arm_error: np.ndarray,
    electron_temperature_K: float,
    max_segments: int = 4,
) -> TunnelCoupling:
    """Fit ``t`` on the interdot lines of a map whose energy scale is known.

    Parameters
    ----------
    da : xarray.DataArray, dims (y, x)
        The map (sensor signal).
    fit : DiagramFit
        Line-based fit (lattice, virtual gates, ΔV, δ).
    lever_arm, lever_arm_error : ndarray, shape (2, 2)
        α (eV/V, rows dots, columns gates x, y) and its standard error.
    electron_temperature_K : float
        T_e, K.
    max_segments : int
        Longest segments used.

    Returns
    -------
    TunnelCoupling
    """
    alpha = np.asarray(lever_arm, float)
    alpha_err = np.asarray(lever_arm_error, float)
    if alpha.shape != (2, 2) or not np.all(np.isfinite(alpha)):
        raise InputError("lever_arm", f"expected a finite 2×2 lever-arm matrix, got {alpha.tolist()}")
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    d = alpha[0] - alpha[1]
    a_eps = float(np.hypot(*d))
    u = d / a_eps
    # error of |α1 − α2| from the element errors (uncorrelated approximation)
    e_d = np.hypot(alpha_err[0], alpha_err[1])
    a_eps_err = float(np.sqrt(np.sum((u * np.nan_to_num(e_d)) ** 2)))
    q = Quality()
    segs = interdot_segments(fit, x, y)
    if segs.shape[0] == 0:
        return TunnelCoupling(detuning_lever_arm=a_eps,
                              quality=q.with_warning("tunnel coupling: no interdot segment inside the map"))
    lengths = np.hypot(*(segs[:, 1] - segs[:, 0]).T)
    order = np.argsort(-lengths)[:max_segments]
    dx, dy = abs(float(np.median(np.diff(x)))), abs(float(np.median(np.diff(y))))
    step = min(dx, dy)
    mu = fit.vg_matrix @ u  # virtual-coordinate step per volt along u
    room = np.min((fit.addition_V - np.abs(fit.mutual_V)) / np.maximum(np.abs(mu), 1e-12))
    half_length = _CUT_FRACTION * float(room)
    records: list[dict] = []
    for k in order:
        pa, pb = segs[k]
        mid = 0.5 * (pa + pb)
        ends = np.array([mid - half_length * u, mid + half_length * u])
        if not (np.all((ends[:, 0] >= x.min()) & (ends[:, 0] <= x.max()))
                and np.all((ends[:, 1] >= y.min()) & (ends[:, 1] <= y.max()))):
            continue
        half_width = 0.3 * float(lengths[k])
        n_avg = int(np.clip(round(2 * half_width / step) + 1, 1, 25))
        n_pts = int(np.clip(round(4 * half_length / step), 41, 301))
        prof = detuning_profile(da, through=(float(mid[0]), float(mid[1])), direction=(float(u[0]), float(u[1])),
                                half_length_V=half_length, half_width_V=half_width if n_avg > 1 else 0.0,
                                n_points=n_pts, n_average=max(n_avg, 1))
        try:
            pf = fit_polarisation_line(prof.s_V, prof.signal, electron_temperature_K=electron_temperature_K,
                                       detuning_lever_arm=a_eps)
        except InputError:
            continue
        t, t_err = pf.tunnel_coupling_ueV, pf.tunnel_coupling_stderr_ueV
        # a fit whose only doubt is its own statistical error is combined with the others
        usable = bool(np.isfinite(t)) and all("uncertainty" in m for m in pf.quality.warnings)
        scale_err = 0.0
        if usable and a_eps_err > 0:
            shifted = []
            for sgn in (-1.0, 1.0):
                alt = fit_polarisation_line(prof.s_V, prof.signal, electron_temperature_K=electron_temperature_K,
                                            detuning_lever_arm=a_eps + sgn * a_eps_err)
                shifted.append(alt.tunnel_coupling_ueV)
            scale_err = 0.5 * abs(shifted[1] - shifted[0])
        records.append({
            "midpoint_V": [float(mid[0]), float(mid[1])], "t_ueV": t, "error_ueV": float(np.hypot(t_err, scale_err)),
            "fit_error_ueV": t_err, "scale_error_ueV": scale_err, "ok": bool(pf.quality.ok), "usable": usable,
            "upper_limit_ueV": _upper_from(pf.quality), "warnings": list(pf.quality.warnings),
        })
    if not records:
        return TunnelCoupling(detuning_lever_arm=a_eps, quality=q.with_warning(
            "tunnel coupling: no interdot segment with room for a detuning cut inside the map"))
    good = [r for r in records if r["usable"]]
    if good:
        v = np.array([r["t_ueV"] for r in good])
        e = np.array([r["error_ueV"] for r in good])
        w = 1 / e**2
        mean = float(np.sum(w * v) / np.sum(w))
        err = float(np.sqrt(1 / np.sum(w)))
        if v.size > 1:
            chi2 = float(np.sum(w * (v - mean) ** 2) / (v.size - 1))
            err *= max(1.0, np.sqrt(chi2))
            if chi2 > 9:
                q = q.with_warning(f"tunnel coupling: the {v.size} interdot lines disagree (χ²/dof = {chi2:.1f})")
        # the shared scale error does not average down over segments
        scale_part = float(np.mean([r["scale_error_ueV"] for r in good]))
        err = float(np.hypot(err, scale_part))
        if not mean > 2 * err:
            up = mean + 2 * err
            return TunnelCoupling(upper_limit_ueV=up, per_segment=tuple(records), detuning_lever_arm=a_eps,
                                  quality=q.with_warning(
                                      f"tunnel coupling not resolved: t < {up:.3g} µeV (2σ upper limit)",
                                      doubtful=False))
        if err > 0.1 * mean:
            q = q.with_warning(f"tunnel coupling uncertain: t = {mean:.3g} ± {err:.2g} µeV (> 10 %)")
        return TunnelCoupling(mean, err, _NAN, tuple(records), a_eps, q)
    uppers = np.array([r["upper_limit_ueV"] for r in records], float)
    uppers = uppers[np.isfinite(uppers)]
    if uppers.size:
        up = float(np.median(uppers))
        return TunnelCoupling(upper_limit_ueV=up, per_segment=tuple(records), detuning_lever_arm=a_eps,
                              quality=q.with_warning(
                                  f"tunnel coupling not resolved (thermally broadened interdot line): t < {up:.3g} µeV "
                                  "(2σ upper limit)", doubtful=False))
    return TunnelCoupling(per_segment=tuple(records), detuning_lever_arm=a_eps, quality=q.with_warning(
        "tunnel coupling: the polarisation-line fits failed: " + "; ".join(records[0]["warnings"][:2]),
        doubtful=False))


#: ΔM ≈ BIAS_PER_T_OVER_ECM · t/E_Cm: virtual-gate bias from lines repelled near the triple points by
#: the interdot tunnel coupling (measured on the generator's four double-dot presets: 0.03–0.10).
BIAS_PER_T_OVER_ECM = 0.1


@dataclass(frozen=True)
class CouplingRatio:
    """Scale-free ``t/E_Cm`` from the interdot line width (see :func:`coupling_to_mutual_ratio`)."""

    value: float = _NAN
    error: float = _NAN
    upper_limit: float = _NAN

    @property
    def expected_vg_bias(self) -> float:
        """Expected virtual-gate bias ``BIAS_PER_T_OVER_ECM · t/E_Cm`` (NaN when t/E_Cm is not resolved)."""
        return BIAS_PER_T_OVER_ECM * self.value if np.isfinite(self.value) else _NAN

    def to_json(self) -> dict:
        return {"value": self.value, "error": self.error, "upper_limit": self.upper_limit,
                "expected_vg_bias": self.expected_vg_bias}


def coupling_to_mutual_ratio(da: xr.DataArray, fit: DiagramFit, *, thermal_width_V: float) -> CouplingRatio:
    """``t/E_Cm`` without an energy scale, from the width of the interdot lines.

    In units where α11 = 1, the detuning gradient is ``M_1,: − M_2,:/(α11/α22)``
    (α11/α22 = δ2/δ1 from the diagram), ``E_Cm = δ1`` and ``k_B T_e = w1``
    (the Fermi width of the dot1 lines along x). The polarisation fit in
    these units gives ``t/E_Cm`` directly. Used to flag maps whose lines
    are pushed apart near the triple points (the common-slope fit is then
    biased by ≈ 0.1 t/E_Cm on the generator's presets).

    Parameters
    ----------
    thermal_width_V : float
        w1 = k_B T_e/(e α11), V; a sub-pixel value when the lines are sharp.
    """
    from ..physics.constants import KB_EV_PER_K

    if not fit.ok or not fit.mutual_resolved or not np.isfinite(fit.alpha_ratio) or not fit.mutual_V[0] > 0:
        return CouplingRatio()
    unit = 0.1  # α11 in the fake units (any value; cancels)
    alpha = unit * np.vstack([fit.vg_matrix[0], fit.vg_matrix[1] / fit.alpha_ratio])
    temp = unit * thermal_width_V / KB_EV_PER_K
    if not (np.isfinite(temp) and temp > 0):
        return CouplingRatio()
    tc = tunnel_coupling_from_map(da, fit, lever_arm=alpha, lever_arm_error=np.zeros((2, 2)),
                                  electron_temperature_K=temp, max_segments=2)
    ecm_ueV = unit * fit.mutual_V[0] * 1e6
    x = np.asarray(da[da.dims[-1]].values, float)
    y = np.asarray(da[da.dims[0]].values, float)
    pixel = min(abs(float(np.median(np.diff(x)))), abs(float(np.median(np.diff(y)))))
    a_eps = float(np.hypot(*(alpha[0] - alpha[1])))

    def resolved(t_ueV: float) -> bool:
        # a sharp interdot step, interpolated, looks about a pixel wide whatever t is
        return polarisation_fwhm_eV(t_ueV * 1e-6, temp) / a_eps >= 1.5 * pixel

    if tc:
        if not resolved(tc.value_ueV):
            return CouplingRatio(upper_limit=(tc.value_ueV + 2 * tc.error_ueV) / ecm_ueV)
        return CouplingRatio(tc.value_ueV / ecm_ueV, tc.error_ueV / ecm_ueV, _NAN)
    # segments fitted but flagged (e.g. resolution-limited): keep a clearly resolved value as an estimate
    vals = [(r["t_ueV"], r["fit_error_ueV"]) for r in tc.per_segment
            if np.isfinite(r["t_ueV"]) and r["t_ueV"] > 3 * r["fit_error_ueV"]]
    if vals:
        v = float(np.median([a for a, _ in vals]))
        if not resolved(v):
            return CouplingRatio(upper_limit=v / ecm_ueV)
        return CouplingRatio(v / ecm_ueV, float(np.median([e for _, e in vals])) / ecm_ueV, _NAN)
    return CouplingRatio(upper_limit=tc.upper_limit_ueV / ecm_ueV if np.isfinite(tc.upper_limit_ueV) else _NAN)
