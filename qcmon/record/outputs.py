"""The closing set of a record: ``summary.json``, ``exclude.csv`` and ``report.html`` written as one from the
rows and events (:func:`write_outputs`), also afterwards from the journal alone (:func:`rebuild`). It stands above
the summary and the report, which know nothing of each other's writing."""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np

from qcmon.events import Event
from qcmon.record.journal import EXCLUDE_FILE, REPORT_FILE, SUMMARY_FILE, read_events, read_info, read_traces, write_atomic_set
from qcmon.record.report import report_html
from qcmon.record.summary import exclude_csv, exclude_ranges, summarize_traces, summary_json
from qcmon.thresholds import Profile, load_profile

__all__ = ["rebuild", "write_outputs"]


def write_outputs(out_dir: str | Path, traces: Mapping[str, np.ndarray], events: Sequence[Event], *,
                  facts: Mapping | None = None, profile: Profile, extra: Mapping | None = None) -> dict:
    """Write ``summary.json``, ``exclude.csv`` and ``report.html`` atomically into ``out_dir``.

    Returns
    -------
    dict
        The summary.
    """
    out_dir = Path(out_dir)
    summary = summarize_traces(traces, events, facts=facts, profile=profile, extra=extra)
    write_atomic_set(out_dir, {  # one set: all new, or all as they were
        SUMMARY_FILE: summary_json(summary),
        EXCLUDE_FILE: exclude_csv(exclude_ranges(traces, events, profile)),
        REPORT_FILE: report_html(summary, traces, events, profile, facts or {})})
    return summary


def rebuild(out_dir: str | Path, profile: Profile | str | None = None) -> dict:
    """Rebuild ``summary.json``, ``exclude.csv`` and ``report.html`` from the appended record alone.

    Parameters
    ----------
    out_dir : path-like
        Folder with ``traces.csv`` and ``events.jsonl`` (and ``session.json`` if the session wrote one: facts,
        profile name, engine results; without it, those are taken from an earlier ``summary.json`` if any).
    profile : Profile or str, optional
        Threshold profile (object, name or path); default: the one named in ``session.json``, else
        ``"default"``. Verdicts come from the recorded events, which the session's own profile produced.

    Returns
    -------
    dict
        The summary written.
    """
    out_dir = Path(out_dir)
    info = read_info(out_dir)
    previous = out_dir / SUMMARY_FILE
    if not info and previous.exists():  # a session without session.json: take facts and profile from before
        try:
            old = json.loads(previous.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            old = {}
        info = {"facts": old.get("facts", {}), "profile": (old.get("profile") or {}).get("path") or "default",
                "extra": {f"photon_transfer.{k}": (math.nan if v is None else v)
                          for k, v in (old.get("photon_transfer") or {}).items()}}
    if previous.exists():  # what only the run knew: the session's path and the input problems it met
        try:
            old = json.loads(previous.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            old = {}
        kept = {k: old[k] for k in ("session", "problems", "dataset") if isinstance(old, dict) and k in old}
        if kept:
            info = {**info, "extra": {**(info.get("extra") or {}), **kept}}
    if profile is None:
        profile = info.get("profile", "default")
    if not isinstance(profile, Profile):
        profile = load_profile(profile)
    traces = read_traces(out_dir)
    events = read_events(out_dir)
    return write_outputs(out_dir, traces, events, facts=info.get("facts", {}), profile=profile,
                         extra=info.get("extra"))
