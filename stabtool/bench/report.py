"""Benchmark reports: the summary figures, ``bench.json``, PNG plots and a text table.

Figures per subset of maps (all, each SNR, each artefact, each preset):

* ``n``; ``ran`` (fraction where the analysis returned a result); ``ok``
  (fraction with ``quality.ok``);
* per group (slopes, virtual gates, Cdg, lever arms, charging energies):
  ``coverage`` (fraction of maps where every element of the group was
  reported), and the median, 95th and band percentiles of its worst-element
  absolute and relative errors over the covered maps (also over the covered
  maps whose verdict was ok); ``beyond_bound`` (fraction of maps beyond the
  fitter bound, whatever the verdict);
* ``silent_failure_rate``: fraction of maps with ``quality.ok`` and an error
  beyond a fitter bound (:mod:`stabtool.bench.bounds`), and the same as a
  fraction of the ok maps.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from ..io.atomic import atomic_savefig
from .bounds import FITTER_BOUNDS, FitterBounds
from .pulls import summarise_pulls
from .compare import GROUP_LABELS, GROUPS
from .grid import ARTEFACT_LABELS, ARTEFACTS, PRESETS, SNRS
from .run import BenchRun, CaseOutcome
from .stats import CHECKED_GROUPS, error_stats, nan_percentile

__all__ = [
    "bench_document",
    "format_table",
    "plot_artefacts",
    "plot_coverage",
    "plot_errors",
    "speed_summary",
    "summarise",
    "summarise_outcomes",
    "write_json",
    "write_report",
]


def _frac(k: float, n: int) -> float:
    return k / n if n else math.nan


def summarise_outcomes(outcomes: Sequence[CaseOutcome]) -> dict[str, Any]:
    """Accuracy figures of a set of outcomes (see the module docstring).

    Returns
    -------
    dict
        ``{"n", "ran", "ok", "silent_failures", "silent_failure_rate",
        "silent_failure_rate_of_ok", "groups": {group: {...}},
        "elements": {group: {element: {"abs": {...}, "rel": {...}}}}}``.
    """
    n = len(outcomes)
    n_ok = sum(o.ok for o in outcomes)
    n_silent = sum(o.silent.silent for o in outcomes)
    groups: dict[str, Any] = {}
    elements: dict[str, Any] = {}
    for g in GROUPS:
        covered = [o for o in outcomes if o.comparison.groups[g].complete]
        covered_ok = [o for o in covered if o.ok]
        entry: dict[str, Any] = {
            "coverage": _frac(len(covered), n),
            "abs": error_stats(o.comparison.groups[g].abs for o in covered).to_dict(),
            "rel": error_stats(o.comparison.groups[g].rel for o in covered).to_dict(),
            "abs_ok": error_stats(o.comparison.groups[g].abs for o in covered_ok).to_dict(),
            "rel_ok": error_stats(o.comparison.groups[g].rel for o in covered_ok).to_dict(),
        }
        if g in CHECKED_GROUPS:
            entry["beyond_bound"] = _frac(sum(g in o.silent.beyond for o in outcomes), n)
            entry["silent_failures"] = sum(o.ok and g in o.silent.beyond for o in outcomes)
        groups[g] = entry
        elements[g] = {}
        for e in GROUPS[g]:
            errs = [o.comparison.elements[g][e] for o in outcomes]
            elements[g][e] = {
                "coverage": _frac(sum(x.reported for x in errs), n),
                "abs": {
                    "median": nan_percentile([x.abs for x in errs], 50),
                    "p95": nan_percentile([x.abs for x in errs], 95),
                },
                "rel": {
                    "median": nan_percentile([x.rel for x in errs], 50),
                    "p95": nan_percentile([x.rel for x in errs], 95),
                },
            }
    ratios = [o.speed_ratio for o in outcomes if o.ran]
    pull_stats = summarise_pulls(o.pulls for o in outcomes)
    return {
        "n": n,
        "speed_ratio": error_stats(ratios).to_dict(),
        "ran": _frac(sum(o.ran for o in outcomes), n),
        "ok": _frac(n_ok, n),
        "silent_failures": n_silent,
        "silent_failure_rate": _frac(n_silent, n),
        "silent_failure_rate_of_ok": _frac(n_silent, n_ok),
        "groups": groups,
        "elements": elements,
        "pulls": {g: ps.to_dict() for g, ps in pull_stats.items()},
    }


def _by(outcomes: Sequence[CaseOutcome], key, order: Iterable[Any], fmt) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for value in order:
        subset = [o for o in outcomes if key(o) == value]
        if subset:
            out[fmt(value)] = summarise_outcomes(subset)
    return out


def speed_summary(run: BenchRun) -> dict[str, Any]:
    """Speed figures of a run.

    Returns
    -------
    dict
        ``stages``: median and 95th percentile seconds of every timed stage
        (``simulate``, ``pipeline``, ``canny_hough``, their ``_cpu``
        variants, ``stage:*``); ``ratio_pipeline_to_canny_hough``: median,
        95th percentile, min, max over maps of the CPU-time ratio (and the
        wall-time ratio); ``load_average_1min_end``: the machine's load when
        the figures were made; ``wall_seconds``, ``workers``, ``cpu_seconds`` (sum over
        maps), ``cpu_seconds_per_map`` and ``idle_wall_estimate_seconds``
        (``cpu_seconds / workers``: the wall time on otherwise idle cores,
        pool start-up excluded).
    """
    outs = run.outcomes
    keys: list[str] = []
    for o in outs:
        for k in o.timings:
            if k not in keys:
                keys.append(k)
    stages = {}
    for k in keys:
        vals = [o.timings[k] for o in outs if k in o.timings]
        stages[k] = {"n": len(vals), "median": nan_percentile(vals, 50), "p95": nan_percentile(vals, 95),
                     "max": max(vals) if vals else math.nan}
    ratios = [o.speed_ratio for o in outs if o.ran and math.isfinite(o.speed_ratio)]
    ratios_wall = [o.speed_ratio_wall for o in outs if o.ran and math.isfinite(o.speed_ratio_wall)]
    n = len(outs)
    cpu = run.cpu_seconds
    return {
        "stages": stages,
        "ratio_pipeline_to_canny_hough": {
            "n": len(ratios),
            "median": nan_percentile(ratios, 50),
            "p95": nan_percentile(ratios, 95),
            "min": min(ratios) if ratios else math.nan,
            "max": max(ratios) if ratios else math.nan,
            "clock": "cpu time of the worker process",
        },
        "ratio_pipeline_to_canny_hough_wall": {
            "n": len(ratios_wall),
            "median": nan_percentile(ratios_wall, 50),
            "p95": nan_percentile(ratios_wall, 95),
        },
        "load_average_1min_end": _loadavg(),
        "wall_seconds": run.wall_seconds,
        "workers": run.workers,
        "cpu_seconds": cpu,
        "cpu_seconds_per_map": _frac(cpu, n) if n else math.nan,
        "idle_wall_estimate_seconds": cpu / run.workers if run.workers else math.nan,
        "wall_seconds_per_map": _frac(run.wall_seconds, n) if n else math.nan,
    }


def _loadavg() -> float:
    try:
        return float(os.getloadavg()[0])
    except (OSError, AttributeError):  # pragma: no cover - not on every platform
        return math.nan


def summarise(run: BenchRun) -> dict[str, Any]:
    """Figures of a run: overall, by SNR, by artefact, by preset, and speed."""
    outs = run.outcomes
    snrs = sorted({o.case.snr for o in outs} | set()) or list(SNRS)
    arts = [a for a in ARTEFACTS if any(o.case.artefact == a for o in outs)]
    arts += sorted({o.case.artefact for o in outs} - set(arts))
    pres = [p for p in PRESETS if any(o.case.preset == p for o in outs)]
    pres += sorted({o.case.preset for o in outs} - set(pres))
    return {
        "overall": summarise_outcomes(outs),
        "by_snr": _by(outs, lambda o: o.case.snr, snrs, lambda v: f"{v:g}"),
        "by_artefact": _by(outs, lambda o: o.case.artefact, arts, str),
        "by_preset": _by(outs, lambda o: o.case.preset, pres, str),
        "speed": speed_summary(run),
    }


def _case_record(o: CaseOutcome) -> dict[str, Any]:
    return {
        **o.case.to_dict(),
        "ran": o.ran,
        "ok": o.ok,
        "silent_failure": o.silent.silent,
        "beyond_bound": list(o.silent.beyond),
        "message": o.message,
        "quality_warnings": list(o.warnings),
        "errors": {
            g: {"abs": ge.abs, "rel": ge.rel, "complete": ge.complete}
            for g, ge in o.comparison.groups.items()
        },
        "timings_s": dict(o.timings),
        "pulls": {g: dict(v) for g, v in o.pulls.items()},
        "cpu_seconds": o.cpu_seconds,
        "info": dict(o.info),
    }


def bench_document(
    run: BenchRun,
    *,
    command: str,
    seed: int,
    settings: Mapping[str, Any] | None = None,
    bounds: FitterBounds = FITTER_BOUNDS,
    summary: Mapping[str, Any] | None = None,
) -> dict[str, Any]:
    """The whole ``bench.json`` object: command, seed, bounds, figures and every case."""
    from .. import __version__

    return {
        "command": command,
        "seed": int(seed),
        "stabtool_version": __version__,
        "started_utc": run.started_utc,
        "settings": dict(settings or {}),
        "n_cases": len(run.outcomes),
        "grid": {
            "snr": sorted({o.case.snr for o in run.outcomes}),
            "presets": sorted({o.case.preset for o in run.outcomes}),
            "artefacts": [a for a in ARTEFACTS if any(o.case.artefact == a for o in run.outcomes)],
        },
        "bounds": bounds.to_dict(),
        "definitions": {
            "snr": "charge-step height / white-noise standard deviation (generator definition)",
            "error": "worst element of each group; virtual_gate in absolute units, others relative",
            "coverage": "fraction of maps where every element of the group was reported",
            "silent_failure": "quality ok but an error beyond the fitter bound",
            "speed_ratio": "analysis CPU time / CPU time of bare skimage canny (sigma 1.5 px) + hough_line "
                           "(0.5 deg bins) + hough_line_peaks on the same map, in the same worker (best of 3)",
            "times": "seconds; stage:* are the analysis's own wall-clock stage times",
        },
        "summary": dict(summary if summary is not None else summarise(run)),
        "cases": [_case_record(o) for o in run.outcomes],
    }


def _clean(obj: Any) -> Any:
    """Make ``obj`` strict JSON: NaN → null, ±inf → "inf"/"-inf", numpy scalars → Python."""
    if isinstance(obj, Mapping):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        x = float(obj)
        if math.isnan(x):
            return None
        if math.isinf(x):
            return "inf" if x > 0 else "-inf"
        return x
    return obj


def write_json(document: Mapping[str, Any], path: str | os.PathLike[str]) -> Path:
    """Write ``document`` as strict JSON (NaN as null) to ``path``; return the path."""
    p = Path(path)
    p.write_text(json.dumps(_clean(document), indent=1, allow_nan=False) + "\n")
    return p


# ---------------------------------------------------------------- plots

_PLOT_GROUPS = ("slopes", "interdot_slope", "virtual_gate", "cdg", "lever_arm", "charging_energy")


def _primary(group: str) -> str:
    return "abs" if group == "virtual_gate" else "rel"


def _bound_lines(group: str, bounds: FitterBounds) -> list[tuple[float, str]]:
    rel = {"cdg": bounds.cdg_rel, "lever_arm": bounds.lever_arm_rel,
           "charging_energy": bounds.charging_energy_rel}
    return [(rel[group], f"fitter bound ({100 * rel[group]:g} %)")] if group in rel else []


def _draw_bound(ax, group: str, x: np.ndarray, bounds: FitterBounds, *, label: bool) -> None:
    """The fitter bound as a red dashed line (a step at the clean-SNR threshold for virtual gates)."""
    if group == "virtual_gate" and x.size:
        xs = np.sort(x)
        ys = np.array([bounds.virtual_gate(v) for v in xs])
        lab = (f"fitter bound ({bounds.virtual_gate_noisy:g} below SNR {bounds.clean_snr:g}, "
               f"{bounds.virtual_gate_clean:g} from it)")
        ax.plot(xs, ys, drawstyle="steps-post", color="C3", ls="--", lw=1.2, label=lab if label else None)
        return
    for b, lab in _bound_lines(group, bounds):
        ax.axhline(b, color="C3", ls="--", lw=1.2, label=lab if label else None)


def _snr_axis(ax, x) -> None:
    """Log SNR axis with a tick at each SNR of the grid and fixed limits (also for empty panels)."""
    from matplotlib.ticker import NullLocator

    xs = np.asarray(x, float)
    xs = xs[np.isfinite(xs) & (xs > 0)]
    ax.set_xscale("log")
    if xs.size:
        ax.set_xlim(xs.min() / 1.25, xs.max() * 1.25)
        ax.set_xticks(xs)
        ax.set_xticklabels([f"{v:g}" for v in xs])
    ax.xaxis.set_minor_locator(NullLocator())


def _snr_series(summary: Mapping[str, Any], group: str, kind: str, stat: str) -> tuple[np.ndarray, np.ndarray]:
    by = summary["by_snr"]
    xs = np.array([float(k) for k in by])
    ys = np.array([
        np.nan if by[k]["groups"][group][kind][stat] is None else float(by[k]["groups"][group][kind][stat])
        for k in by
    ])
    return xs, ys


def _positive(y: np.ndarray, floor: float) -> np.ndarray:
    y = np.asarray(y, float)
    return np.where(np.isfinite(y), np.maximum(y, floor), np.nan)


def _save(fig: Any, path: str | os.PathLike[str], title: str) -> Path:
    """Title the figure, write it atomically as PNG (110 dpi) and close it."""
    import matplotlib.pyplot as plt

    if title:
        fig.suptitle(title)
    p = Path(path)
    atomic_savefig(fig, p, dpi=110)
    plt.close(fig)
    return p


def plot_errors(summary: Mapping[str, Any], path: str | os.PathLike[str], *,
                bounds: FitterBounds = FITTER_BOUNDS, title: str = "") -> Path:
    """Error versus SNR, one panel per quantity: median, 25–75 % and 5–95 % bands, bounds."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(2, 4, figsize=(17, 7.8))
    fig.subplots_adjust(left=0.045, right=0.99, bottom=0.075, top=0.91, wspace=0.25, hspace=0.33)
    floor = 1e-6
    for ax, group in zip(axes.flat, _PLOT_GROUPS):
        kind = _primary(group)
        x, med = _snr_series(summary, group, kind, "median")
        _, p5 = _snr_series(summary, group, kind, "p5")
        _, p25 = _snr_series(summary, group, kind, "p25")
        _, p75 = _snr_series(summary, group, kind, "p75")
        _, p95 = _snr_series(summary, group, kind, "p95")
        ax.fill_between(x, _positive(p5, floor), _positive(p95, floor), color="C0", alpha=0.18,
                        label="5–95 %")
        ax.fill_between(x, _positive(p25, floor), _positive(p75, floor), color="C0", alpha=0.35,
                        label="25–75 %")
        ax.plot(x, _positive(med, floor), "o-", color="C0", lw=2, label="median")
        ax.plot(x, _positive(p95, floor), "v:", color="C0", lw=1, label="95th percentile")
        _draw_bound(ax, group, x, bounds, label=True)
        ax.set_xscale("log")
        ax.set_yscale("log")
        _snr_axis(ax, x)
        ax.set_xlabel("SNR (step height / noise std)")
        unit = "absolute error" if kind == "abs" else "relative error"
        ax.set_title(f"{GROUP_LABELS[group].split(' (')[0]}: {unit}")
        ax.grid(True, which="major", alpha=0.3)
        if not np.isfinite(med).any():
            ax.text(0.5, 0.5, "no result at any SNR", transform=ax.transAxes, ha="center",
                    va="center", color="0.4")
    ax = axes.flat[len(_PLOT_GROUPS)]
    h, lab = axes.flat[_PLOT_GROUPS.index("virtual_gate")].get_legend_handles_labels()
    lab = [
        "fitter bound: virtual gate\n"
        f"  {bounds.virtual_gate_noisy:g} below SNR {bounds.clean_snr:g}, "
        f"{bounds.virtual_gate_clean:g} from it;\n"
        f"  Cdg {100 * bounds.cdg_rel:g} %, lever arm {100 * bounds.lever_arm_rel:g} %,\n"
        f"  charging energy {100 * bounds.charging_energy_rel:g} %"
        if text.startswith("fitter bound") else text
        for text in lab
    ]
    ax.legend(h, lab, loc="center", frameon=False, fontsize=11)
    ax.axis("off")
    ax.text(0.5, 0.0, "worst element per map;\nerrors over maps where\nthe quantity was reported",
            ha="center", va="bottom", transform=ax.transAxes, fontsize=9, color="0.3")
    ax = axes.flat[len(_PLOT_GROUPS) + 1]
    by = summary["by_snr"]
    xs = np.array([float(k) for k in by])
    for stat, style, lab in (("median", "o-", "median"), ("p95", "v:", "95th percentile")):
        ys = np.array([np.nan if by[k]["speed_ratio"][stat] is None else by[k]["speed_ratio"][stat]
                       for k in by], float)
        ax.plot(xs, ys, style, color="C2", lw=2 if stat == "median" else 1, label=lab)
    ax.set_xscale("log")
    ax.set_yscale("log")
    _snr_axis(ax, xs)
    ax.set_xlabel("SNR (step height / noise std)")
    ax.set_title("speed: analysis / bare Canny+Hough")
    ax.set_ylabel("CPU-time ratio, same map")
    ax.grid(True, which="major", alpha=0.3)
    ax.legend(fontsize=9)
    return _save(fig, path, title)


def plot_coverage(summary: Mapping[str, Any], path: str | os.PathLike[str], *, title: str = "") -> Path:
    """Coverage and ok fraction versus SNR (left) and silent-failure rate versus SNR (right)."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    by = summary["by_snr"]
    x = np.array([float(k) for k in by])
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(12, 6.0))
    fig.subplots_adjust(left=0.065, right=0.99, bottom=0.27, top=0.85, wspace=0.18)
    markers = "osx^vD"
    for i, group in enumerate(_PLOT_GROUPS):
        y = [by[k]["groups"][group]["coverage"] for k in by]
        a1.plot(x, 100 * np.asarray(y, float), marker=markers[i], ms=11 - 1.5 * i, lw=2.6 - 0.4 * i,
                color=f"C{i}", label=GROUP_LABELS[group].split(" (")[0])
    a1.plot(x, 100 * np.asarray([by[k]["ok"] for k in by], float), "s--", color="k", label="quality ok")
    a1.set_ylabel("maps (%)")
    a1.set_title("coverage (quantity reported)\nand quality verdict", fontsize=11)
    a1.set_ylim(-3, 103)
    s_all = [by[k]["silent_failure_rate"] for k in by]
    s_ok = [by[k]["silent_failure_rate_of_ok"] for k in by]
    a2.plot(x, 100 * np.asarray(s_all, float), "o-", color="k", lw=2.2, label="silent failures / all maps")
    a2.plot(x, 100 * np.asarray([np.nan if v is None else v for v in s_ok], float), "s--",
            color="0.45", lw=1.6, label="silent failures / ok maps")
    for j, group in enumerate(CHECKED_GROUPS):
        y = [by[k]["groups"][group]["beyond_bound"] for k in by]
        k = _PLOT_GROUPS.index(group)
        a2.plot(x, 100 * np.asarray(y, float), ls=":", marker=markers[k], ms=8 - 1.2 * j, mfc="none",
                color=f"C{k}", lw=1.2,
                label=f"beyond bound: {GROUP_LABELS[group].split(' (')[0]}")
    a2.set_title("silent failures (quality ok, error beyond fitter bound)\n"
                 "dotted: error beyond bound, whatever the verdict", fontsize=11)
    a2.set_ylabel("maps (%)")
    top = max([v for line in a2.get_lines() for v in np.asarray(line.get_ydata(), float)
               if np.isfinite(v)] + [0.0])
    a2.set_ylim(-0.03 * max(10.0, 1.15 * top), max(10.0, 1.15 * top))
    for ax in (a1, a2):
        ax.set_xscale("log")
        _snr_axis(ax, x)
        ax.set_xlabel("SNR (step height / noise std)")
        ax.grid(True, alpha=0.3)
        ax.legend(fontsize=8.5, loc="upper center", bbox_to_anchor=(0.5, -0.15), ncol=2, frameon=False)
    return _save(fig, path, title)


def plot_artefacts(outcomes: Sequence[CaseOutcome], path: str | os.PathLike[str], *,
                   bounds: FitterBounds = FITTER_BOUNDS, title: str = "") -> Path:
    """Median error versus SNR per artefact, one panel per checked quantity."""
    import matplotlib

    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt

    arts = [a for a in ARTEFACTS if any(o.case.artefact == a for o in outcomes)]
    snrs = sorted({o.case.snr for o in outcomes})
    fig, axes = plt.subplots(1, 4, figsize=(16, 5.0))
    fig.subplots_adjust(left=0.045, right=0.99, bottom=0.25, top=0.85, wspace=0.22)
    for ax, group in zip(axes, CHECKED_GROUPS):
        kind = _primary(group)
        for i, art in enumerate(arts):
            med = []
            for s in snrs:
                vals = [getattr(o.comparison.groups[group], kind) for o in outcomes
                        if o.case.artefact == art and o.case.snr == s and o.comparison.groups[group].complete]
                med.append(nan_percentile(vals, 50))
            ax.plot(snrs, _positive(np.asarray(med), 1e-6), "o-", color=f"C{i}", label=ARTEFACT_LABELS[art])
        _draw_bound(ax, group, np.asarray(snrs, float), bounds, label=False)
        ax.set_xscale("log")
        ax.set_yscale("log")
        _snr_axis(ax, snrs)
        ax.set_xlabel("SNR")
        ax.set_title(f"median {GROUP_LABELS[group]}")
        ax.grid(True, alpha=0.3)
        if not any(np.isfinite(np.asarray(line.get_ydata(), float)).any() for line in ax.get_lines()[:-1]):
            ax.text(0.5, 0.5, "no result at any SNR", transform=ax.transAxes, ha="center",
                    va="center", color="0.4")
    h, lab = axes[0].get_legend_handles_labels()
    fig.legend(h, lab, loc="lower center", ncol=len(arts), fontsize=10, title="artefact",
               title_fontsize=10, frameon=False)
    return _save(fig, path, title)


# ---------------------------------------------------------------- table

_TABLE_GROUPS = (("slopes", "slope"), ("interdot_slope", "interdot"), ("virtual_gate", "VG abs"), ("cdg", "Cdg"),
                 ("lever_arm", "lever"), ("charging_energy", "E_C"))


def _fmt_err(stats: Mapping[str, Any], kind: str) -> str:
    med, p95 = stats.get("median"), stats.get("p95")
    if med is None or (isinstance(med, float) and math.isnan(med)):
        return "—"

    def f(v: Any) -> str:
        if v is None or (isinstance(v, float) and math.isnan(v)):
            return "—"
        if math.isinf(v):
            return "inf"
        if kind == "abs":
            return f"{v:.4f}" if v < 0.1 else f"{v:.2f}"
        return f"{100 * v:.1f}%" if v < 10 else ">999%"

    return f"{f(med)}/{f(p95)}"


def _pct(v: Any) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return "—"
    return f"{100 * v:.0f}%"


def _rows(block: Mapping[str, Any], head: str, fmt_key) -> list[list[str]]:
    rows = []
    for key, s in block.items():
        g = s["groups"]
        row = [fmt_key(key), str(s["n"]), _pct(s["ok"]), _pct(s["silent_failure_rate"])]
        for group, _ in _TABLE_GROUPS:
            row.append(f"{_fmt_err(g[group][_primary(group)], _primary(group))} {_pct(g[group]['coverage'])}")
        rows.append(row)
    return rows


_PULL_LABELS = {"virtual_gate": "VG", "cdg": "Cdg", "lever_arm": "α", "charging_energy": "E_C"}


def format_table(summary: Mapping[str, Any]) -> str:
    """Compact text table: per SNR and per artefact, plus the speed line.

    Each error cell is ``median/p95 coverage`` of the worst element per map
    (virtual gates absolute, the rest relative).
    """
    header = ["", "n", "ok", "silent"] + [lab for _, lab in _TABLE_GROUPS]
    sections = [
        ("SNR", _rows(summary["by_snr"], "SNR", lambda k: f"SNR {k}")),
        ("artefact", _rows(summary["by_artefact"], "artefact", lambda k: ARTEFACT_LABELS.get(k, k))),
        ("all", _rows({"all": summary["overall"]}, "all", lambda k: "all")),
    ]
    all_rows = [header] + [r for _, rows in sections for r in rows]
    widths = [max(len(r[i]) for r in all_rows) for i in range(len(header))]

    def line(r: list[str]) -> str:
        return "  ".join(c.rjust(w) if i else c.ljust(w) for i, (c, w) in enumerate(zip(r, widths)))

    out = [line(header), "  ".join("-" * w for w in widths)]
    for name, rows in sections:
        out += [line(r) for r in rows]
        out.append("")
    sp = summary.get("speed")
    if sp:
        r = sp["ratio_pipeline_to_canny_hough"]
        st = sp["stages"]

        def med(k: str) -> str:
            v = st.get(k, {}).get("median")
            return "—" if v is None or (isinstance(v, float) and math.isnan(v)) else f"{1e3 * v:.0f} ms"

        stage_bits = [f"{k[6:]} {med(k)}" for k in st if k.startswith("stage:")]
        rw = sp.get("ratio_pipeline_to_canny_hough_wall", {})
        out.append(
            f"speed (median per map): analysis {med('pipeline_cpu')} CPU ({med('pipeline')} wall), "
            f"bare Canny+Hough {med('canny_hough_cpu')} CPU; ratio {_num(r['median'])}x "
            f"(p95 {_num(r['p95'])}x; wall-clock ratio {_num(rw.get('median'))}x); "
            f"map generation {med('simulate')}; slowest analysis "
            f"{_num(st.get('pipeline_cpu', {}).get('max'))} s CPU"
        )
        if stage_bits:
            out.append("analysis stages (median wall): " + ", ".join(stage_bits))
        load = sp.get("load_average_1min_end")
        load_txt = "" if load is None or not math.isfinite(load) else f" (load average {load:.1f})"
        out.append(
            f"run: {sp['wall_seconds']:.0f} s wall with {sp['workers']} workers{load_txt}; "
            f"{sp['cpu_seconds_per_map']:.2f} s CPU per map (generation included); "
            f"on {sp['workers']} idle core(s) ≈ {sp['idle_wall_estimate_seconds']:.0f} s"
        )
    pulls = summary.get("overall", {}).get("pulls")
    if pulls:
        bits = [f"{_PULL_LABELS.get(g, g)} {_pull(ps.get('rms'))} (n={ps.get('n')})" for g, ps in pulls.items()]
        out.append("stated errors, rms pull (estimate − truth)/σ, honest ≈ 1: " + ", ".join(bits))
    out.append("cells: median/p95 of the worst element per map, then coverage; "
               "VG absolute, others relative; silent = quality ok but beyond the fitter bound")
    return "\n".join(out)


def _num(v: Any) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "—"
    return f"{v:.1f}"


def write_report(
    run: BenchRun,
    out_dir: str | os.PathLike[str],
    *,
    command: str,
    seed: int,
    settings: Mapping[str, Any] | None = None,
    bounds: FitterBounds = FITTER_BOUNDS,
) -> tuple[dict[str, Any], list[Path]]:
    """Write ``bench.json`` and the PNG plots into ``out_dir``.

    Returns
    -------
    document : dict
        The ``bench.json`` object.
    paths : list of Path
        Files written.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    summary = summarise(run)
    doc = bench_document(run, command=command, seed=seed, settings=settings, bounds=bounds, summary=summary)
    n = len(run.outcomes)
    title = f"stabtool bench: {n} synthetic maps, seed {seed}"
    paths = [
        write_json(doc, out / "bench.json"),
        plot_errors(summary, out / "bench_errors.png", bounds=bounds, title=title),
        plot_coverage(summary, out / "bench_coverage.png", title=title),
        plot_artefacts(run.outcomes, out / "bench_artefacts.png", bounds=bounds, title=title),
    ]
    return doc, paths


def _pull(v: Any) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "—"
    return f"{v:.2f}"
