"""The terminal dashboard: one more consumer of a live watch.

The dashboard computes nothing. A thread worker runs ``monitor.run(listener)``; the listener posts the watch's
rows, events and status to the app as messages, and the app hands them down to its widgets.
"""

from __future__ import annotations

import math
import sys
import threading

from textual import work
from textual.app import App, ComposeResult
from textual.binding import Binding
from textual.containers import Grid
from textual.reactive import reactive
from textual.widgets import Footer

from qcmon.ui.dashboard.history import StreamHistory
from qcmon.ui.dashboard.messages import (
    AppListener,
    EventArrived,
    RowsArrived,
    StatusArrived,
    WatchFailed,
    WatchFinished,
)
from qcmon.ui.dashboard.panels import PANELS, EventList, MetricPanel, SessionHeader, shown_window_s
from qcmon.ui.dashboard.screens import HelpScreen, NoteScreen
from qcmon.events import Event
from qcmon.status import Status

#: Time windows of the trend plots, min (the ``w`` key cycles through them).
WINDOWS_MIN: tuple[int, ...] = (1, 5, 15, 60)

#: Panels drawn with their plots in the compact layout (the worst first); the others take one line each.
COMPACT_PLOTS = 2

#: What each key does, as the help screen explains it.
KEY_HELP: tuple[tuple[str, str], ...] = (
    ("q", "quit: stop the watch, write the summary and report, then leave"),
    ("r", "take a new reference for all channels and planes (after refocusing)"),
    ("R", "take a new reference for the shown channel and plane only"),
    ("n", "add a note to the session record"),
    ("p", "pause the display (measuring and recording continue); p again resumes"),
    ("c", "show the next channel / plane"),
    ("w", "time window of the plots: " + ", ".join(f"{m}" for m in WINDOWS_MIN) + " min"),
    ("?", "this help"),
)


def _stream_of(row: dict) -> tuple[int, int]:
    def as_int(value) -> int:
        try:
            value = float(value)
        except (TypeError, ValueError):
            return 0
        return int(value) if math.isfinite(value) else 0

    return as_int(row.get("channel", 0)), as_int(row.get("plane", 0))


class QcmonApp(App[dict | None]):
    """Live dashboard of a watch.

    Parameters
    ----------
    monitor : object
        A watch with ``run(listener) -> dict`` (blocking), ``stop()``, ``new_reference(channel=None,
        plane=None)``, ``add_note(text)`` and ``profile`` (threshold limits and caution text).
    title : str, optional
        Title of the terminal window and of screenshots.

    Notes
    -----
    The app's return value (``app.run()``) is the dict ``monitor.run`` returned (paths of the summary, the report
    and the output folder), or None when the watch failed (``app.error`` holds the exception).
    """

    CSS_PATH = "dashboard.tcss"
    TITLE = "qcmon"
    ENABLE_COMMAND_PALETTE = False
    HORIZONTAL_BREAKPOINTS = [(0, "-narrow"), (150, "-wide")]
    VERTICAL_BREAKPOINTS = [(0, "-tiny"), (20, "-short"), (36, "-tall")]
    BINDINGS = [
        Binding("q", "quit", "Quit"),
        Binding("r", "new_reference", "Reference"),
        Binding("R", "new_reference_shown", "Reference (shown)", show=False),
        Binding("n", "add_note", "Note"),
        Binding("p", "toggle_pause", "Pause"),
        Binding("c", "next_stream", "Stream"),
        Binding("w", "next_window", "Window"),
        Binding("question_mark", "help", "Help", key_display="?"),
    ]

    paused: reactive[bool] = reactive(False, init=False)
    window_min: reactive[int] = reactive(5, init=False)
    stream: reactive[tuple[int, int] | None] = reactive(None, init=False)

    def __init__(self, monitor, *, title: str | None = None) -> None:
        super().__init__()
        self.monitor = monitor
        if title:
            self.title = title
        self.status: Status | None = None
        self.histories: dict[tuple[int, int], StreamHistory] = {}
        self.events: list[Event] = []
        self.result: dict | None = None
        self.error: BaseException | None = None
        self._shown_status: Status | None = None
        self._unshown_events: list[Event] = []
        self._dirty = False
        self._stopping = False
        self.ending_by_signal = False  # set by a signal handler (SIGTERM, a closed terminal): leave without q
        self._run_returned = threading.Event()
        self._listener = AppListener(self)

    # ----------------------------------------------------------------- layout
    def compose(self) -> ComposeResult:
        yield SessionHeader(id="header")
        with Grid(id="panels"):
            for spec in PANELS:
                yield MetricPanel(spec)
        events = EventList(id="events")
        events.border_title = "Events"
        yield events
        yield Footer()

    def on_mount(self) -> None:
        self._watch()
        self.set_interval(1.0, self._refresh_if_dirty)
        self.refresh_display()

    def on_unmount(self) -> None:
        # Leaving for any reason: the watch must still stop and write its summary.
        if not self._run_returned.is_set():
            self._stop_monitor()

    # ---------------------------------------------------------------- the watch
    @work(thread=True, exclusive=True, exit_on_error=False, group="watch")
    def _watch(self) -> None:
        try:
            result = self.monitor.run(self._listener)
        except Exception as exc:  # shown to the user; the app stays usable to read what was measured
            self.post_message(WatchFailed(exc))
        except KeyboardInterrupt:  # Monitor.abort: ended without the summary set, as asked
            pass
        else:
            self.post_message(WatchFinished(dict(result or {})))
        finally:
            self._run_returned.set()

    def wait_for_watch(self, timeout: float | None = None) -> bool:
        """Block until ``monitor.run`` has returned (summary written); True if it did within ``timeout`` s."""
        return self._run_returned.wait(timeout)

    @property
    def watch_running(self) -> bool:
        """True while ``monitor.run`` has not returned."""
        return not self._run_returned.is_set()

    def _stop_monitor(self) -> None:
        self._stopping = True
        self.monitor.stop()

    def on_rows_arrived(self, message: RowsArrived) -> None:
        for row in message.rows:
            key = _stream_of(row)
            history = self.histories.get(key)
            if history is None:
                history = self.histories[key] = StreamHistory(keep_s=60.0 * max(WINDOWS_MIN) + 5.0)
            history.append(row)
            if self.stream is None:
                self.stream = key
        self._dirty = True

    def on_event_arrived(self, message: EventArrived) -> None:
        self.events.append(message.event)
        self._unshown_events.append(message.event)
        if not self.paused:
            self._show_events()

    def on_status_arrived(self, message: StatusArrived) -> None:
        self.status = message.status
        if self.stream is None and message.status.streams:
            self.stream = tuple(message.status.streams[0])
        self.refresh_display()

    def on_watch_finished(self, message: WatchFinished) -> None:
        self.result = message.result
        if self._stopping:
            self.exit(self.result)
        else:
            self.refresh_display()

    def on_watch_failed(self, message: WatchFailed) -> None:
        self.error = message.error
        if self._stopping:
            self.exit(None, return_code=1)
        else:
            self.refresh_display()

    # ---------------------------------------------------------------- display
    def streams(self) -> list[tuple[int, int]]:
        """The (channel, plane) pairs to cycle through: the watch's list, else those seen in rows."""
        if self.status is not None and self.status.streams:
            return [tuple(s) for s in self.status.streams]
        return sorted(self.histories)

    def _stream_text(self) -> str:
        if self.stream is None:
            return "no stream yet"
        c, p = self.stream
        return f"c{c} p{p}"

    def _flags(self) -> str:
        if self.error is not None:
            return f"WATCH FAILED: {self.error} · q leaves"
        if self.result is not None:
            return f"session ended · summary {self.result.get('summary', '—')} · q leaves"
        if self._stopping:
            return "stopping: writing the summary …"
        if self.paused:
            return "PAUSED (measuring continues)"
        return ""

    def _refresh_if_dirty(self) -> None:
        if self.ending_by_signal and not self.watch_running:
            # the watch was ended by a signal and has written its summary: leave (no one may be there to press q)
            self.exit(self.result, return_code=1 if self.error is not None else 0)
            return
        if self._dirty:
            self.refresh_display()

    def refresh_display(self) -> None:
        """Hand the newest data down to the widgets (only the header's flags while paused)."""
        if not self.paused:
            self._shown_status = self.status
        history = self.histories.get(self.stream) if self.stream is not None else None
        header = self.query_one(SessionHeader)
        header.show(self._shown_status, stream_text=self._stream_text(), window_min=self.window_min, flags=self._flags(),
                    shown_s=shown_window_s(history, 60.0 * self.window_min) if history is not None else None)
        if self.paused:
            return
        self._dirty = False
        status = self.status
        states = (status.states.get(self.stream, {}) if status is not None and self.stream is not None else {}) or {}
        forecasts = status.forecasts if status is not None else {}
        limits = getattr(getattr(self.monitor, "profile", None), "limits", None) or {}
        self._arrange_panels(states)
        for panel in self.query(MetricPanel):
            panel.show(
                history=history,
                states=states,
                limits=limits,
                forecasts=forecasts,
                window_s=60.0 * self.window_min,
            )
        self._show_events()

    @property
    def compact(self) -> bool:
        """True in the compact layout (fewer than 150 columns and 36 lines, e.g. 80×24): the two worst panels
        with their plots, the others one line each."""
        return self.size.width < 150 and self.size.height < 36  # as the breakpoints of the style sheet

    def _arrange_panels(self, states: dict) -> None:
        panels = list(self.query(MetricPanel))
        if self.compact:
            rank = {"alarm": 3, "warning": 2, "normal": 1}

            def badness(i_panel):
                i, panel = i_panel
                known = [states[m] for m in panel.spec.metrics if m in states]
                return (-max((rank.get(k, 0) for k in known), default=0), i)

            order = [p for _, p in sorted(enumerate(sorted(panels, key=lambda p: PANELS.index(p.spec))),
                                          key=badness)]
        else:
            order = sorted(panels, key=lambda p: PANELS.index(p.spec))
        for i, panel in enumerate(order):
            mini = self.compact and i >= COMPACT_PLOTS
            panel.mini = mini
            panel.set_class(mini, "-mini")
        if order != panels:  # worst first (compact) or the usual order again
            grid = self.query_one("#panels")
            for panel in order:
                grid.move_child(panel, after=len(grid.children) - 1)

    def on_resize(self) -> None:
        self.call_after_refresh(self.refresh_display)

    def _show_events(self) -> None:
        if self._unshown_events:
            self.query_one(EventList).add_events(self._unshown_events)
            self._unshown_events = []

    def watch_paused(self, paused: bool) -> None:
        self.refresh_display()

    def watch_window_min(self, minutes: int) -> None:
        self.refresh_display()

    def watch_stream(self, stream) -> None:
        self.refresh_display()

    # ---------------------------------------------------------------- actions
    async def action_quit(self) -> None:
        """Stop the watch (it writes the summary and report) and leave once it has."""
        if not self.watch_running:
            self.exit(self.result, return_code=1 if self.error is not None else 0)
            return
        if self._stopping:
            self.notify("still writing the summary …")
            return
        self._stop_monitor()
        self.refresh_display()

    def _watch_ended(self) -> bool:
        if self.watch_running and not self._stopping:
            return False
        self.notify("the watch has ended", severity="warning")
        return True

    def _waits_for_frames(self) -> str:
        st = self.status
        if st is None or not st.frames_measured:
            return " · no frame has arrived yet: the reference waits for frames"
        idle = getattr(st, "idle_s", 0.0) or 0.0
        if idle > 0:
            return f" · no new frame for {idle:.0f} s: the reference waits for frames"
        return ""

    def action_new_reference(self) -> None:
        """New reference for every channel and plane (e.g. after refocusing)."""
        if not self._watch_ended():
            self.monitor.new_reference()
            self.notify("new reference requested for all channels and planes" + self._waits_for_frames())

    def action_new_reference_shown(self) -> None:
        """New reference for the shown channel and plane only."""
        if self.stream is None or self._watch_ended():
            return
        c, p = self.stream
        self.monitor.new_reference(channel=c, plane=p)
        self.notify(f"new reference requested for ch {c} plane {p}" + self._waits_for_frames())

    def action_add_note(self) -> None:
        """Ask for one line of text and add it to the record."""

        def done(text: str | None) -> None:
            if text and not self._watch_ended():
                self.monitor.add_note(text)

        self.push_screen(NoteScreen(), done)

    def action_toggle_pause(self) -> None:
        self.paused = not self.paused

    def action_next_stream(self) -> None:
        streams = self.streams()
        if not streams:
            return
        i = streams.index(self.stream) + 1 if self.stream in streams else 0
        self.stream = streams[i % len(streams)]

    def action_next_window(self) -> None:
        i = WINDOWS_MIN.index(self.window_min) + 1 if self.window_min in WINDOWS_MIN else 0
        self.window_min = WINDOWS_MIN[i % len(WINDOWS_MIN)]

    def action_help(self) -> None:
        if not isinstance(self.screen, HelpScreen):
            self.push_screen(HelpScreen(keys=list(KEY_HELP), profile=getattr(self.monitor, "profile", None)))


def run_dashboard(monitor, *, title: str | None = None) -> int:
    """Run the dashboard on ``monitor`` until the user quits; print where the record was written.

    Returns
    -------
    int
        0 after a normal end, 2 when the record could not be written (a QcmonError), 1 when the watch failed
        otherwise, 130 when aborted (a second Ctrl-C: no summary set).
    """
    app = QcmonApp(monitor, title=title)
    from qcmon.ui.signals import stop_on_signals

    stop_on_signals(monitor, also=lambda: setattr(app, "ending_by_signal", True))
    try:
        result = app.run()
    except KeyboardInterrupt:  # outside the app's own keys: abort like a second Ctrl-C (no summary set)
        monitor.abort()
        app.wait_for_watch()
        return 130
    if app.watch_running:  # left without a normal quit: let the watch finish writing
        monitor.stop()
        app.wait_for_watch()
    if app.error is not None:
        print(f"qcmon: the watch stopped with an error: {app.error}", file=sys.stderr)
        from qcmon.errors import QcmonError

        return 2 if isinstance(app.error, QcmonError) else 1  # README: 2 when the record cannot be written
    result = result or app.result or {}
    for key, path in result.items():  # summary, report, out_dir, ...: where the record was written
        if path:
            print(f"{key}: {path}")
    return 0
