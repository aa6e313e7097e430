"""The end-of-session summary (``summary.json``) and the frame ranges to exclude (``exclude.csv``), computed from the
rows and events; :mod:`qcmon.record.outputs` writes them with ``report.html``, also rebuilt from the record alone.

Keys of ``summary.json`` (schema ``qcmon.summary/1``). Statistics ignore unknown (NaN) values; a statistic with
no data is ``null``. Over several channels/planes the top-level statistics pool every row (max, min, mean, RMS,
median, percentiles) or take the worst stream (fits and final values); ``streams`` holds each (channel, plane).

=================================  =========  ==================================================================
key                                unit       meaning
=================================  =========  ==================================================================
``schema``                                    ``"qcmon.summary/1"``
``qcmon_version``                             version that wrote the file
``frames``                                    rows in ``traces.csv`` (all channels and planes)
``duration_s``                     s          last ``time_s`` − first ``time_s``
``profile``                                   ``{"name", "path", "description", "caution"}``
``facts``                                     acquisition facts ``{key: {"value", "origin"}}``
``frame_rate``                                ``{"hz", "origin", "message"}``: the rate the times rest on and
                                              where it came from (option, metadata, "estimated from …");
                                              ``message`` is "frame rate unknown: give --frame-rate" when
                                              there is none (times, durations, per-minute values are then null)
``verdict``                                   worst metric verdict: ``"pass"``, ``"warning"``, ``"fail"``
                                              (``"unknown"`` when no metric could be checked)
``events``                                    counts: ``warnings``, ``alarms``, ``notes``, ``problems``
``motion.max_px``                  px         largest ``displacement_px``
``motion.rms_px``                  px         root mean square of ``displacement_px``
``motion.max_um``                  µm         largest ``displacement_um`` (null without pixel size)
``motion.rms_um``                  µm         root mean square of ``displacement_um``
``registration.min_corr``                     smallest ``reg_corr``
``registration.median_corr``                  median ``reg_corr``
``z.max_abs_um``                   µm         largest ``|z_um|`` (null without a reference stack)
``z.final_um``                     µm         last known ``z_um``
``focus.min_corr``                            smallest ``focus_corr``
``focus.final_corr``                          last known ``focus_corr``
``bleach.slope_pct_per_min``       %/min      initial slope of an exponential fitted to ``baseline_f`` over the
                                              whole session (log-linear least squares), % of initial per min
``bleach.tau_min``                 min        time constant of that exponential (null unless it dims)
``bleach.max_window_pct_per_min``  %/min      most negative ``bleach_pct_per_min`` (trailing-window slope)
``brightness.final_pct``           %          last known ``brightness_pct``
``brightness.min_pct``             %          smallest ``brightness_pct``
``saturation.max_frac``            0..1       largest ``saturated_frac``
``saturation.mean_frac``           0..1       mean ``saturated_frac``
``saturation.level_dn``            DN         the ceiling ``saturated_frac`` counts at (from the engine)
``saturation.level_origin``                   where it came from: ``--bit-depth``, metadata, "inferred from N
                                              pixels piled up at …", or the dtype
``saturation.floor_dn``            DN         the floor ``clipped_frac`` counts at, and ``floor_origin`` likewise
``clipping.max_frac``              0..1       largest ``clipped_frac``
``clipping.mean_frac``             0..1       mean ``clipped_frac``
``snr.median``                                median ``snr``
``snr.p05``                                   5th percentile of ``snr``
``photon_transfer.gain``           DN/photon  conversion gain (from the engine, via ``extra``)
``photon_transfer.dark_level``     DN         dark level (from the engine, via ``extra``)
``line_offset.median_px``          px         median ``line_offset_px``
``line_offset.max_abs_px``         px         largest ``|line_offset_px|``
``<group>.verdict``                           ``"pass"`` / ``"warning"`` / ``"fail"`` from the threshold events of
                                              the group's metrics (at least ``"warning"`` when exclude.csv lists
                                              frames of the group beyond its alarm level); ``"unknown"`` when
                                              the profile sets no limit for them or there is no data
``<group>.warning_s``              s          session time spent in warning (from the events)
``<group>.alarm_s``                s          session time spent in alarm (from the events)
``streams``                                   list, one entry per (channel, plane): ``channel``, ``plane``,
                                              ``frames``, ``duration_s``, ``verdict`` and the groups above
``exclude``                                   list of ``[channel, plane, first_frame, last_frame, reason]``
``usable.frames``                             rows of ``traces.csv`` outside every ``exclude`` range
``usable.fraction``                0..1       ``usable.frames`` ÷ ``frames`` (null without frames)
``notes``                                     why a statistic is null (e.g. too few frames for a fit)
=================================  =========  ==================================================================

Keys of ``extra`` given as ``"group.key"`` are placed under their group (``extra={"photon_transfer.gain": 2.0}``
gives ``summary["photon_transfer"]["gain"]``); other keys are copied as they are, except that a key qcmon's
summary already has (e.g. ``streams``) goes to ``summary["engine"][key]``.
"""

from __future__ import annotations

import json
import math
import warnings
from pathlib import Path
from typing import Iterable, Mapping, NamedTuple, Sequence

import numpy as np

import qcmon
from qcmon.events import Event
from qcmon.frames import RATE_UNKNOWN
from qcmon.metrics.brightness import bleach_rate, judgeable
from qcmon.thresholds import Profile, load_profile

__all__ = [
    "GROUPS",
    "jsonable",
    "GROUP_LABELS",
    "readable_number",
    "session_clock",
    "state_periods",
    "stream_rows",
    "SCHEMA",
    "ExcludeRange",
    "exclude_ranges",
    "exclude_csv",
    "fit_bleaching",
    "summarize_traces",
    "usable_frames",
    "verdict_line",
    "verdict_parts",
]

SCHEMA = "qcmon.summary/1"

#: Summary groups and the ``traces.csv`` metrics whose events decide their verdict.
GROUPS: dict[str, tuple[str, ...]] = {
    "motion": ("displacement_um", "displacement_px"),
    "registration": ("reg_corr",),
    "z": ("z_um",),
    "focus": ("focus_corr",),
    "bleach": ("bleach_pct_per_min",),
    "brightness": ("brightness_pct",),
    "saturation": ("saturated_frac",),
    "clipping": ("clipped_frac",),
    "snr": ("snr",),
    "line_offset": ("line_offset_px",),
}

_VERDICT_RANK = {"unknown": -1, "pass": 0, "warning": 1, "fail": 2}

#: What a reader calls each group (the report, the verdict line, the audit page).
GROUP_LABELS: dict[str, str] = {
    "motion": "motion", "registration": "registration correlation", "z": "z offset", "focus": "focus correlation",
    "bleach": "bleaching", "brightness": "brightness", "saturation": "saturated pixels",
    "clipping": "clipped pixels", "snr": "SNR", "line_offset": "line offset",
}
#: The overall verdict in words.
VERDICT_WORDS: dict[str, str] = {"pass": "PASS", "warning": "WARNING", "fail": "FAIL", "unknown": "NOT CHECKED"}
#: Metrics whose values beyond the alarm level exclude a frame even outside a declared alarm.
_EXCLUDE_BY_VALUE = ("displacement_um", "displacement_px", "z_um")


class ExcludeRange(NamedTuple):
    """Frames ``first_frame``..``last_frame`` (inclusive) of one (channel, plane) to leave out of analysis."""

    channel: int
    plane: int
    first_frame: int
    last_frame: int
    reason: str


def fit_bleaching(time_s: np.ndarray, baseline_f: np.ndarray) -> tuple[float, float]:
    """Fit ``b(t) = b0 · exp(k t)`` to the above-dark baseline by log-linear least squares.

    Parameters
    ----------
    time_s : (N,) ndarray
        Session time, s.
    baseline_f : (N,) ndarray
        Baseline above the dark level, DN. Values that are not finite or not positive are left out.

    Returns
    -------
    slope_pct_per_min : float
        ``100 · k`` with ``k`` in 1/min: the initial slope of the fitted exponential in % of the fitted initial
        brightness per minute (negative = dimming).
    tau_min : float
        ``-1 / k`` in minutes when the baseline dims (``k < 0``), else NaN.

    Warns
    -----
    UserWarning
        Fewer than 3 usable points or no time span: both values NaN.

    Notes
    -----
    Least squares on ``ln b`` weighs every frame's relative error equally; for a pure exponential it gives the
    same rate as a non-linear fit (``scipy.optimize.curve_fit``), which the tests check.
    """
    t = np.asarray(time_s, dtype=float)
    b = np.asarray(baseline_f, dtype=float)
    if t.shape != b.shape:
        raise ValueError(f"time_s and baseline_f must have the same shape, got {t.shape} and {b.shape}")
    ok = np.isfinite(t) & np.isfinite(b) & (b > 0)
    if ok.sum() < 3 or np.ptp(t[ok]) <= 0:
        warnings.warn("bleaching fit needs at least 3 frames with a positive baseline over a time span; "
                      "slope and time constant are NaN", UserWarning, stacklevel=2)
        return math.nan, math.nan
    t_min = t[ok] / 60.0
    k = float(np.polynomial.polynomial.polyfit(t_min, np.log(b[ok]), 1)[1])
    return 100.0 * k, (-1.0 / k if k < 0 else math.nan)


def _finite(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a, dtype=float)
    return a[np.isfinite(a)]


def _stat(a: np.ndarray, how: str) -> float:
    v = _finite(a)
    if v.size == 0:
        return math.nan
    if how == "max":
        return float(v.max())
    if how == "min":
        return float(v.min())
    if how == "mean":
        return float(v.mean())
    if how == "rms":
        return float(np.sqrt(np.mean(v * v)))
    if how == "median":
        return float(np.median(v))
    if how == "p05":
        return float(np.percentile(v, 5))
    if how == "max_abs":
        return float(np.abs(v).max())
    if how == "final":
        return float(v[-1])
    raise ValueError(how)


#: group -> key -> (column, statistic). Pooled statistics over streams; "final" is per stream only.
_STATS: dict[str, dict[str, tuple[str, str]]] = {
    "motion": {"max_px": ("displacement_px", "max"), "rms_px": ("displacement_px", "rms"),
               "max_um": ("displacement_um", "max"), "rms_um": ("displacement_um", "rms")},
    "registration": {"min_corr": ("reg_corr", "min"), "median_corr": ("reg_corr", "median")},
    "z": {"max_abs_um": ("z_um", "max_abs"), "final_um": ("z_um", "final")},
    "focus": {"min_corr": ("focus_corr", "min"), "final_corr": ("focus_corr", "final")},
    "bleach": {"max_window_pct_per_min": ("bleach_pct_per_min", "min")},
    "brightness": {"final_pct": ("brightness_pct", "final"), "min_pct": ("brightness_pct", "min")},
    "saturation": {"max_frac": ("saturated_frac", "max"), "mean_frac": ("saturated_frac", "mean")},
    "clipping": {"max_frac": ("clipped_frac", "max"), "mean_frac": ("clipped_frac", "mean")},
    "snr": {"median": ("snr", "median"), "p05": ("snr", "p05")},
    "line_offset": {"median_px": ("line_offset_px", "median"), "max_abs_px": ("line_offset_px", "max_abs")},
}


def stream_rows(traces: Mapping[str, np.ndarray]) -> dict[tuple[int, int], np.ndarray]:
    """Row indices of each (channel, plane), in frame order."""
    ch = np.asarray(traces["channel"], dtype=np.int64)
    pl = np.asarray(traces["plane"], dtype=np.int64)
    fr = np.asarray(traces["frame"], dtype=np.int64)
    out = {}
    for c, p in sorted(set(zip(ch.tolist(), pl.tolist()))):
        idx = np.flatnonzero((ch == c) & (pl == p))
        out[(c, p)] = idx[np.argsort(fr[idx], kind="stable")]
    return out


def state_periods(events: Sequence[Event], key: tuple[int, int], metrics: Iterable[str], state: str,
                  last_frame: int, last_time: float) -> list[tuple[int, int, float, float]]:
    """(first_frame, last_frame, start_s, end_s) of each declared ``state`` of ``metrics`` in one stream."""
    metrics = set(metrics)
    open_: dict[str, tuple[int, float]] = {}
    out = []
    for ev in events:
        if ev.metric not in metrics or ev.state != state or (ev.channel, ev.plane) != key:
            continue
        if ev.kind == "start":
            open_[ev.metric] = (ev.frame, ev.time_s)
        elif ev.kind == "end":
            start = open_.pop(ev.metric, (ev.started_frame, ev.started_time_s))
            out.append((start[0], ev.frame, start[1], ev.time_s))
    for start in open_.values():  # record ended without an end event (crash): open until the last frame
        out.append((start[0], last_frame, start[1], last_time))
    return out


def _stream_summary(traces, idx, events, key, profile: Profile, notes: list[str]) -> dict:
    t = np.asarray(traces["time_s"], dtype=float)[idx]
    tf = _finite(t)
    frames = np.asarray(traces["frame"], dtype=np.int64)[idx]
    last_frame = int(frames[-1]) if frames.size else -1
    last_time = float(tf[-1]) if tf.size else math.nan
    out: dict[str, object] = {"channel": key[0], "plane": key[1], "frames": int(idx.size),
                              "duration_s": float(tf[-1] - tf[0]) if tf.size else math.nan}
    for group, stats in _STATS.items():
        out[group] = {name: _stat(np.asarray(traces[col], dtype=float)[idx], how)
                      for name, (col, how) in stats.items()}
    # Bleach slope: quantile fit of every frame's above-dark mean from the first frame on (no trailing filter), one
    # level per segment between brightness steps; blank with a reason when its uncertainty is too wide.
    step_col = traces.get("level_step")
    steps = np.zeros(idx.size, dtype=bool) if step_col is None else np.isfinite(np.asarray(step_col, float)[idx])
    where = f"channel {key[0]}, plane {key[1]}"
    mean_col = traces.get("mean_f")
    slope = se = math.nan
    if mean_col is not None:
        slope, se = bleach_rate(t, np.asarray(mean_col, dtype=float)[idx], segments=np.cumsum(steps))
    note = ""
    if not math.isfinite(slope):
        note = "too few frames with light above dark to fit"
    elif not judgeable(slope, se):
        note = f"too short to judge: {slope:.2g} ± {2 * se:.2g} %/min (95 %)"
        notes.append(f"{where}: bleach slope {note}")
        slope = math.nan
    tau = -100.0 / slope if math.isfinite(slope) and slope < 0 else math.nan
    out["bleach"].update(slope_pct_per_min=slope, tau_min=tau, slope_se_pct_per_min=se, note=note)
    step_rows = np.flatnonzero(steps)
    out["brightness"]["steps"] = [
        {"frame": int(frames[i]), "time_s": float(t[i]), "factor": float(np.asarray(step_col, float)[idx][i])}
        for i in step_rows]
    for st in out["brightness"]["steps"]:
        notes.append(f"{where}: brightness ×{st['factor']:.3g} at {st['time_s']:.1f} s (frame {st['frame']}): "
                     "detector gain or laser power changed? Baseline, bleach slope and photon transfer start again "
                     "after it")
    worst = "unknown"
    for group, metrics in GROUPS.items():
        g = out[group]
        limited = [m for m in metrics if m in profile.limits
                   and np.isfinite(np.asarray(traces[m], dtype=float)[idx]).any()]
        spans = {s: state_periods(events, key, metrics, s, last_frame, last_time) for s in ("warning", "alarm")}
        for s in ("warning", "alarm"):
            g[f"{s}_s"] = (float(sum(e - b for _, _, b, e in spans[s] if math.isfinite(e - b))) if tf.size
                           else math.nan)  # no times (frame rate unknown): no durations
        if spans["alarm"]:
            g["verdict"] = "fail"
        elif spans["warning"] or (group == "brightness" and step_rows.size):
            g["verdict"] = "warning"  # a step of the level is never "pass": the brightness is not one session's
        else:
            g["verdict"] = "pass" if limited else "unknown"
        # frames excluded for a value beyond the alarm level (too briefly for a declared alarm) cannot sit under
        # a "pass": the group is at least a warning, and the notes say why
        if g["verdict"] in ("pass", "unknown"):
            brief = sum(int(_beyond_alarm(traces, idx, profile.limits[m]).sum()) for m in metrics
                        if m in _EXCLUDE_BY_VALUE and m in profile.limits)
            if brief:
                g["verdict"] = "warning"
                notes.append(f"channel {key[0]}, plane {key[1]}: {group} is a warning, not a pass: {brief} "
                             f"frame(s) beyond the alarm level, too briefly for an alarm, are listed in exclude.csv")
        if _VERDICT_RANK[g["verdict"]] > _VERDICT_RANK[worst]:
            worst = g["verdict"]
    out["verdict"] = worst
    return out


def _timed(traces: Mapping[str, np.ndarray], facts: Mapping | None) -> tuple[Mapping[str, np.ndarray], dict]:
    """The traces with ``time_s`` filled in as frame ÷ frame rate where a row has none but the rate became known
    later (estimated while watching), and the ``frame_rate`` entry of the summary: ``hz``, ``origin``,
    ``message`` (:data:`~qcmon.frames.RATE_UNKNOWN` when neither a rate nor timestamps are known)."""
    fact = (facts or {}).get("frame_rate_hz") or {}
    hz = fact.get("value") if isinstance(fact, Mapping) else None
    hz = float(hz) if isinstance(hz, (int, float)) and math.isfinite(hz) and hz > 0 else math.nan
    t = np.asarray(traces["time_s"], dtype=float)
    entry = {"hz": hz, "origin": fact.get("origin", "") if math.isfinite(hz) else "", "message": ""}
    if math.isfinite(hz) and t.size and not np.isfinite(t).all():
        t = np.where(np.isfinite(t), t, np.asarray(traces["frame"], dtype=float) / hz)
        traces = {**traces, "time_s": t}
    if not math.isfinite(hz):
        if t.size and np.isfinite(t).all():
            entry["origin"] = "no rate; times are the frames' timestamps"
        else:
            entry["message"] = RATE_UNKNOWN
    return traces, entry


def _worst_final(values: list[float], *, prefer: str) -> float:
    v = [x for x in values if math.isfinite(x)]
    if not v:
        return math.nan
    if prefer == "min":
        return min(v)
    return max(v, key=abs)


def _merge_extra(summary: dict, extra: Mapping[str, object]) -> None:
    for key, value in extra.items():
        if "." in key:
            group, sub = key.split(".", 1)
            target = summary.setdefault(group, {})
            if isinstance(target, dict):
                target[sub] = value
                continue
        if isinstance(value, Mapping) and isinstance(summary.get(key), dict):
            summary[key].update(value)
        elif key in summary:  # never replace qcmon's own keys (e.g. "streams")
            summary.setdefault("engine", {})[key] = value
        else:
            summary[key] = value


def summarize_traces(traces: Mapping[str, np.ndarray], events: Sequence[Event], *, facts: Mapping | None = None,
                     profile: Profile, extra: Mapping[str, object] | None = None) -> dict:
    """Build the content of ``summary.json`` (keys and units: see the module docstring).

    Parameters
    ----------
    traces : dict of str to ndarray
        Columns of ``traces.csv`` (:func:`qcmon.record.journal.read_traces` or :func:`qcmon.record.journal.rows_to_traces`).
    events : sequence of Event
        The session's events in order.
    facts : mapping, optional
        ``AcquisitionFacts.as_dict()``.
    profile : Profile
        The threshold profile the session ran with.
    extra : mapping, optional
        Results of the engine (photon transfer gain and dark level, ...), merged in.

    Returns
    -------
    dict
        Plain JSON-able content (NaN stands for null; :func:`qcmon.record.outputs.write_outputs` writes it as null).
    """
    if not isinstance(profile, Profile):
        raise ValueError(f"profile must be a Profile, got {type(profile).__name__}")
    events = list(events)
    notes: list[str] = []
    traces, frame_rate = _timed(traces, facts)
    if not math.isfinite(frame_rate["hz"]) and not np.isfinite(np.asarray(traces["time_s"], float)).any():
        notes.append(f"{RATE_UNKNOWN}: times, durations (duration_s, warning_s, alarm_s) and per-minute values "
                     "(bleaching) are blank; frames count time (column frame)")
    streams = stream_rows(traces)
    per = [_stream_summary(traces, idx, events, key, profile, notes) for key, idx in streams.items()]
    t = _finite(traces["time_s"])
    summary: dict[str, object] = {
        "schema": SCHEMA,
        "qcmon_version": qcmon.__version__,
        "frames": int(len(traces["frame"])),
        "duration_s": float(t.max() - t.min()) if t.size else math.nan,
        "profile": {"name": profile.name, "path": str(profile.path), "description": profile.description,
                    "caution": profile.caution},
        "facts": dict(facts or {}),
        "frame_rate": frame_rate,
        "verdict": "unknown",
        "events": {
            "warnings": sum(1 for e in events if e.kind == "start" and e.state == "warning"),
            "alarms": sum(1 for e in events if e.kind == "start" and e.state == "alarm"),
            "notes": sum(1 for e in events if e.kind == "note"),
            "problems": sum(1 for e in events if e.kind == "problem"),
        },
    }
    for group, stats in _STATS.items():
        g: dict[str, object] = {}
        for name, (col, how) in stats.items():
            if how == "final":
                g[name] = _worst_final([s[group][name] for s in per],
                                       prefer="min" if group in ("brightness", "focus") else "abs")
            else:
                g[name] = _stat(traces[col], how)
        summary[group] = g
    b = summary["bleach"]
    slopes = [s["bleach"]["slope_pct_per_min"] for s in per]
    b["slope_pct_per_min"] = _worst_final(slopes, prefer="min")
    taus = [s["bleach"]["tau_min"] for s in per if math.isfinite(s["bleach"]["tau_min"])]
    b["tau_min"] = min(taus) if taus else math.nan
    b["note"] = "; ".join(s["bleach"]["note"] for s in per if s["bleach"].get("note"))
    summary["brightness"]["steps"] = [dict(st, channel=s["channel"], plane=s["plane"])
                                      for s in per for st in s["brightness"].get("steps", [])]
    summary["photon_transfer"] = {"gain": math.nan, "dark_level": math.nan}
    worst = "unknown"
    for group in GROUPS:
        g = summary[group]
        verdicts = [s[group]["verdict"] for s in per]
        g["verdict"] = max(verdicts, key=_VERDICT_RANK.__getitem__) if verdicts else "unknown"
        for s in ("warning_s", "alarm_s"):
            g[s] = float(sum(p[group][s] for p in per))  # NaN when a stream has no times
        if _VERDICT_RANK[g["verdict"]] > _VERDICT_RANK[worst]:
            worst = g["verdict"]
    summary["verdict"] = worst
    summary["streams"] = per
    ranges = exclude_ranges(traces, events, profile)
    summary["exclude"] = [list(r) for r in ranges]
    summary["usable"] = usable_frames(traces, ranges)
    summary["notes"] = notes
    if extra:
        _merge_extra(summary, extra)
    return summary


def exclude_ranges(traces: Mapping[str, np.ndarray], events: Sequence[Event], profile: Profile
                   ) -> list[ExcludeRange]:
    """Frame ranges to leave out of analysis.

    A frame is excluded while any metric is in a declared alarm (from its start event's frame to its end event's
    frame, inclusive; an alarm the record never ended lasts to the stream's last frame), and wherever
    ``displacement_um``, ``displacement_px`` or ``z_um`` is beyond its alarm level (even before the persistence
    time declared the alarm).

    Returns
    -------
    list of ExcludeRange
        ``(channel, plane, first_frame, last_frame, reason)`` sorted by stream and frame; ``reason`` lists the
        causes separated by ``"; "``, e.g. ``"alarm: saturated_frac; displacement_um beyond alarm level"``.
    """
    events = list(events)
    out: list[ExcludeRange] = []
    for key, idx in stream_rows(traces).items():
        frames = np.asarray(traces["frame"], dtype=np.int64)[idx]
        if frames.size == 0:
            continue
        masks: dict[str, np.ndarray] = {}
        for metric in profile.limits:
            for first, last, _, _ in state_periods(events, key, (metric,), "alarm", int(frames[-1]), math.nan):
                m = masks.setdefault(f"alarm: {metric}", np.zeros(frames.size, bool))
                m |= (frames >= first) & (frames <= last)
        for metric in _EXCLUDE_BY_VALUE:
            lim = profile.limits.get(metric)
            if lim is None:
                continue
            beyond = _beyond_alarm(traces, idx, lim)
            if beyond.any():
                masks[f"{metric} beyond alarm level"] = beyond
        if not masks:
            continue
        reasons = sorted(masks)
        stack = np.vstack([masks[r] for r in reasons])
        anym = stack.any(axis=0)
        edges = np.flatnonzero(np.diff(np.concatenate(([0], anym.view(np.int8), [0]))))
        for lo, hi in zip(edges[::2], edges[1::2]):
            why = "; ".join(r for r, m in zip(reasons, stack) if m[lo:hi].any())
            out.append(ExcludeRange(key[0], key[1], int(frames[lo]), int(frames[hi - 1]), why))
    return out


def _beyond_alarm(traces, idx, lim) -> np.ndarray:
    """Rows ``idx`` whose value of ``lim.metric`` is beyond its alarm level (NaN is not)."""
    v = np.asarray(traces[lim.metric], dtype=float)[idx]
    with np.errstate(invalid="ignore"):
        a = np.abs(v) if lim.direction == "abs_above" else v
        return a < lim.alarm if lim.direction == "below" else a > lim.alarm


def usable_frames(traces: Mapping[str, np.ndarray], ranges: Iterable[ExcludeRange]) -> dict:
    """Rows of ``traces`` outside every exclusion range: ``{"frames": int, "fraction": float}`` (fraction NaN
    without rows). A row is excluded when its (channel, plane) matches a range and its frame lies within it."""
    ch = np.asarray(traces["channel"], dtype=np.int64)
    pl = np.asarray(traces["plane"], dtype=np.int64)
    fr = np.asarray(traces["frame"], dtype=np.int64)
    out = np.zeros(fr.size, bool)
    for r in ranges:
        out |= (ch == r[0]) & (pl == r[1]) & (fr >= r[2]) & (fr <= r[3])
    n = int(fr.size)
    usable = n - int(out.sum())
    return {"frames": usable, "fraction": usable / n if n else math.nan}


def readable_number(v: float, *, max_decimals: int = 4) -> str:
    """A finite value for reading: about three significant digits, thousands separated, never in exponent
    notation (``0.00123``, ``4.57``, ``65,535``); at most ``max_decimals`` decimals."""
    if v == 0:
        return "0"
    decimals = min(max_decimals, max(0, 2 - math.floor(math.log10(abs(v)))))
    return f"{v:,.{decimals}f}"


def session_clock(seconds: float) -> str:
    """Session time as a reader writes it: ``"0:42.5"`` (min:s), ``"1:02:03"`` from an hour; ``"—"`` when
    unknown."""
    try:
        t = float(seconds)
    except (TypeError, ValueError):
        return "—"
    if not math.isfinite(t):
        return "—"
    sign, t = ("−" if t < 0 else ""), abs(t)
    if t >= 3600:
        h, rest = divmod(int(round(t)), 3600)
        return f"{sign}{h}:{rest // 60:02d}:{rest % 60:02d}"
    m, sec = divmod(round(t, 1), 60)
    return f"{sign}{int(m)}:{sec:04.1f}"


def verdict_line(summary: Mapping) -> str:
    """One line for the terminal and the page's top: the verdict, the share of usable frames, the metrics that
    warned or alarmed with their time in that state, ranges to exclude and input problems.

    e.g. ``"WARNING · 1,793 of 1,800 frames usable (99.6 %) · warning: saturated pixels 17.5 s · 7 ranges to
    exclude (exclude.csv)"``."""
    return " · ".join(verdict_parts(summary))


def verdict_parts(summary: Mapping) -> list[str]:
    """The pieces of :func:`verdict_line`: the verdict word, the usable frames, then the reasons."""
    verdict = summary.get("verdict", "unknown")
    parts = [VERDICT_WORDS.get(verdict, VERDICT_WORDS["unknown"])]
    frames = int(summary.get("frames") or 0)
    usable = summary.get("usable") or {}
    if not frames:
        parts.append("no frames measured")
    elif isinstance(usable.get("frames"), int):
        frac = usable.get("fraction")
        pct = f" ({100 * frac:.1f} %)" if isinstance(frac, float) and math.isfinite(frac) else ""
        parts.append(f"{usable['frames']:,} of {frames:,} frames usable{pct}")
    for state, key in (("alarm", "alarm_s"), ("warning", "warning_s")):
        hit = []
        for group, label in GROUP_LABELS.items():
            g = summary.get(group)
            if isinstance(g, Mapping) and g.get("verdict") == ("fail" if state == "alarm" else "warning"):
                t = g.get(key)
                hit.append(f"{label} {t:.1f} s" if isinstance(t, (int, float)) and t > 0 else label)
        if hit:
            parts.append(f"{state}: " + ", ".join(hit))
    n_ex = len(summary.get("exclude") or ())
    if n_ex:
        parts.append(f"{n_ex} range{'s' if n_ex != 1 else ''} to exclude (exclude.csv)")
    problems = summary.get("problems") or ()
    if problems:
        parts.append(f"{len(problems)} input problem{'s' if len(problems) != 1 else ''}")
    return parts


def exclude_csv(ranges: Iterable[ExcludeRange]) -> str:
    """Text of ``exclude.csv``: columns channel, plane, first_frame, last_frame, reason."""
    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(("channel", "plane", "first_frame", "last_frame", "reason"))
    w.writerows(ranges)
    return buf.getvalue()


def jsonable(obj):
    """``obj`` with numpy scalars as Python numbers, non-finite floats as None, paths as text, keys as text."""
    if isinstance(obj, Mapping):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, (np.floating, float)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, Path):
        return str(obj)
    return obj


def summary_json(summary: Mapping) -> str:
    """``summary`` as JSON text (NaN written as null)."""
    return json.dumps(jsonable(summary), indent=2, ensure_ascii=False, allow_nan=False) + "\n"
