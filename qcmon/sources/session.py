"""A session's frames, live or after the fact, through one reader.

Which files belong to a session
-------------------------------
``path`` is a session folder or one file. In a folder (not its sub-folders) qcmon reads

- TIFF files: names ending ``.tif`` or ``.tiff`` in any letter case (OME-TIFF and BigTIFF included);
- raw streams: ``NAME.raw``, ``NAME.bin`` or ``NAME.dat`` (any case), described by ``NAME.toml`` beside them or
  by the options ``raw_dtype`` and ``raw_shape`` (see :mod:`qcmon.sources.raw`).

It ignores everything else, and also hidden files (names starting with ``.``, which includes ``._`` copies made
by some file servers) and temporary or lock files (names starting with ``~``); writers that write under a
temporary name and rename at the end are seen at the rename.

Files are read in *natural order*: the name is split into runs of digits and of other characters, digits compare
as numbers and text without regard to case, so ``run_2.tif`` comes before ``run_10.tif``; equal keys fall back
to the exact name. Pages run time -> plane -> channel: for each time point, for each plane, one page per channel
(OME ``DimensionOrder="XYZCT"`` swaps plane and channel), continuing from one file to the next.

Live reading
------------
Only complete pages are handed on (their directory, values and pixel data lie inside the file as it is now).
Files are read strictly in order; an incomplete file holds back the files after it. While the session runs, an
incomplete file is waited for, except that a file which has not changed for ``grace_s`` seconds *while a later
file exists* is reported as truncated and passed over (a writer does not come back to an earlier file), and a
complete page that fails to decode for ``grace_s`` seconds is reported and skipped. The last file is waited for
indefinitely (an armed acquisition may create its file long before the first trigger) until ``poll(final=True)``,
which reports everything still incomplete.

When a file is finished (a later file exists and this one was read to its end), it is not looked at again.
A file that appears after later files were read, or that shrinks, is reported and not read.
"""

from __future__ import annotations

import bisect
import math
import os
import re
import time
from collections.abc import Callable, Generator, Iterator

import numpy as np

from qcmon.errors import FrameError, NotReadyError, QcmonError, display_path
from qcmon.frames import AcquisitionFacts, Frame
from qcmon.sources.arrays import ArrayStream, container_kind
from qcmon.sources.metadata import FileMetadata, read_file_metadata
from qcmon.sources.raw import RAW_SUFFIXES, RawStream, parse_dtype
from qcmon.sources.tiffpages import TiffStream

TIFF_SUFFIXES = (".tif", ".tiff")
#: Intervals between one-frame files needed before their modification times give a frame rate.
RATE_MIN_FILES = 20
#: Frame rates an estimate may give (Hz); outside, the estimate is not used (a copy of the files, a slide scan).
RATE_RANGE_HZ = (1e-3, 1e4)
POSITION_FORMAT = "qcmon-position"
POSITION_VERSION = 1
OPTION = "option"
_DIGITS = re.compile(r"(\d+)")


def natural_key(name: str) -> tuple:
    """Sort key putting ``run_2.tif`` before ``run_10.tif`` (digit runs compare as numbers, text case-blind)."""
    parts = _DIGITS.split(name.casefold())
    return tuple(int(p) if i % 2 else p for i, p in enumerate(parts)), name


def is_ignored(name: str) -> bool:
    """True for hidden (``.``) and temporary/lock (``~``) names."""
    return name.startswith((".", "~"))


def _suffix(name: str) -> str:
    return os.path.splitext(name)[1].lower()


class SessionSource:
    """Frames of an imaging session, read as the microscope writes them or after it has finished.

    Parameters
    ----------
    path : str or path-like
        A session folder or a single TIFF file (or raw stream), or a container of image series: an HDF5 or NWB
        file or a Zarr folder (see :mod:`qcmon.sources.arrays`).
    dataset : str, optional
        The image series to read in a container (its name or the path of its array); needed when it holds
        several.
    channels, planes : int, optional
        Channels and planes interleaved in the pages, when the files do not say.
    raw_dtype : numpy dtype-like, optional
        Pixel type of raw streams without a sidecar ``dtype`` (unsigned integers only).
    raw_shape : (int, int), optional
        (height, width) of raw frames without sidecar ``height``/``width`` (px).
    frame_rate_hz : float, optional
        Time points per second (volumes per second when planes > 1), when the files do not say.
    pixel_size_um : float, optional
        Pixel size (µm), when the files do not say.
    start : dict, optional
        A token from :attr:`position`: reading resumes after the frames it records.
    on_problem : callable, optional
        Called with each :class:`~qcmon.errors.FrameError` (bad file or page); reading goes on. Problems are also
        collected in :attr:`problems`.
    override : bool
        False (default): options fill in what the files do not say; when a file says otherwise, the file wins and
        the disagreement is listed in :attr:`conflicts`. True: options win over file metadata.
    grace_s : float
        Seconds an incomplete file may stay unchanged while a later file exists (or a complete page may fail to
        decode) before it is reported and passed over (s).
    skip_frames : int
        Frames (pages that are not thumbnails, bad pages included) to pass over without decoding them, counted
        from ``start`` (or from the session's first frame); they still advance the numbering of time points,
        channels and planes. Lets a worker begin reading in the middle of a finished session.

    Notes
    -----
    Frames are numbered per (channel, plane): ``Frame.index`` is the time point. ``Frame.time_s`` comes from OME
    ``Plane/@DeltaT`` (seconds from the first frame) when the file has it, else NaN. Memory per open file is
    a few bytes per page (the directory offsets, to detect a corrupt looping chain).
    """

    def __init__(self, path, *, channels: int | None = None, planes: int | None = None, raw_dtype=None,
                 raw_shape=None, frame_rate_hz: float | None = None, pixel_size_um: float | None = None,
                 start: dict | None = None, on_problem: Callable[[FrameError], object] | None = None,
                 override: bool = False, grace_s: float = 30.0, skip_frames: int = 0, dataset: str | None = None):
        path = os.fspath(path)
        if not os.path.exists(path):
            raise ValueError(f"path: {path} does not exist")
        for name, value in (("channels", channels), ("planes", planes)):
            if value is not None and (isinstance(value, bool) or not isinstance(value, int) or value < 1):
                raise ValueError(f"{name}: must be a positive integer, got {value!r}")
        for name, value in (("frame_rate_hz", frame_rate_hz), ("pixel_size_um", pixel_size_um)):
            if value is not None and not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise ValueError(f"{name}: must be a positive number, got {value!r}")
        if raw_shape is not None:
            if len(raw_shape) != 2 or any(int(n) != n or n < 1 for n in raw_shape):
                raise ValueError(f"raw_shape: (height, width) in px expected, got {raw_shape!r}")
            raw_shape = (int(raw_shape[0]), int(raw_shape[1]))
        if not (grace_s >= 0):
            raise ValueError(f"grace_s: must be >= 0 s, got {grace_s!r}")
        self.path = path
        self._container = container_kind(path)
        if dataset is not None and self._container is None:
            raise QcmonError(f"--dataset {dataset}: {path} is not an HDF5, NWB or Zarr file; a dataset cannot be "
                             "chosen in it")
        self._dataset = dataset
        if self._container is not None:  # one file (a Zarr store is a folder) holding the session
            path = os.path.normpath(path)
            self._folder, self._single = os.path.dirname(path) or ".", os.path.basename(path)
        else:
            self._folder = path if os.path.isdir(path) else os.path.dirname(path) or "."
            self._single = None if os.path.isdir(path) else os.path.basename(path)
        self._raw_dtype = None if raw_dtype is None else parse_dtype(raw_dtype, what="raw_dtype")
        self._raw_shape = raw_shape
        self._options = {"channels": channels, "planes": planes, "frame_rate_hz": frame_rate_hz,
                         "pixel_size_um": pixel_size_um}
        self._override = bool(override)
        self.grace_s = float(grace_s)
        self._on_problem = on_problem
        #: Every problem met so far (bad files and pages that were skipped).
        self.problems: list[FrameError] = []
        #: Options that disagree with the files (the file's value is used unless ``override=True``).
        self.conflicts: list[str] = []
        #: Metadata present in the files that could not be used, with the reason.
        self.notes: list[str] = []
        self._reported: set[tuple[str, str]] = set()
        self._final_read = False
        #: (pages, modification time in ns) of each finished file, in order, while they may time the session
        self._file_times: list[tuple[int, int]] | None = []
        self._layout_checked = False
        self._names: dict[str, str] = {}  # file path -> the name shown in the record
        self._queue: list[tuple[tuple, str]] = []  # unfinished files in natural order
        self._streams: dict[str, TiffStream | RawStream | ArrayStream] = {}
        self._done: dict[str, int] = {}  # finished files -> pages consumed
        self._dead: dict[str, int] = {}  # files given up -> pages consumed
        self._frontier: tuple | None = None  # natural key of the latest file that was read from
        self._stall: dict[str, tuple[tuple[int, int], float]] = {}
        self._sizes: dict[str, int] = {}  # size of each queued file when last read (a shrinking file is rewritten)
        self._inodes: dict[str, tuple[int, int]] = {}  # (device, inode) of each queued file (another: replaced)
        self._count = 0  # pages met, in acquisition order (bad pages included: they hold a channel/plane slot)
        self._layout: tuple[int, int, bool] | None = None  # (channels, planes, plane_fastest)
        self._facts: AcquisitionFacts | None = None
        self._plane_fastest = False
        self._frame_kind: tuple[tuple[int, ...], np.dtype] | None = None
        self._kind_file: str | None = None  # the one file the frame size/type has come from, or None: several
        self._t0: float | None = None
        self._resume: dict[str, int] = {}
        if isinstance(skip_frames, bool) or not isinstance(skip_frames, int) or skip_frames < 0:
            raise ValueError(f"skip_frames: must be a non-negative integer, got {skip_frames!r}")
        self._skip_left = skip_frames
        if start is not None:
            self._restore(start)

    # ------------------------------------------------------------------ public
    def poll(self, final: bool = False, *, max_frames: int | None = None) -> list[Frame]:
        """Frames that became complete since the last call, in acquisition order.

        Parameters
        ----------
        final : bool
            The session has ended (batch reading, or the end of a watch): whatever is still incomplete is reported
            as a problem instead of being waited for.
        max_frames : int, optional
            Return at most this many frames (the rest come with the next calls); bounds memory on big sessions.

        Returns
        -------
        list of Frame
            Never the same frame twice, never skipping one.
        """
        return list(self.frames(final, max_frames=max_frames))

    def frames(self, final: bool = False, *, max_frames: int | None = None) -> Generator[Frame, None, None]:
        """:meth:`poll` one frame at a time, each read from its file when it is asked for.

        A frame measured as soon as it comes is still in the processor's cache: a loop over this is faster than
        one over :meth:`poll`'s list (whose frames, read all before the first is measured, are not). The file
        being read stays open, read-only, between the frames of one call. Stopping early is fine: a frame counts
        as read once it has been yielded, and the rest comes with the next call.
        """
        if max_frames is not None and max_frames < 1:
            raise ValueError(f"max_frames: must be >= 1, got {max_frames!r}")
        limit = math.inf if max_frames is None else max_frames
        self._final_read = final
        self._scan()
        given = 0
        while self._queue and given < limit:
            key, name = self._queue[0]
            stream = self._streams[name]
            is_last = len(self._queue) == 1
            path = stream.path
            try:
                st = os.stat(path)
            except OSError as exc:
                self._give_up(FrameError(f"cannot be read: {exc}", path=path))
                continue
            signature = (st.st_size, st.st_mtime_ns)
            if stream.signature is not None and signature == stream.signature:
                if is_last:
                    break  # nothing new
                self._finish()
                continue
            ident = self._inodes.setdefault(name, (st.st_dev, st.st_ino))
            if ident != (st.st_dev, st.st_ino):
                self._give_up(FrameError("replaced by another file of the same name while being read (another "
                                         "inode); the new file is not read, so that pages of two files are not "
                                         "mixed", path=path, page=stream.pages_done))
                continue
            seen = self._sizes.get(name, 0)
            if st.st_size < seen and stream.kind != "array":  # (a Zarr store is a folder: its size says nothing)
                self._give_up(FrameError(f"file shrank from {seen} to {st.st_size} bytes "
                                         "(rewritten?); not read further", path=path, page=stream.pages_done))
                continue
            self._sizes[name] = st.st_size
            stalled = self._stalled(name, signature)
            stream.skip_frames = self._skip_left
            items = stream.iter_read(min(limit - given, 1 << 30), give_up=final or stalled, on_open=self._opened)
            stop = None
            unopened = False
            try:
                while True:
                    try:
                        page, data = next(items)
                    except StopIteration as end:
                        stop = end.value
                        break
                    except PermissionError as exc:  # will not change by waiting: said once, frames behind go on
                        stop = FrameError(f"cannot be opened: {exc.strerror or exc} (qcmon's user may not read it); "
                                          "not read", path=path)
                        break
                    except OSError as exc:  # opening the file (reading errors are in ``stop``)
                        stop = NotReadyError(f"cannot be opened: {exc.strerror or exc}")
                        unopened = True
                        break
                    self._passed_over(stream)
                    frame = self._emit(stream, page, data)
                    if frame is not None:
                        given += 1
                        yield frame
            finally:  # also when the caller stops early: what was read is accounted for
                items.close()
                self._passed_over(stream)
                stream.skip_frames = 0
                if stream.pages_done and (self._frontier is None or key > self._frontier):
                    self._frontier = key
            if isinstance(stop, FrameError):
                self._give_up(stop)
                continue
            if isinstance(stop, NotReadyError):
                if final or (stalled and not is_last):
                    if unopened:  # e.g. no read permission: not a question of completeness
                        self._give_up(FrameError(str(stop), path=path))
                        continue
                    what = "file is incomplete (truncated?)" if not final else "file is incomplete at the end"
                    self._give_up(FrameError(f"{what}: {stop}", path=path, page=stream.pages_done))
                    continue
                if name not in self._stall or self._stall[name][0] != signature:
                    self._stall[name] = (signature, time.monotonic())
                break
            self._stall.pop(name, None)
            if given >= limit or stream.signature is None:
                break
            if is_last:
                break
            self._finish()
        if final and given < limit and not self._layout_checked and self._layout is not None:  # read through
            self._layout_checked = True
            n_c, n_z, _ = self._layout
            if n_c * n_z > 1 and self._count % (n_c * n_z):
                self._note(FrameError(
                    f"{self._count} pages do not divide into {n_c} channel(s) × {n_z} plane(s): the last time "
                    f"point is incomplete ({self._count % (n_c * n_z)} page(s) of it)", path=self.path))

    def _shown(self, path: str) -> str:
        """The file's name as the record shows it (:func:`~qcmon.errors.display_path`), worked out once a file."""
        shown = self._names.get(path)
        if shown is None:
            shown = self._names[path] = display_path(path)
        return shown

    def _passed_over(self, stream) -> None:
        """Count the frames ``stream`` passed over without decoding (``skip_frames``): they hold their slots."""
        self._count += self._skip_left - stream.skip_frames
        self._skip_left = stream.skip_frames

    def __iter__(self) -> Iterator[Frame]:
        """All frames of a finished session (``poll(final=True)`` in chunks of 64)."""
        while True:
            frames = self.poll(final=True, max_frames=64)
            if not frames:
                return
            yield from frames

    @property
    def facts(self) -> AcquisitionFacts:
        """Acquisition facts with their origin: from the first data file when it has been opened, plus options."""
        if self._facts is not None:
            return self._facts
        return self._merge_facts({})

    @property
    def position(self) -> dict:
        """A JSON-serialisable token of how far reading has got; pass it as ``start=`` to resume."""
        files = dict(self._done)
        files.update(self._dead)
        for _, name in self._queue:
            stream = self._streams[name]
            files[name] = stream.pages_done + stream.skip
        return {
            "format": POSITION_FORMAT,
            "version": POSITION_VERSION,
            "pages": self._count,
            "files": files,
            "given_up": sorted(self._dead),
            "layout": None if self._layout is None else list(self._layout),
            "frame": None if self._frame_kind is None else [list(self._frame_kind[0]), str(self._frame_kind[1])],
            "kind_file": self._kind_file,
            "t0": self._t0,
        }

    # ----------------------------------------------------------------- helpers
    def _restore(self, token: dict) -> None:
        if not isinstance(token, dict) or token.get("format") != POSITION_FORMAT:
            raise ValueError("start: not a position token of SessionSource")
        if token.get("version") != POSITION_VERSION:
            raise ValueError(f"start: position token version {token.get('version')} is not {POSITION_VERSION}")
        files = {str(k): int(v) for k, v in token["files"].items()}
        given_up = set(token.get("given_up", ()))
        self._count = int(token["pages"])
        if token.get("layout") is not None:
            c, z, fast = token["layout"]
            self._layout = (int(c), int(z), bool(fast))
        if token.get("frame") is not None:
            self._frame_kind = (tuple(token["frame"][0]), np.dtype(token["frame"][1]))
        self._kind_file = token.get("kind_file")
        self._t0 = token.get("t0")
        if not files:
            return
        ordered = sorted(files, key=natural_key)
        last = ordered[-1]
        for name in ordered[:-1]:
            (self._dead if name in given_up else self._done)[name] = files[name]
        if last in given_up:
            self._dead[last] = files[last]
        else:
            self._resume[last] = files[last]
        self._frontier = natural_key(last)

    def _scan(self) -> None:
        if self._single is not None:
            names = [self._single]
        else:
            names = []
            with os.scandir(self._folder) as it:
                for entry in it:
                    name = entry.name
                    if (is_ignored(name) or name in self._done or name in self._dead or name in self._streams
                            or _suffix(name) not in TIFF_SUFFIXES + RAW_SUFFIXES):
                        continue
                    try:
                        if entry.is_file():
                            names.append(name)
                        elif entry.is_symlink():
                            self._problem(FrameError("broken link (its target does not exist); not read",
                                                     path=entry.path))
                        elif entry.is_dir():
                            self._problem(FrameError("a folder, not a frame file; not read", path=entry.path))
                    except OSError:
                        continue
        for name in sorted(names, key=natural_key):
            if name in self._done or name in self._dead or name in self._streams:
                continue
            key = natural_key(name)
            full = os.path.join(self._folder, name)
            if self._frontier is not None and key < self._frontier:
                self._dead[name] = 0
                self._problem(FrameError("appeared after later files had been read; not read, to keep the "
                                         "acquisition order", path=full))
                continue
            if self._container is not None:
                stream = ArrayStream(full, dataset=self._dataset, channels=self._options["channels"],
                                     planes=self._options["planes"])
            elif _suffix(name) in RAW_SUFFIXES:
                stream = RawStream(full, dtype=self._raw_dtype, shape=self._raw_shape)
            else:
                stream = TiffStream(full)
            stream.skip = self._resume.pop(name, 0)
            self._streams[name] = stream
            bisect.insort(self._queue, (key, name))

    def _stalled(self, name: str, signature: tuple[int, int]) -> bool:
        record = self._stall.get(name)
        return record is not None and record[0] == signature and time.monotonic() - record[1] >= self.grace_s

    def _finish(self) -> None:
        """The first queued file is read to its end and a later file exists: it is not looked at again."""
        self._retire(self._done)

    def _give_up(self, err: FrameError) -> None:
        """Report ``err`` and stop reading the first queued file."""
        self._problem(err)
        self._retire(self._dead)

    def _retire(self, into: dict[str, int]) -> None:
        key, name = self._queue.pop(0)
        stream = self._streams.pop(name)
        into[name] = stream.pages_done + stream.skip
        if self._file_times is not None:
            if into is self._done and stream.signature is not None and not stream.skip:
                self._file_times.append((stream.pages_done, stream.signature[1]))
                self._estimate_rate()
            else:  # a gap in the files: their times no longer count the time points
                self._file_times = None
        self._stall.pop(name, None)
        self._sizes.pop(name, None)
        self._inodes.pop(name, None)
        self._frontier = key if self._frontier is None else max(self._frontier, key)

    def _problem(self, err: FrameError) -> None:
        tag = (err.path or "", err.reason)
        if tag in self._reported:
            return  # the same problem in the same file is reported once
        self._reported.add(tag)
        self.problems.append(err)
        if self._on_problem is not None:
            self._on_problem(err)

    def _estimate_rate(self) -> None:
        """The frame rate from the modification times of files of one time point each, once trustworthy.

        Used only when neither the files nor the options give a rate. Each file must hold exactly one time point
        (channels × planes pages); the intervals between consecutive files' modification times must be regular
        (at least 90 % within ±25 % of their median, none before its predecessor, and their mean within 10 % of
        the mean of those within the band: a writer that saves in bursts fails this) over at least
        :data:`RATE_MIN_FILES` intervals, and long against the clock's resolution (a copy that set every time
        anew, or a writer that saves in bursts, is not regular and gives no estimate). The rate is the inverse
        of the mean of the intervals within that band. Common practice, no source.
        """
        times = self._file_times
        if times is None or self._layout is None or len(times) < RATE_MIN_FILES + 1:
            return
        facts = self.facts
        if "frame_rate_hz" in facts.facts:
            self._file_times = None
            return
        per_point = self._layout[0] * self._layout[1]
        if any(n != per_point for n, _ in times):
            self._file_times = None  # files of several time points: their times do not count time points
            return
        ns = np.array([t for _, t in times], dtype=np.int64)
        steps = np.diff(ns).astype(float)
        median = float(np.median(steps))
        resolution = 1e9 if not (ns % 10**9).any() else 1e6 if not (ns % 10**6).any() else 1.0
        band = np.abs(steps - median) <= 0.25 * median
        if (steps <= 0).any() or median < 10 * resolution or band.mean() < 0.9:
            if len(times) >= 4 * RATE_MIN_FILES:
                self._file_times = None  # long enough to say they are not regular: stop looking
            return
        interval_s = float(steps[band].mean()) / 1e9
        if abs(float(steps.mean()) / 1e9 / interval_s - 1.0) > 0.1:  # the whole span must count the files too
            if len(times) >= 4 * RATE_MIN_FILES:
                self._file_times = None
            return
        hz = 1.0 / interval_s
        if not RATE_RANGE_HZ[0] <= hz <= RATE_RANGE_HZ[1]:
            self._file_times = None
            return
        spread = float(np.std(steps[band])) / 1e6
        self.set_estimated_rate(hz, f"estimated from the modification times of {len(times)} one-frame files "
                                    f"(interval {interval_s * 1e3:.4g} ms, s.d. {spread:.2g} ms)")
        self._file_times = None

    def set_estimated_rate(self, hz: float, origin: str) -> None:
        """Record a frame rate that was estimated (``origin`` says how); used only when none is known."""
        facts = self.facts
        if "frame_rate_hz" not in facts.facts:
            facts.set("frame_rate_hz", float(hz), origin)
            self._facts = facts

    def _note(self, err: FrameError) -> None:
        """Metadata that was not used, or disagrees with an option: said once, in :attr:`notes` and to
        ``on_problem``; reading goes on (not a bad file: not in :attr:`problems`)."""
        tag = (err.path or "", err.reason)
        if tag in self._reported:
            return
        self._reported.add(tag)
        self.notes.append(str(err))
        if self._on_problem is not None:
            self._on_problem(err)

    def _opened(self, stream, tif) -> None:
        if stream.meta is not None:
            return
        if tif is None and stream.kind == "array":
            stream.meta = stream.file_metadata()
        elif tif is None:
            stream.meta = FileMetadata(facts=stream.sidecar_facts(), plane_fastest=False)
        else:
            try:
                stream.meta = read_file_metadata(tif)
            except Exception as exc:  # noqa: BLE001 - metadata is optional; never stop reading for it
                stream.meta = FileMetadata(notes=[f"metadata cannot be read: {exc}"])
        meta = stream.meta
        if self._facts is None and tif is not None and meta.declared_pages is not None and self._final_read:
            # a finished file: the pages it holds must be those its metadata declare, else its layout is a guess
            try:
                n_pages = len(tif.pages)
            except Exception:  # noqa: BLE001 - a corrupt chain is reported when its page is read
                n_pages = None
            if n_pages is not None and n_pages != meta.declared_pages:
                meta.drop_layout(f"the metadata declare {meta.declared_pages} pages but the file holds {n_pages}")
        for note in meta.notes:
            self._note(FrameError(f"metadata not used: {note}", path=stream.path))
        if self._facts is None:
            self._facts = self._merge_facts(stream.meta.facts)
            for conflict in self.conflicts:
                self._note(FrameError(conflict, path=stream.path))
            self._plane_fastest = bool(stream.meta.plane_fastest)

    def _merge_facts(self, file_facts: dict) -> AcquisitionFacts:
        facts = AcquisitionFacts()
        options = {k: v for k, v in self._options.items() if v is not None}
        if self._override:
            for key, value in options.items():
                facts.set(key, value, OPTION)
        for key, (value, origin) in file_facts.items():
            if key in options and not self._override and not _same(options[key], value):
                self.conflicts.append(f"option {key}={options[key]!r} differs from {origin} {value!r}; "
                                      f"the file's value is used")
            facts.set(key, value, origin)
        for key, value in options.items():
            facts.set(key, value, OPTION)
        if "bit_depth" not in facts.facts and facts.get("dtype") is not None:
            try:
                facts.set("bit_depth", np.dtype(facts.get("dtype")).itemsize * 8, "dtype")
            except TypeError:  # a damaged page directory: no dtype to speak of (its pages are reported)
                pass
        return facts

    def _emit(self, stream, page: int, data) -> Frame | None:
        """The frame of an item read from ``stream`` (None for a thumbnail or a page reported as a problem)."""
        if data is None:
            return None  # a thumbnail page: not a frame
        if self._layout is None:
            facts = self.facts
            self._layout = (int(facts.get("channels", 1)), int(facts.get("planes", 1)),
                            self._plane_fastest)
        n_c, n_z, plane_fastest = self._layout
        n = self._count
        self._count += 1
        if plane_fastest:
            plane, channel = n % n_z, (n // n_z) % n_c
        else:
            channel, plane = n % n_c, (n // n_c) % n_z
        index = n // (n_c * n_z)
        if isinstance(data, FrameError):
            self._problem(data)
            return None
        kind = (data.shape, data.dtype)  # str(dtype) would cost 8 µs a frame
        if self._frame_kind is None:
            self._frame_kind, self._kind_file = kind, stream.path
        elif kind == self._frame_kind:
            if self._kind_file is not None and stream.path != self._kind_file:
                self._kind_file = None  # a second file of this size: it is the session's
        elif page == 0 and self._kind_file is not None and self._kind_file != stream.path \
                and kind[1] == self._frame_kind[1]:
            # Only the first file had the earlier size (a test scan before the session, say): the session goes on
            # with the new size from this file on; the first file's frames keep their rows. A change after a second
            # file of the same size is the session's own (skipped pages, as a change of pixel type always is).
            self._problem(FrameError(
                f"frame size/type changes from {self._frame_kind[0]} {self._frame_kind[1]} (the first file, "
                f"{self._kind_file}) to {kind[0]} {kind[1]}; measured anew from here", path=stream.path, page=page))
            self._frame_kind, self._kind_file = kind, None
        else:
            self._problem(FrameError(
                f"frame size/type changed from {self._frame_kind[0]} {self._frame_kind[1]} to {kind[0]} {kind[1]}; "
                "such pages are skipped", path=stream.path, page=page))
            return None
        time_s = math.nan
        if stream.meta is not None:
            stamp = stream.meta.timestamp(page)
            if math.isfinite(stamp):
                if self._t0 is None:
                    self._t0 = stamp
                time_s = stamp - self._t0
        return Frame(data, index, channel=channel, plane=plane, time_s=time_s, source=self._shown(stream.path), page=page)


def _same(a, b) -> bool:
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return math.isclose(a, b, rel_tol=1e-6)
    return a == b
