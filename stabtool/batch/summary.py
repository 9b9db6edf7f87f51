"""``summary.html``: one self-contained page to scan a night of maps in a minute.

The page carries its own CSS and JavaScript (no network, no external files
except the per-map plots, which are linked relatively so the folder can be
moved or zipped as a whole). It shows the counts and the caution, trend plots
of the key numbers across the night (embedded PNG), the drift of repeated
sweeps, and a sortable, filterable table with thumbnails linked to the full
plots.
"""

from __future__ import annotations

import base64
import html
import io
import math
import os
import re
import warnings
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from .store import CAUTION, BatchRecord, atomic_write_text

__all__ = ["KEY_QUANTITIES", "drift_for_batch", "find_repeated_series", "series_of_files", "write_summary"]

#: (column of the flat table, label, scale to display unit, unit) of the trend plots and table. The
#: virtual-gate elements are what the control stack takes (the slopes they come from, ``M12 = −1/s1``,
#: ``M21 = −s2``, are in ``results.csv``).
KEY_QUANTITIES: tuple[tuple[str, str, float, str], ...] = (
    ("virtual_gate_matrix.0.1", "M12", 1.0, ""),
    ("virtual_gate_matrix.1.0", "M21", 1.0, ""),
    ("addition_voltages_V.dot1", "ΔV dot1", 1e3, "mV"),
    ("addition_voltages_V.dot2", "ΔV dot2", 1e3, "mV"),
    ("lever_arm.0.0", "α11", 1.0, ""),
    ("lever_arm.1.1", "α22", 1.0, ""),
    ("charging_energy_meV.dot1", "E_C1", 1.0, "meV"),
    ("charging_energy_meV.dot2", "E_C2", 1.0, "meV"),
    ("charging_energy_meV.mutual", "E_Cm", 1.0, "meV"),
)

#: Where the one-standard-error of a key quantity is looked for (first found wins).
_ERROR_COLUMNS = {
    "virtual_gate_matrix.0.1": ("virtual_gate_matrix_error.0.1",),
    "virtual_gate_matrix.1.0": ("virtual_gate_matrix_error.1.0",),
    "addition_voltages_V.dot1": ("addition_voltages_V_error.dot1",),
    "addition_voltages_V.dot2": ("addition_voltages_V_error.dot2",),
    "lever_arm.0.0": ("lever_arm_error.0.0",),
    "lever_arm.1.1": ("lever_arm_error.1.1",),
    "charging_energy_meV.dot1": ("charging_energy_meV_error.dot1",),
    "charging_energy_meV.dot2": ("charging_energy_meV_error.dot2",),
    "charging_energy_meV.mutual": ("charging_energy_meV_error.mutual",),
}


# --------------------------------------------------------------------------- helpers
def _num(value: Any) -> float:
    if isinstance(value, bool) or value is None:
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


def _parse_time(text: str | None) -> datetime | None:
    from .drift import _parse_time as parse

    return parse(text)


def _time_axis(records: Sequence[BatchRecord]) -> tuple[np.ndarray, str]:
    """Hours since the first sweep when every record has a time, else the input order."""
    times = [_parse_time(r.time) for r in records]
    if records and all(t is not None for t in times):
        t0 = min(times)  # type: ignore[type-var]
        return np.array([(t - t0).total_seconds() / 3600 for t in times]), "time since first sweep (h)"  # type: ignore[operator]
    return np.array([float(r.order) for r in records]), "map number (input order)"


def _png_data_uri(fig: Any) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _trend_figure(records: Sequence[BatchRecord], rows: Sequence[dict]) -> str | None:
    """Trend plots of the key numbers as an embedded PNG (data URI), or None if nothing to plot."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    t, xlabel = _time_axis(records)
    status = np.array([r.status for r in records])
    panels = []
    for col, label, scale, unit in KEY_QUANTITIES:
        y = np.array([_num(row.get(col)) for row in rows]) * scale
        if np.isfinite(y).sum() < 2:
            continue
        err = np.full_like(y, np.nan)
        for ecol in _ERROR_COLUMNS.get(col, ()):
            e = np.array([_num(row.get(ecol)) for row in rows]) * scale
            if np.isfinite(e).any():
                err = e
                break
        panels.append((label + (f" ({unit})" if unit else ""), y, err))
    if not panels:
        return None
    ncol = 3 if len(panels) > 4 else 2 if len(panels) > 1 else 1
    nrow = math.ceil(len(panels) / ncol)
    fig = Figure(figsize=(4.0 * ncol, 2.6 * nrow), dpi=90)
    FigureCanvasAgg(fig)
    axes = np.atleast_1d(fig.subplots(nrow, ncol, squeeze=False)).ravel()
    for ax, (label, y, err) in zip(axes, panels):
        for st, color, marker in (("ok", "C0", "o"), ("doubtful", "C1", "s")):
            m = (status == st) & np.isfinite(y)
            if m.any():
                ax.errorbar(t[m], y[m], yerr=np.where(np.isfinite(err[m]), err[m], 0.0),
                            fmt=marker, ms=3.5, color=color, ecolor="0.6", elinewidth=0.8,
                            capsize=0, label=st)
        ax.set_title(label, fontsize=9)
        ax.tick_params(labelsize=7)
        ax.grid(True, alpha=0.3)
    for ax in axes[len(panels):]:
        ax.set_visible(False)
    for ax in axes[:len(panels)]:
        ax.set_xlabel(xlabel, fontsize=7)
    axes[0].legend(fontsize=7, loc="best")
    fig.tight_layout()
    return _png_data_uri(fig)


# --------------------------------------------------------------------------- drift in a batch
def _map_header(path: str, load_options: Mapping[str, Any] | None = None) -> dict | None:
    """Gates, window, device and time of a map file (the map itself is dropped)."""
    from ..io import load

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            da = load(path, **(load_options or {}))
    except Exception:  # noqa: BLE001 - a map that cannot be read is simply not in a series
        return None
    return _header_of_map(path, da)


def _header_of_map(path: str, da: Any) -> dict | None:
    """Gates, window, device and time of the map ``da`` read from ``path``."""
    from ..mapdata import map_axes
    from .drift import sweep_time_of

    try:
        ax = map_axes(da)
    except Exception:  # noqa: BLE001 - a map without usable axes is simply not in a series
        return None
    return {
        "path": path,
        "gates": (ax.x_gate, ax.y_gate),
        "device": str(da.attrs.get("device", "")),
        "window": (float(ax.x.min()), float(ax.x.max()), float(ax.y.min()), float(ax.y.max())),
        "shape": tuple(int(n) for n in da.shape),
        "time": sweep_time_of(da),
    }


def _header_of(rec: BatchRecord, load_options: Mapping[str, Any] | None = None) -> dict | None:
    """Header of a record's map from the record itself, else from the file."""
    info = rec.info or {}
    if info.get("window_V") and info.get("x_gate"):
        return {
            "path": rec.file,
            "gates": (info["x_gate"], info["y_gate"]),
            "device": info.get("device", ""),
            "window": tuple(info["window_V"]),
            "shape": tuple(info.get("shape") or ()),
            "time": rec.time,
        }
    return _map_header(rec.file, load_options)


def _overlap(a: tuple[float, float, float, float], b: tuple[float, float, float, float]) -> float:
    """Intersection over union of two voltage windows (x0, x1, y0, y1)."""
    ox = max(0.0, min(a[1], b[1]) - max(a[0], b[0]))
    oy = max(0.0, min(a[3], b[3]) - max(a[2], b[2]))
    inter = ox * oy
    union = (a[1] - a[0]) * (a[3] - a[2]) + (b[1] - b[0]) * (b[3] - b[2]) - inter
    return inter / union if union > 0 else 0.0


def find_repeated_series(
    records: Iterable[BatchRecord], *, min_sweeps: int = 3, min_overlap: float = 0.7,
    load_options: Mapping[str, Any] | None = None,
) -> list[list[str]]:
    """Group the analysed maps of a batch into series of repeated sweeps.

    A series: same device (attribute ``device``, when present), same gates on
    x and y, the same number of points, and windows whose intersection over
    union with the series' first window is at least ``min_overlap``; at
    least ``min_sweeps`` maps. Survey and zoom maps of other windows are
    thereby left out.

    ``load_options`` (``var``, ``x``, ``y``) read a map whose record lacks
    its window.

    Returns
    -------
    list of list of str
        File paths of each series.
    """
    candidates: dict[tuple, list[BatchRecord]] = {}
    for r in records:
        if r.status == "failed":
            continue
        res = r.result or {}
        candidates.setdefault((res.get("x_gate"), res.get("y_gate")), []).append(r)
    series: list[list[str]] = []
    for group in candidates.values():
        if len(group) < min_sweeps:
            continue
        heads = [h for h in (_header_of(r, load_options) for r in group) if h is not None]
        series.extend(_series_of_headers(heads, min_sweeps=min_sweeps, min_overlap=min_overlap))
    return series


def series_of_files(paths: Sequence[str], feature_dir: str | os.PathLike[str], *,
                    min_sweeps: int = 2, min_overlap: float = 0.7,
                    load_options: Mapping[str, Any] | None = None) -> tuple[list[list[str]] | None, dict[str, Any]]:
    """Series of repeated sweeps among map files (the rule of :func:`find_repeated_series`), each file read once.

    Each map's drift feature (:func:`stabtool.batch.drift.feature_of`) is
    saved under ``feature_dir`` while the map is in memory, so that
    :func:`stabtool.batch.drift.measure_drift` need not load the file again
    (only one feature image is held at a time). ``load_options`` (``var``,
    ``x``, ``y``) are passed to :func:`stabtool.io.load`.

    Returns
    -------
    series : list of list of str, or None
        File paths of each series of at least ``min_sweeps`` maps; None when
        a file cannot be read (its error is for the caller to report).
    items : dict
        Per path, what to pass to ``measure_drift``: a
        :class:`~stabtool.batch.drift.PreparedSweep`, or the path itself
        where no feature could be made (``measure_drift`` then loads it
        and reports its fault).
    """
    from ..io import load
    from .drift import PreparedSweep, feature_of

    heads: list[dict | None] = []
    items: dict[str, Any] = {}
    for k, path in enumerate(str(p) for p in paths):
        items[path] = path
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                da = load(path, **(load_options or {}))
        except Exception:  # noqa: BLE001 - reported by measure_drift, which loads it again
            heads.append(None)
            continue
        heads.append(_header_of_map(path, da))
        try:
            feat = feature_of(da)
        except Exception:  # noqa: BLE001, S112 - likewise
            continue
        target = Path(feature_dir) / f"sweep-{k:05d}.npy"
        np.save(target, feat.img, allow_pickle=False)
        items[path] = PreparedSweep.of(path, str(target), feat)
    if any(h is None for h in heads):
        return None, items
    series = _series_of_headers([h for h in heads if h is not None], min_sweeps=min_sweeps, min_overlap=min_overlap)
    return series, items


def _series_of_headers(heads: list[dict], *, min_sweeps: int, min_overlap: float) -> list[list[str]]:
    """Cluster map headers into series: the earliest map of each series (by time when every map
    has one, else as given) is its reference window."""
    if heads and all(_parse_time(h["time"]) is not None for h in heads):
        earliest = datetime.min.replace(tzinfo=timezone.utc)
        heads = sorted(heads, key=lambda h: _parse_time(h["time"]) or earliest)  # first = reference
    clusters: list[list[dict]] = []
    for h in heads:
        for c in clusters:
            first = c[0]
            if (first["gates"] == h["gates"] and first["device"] == h["device"]
                    and first["shape"] == h["shape"]
                    and _overlap(first["window"], h["window"]) >= min_overlap):
                c.append(h)
                break
        else:
            clusters.append([h])
    return [[h["path"] for h in c] for c in clusters if len(c) >= min_sweeps]


#: Series of at least this many sweeps are registered on the batch's worker pool.
PARALLEL_DRIFT_MIN = 16


def drift_for_batch(records: Sequence[BatchRecord], out_dir: str | os.PathLike[str], *,
                    executor: Any = None, prepared: Mapping[str, Any] | None = None,
                    load_options: Mapping[str, Any] | None = None) -> list:
    """Drift analysis of every series of repeated sweeps in a batch.

    Writes ``drift/<name>.csv|json|png`` per series into ``out_dir`` and
    returns the :class:`~stabtool.batch.drift.DriftResult` list (empty when
    the batch holds no repeated sweeps). A series whose drift cannot be
    measured is skipped with a note in its place, never failing the batch.
    With ``executor`` (the batch's process pool) the registrations of long
    series run in parallel (:func:`~stabtool.batch.drift.measure_drift`).
    ``prepared`` maps a file path to its saved feature image
    (:class:`~stabtool.batch.drift.PreparedSweep`, made by the batch worker):
    that sweep is not loaded again (same numbers). ``load_options``
    (``var``, ``x``, ``y``) read the others as the batch read them.
    """
    from .drift import measure_drift

    out = Path(out_dir) / "drift"
    results = []
    for paths in find_repeated_series(records, load_options=load_options):
        try:
            # already in time order; short series are not worth the pool's round trips
            items = [prepared.get(p, p) for p in paths] if prepared else paths
            res = measure_drift(items, order="given", load_options=load_options,
                                executor=executor if len(paths) >= PARALLEL_DRIFT_MIN else None)
        except Exception as exc:  # noqa: BLE001 - drift is an extra; the batch stands
            from ..errors import StabtoolWarning

            warnings.warn(f"drift not measured for {len(paths)} sweeps starting {paths[0]}: {exc}",
                          StabtoolWarning, stacklevel=2)
            continue
        name = re.sub(r"[^A-Za-z0-9_-]+", "_", f"{res.x_gate}_{res.y_gate}_{Path(res.files[0]).stem}")
        res.write_outputs(out, stem=name)
        results.append((res, f"drift/{name}.png"))
    return results


# --------------------------------------------------------------------------- page
_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Roboto,sans-serif;margin:1.5em;color:#222}
h1{font-size:1.4em;margin-bottom:.2em} h2{font-size:1.1em;margin-top:1.6em}
.caution{background:#fff4e5;border-left:4px solid #f0a020;padding:.6em 1em;margin:1em 0}
.counts span{display:inline-block;margin-right:1.2em;font-weight:600}
.ok{color:#1a7f37} .doubtful{color:#b35900} .failed{color:#c62828}
table{border-collapse:collapse;font-size:.85em;width:100%}
th,td{border-bottom:1px solid #ddd;padding:.3em .5em;text-align:left;vertical-align:top}
th{background:#f4f4f4;cursor:pointer;position:sticky;top:0;user-select:none}
th.sorted-asc::after{content:" \\25B2"} th.sorted-desc::after{content:" \\25BC"}
td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
td.reason{max-width:30em;font-size:.9em;color:#555} td.reason ul{margin:.2em 0;padding-left:1.2em}
summary{cursor:pointer}
img.thumb{width:150px;height:auto;border:1px solid #ccc}
img.trend{max-width:100%;border:1px solid #ddd}
#filter{margin:.5em 0;padding:.3em;width:20em}
.small{font-size:.85em;color:#555}
"""

_JS = """
(function(){
  const table=document.getElementById('results');
  if(!table) return;
  const body=table.tBodies[0];
  table.querySelectorAll('th').forEach(function(th,col){
    th.addEventListener('click',function(){
      const asc=!th.classList.contains('sorted-asc');
      table.querySelectorAll('th').forEach(h=>h.classList.remove('sorted-asc','sorted-desc'));
      th.classList.add(asc?'sorted-asc':'sorted-desc');
      const rows=Array.from(body.rows);
      rows.sort(function(a,b){
        const x=a.cells[col].dataset.v??a.cells[col].textContent;
        const y=b.cells[col].dataset.v??b.cells[col].textContent;
        const nx=parseFloat(x), ny=parseFloat(y);
        const bothNum=!isNaN(nx)&&!isNaN(ny);
        let c;
        if(bothNum){c=nx-ny;}
        else if(x===''&&y!==''){return 1;} else if(y===''&&x!==''){return -1;}
        else {c=x.localeCompare(y,undefined,{numeric:true});}
        return asc?c:-c;
      });
      rows.forEach(r=>body.appendChild(r));
    });
  });
  const f=document.getElementById('filter');
  if(f) f.addEventListener('input',function(){
    const q=f.value.toLowerCase();
    Array.from(body.rows).forEach(r=>{r.style.display=r.textContent.toLowerCase().includes(q)?'':'none';});
  });
})();
"""


def _fmt(value: float, unit_scale: float = 1.0) -> tuple[str, str]:
    if not math.isfinite(value):
        return "", ""
    v = value * unit_scale
    return f"{v:.4g}", repr(v)


def _table_html(records: Sequence[BatchRecord], rows: Sequence[dict]) -> str:
    esc = html.escape
    keys = [k for k in KEY_QUANTITIES if any(math.isfinite(_num(r.get(k[0]))) for r in rows)]
    head = ["#", "plot", "file", "status", "gates (x/y)"]
    head += [label + (f" ({unit})" if unit else "") for _, label, _, unit in keys]
    head += ["time", "reason / warnings", "analysis (s)"]
    out = ['<table id="results"><thead><tr>']
    out += [f"<th>{esc(h)}</th>" for h in head]
    out.append("</tr></thead><tbody>")
    for i, (rec, row) in enumerate(zip(records, rows)):
        cells = [f'<td class="num" data-v="{rec.order}">{rec.order}</td>']
        if rec.plot:
            href = esc(rec.plot, quote=True)
            cells.append(f'<td data-v=""><a href="{href}"><img class="thumb" loading="lazy" '
                         f'src="{href}" alt="plot of {esc(Path(rec.file).name, quote=True)}"></a></td>')
        else:
            cells.append('<td data-v=""></td>')
        cells.append(f"<td>{esc(rec.file)}</td>")
        cells.append(f'<td class="{rec.status}">{rec.status}</td>')
        gates = "/".join(str(row.get(k) or "") for k in ("x_gate", "y_gate")).strip("/")
        cells.append(f"<td>{esc(gates)}</td>")
        for col, _, scale, _ in keys:
            text, v = _fmt(_num(row.get(col)), scale)
            cells.append(f'<td class="num" data-v="{v}">{text}</td>')
        cells.append(f"<td>{esc(rec.time or '')}</td>")
        items = [s for s in [rec.reason, *(str(row.get("warnings") or "").split(" | "))] if s]
        if len(items) > 1:
            rest = "".join(f"<li>{esc(s)}</li>" for s in items[1:])
            reason = (f"<details><summary>{esc(items[0])} (+{len(items) - 1} more)</summary>"
                      f"<ul>{rest}</ul></details>")
        else:
            reason = esc(items[0]) if items else ""
        cells.append(f'<td class="reason" data-v="{len(items)}">{reason}</td>')
        text, v = _fmt(rec.elapsed_s)
        cells.append(f'<td class="num" data-v="{v}">{text}</td>')
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


def write_summary(
    out_dir: str | os.PathLike[str],
    records: Sequence[BatchRecord],
    *,
    drift: Sequence[Any] | None = None,
    notes: Sequence[str] = (),
    title: str = "stabtool batch summary",
) -> Path:
    """Write ``summary.html`` into ``out_dir`` (atomically) and return its path.

    Parameters
    ----------
    out_dir : path
        The batch folder (plots are linked relative to it).
    records : sequence of BatchRecord
        In the order the table starts in.
    drift : sequence of (DriftResult, relative PNG path), optional
        Drift of repeated sweeps (see :func:`drift_for_batch`).
    notes : sequence of str
        Extra lines shown under the counts (duplicates skipped, ...).
    """
    esc = html.escape
    rows = [r.row() for r in records]
    n = len(records)
    counts = {s: sum(r.status == s for r in records) for s in ("ok", "doubtful", "failed")}
    made = datetime.now(timezone.utc).strftime("%Y-%m-%d %H:%M UTC")
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{esc(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{esc(title)}</h1>",
        f'<p class="small">{n} maps · written {made} · '
        '<a href="results.csv">results.csv</a> · <a href="results.nc">results.nc</a></p>',
        '<p class="counts">'
        f'<span class="ok">{counts["ok"]} ok</span>'
        f'<span class="doubtful">{counts["doubtful"]} doubtful</span>'
        f'<span class="failed">{counts["failed"]} failed</span></p>',
        f'<p class="caution"><strong>Caution:</strong> {esc(CAUTION)}</p>',
    ]
    if notes:
        parts.append("<ul class=\"small\">" + "".join(f"<li>{esc(s)}</li>" for s in notes) + "</ul>")
    trend = _trend_figure(records, rows) if records else None
    if trend:
        parts.append("<h2>Key numbers across the batch</h2>")
        parts.append('<p class="small">Blue: ok; orange: doubtful; bars: one standard error where '
                     "reported. Failed maps are not plotted.</p>")
        parts.append(f'<img class="trend" alt="trend plots" src="{trend}">')
    if drift:
        parts.append("<h2>Drift of repeated sweeps</h2>")
        for res, png in drift:
            parts.append(
                f'<p><strong>{esc(res.x_gate)}/{esc(res.y_gate)}</strong>, {len(res.files)} sweeps from '
                f"{esc(Path(res.files[0]).name)}: {esc(res.verdict())} "
                f'(<a href="{esc(png[:-4], quote=True)}.csv">CSV</a>, '
                f'<a href="{esc(png[:-4], quote=True)}.json">JSON</a>)</p>'
            )
            parts.append(f'<a href="{esc(png, quote=True)}"><img class="trend" src="{esc(png, quote=True)}" '
                         f'alt="drift plot" style="max-width:700px"></a>')
    parts.append("<h2>Maps</h2>")
    parts.append('<input id="filter" type="search" placeholder="filter rows (file, status, warning…)">')
    parts.append('<p class="small">Click a column header to sort; click a thumbnail for the full plot.</p>')
    parts.append(_table_html(records, rows))
    parts.append(f"<script>{_JS}</script></body></html>")
    path = Path(out_dir) / "summary.html"
    atomic_write_text(path, "\n".join(parts))
    return path
