"""Messages from the watch's thread to the dashboard ("messages up"), and the listener that posts them."""

from __future__ import annotations

from textual.app import App
from textual.message import Message

from qcmon.events import Event
from qcmon.status import Status


class RowsArrived(Message):
    """New measured rows (dicts keyed by ``traces.csv`` column)."""

    def __init__(self, rows: list[dict]) -> None:
        super().__init__()
        self.rows = rows


class EventArrived(Message):
    """A threshold event, note, reference change or input problem."""

    def __init__(self, event: Event) -> None:
        super().__init__()
        self.event = event


class StatusArrived(Message):
    """A new snapshot of the watch."""

    def __init__(self, status: Status) -> None:
        super().__init__()
        self.status = status


class WatchFinished(Message):
    """``monitor.run`` returned: the summary and report are written."""

    def __init__(self, result: dict) -> None:
        super().__init__()
        self.result = result


class WatchFailed(Message):
    """``monitor.run`` raised."""

    def __init__(self, error: BaseException) -> None:
        super().__init__()
        self.error = error


class AppListener:
    """A :class:`qcmon.status.Listener` that hands everything to the app's own thread.

    Called from the watch's thread; it never touches widgets, it only posts messages (thread-safe, does not
    block the watch).
    """

    def __init__(self, app: App) -> None:
        self._app = app

    def on_rows(self, rows: list[dict]) -> None:
        self._app.post_message(RowsArrived(list(rows)))

    def on_event(self, event: Event) -> None:
        self._app.post_message(EventArrived(event))

    def on_status(self, status: Status) -> None:
        self._app.post_message(StatusArrived(status))
