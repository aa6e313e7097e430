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
from qcmon.frames import RATE_UNKNOWN
from qcmon.record._plotproc import figure_png
from qcmon.record.summary import (GROUP_LABELS, GROUPS, readable_number, session_clock, state_periods, stream_rows,
                                  verdict_parts)
from qcmon.thresholds import Profile

__all__ = ["envelope", "write_report", "report_html", "worst_moment", "PanelDrawing", "PlotWorkers"]

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
.top{display:flex;flex-wrap:wrap;align-items:center;gap:1em}.usable{font-size:1.3em}
.line{font-weight:600}.num{text-align:right;white-space:nowrap}code{font-size:.9em;word-break:break-all}
.problem{border-left:4px solid #c22;background:#fdeeee;padding:.3em 1em;margin:.6em 0}
.caution{margin:.6em 0}.advice li{margin:.3em 0}
.images{display:flex;flex-wrap:wrap;gap:1.5em}figure{margin:0;max-width:420px}
figure img{width:420px;max-width:100%;image-rendering:pixelated;border:1px solid #ccc}
.noimage{width:300px;height:120px;border:1px dashed #aaa;display:flex;align-items:center;justify-content:center;
color:#777}figcaption{font-size:.85em;margin-top:.3em}
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


def _panel(traces, streams, events, profile: Profile, title, columns, scale, unit) -> tuple[str, str] | None:
    got = _panel_figure(traces, streams, events, profile, title, columns, scale, unit)
    return None if got is None else (got[0], figure_png(got[1]))


def _panel_figure(traces, streams, events, profile: Profile, title, columns, scale, unit):
    """``(column, matplotlib Figure)`` of one panel, or None when none of ``columns`` has a value."""
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
    x_label = "time (s)"
    if not np.isfinite(t_all).any():  # no timestamps and no frame rate: the frame counts time, said on the axis
        t_all, x_label = np.asarray(traces["frame"], float), f"frame ({RATE_UNKNOWN})"
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
            for _, _, b, e in state_periods(events, key, (col,), state, last_f, last_t):
                if math.isfinite(b) and math.isfinite(e):
                    ax.axvspan(b, e, color=shade, alpha=0.18 if state == "alarm" else 0.12, linewidth=0)
    t_fin = t_all[np.isfinite(t_all)]
    if t_fin.size:  # every plot spans the whole session from its first frame, whatever the metric had a value
        t0, t1 = min(0.0, float(t_fin.min())), float(t_fin.max())
        ax.set_xlim(t0, t1 if t1 > t0 else t0 + 1.0)
        have = np.isfinite(values) & np.isfinite(t_all)
        first = float(t_all[have].min()) if have.any() else t1
        if first > t0 + 0.005 * (t1 - t0):
            ax.axvspan(t0, first, color="#999", alpha=0.12, linewidth=0)
            ax.text(t0 + 0.005 * (t1 - t0), 0.5, "no value yet", transform=ax.get_xaxis_transform(), fontsize=7,
                    color="#666", va="center")
    if lim is not None:
        for level, style, color in ((lim.warn, "--", "#c80"), (lim.alarm, "-", "#c22")):
            levels = (level, -level) if lim.direction == "abs_above" else (level,)
            for lv in levels:
                ax.axhline(lv * scale, linestyle=style, color=color, linewidth=1)
        ax.plot([], [], "--", color="#c80", label=f"warning {lim.warn * scale:g}")
        ax.plot([], [], "-", color="#c22", label=f"alarm {lim.alarm * scale:g}")
    ax.set_xlabel(x_label.replace("time (s)", "session time (s)"))
    ax.set_ylabel(unit or title, fontsize=8)
    ax.grid(True, alpha=0.3)
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=7, loc="upper right")
    return col, fig


def _panel_job(job: tuple) -> tuple[str, str] | None:
    return _panel(*job)


def _nothing() -> None:
    return None


class PlotWorkers:
    """Processes that draw the report's plots side by side, started while the session is still being measured.

    Loading matplotlib takes about 0.7 s here and each plot about 0.1 s; a summary of a finished session otherwise
    spends both after its last frame. Started early, the processes load matplotlib on the other core while the
    frames are measured, and at the end draw the plots in parallel. They run at the lowest priority
    (:mod:`qcmon.record._plotproc`): two of them loading matplotlib at normal priority took 0.6–1.3 s of processor time
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

        from qcmon.record._plotproc import start

        before = set(multiprocessing.active_children())
        # low priority (qcmon.record._plotproc): loading matplotlib must not slow the measurement on a busy core
        self._pool = ProcessPoolExecutor(max_workers=processes, mp_context=multiprocessing.get_context("spawn"),
                                         initializer=start)
        # processes start on demand: one empty job per process starts them all now; it is done once its process
        # has loaded matplotlib
        self._warm = [self._pool.submit(_nothing) for _ in range(processes)]
        self._processes = [p for p in multiprocessing.active_children() if p not in before]

    def ready(self, timeout: float = 0.0) -> bool:
        """Whether a process has loaded matplotlib and can draw (waiting up to ``timeout`` s for one).

        Not yet at the end of a short session on a busy machine: at the lowest priority the processes get almost
        no processor time while other programs keep both cores busy (a 300-frame summary waited 1.9 s for them
        here); the plots are then drawn in this process (:class:`PanelDrawing`), at its normal priority."""
        from concurrent.futures import FIRST_COMPLETED, wait

        done, _ = wait(self._warm, timeout=timeout, return_when=FIRST_COMPLETED)
        return any(not f.cancelled() and f.exception() is None for f in done)

    def submit(self, jobs: list[tuple]) -> list:
        """Start ``_panel(*job)`` of every job; the futures, in order."""
        return [self._pool.submit(_panel_job, job) for job in jobs]

    def close(self) -> None:
        """Stop the processes and wait for them (a plot being drawn is finished first, at most about 0.1 s).

        A process still loading matplotlib has nothing to finish: it is ended at once (at the lowest priority on a
        busy machine its loading could take seconds, and the pool would wait for it). Not waiting would leave the
        pool's manager thread running into the interpreter's exit, where Python 3.11 may print an ignored
        ``OSError: Bad file descriptor`` (seen once here: a race between ``concurrent.futures``' exit hook and that
        thread, which closes the pipe the hook writes to)."""
        if not all(f.done() for f in self._warm):
            for proc in self._processes:
                proc.kill()
        self._pool.shutdown(wait=True, cancel_futures=True)


class PanelDrawing:
    """The report's plots (:data:`_PANELS`), drawn from the moment this is made by ``plots`` when given, so that
    they are drawn while the summary is computed; :meth:`result` collects them (drawing here whatever the processes
    could not)."""

    def __init__(self, traces: Mapping[str, np.ndarray], events: Sequence[Event], profile: Profile,
                 plots: PlotWorkers | None = None):
        self.streams = stream_rows(traces)
        self._jobs = []
        for title, columns, scale, unit in _PANELS:
            needed = {k: np.asarray(traces[k]) for k in ("time_s", "frame", *columns)}  # what a plot reads
            self._jobs.append((needed, self.streams, list(events), profile, title, columns, scale, unit))
        self._futures = None
        if plots is not None and self.streams:
            try:  # drawn here when no process is ready to draw (see PlotWorkers.ready)
                self._futures = plots.submit(self._jobs) if plots.ready() else None
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
    """A value for reading: 3 significant digits, thousands separated, never in exponent notation."""
    if v is None:
        return "—"
    if isinstance(v, bool):
        return str(v)
    if isinstance(v, (int, np.integer)):
        return f"{int(v):,}"
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return readable_number(v) if math.isfinite(v) else "—"
    if isinstance(v, (list, tuple)):
        return " × ".join(_fmt(x) for x in v) if all(isinstance(x, (int, np.integer)) for x in v) \
            else ", ".join(_fmt(x) for x in v)
    if isinstance(v, Mapping) and "factor" in v:  # a brightness step
        return f"×{_fmt(v['factor'])} at {_fmt(v.get('time_s'))} s (frame {v.get('frame')})"
    return str(v)


def _verdict(v: str) -> str:
    v = v if v in _VERDICT_WORD else "unknown"
    return f'<span class="{v}">{_VERDICT_SYMBOL[v]} {_VERDICT_WORD[v]}</span>'


#: group -> (key, label, unit, scale) of the statistics a reader sees, in order. Fractions are shown as %.
_STAT_ROWS: dict[str, tuple[tuple[str, str, str, float], ...]] = {
    "motion": (("max_um", "largest", "µm", 1.0), ("rms_um", "RMS", "µm", 1.0),
               ("max_px", "largest", "px", 1.0), ("rms_px", "RMS", "px", 1.0)),
    "registration": (("min_corr", "lowest", "", 1.0), ("median_corr", "median", "", 1.0)),
    "z": (("max_abs_um", "largest |offset|", "µm", 1.0), ("final_um", "at the end (+ deeper)", "µm", 1.0)),
    "focus": (("min_corr", "lowest", "", 1.0), ("final_corr", "at the end", "", 1.0)),
    "bleach": (("slope_pct_per_min", "session fit", "%/min", 1.0), ("tau_min", "time constant", "min", 1.0),
               ("max_window_pct_per_min", "steepest window", "%/min", 1.0)),
    "brightness": (("final_pct", "at the end", "% of start", 1.0), ("min_pct", "lowest", "% of start", 1.0)),
    "saturation": (("max_frac", "most", "%", 100.0), ("mean_frac", "mean", "%", 100.0),
                   ("level_dn", "detector maximum", "DN", 1.0)),
    "clipping": (("max_frac", "most", "%", 100.0), ("mean_frac", "mean", "%", 100.0)),
    "snr": (("median", "median", "", 1.0), ("p05", "5th percentile", "", 1.0)),
    "line_offset": (("median_px", "median", "px", 1.0), ("max_abs_px", "largest |offset|", "px", 1.0)),
    "photon_transfer": (("gain", "conversion gain", "DN/photon", 1.0), ("dark_level", "dark level", "DN", 1.0),
                        ("read_noise_dn", "read noise", "DN", 1.0), ("r2", "fit r²", "", 1.0)),
}


def _number(v) -> float:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return math.nan
    return v


def _stats_text(group: str, g: Mapping) -> str:
    """``"largest 7.93 µm · RMS 1.17 µm"``; the px values only when there is no µm value; ``""`` when nothing
    was measured."""
    items = []
    have_um = group == "motion" and math.isfinite(_number(g.get("max_um")))
    for key, label, unit, scale in _STAT_ROWS.get(group, ()):
        if have_um and key.endswith("_px"):
            continue
        v = _number(g.get(key))
        if not math.isfinite(v):
            continue
        items.append(f"{label} {_fmt(v * scale)}" + (f" {unit}" if unit else ""))
    return " · ".join(items)


def _severity(values: np.ndarray, lim) -> np.ndarray:
    """How far each value lies beyond its limit: 0 at the warning level, 1 at the alarm level (direction-aware);
    -inf where unknown."""
    v = np.asarray(values, float)
    if lim.direction == "abs_above":
        v = np.abs(v)
    span = abs(lim.alarm - lim.warn) or abs(lim.warn) or 1.0
    with np.errstate(invalid="ignore"):
        e = (lim.warn - v) / span if lim.direction == "below" else (v - lim.warn) / span
    return np.where(np.isfinite(e), e, -np.inf)


def worst_moment(traces: Mapping[str, np.ndarray], profile: Profile) -> tuple[int, str, float] | None:
    """The row where a metric with levels in ``profile`` lies furthest beyond its warning level (0 at the warning
    level, 1 at the alarm level): ``(row, metric, severity)``, or None without any such value. Metrics are compared
    by this scale, so a displacement at its alarm level ranks with saturation at its alarm level."""
    best = None
    for metric, lim in profile.limits.items():
        if metric not in traces or len(traces[metric]) == 0:
            continue
        e = _severity(traces[metric], lim)
        i = int(np.argmax(e))
        if np.isfinite(e[i]) and (best is None or e[i] > best[2]):
            best = (i, metric, float(e[i]))
    return best


def _read_frame(source: str, page: int, session: str | None, dataset: str | None = None) -> np.ndarray:
    """One recorded frame from the microscope's file, opened read-only and closed at once. Raises OSError or
    ValueError with a reason when it cannot be read from here."""
    path = Path(source)
    if not path.is_absolute() and not path.exists() and session:
        for base in (Path(session), Path(session).parent):  # the record may be read from another folder
            if (base / path.name).exists():
                path = base / path.name
                break
    if not path.exists():
        raise OSError(f"{source} is not there any more (or not reachable from here)")
    from qcmon.sources.arrays import ArrayStream, container_kind

    if container_kind(str(path)) is not None:  # HDF5, NWB, Zarr: the series' frame number `page`
        from qcmon.sources import drain

        stream = ArrayStream(str(path), dataset=dataset)
        stream.skip_frames = page
        frames, err = drain(stream.iter_read(1, give_up=True))
        if not frames:
            raise ValueError(f"{path}: frame {page} could not be read ({err or 'the series has fewer frames'})")
        if isinstance(frames[0][1], Exception):
            raise ValueError(f"{path}: frame {page} could not be read ({frames[0][1]})")
        return np.asarray(frames[0][1])
    if path.suffix.lower() == ".raw":
        from qcmon.sources.raw import RawStream

        stream = RawStream(str(path))
        stream.skip_frames = page
        frames, err = stream.read(1, give_up=True)
        if not frames:
            raise ValueError(f"{path}: frame {page} could not be read ({err})")
        return np.asarray(frames[0][1])
    import tifffile

    with tifffile.TiffFile(path) as tif:
        if page >= len(tif.pages):
            raise ValueError(f"{path} has {len(tif.pages)} pages, the record names page {page}")
        return tif.pages[page].asarray()


def _image_png(image: np.ndarray, *, marks: Mapping[str, np.ndarray] | None = None, max_side: int = 512) -> str:
    """A grey PNG (base64) of ``image`` between the 0.5th and 99.5th percentiles of its unmarked pixels, at most
    ``max_side`` px per side (mean of blocks); ``marks`` colours pixels: ``{"#rrggbb": mask}``."""
    from PIL import Image

    img = np.asarray(image, dtype=np.float64)
    if img.ndim != 2:
        img = img.reshape(img.shape[-2:]) if img.size == img.shape[-2] * img.shape[-1] else img[..., 0]
    k = max(1, math.ceil(max(img.shape) / max_side))
    if k > 1:  # block means (marks: any pixel of the block)
        h, w = (img.shape[0] // k) * k, (img.shape[1] // k) * k
        img = img[:h, :w].reshape(h // k, k, w // k, k).mean(axis=(1, 3))
        marks = {c: m[:h, :w].reshape(h // k, k, w // k, k).any(axis=(1, 3)) for c, m in (marks or {}).items()}
    shown = np.isfinite(img)
    for mask in (marks or {}).values():  # the contrast is that of the unmarked pixels (saturated ones are coloured)
        shown &= ~np.asarray(mask, bool)
    finite = img[shown] if shown.any() else img[np.isfinite(img)]
    lo, hi = (np.percentile(finite, (0.5, 99.5)) if finite.size else (0.0, 1.0))
    grey = np.clip((np.nan_to_num(img, nan=lo) - lo) / ((hi - lo) or 1.0), 0, 1)
    grey8 = (grey * 255).astype(np.uint8)
    coloured = [(c, m) for c, m in (marks or {}).items() if np.asarray(m, bool).any()]
    if coloured:
        pic = np.repeat(grey8[..., None], 3, axis=2)
        for colour, mask in coloured:
            pic[np.asarray(mask, bool)] = [int(colour[i:i + 2], 16) for i in (1, 3, 5)]
        pic = Image.fromarray(pic, "RGB")
    else:  # a grey PNG shows the same pixels as three equal channels, in a sixth of the encoding time here
        pic = Image.fromarray(grey8, "L")
    buf = io.BytesIO()
    pic.save(buf, format="PNG", optimize=False)
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _field_images(out_dir: Path | None, summary: Mapping, traces: Mapping[str, np.ndarray], profile: Profile,
                  reference: np.ndarray | None = None) -> list[tuple[str, str, str | None]]:
    """``(title, caption, base64 PNG or None)`` for the reference image and the field at the worst moment; the
    caption says why an image is missing."""
    from qcmon.record.journal import REFERENCE_FILE

    out: list[tuple[str, str, str | None]] = []
    ref_path = Path(out_dir) / REFERENCE_FILE if out_dir is not None else None
    if reference is not None or (ref_path is not None and ref_path.exists()):
        try:
            import tifffile

            ref = np.asarray(reference) if reference is not None else tifffile.imread(ref_path)
            first = (summary.get("streams") or [{}])[0]
            out.append(("Reference", f"the image displacements are measured against (channel "
                        f"{first.get('channel', 0)}, plane {first.get('plane', 0)}; {ref.shape[-1]} × "
                        f"{ref.shape[-2]} px; {REFERENCE_FILE})", _image_png(ref)))
        except (OSError, ValueError) as exc:
            out.append(("Reference", f"{ref_path} could not be read: {exc}", None))
    else:
        out.append(("Reference", "no reference image was recorded (fewer frames than the reference needs?)", None))
    n = len(traces.get("frame", ()))
    worst = worst_moment(traces, profile) if n else None
    if worst is None:
        out.append(("Worst moment", "no metric with levels was measured", None))
        return out
    i, metric, sev = worst
    lim = profile.limits[metric]
    scale, unit = (100.0, "%") if metric.endswith("_frac") else (1.0, lim.unit)
    value = float(np.asarray(traces[metric], float)[i]) * scale
    level = "alarm" if sev >= 1 else "warning" if sev >= 0 else None
    where = (f"frame {int(traces['frame'][i])} at {session_clock(float(traces['time_s'][i]))} "
             f"(channel {int(traces['channel'][i])}, plane {int(traces['plane'][i])}): {lim.label or metric} "
             f"{_fmt(value)}{(' ' + unit) if unit else ''}")
    if level:
        lv = (lim.alarm if level == "alarm" else lim.warn) * scale
        where += f", beyond its {level} level {lv:g}" + (f" {unit}" if unit else "")
    else:
        where += " — no metric reached a warning level; this is the frame closest to one"
    source = str(traces["source"][i]) if "source" in traces else ""
    try:
        frame = _read_frame(source, int(traces["page"][i]), summary.get("session"), summary.get("dataset"))
    except Exception as exc:  # noqa: BLE001 - a file half-written, moved or odd: the report is written without it
        out.append(("Worst moment", f"{where}. Not shown: {exc}", None))
        return out
    marks = {}
    sat = _number((summary.get("saturation") or {}).get("level_dn"))
    if math.isfinite(sat):
        marks["#ff2020"] = frame >= sat
    caption = where + ("; red: pixels at the detector maximum" if marks and marks["#ff2020"].any() else "") \
        + f" (as recorded, not motion-corrected; {Path(source).name}, page {int(traces['page'][i])})"
    out.append(("Worst moment", caption, _image_png(frame, marks=marks)))
    return out


def _reason_text(why: str, profile: Profile) -> str:
    """An exclusion reason of ``exclude.csv`` in words: ``"alarm: saturated_frac; displacement_um beyond alarm
    level"`` → ``"alarm of saturated pixels; displacement beyond its alarm level (5 µm)"``."""
    out = []
    for part in str(why).split("; "):
        kind, _, metric = part.partition(": ")
        if kind == "alarm" and metric in profile.limits:
            out.append(f"alarm of {(profile.limits[metric].label or metric).lower()}")
            continue
        metric = part.removesuffix(" beyond alarm level")
        lim = profile.limits.get(metric)
        if lim is not None and metric != part:
            scale, unit = (100.0, "%") if metric.endswith("_frac") else (1.0, lim.unit)
            out.append(f"{(lim.label or metric).lower()} beyond its alarm level ({lim.alarm * scale:g}"
                       + (f" {unit}" if unit else "") + ")")
            continue
        out.append(part)
    return "; ".join(out)


def _advice(events: Sequence[Event]) -> list[tuple[Event, str]]:
    """Each distinct advice of the events (the field ``advice``, when the record has it) with its first event."""
    seen: dict[str, Event] = {}
    for ev in events:
        text = getattr(ev, "advice", "") or ""
        if text and text not in seen:
            seen[text] = ev
    return [(ev, text) for text, ev in seen.items()]


#: Events listed on the page at most (all of them stay in events.jsonl).
MAX_EVENT_ROWS = 300
#: Exclusion ranges listed on the page at most (all of them stay in exclude.csv).
MAX_EXCLUDE_ROWS = 40


def report_html(summary: Mapping, traces: Mapping[str, np.ndarray], events: Sequence[Event], profile: Profile,
                facts: Mapping | None = None, *, plots: PlotWorkers | None = None,
                panels: PanelDrawing | None = None, out_dir: str | Path | None = None,
                reference: np.ndarray | None = None) -> str:
    """The text of ``report.html`` (see :func:`write_report`); ``reference``, the reference image, else
    ``reference.tif`` in ``out_dir``."""
    e = html.escape
    events = list(events)
    facts = dict(facts if facts is not None else summary.get("facts", {}))
    overall = summary.get("verdict", "unknown")
    overall = overall if overall in _VERDICT_WORD else "unknown"
    rate_unknown = (summary.get("frame_rate") or {}).get("message") == RATE_UNKNOWN
    multi = len(summary.get("streams", ())) > 1
    session = summary.get("session") or ""
    # e.g. "fov2/frames": the folder's name alone is often generic
    name = "/".join(Path(session).parts[-2:]) if session else ""
    frames = int(summary.get("frames") or 0)
    usable = summary.get("usable") or {}
    rate = facts.get("frame_rate_hz", {})
    rate = rate.get("value") if isinstance(rate, Mapping) else rate
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>qcmon report{': ' + e(name) if name else ''} — {e(_VERDICT_WORD[overall])}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>Imaging session quality report{': ' + e(name) if name else ''}</h1>",
        f'<div class="top"><span class="verdict {_box_class(overall, summary)}">{_VERDICT_SYMBOL[overall]} '
        f'{_VERDICT_WORD[overall]}{", INCOMPLETE" if summary.get("problems") else ""}</span>',
    ]
    if frames:
        frac = usable.get("fraction")
        share = (f"{100 * frac:.1f} %" if isinstance(frac, float) and math.isfinite(frac) else "—")
        parts.append(f'<span class="usable"><b>{share}</b> of frames usable '
                     f'({_fmt(usable.get("frames", frames))} of {_fmt(frames)})</span>')
    parts.append("</div>")
    reasons = verdict_parts(summary)[2:]
    if reasons:
        parts.append(f'<p class="line">{e(" · ".join(reasons))}</p>')
    parts.append(
        (f"<p>{_fmt(frames)} frames over {e(session_clock(summary.get('duration_s')))} (min:s)"
         + (f" at {_fmt(_number(rate))} Hz" if math.isfinite(_number(rate)) else "") if not rate_unknown else
         f"<p>{_fmt(frames)} frames; <b class=\"verdict fail\">{e(RATE_UNKNOWN)}</b> (times, durations and "
         "per-minute values are blank; plots count frames)")
        + (f"; session <code>{e(session)}</code>" if session else "")
        + f"; threshold profile <b>{e(profile.name)}</b> ({e(profile.description)}); "
        f"qcmon {e(str(summary.get('qcmon_version', '')))}. Times are session time from the first frame.</p>")
    problems = summary.get("problems") or []
    if problems:
        parts.append(f'<div class="problem"><b>{len(problems)} input problem{"s" if len(problems) != 1 else ""}'
                     "</b> (frames that could not be read are not in this report):<ul>"
                     + "".join(f"<li>{e(str(p))}</li>" for p in problems[:20]) + "</ul>"
                     + (f"<p>… and {len(problems) - 20} more in summary.json.</p>" if len(problems) > 20 else "")
                     + "</div>")
    parts.append(f'<div class="caution"><b>Caution.</b> {e(profile.caution)}</div>')

    # what to check: advice of the events, when the record has it
    advice = _advice(events)
    if advice:
        parts.append("<h2>What to check</h2><ul class='advice'>")
        for ev, text in advice:
            parts.append(f"<li><b>{e(session_clock(ev.time_s))}</b>"
                         + (f" (channel {ev.channel}, plane {ev.plane})" if multi else "")
                         + f" — {e(text)}</li>")
        parts.append("</ul>")

    # frames to exclude, with their session times
    parts.append("<h2>Frames to exclude from analysis</h2>")
    ranges = summary.get("exclude", [])
    if ranges:
        tkey = {}
        for c, p, f, t in zip(np.asarray(traces["channel"]).tolist(), np.asarray(traces["plane"]).tolist(),
                              np.asarray(traces["frame"]).tolist(), np.asarray(traces["time_s"], float).tolist()):
            tkey[(c, p, f)] = t
        parts.append(f"<p>{len(ranges)} range{'s' if len(ranges) != 1 else ''}, "
                     f"{_fmt(frames - int(usable.get('frames', frames)))} frames; all of them in "
                     "<code>exclude.csv</code>.</p><table><tr>" + ("<th>ch/plane</th>" if multi else "")
                     + "<th>frames</th><th>session time</th><th>count</th><th>why</th></tr>")
        for c, p, first, last, why in ranges[:MAX_EXCLUDE_ROWS]:
            t0, t1 = tkey.get((c, p, first), math.nan), tkey.get((c, p, last), math.nan)
            parts.append("<tr>" + (f"<td>{c}/{p}</td>" if multi else "")
                         + f"<td>{first if first == last else f'{first}–{last}'}</td>"
                         f"<td>{e(_span(t0, t1, first == last))}"
                         f"</td><td class='num'>{last - first + 1}</td><td>{e(_reason_text(why, profile))}</td></tr>")
        parts.append("</table>")
        if len(ranges) > MAX_EXCLUDE_ROWS:
            parts.append(f"<p class='small'>… and {len(ranges) - MAX_EXCLUDE_ROWS} more ranges in "
                         "<code>exclude.csv</code>.</p>")
    else:
        parts.append("<p>None: every frame is usable.</p>" if frames else "<p>No frames were measured.</p>")

    # the field
    parts.append("<h2>The field</h2><div class='images'>")
    for title, caption, png in _field_images(Path(out_dir) if out_dir is not None else None, summary, traces,
                                             profile, reference):
        body = (f'<img alt="{e(title)}" src="data:image/png;base64,{png}">' if png is not None
                else "<div class='noimage'>not shown</div>")
        parts.append(f"<figure>{body}<figcaption><b>{e(title)}</b>: {e(caption)}</figcaption></figure>")
    parts.append("</div><p class='small'>Each image is shown between its own 0.5th and 99.5th percentiles (of the "
                 "pixels below the detector maximum).</p>")

    # statistics with units
    parts.append("<h2>Metrics</h2><table><tr><th>metric</th><th>verdict</th><th>statistics</th>"
                 "<th>in warning</th><th>in alarm</th></tr>")
    for group in (*GROUPS, "photon_transfer"):
        g = summary.get(group)
        if not isinstance(g, Mapping):
            continue
        stats = _stats_text(group, g) or "not measured in this session"
        if group == "photon_transfer":  # why the gain or the dark level is blank, or what is uncertain
            why = "; ".join(t for t in (g.get("quality"), g.get("bias")) if isinstance(t, str) and t)
            stats = f"{stats} — {why}" if why else stats
        verdict = _verdict(g["verdict"]) if "verdict" in g else ""
        label = GROUP_LABELS.get(group, group.replace("_", " "))
        label = label if label.startswith("z ") else label[:1].upper() + label[1:]
        parts.append(f"<tr><td>{e(label)}</td><td>{verdict}</td><td>{e(stats)}</td>"
                     f"<td class='num'>{e(_secs(g.get('warning_s')))}</td>"
                     f"<td class='num'>{e(_secs(g.get('alarm_s')))}</td></tr>")
    parts.append("</table>")
    if multi:
        parts.append("<table><tr><th>channel</th><th>plane</th><th>frames</th><th>verdict</th></tr>")
        for s in summary["streams"]:
            parts.append(f"<tr><td>{s['channel']}</td><td>{s['plane']}</td><td class='num'>{_fmt(s['frames'])}</td>"
                         f"<td>{_verdict(s['verdict'])}</td></tr>")
        parts.append("</table>")
    if summary.get("notes"):
        parts.append("<p class='small'>Why a value is blank:</p><ul class='small'>"
                     + "".join(f"<li>{e(str(n))}</li>" for n in summary["notes"]) + "</ul>")

    parts.append("<h2>Traces</h2><p class='small'>Session time from the first frame. Dashed: warning level; solid: "
                 "alarm level; shaded: declared warning (orange) and alarm (red) periods; grey: no value yet "
                 "(the metric needs some frames first). Long sessions show the minimum–maximum envelope, so "
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
        parts.append("<table><tr><th>session time</th><th>frame</th>" + ("<th>ch/plane</th>" if multi else "")
                     + "<th>what</th><th>message</th></tr>")
        for ev in events[:MAX_EVENT_ROWS]:
            what = {"start": f"{ev.state} begins", "end": f"{ev.state} ends"}.get(ev.kind, ev.kind)
            text = e(ev.message)
            adv = getattr(ev, "advice", "") or ""
            if adv:
                text += f"<br><i>{e(adv)}</i>"
            parts.append(f"<tr><td>{e(session_clock(ev.time_s))}</td><td class='num'>"
                         f"{ev.frame if ev.frame >= 0 else '—'}</td>"
                         + (f"<td>{ev.channel}/{ev.plane}</td>" if multi else "")
                         + f"<td>{e(what)}</td><td>{text}</td></tr>")
        parts.append("</table>")
        if len(events) > MAX_EVENT_ROWS:
            parts.append(f"<p class='small'>… and {len(events) - MAX_EVENT_ROWS} more in "
                         "<code>events.jsonl</code>.</p>")
    else:
        parts.append("<p>No events.</p>")

    parts.append("<h2>Acquisition facts</h2>")
    if facts:
        parts.append("<table><tr><th>fact</th><th>value</th><th>from</th></tr>")
        for k, f in facts.items():
            value, origin = (f.get("value"), f.get("origin", "")) if isinstance(f, Mapping) else (f, "")
            parts.append(f"<tr><td>{e(str(k).replace('_', ' '))}</td><td>{e(_fmt(value))}</td>"
                         f"<td>{e(str(origin))}</td></tr>")
        sat = summary.get("saturation") or {}
        for name, key in (("saturation level (DN)", "level"), ("floor (DN)", "floor")):
            value = sat.get(f"{key}_dn" if key == "level" else "floor_dn")
            if value is not None:
                parts.append(f"<tr><td>{e(name)}</td><td>{e(_fmt(value))}</td>"
                             f"<td>{e(str(sat.get(f'{key}_origin', '')))}</td></tr>")
        parts.append("</table>")
    else:
        parts.append("<p>No acquisition facts recorded.</p>")
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def _box_class(verdict: str, summary: Mapping) -> str:
    """A session whose frames were not all read (input problems) is never shown as a green pass."""
    return "warning" if verdict in ("pass", "unknown") and summary.get("problems") else verdict


def _span(t0: float, t1: float, single: bool) -> str:
    return session_clock(t0) if single else f"{session_clock(t0)}–{session_clock(t1)}"


def _secs(v) -> str:
    v = _number(v)
    if not math.isfinite(v):
        return "—"
    return "0" if v == 0 else f"{v:.1f} s"


def write_report(out_dir: str | Path, summary: Mapping, traces: Mapping[str, np.ndarray], events: Sequence[Event],
                 profile: Profile, facts: Mapping | None = None, *, plots: PlotWorkers | None = None,
                 panels: PanelDrawing | None = None) -> Path:
    """Write ``report.html`` into ``out_dir`` atomically.

    Parameters
    ----------
    out_dir : path-like
    summary : mapping
        From :func:`qcmon.record.summary.summarize_traces`.
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
    from qcmon.record.journal import REPORT_FILE, write_atomic

    return write_atomic(Path(out_dir) / REPORT_FILE,
                        report_html(summary, traces, events, profile, facts, plots=plots, panels=panels,
                                    out_dir=out_dir))
