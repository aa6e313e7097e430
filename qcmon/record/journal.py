"""The per-session record: ``traces.csv`` and ``events.jsonl`` appended as they are measured.

Nothing measured is lost: rows and events are handed to the operating system as soon as they are appended
(``flush``) and forced to the disk (``os.fsync``) at most about once per second, so a crash, ``kill -9`` or power
cut loses at most the last second. A crash in the middle of a line leaves a partial last line; reopening the
folder (``resume=True``) cuts that partial line off and keeps every complete row.

Files written (in the session's output folder, never in the microscope's folder):

=================  =========================================================================================
``traces.csv``     one row per frame; header = :data:`qcmon.columns.NAMES`; floats written with ``repr`` (exact
                   round trip), unknown values (NaN) as empty fields
``events.jsonl``   one :class:`qcmon.events.Event` per line (:meth:`~qcmon.events.Event.to_json`); notes of
                   the experimenter are events of kind ``"note"``
``session.json``   acquisition facts, profile name and engine results (photon transfer) that the summary needs;
                   written atomically with :meth:`SessionRecord.write_info`
=================  =========================================================================================
"""

from __future__ import annotations

import csv
import errno
import fcntl
import io
import json
import math
import os
import shutil
import tempfile
import time
from pathlib import Path
from typing import Iterable, Mapping, Sequence

import numpy as np

from qcmon.columns import BY_NAME, NAMES
from qcmon.errors import QcmonError
from qcmon.events import Event

__all__ = [
    "EVENTS_FILE",
    "EXCLUDE_FILE",
    "INFO_FILE",
    "RECORD_FILES",
    "REFERENCE_FILE",
    "REPORT_FILE",
    "SUMMARY_FILE",
    "TRACES_FILE",
    "LOCK_FILE",
    "SessionRecord",
    "read_events",
    "read_info",
    "read_traces",
    "rows_to_traces",
    "write_atomic",
    "write_atomic_set",
]

TRACES_FILE = "traces.csv"
EVENTS_FILE = "events.jsonl"
INFO_FILE = "session.json"
SUMMARY_FILE = "summary.json"
EXCLUDE_FILE = "exclude.csv"
REFERENCE_FILE = "reference.tif"
REPORT_FILE = "report.html"
#: Every file qcmon writes into an output folder (``--restart`` sets these aside, nothing else).
RECORD_FILES = (TRACES_FILE, EVENTS_FILE, INFO_FILE, SUMMARY_FILE, EXCLUDE_FILE, REFERENCE_FILE, REPORT_FILE)
#: Held locked (``fcntl.flock``) by the one process writing the record; the kernel releases it when that process
#: ends in any way (a crash or ``kill -9`` cannot leave it stuck). Holds that process's id, for the message.
LOCK_FILE = ".qcmon.lock"

#: Seconds between forced writes to the disk (os.fsync).
SYNC_INTERVAL_S = 1.0

_INT_MISSING = -1


def _folder_error(folder: Path, exc: OSError, doing: str) -> QcmonError:
    if exc.errno == errno.ENOSPC:
        why = "the disk is full"
    elif exc.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        why = "the folder is read-only or not writable"
    else:
        why = exc.strerror or str(exc)
    return QcmonError(f"{folder}: cannot {doing}: {why}; choose another output folder "
                      "(the files already written there are left as they were)")


def _umask() -> int:
    """The process's file-mode creation mask (read from /proc where it is shown, else set and restored)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def write_atomic(path: str | os.PathLike, data: str | bytes) -> Path:
    """Replace ``path`` with ``data`` all at once: a reader sees the old file or the new one, never a mixture.

    Writes a temporary file in the same folder, forces it to the disk, renames it over ``path``
    (``os.replace``) and forces the folder entry to the disk.

    Parameters
    ----------
    path : path-like
    data : str or bytes
        Text is written as UTF-8.

    Returns
    -------
    pathlib.Path
        ``path``.

    Raises
    ------
    QcmonError
        The folder is read-only, full or missing; ``path`` is then unchanged.
    """
    path = Path(path)
    folder = path.parent
    payload = data.encode("utf-8", "backslashreplace") if isinstance(data, str) else bytes(data)
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
        # mkstemp makes the file 0600; the record's files follow the umask like those opened with open()
        os.fchmod(fd, 0o666 & ~_umask())
        with os.fdopen(fd, "wb") as fh:
            fh.write(payload)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
        tmp = None
        _sync_dir(folder)
        return path
    except OSError as exc:
        raise _folder_error(folder, exc, f"write {path.name}") from None
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass


def _sync_dir(folder: Path) -> None:
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:  # some file systems do not sync folders
        pass
    finally:
        os.close(fd)


def write_atomic_set(folder: str | os.PathLike, files: Mapping[str, str | bytes]) -> dict[str, Path]:
    """Replace several files of ``folder`` as one set: either all of them are new, or all stay as they were.

    Every file is first written in full to a temporary file in ``folder`` and forced to the disk; only when all
    of them are there are they renamed over the old ones (``os.replace``, which needs no new space). A full disk
    or a missing folder while writing leaves the old set untouched and no temporary file behind.

    Parameters
    ----------
    folder : path-like
    files : mapping of str to str or bytes
        File name (in ``folder``) → content; text is written as UTF-8.

    Returns
    -------
    dict of str to pathlib.Path
        Name → path of each file written.

    Raises
    ------
    QcmonError
        The folder is read-only, full or missing (the old files are then unchanged).
    """
    folder = Path(folder)
    temps: dict[str, str] = {}
    try:
        for name, data in files.items():
            payload = data.encode("utf-8") if isinstance(data, str) else bytes(data)
            fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=folder)
            temps[name] = tmp
            with os.fdopen(fd, "wb") as fh:
                fh.write(payload)
                fh.flush()
                os.fsync(fh.fileno())
            os.chmod(tmp, 0o666 & ~_umask())
        for name, tmp in list(temps.items()):
            os.replace(tmp, folder / name)
            del temps[name]
        _sync_dir(folder)
    except OSError as exc:
        raise _folder_error(folder, exc, "write " + ", ".join(files)) from None
    finally:
        for tmp in temps.values():
            try:
                os.unlink(tmp)
            except OSError:
                pass
    return {name: folder / name for name in files}


def _cut_partial_line(path: Path) -> int:
    """Truncate ``path`` after its last newline; return the number of bytes removed."""
    size = path.stat().st_size
    if size == 0:
        return 0
    with open(path, "rb+") as fh:
        block = 1 << 16
        pos = size
        while pos > 0:
            start = max(0, pos - block)
            fh.seek(start)
            chunk = fh.read(pos - start)
            nl = chunk.rfind(b"\n")
            if nl >= 0:
                keep = start + nl + 1
                break
            pos = start
        else:
            keep = 0
        if keep < size:
            fh.truncate(keep)
            fh.flush()
            os.fsync(fh.fileno())
        return size - keep


_KINDS = {c.name: c.kind for c in BY_NAME.values()}


def _format_value(name: str, value: object) -> str:
    if value is None:
        return ""
    kind = _KINDS.get(name, "float")
    if kind == "float" and type(value) is float:
        return "" if value != value else repr(value)
    if kind == "str":
        return str(value).replace("\r", " ").replace("\n", " ")
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"row: column {name!r} must be a number, got {value!r}") from None
    if math.isnan(v):
        return ""
    if kind == "int":
        return str(int(v))
    return repr(v)


def set_aside_record(out_dir: Path) -> Path:
    """Move the record files in ``out_dir`` into a new subfolder ``earlier-YYYYMMDD-HHMMSS`` and return it."""
    stamp = time.strftime("%Y%m%d-%H%M%S")
    dest = out_dir / f"earlier-{stamp}"
    n = 1
    while dest.exists():
        n += 1
        dest = out_dir / f"earlier-{stamp}-{n}"
    try:
        dest.mkdir()
        for name in RECORD_FILES:
            if (out_dir / name).exists():
                os.replace(out_dir / name, dest / name)
    except OSError as exc:
        raise _folder_error(out_dir, exc, "set the earlier record aside") from None
    return dest


class SessionRecord:
    """Appends a session's traces and events to an output folder.

    Parameters
    ----------
    out_dir : path-like
        Created if missing. Must not be the microscope's data folder.
    resume : bool, default True
        Continue an existing record: a partial last line (crash while writing) is cut off and new rows are
        appended; :meth:`last_frames` tells where each (channel, plane) stopped. With ``resume=False`` an
        existing record raises :class:`QcmonError` unless ``set_aside=True``.
    set_aside : bool, default False
        With ``resume=False``: move an existing record's files (:data:`RECORD_FILES`) into a new subfolder
        ``earlier-YYYYMMDD-HHMMSS`` and start a new record; nothing measured before is deleted.

    Raises
    ------
    QcmonError
        The folder cannot be written (read-only, full), or an existing ``traces.csv`` has other columns.
    """

    def __init__(self, out_dir: str | os.PathLike, *, resume: bool = True, set_aside: bool = False):
        self.out_dir = Path(out_dir)
        self.traces_path = self.out_dir / TRACES_FILE
        self.events_path = self.out_dir / EVENTS_FILE
        self._last_frames: dict[tuple[int, int], int] = {}
        self._last_sync = time.monotonic()
        self._closed = False
        self._lock = None
        #: What happened to the output folder behind qcmon's back (e.g. deleted and recreated), one message each;
        #: the monitor reports them as problems (:meth:`take_notices`).
        self.notices: list[str] = []
        try:
            self.out_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise _folder_error(self.out_dir, exc, "create the output folder") from None
        self._lock = _lock_record(self.out_dir)
        try:
            self._open(resume, set_aside)
        except BaseException:
            self._lock.close()  # releases the lock
            raise

    def _open(self, resume: bool, set_aside: bool) -> None:
        exists = self.traces_path.exists() and self.traces_path.stat().st_size > 0
        exists_ev = self.events_path.exists() and self.events_path.stat().st_size > 0
        self.set_aside_to: Path | None = None
        if (exists or exists_ev) and not resume:
            if not set_aside:
                raise QcmonError(f"{self.out_dir}: already holds a session record ({TRACES_FILE}, {EVENTS_FILE}); "
                                 "resume it, or choose another output folder")
            self.set_aside_to = set_aside_record(self.out_dir)
        mode = "a+b" if resume else "w+b"  # readable too: a deleted folder is rebuilt from the open files
        try:
            if resume and exists:
                _cut_partial_line(self.traces_path)
                self._check_header()
                tr = read_traces(self.traces_path, columns=("frame", "channel", "plane"))
                for ch, pl, fr in zip(tr["channel"], tr["plane"], tr["frame"]):
                    key = (int(ch), int(pl))
                    if fr > self._last_frames.get(key, -1):
                        self._last_frames[key] = int(fr)
            if resume and exists_ev:
                _cut_partial_line(self.events_path)
            self._traces = open(self.traces_path, mode)
            self._events = open(self.events_path, mode)
            if self._traces.tell() == 0:
                self._traces.write((",".join(NAMES) + "\n").encode("utf-8"))
                self._sync(force=True)
        except OSError as exc:
            raise _folder_error(self.out_dir, exc, "write the session record") from None

    def _check_header(self) -> None:
        with open(self.traces_path, encoding="utf-8", newline="") as fh:
            header = next(csv.reader([fh.readline()]), [])
        if tuple(header) != NAMES:
            raise QcmonError(f"{self.traces_path}: its columns differ from this version of qcmon's; "
                             "cannot append to it — choose another output folder")

    # -- writing -----------------------------------------------------------------------------------------
    def append_rows(self, rows: Iterable[Mapping[str, object]]) -> None:
        """Append measurement rows (dicts keyed by :data:`qcmon.columns.NAMES`; missing keys are unknown)."""
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        for row in rows:
            writer.writerow([_format_value(n, row.get(n)) for n in NAMES])
            key = (int(row.get("channel", 0)), int(row.get("plane", 0)))
            fr = row.get("frame")
            if fr is not None and not (isinstance(fr, float) and math.isnan(fr)):
                self._last_frames[key] = max(self._last_frames.get(key, -1), int(fr))
        self._write(self._traces, buf.getvalue())

    def append_row(self, row: Mapping[str, object]) -> None:
        """Append one measurement row."""
        self.append_rows((row,))

    def append_event(self, event: Event) -> None:
        """Append one event (threshold event, note, new reference, skipped problem)."""
        self._write(self._events, event.to_json() + "\n")

    def append_events(self, events: Iterable[Event]) -> None:
        """Append several events."""
        text = "".join(ev.to_json() + "\n" for ev in events)
        if text:
            self._write(self._events, text)

    def write_info(self, *, facts: Mapping | None = None, profile: str | None = None,
                   extra: Mapping | None = None) -> None:
        """Store what the summary needs besides traces and events (atomically, in ``session.json``).

        Parameters
        ----------
        facts : mapping, optional
            ``AcquisitionFacts.as_dict()``: ``{key: {"value": ..., "origin": ...}}``.
        profile : str, optional
            Name or path of the threshold profile.
        extra : mapping, optional
            Results of the engine merged into the summary (e.g. ``{"photon_transfer": {"gain": ..., ...}}``).
        """
        info = read_info(self.out_dir)
        if facts is not None:
            info["facts"] = dict(facts)
        if profile is not None:
            info["profile"] = str(profile)
        if extra is not None:
            info["extra"] = dict(extra)
        write_atomic(self.out_dir / INFO_FILE, json.dumps(info, indent=1, ensure_ascii=False, default=_json_default))

    def _write(self, fh, text: str) -> None:
        if self._closed:
            raise QcmonError(f"{self.out_dir}: the session record is closed")
        try:
            fh.write(text.encode("utf-8", "backslashreplace"))  # never lose a row over one odd character
            fh.flush()
            self._sync()
        except OSError as exc:
            raise _folder_error(self.out_dir, exc, "append to the session record") from None

    def _sync(self, *, force: bool = False) -> None:
        now = time.monotonic()
        if force or now - self._last_sync >= SYNC_INTERVAL_S:
            for fh in (getattr(self, "_traces", None), getattr(self, "_events", None)):
                if fh is not None:
                    fh.flush()
                    os.fsync(fh.fileno())
            self._last_sync = now
            self._check_folder()

    def _check_folder(self) -> None:
        """Once per forced write: are the open files still the ones in the output folder? When the folder (or a
        record file) was deleted or replaced, recreate it and copy everything recorded so far into it from the
        open files (which the system keeps while they are open), so that no row is lost; say so in
        :attr:`notices`."""
        if not hasattr(self, "_events"):
            return
        gone = []
        for path, fh in ((self.traces_path, self._traces), (self.events_path, self._events)):
            try:
                same = os.stat(path).st_ino == os.fstat(fh.fileno()).st_ino
            except FileNotFoundError:
                same = False
            if not same:
                gone.append(path.name)
        if not gone:
            return
        folder_gone = not self.out_dir.is_dir()
        try:
            self.out_dir.mkdir(parents=True, exist_ok=True)
            if folder_gone:
                self._lock.close()
                self._lock = _lock_record(self.out_dir)
            kept = []
            for attr, path in (("_traces", self.traces_path), ("_events", self.events_path)):
                old = getattr(self, attr)
                old.flush()
                old.seek(0)
                new = open(path, "x+b" if not path.exists() else "a+b")
                if new.tell() == 0 and path.name in gone:
                    shutil.copyfileobj(old, new)
                new.flush()
                os.fsync(new.fileno())
                old.close()
                setattr(self, attr, new)
                kept.append(new.tell())
            _sync_dir(self.out_dir)
        except OSError as exc:
            raise _folder_error(self.out_dir, exc, "recreate the deleted session record") from None
        what = "the output folder was deleted" if folder_gone else f"{', '.join(gone)} deleted or replaced"
        self.notices.append(f"{self.out_dir}: {what} while recording; recreated it with everything recorded so far "
                            f"({self._count_rows()} rows); the summary and report are written at the end")

    def _count_rows(self) -> int:
        fh = self._traces
        fh.flush()
        pos = fh.tell()
        fh.seek(0)
        n = sum(block.count(b"\n") for block in iter(lambda: fh.read(1 << 20), b""))
        fh.seek(pos)
        return max(0, n - 1)

    def take_notices(self) -> list[str]:
        """The :attr:`notices` not taken yet."""
        out, self.notices = self.notices, []
        return out

    def maybe_flush(self) -> None:
        """Force the record to the disk if the last forced write is about a second old (call it when idle)."""
        if not self._closed:
            try:
                self._sync()
            except OSError as exc:
                raise _folder_error(self.out_dir, exc, "write the session record") from None

    def flush(self) -> None:
        """Force everything appended so far to the disk now."""
        try:
            self._sync(force=True)
        except OSError as exc:
            raise _folder_error(self.out_dir, exc, "write the session record") from None

    def close(self) -> None:
        """Flush and close the files and release the record's lock (idempotent). Raises :class:`QcmonError` if
        the last rows could not be written; the files are closed and the lock released all the same."""
        if self._closed:
            return
        try:
            self._sync(force=True)
        except OSError as exc:
            raise _folder_error(self.out_dir, exc, "write the session record") from None
        finally:
            self._closed = True
            for fh in (self._traces, self._events, self._lock):
                try:
                    fh.close()
                except OSError:  # what could not be written (full disk) was reported by the write itself
                    pass

    def __enter__(self) -> "SessionRecord":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- reading -----------------------------------------------------------------------------------------
    def last_frames(self) -> dict[tuple[int, int], int]:
        """Last frame index recorded per (channel, plane), to resume after it."""
        return dict(self._last_frames)

    def read_traces(self, path: str | os.PathLike | None = None) -> dict[str, np.ndarray]:
        """Columns of this record's ``traces.csv`` (or of ``path``); see :func:`read_traces`."""
        return read_traces(self.traces_path if path is None else path)

    def read_events(self, path: str | os.PathLike | None = None) -> list[Event]:
        """Events of this record's ``events.jsonl`` (or of ``path``); see :func:`read_events`."""
        return read_events(self.events_path if path is None else path)


def _lock_record(out_dir: Path):
    """Lock ``out_dir``'s record for this process (:data:`LOCK_FILE`) or raise QcmonError naming the holder."""
    path = out_dir / LOCK_FILE
    try:
        fh = open(path, "a+")
    except OSError as exc:
        raise _folder_error(out_dir, exc, "write the session record") from None
    try:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError as exc:
        fh.seek(0)
        holder = fh.read(40).strip()
        fh.close()
        if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
            who = f"qcmon process {holder}" if holder.isdigit() else "another qcmon process"
            raise QcmonError(f"{out_dir}: {who} is already writing this record (two would mix their rows); "
                             "wait for it to end, or give another output folder with --out") from None
        raise _folder_error(out_dir, exc, "lock the session record") from None
    try:
        fh.truncate(0)
        fh.write(f"{os.getpid()}\n")
        fh.flush()
    except OSError:
        pass  # the lock holds without the process id
    return fh


def _json_default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, (tuple, set)):
        return list(obj)
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot write {type(obj).__name__} to JSON")


def _empty_column(name: str, n: int) -> np.ndarray:
    kind = BY_NAME[name].kind if name in BY_NAME else "float"
    if kind == "int":
        return np.full(n, _INT_MISSING, dtype=np.int64)
    if kind == "str":
        return np.full(n, "", dtype=object)
    return np.full(n, np.nan)


def _convert(name: str, values: Sequence[str]) -> np.ndarray:
    kind = BY_NAME[name].kind if name in BY_NAME else "float"
    if kind == "str":
        return np.array(values, dtype=object)
    arr = np.array([float(v) if v else math.nan for v in values], dtype=np.float64)
    if kind == "int":
        out = np.full(arr.shape, _INT_MISSING, dtype=np.int64)
        ok = np.isfinite(arr)
        out[ok] = arr[ok].astype(np.int64)
        return out
    return arr


def read_traces(path: str | os.PathLike, *, columns: Sequence[str] | None = None) -> dict[str, np.ndarray]:
    """Read ``traces.csv`` into columns.

    Parameters
    ----------
    path : path-like
        A ``traces.csv`` or the folder holding it.
    columns : sequence of str, optional
        Only these columns (default: all of :data:`qcmon.columns.NAMES`).

    Returns
    -------
    dict of str to ndarray
        float64 columns (NaN for empty), int64 columns (-1 for empty), object columns for text. Columns the
        file lacks come back empty (NaN / -1 / ""). A partial last line (crash while writing) is ignored.

    Raises
    ------
    QcmonError
        The file is missing, not a qcmon traces file, or a row has an unreadable number (names file and line).
    """
    path = Path(path)
    if path.is_dir():
        path = path / TRACES_FILE
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise QcmonError(f"{path}: cannot read traces: {exc.strerror or exc}") from None
    cut = raw.rfind(b"\n")
    text = raw[: cut + 1].decode("utf-8", errors="replace") if cut >= 0 else ""
    rows = list(csv.reader(io.StringIO(text)))
    if not rows or "frame" not in rows[0]:
        raise QcmonError(f"{path}: not a qcmon traces file (no header with a 'frame' column)")
    header, body = rows[0], rows[1:]
    wanted = tuple(columns) if columns is not None else NAMES
    n = len(body)
    for i, r in enumerate(body):
        if len(r) != len(header):
            raise QcmonError(f"{path}: line {i + 2} has {len(r)} fields, the header has {len(header)}")
    index = {name: i for i, name in enumerate(header)}
    out: dict[str, np.ndarray] = {}
    for name in wanted:
        if name not in index:
            out[name] = _empty_column(name, n)
            continue
        j = index[name]
        try:
            out[name] = _convert(name, [r[j] for r in body])
        except ValueError as exc:
            raise QcmonError(f"{path}: column {name!r}: {exc}") from None
    return out


def rows_to_traces(rows: Iterable[Mapping[str, object]]) -> dict[str, np.ndarray]:
    """Measurement rows (dicts) to the columns :func:`read_traces` returns, with the same dtypes and values."""
    rows = list(rows)
    out: dict[str, np.ndarray] = {}
    for name in NAMES:
        out[name] = _convert(name, [_format_value(name, r.get(name)) for r in rows])
    return out


def read_events(path: str | os.PathLike) -> list[Event]:
    """Read ``events.jsonl`` (a file or the folder holding it); a partial last line is ignored.

    Raises
    ------
    QcmonError
        A complete line that is not an event (names file and line).
    """
    path = Path(path)
    if path.is_dir():
        path = path / EVENTS_FILE
    if not path.exists():
        return []
    raw = path.read_bytes()
    complete = raw[: raw.rfind(b"\n") + 1].decode("utf-8", errors="replace")
    events = []
    for i, line in enumerate(complete.splitlines(), start=1):
        if not line.strip():
            continue
        try:
            events.append(Event.from_json(line))
        except (ValueError, TypeError) as exc:
            raise QcmonError(f"{path}: line {i} is not an event: {exc}") from None
    return events


def read_info(out_dir: str | os.PathLike) -> dict:
    """Contents of ``session.json`` in ``out_dir`` (``{}`` when absent)."""
    path = Path(out_dir) / INFO_FILE
    if not path.exists():
        return {}
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise QcmonError(f"{path}: cannot read session information: {exc}") from None
