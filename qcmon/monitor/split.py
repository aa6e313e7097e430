"""Measuring one finished session on several processes: chunks of time points, the reference carried across.

The monitor measures the first chunk itself. As soon as its engine has built the reference of every
(channel, plane) and measured a whole time point, the engine is copied (pickled) to worker processes, one per later
chunk. Each worker opens the session on its own. While the registration reference still grows
(:mod:`qcmon.metrics.reference_growth`), it *registers only* the frames up to where every reference is final
(:meth:`~qcmon.engine.Engine.register_only`: the frame's registration, the reference's growth and the detector's
range finder, as one process does them; no row, about 0.6 of a frame's cost), and the first worker sends those
registrations to the monitor (a queue; :meth:`SplitRun.feed`), which measures the same frames without registering
them again (:meth:`~qcmon.engine.Engine.give_registrations`, about 0.6 of the cost). Then each worker passes over the
frames before its warm-up without decoding them (:class:`~qcmon.sources.SessionSource` ``skip_frames``), measures a
warm-up of ``warm_up`` time points whose rows it drops, then its chunk. The first chunk is longer by the work the
workers do before their chunks. Rows come back in acquisition order and go through the same record, thresholds
and summary as a single-process run. With a z-stack (its z estimates decide which frames join the reference) or a
motion channel, or where the registering would not end before the second chunk's warm-up, the engine is copied
only once every reference is final (the first chunk then runs alone until there).

What is the same as in one process, and what is not:

- Displacement, registration quality, photometry, saturation, noise, SNR and photons per pixel depend on the
  frame and on the reference only: identical. The registration reference grows from the measured frames until a
  fixed count of frames (:mod:`qcmon.metrics.reference_growth`): a worker registers the same frames in the same
  order as one process, so it measures against the very reference one process has there; the monitor takes a
  worker's registration of a frame only where its own reference growth stands where the worker's stood (else it
  registers the frame itself).
- State one process carries longer than the warm-up — the registration reference, the detector's levels, the dark
  levels, the gain and a refit pending after a brightness step (:meth:`~qcmon.engine.Engine.split_digest`) — is
  compared at each chunk's first frame with one process's (the monitor's engine after the first chunk, each
  worker's after its chunk). A chunk whose worker differs there (a brightness step or a dark level found in the
  frames it only registered, a level found in the frames it skipped) is measured again in the monitor from the
  engine of the chunk before it, as that engine was after its last frame: exactly one process's rows, at the cost
  of that chunk's time.
- Focus correlation, z and the line offset come from the running means of the last ``running_mean_frames`` frames,
  recomputed every ``z_every`` frames: the warm-up fills the running means with the same frames, summed in the same
  blocks, and keeps the same frames as recomputation points, so they are identical.
- Baseline, brightness %, bleach slope and brightness steps (``level_step``) depend on the whole series: they are
  recomputed here, in order, over all rows (:class:`RowContinuity`), so they are identical.
- After a brightness step one process blanks photons per pixel until photon transfer has refitted; a worker's engine
  finds steps in its own chunk only, so photons per pixel after a step may differ (no step: identical).
- Without a trusted dark level at the start (no dark frames, no zero-photon peak, the third cumulant still too
  uncertain) photons per pixel are blank until photon transfer finds one; a worker's engine looks in its own chunk's
  frame triples only, so where they start to be counted may differ (a dark level known from the start: identical).
- The photon-transfer fit of ``summary.json`` (``photon_transfer.*``) uses the frame pairs of the first chunk only.
- The detector's levels (saturation ceiling, floor) found from the data in one chunk hold in the later ones, as in
  one process: each chunk's result lists the level changes its engine made; a later chunk whose worker did not
  start from the same levels (a level found after the engine was copied, in frames the worker skipped) is measured
  again in this process with the earlier chunks' changes applied at their frames (``Engine.carry_range``), and the
  main engine ends with the last chunk's levels (the summary's). A level the data show only by the periodic re-check
  of :class:`~qcmon.metrics.saturation.RangeFinder` (every 32 frames) inside a later chunk may be found a few frames
  apart (the re-check's phase differs in a worker).
"""

from __future__ import annotations

import dataclasses
import math
import multiprocessing
import pickle
import queue
import warnings
from concurrent.futures import Future, ProcessPoolExecutor
from dataclasses import dataclass, field

from qcmon.errors import FrameError
from qcmon.frames import UNTIMED_FRAMES_PER_S
from qcmon.metrics.brightness import BrightnessTracker

__all__ = ["WARM_UP", "MIN_CHUNK", "FAST_COST", "FED_SAVING", "ChunkJob", "plan_chunks", "warm_start", "count_frames",
           "measure_chunk", "RowContinuity", "SplitRun"]

#: Time points measured before a chunk, rows dropped (fills the running means; see the module notes).
WARM_UP = 300
#: Fewest time points per process for a split to be worth starting a process (one to a few seconds of work).
MIN_CHUNK = 1500
#: What registering a frame only (:meth:`qcmon.engine.Engine.register_only`) costs a worker, as a fraction of a
#: frame measured in full by the monitor, and what the monitor saves on a frame whose registration a worker sent it
#: (feed). The engine alone: 0.60 and 0.42 at 512², 0.60 and 0.51 at 256² (bench/bench_split.py --costs); in a
#: whole run the monitor's frames also carry reading and the record, and it finds about 1,750 of 1,890
#: registrations ready: 0.55 and 0.3 balanced 6,000- and 12,000-frame runs at 512² (docs/performance.md).
FAST_COST = 0.55
FED_SAVING = 0.3


def plan_chunks(n_points: int, workers: int, *, warm_up: int = WARM_UP, min_chunk: int = MIN_CHUNK
                ) -> list[tuple[int, int]]:
    """Chunks ``[(0, b1), (b1, b2), ..., (bk, n_points)]`` of time points, one per process.

    Every chunk but the first also measures ``warm_up`` points before it, so the first chunk is longer by that
    much and every process has about the same work. Fewer chunks than ``workers`` when the session is short:
    a chunk holds at least ``min_chunk`` points; one chunk means no split.
    """
    if n_points < 0 or workers < 1:
        raise ValueError(f"n_points must be >= 0 and workers >= 1, got {n_points!r}, {workers!r}")
    k = max(1, min(workers, n_points // max(min_chunk, 1)))
    if k == 1:
        return [(0, n_points)]
    first = int(math.ceil((n_points + (k - 1) * warm_up) / k))
    rest = (n_points - first) / (k - 1)
    bounds = [0, first] + [first + round(rest * i) for i in range(1, k)]
    bounds[-1] = n_points
    return list(zip(bounds[:-1], bounds[1:]))


def warm_start(first: int, *, measured: int, z_every: int, warm_up: int = WARM_UP) -> int:
    """Time point from which a worker feeds frames to its engine copy for a chunk beginning at ``first``.

    The copy has measured ``measured`` frames of each stream (the reference frames); the engine recomputes focus
    and z when its count of measured frames reaches a multiple of ``z_every`` (and sums the running means in blocks
    that end there). Starting at ``s`` with
    ``s ≡ measured (mod z_every)`` keeps the recomputation at the same time points as in one process.
    """
    s = first - warm_up
    s -= (s - measured) % z_every
    if s < measured:
        raise ValueError(f"chunk at {first} is too close to the start for a warm-up of {warm_up} points")
    return s


def count_frames(path: str, source_kwargs: dict) -> int:
    """Frames (pages that are not thumbnails, bad ones included) of a finished session, without decoding."""
    from qcmon.sources import SessionSource

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        src = SessionSource(path, **source_kwargs, skip_frames=1 << 62)
        src.poll(final=True)
    return int(src.position["pages"])


@dataclass
class ChunkJob:
    """What a worker needs to measure one chunk (picklable)."""

    path: str
    source_kwargs: dict
    token: dict                # position token of the monitor's source: layout, frame type and time origin
    frames_per_point: int      # channels × planes
    warm_from: int             # first time point fed to the engine
    first: int                 # first time point whose rows are kept
    stop: int | None           # first time point not measured (None: to the end of the session)
    engine: bytes              # the monitor's engine, pickled once the reference of every stream is built
    range_log: list | None = None  # detector level changes after the copy, to apply at their frames (a re-run)
    fast_from: int | None = None  # the copy's references still grow: register from this time point on
                                  # (Engine.register_only) until they are final, then skip to the warm-up
    warm_up: int = WARM_UP        # time points measured before the chunk, rows dropped (with fast_from)
    feed: bool = False            # send the registrations of fast_from on to the monitor (SplitRun.feed)


#: Registrations a worker sends the monitor at once (SplitRun.feed).
_FEED_BATCH = 2
#: The queue to the monitor, in a worker process (set by :func:`_worker_init`).
_FEED = None


def _worker_init(feed) -> None:
    """Set up a worker process: the queue its registrations go to (see :meth:`SplitRun.feed`)."""
    global _FEED
    _FEED = feed
    if feed is not None:
        feed.cancel_join_thread()  # what the monitor no longer reads is not worth waiting for at the end


def _load_qcmon() -> None:
    """A worker process's first task: load what measuring a chunk needs (SplitRun.prepare)."""
    import qcmon.engine  # noqa: F401
    import qcmon.sources  # noqa: F401
    from qcmon.monitor._memory import keep_freed_memory  # noqa: F401


def measure_chunk(job: ChunkJob) -> dict:
    """Measure one chunk in this process. Returns ``rows`` and ``problems`` (messages), the events, the detector
    level changes, ``digest_first`` (:meth:`~qcmon.engine.Engine.split_digest` before the chunk's first frame) and,
    for a chunk that another follows, ``digest_end`` and ``end_engine`` (the engine after its last frame, pickled:
    the next chunk can be measured again from it exactly)."""
    from threadpoolctl import threadpool_limits

    from qcmon.monitor._memory import keep_freed_memory
    from qcmon.sources import SessionSource

    keep_freed_memory()  # frames are read into new arrays: reuse freed memory (see qcmon.monitor._memory)
    problems: list[str] = []
    engine = pickle.loads(job.engine)
    token = {**job.token, "pages": 0, "files": {}, "given_up": []}

    def frames_from(point: int):
        src = SessionSource(job.path, **job.source_kwargs, start=token, skip_frames=point * job.frames_per_point,
                            on_problem=lambda err: problems.append(str(err)))
        return src.frames(final=True)  # each frame read as it is measured (see SessionSource.frames)

    rows: list[dict] = []
    carry = sorted(job.range_log or [], key=lambda e: e[0])
    own = len(engine.range_log)  # the log's entries from here on are this worker's own findings
    fast = job.fast_from is not None  # registering only, until every reference is final
    feed = _FEED if job.feed else None  # where the registrations go (SplitRun.feed)
    batch: list = []
    point = -1                        # time point of the last frame registered only
    digest_first = None
    with threadpool_limits(limits=1, user_api="blas"):
        frames = frames_from(job.fast_from if fast else job.warm_from)
        try:
            while True:
                restart = None
                for fr in frames:
                    if job.stop is not None and fr.index >= job.stop:
                        break
                    if fast and fr.index != point and engine.references_settled():
                        # final after a whole time point: on to the warm-up (its frames read, not decoded, before)
                        fast = False
                        try:
                            start = warm_start(job.first, measured=fr.index, z_every=engine.settings.z_every,
                                               warm_up=job.warm_up)
                        except ValueError:
                            return {"redo": True, "problems": []}  # final too late (bad frames on the way)
                        if start > fr.index:
                            restart = start
                            break
                    if fast and fr.index >= job.first - job.warm_up:
                        return {"redo": True, "problems": []}  # still growing: no room for the warm-up
                    while carry and carry[0][0] <= fr.index:  # levels the earlier chunks found, from their frame on
                        _, key, state = carry.pop(0)
                        engine.carry_range({key: state})
                    if fast:
                        point = fr.index
                        try:
                            reg = engine.register_only(fr)
                        except FrameError:
                            continue  # the process that measures this frame reports it
                        if reg is not None:
                            if feed is not None:  # to the monitor, which measures these frames in full
                                batch.append((fr.index, fr.channel, fr.plane, reg))
                                if len(batch) >= _FEED_BATCH:
                                    feed.put(batch)
                                    batch = []
                            continue
                        fast = False  # a frame register_only cannot take: measured in full from here on
                    if fr.index >= job.first and digest_first is None:
                        digest_first = engine.split_digest()
                    try:
                        rows.extend(engine.process(fr))
                    except FrameError as err:
                        problems.append(str(err))
                if restart is None:
                    break
                frames.close()
                frames = frames_from(restart)
        finally:
            frames.close()
            if feed is not None and batch:
                feed.put(batch)
        if digest_first is None:
            digest_first = engine.split_digest()
        if job.stop is None:
            rows.extend(engine.flush())
        problems.extend(engine.take_problems())  # the warm-up's are the previous chunk's too: reported once
    keep = [r for r in rows if r["frame"] >= job.first and (job.stop is None or r["frame"] < job.stop)]
    events = [e for e in engine.take_events() if e.frame >= job.first and (job.stop is None or e.frame < job.stop)]
    out = {"rows": keep, "problems": problems, "events": events, "range_log": engine.range_log[own:],
           "range_end": engine.range_state(), "digest_first": digest_first}
    if job.stop is not None:
        out["digest_end"] = engine.split_digest()
        out["end_engine"] = pickle.dumps(engine, protocol=pickle.HIGHEST_PROTOCOL)
    return out


class RowContinuity:
    """Baseline, brightness % and bleach slope recomputed in order over rows from several processes.

    The brightness tracker is a function of the sequence ``(time_s, mean_f)`` of its stream alone, so feeding it
    every row in acquisition order gives exactly what one engine would have given.
    """

    def __init__(self, window_s: float):
        self.window_s = float(window_s)
        self._trackers: dict[tuple[int, int], BrightnessTracker] = {}
        self._rows: dict[tuple[int, int], int] = {}
        self._untimed: dict[tuple[int, int], bool] = {}  # no time base: the tracker runs on frames (as the engine)

    def apply(self, rows: list[dict]) -> list[dict]:
        for r in rows:
            key = (int(r["channel"]), int(r["plane"]))
            tr = self._trackers.get(key)
            t = float(r["time_s"])
            if tr is None:
                tr = self._trackers[key] = BrightnessTracker(window_s=self.window_s)
                self._untimed[key] = not math.isfinite(t)
            untimed = self._untimed[key]
            if untimed:
                t = int(r["frame"]) / UNTIMED_FRAMES_PER_S
            self._rows[key] = self._rows.get(key, 0) + 1
            if not math.isfinite(t):
                continue  # a row without a timestamp in a session timed by timestamps: the tracker waits
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)
                b = tr.update(t, float(r["mean_f"]))
            r.update(baseline_f=b.baseline_f, brightness_pct=b.brightness_pct,
                     bleach_pct_per_min=math.nan if untimed else b.bleach_pct_per_min,
                     level_step=b.step_factor)
        return rows

    def stream_info(self) -> dict[tuple[int, int], dict]:
        """Per stream, the facts of :meth:`qcmon.engine.Engine.stream_info` that depend on every row: frames
        measured and the whole-session bleach fit."""
        out = {}
        for key, tr in self._trackers.items():
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)
                fit = tr.session_fit()
            untimed = self._untimed.get(key, False)  # per minute needs a frame rate
            out[key] = {"frames": self._rows.get(key, 0),
                        "bleach_slope_pct_per_min": math.nan if untimed else fit.slope_pct_per_min,
                        "bleach_tau_min": math.nan if untimed else fit.tau_min, "bleach_r2": fit.r2}
        return out

    def forecast_min(self, channel: int, plane: int, loss_pct: float) -> float:
        """Minutes until the baseline has fallen by ``loss_pct`` at the current rate (NaN when unknown)."""
        tr = self._trackers.get((channel, plane))
        if tr is None or self._untimed.get((channel, plane)):
            return math.nan
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # no bleach rate yet: NaN
            return tr.forecast_min(loss_pct)


@dataclass
class SplitRun:
    """The monitor's side of a split: when to copy the engine, which chunk it measures itself, the workers."""

    workers: int
    path: str
    source_kwargs: dict
    frames_per_point: int
    window_s: float                                  # trailing window of the bleach slope (engine settings)
    warm_up: int | None = None                       # default: WARM_UP
    min_chunk: int | None = None                     # default: MIN_CHUNK
    started: set = field(default_factory=set)       # streams whose reference is built
    stop: int | None = None                          # first time point the monitor does not measure itself
    reading_done: bool = False
    _pool: ProcessPoolExecutor | None = None
    _futures: list[Future] = field(default_factory=list)
    _jobs: list[ChunkJob] = field(default_factory=list)
    _engine: object = None                           # the monitor's engine (it measures the first chunk)
    _log_at_launch: int = 0                          # its detector level changes before the copy
    _point: int = -1                                 # time point of the last frame measured (note_frame)
    _in_point: int = 0                               # frames of it measured
    _n_points: int | None = None                     # time points of the session
    _feed_q: object = None                           # registrations from the first worker (feed)
    _fed: bool = False                               # every reference final: no more of them
    measured_again: list = field(default_factory=list)  # first time points of chunks measured again from the
                                                         # previous chunk's engine (their worker's state differed)
    decided: bool = False

    @property
    def launched(self) -> bool:
        return bool(self._jobs)

    def __post_init__(self) -> None:
        self.warm_up = WARM_UP if self.warm_up is None else self.warm_up
        self.min_chunk = MIN_CHUNK if self.min_chunk is None else self.min_chunk
        self.continuity = RowContinuity(self.window_s)

    def note_rows(self, rows: list[dict]) -> None:
        for r in rows:
            self.started.add((int(r["channel"]), int(r["plane"])))

    def note_frame(self, index: int) -> None:
        """A frame of time point ``index`` went through the engine (in acquisition order)."""
        if index != self._point:
            self._point, self._in_point = index, 0
        self._in_point += 1

    def ready(self) -> bool:
        """The engine has built every stream's reference: time to decide on the split."""
        return not self.decided and len(self.started) >= self.frames_per_point

    def launch(self, engine, token: dict) -> int:
        """Plan the chunks and start the workers; returns how many processes measure (1: no split; 0: not yet).

        Once every reference is built but some still grow (:mod:`qcmon.metrics.reference_growth`), and the
        engine has just measured a whole time point, the workers start at once: each takes a copy of the engine,
        registers the frames up to where the references are final (:meth:`~qcmon.engine.Engine.register_only`,
        :data:`FAST_COST` of a frame's whole cost), then skips to its warm-up; the first chunk is longer by that
        work. Where that does not fit before the second chunk (0), the workers start once the references are
        final, with the engine as it is then."""
        s = engine.settings
        early = not engine.references_settled()
        if early and (self._in_point != self.frames_per_point or not engine.can_register_only()):
            return 0  # not at the end of a time point, or a copy cannot register only: wait for the final ones
        measured = engine.frames_measured  # the workers start later by this much: the first chunk is longer
        if self._n_points is None:  # a finished session: counted once
            self._n_points = count_frames(self.path, self.source_kwargs) // self.frames_per_point
        n_points = self._n_points
        if early:
            here = self._point + 1                                   # the copy continues from this time point
            final = here + engine.frames_to_final()                  # every reference final (no bad frame)
            # each worker registers up to the final references; the monitor measures those frames with the first
            # worker's registrations (feed): they cost it less
            extra = self.warm_up + here + int(math.ceil((FAST_COST + FED_SAVING) * (final - here)))
        else:
            here = final = measured
            extra = self.warm_up + measured
        chunks = plan_chunks(n_points, self.workers, warm_up=extra, min_chunk=self.min_chunk)
        if len(chunks) < 2 or chunks[1][0] - self.warm_up - s.z_every < max(final, 2 * s.reference_frames) \
                or min(b - a for a, b in chunks[1:]) < self.min_chunk // 2:
            if early:
                return 0  # perhaps once the references are final (the plan is then without their growth)
            self.decided = True
            self.close()  # processes started by prepare
            return 1
        self.decided = True
        blob = pickle.dumps(engine, protocol=pickle.HIGHEST_PROTOCOL)
        jobs = []
        for i, (a, b) in enumerate(chunks[1:], start=1):
            jobs.append(ChunkJob(path=self.path, source_kwargs=self.source_kwargs, token=token,
                                 frames_per_point=self.frames_per_point,
                                 warm_from=here if early else warm_start(a, measured=measured, z_every=s.z_every,
                                                                         warm_up=self.warm_up),
                                 first=a, stop=None if i == len(chunks) - 1 else b, engine=blob,
                                 fast_from=here if early else None, warm_up=self.warm_up))
        if self._pool is None:
            self._start_pool(len(jobs))
        if early:  # the first worker sends its registrations of the frames before the final reference (feed)
            jobs[0].feed = True
        self._jobs = jobs
        self._engine, self._log_at_launch = engine, len(engine.range_log)
        self._futures = [self._pool.submit(measure_chunk, j) for j in jobs]
        self.stop = chunks[0][1]
        return len(chunks)

    def prepare(self) -> None:
        """Start the worker processes now (the monitor's engine builds its first references meanwhile), if the
        session is long enough to be split at all: started and with qcmon loaded when the engine is copied, the
        first worker registers ahead of the monitor from the start (see :meth:`feed`)."""
        if self._pool is not None or self.decided:
            return
        if self._n_points is None:
            self._n_points = count_frames(self.path, self.source_kwargs) // self.frames_per_point
        if len(plan_chunks(self._n_points, self.workers, warm_up=0, min_chunk=self.min_chunk)) < 2:
            return
        self._start_pool(self.workers - 1)
        for _ in range(self.workers - 1):
            self._pool.submit(_load_qcmon)

    def _start_pool(self, n: int) -> None:
        ctx = multiprocessing.get_context("spawn")
        self._feed_q = ctx.Queue()
        self._pool = ProcessPoolExecutor(max_workers=n, mp_context=ctx, initializer=_worker_init,
                                         initargs=(self._feed_q,))

    def feed(self, engine) -> None:
        """Before the monitor's engine measures a frame: hand it the registrations the first worker has sent so
        far (frames the worker registered while its references grew, :meth:`Engine.register_only`), so that it
        need not register them itself; once every reference is final, stop."""
        if self._feed_q is None or self._fed:
            return
        if engine.references_settled():
            engine.give_registrations(None)
            self._fed = True
            return
        while True:
            try:
                batch = self._feed_q.get_nowait()
            except queue.Empty:
                return
            engine.give_registrations(batch)

    def results(self):
        """Each chunk's result, in chunk order (blocks). A chunk whose worker failed (e.g. the process was
        killed) is measured again in this process, with a problem message saying so: no row is lost. So is a
        chunk whose worker did not have the detector levels the chunks before it found, and a chunk whose worker
        started before the references were final and did not reach, at its first frame, the state one process has
        there (:meth:`~qcmon.engine.Engine.split_digest`: a brightness step or a dark level found in the frames it
        only registered, a level found in the frames it skipped): that one is measured again from the engine of
        the chunk before it, as it was after that chunk's last frame — one process's state (see the module
        notes)."""
        # the level changes after the copy, as one process makes them: the first chunk's (the monitor's engine has
        # measured it by now), then each accepted chunk's own
        log = [e for e in self._engine.range_log[self._log_at_launch:] if self.stop is None or e[0] < self.stop]
        end_state = None
        # one process's state before the next chunk: the monitor's engine after the first chunk, then each chunk's
        prev_digest = self._engine.split_digest()
        prev_engine = None  # pickled; None: the monitor's engine (pickled only if needed)

        def again(job: ChunkJob) -> dict:
            blob = prev_engine if prev_engine is not None else pickle.dumps(self._engine,
                                                                            protocol=pickle.HIGHEST_PROTOCOL)
            return measure_chunk(dataclasses.replace(job, engine=blob, warm_from=job.first, fast_from=None,
                                                     range_log=None, feed=False))

        try:
            for job, fut in zip(self._jobs, self._futures):
                try:
                    res = fut.result()
                except Exception as err:  # noqa: BLE001 - a broken pool raises several types
                    res = again(job) if job.fast_from is not None else measure_chunk(job)
                    res["problems"].insert(0, f"worker for time points {job.first}-"
                                              f"{'end' if job.stop is None else job.stop - 1} failed ({err!r}); "
                                              "measured again in the main process")
                if job.fast_from is not None:
                    if res.get("redo") or res.get("digest_first") != prev_digest:
                        problems = res["problems"]
                        res = again(job)
                        res["problems"] = problems
                        self.measured_again.append(job.first)
                else:
                    before = [e for e in log if e[0] < job.first]
                    if before != [e for e in res.get("range_log", []) if e[0] < job.first]:
                        # the worker's levels at its chunk are not those of one process: measure it again with them
                        problems = res["problems"]
                        res = measure_chunk(dataclasses.replace(job, range_log=before))
                        res["problems"] = problems
                log += [e for e in res.get("range_log", []) if e[0] >= job.first]
                end_state = res.get("range_end", end_state)
                prev_digest, prev_engine = res.pop("digest_end", None), res.pop("end_engine", None)
                yield res
            if end_state is not None:
                self._engine.carry_range(end_state)  # the summary's levels are the session's last
        finally:
            self.close()

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None
        if self._feed_q is not None:
            self._feed_q.close()
            self._feed_q = None
