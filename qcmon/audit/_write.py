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

from qcmon.record.summary import GROUP_LABELS, GROUPS, readable_number

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
    from qcmon.record.journal import write_atomic

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(columns)
    for r in rows:
        w.writerow([_fmt(r.get(c)) for c in columns])
    return write_atomic(path, buf.getvalue())


#: Sparkline axes never narrower than these, so that a change of a few % or a fraction of a µm looks as small as
#: it is: motion from 0 to at least the default warning level of displacement (2 µm or 2 px), brightness over at
#: least 80–100 % of the start (the default warning level of brightness is 80 %).
_SPARK_MIN_MOTION = 2.0
_SPARK_BRIGHTNESS = (80.0, 100.0)


def _clock(seconds: float) -> str:
    from qcmon.record.summary import session_clock

    text = session_clock(seconds)
    return text[:-2] if text.endswith(".0") else text


def sparkline_scale(displacement: np.ndarray, brightness_pct: np.ndarray) -> tuple[float, tuple[float, float]]:
    """The axes of a sparkline: the top of the displacement axis (from 0) and the brightness range (%), each at
    least as wide as :data:`_SPARK_MIN_MOTION` and :data:`_SPARK_BRIGHTNESS` and wide enough for every value."""
    d = np.asarray(displacement, dtype=float)
    b = np.asarray(brightness_pct, dtype=float)
    d_top = max(_SPARK_MIN_MOTION, float(np.nanmax(d)) if np.isfinite(d).any() else 0.0)
    if np.isfinite(b).any():
        return d_top, (min(_SPARK_BRIGHTNESS[0], float(np.nanmin(b))), max(_SPARK_BRIGHTNESS[1], float(np.nanmax(b))))
    return d_top, _SPARK_BRIGHTNESS


def sparkline(traces: Mapping[str, np.ndarray] | None) -> str:
    """A small PNG (base64) of displacement (µm, else px, red) and brightness (% of initial, blue) over the whole
    session, with its scale written on it: each axis's range and the session's length. The axes are at least
    0–2 (µm or px) and 80–100 %, so small changes look small. "" if no data."""
    if traces is None or "time_s" not in traces or len(traces["time_s"]) == 0:
        return ""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from qcmon.record.report import envelope

    t = np.asarray(traces["time_s"], dtype=float)
    disp = np.asarray(traces.get("displacement_um", []), dtype=float)
    unit = "µm"
    if disp.size != t.size or not np.isfinite(disp).any():
        disp, unit = np.asarray(traces.get("displacement_px", np.full(t.size, np.nan)), dtype=float), "px"
    bright = np.asarray(traces.get("brightness_pct", np.full(t.size, np.nan)), dtype=float)
    fig = Figure(figsize=(2.3, 0.75), dpi=80)
    FigureCanvasAgg(fig)
    ax = fig.add_axes((0, 0.2, 1, 0.56))
    ax2 = ax.twinx()
    x, _, hi, _ = envelope(t, disp, max_points=200)  # the largest displacement of each bin: spikes stay
    ax.plot(x, hi, color="#c0392b", lw=0.8)
    xb, _, _, mb = envelope(t, bright, max_points=200)
    ax2.plot(xb, mb, color="#2471a3", lw=0.8)
    d_top, (b_lo, b_hi) = sparkline_scale(disp, bright)
    ax.set_ylim(0, d_top * 1.05)
    has_brightness = bool(np.isfinite(bright).any())
    ax2.set_ylim(b_lo - 0.02 * (b_hi - b_lo), b_hi + 0.02 * (b_hi - b_lo))
    tf = t[np.isfinite(t)]
    t0, t1 = (min(0.0, float(tf.min())), float(tf.max())) if tf.size else (0.0, 1.0)
    for a in (ax, ax2):
        a.set_xlim(t0, t1 if t1 > t0 else t0 + 1)
        a.set_axis_off()
    ax.axhline(0, color="#bbb", lw=0.5)
    fig.text(0.01, 0.8, f"motion 0–{d_top:.3g} {unit}", color="#c0392b", fontsize=6.5)
    fig.text(0.99, 0.8, f"brightness {b_lo:.3g}–{b_hi:.3g} %" if has_brightness else "no brightness yet",
             color="#2471a3", fontsize=6.5, ha="right")
    fig.text(0.01, 0.02, "0:00", color="#555", fontsize=6)
    fig.text(0.99, 0.02, _clock(t1), color="#555", fontsize=6, ha="right")
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return base64.b64encode(buf.getvalue()).decode("ascii")


_CSS = """body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:1em;color:#222}
table{border-collapse:collapse;font-size:12px;width:100%}
th,td{border:1px solid #ccc;padding:2px 4px;text-align:right;vertical-align:top}
th{cursor:pointer;background:#eee;font-weight:600}
td.t{text-align:left;overflow-wrap:anywhere}td.v{text-align:left;white-space:nowrap;font-weight:600}
td.err{text-align:left;color:#900;overflow-wrap:anywhere;min-width:12em;max-width:24em}
.fail,.error{background:#f5b7b1}.warning,.incomplete{background:#fcf3cf}.pass{background:#d5f5e3}
.unknown{background:#eee}
.flag{background:#f5b7b1}caption{text-align:left;font-weight:bold;padding:4px 0}small{color:#555}
img{display:block}.nw{white-space:nowrap}"""

_JS = """document.querySelectorAll('table.sortable th').forEach(function(th,i){th.addEventListener('click',function(){
var b=th.closest('table').tBodies[0],rows=Array.from(b.rows),asc=th.dataset.asc!=='1';th.dataset.asc=asc?'1':'0';
rows.sort(function(a,c){var x=a.cells[i].dataset.v,y=c.cells[i].dataset.v,nx=parseFloat(x),ny=parseFloat(y);
var r=(isNaN(nx)||isNaN(ny))?x.localeCompare(y):nx-ny;return asc?r:-r;});rows.forEach(function(r){b.appendChild(r);});
});});"""

#: Session columns of the page: (column of audit.csv, heading with unit, scale for display).
_SHOWN: tuple[tuple[str, str, float], ...] = (
    ("path", "session", 1.0), ("date", "date", 1.0), ("duration_s", "length (min:s)", 1.0),
    ("frames", "frames", 1.0), ("motion_max_um", "largest motion (µm)", 1.0),
    ("z_max_abs_um", "largest |z| (µm)", 1.0), ("bleach_pct_per_min", "bleaching (%/min)", 1.0),
    ("saturated_max_frac", "most saturated (%)", 100.0), ("snr_median", "SNR (median)", 1.0),
    ("photons_per_px_median", "photons per px (median)", 1.0),
)

#: Chronic columns of the page.
_CHRONIC_SHOWN: tuple[tuple[str, str], ...] = (
    ("field", "field of view"), ("path", "session"), ("date", "date"), ("day", "day"),
    ("shift_um", "shift from previous (µm)"), ("shift_from_first_um", "shift from first (µm)"),
    ("match_corr", "match"), ("brightness_above_dark_dn", "brightness above dark (DN)"), ("snr_median", "SNR"),
    ("photons_per_px_median", "photons per px"), ("motion_rms_um", "RMS motion (µm)"),
    ("brightness_trend_pct_per_week", "brightness trend (%/week)"), ("flags", "flags"),
)

_RANK = {"error": 0, "incomplete": 1, "fail": 2, "warning": 3, "unknown": 4, "pass": 5}
_WORD = {"error": "✗ NOT READ", "fail": "‼ FAIL", "warning": "! WARNING", "pass": "✓ PASS",
         "unknown": "? NOT CHECKED"}


def page_state(row: Mapping) -> tuple[str, str]:
    """(css class, words) of a session's verdict on the page: a session that could not be read, or whose frames
    were not all read (a truncated file), is never a plain "pass"."""
    verdict = str(row.get("verdict") or "unknown")
    if row.get("status") == "error" or verdict == "error":
        return "error", _WORD["error"]
    if row.get("error"):
        word = _WORD.get(verdict, verdict.upper())
        return (("fail", f"{word}, INCOMPLETE") if verdict == "fail"
                else ("incomplete", f"! {word.split(' ', 1)[-1]}, INCOMPLETE"))
    return verdict, _WORD.get(verdict, verdict.upper())


def worst_first(rows: Sequence[Mapping]) -> list[Mapping]:
    """Sessions in the order a reader wants them: not read, incomplete, failed, warned, not checked, passed;
    then by the time spent in alarms and warnings (count), then by path."""
    def count(v) -> int:
        v = _num(v)
        return int(v) if math.isfinite(v) else 0

    def key(r):
        return (_RANK.get(page_state(r)[0], 4), -count(r.get("alarms")), -count(r.get("warnings")), str(r["path"]))

    return sorted(rows, key=key)


def _show(v, scale: float = 1.0) -> str:
    if v is None:
        return ""
    if isinstance(v, (float, np.floating)):
        v = float(v) * scale
        return readable_number(v, max_decimals=3) if math.isfinite(v) else ""
    if isinstance(v, (int, np.integer)) and not isinstance(v, bool):
        return f"{int(v) * scale:,.0f}"
    return str(v)


def _cell(col: str, v, *, scale: float = 1.0, cls: str = "") -> str:
    raw = _fmt(v)
    text = _show(v, scale)
    if col == "duration_s":
        text = _clock(_num(v)) if math.isfinite(_num(v)) else ""
    if col == "date" and text:
        text = text[:10]
    klass = cls or ("t" if col in ("path", "error", "field", "flags", "field_flags", "date", "notes") else "")
    if col.startswith("verdict") and text:
        klass = text
    if col == "flags" and text:
        klass = "flag t"
    shown = html.escape(text)
    if col in ("path", "field") and text:  # a path breaks after its slashes, never inside a name or a date
        shown = "/<wbr>".join(f"<span class='nw'>{html.escape(seg)}</span>" for seg in text.split("/"))
    elif col == "date" and text:
        shown = f"<span class='nw'>{shown}</span>"
    return f'<td class="{klass}" data-v="{html.escape(raw)}">{shown}</td>'


def write_html(path: Path, rows: Sequence[Mapping], sparks: Mapping[str, str], chronic: Sequence[Mapping], *,
               title: str, header: str) -> Path:
    """Write ``audit.html``: self-contained (inline CSS, JS and PNG), fits a 1,400 px screen without sideways
    scrolling, worst sessions first, the error next to the verdict, sortable tables, relative report links."""
    from qcmon.record.journal import write_atomic

    out = ["<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
           "<meta name='viewport' content='width=device-width, initial-scale=1'>",
           f"<title>{html.escape(title)}</title>",
           f"<style>{_CSS}</style></head><body>", f"<h1>{html.escape(title)}</h1>",
           f"<p><small>{html.escape(header)}</small></p>",
           "<table class='sortable'><caption>Sessions, worst first (click a heading to sort)</caption><thead><tr>"
           "<th>verdict</th><th>why not a pass / error</th>"]
    out += [f"<th>{html.escape(h)}</th>" for _, h, _ in _SHOWN] + [
        "<th>motion and brightness over the session</th><th>report</th></tr></thead><tbody>"]
    for r in worst_first(rows):
        cls, word = page_state(r)
        why = str(r.get("error") or "")
        if not why and cls in ("fail", "warning"):
            why = ", ".join(GROUP_LABELS.get(g, g) for g in GROUPS
                            if r.get(f"verdict_{g}") == ("fail" if cls == "fail" else "warning"))
        out.append(f"<tr><td class='v {cls}' data-v='{_RANK.get(cls, 4)}'>{html.escape(word)}</td>"
                   f"<td class='err' data-v='{html.escape(why)}'>{html.escape(why)}</td>")
        out += [_cell(c, r.get(c), scale=sc) for c, _, sc in _SHOWN]
        png = sparks.get(r["path"], "")
        img = (f"<img alt='motion and brightness of {html.escape(str(r['path']))}' width='184' height='60' "
               f"src='data:image/png;base64,{png}'>") if png else ""
        out.append(f"<td data-v=''>{img}</td>")
        rep = r.get("report")
        link = f"<a href='{html.escape(rep, quote=True)}'>report</a>" if rep else ""
        out.append(f"<td class='t' data-v=''>{link}</td></tr>")
    out.append("</tbody></table>")
    out.append("<h2>Chronic imaging: fields of view over days</h2>")
    if chronic:
        out.append("<table class='sortable'><caption>Fields named by the path their sessions share (* where the "
                   "sessions differ). Shift against the previous and the first session of the field; trends are "
                   "least-squares lines over days</caption><thead><tr>")
        out += [f"<th>{html.escape(h)}</th>" for _, h in _CHRONIC_SHOWN] + ["</tr></thead><tbody>"]
        for r in chronic:
            out.append("<tr>" + "".join(_cell(c, r.get(c)) for c, _ in _CHRONIC_SHOWN) + "</tr>")
        out.append("</tbody></table>")
    else:
        out.append("<p>No field of view was imaged in more than one session.</p>")
    out.append(f"<script>{_JS}</script></body></html>\n")
    return write_atomic(path, "".join(out))
