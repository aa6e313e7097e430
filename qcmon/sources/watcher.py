"""Waking a reader when a session folder changes.

Two watchdog backends: the operating system's change notification (inotify on Linux; the default), or a polling
observer that compares directory snapshots every ``poll_interval_s`` seconds (``--poll SECONDS``). Use polling on
network shares: change notification sees nothing of writes made by another machine. The polling backend never
reports that a file was closed, so completeness is always judged from the file itself
(:class:`~qcmon.sources.SessionSource` does that); the watcher only says *when* to look.
"""

from __future__ import annotations

import math
import os
import threading
import time
from collections.abc import Iterator

from watchdog.events import (
    EVENT_TYPE_CLOSED,
    EVENT_TYPE_CREATED,
    EVENT_TYPE_MODIFIED,
    EVENT_TYPE_MOVED,
    FileSystemEvent,
    FileSystemEventHandler,
)
from watchdog.observers import Observer
from watchdog.observers.polling import PollingObserver

from qcmon.frames import Frame

#: Events that mean "there may be new data". Opening a file and closing it without writing (which qcmon's own
#: reads cause) are not among them.
WAKING_EVENTS = frozenset({EVENT_TYPE_CREATED, EVENT_TYPE_MODIFIED, EVENT_TYPE_CLOSED, EVENT_TYPE_MOVED})


class _Wake(FileSystemEventHandler):
    def __init__(self, flag: threading.Event):
        super().__init__()
        self._flag = flag

    def on_any_event(self, event: FileSystemEvent) -> None:
        if event.event_type in WAKING_EVENTS:
            self._flag.set()


class FolderWatcher:
    """A context manager that wakes a consumer when files in a folder are created, written, closed or moved.

    Parameters
    ----------
    path : str or path-like
        The session folder (or a file: its folder is watched). Not recursive.
    poll_interval_s : float, optional
        None (default): the operating system's change notification. A number: poll the folder every so many
        seconds instead (network shares).

    Examples
    --------
    >>> with FolderWatcher(folder) as watcher:          # doctest: +SKIP
    ...     while not done:
    ...         watcher.wait(1.0)
    ...         frames = source.poll()
    """

    def __init__(self, path, *, poll_interval_s: float | None = None):
        path = os.fspath(path)
        if not os.path.exists(path):
            raise ValueError(f"path: {path} does not exist")
        if poll_interval_s is not None and not (math.isfinite(poll_interval_s) and poll_interval_s > 0):
            raise ValueError(f"poll_interval_s: must be a positive number of seconds, got {poll_interval_s!r}")
        self.folder = path if os.path.isdir(path) else os.path.dirname(os.path.abspath(path))
        self.poll_interval_s = poll_interval_s
        self._flag = threading.Event()
        self._observer = None

    @property
    def backend(self) -> str:
        """"polling" or "notify"."""
        return "notify" if self.poll_interval_s is None else "polling"

    def start(self) -> FolderWatcher:
        """Start the observer thread (``with`` does this)."""
        if self._observer is not None:
            return self
        if self.poll_interval_s is None:
            observer = Observer()
        else:
            observer = PollingObserver(timeout=self.poll_interval_s)
        observer.schedule(_Wake(self._flag), self.folder, recursive=False)
        observer.start()
        self._observer = observer
        return self

    def wait(self, timeout_s: float | None = None) -> bool:
        """Block until something changed or ``timeout_s`` seconds passed; True if something changed."""
        fired = self._flag.wait(timeout_s)
        if fired:
            self._flag.clear()
        return fired

    def stop(self) -> None:
        """Stop and join the observer thread; safe to call twice."""
        observer, self._observer = self._observer, None
        if observer is not None:
            observer.stop()
            observer.join()

    def __enter__(self) -> FolderWatcher:
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()


def iter_live(source, watcher: FolderWatcher, *, stop_event: threading.Event, idle_timeout_s: float | None = None,
              tick_s: float = 0.2, max_frames: int = 256) -> Iterator[list[Frame]]:
    """Yield lists of new frames as they complete, until told to stop or the session goes quiet.

    Parameters
    ----------
    source : SessionSource
    watcher : FolderWatcher
        Started watcher of the session folder.
    stop_event : threading.Event
        Set it to end the watch.
    idle_timeout_s : float, optional
        End when no new frame came for this long (s). None: only ``stop_event`` ends the watch.
    tick_s : float
        Poll at least this often even without file events (s): a file that grows may not fire an event for every
        write, and the polling backend reports with its own delay.
    max_frames : int
        Most frames per yielded list (bounds memory when catching up with a long session).

    Notes
    -----
    At the end one last ``poll(final=True)`` hands on what was complete and reports what was not.
    """
    if not (tick_s > 0):
        raise ValueError(f"tick_s: must be > 0 s, got {tick_s!r}")
    if idle_timeout_s is not None and not (idle_timeout_s >= 0):
        raise ValueError(f"idle_timeout_s: must be >= 0 s, got {idle_timeout_s!r}")
    last_new = time.monotonic()
    while True:
        frames = source.poll(max_frames=max_frames)
        if frames:
            last_new = time.monotonic()
            yield frames
            if len(frames) >= max_frames:
                continue  # catching up: read on without waiting
        if stop_event.is_set():
            break
        if idle_timeout_s is not None and time.monotonic() - last_new >= idle_timeout_s:
            break
        watcher.wait(tick_s)
    while True:
        frames = source.poll(final=True, max_frames=max_frames)
        if not frames:
            return
        yield frames
