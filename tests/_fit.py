"""Analytic honeycomb line sets for the fitter tests.

The segments follow from the constant-interaction formulas of
van der Wiel et al., Rev. Mod. Phys. 75, 1 (2003): in virtual coordinates
a dot1 line N1−1 → N1 at fixed N2 lies at V'_1 = ΔV1 (N1 − ½) + δ1 N2 and runs
between the triple points at V'_2 = ΔV2 (N2 − ½) + δ2 N1 and
ΔV2 (N2 + ½) + δ2 (N1 − 1); dot2 lines likewise; interdot segments join the
triple points and span (δ1, δ2). Nothing here uses the fitter's code.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from stabtool.lines.result import LineDetection, LineFamily, TransitionLine
from stabtool.mapdata import MapAxes
from stabtool.physics import E_AC
from stabtool.quality import Quality


@dataclass(frozen=True)
class Truth:
    cdg: np.ndarray  # aF
    cdd: np.ndarray  # aF
    alpha: np.ndarray
    ec_meV: np.ndarray
    m: np.ndarray
    addition_V: np.ndarray
    mutual_V: np.ndarray


def truth_from_capacitances(cdg, c1, c2, cm) -> Truth:
    cdg = np.asarray(cdg, float)
    cdd = np.array([[c1, -cm], [-cm, c2]], float)
    alpha = np.linalg.solve(cdd, cdg)
    ec = 1e3 * E_AC * np.linalg.inv(cdd)
    m = alpha / np.diag(alpha)[:, None]
    addition = np.diag(ec) * 1e-3 / np.diag(alpha)
    mutual = np.array([ec[0, 1] / alpha[0, 0], ec[1, 0] / alpha[1, 1]]) * 1e-3
    return Truth(cdg, cdd, alpha, ec, m, addition, mutual)


def _clip(p0, p1, box):
    """Liang–Barsky clipping of segment p0→p1 to box (xmin, xmax, ymin, ymax)."""
    x0, y0 = p0
    dx, dy = p1[0] - x0, p1[1] - y0
    t0, t1 = 0.0, 1.0
    for p, q in ((-dx, x0 - box[0]), (dx, box[1] - x0), (-dy, y0 - box[2]), (dy, box[3] - y0)):
        if p == 0:
            if q < 0:
                return None
            continue
        t = q / p
        if p < 0:
            t0 = max(t0, t)
        else:
            t1 = min(t1, t)
    if t1 - t0 < 1e-9:
        return None
    return (x0 + t0 * dx, y0 + t0 * dy), (x0 + t1 * dx, y0 + t1 * dy)


def honeycomb_detection(
    truth: Truth,
    *,
    x: np.ndarray,
    y: np.ndarray,
    offset_V=(0.0, 0.0),
    slope_noise: float = 0.0,
    pos_noise_V: float = 0.0,
    width_V=(np.nan, np.nan),
    min_length_frac: float = 0.3,
    rng=0,
) -> LineDetection:
    """Segments of the CI honeycomb inside the window, as a LineDetection.

    ``offset_V`` shifts the lattice in virtual coordinates (V'_1, V'_2);
    occupations start at 0 (the empty corner lies at low voltages).
    ``slope_noise`` is the relative error on each line's slope and
    ``pos_noise_V`` the perpendicular position error; both are drawn and
    reported as the line's stated errors.
    """
    rng = np.random.default_rng(rng)
    m = truth.m
    minv = np.linalg.inv(m)
    dv, dm = truth.addition_V, truth.mutual_V
    c = np.asarray(offset_V, float)
    box = (min(x[0], x[-1]), max(x[0], x[-1]), min(y[0], y[-1]), max(y[0], y[-1]))
    corners = np.array([[box[0], box[2]], [box[1], box[2]], [box[0], box[3]], [box[1], box[3]]])
    vc = corners @ m.T
    nmax = int(np.ceil(max((vc[:, 0].max() - c[0]) / dv[0], (vc[:, 1].max() - c[1]) / dv[1]))) + 3
    fams: dict[str, list[TransitionLine]] = {"dot1": [], "dot2": [], "interdot": []}

    def add(name, a_virt, b_virt, width):
        pa, pb = minv @ np.asarray(a_virt), minv @ np.asarray(b_virt)
        seg = _clip(pa, pb, box)
        if seg is None:
            return
        (xa, ya), (xb, yb) = seg
        full = np.hypot(pb[0] - pa[0], pb[1] - pa[1])
        if np.hypot(xb - xa, yb - ya) < min_length_frac * full:
            return
        slope = (pb[1] - pa[1]) / (pb[0] - pa[0]) if pb[0] != pa[0] else np.inf
        s_err = abs(slope) * slope_noise if slope_noise else 1e-6 * abs(slope)
        s_meas = slope + (rng.normal(0, s_err) if slope_noise else 0.0)
        x0, y0 = 0.5 * (xa + xb), 0.5 * (ya + yb)
        # perpendicular shift
        norm = np.hypot(1.0, slope)
        d = rng.normal(0, pos_noise_V) if pos_noise_V else 0.0
        x0 += -slope / norm * d
        y0 += 1.0 / norm * d
        fams[name].append(
            TransitionLine(
                family=name, x0=x0, y0=y0, slope=s_meas, slope_stderr=s_err,
                position_stderr=pos_noise_V if pos_noise_V else 1e-7,
                start=(xa, ya), end=(xb, yb), width_V=width, width_stderr_V=0.02 * width if np.isfinite(width) else np.nan,
                n_points=50, step_sign=1,
            )
        )

    for n1 in range(nmax + 1):
        for n2 in range(nmax + 1):
            if n1 >= 1:
                u = dv[0] * (n1 - 0.5) + dm[0] * n2 + c[0]
                lo = dv[1] * (n2 - 0.5) + dm[1] * n1 + c[1] if n2 >= 1 else -1e3
                hi = dv[1] * (n2 + 0.5) + dm[1] * (n1 - 1) + c[1]
                add("dot1", (u, lo), (u, hi), width_V[0])
            if n2 >= 1:
                v = dv[1] * (n2 - 0.5) + dm[1] * n1 + c[1]
                lo = dv[0] * (n1 - 0.5) + dm[0] * n2 + c[0] if n1 >= 1 else -1e3
                hi = dv[0] * (n1 + 0.5) + dm[0] * (n2 - 1) + c[0]
                add("dot2", (lo, v), (hi, v), width_V[1])
            if n1 >= 1 and n2 >= 0:
                # interdot between (n1, n2) and (n1-1, n2+1)
                u = dv[0] * (n1 - 0.5) + dm[0] * n2 + c[0]
                v = dv[1] * (n2 + 0.5) + dm[1] * (n1 - 1) + c[1]
                add("interdot", (u, v), (u + dm[0], v + dm[1]), np.nan)
    families = {}
    for name, ls in fams.items():
        if ls:
            key = (lambda t: t.y0) if name == "dot2" else (lambda t: t.x0)
            ls = sorted(ls, key=key)
            sl = np.array([t.slope for t in ls])
            families[name] = LineFamily(name=name, slope=float("nan"), slope_stderr=float("nan"), lines=tuple(ls))
            del sl
    axes = MapAxes(x=np.asarray(x, float), y=np.asarray(y, float), x_gate="PA", y_gate="PB")
    return LineDetection(
        axes=axes, families=families, unassigned=(), jumps=(), excluded_rows=np.zeros(0, int),
        noise_level=0.0, snr=np.inf, quality=Quality(),
    )


#: Worked example of the shared references file (computed from the CI formulas):
#: Cdg = [[10, 3], [2.5, 9]] aF, C11 = C22 = 80 aF, Cm = 15 aF.
WORKED = {"cdg": [[10.0, 3.0], [2.5, 9.0]], "c1": 80.0, "c2": 80.0, "cm": 15.0}
