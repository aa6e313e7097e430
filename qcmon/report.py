"""``report.html``: one self-contained page (plots embedded as base64 PNG, no external CSS or JavaScript) that a
PI opens offline: verdicts, traces with their warning and alarm levels, events and notes, acquisition facts, frame
ranges to exclude and the profile's caution."""

from __future__ import annotations

import base64
import html
import io
import math
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from qcmon.events import SYMBOLS, Event
from qcmon.summary import GROUPS, _periods, _streams
from qcmon.thresholds import Profile

__all__ = ["envelope", "write_report", "report_html", "PanelDrawing", "PlotWorkers"]

#: Points per trace above which a plot shows a min/max envelope instead of every frame (the plots are 855 px wide:
#: more points than pixel columns only cost drawing time).
MAX_POINTS = 800

#: (title, columns, scale for display, display unit). Fractions are shown as % (files keep 0..1).
_PANELS: tuple[tuple[str, tuple[str, ...], float, str], ...] = (
    ("Displacement", ("displacement_um", "displacement_px"), 1.0, ""),
    ("z offset", ("z_um",), 1.0, "µm"),
    ("Focus correlation", ("focus_corr",), 1.0, ""),
    ("Registration correlation", ("reg_corr",), 1.0, ""),
    ("Brightness", ("brightness_pct",), 1.0, "%"),
    ("Bleaching (trailing window)", ("bleach_pct_per_min",), 1.0, "%/min"),
    ("Saturated pixels", ("saturated_frac",), 100.0, "%"),
    ("Clipped pixels", ("clipped_frac",), 100.0, "%"),
    ("SNR", ("snr",), 1.0, ""),
    ("Line offset", ("line_offset_px",), 1.0, "px"),
)

_VERDICT_WORD = {"pass": "PASS", "warning": "WARNING", "fail": "FAIL", "unknown": "NOT CHECKED"}
_VERDICT_SYMBOL = {"pass": SYMBOLS["normal"], "warning": SYMBOLS["warning"], "fail": SYMBOLS["alarm"],
                   "unknown": SYMBOLS["unknown"]}

_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:1.5em auto;max-width:70em;
color:#222;padding:0 1em}
h1{font-size:1.5em}h2{font-size:1.2em;border-bottom:1px solid #ccc;margin-top:1.6em}
table{border-collapse:collapse;margin:.5em 0;font-size:.9em}td,th{border:1px solid #ccc;padding:.2em .5em;
text-align:left;vertical-align:top}th{background:#f3f3f3}
.verdict{font-size:1.4em;font-weight:bold;padding:.4em .8em;display:inline-block;border:2px solid}
.pass{border-color:#2a7;color:#185}.warning{border-color:#c80;color:#a60}.fail{border-color:#c22;color:#b11}
.unknown{border-color:#888;color:#555}
.caution{border-left:4px solid #c80;background:#fff8e8;padding:.5em 1em}
img{max-width:100%}.small{color:#666;font-size:.85em}
"""


def envelope(x: np.ndarray, y: np.ndarray, *, max_points: int = MAX_POINTS
             ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Decimate a trace for plotting, keeping every spike.

    Parameters
    ----------
    x, y : (N,) ndarray
    max_points : int, keyword-only
        Number of bins when N exceeds it.

    Returns
    -------
    xc, lo, hi, mean : ndarray
        Bin centres (first x of each bin), minimum, maximum and mean of ``y`` in each bin (NaN ignored; NaN for
        an all-NaN bin). When N <= max_points, ``lo = hi = mean = y``.
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    if max_points < 1:
        raise ValueError(f"max_points must be >= 1, got {max_points}")
    if x.size <= max_points:
        return x, y, y, y
    starts = np.linspace(0, x.size, max_points, endpoint=False).astype(np.int64)
    lo = np.fmin.reduceat(y, starts)
    hi = np.fmax.reduceat(y, starts)
    ok = np.isfinite(y)
    cnt = np.add.reduceat(ok.astype(float), starts)
    sums = np.add.reduceat(np.where(ok, y, 0.0), starts)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(cnt > 0, sums / np.maximum(cnt, 1), np.nan)
    return x[starts], lo, hi, mean


def _png(fig) -> str:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _panel(traces, streams, events, profile: Profile, title, columns, scale, unit) -> tuple[str, str] | None:
    col = next((c for c in columns if np.isfinite(np.asarray(traces[c], float)).any()), None)
    if col is None:
        return None
    lim = profile.limits.get(col)
    unit = unit or (lim.unit if lim is not None else "") or ("px" if col.endswith("_px") else
                                                             "µm" if col.endswith("_um") else "")
    from matplotlib.figure import Figure  # matplotlib takes a while to load: only when a report is drawn

    fig = Figure(figsize=(9.5, 2.3))
    fig.subplots_adjust(left=0.075, right=0.99, bottom=0.21, top=0.95)  # fixed margins: no layout solver per plot
    ax = fig.add_subplot()
    t_all = np.asarray(traces["time_s"], float)
    values = np.asarray(traces[col], float) * scale
    for n, (key, idx) in enumerate(streams.items()):
        x, lo, hi, mean = envelope(t_all[idx], values[idx])
        label = f"ch {key[0]} / plane {key[1]}" if len(streams) > 1 else None
        color = f"C{n % 10}"
        if x.size and lo is not hi:
            ax.fill_between(x, lo, hi, color=color, alpha=0.35, linewidth=0, step="post")
        ax.plot(x, mean, color=color, linewidth=0.8, label=label, drawstyle="steps-post" if lo is not hi else None)
        for state, shade in (("warning", "#f0b040"), ("alarm", "#e04040")):
            last_t = float(np.nanmax(t_all[idx])) if np.isfinite(t_all[idx]).any() else math.nan
            last_f = int(np.asarray(traces["frame"])[idx].max())
            for _, _, b, e in _periods(events, key, (col,), state, last_f, last_t):
                if math.isfinite(b) and math.isfinite(e):
                    ax.axvspan(b, e, color=shade, alpha=0.18 if state == "alarm" else 0.12, linewidth=0)
    if lim is not None:
        for level, style, color in ((lim.warn, "--", "#c80"), (lim.alarm, "-", "#c22")):
            levels = (level, -level) if lim.direction == "abs_above" else (level,)
            for lv in levels:
                ax.axhline(lv * scale, linestyle=style, color=color, linewidth=1)
        ax.plot([], [], "--", color="#c80", label=f"warning {lim.warn * scale:g}")
        ax.plot([], [], "-", color="#c22", label=f"alarm {lim.alarm * scale:g}")
    ax.set_xlabel("time (s)")
    ax.set_ylabel(f"{col.replace('_', ' ')}" + (f" ({unit})" if unit else ""), fontsize=8)
    ax.grid(True, alpha=0.3)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=7, loc="upper right")
    return col, _png(fig)


def _panel_job(job: tuple) -> tuple[str, str] | None:
    return _panel(*job)


def _load_matplotlib() -> None:
    """Load what a plot needs ahead of the plots: the modules, and (by drawing a small figure) the font, the text
    layout caches and the PNG encoder, which the first plot of a process would otherwise load."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(2, 1))
    ax = fig.add_subplot()
    ax.plot([0.0, 1.0], [0.0, 1.0], label="µm")
    ax.set_xlabel("time (s)")
    ax.legend(fontsize=7)
    _png(fig)


def _nothing() -> None:
    return None


class PlotWorkers:
    """Processes that draw the report's plots side by side, started while the session is still being measured.

    Loading matplotlib takes about 0.7 s here and each plot about 0.1 s; a summary of a finished session otherwise
    spends both after its last frame. Started early, the processes load matplotlib on the other core while the
    frames are measured, and at the end draw the plots in parallel. They run at the lowest priority
    (:mod:`qcmon._plotproc`): two of them loading matplotlib at normal priority took 0.6–1.3 s of processor time
    from a 2-core machine's measurement of 3,600 frames. Anything that goes wrong with them (a process
    that cannot start or dies) only means the plots are drawn in this process, as without them.

    Parameters
    ----------
    processes : int
        Number of drawing processes (they start at once, each loading matplotlib).
    """

    def __init__(self, processes: int = 2):
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        from qcmon._plotproc import start

        # low priority (qcmon._plotproc): loading matplotlib must not slow the measurement on a busy core
        self._pool = ProcessPoolExecutor(max_workers=processes, mp_context=multiprocessing.get_context("spawn"),
                                         initializer=start)
        # processes start on demand: one empty job per process starts them all now
        for _ in range(processes):
            self._pool.submit(_nothing)

    def submit(self, jobs: list[tuple]) -> list:
        """Start ``_panel(*job)`` of every job; the futures, in order."""
        return [self._pool.submit(_panel_job, job) for job in jobs]

    def close(self) -> None:
        """Stop the processes and wait for them (a plot being drawn is finished first, at most about 0.1 s).

        Not waiting would leave the pool's manager thread running into the interpreter's exit, where Python 3.11 may
        print an ignored ``OSError: Bad file descriptor`` (seen once here: a race between ``concurrent.futures``'
        exit hook and that thread, which closes the pipe the hook writes to)."""
        self._pool.shutdown(wait=True, cancel_futures=True)


class PanelDrawing:
    """The report's plots (:data:`_PANELS`), drawn from the moment this is made by ``plots`` when given, so that
    they are drawn while the summary is computed; :meth:`result` collects them (drawing here whatever the processes
    could not)."""

    def __init__(self, traces: Mapping[str, np.ndarray], events: Sequence[Event], profile: Profile,
                 plots: PlotWorkers | None = None):
        self.streams = _streams(traces)
        self._jobs = []
        for title, columns, scale, unit in _PANELS:
            needed = {k: np.asarray(traces[k]) for k in ("time_s", "frame", *columns)}  # what a plot reads
            self._jobs.append((needed, self.streams, list(events), profile, title, columns, scale, unit))
        self._futures = None
        if plots is not None and self.streams:
            try:
                self._futures = plots.submit(self._jobs)
            except Exception:  # noqa: BLE001 - no drawing processes: drawn here in result()
                self._futures = None

    def result(self) -> list[tuple[str, str] | None]:
        """``(column, base64 PNG)`` per panel, or None for a panel with nothing measured."""
        if self._futures is not None:
            try:
                return [f.result() for f in self._futures]
            except Exception:  # noqa: BLE001 - a drawing process failed: the plots are drawn here instead
                pass
        return [_panel(*job) for job in self._jobs]


def _fmt(v) -> str:
    if v is None:
        return "—"
    if isinstance(v, float):
        return "—" if not math.isfinite(v) else f"{v:.4g}"
    if isinstance(v, (list, tuple)):
        return ", ".join(_fmt(x) for x in v)
    if isinstance(v, Mapping) and "factor" in v:  # a brightness step
        return f"×{_fmt(v['factor'])} at {_fmt(v.get('time_s'))} s (frame {v.get('frame')})"
    return str(v)


def _verdict(v: str) -> str:
    v = v if v in _VERDICT_WORD else "unknown"
    return f'<span class="{v}">{_VERDICT_SYMBOL[v]} {_VERDICT_WORD[v]}</span>'


def report_html(summary: Mapping, traces: Mapping[str, np.ndarray], events: Sequence[Event], profile: Profile,
                facts: Mapping | None = None, *, plots: PlotWorkers | None = None,
                panels: PanelDrawing | None = None) -> str:
    """The text of ``report.html`` (see :func:`write_report`)."""
    e = html.escape
    events = list(events)
    facts = dict(facts if facts is not None else summary.get("facts", {}))
    overall = summary.get("verdict", "unknown")
    overall = overall if overall in _VERDICT_WORD else "unknown"
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        f"<title>qcmon report: {e(_VERDICT_WORD[overall])}</title>", f"<style>{_CSS}</style></head><body>",
        "<h1>Imaging session quality report</h1>",
        f'<p><span class="verdict {overall}">{_VERDICT_SYMBOL[overall]} Overall: {_VERDICT_WORD[overall]}</span></p>',
        f"<p>{summary.get('frames', 0)} frames over {_fmt(summary.get('duration_s'))} s; "
        f"threshold profile <b>{e(profile.name)}</b> ({e(profile.description)}); "
        f"qcmon {e(str(summary.get('qcmon_version', '')))}.</p>",
        f'<div class="caution"><b>Caution.</b> {e(profile.caution)}</div>',
        "<h2>Verdict per metric</h2><table><tr><th>metric</th><th>verdict</th><th>statistics</th>"
        "<th>time in warning (s)</th><th>time in alarm (s)</th></tr>",
    ]
    for group in (*GROUPS, "photon_transfer"):
        g = summary.get(group)
        if not isinstance(g, Mapping):
            continue
        stats = ", ".join(f"{e(k)} = {e(_fmt(v))}" for k, v in g.items()
                          if k not in ("verdict", "warning_s", "alarm_s"))
        verdict = _verdict(g["verdict"]) if "verdict" in g else "—"
        parts.append(f"<tr><td>{e(group.replace('_', ' '))}</td><td>{verdict}</td><td>{stats}</td>"
                     f"<td>{e(_fmt(g.get('warning_s')))}</td><td>{e(_fmt(g.get('alarm_s')))}</td></tr>")
    parts.append("</table>")
    if len(summary.get("streams", ())) > 1:
        parts.append("<table><tr><th>channel</th><th>plane</th><th>frames</th><th>verdict</th></tr>")
        for s in summary["streams"]:
            parts.append(f"<tr><td>{s['channel']}</td><td>{s['plane']}</td><td>{s['frames']}</td>"
                         f"<td>{_verdict(s['verdict'])}</td></tr>")
        parts.append("</table>")

    parts.append("<h2>Traces</h2><p class='small'>Dashed: warning level; solid: alarm level; shaded: declared "
                 "warning (orange) and alarm (red) periods. Long sessions show the minimum–maximum envelope, so "
                 "single-frame spikes stay visible.</p>")
    if panels is None:
        panels = PanelDrawing(traces, events, profile, plots)
    if panels.streams:
        for (title, *_), got in zip(_PANELS, panels.result()):
            if got is None:
                parts.append(f"<h3>{e(title)}</h3><p class='small'>not measured in this session</p>")
                continue
            col, png = got
            parts.append(f"<h3>{e(title)}</h3>"
                         f'<img alt="{e(title)} ({e(col)}) over time" src="data:image/png;base64,{png}">')

    parts.append("<h2>Events and notes</h2>")
    if events:
        parts.append("<table><tr><th>kind</th><th>metric</th><th>state</th><th>value</th><th>limit</th>"
                     "<th>frame</th><th>time (s)</th><th>since (s)</th><th>ch/plane</th><th>message</th>"
                     "<th>wall time</th></tr>")
        for ev in events:
            parts.append(
                f"<tr><td>{e(ev.kind)}</td><td>{e(ev.metric)}</td><td>{e(ev.state)}</td><td>{_fmt(ev.value)}</td>"
                f"<td>{_fmt(ev.limit)}</td><td>{ev.frame}</td><td>{_fmt(ev.time_s)}</td>"
                f"<td>{_fmt(ev.started_time_s)}</td><td>{ev.channel}/{ev.plane}</td><td>{e(ev.message)}</td>"
                f"<td>{e(ev.wall_time)}</td></tr>")
        parts.append("</table>")
    else:
        parts.append("<p>No events.</p>")

    parts.append("<h2>Acquisition facts</h2>")
    if facts:
        parts.append("<table><tr><th>fact</th><th>value</th><th>origin</th></tr>")
        for k, f in facts.items():
            value, origin = (f.get("value"), f.get("origin", "")) if isinstance(f, Mapping) else (f, "")
            parts.append(f"<tr><td>{e(str(k))}</td><td>{e(_fmt(value))}</td><td>{e(str(origin))}</td></tr>")
        parts.append("</table>")
    else:
        parts.append("<p>No acquisition facts recorded.</p>")

    parts.append("<h2>Frames to exclude from analysis</h2>")
    ranges = summary.get("exclude", [])
    if ranges:
        parts.append("<table><tr><th>channel</th><th>plane</th><th>first frame</th><th>last frame</th>"
                     "<th>reason</th></tr>")
        for r in ranges:
            parts.append("<tr>" + "".join(f"<td>{e(str(x))}</td>" for x in r) + "</tr>")
        parts.append("</table>")
    else:
        parts.append("<p>None.</p>")
    if summary.get("notes"):
        parts.append("<h2>Notes on the statistics</h2><ul>"
                     + "".join(f"<li>{e(str(n))}</li>" for n in summary["notes"]) + "</ul>")
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def write_report(out_dir: str | Path, summary: Mapping, traces: Mapping[str, np.ndarray], events: Sequence[Event],
                 profile: Profile, facts: Mapping | None = None, *, plots: PlotWorkers | None = None,
                 panels: PanelDrawing | None = None) -> Path:
    """Write ``report.html`` into ``out_dir`` atomically.

    Parameters
    ----------
    out_dir : path-like
    summary : mapping
        From :func:`qcmon.summary.summarize_traces`.
    traces : dict of str to ndarray
        Columns of ``traces.csv``.
    events : sequence of Event
    profile : Profile
    facts : mapping, optional
        ``{key: {"value", "origin"}}``; default ``summary["facts"]``.
    plots : PlotWorkers, optional
        Processes that draw the plots (default: drawn in this process). The report is the same either way.
    panels : PanelDrawing, optional
        The plots, already started from these traces and events (``plots`` is then not used).

    Returns
    -------
    pathlib.Path
        The report's path.
    """
    from qcmon.record import REPORT_FILE, write_atomic

    return write_atomic(Path(out_dir) / REPORT_FILE,
                        report_html(summary, traces, events, profile, facts, plots=plots, panels=panels))
