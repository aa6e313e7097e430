"""One path from files to record: the watch of a live session and the offline summary of a finished one.

:class:`Monitor` reads frames through :class:`~qcmon.sources.session.SessionSource`, measures them with the
:class:`~qcmon.engine.Engine`, turns rows into threshold events, appends rows and events to the session record,
tells its listeners (plain console, dashboard), and writes ``summary.json``, ``report.html`` and ``exclude.csv``
when it ends. ``qcmon summarize`` is the same monitor run once over everything on disk (``follow=False``), so the
live and offline numbers are the same by construction (and a test holds them against each other).
"""

from __future__ import annotations

import json
import math
import os
import queue
import re
import shlex
import shutil
import signal
import subprocess
import threading
import time
from contextlib import contextmanager
from collections.abc import Generator
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from qcmon.monitor._memory import keep_freed_memory
from qcmon.advice import idle_advice
from qcmon.engine import Engine, EngineSettings
from qcmon.errors import FrameError, QcmonError, display_path
from qcmon.events import Event
from qcmon.frames import AcquisitionFacts, Frame
from qcmon.record.journal import (EXCLUDE_FILE, REFERENCE_FILE, REPORT_FILE, SUMMARY_FILE, SessionRecord,
                          write_atomic_set)
from qcmon.record.report import PanelDrawing, PlotWorkers, report_html
from qcmon.sources.arrays import container_kind
from qcmon.sources.raw import RAW_SUFFIXES
from qcmon.sources.session import TIFF_SUFFIXES, SessionSource
from qcmon.monitor.split import SplitRun
from qcmon.status import Listener, Status
from qcmon.record.summary import exclude_ranges, jsonable, summarize_traces, verdict_line
from qcmon.thresholds import Profile, ThresholdTracker, load_profile


def step_event(row: dict, caution: str = "") -> Event:
    """The event of a sudden, sustained step of the above-dark brightness found at ``row``, with advice (and the
    profile's ``caution``, as the advice touches gain and excitation power)."""
    t, factor = float(row["time_s"]), float(row["level_step"])
    where = f" (channel {row['channel']}, plane {row['plane']})"
    minutes, seconds = divmod(max(t, 0.0), 60.0)
    return Event(kind="step", metric="level_step", value=factor, frame=int(row["frame"]), time_s=t,
                 started_frame=int(row["frame"]), started_time_s=t, channel=int(row["channel"]),
                 plane=int(row["plane"]),
                 message=(f"brightness ×{factor:.3g} at {int(minutes)}:{seconds:04.1f}: detector gain or laser power "
                          f"changed? Baseline, bleach slope and photon transfer start again from here{where}"),
                 advice=(f"brightness ×{factor:.3g} within seconds — if the detector gain or the excitation power was "
                         "changed on purpose, add a note (n) saying so; if not, check the light source and the "
                         "detector: brightness, bleaching and photon numbers before and after this point are not "
                         "comparable. (see caution: qcmon never changes the microscope; follow your local rules)"),
                 caution=caution)


@dataclass(slots=True)
class MonitorOptions:
    """What to watch and how. See ``qcmon watch --help`` for the user-facing names."""

    path: Path
    out_dir: Path | None = None
    profile: str = "default"
    follow: bool = True
    poll_interval_s: float | None = None
    until_idle_s: float | None = None
    on_alarm: str | None = None
    frame_rate_hz: float | None = None
    pixel_size_um: float | None = None
    bit_depth: int | None = None
    dark_level: float | None = None
    zstack: Path | None = None
    z_step_um: float | None = None
    motion_channel: int | None = None
    channels: int | None = None
    planes: int | None = None
    raw_dtype: str | None = None
    raw_shape: tuple[int, int] | None = None
    dataset: str | None = None  # the image series of an HDF5, NWB or Zarr container
    resume: bool = True
    status_every_s: float = 5.0
    forecast_loss_pct: float = 20.0
    workers: int = 1
    plot_processes: int = 0  # >0: draw the report's plots in that many processes started at once (PlotWorkers)
    engine_overrides: dict = field(default_factory=dict)


def default_out_dir(path: Path, dataset: str | None = None) -> Path:
    """Where the record goes unless ``--out`` says otherwise: beside the session, never inside it.

    ``/data/mouse7/session3`` → ``/data/mouse7/session3.qcmon``; a single file ``run.tif`` → ``run.qcmon``; a Zarr
    store ``run.zarr`` → ``run.qcmon``; a series chosen in a container, ``run.nwb`` with ``--dataset TwoPhotonSeries``
    → ``run.TwoPhotonSeries.qcmon``.
    """
    path = Path(path).resolve()
    stem = path.name if path.is_dir() and not path.name.lower().endswith(".zarr") else path.stem
    if stem.lower().endswith(".ome"):
        stem = stem[:-4]
    if dataset:
        stem += "." + re.sub(r"[^\w.-]+", "_", dataset.strip("/"))
    return path.parent / f"{stem}.qcmon"


#: TIFF compressions (tifffile's names) that always lose information, and those that may (the tag does not say).
LOSSY_COMPRESSIONS = frozenset({"JPEG", "OJPEG", "JPEG_99", "ALT_JPEG", "JPEG_LOSSY", "JPEG_2000_LOSSY", "WEBP",
                                "WEBP_DEPRECATED"})
MAYBE_LOSSY_COMPRESSIONS = frozenset({"JPEG2000", "APERIO_JP2000_YCBC", "APERIO_JP2000_RGB", "JPEGXR", "JPEGXR_NDPI",
                                      "JPEGXL", "JPEGXL_DNG", "LERC"})
#: Columns a lossy codec's noise invalidates (they measure the pixel noise): left blank for such frames.
NOISE_COLUMNS = ("noise_sigma", "snr", "photons_per_px", "shot_snr")


def _check_watchable(path: Path) -> None:
    """QcmonError unless frames can be read from ``path`` while they are written: TIFF and raw streams can, an HDF5
    (or NWB) file only when written in SWMR mode (superblock version 3), a Zarr store not (a chunk not yet written
    reads as its fill value, which would be measured as a frame)."""
    kind = container_kind(str(path))
    if kind == "zarr":
        raise QcmonError(f"{path}: a Zarr store cannot be watched while it is written (a chunk not written yet "
                         "reads as zeros); measure it with qcmon summarize once the session is finished")
    if kind in ("hdf5", "nwb"):
        from qcmon.sources.arrays import hdf5_superblock_version

        version = hdf5_superblock_version(str(path))
        if version is not None and version < 3:
            raise QcmonError(f"{path}: this HDF5 file is not written in SWMR mode (superblock version {version}, "
                             "SWMR needs 3), so it cannot be read safely while it is written; measure it with "
                             "qcmon summarize once the session is finished")


class Monitor:
    """Measure a session, live or after the fact, and keep its record.

    Thread-safe controls: :meth:`stop`, :meth:`new_reference`, :meth:`add_note`. :meth:`run` blocks.
    ``plots``: report plot processes to use (and leave open) instead of starting ``options.plot_processes`` of its
    own, for a caller that measures one session after another (the audit).
    """

    def __init__(self, options: MonitorOptions, *, plots: PlotWorkers | None = None):
        self.options = options
        self._shared_plots = plots  # the caller's plot processes, kept open for its next runs
        self.path = Path(options.path)
        if not self.path.exists():
            raise QcmonError(f"{display_path(self.path)}: no such file or folder")
        if options.dataset is not None and container_kind(str(self.path)) is None:
            raise QcmonError(f"--dataset {options.dataset}: {display_path(self.path)} is not an HDF5, NWB or Zarr "
                             "file; a dataset cannot be chosen in it")
        if (self.path.is_file() and self.path.suffix.lower() not in TIFF_SUFFIXES + RAW_SUFFIXES
                and container_kind(str(self.path)) is None):
            raise QcmonError(f"{display_path(self.path)}: not a frame file: qcmon reads TIFF files "
                             f"({', '.join(TIFF_SUFFIXES)}), raw streams ({', '.join(RAW_SUFFIXES)}) with a "
                             "sidecar TOML, HDF5, NWB and Zarr image series, or a folder of them")
        if options.follow:
            _check_watchable(self.path)
        self.out_dir = Path(options.out_dir) if options.out_dir else default_out_dir(self.path, options.dataset)
        if self.path.is_dir() and self.out_dir.resolve().is_relative_to(self.path.resolve()):
            raise QcmonError(f"--out {display_path(self.out_dir)}: the record cannot go into the session folder it reads "
                             "(nor into a folder inside it)")
        self.profile: Profile = load_profile(options.profile)
        self._alarm_argv = check_on_alarm(options.on_alarm) if options.on_alarm else None
        self._stop = threading.Event()
        self._aborted = threading.Event()
        self._commands: queue.SimpleQueue = queue.SimpleQueue()
        self._alarm_procs: list[tuple[subprocess.Popen, float]] = []  # (process, time limit on the monotonic clock)
        self._alarm_failed: set[str] = set()  # kinds of --on-alarm failure already reported (each once)
        self._report = None  # reports a problem into the record (set by run)
        self._recorded_problems: set[str] = set()  # problems in the record when resuming: not reported again
        self.problems: list[str] = []
        self.facts = AcquisitionFacts()
        self._plots: PlotWorkers | None = None
        self.earlier_record: Path | None = None
        self._blank: tuple[str, ...] = ()  # columns left blank for every row (lossy compression)
        #: After :meth:`run`: the rows have times (timestamps or a frame rate).
        self.timed = False

    # ---------------------------------------------------------------- controls
    def stop(self) -> None:
        self._stop.set()

    def abort(self) -> None:
        """End without writing the summary, report, exclude list and reference image (a second Ctrl-C): the
        record (traces, events) is kept; the files of the set are either left as they were or, if the abort
        comes while they are being put in place, written whole."""
        self._aborted.set()
        self._stop.set()

    def new_reference(self, channel: int | None = None, plane: int | None = None) -> None:
        self._commands.put(("reference", channel, plane))

    def add_note(self, text: str) -> None:
        self._commands.put(("note", text))

    # --------------------------------------------------------------------- run
    def run(self, listener: Listener | None = None) -> dict:
        """Measure until stopped (or idle, or, with ``follow=False``, until everything on disk is measured).

        Returns ``{"verdict": line, "summary": path, "report": path, "exclude": path, "out_dir": path}`` (the
        verdict line of :func:`qcmon.record.summary.verdict_line`), and ``"earlier"``: where an earlier record in
        ``out_dir`` was moved (``resume=False``).
        """
        # Frames are read into new arrays: keep freed memory for the next ones (see qcmon.monitor._memory).
        keep_freed_memory()
        # The engine's matrix products are small: one BLAS thread is fastest, and it leaves the other core to
        # the acquisition computer's own work (and to a second qcmon in an audit).
        with threadpool_limits(limits=1, user_api="blas"):
            return self._run(listener)

    def _run(self, listener: Listener | None) -> dict:
        o = self.options
        listeners = [listener] if listener is not None else []
        early: list[Exception] = []  # problems met before the record exists
        self._report = early.append
        source = SessionSource(self.path, channels=o.channels, planes=o.planes, raw_dtype=o.raw_dtype,
                               raw_shape=o.raw_shape, frame_rate_hz=o.frame_rate_hz,
                               pixel_size_um=o.pixel_size_um, dataset=o.dataset,
                               on_problem=lambda err: self._report(err))
        first = self._first_frame(source) if not o.follow else None  # an input error is said at once,
        record = SessionRecord(self.out_dir, resume=o.resume, set_aside=not o.resume)  # before any record
        try:
            return self._run_record(record, listeners, source, first, early)
        except BaseException:
            try:
                record.close()
            except QcmonError:
                pass  # the error in flight says it already (e.g. the disk is full)
            raise
        finally:
            record.close()

    def _run_record(self, record: SessionRecord, listeners: list, source: SessionSource, first: Frame | None,
                    early: list[Exception]) -> dict:
        o = self.options
        self.earlier_record = record.set_aside_to  # --restart over an earlier record: where it went
        run = _RunState(done=record.last_frames() if o.resume else {},
                        status=Status(folder=display_path(self.path), out_dir=display_path(self.out_dir)),
                        tracker=ThresholdTracker(self.profile))
        self._report = self._problem_to(record, listeners)
        if o.resume:
            # Resuming: what the record already says is not said again. Threshold events of the frames already
            # recorded are replayed silently (_deliver); problems met again are not reported twice.
            recorded = record.read_events()
            run.recorded = {_event_key(ev) for ev in recorded if ev.kind in ("start", "end")}
            for ev in recorded:
                if ev.kind == "problem" and ev.message not in self._recorded_problems:
                    self._recorded_problems.add(ev.message)
                    self.problems.append(ev.message)
        if run.done:
            run.status.paused_reason = "resuming: replaying the frames already recorded"
        for err in early:  # met while reading the first frame, before the record existed
            self._report(err)
        watcher = None
        if o.follow:
            from qcmon.sources.watcher import FolderWatcher

            watch_dir = self.path if self.path.is_dir() else self.path.parent
            watcher = FolderWatcher(watch_dir, poll_interval_s=o.poll_interval_s)
            watcher.__enter__()
        last_status = -math.inf
        idle_since = time.monotonic()
        self._plots = self._shared_plots
        self._start_plots()
        try:
            while True:
                frames = self._frames(source, final=not o.follow, first=first)
                first = None
                n = self._ingest(run, source, frames, record, listeners)
                run.behind = n == _BATCH and not (run.split is not None and run.split.reading_done)
                self._watch_pace(run, source, n)
                self.facts = source.facts
                if n:
                    idle_since = time.monotonic()
                    run.frames_read += n
                if o.follow:
                    self._check_idle(run, idle_since, record, listeners)
                self._handle_commands(run, record, listeners)
                now = time.monotonic()
                if now - last_status >= (0.25 if listeners else o.status_every_s):
                    self._update_status(run, source, listeners)
                    last_status = now
                record.maybe_flush()
                self._take_record_notices(record)
                if self._alarm_procs:
                    self._reap_alarm_commands(wait=False)
                if run.behind:
                    continue  # more is waiting on disk: no pause, and no end yet
                if not o.follow or self._stop.is_set():
                    break
                if o.until_idle_s is not None and now - idle_since >= o.until_idle_s:
                    break
                if not n:
                    watcher.wait(0.2)
            # end of watch: whatever completed meanwhile, then what the engine held back
            while o.follow:
                if self._ingest(run, source, self._frames(source, final=True), record, listeners) < _BATCH:
                    break
            if run.engine is not None:
                self._deliver(run, run.engine.flush(), record, listeners)
                for msg in run.engine.take_problems():
                    self._problem_to(record, listeners)(QcmonError(msg))
            if run.split is not None and run.split.launched and not self._stop.is_set():
                self._collect_split(run, source, record, listeners)
            self._handle_commands(run, record, listeners)
            for ev in run.tracker.close(run.last_row):
                if _event_key(ev) not in run.recorded:  # a resumed record that had already ended here
                    self._emit(ev, record, listeners)
            run.status.paused_reason = "session ended"
            self._update_status(run, source, listeners)
            record.flush()
            self._take_record_notices(record)
            self._reap_alarm_commands(wait=True)  # their failures go into the record before the summary
            self.timed = run.engine is not None and not run.untimed
            return self._finish(record, source, run.engine, run.split)
        finally:
            if self._plots is not None and self._plots is not self._shared_plots:
                self._plots.close()
            if run.split is not None:
                run.split.close()
            if watcher is not None:
                watcher.stop()
            self._reap_alarm_commands(wait=True)

    def _take_record_notices(self, record: SessionRecord) -> None:
        for msg in record.take_notices():  # a problem event: on the console, the dashboard and in the record
            self._report(QcmonError(msg))

    def _first_frame(self, source: SessionSource) -> Frame:
        """A finished session's first frame; without one, a :class:`QcmonError` naming what was found."""
        frames = source.frames(final=True, max_frames=1)
        try:
            first = next(frames, None)
        finally:
            frames.close()
        if first is not None:
            return first
        if source.problems:
            shown = "; ".join(str(p) for p in source.problems[:3])
            more = f" (and {len(source.problems) - 3} more)" if len(source.problems) > 3 else ""
            raise QcmonError(f"{display_path(self.path)}: nothing measurable: {shown}{more}")
        raise QcmonError(f"{display_path(self.path)}: nothing measurable: no TIFF ({', '.join(TIFF_SUFFIXES)}), "
                         f"raw stream ({', '.join(RAW_SUFFIXES)}) or image series with frames in it")

    def _start_plots(self) -> None:
        """Start the report's plot processes (``plot_processes``), so that they load matplotlib meanwhile."""
        if self.options.plot_processes > 0 and self._plots is None:
            try:
                self._plots = PlotWorkers(self.options.plot_processes)
            except Exception:  # noqa: BLE001 - no processes to spare: the plots are drawn here at the end
                self._plots = None

    def _frames(self, source: SessionSource, *, final: bool, first: Frame | None = None
                ) -> Generator[Frame, None, None]:
        """The next batch of frames. A finished session: each read as it is measured (``SessionSource.frames``:
        still in the cache when measured; its file stays open, read-only, for the batch). While the microscope
        writes: the whole batch read first (``poll``), so that its file is open only while it is read — on some
        systems a writer cannot rename or delete a file another program holds open."""
        if self.options.follow:
            yield from source.poll(final=final, max_frames=_BATCH)
        else:
            if first is not None:  # read ahead of the record (_first_frame): the batch is one frame shorter
                yield first
            yield from source.frames(final=final, max_frames=_BATCH - (first is not None))

    def _ingest(self, run: "_RunState", source: SessionSource, frames: Generator[Frame, None, None], record,
                listeners) -> int:
        """Measure ``frames`` (from :meth:`_frames`), record the rows; how many were read."""
        rows: list[dict] = []
        n = 0
        try:
            for fr in frames:
                n += 1
                if run.engine is None:
                    self._start_engine(run, source, fr)
                if run.untimed and source.facts.get("frame_rate_hz"):  # estimated meanwhile (file times)
                    self._use_rate(run, source)
                sp = run.split
                if sp is not None and sp.stop is not None and fr.index >= sp.stop:
                    sp.reading_done = True  # the rest is measured by the workers
                    break
                if sp is not None and sp.launched:
                    sp.feed(run.engine)  # registrations a worker measured ahead (while the reference grows)
                try:
                    new = run.engine.process(fr)
                except FrameError as err:
                    self._problem_to(record, listeners)(err)
                    continue
                for msg in run.engine.take_problems():
                    self._problem_to(record, listeners)(QcmonError(msg))
                rows.extend(new)
                if sp is not None and not sp.decided:
                    sp.note_rows(new)
                    sp.note_frame(fr.index)
                    # once every reference is built: the workers start (0: not yet; 1: too short to split)
                    if sp.ready() and sp.launch(run.engine, source.position) == 1:
                        run.split = None  # too short to split: one process, the engine's own values
        finally:
            frames.close()  # the file being read is closed now, not when the generator is collected
        while run.notices:
            self._problem_to(record, listeners)(run.notices.pop(0))
        self._deliver(run, rows, record, listeners)
        return n

    def _use_rate(self, run: "_RunState", source: SessionSource) -> None:
        """A frame rate became known after the engine started (estimated): rows from now on are timed."""
        run.untimed = False
        run.engine.set_frame_rate(float(source.facts.get("frame_rate_hz")))

    def _watch_pace(self, run: "_RunState", source: SessionSource, n: int) -> None:
        """While watching without a frame rate: estimate it from the pace at which time points arrive."""
        if not (run.untimed and self.options.follow and n and not run.behind):
            return
        layout = source.position["layout"] or (1, 1)
        points = source.position["pages"] / max(1, int(layout[0]) * int(layout[1]))
        est = run.pace.add(time.monotonic(), points)
        if est is not None:
            hz, origin = est
            source.set_estimated_rate(hz, origin)
            self._use_rate(run, source)

    def _start_engine(self, run: "_RunState", source: SessionSource, first: Frame) -> None:
        run.engine = Engine(self._settings(source.facts, first))
        compression = str(source.facts.get("compression", ""))
        if compression in LOSSY_COMPRESSIONS:
            self._blank = NOISE_COLUMNS
            run.notices.append(
                f"frames are stored with lossy {compression} compression: the codec, not the detector, sets the "
                f"pixel noise, so {', '.join(NOISE_COLUMNS)} and the photon-transfer figures are left blank; "
                "mean_f rests on a dark level estimated from the same noise unless --dark-level is given")
        elif compression in MAYBE_LOSSY_COMPRESSIONS:
            run.notices.append(
                f"frames are stored with {compression} compression, which may be lossy (the file does not say): if "
                f"it is, {', '.join(NOISE_COLUMNS)} and the photon-transfer figures describe the codec, not the "
                "detector")
        run.untimed = not run.engine.settings.frame_rate_hz and not math.isfinite(first.time_s)
        o = self.options
        if not o.follow and o.workers > 1:  # a finished session: later chunks go to other processes
            n_c, n_z = (source.position["layout"] or (1, 1))[:2]
            run.split = SplitRun(
                workers=o.workers, path=str(self.path), frames_per_point=int(n_c) * int(n_z),
                window_s=run.engine.settings.bleach_window_s,
                source_kwargs=dict(channels=o.channels, planes=o.planes, raw_dtype=o.raw_dtype,
                                   raw_shape=o.raw_shape, frame_rate_hz=o.frame_rate_hz,
                                   pixel_size_um=o.pixel_size_um, dataset=o.dataset))
            run.split.prepare()  # the worker processes start now, ready when the engine is copied

    def _collect_split(self, run: "_RunState", source: SessionSource, record, listeners) -> None:
        """The workers' rows, chunk after chunk, through the same record, thresholds and listeners."""
        report = self._problem_to(record, listeners)
        for res in run.split.results():
            for msg in res["problems"]:
                if msg not in self.problems:  # the warm-up overlaps the previous chunk: report once
                    report(QcmonError(msg))
            for ev in res.get("events", []):
                self._emit(ev, record, listeners)
            self._deliver(run, res["rows"], record, listeners)
            self._update_status(run, source, listeners)
            record.maybe_flush()
            if self._stop.is_set():
                break

    def _deliver(self, run: "_RunState", rows: list[dict], record, listeners) -> None:
        """Record rows not recorded before (resume), raise their events and pass them on."""
        if run.engine is not None:
            for ev in run.engine.take_events():  # detector levels found late (none for replayed frames)
                if ev.frame > run.done.get((ev.channel, ev.plane), -1):
                    self._emit(ev, record, listeners)
        if run.split is not None and rows:
            rows = run.split.continuity.apply(rows)
        run.status.frames_measured += len(rows)  # every frame of the session, those replayed on resume too
        if run.done:
            new = [r for r in rows if r["frame"] > run.done.get((r["channel"], r["plane"]), -1)]
            if len(new) < len(rows):
                # frames recorded by an earlier run: not recorded again, but through the thresholds all the same,
                # so that their state (a warning or alarm under way, how long a value has been beyond its level)
                # is that of an uninterrupted run; only events the record lacks are recorded
                for row in rows:
                    if row["frame"] <= run.done.get((row["channel"], row["plane"]), -1):
                        for ev in run.tracker.update(row):
                            if _event_key(ev) not in run.recorded:
                                self._emit(ev, record, listeners)
                        run.last_row = row
            rows = new
            if rows and run.status.paused_reason.startswith("resuming"):
                run.status.paused_reason = ""
        if not rows:
            return
        for column in self._blank:  # cannot be trusted for these frames (a problem event says why)
            for r in rows:
                r[column] = math.nan
        record.append_rows(rows)
        for row in rows:
            for ev in run.tracker.update(row):
                self._emit(ev, record, listeners)
            step = row.get("level_step", math.nan)
            if isinstance(step, float) and math.isfinite(step):
                self._emit(step_event(row, self.profile.caution), record, listeners)
        for lst in listeners:
            lst.on_rows(rows)
        run.last_row = rows[-1]
        run.status.current_file = str(rows[-1]["source"])
        run.status.elapsed_s = float(rows[-1]["time_s"])

    # ----------------------------------------------------------------- helpers
    def _settings(self, facts: AcquisitionFacts, first: Frame) -> EngineSettings:
        o = self.options
        zstack = None
        z_step = o.z_step_um
        if o.zstack is not None:
            zstack, z_from_file = read_zstack(o.zstack)
            z_step = z_step or z_from_file
            if z_step is None:
                raise QcmonError(f"{o.zstack}: the z-stack carries no plane spacing; give --z-step UM")
        # the bit depth of the option or the metadata; the dtype's is no evidence (12-bit data in 16-bit pages)
        bit_fact = facts.facts.get("bit_depth")
        bit_depth, bit_origin = o.bit_depth, "option"
        if bit_depth is None and bit_fact is not None and bit_fact.origin != "dtype":
            bit_depth, bit_origin = int(bit_fact.value), ("option" if bit_fact.origin == "option" else "metadata")
        return EngineSettings(
            frame_rate_hz=facts.get("frame_rate_hz") or o.frame_rate_hz,
            pixel_size_um=facts.get("pixel_size_um") or o.pixel_size_um,
            bit_depth=bit_depth, bit_depth_origin=bit_origin,
            dark_level=o.dark_level,
            zstack=zstack, z_step_um=z_step, motion_channel=o.motion_channel,
            **o.engine_overrides)

    def _emit(self, ev: Event, record: SessionRecord, listeners) -> None:
        if not ev.wall_time:
            ev.wall_time = datetime.now().astimezone().isoformat(timespec="seconds")
        record.append_event(ev)
        for lst in listeners:
            lst.on_event(ev)
        if ev.kind == "start" and ev.state == "alarm" and self.options.on_alarm:
            self._run_on_alarm(ev)

    def _check_idle(self, run: "_RunState", idle_since: float, record, listeners) -> None:
        """While watching: how long no new frame arrived (``status.idle_s``); an ``idle`` event after
        :data:`IDLE_EVENT_S` (or five frame intervals at slow rates) and a ``resumed`` one when frames come again."""
        status = run.status
        if run.last_row is None:  # nothing measured yet: say what the watch waits for
            status.idle_s = 0.0
            if status.paused_reason in ("", WAITING_FIRST, WAITING_REFERENCE):
                status.paused_reason = WAITING_REFERENCE if run.frames_read else WAITING_FIRST
            return
        if status.paused_reason in (WAITING_FIRST, WAITING_REFERENCE):
            status.paused_reason = ""
        idle = time.monotonic() - idle_since
        rate = status.frame_rate_hz
        interval = 1.0 / rate if isinstance(rate, float) and math.isfinite(rate) and rate > 0 else 0.0
        if idle < max(IDLE_SHOW_S, 3 * interval):
            if run.idle_event_s:
                t = float(run.last_row["time_s"])
                self._emit(Event(kind="resumed", frame=int(run.last_row["frame"]), time_s=t,
                                 started_frame=int(run.last_row["frame"]), started_time_s=t,
                                 message=f"frames arrive again after a pause of about {run.idle_event_s:.0f} s"),
                           record, listeners)
                run.idle_event_s = 0.0
            run.idle_reported = False
            status.idle_s = 0.0
            return
        status.idle_s = idle
        if idle >= max(IDLE_EVENT_S, 5 * interval):
            run.idle_event_s = idle
            if not run.idle_reported:
                run.idle_reported = True
                t = float(run.last_row["time_s"])
                self._emit(Event(kind="idle", frame=int(run.last_row["frame"]), time_s=t,
                                 started_frame=int(run.last_row["frame"]), started_time_s=t,
                                 message=f"no new frame for {idle:.0f} s (the last one at t={t:.1f} s)",
                                 advice=idle_advice(idle)), record, listeners)

    def _problem_to(self, record: SessionRecord, listeners):
        def report(err: Exception) -> None:
            msg = str(err)
            if msg in self._recorded_problems:
                return  # recorded by the run this one resumes: met again, not said again
            self.problems.append(msg)
            self._emit(Event(kind="problem", message=msg), record, listeners)
        return report

    def _handle_commands(self, run: "_RunState", record, listeners) -> None:
        engine, last_row = run.engine, run.last_row
        while True:
            try:
                cmd = self._commands.get_nowait()
            except queue.Empty:
                return
            frame = int(last_row["frame"]) if last_row else -1
            t = float(last_row["time_s"]) if last_row else math.nan
            if cmd[0] == "note":
                self._emit(Event(kind="note", message=str(cmd[1]), frame=frame, time_s=t,
                                 started_frame=frame, started_time_s=t), record, listeners)
            elif cmd[0] == "reference":
                if engine is not None:
                    engine.new_reference(cmd[1], cmd[2])
                waiting = (f"; no new frame for {run.status.idle_s:.0f} s: the reference waits for frames"
                           if run.status.idle_s > 0 else "")
                self._emit(Event(kind="reference", frame=frame, time_s=t, started_frame=frame, started_time_s=t,
                                 message="new reference requested: built from the next frames" + waiting),
                           record, listeners)

    def _update_status(self, run: "_RunState", source, listeners) -> None:
        status, engine, tracker = run.status, run.engine, run.tracker
        facts = source.facts
        status.facts = facts.as_dict()
        rate = facts.facts.get("frame_rate_hz")
        if rate is not None:
            status.frame_rate_hz, status.frame_rate_origin = float(rate.value), rate.origin
        elif engine is not None and not run.untimed:
            status.frame_rate_origin = "no rate; times from the frames' timestamps"
        # a full batch means at least one more batch was already complete on disk
        status.backlog_frames = _BATCH if run.behind else 0
        status.states = {k: dict(v) for k, v in tracker.states.items()}
        status.overall = tracker.overall
        if engine is None and not status.paused_reason.startswith(("resuming", "session ended")):
            # a watched folder where nothing readable appears says so (and how many files were refused)
            problems = len(source.problems)
            status.paused_reason = (f"no readable frame yet: {problems} file problem{'s' if problems != 1 else ''}"
                                    if problems else WAITING_FIRST)
        elif engine is None and status.paused_reason == "session ended":
            status.paused_reason = f"session ended without a readable frame ({len(source.problems)} file problems)"
        if engine is not None:
            if status.paused_reason.startswith("no readable frame yet"):
                status.paused_reason = ""
            status.streams = engine.streams
            if engine.streams:
                status.range_text = engine.range_text(*engine.streams[0])
            loss = self.options.forecast_loss_pct
            forecast = run.split.continuity.forecast_min if run.split is not None else engine.forecast_min
            for c, p in engine.streams:
                m = forecast(c, p, loss)
                key = "baseline_f" if (c, p) == engine.streams[0] else f"baseline_f[{c},{p}]"
                if math.isfinite(m):
                    status.forecasts[key] = f"brightness −{loss:g} % in ~{m:.0f} min at this rate"
                else:
                    status.forecasts[key] = "brightness steady"
        for lst in listeners:
            lst.on_status(status)

    def _run_on_alarm(self, ev: Event) -> None:
        """Run the user's command with the event as JSON on stdin. The command line was split and checked at start
        (:func:`check_on_alarm`), is never given to a shell, and nothing from files or events is put into it. It
        runs in a process group of its own, killed with everything it started if it outlives
        :data:`ALARM_COMMAND_LIMIT_S`."""
        self._reap_alarm_commands(wait=False)
        try:
            proc = subprocess.Popen(self._alarm_argv, stdin=subprocess.PIPE, stdout=subprocess.DEVNULL,
                                    stderr=subprocess.DEVNULL, start_new_session=True)
        except OSError as err:
            self._alarm_failure("start", f"could not be started: {err.strerror or err}")
            return
        try:
            proc.stdin.write(ev.to_json().encode() + b"\n")
            proc.stdin.close()
        except OSError:
            pass
        self._alarm_procs.append((proc, time.monotonic() + ALARM_COMMAND_LIMIT_S))

    def _alarm_failure(self, kind: str, what: str) -> None:
        """Report a failure of the ``--on-alarm`` command once per kind (it would repeat with every alarm)."""
        if kind in self._alarm_failed:
            return
        self._alarm_failed.add(kind)
        msg = f"--on-alarm command {self.options.on_alarm!r} {what} (said once; later alarms run it all the same)"
        if self._report is not None:
            self._report(QcmonError(msg))
        else:
            self.problems.append(msg)

    def _reap_alarm_commands(self, *, wait: bool) -> None:
        """Collect finished ``--on-alarm`` commands, kill those past their time limit (the whole process group:
        what they started too); with ``wait``, wait for the others until their limits."""
        while True:
            keep = []
            now = time.monotonic()
            for proc, deadline in self._alarm_procs:
                rc = proc.poll()
                if rc is None and now < deadline:
                    keep.append((proc, deadline))
                    continue
                if rc is None:
                    _kill_group(proc.pid)
                    proc.wait()
                    self._alarm_failure("time", f"still ran after {ALARM_COMMAND_LIMIT_S:g} s and was stopped")
                else:
                    _kill_group(proc.pid)  # what it started and left behind
                    if rc != 0:
                        self._alarm_failure("status", f"failed (exit status {rc})")
            self._alarm_procs = keep
            if not wait or not keep:
                return
            time.sleep(0.05)

    def _finish(self, record: SessionRecord, source: SessionSource, engine: Engine | None,
                split: SplitRun | None = None) -> dict:
        traces = record.read_traces()
        events = record.read_events()
        # the plots first: drawing processes (if any) draw them while the summary is computed
        panels = PanelDrawing(traces, events, self.profile, self._plots)
        extra = {}
        if engine is not None:
            info = engine.stream_info()
            if split is not None and split.launched:  # the main engine saw the first chunk only
                for key, more in split.continuity.stream_info().items():
                    info.setdefault(key, {}).update(more)
                    info[key]["photon_transfer_frames"] = "first chunk (split over processes)"
            first = info[engine.streams[0]] if engine.streams else {}
            extra = {
                "photon_transfer.gain": first.get("gain_dn_per_photon", math.nan),
                "photon_transfer.dark_level": first.get("ptc_dark_level_dn", math.nan),
                "photon_transfer.read_noise_dn": first.get("read_noise_dn", math.nan),
                "photon_transfer.r2": first.get("ptc_r2", math.nan),
                "photon_transfer.quality": first.get("ptc_quality", ""),
                "photon_transfer.dark_origin": first.get("ptc_dark_origin", ""),
                "photon_transfer.bias": first.get("ptc_bias", ""),
                "dark_level.used_dn": first.get("dark_level_dn", math.nan),
                "dark_level.origin": first.get("dark_level_origin", ""),
                "saturation.level_dn": first.get("saturation_level_dn", math.nan),
                "saturation.level_origin": first.get("saturation_level_text", ""),
                "saturation.floor_dn": first.get("floor_level_dn", math.nan),
                "saturation.floor_origin": first.get("floor_level_text", ""),
                "z.start_um": first.get("z_start_um", math.nan),
                "streams": {f"{c},{p}": jsonable(v) for (c, p), v in info.items()},
            }
        if self._blank:
            for key in ("photon_transfer.gain", "photon_transfer.read_noise_dn", "photon_transfer.r2"):
                extra[key] = math.nan
        facts = source.facts.as_dict()
        summary = summarize_traces(traces, events, facts=facts, profile=self.profile, extra=extra)
        summary["problems"] = list(self.problems)
        summary["session"] = display_path(self.path)
        if self.options.dataset is not None:  # the series of a container (the report reads a frame back from it)
            summary["dataset"] = self.options.dataset
        # the verdict line first: the dashboard prints these in order when it leaves
        paths = {"verdict": verdict_line(summary), "out_dir": str(self.out_dir)}
        if self.earlier_record is not None:
            paths["earlier"] = str(self.earlier_record)
        # the summary, exclude list, reference image and report are written as one set (all new, or all as
        # they were: a full disk or an abort half-way must not leave a new summary beside an old report)
        files = {SUMMARY_FILE: json.dumps(jsonable(summary), indent=2, ensure_ascii=False),
                 EXCLUDE_FILE: _exclude_csv(exclude_ranges(traces, events, self.profile))}
        names = {SUMMARY_FILE: "summary", EXCLUDE_FILE: "exclude", REFERENCE_FILE: "reference", REPORT_FILE: "report"}
        ref = None
        if engine is not None and engine.streams:
            ref = engine.reference_image(*engine.streams[0])
            if ref is not None:
                files[REFERENCE_FILE] = _tiff_bytes(ref)
        files[REPORT_FILE] = report_html(summary, traces, events, self.profile, facts, panels=panels,
                                         reference=ref)
        with _signals_held():
            if self._aborted.is_set():
                raise KeyboardInterrupt
            written = write_atomic_set(self.out_dir, files)
        for name, path in written.items():
            paths[names[name]] = str(path)
        return paths


WAITING_FIRST = "waiting for the first frame"
WAITING_REFERENCE = "building the reference from the first frames"
#: s without a new frame, while watching, before the header says so (common practice, no source).
IDLE_SHOW_S = 3.0
#: s without a new frame before an ``idle`` event is recorded (common practice, no source).
IDLE_EVENT_S = 10.0

#: Frames read per poll: bounds memory and keeps the display alive while a backlog is measured.
_BATCH = 256


#: Seconds an ``--on-alarm`` command may run; then it is killed with everything it started.
ALARM_COMMAND_LIMIT_S = 10.0


def check_on_alarm(command: str) -> list[str]:
    """The ``--on-alarm`` command split like a shell would (never run by one), checked before the watch starts.

    Raises
    ------
    QcmonError
        The command cannot be split (e.g. an unbalanced quote), is empty, or its program is not found or not
        executable.
    """
    try:
        argv = shlex.split(command)
    except ValueError as err:
        raise QcmonError(f"--on-alarm {command!r}: cannot be read as a command ({err})") from None
    if not argv:
        raise QcmonError("--on-alarm: the command is empty")
    prog = argv[0]
    found = shutil.which(prog) if os.sep not in prog else (prog if os.access(prog, os.X_OK)
                                                           and os.path.isfile(prog) else None)
    if found is None:
        where = "not an executable file" if os.sep in prog else "not found on PATH"
        raise QcmonError(f"--on-alarm {command!r}: the program {prog!r} is {where}")
    return argv


def _kill_group(pid: int) -> None:
    try:
        os.killpg(pid, signal.SIGKILL)
    except (ProcessLookupError, PermissionError):
        pass


@contextmanager
def _signals_held():
    """Hold Ctrl-C and SIGTERM back (in the main thread) while a set of files is put in place; they are handled
    right after."""
    main = threading.current_thread() is threading.main_thread()
    sigs = {signal.SIGINT, signal.SIGTERM}
    if main:
        old = signal.pthread_sigmask(signal.SIG_BLOCK, sigs)
    try:
        yield
    finally:
        if main:
            signal.pthread_sigmask(signal.SIG_SETMASK, old)


def _event_key(ev: Event) -> tuple:
    """What makes a threshold event the same event in two runs (not its wall-clock time)."""
    return (ev.kind, ev.metric, ev.state, ev.channel, ev.plane, ev.frame, ev.started_frame)


@dataclass(slots=True)
class _RunState:
    done: dict
    status: Status
    tracker: ThresholdTracker
    recorded: set = field(default_factory=set)  # _event_key of the threshold events already in the record
    engine: Engine | None = None
    last_row: dict | None = None
    behind: bool = False
    split: "SplitRun | None" = None
    notices: list = field(default_factory=list)  # problems found when the engine starts, recorded with its rows
    untimed: bool = False  # the engine runs without a frame rate (and the frames carry no timestamps)
    pace: "PaceEstimate" = field(default_factory=lambda: PaceEstimate())
    frames_read: int = 0  # frames read in this run (the first ones build the reference before any row)
    idle_reported: bool = False  # an idle event was recorded for the current pause
    idle_event_s: float = 0.0  # length of the current reported pause, s (0: none)


class PaceEstimate:
    """The frame rate from the pace at which time points arrive while watching, once it is steady.

    Each look that found new frames (and did not leave a backlog) adds ``(clock time, time points read)``; the
    first look's frames were written before the watch began and only start the count. The estimate is
    the least-squares slope of time points against clock time over at least ``min_s`` seconds and ``min_points`` time points, given only when
    both halves of that span agree within ``tolerance`` (a pause or burst makes them disagree: no estimate until
    the pace is steady again over a later span). Common practice, no source.
    """

    def __init__(self, *, min_s: float = 10.0, min_points: int = 20, tolerance: float = 0.1):
        self.min_s, self.min_points, self.tolerance = float(min_s), int(min_points), float(tolerance)
        self._seen: list[tuple[float, float]] = []

    def add(self, now: float, points: float) -> tuple[float, str] | None:
        seen = self._seen
        seen.append((float(now), float(points)))
        if len(seen) < 3:
            return None
        t0, n0 = seen[0]
        t1, n1 = seen[-1]
        span, count = t1 - t0, n1 - n0
        if span < self.min_s or count < self.min_points:
            return None
        mid = t0 + span / 2
        tm, nm = min(seen, key=lambda p: abs(p[0] - mid))
        if not (t0 < tm < t1):
            return None
        pts = np.asarray(seen)
        rate = float(np.polyfit(pts[:, 0] - t0, pts[:, 1] - n0, 1)[0])  # least squares over every look
        halves = ((nm - n0) / (tm - t0), (n1 - nm) / (t1 - tm))
        if any(abs(h - rate) > self.tolerance * rate for h in halves):
            del seen[:max(1, len(seen) // 2)]  # not steady: look again over a later span
            return None
        return rate, (f"estimated from the pace frames arrived at while watching ({count:.0f} time points in "
                      f"{span:.1f} s)")


def _exclude_csv(ranges) -> str:
    lines = ["channel,plane,first_frame,last_frame,reason"]
    for r in ranges:
        lines.append(",".join(str(x) for x in r))
    return "\n".join(lines) + "\n"


def _tiff_bytes(image: np.ndarray) -> bytes:
    import io

    import tifffile

    buf = io.BytesIO()
    tifffile.imwrite(buf, np.asarray(image, dtype=np.float32))
    return buf.getvalue()


def read_zstack(path: Path) -> tuple[np.ndarray, float | None]:
    """Read a reference z-stack (planes superficial → deep) and its plane spacing in µm when the file has it."""
    import tifffile

    path = Path(path)
    try:
        with tifffile.TiffFile(path) as tif:
            stack = tif.asarray()
            z_step = None
            if tif.is_ome:
                import xml.etree.ElementTree as ET

                root = ET.fromstring(tif.ome_metadata)
                for el in root.iter():
                    if el.tag.endswith("Pixels") and el.get("PhysicalSizeZ"):
                        z_step = float(el.get("PhysicalSizeZ"))
                        break
            elif tif.is_imagej and tif.imagej_metadata:
                sp = tif.imagej_metadata.get("spacing")
                z_step = float(sp) if sp else None
    except (OSError, tifffile.TiffFileError) as err:
        raise QcmonError(f"{path}: cannot read the z-stack: {err}") from None
    stack = np.squeeze(stack)
    if stack.ndim != 3:
        raise QcmonError(f"{path}: a z-stack must have planes × rows × columns, got shape {stack.shape}")
    return stack.astype(np.float32), z_step
