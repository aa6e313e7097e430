"""Running an audit: discovery, reuse, parallel measurement (local processes or dask), outputs, exit status."""

from __future__ import annotations

import concurrent.futures as cf
import math
import multiprocessing
import sys
import time
import warnings
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import TextIO

import numpy as np

from qcmon.arguments import EXIT_ERROR, EXIT_FLAGGED, EXIT_OK
from qcmon.audit._chronic import SAME_FIELD_CORR, chronic_table, field_keys, match_fields, shared_path_names
from qcmon.audit._discover import SessionEntry, discover_sessions, session_date
from qcmon.audit._measure import MONITOR_KEYS, measure_session, profile_fingerprint, reusable
from qcmon.audit._write import AUDIT_COLUMNS, CHRONIC_COLUMNS, session_row, sparkline, write_csv, write_html

EXIT_USAGE = EXIT_ERROR  # usage or configuration error

_TRACE_COLUMNS = ("time_s", "displacement_um", "displacement_px", "brightness_pct", "baseline_f", "photons_per_px")


@dataclass
class AuditOptions:
    """Options of :func:`run_audit` (``qcmon audit --help`` gives the command-line names).

    Attributes
    ----------
    roots : list of Path
        Archive folders.
    out_dir : Path
        Where ``audit.csv``, ``chronic.csv``, ``audit.html`` and ``sessions/<path>.qcmon/`` go.
    profile : str
        Threshold profile name or TOML file.
    workers : int
        Local processes: sessions measured in parallel, or, with fewer sessions to measure than processes,
        one after another with each long session split into chunks of time points (:mod:`qcmon.monitor.split`).
    cluster : str or None
        Address of a dask.distributed scheduler; the sessions are measured there instead.
    only_flagged : bool
        List only sessions that failed, warned or could not be read in ``audit.csv`` / ``audit.html``.
    group_by : str or None
        Regular expression on the relative path naming the field of view (named group ``field``, else group 1,
        else the match); None: fields are found by matching reference images.
    same_field_corr : float
        Correlation of registered reference images from which two sessions show the same field.
    shift_limit_um : float
        Field shift between consecutive sessions that flags the field (µm).
    fade_limit_pct_per_week : float
        A brightness trend below minus this (%/week) flags the field as dimming.
    force : bool
        Measure every session again even when its record is current.
    use_zstack : bool
        Use a ``zstack*.tif`` found beside a session as its reference stack.
    monitor : dict
        MonitorOptions keyword arguments passed to every session (pixel size, frame rate, ...).
    """

    roots: list[Path]
    out_dir: Path
    profile: str = "default"
    workers: int = 1
    cluster: str | None = None
    only_flagged: bool = False
    group_by: str | None = None
    same_field_corr: float = SAME_FIELD_CORR
    shift_limit_um: float = 10.0
    fade_limit_pct_per_week: float = 10.0
    force: bool = False
    use_zstack: bool = True
    monitor: dict = field(default_factory=dict)


class Progress:
    """Plain-text progress on a stream: sessions done/total, frames per second, time left.

    Rewritten in place (carriage return) on a terminal, a line per session otherwise.
    """

    def __init__(self, total: int, total_bytes: int, *, stream: TextIO | None = None):
        self.stream = sys.stderr if stream is None else stream
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.total, self.total_bytes = total, max(int(total_bytes), 0)
        self.done = self.frames = self.done_bytes = self.measured_bytes = 0
        self.t0 = time.monotonic()
        self._width = 0

    def update(self, outcome: dict) -> None:
        self.done += 1
        b = int(outcome.get("bytes") or 0)
        self.done_bytes += b
        if not outcome.get("reused"):
            self.frames += int(outcome.get("frames") or 0)
            self.measured_bytes += b
        el = time.monotonic() - self.t0
        fps = self.frames / el if el > 0 else 0.0
        rate = self.measured_bytes / el if el > 0 else 0.0
        left = (self.total_bytes - self.done_bytes) / rate if rate > 0 else math.nan
        left_txt = "--:--" if not math.isfinite(left) else f"{int(left // 60):d}:{int(left % 60):02d}"
        state = {"measured": "ok", "reused": "reused", "error": "ERROR"}.get(outcome.get("status"), "?")
        line = (f"audit {self.done}/{self.total} sessions, {fps:.0f} frames/s, {left_txt} left"
                f"  [{state}] {outcome.get('rel', '')}")
        if self.tty:
            pad = max(self._width - len(line), 0)
            self.stream.write("\r" + line + " " * pad)
            self._width = len(line)
            if self.done == self.total:
                self.stream.write("\n")
        else:
            self.stream.write(line + "\n")
        self.stream.flush()


def _tasks(entries: list[SessionEntry], opts: AuditOptions, fingerprint: dict) -> list[dict]:
    monitor = {k: opts.monitor.get(k) for k in MONITOR_KEYS}
    tasks = []
    for e in entries:
        tasks.append({
            "rel": e.rel, "path": str(e.path), "frame_files": [str(p) for p in e.frame_files],
            "extra_files": [str(p) for p in e.extra_files],
            "zstack": str(e.zstack) if (e.zstack and opts.use_zstack) else None, "dataset": e.dataset,
            "record": str(Path(opts.out_dir) / "sessions" / (e.rel + ".qcmon")),
            "profile": opts.profile, "profile_fingerprint": fingerprint, "monitor": monitor,
        })
    return tasks


def _measure_all(todo: list[dict], opts: AuditOptions, progress: Progress | None):
    """Yield outcomes as sessions finish (order of completion)."""
    if not todo:
        return
    if opts.cluster:
        from distributed import Client, as_completed

        with Client(opts.cluster) as client:
            futures = client.map(measure_session, todo, pure=False, key=[f"qcmon-audit-{i}-{t['rel']}"
                                                                          for i, t in enumerate(todo)])
            where = {f.key: t for f, t in zip(futures, todo)}
            for fut in as_completed(futures):
                try:
                    yield fut.result()
                except Exception as err:  # a worker lost: that session is a row with the error
                    t = where[fut.key]
                    yield {"rel": t["rel"], "status": "error", "error": f"cluster: {err}", "record": t["record"],
                           "summary": None, "frames": 0, "bytes": 0}
        return
    if opts.workers <= 1 or len(todo) < opts.workers:
        # fewer sessions than processes: one session after another, each long one split into chunks of time
        # points over the processes (qcmon.monitor.split; short sessions stay in one process)
        # the report's plots: drawn by two low-priority processes kept for the whole audit, which load matplotlib
        # while the first session is measured and draw each session's plots side by side at its end (the cores
        # are otherwise idle then); in this process if they cannot start
        plots = _plot_workers() if todo else None
        try:
            for t in todo:
                yield measure_session({**t, "split_workers": opts.workers}, plots)
        finally:
            if plots is not None:
                plots.close()
        return
    ctx = multiprocessing.get_context("spawn")
    with cf.ProcessPoolExecutor(max_workers=min(opts.workers, len(todo)), mp_context=ctx) as pool:
        futs = {pool.submit(measure_session, t): t for t in todo}
        for fut in cf.as_completed(futs):
            t = futs[fut]
            try:
                yield fut.result()
            except Exception as err:  # the worker process died (e.g. out of memory)
                yield {"rel": t["rel"], "status": "error", "error": f"worker failed: {err}", "record": t["record"],
                       "summary": None, "frames": 0, "bytes": 0}


def _plot_workers():
    from qcmon.record.report import PlotWorkers

    try:
        return PlotWorkers(2)
    except Exception:  # noqa: BLE001 - no processes to spare: each report draws its plots in this process
        return None


def _read_traces(record: Path):
    from qcmon.record.journal import read_traces

    if not (record / "traces.csv").is_file():
        return None
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return read_traces(record, columns=_TRACE_COLUMNS)
    except (OSError, ValueError, KeyError):
        return None


def _read_reference(record: Path) -> np.ndarray | None:
    import tifffile

    p = record / "reference.tif"
    if not p.is_file():
        return None
    try:
        return np.asarray(tifffile.imread(p), dtype=np.float64)
    except (OSError, ValueError):
        return None


def is_flagged(row: dict) -> bool:
    """A session that failed its profile, or could not be measured in full (an error, or frames not read)."""
    return row.get("status") == "error" or row.get("verdict") in ("fail", "error") or bool(row.get("error"))


def run_audit(opts: AuditOptions, *, progress_stream: TextIO | None = None, progress: bool = True) -> dict:
    """Audit every session under ``opts.roots``.

    Returns
    -------
    dict
        ``rows`` (audit rows of every session, sorted by path), ``chronic`` (rows of ``chronic.csv``),
        ``audit_csv``, ``chronic_csv``, ``audit_html`` (paths), ``measured``, ``reused`` and ``errors`` (counts),
        ``frames`` (frames measured in this run), ``seconds`` (wall time), ``flagged`` (sessions that failed or
        could not be read, plus fields flagged by the chronic analysis) and ``exit_status``.

    Raises
    ------
    ValueError
        Bad options (a root that is not a folder, bad workers, a bad regular expression); ProfileError for an
        unknown profile.
    """
    t0 = time.perf_counter()
    if not isinstance(opts.workers, int) or opts.workers < 1:
        raise ValueError(f"workers must be a positive integer, got {opts.workers!r}")
    if not 0 < opts.same_field_corr <= 1:
        raise ValueError(f"same_field_corr must be in (0, 1], got {opts.same_field_corr!r}")
    for name in ("shift_limit_um", "fade_limit_pct_per_week"):
        if not getattr(opts, name) > 0:
            raise ValueError(f"{name} must be positive, got {getattr(opts, name)!r}")
    if opts.group_by is not None:
        field_keys([], opts.group_by)  # validates the pattern before any work
    out_dir = Path(opts.out_dir)
    fingerprint = profile_fingerprint(opts.profile)
    entries = discover_sessions(opts.roots, skip=(out_dir,))
    out_dir.mkdir(parents=True, exist_ok=True)
    tasks = _tasks(entries, opts, fingerprint)
    outcomes: dict[str, dict] = {}
    todo = []
    for t in tasks:
        got = None if opts.force else reusable(t)
        if got is not None:
            got.setdefault("rel", t["rel"])
            got["record"] = t["record"]
            outcomes[t["rel"]] = got
        else:
            todo.append(t)
    total_bytes = sum(sum(Path(f).stat().st_size for f in t["frame_files"] if Path(f).exists()) for t in tasks)
    bar = Progress(len(tasks), total_bytes, stream=progress_stream) if progress and tasks else None
    if bar is not None:
        for o in outcomes.values():
            bar.update(o)
    for o in _measure_all(todo, opts, bar):
        outcomes[o["rel"]] = o
        if bar is not None:
            bar.update(o)
    by_rel = {e.rel: e for e in entries}
    rows, sparks, refs = [], {}, {}
    for t in tasks:
        o = outcomes[t["rel"]]
        e = by_rel[t["rel"]]
        date, origin = session_date(e.rel, e.frame_files)
        record = Path(t["record"])
        traces = _read_traces(record) if o.get("status") != "error" else None
        row = session_row(o, out_dir=out_dir, date=date, date_origin=origin, traces=traces)
        row["_date"] = date
        rows.append(row)
        if traces is not None:
            sparks[row["path"]] = sparkline(traces)
            ref = _read_reference(record)
            if ref is not None:
                refs[row["path"]] = ref
    ordered = sorted((r for r in rows if r["path"] in refs),
                     key=lambda r: (r["_date"] is None, r["_date"] or datetime.min, r["path"]))
    if opts.group_by is not None:
        fields = {k: v for k, v in field_keys([r["path"] for r in ordered], opts.group_by).items() if v is not None}
    else:
        # fields found by their images are named by the path their sessions share
        fields = shared_path_names(match_fields([r["path"] for r in ordered], refs, min_corr=opts.same_field_corr))
    chronic_in = [{"path": r["path"], "date": r["_date"], "date_origin": r["date_origin"],
                   "pixel_size_um": r["pixel_size_um"], **{c: r.get(c) for c in
                   ("brightness_above_dark_dn", "snr_median", "photons_per_px_median", "motion_rms_um")}}
                  for r in ordered]
    chronic = chronic_table(chronic_in, fields, refs, shift_limit_um=opts.shift_limit_um,
                            fade_limit_pct_per_week=opts.fade_limit_pct_per_week)
    for r in rows:
        r.pop("_date", None)
    listed = [r for r in rows if is_flagged(r) or r.get("verdict") == "warning"] if opts.only_flagged else rows
    audit_csv = write_csv(out_dir / "audit.csv", listed, AUDIT_COLUMNS)
    chronic_csv = write_csv(out_dir / "chronic.csv", chronic, CHRONIC_COLUMNS)
    n_err = sum(1 for r in rows if r["status"] == "error")
    n_fail = sum(1 for r in rows if r["verdict"] == "fail")
    flagged_fields = sorted({c["field"] for c in chronic if c["field_flags"]})
    header = (f"{len(rows)} sessions under {', '.join(str(r) for r in opts.roots)}; profile {fingerprint['name']}; "
              f"{n_fail} failed, {n_err} could not be read, "
              f"{sum(1 for r in rows if r['status'] != 'error' and r.get('error'))} with frames that could not be "
              "read; fields flagged over days: "
              f"{', '.join(flagged_fields) if flagged_fields else 'none'}. qcmon advises only: decisions about the "
              "animal and the laser follow local rules and licensed practice.")
    audit_html = write_html(out_dir / "audit.html", listed, sparks, chronic, title="qcmon audit", header=header)
    flagged = [r["path"] for r in rows if is_flagged(r)] + [f"field {f}" for f in flagged_fields]
    return {
        "rows": rows, "chronic": chronic, "audit_csv": audit_csv, "chronic_csv": chronic_csv,
        "audit_html": audit_html, "measured": sum(1 for o in outcomes.values() if o.get("status") == "measured"),
        "reused": sum(1 for o in outcomes.values() if o.get("reused")), "errors": n_err,
        "frames": sum(int(o.get("frames") or 0) for o in outcomes.values() if not o.get("reused")),
        "seconds": time.perf_counter() - t0, "flagged": flagged,
        "exit_status": EXIT_FLAGGED if flagged else EXIT_OK,
    }
