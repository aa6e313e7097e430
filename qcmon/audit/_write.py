"""The audit's outputs: a row per session (``audit.csv``), ``chronic.csv`` and the self-contained ``audit.html``."""

from __future__ import annotations

import base64
import csv
import html
import io
import math
import os
from datetime import datetime
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from qcmon.summary import GROUPS

#: Columns of ``audit.csv`` (units in the names).
AUDIT_COLUMNS: tuple[str, ...] = (
    "path", "status", "date", "date_origin", "frames", "duration_s", "verdict",
    *(f"verdict_{g}" for g in GROUPS),
    "motion_max_px", "motion_rms_px", "motion_max_um", "motion_rms_um", "z_max_abs_um", "bleach_pct_per_min",
    "brightness_min_pct", "brightness_above_dark_dn", "saturated_max_frac", "clipped_max_frac",
    "saturation_level_dn", "saturation_level_origin", "snr_median",
    "photons_per_px_median", "gain_dn_per_photon", "dark_level_dn", "pixel_size_um", "frame_rate_hz",
    "frame_rate_origin", "warnings", "alarms", "problems", "report", "error",
)

#: Columns of ``chronic.csv``.
CHRONIC_COLUMNS: tuple[str, ...] = (
    "field", "path", "date", "date_origin", "day", "shift_dx_px", "shift_dy_px", "shift_px", "shift_dx_um",
    "shift_dy_um", "shift_um", "shift_from_first_um", "match_corr", "brightness_above_dark_dn", "snr_median",
    "photons_per_px_median", "motion_rms_um", "brightness_trend_pct_per_week", "snr_trend_per_day",
    "photons_trend_per_day", "motion_trend_um_per_day", "field_flags", "flags", "notes",
)

_SUMMARY_KEYS = {
    "motion_max_px": ("motion", "max_px"), "motion_rms_px": ("motion", "rms_px"),
    "motion_max_um": ("motion", "max_um"), "motion_rms_um": ("motion", "rms_um"),
    "z_max_abs_um": ("z", "max_abs_um"), "bleach_pct_per_min": ("bleach", "slope_pct_per_min"),
    "brightness_min_pct": ("brightness", "min_pct"), "saturated_max_frac": ("saturation", "max_frac"),
    "clipped_max_frac": ("clipping", "max_frac"), "snr_median": ("snr", "median"),
    "gain_dn_per_photon": ("photon_transfer", "gain"), "dark_level_dn": ("photon_transfer", "dark_level"),
}


def _num(v) -> float:
    try:
        f = float(v)
    except (TypeError, ValueError):
        return math.nan
    return f


def _fact(summary: Mapping, key: str) -> float:
    f = (summary.get("facts") or {}).get(key)
    if isinstance(f, Mapping):
        f = f.get("value")
    return _num(f)


def _median(a) -> float:
    a = np.asarray(a, dtype=float)
    a = a[np.isfinite(a)]
    return float(np.median(a)) if a.size else math.nan


def session_row(outcome: Mapping, *, out_dir: Path, date: datetime | None, date_origin: str,
                traces: Mapping[str, np.ndarray] | None) -> dict:
    """The ``audit.csv`` row of one session from its outcome, its ``summary.json`` and its ``traces.csv``."""
    row: dict = {c: None for c in AUDIT_COLUMNS}
    row["path"] = outcome["rel"]
    row["status"] = outcome.get("status", "error")
    row["date"] = date.isoformat(timespec="seconds") if date is not None else ""
    row["date_origin"] = date_origin
    row["error"] = outcome.get("error") or ""
    s = outcome.get("summary")
    if not s or row["status"] == "error":
        row["verdict"] = "error"
        return row
    row["frames"] = int(s.get("frames") or 0)
    row["duration_s"] = _num(s.get("duration_s"))
    row["verdict"] = s.get("verdict", "unknown")
    for g in GROUPS:
        row[f"verdict_{g}"] = (s.get(g) or {}).get("verdict", "unknown")
    for col, (g, k) in _SUMMARY_KEYS.items():
        row[col] = _num((s.get(g) or {}).get(k))
    sat = s.get("saturation") or {}
    row["saturation_level_dn"] = _num(sat.get("level_dn"))
    row["saturation_level_origin"] = str(sat.get("level_origin") or "")
    row["pixel_size_um"] = _fact(s, "pixel_size_um")
    row["frame_rate_hz"] = _fact(s, "frame_rate_hz")
    rate = s.get("frame_rate") or {}  # where the rate came from, or "frame rate unknown: give --frame-rate"
    row["frame_rate_origin"] = rate.get("message") or rate.get("origin") or ""
    ev = s.get("events") or {}
    row["warnings"], row["alarms"], row["problems"] = ev.get("warnings", 0), ev.get("alarms", 0), ev.get("problems", 0)
    if traces is not None:
        row["brightness_above_dark_dn"] = _median(traces.get("baseline_f", []))
        row["photons_per_px_median"] = _median(traces.get("photons_per_px", []))
    problems = outcome.get("problems") or []
    if problems and not row["error"]:  # frames that could not be read (e.g. a truncated file)
        more = f" (and {len(problems) - 2} more)" if len(problems) > 2 else ""
        row["error"] = "; ".join(" ".join(str(p).split()) for p in problems[:2]) + more
    report = Path(outcome["record"]) / "report.html"
    if report.is_file():
        row["report"] = os.path.relpath(report, out_dir).replace(os.sep, "/")
    return row


def _fmt(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        if not math.isfinite(v):
            return ""
        return f"{v:.6g}"
    return str(v)


def write_csv(path: Path, rows: Sequence[Mapping], columns: Sequence[str]) -> Path:
    """Write rows as CSV (blank for unknown values) atomically."""
    from qcmon.record import write_atomic

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(columns)
    for r in rows:
        w.writerow([_fmt(r.get(c)) for c in columns])
    return write_atomic(path, buf.getvalue())


def sparkline(traces: Mapping[str, np.ndarray] | None) -> str:
    """A small PNG (base64) of displacement (µm, else px) and brightness (% of initial) over time; "" if no data."""
    if traces is None or "time_s" not in traces or len(traces["time_s"]) == 0:
        return ""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    t = np.asarray(traces["time_s"], dtype=float)
    disp = np.asarray(traces.get("displacement_um", []), dtype=float)
    unit = "µm"
    if disp.size != t.size or not np.isfinite(disp).any():
        disp, unit = np.asarray(traces.get("displacement_px", np.full(t.size, np.nan)), dtype=float), "px"
    bright = np.asarray(traces.get("brightness_pct", np.full(t.size, np.nan)), dtype=float)
    fig = Figure(figsize=(2.4, 0.6), dpi=80)
    FigureCanvasAgg(fig)
    ax = fig.add_axes((0, 0, 1, 1))
    ax.plot(t, disp, color="#c0392b", lw=0.8)
    ax2 = ax.twinx()
    ax2.plot(t, bright, color="#2471a3", lw=0.8)
    for a in (ax, ax2):
        a.set_axis_off()
    fig.text(0.01, 0.72, f"motion {unit}", color="#c0392b", fontsize=6)
    fig.text(0.60, 0.72, "brightness %", color="#2471a3", fontsize=6)
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return base64.b64encode(buf.getvalue()).decode("ascii")


_CSS = """body{font-family:sans-serif;margin:1.5em;color:#222}table{border-collapse:collapse;font-size:12px}
th,td{border:1px solid #ccc;padding:2px 5px;text-align:right;white-space:nowrap}th{cursor:pointer;background:#eee}
td.t{text-align:left}.fail,.error{background:#f5b7b1}.warning{background:#fcf3cf}.pass{background:#d5f5e3}
.flag{background:#f5b7b1}caption{text-align:left;font-weight:bold;padding:4px 0}small{color:#555}"""

_JS = """document.querySelectorAll('table.sortable th').forEach(function(th,i){th.addEventListener('click',function(){
var b=th.closest('table').tBodies[0],rows=Array.from(b.rows),asc=th.dataset.asc!=='1';th.dataset.asc=asc?'1':'0';
rows.sort(function(a,c){var x=a.cells[i].dataset.v,y=c.cells[i].dataset.v,nx=parseFloat(x),ny=parseFloat(y);
var r=(isNaN(nx)||isNaN(ny))?x.localeCompare(y):nx-ny;return asc?r:-r;});rows.forEach(function(r){b.appendChild(r);});
});});"""

_SHOWN = ("path", "verdict", "frames", "duration_s", "motion_max_um", "motion_max_px", "z_max_abs_um",
          "bleach_pct_per_min", "saturated_max_frac", "snr_median", "photons_per_px_median", "gain_dn_per_photon",
          "error")


def _cell(col: str, v, *, cls: str = "") -> str:
    text = _fmt(v)
    klass = cls or ("t" if col in ("path", "error", "field", "flags", "field_flags", "date", "notes") else "")
    if col.startswith("verdict") and text:
        klass = text
    if col == "flags" and text:
        klass = "flag"
    return f'<td class="{klass}" data-v="{html.escape(text)}">{html.escape(text)}</td>'


def write_html(path: Path, rows: Sequence[Mapping], sparks: Mapping[str, str], chronic: Sequence[Mapping], *,
               title: str, header: str) -> Path:
    """Write ``audit.html``: self-contained (inline CSS, JS and PNG), sortable tables, relative report links."""
    from qcmon.record import write_atomic

    out = ["<!DOCTYPE html><html><head><meta charset='utf-8'>", f"<title>{html.escape(title)}</title>",
           f"<style>{_CSS}</style></head><body>", f"<h1>{html.escape(title)}</h1>",
           f"<p><small>{html.escape(header)}</small></p>",
           "<table class='sortable'><caption>Sessions (click a column to sort)</caption><thead><tr>"]
    out += [f"<th>{html.escape(c)}</th>" for c in _SHOWN] + ["<th>traces</th><th>report</th></tr></thead><tbody>"]
    for r in rows:
        out.append("<tr>")
        out += [_cell(c, r.get(c)) for c in _SHOWN]
        png = sparks.get(r["path"], "")
        img = f"<img alt='traces' src='data:image/png;base64,{png}'>" if png else ""
        out.append(f"<td data-v=''>{img}</td>")
        rep = r.get("report")
        link = f"<a href='{html.escape(rep, quote=True)}'>report</a>" if rep else ""
        out.append(f"<td class='t' data-v=''>{link}</td></tr>")
    out.append("</tbody></table>")
    out.append("<h2>Chronic imaging: fields of view over days</h2>")
    if chronic:
        cols = ("field", "path", "date", "day", "shift_um", "shift_from_first_um", "match_corr",
                "brightness_above_dark_dn", "snr_median", "photons_per_px_median", "motion_rms_um",
                "brightness_trend_pct_per_week", "flags")
        out.append("<table class='sortable'><caption>Shift against the previous session of the field; trends are "
                   "least-squares lines over days</caption><thead><tr>")
        out += [f"<th>{html.escape(c)}</th>" for c in cols] + ["</tr></thead><tbody>"]
        for r in chronic:
            out.append("<tr>" + "".join(_cell(c, r.get(c)) for c in cols) + "</tr>")
        out.append("</tbody></table>")
    else:
        out.append("<p>No field of view was imaged in more than one session.</p>")
    out.append(f"<script>{_JS}</script></body></html>\n")
    return write_atomic(path, "".join(out))
