"""The terminal dashboard, driven headless through textual's Pilot against a replaying watch double.

The double replays fixed rows, events and status snapshots from its own thread (like the real watch does) and
records what the dashboard asked of it. Snapshot SVGs live in ``tests/snapshots/``; refresh them after a
deliberate change of the look with ``pytest tests/test_dashboard.py --snapshot-update`` and review the diff.
"""

from __future__ import annotations

import asyncio
import math
import os
import queue
import re
import threading
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest

from qcmon.ui.dashboard import QcmonApp
from qcmon.ui.dashboard.history import StreamHistory
from qcmon.ui.dashboard.panels import EventList, MetricPanel, event_cells, format_clock
from qcmon.ui.dashboard.plot import Level, TrendPlot, render_plot
from qcmon.ui.dashboard.screens import CAUTION, HelpScreen, NoteScreen
from qcmon.events import Event
from qcmon.status import Status

SNAPSHOTS = Path(__file__).parent / "snapshots"
FRAME_RATE_HZ = 2.0
N_FRAMES = 240  # per stream: 120 s of session
ALARM_FRAME = 200  # stream (0, 0) moves by 7 µm from here on
STREAMS = [(0, 0), (0, 1)]


# ----------------------------------------------------------------------------- test doubles
@dataclass
class FakeLimit:
    """Same shape as a threshold profile's limit (metric, warn, alarm, direction, persist_s, label, unit)."""

    metric: str
    warn: float
    alarm: float
    direction: str = "above"
    persist_s: float = 2.0
    label: str = ""
    unit: str = ""

    def state_of(self, value: float) -> str:
        if not math.isfinite(value):
            return "normal"
        v = abs(value) if self.direction == "abs_above" else value
        if self.direction == "below":
            return "alarm" if v < self.alarm else "warning" if v < self.warn else "normal"
        return "alarm" if v > self.alarm else "warning" if v > self.warn else "normal"


@dataclass
class FakeProfile:
    name: str = "test profile"
    caution: str = "Keep laser power at the level your licence allows."
    limits: dict = field(default_factory=dict)


PROFILE = FakeProfile(
    limits={
        m.metric: m
        for m in (
            FakeLimit("displacement_um", 2.0, 5.0, label="displacement", unit="µm"),
            FakeLimit("z_um", 3.0, 6.0, "abs_above", label="z offset", unit="µm"),
            FakeLimit("focus_corr", 0.9, 0.8, "below", label="focus correlation"),
            FakeLimit("brightness_pct", 80.0, 60.0, "below", label="brightness", unit="%"),
            FakeLimit("bleach_pct_per_min", 1.0, 3.0, "abs_above", label="bleach rate", unit="%/min"),
            FakeLimit("saturated_frac", 0.001, 0.01, label="saturated pixels"),
            FakeLimit("clipped_frac", 0.01, 0.05, label="clipped pixels"),
            FakeLimit("snr", 5.0, 3.0, "below", label="SNR"),
            FakeLimit("line_offset_px", 0.5, 1.0, "abs_above", label="line offset", unit="px"),
        )
    }
)


def make_rows(frame: int, plane: int) -> dict:
    """One fixed row per (frame, plane): smooth drifts plus seeded noise; plane 1 has no z-stack."""
    rng = np.random.default_rng(1000 * plane + frame)
    t = frame / FRAME_RATE_HZ
    disp = 0.4 + 0.3 * math.sin(t / 9.0) + 0.05 * rng.standard_normal()
    if plane == 0 and frame >= ALARM_FRAME:
        disp = 7.0
    return {
        "frame": frame,
        "channel": 0,
        "plane": plane,
        "time_s": t,
        "dx_px": disp / 0.5,
        "dy_px": 0.0,
        "displacement_um": disp,
        "displacement_px": disp / 0.5,
        "reg_corr": 0.95,
        "z_um": (0.02 * t if plane == 0 else math.nan),
        "z_corr": 0.9 if plane == 0 else math.nan,
        "focus_corr": 0.99 - 0.0005 * t + 0.05 * plane,
        "focus_measure": 1.0,
        "mean_f": 500.0,
        "baseline_f": 500.0 - 0.4 * t,
        "brightness_pct": 100.0 - 0.08 * t - 3 * plane,
        "bleach_pct_per_min": -4.8 if t > 10 else math.nan,
        "saturated_frac": 0.0002 + 0.0001 * plane,
        "clipped_frac": 0.0,
        "noise_sigma": 20.0,
        "snr": 25.0 - 0.02 * t - 5 * plane,
        "photons_per_px": 30.0,
        "shot_snr": math.sqrt(30.0),
        "line_offset_px": 0.1 + 0.01 * plane,
        "source": f"session_{frame // 100:03d}.tif",
        "page": frame % 100,
    }


def status_at(frame: int) -> Status:
    t = frame / FRAME_RATE_HZ
    alarm = frame >= ALARM_FRAME
    states = {
        s: {m: "normal" for m in PROFILE.limits} for s in STREAMS
    }
    states[(0, 0)]["displacement_um"] = "alarm" if alarm else "normal"
    states[(0, 1)]["snr"] = "normal"
    return Status(
        folder="/data/2026-12-01/mouse07/session3",
        current_file=f"session_{frame // 100:03d}.tif",
        frames_measured=2 * (frame + 1),
        frame_rate_hz=FRAME_RATE_HZ,
        frame_rate_origin="OME-TIFF",
        elapsed_s=t,
        backlog_frames=0,
        overall="alarm" if alarm else "normal",
        states=states,
        streams=list(STREAMS),
        out_dir="/data/2026-12-01/mouse07/session3.qcmon",
        forecasts={"baseline_f": "brightness −20 % in ~3 min at this rate"},
        facts={},
        paused_reason="",
    )


def script(first: int = 0, last: int = N_FRAMES, *, batch: int = 10) -> list[tuple[str, object]]:
    """Rows in batches of ``batch`` frames (both planes), a status after each, events where they happen."""
    items: list[tuple[str, object]] = []
    for start in range(first, last, batch):
        stop = min(start + batch, last)
        items.append(("rows", [make_rows(f, p) for f in range(start, stop) for p in (0, 1)]))
        if start <= 20 < stop:
            items.append(("event", Event(kind="problem", frame=20, time_s=10.0, message="session_000.tif page 20: truncated page skipped")))
        if start <= 80 < stop:
            items.append(("event", Event(kind="start", metric="z_um", state="warning", value=3.2, limit=3.0, frame=80, time_s=40.0, started_frame=80, started_time_s=40.0, message="z offset 3.2 µm beyond 3 µm")))
        if start <= 120 < stop:
            items.append(("event", Event(kind="end", metric="z_um", state="warning", value=2.1, limit=3.0, frame=120, time_s=60.0, started_frame=80, started_time_s=40.0, message="z offset back within 3 µm")))
        if start <= ALARM_FRAME < stop:
            items.append(("event", Event(kind="start", metric="displacement_um", state="alarm", value=7.0, limit=5.0, frame=ALARM_FRAME, time_s=ALARM_FRAME / FRAME_RATE_HZ, started_frame=ALARM_FRAME, started_time_s=ALARM_FRAME / FRAME_RATE_HZ, message="displacement 7.0 µm beyond 5 µm")))
        items.append(("status", status_at(stop - 1)))
    return items


class ReplayMonitor:
    """A watch double: replays queued items to the listener from the thread that calls ``run``.

    Records every call. ``stop()`` makes ``run`` return after the queue is drained and ``finish_gate`` is set
    (so a test can hold the "writing the summary" phase open).
    """

    def __init__(self, items, *, profile=PROFILE):
        self.profile = profile
        self.calls: list[tuple] = []
        self.result = {"summary": "/out/summary.json", "report": "/out/report.html", "out_dir": "/out"}
        self.finish_gate = threading.Event()
        self.finish_gate.set()
        self._queue: queue.Queue = queue.Queue()
        self._stopped = threading.Event()
        self._lock = threading.Lock()
        self._fed = 0
        self._done = 0
        self._last_time_s = 0.0
        self.feed(*items)

    def feed(self, *items) -> None:
        with self._lock:
            self._fed += len(items)
        for item in items:
            self._queue.put(item)

    def idle(self) -> bool:
        with self._lock:
            return self._done == self._fed

    def run(self, listener) -> dict:
        self.calls.append(("run",))
        while True:
            try:
                kind, payload = self._queue.get(timeout=0.01)
            except queue.Empty:
                if self._stopped.is_set():
                    break
                continue
            if kind == "rows":
                self._last_time_s = payload[-1]["time_s"]
                listener.on_rows(payload)
            elif kind == "event":
                listener.on_event(payload)
            else:
                listener.on_status(payload)
            with self._lock:
                self._done += 1
        self.finish_gate.wait(10)
        self.calls.append(("run returned",))
        return self.result

    def stop(self) -> None:
        self.calls.append(("stop",))
        self._stopped.set()

    def new_reference(self, channel=None, plane=None) -> None:
        self.calls.append(("new_reference", channel, plane))
        self.feed(("event", Event(kind="reference", frame=-1, time_s=self._last_time_s, channel=channel or 0, plane=plane or 0, message="new reference taken")))

    def add_note(self, text: str) -> None:
        self.calls.append(("add_note", text))
        self.feed(("event", Event(kind="note", time_s=self._last_time_s, message=text)))


# ----------------------------------------------------------------------------- helpers
async def until(pilot, condition, what: str, timeout: float = 5.0) -> None:
    loop = asyncio.get_running_loop()
    end = loop.time() + timeout
    while not condition():
        if loop.time() > end:
            raise AssertionError(f"timed out waiting for {what}")
        await pilot.pause(0.01)
    await pilot.pause()


async def replayed(pilot, app: QcmonApp, monitor: ReplayMonitor) -> None:
    """Wait until the double has sent everything queued and the app has shown its last status."""
    await until(pilot, monitor.idle, "the replay")
    await until(pilot, lambda: app.status is not None and app.status.frames_measured == app._last_fed_frames, "the last status")
    # rows that came after that status wait for the app's 1-s refresh timer: show them now, so that what a
    # snapshot sees does not depend on whether the timer fired
    if app._dirty:
        app.refresh_display()
        await pilot.pause()


def last_frames(items) -> int:
    return [p for k, p in items if k == "status"][-1].frames_measured


def panel_text(app: QcmonApp, key: str) -> str:
    panel = app.query_one(f"#panel-{key}", MetricPanel)
    value = str(panel.query_one(".value").content)
    state = str(panel.query_one(".state").content)
    return f"{value} | {state}"


def make_app(items=None, **kw) -> tuple[QcmonApp, ReplayMonitor]:
    items = script() if items is None else items
    monitor = ReplayMonitor(items, **kw)
    app = QcmonApp(monitor, title="qcmon")
    app._last_fed_frames = last_frames(items)  # what `replayed` waits for
    return app, monitor


async def finish(pilot, app, monitor) -> None:
    """Quit as a user does and wait for the app to leave."""
    await pilot.press("q")
    await until(pilot, lambda: not app.watch_running, "run to return")


# ----------------------------------------------------------------------------- behaviour
async def test_values_states_and_planted_alarm_are_shown():
    app, monitor = make_app()
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        assert app.stream == (0, 0)
        # Last row of stream (0, 0): 7.0 µm, the planted alarm; state as symbol and word, not colour alone.
        assert panel_text(app, "displacement") == "7.00 µm | ‼ alarm"
        assert app.query_one("#panel-displacement").has_class("-alarm")
        assert "‼ alarm" in str(app.query_one("#overall").content)
        rows = app.query_one(EventList).plain_rows()
        assert any("‼ alarm" in r and "displacement" in r for r in rows), rows
        # The warning that started at 40 s and ended at 60 s shows both times.
        assert any(r.startswith("0:40–1:00") and "warning ended" in r for r in rows), rows
        assert any("✗ problem" in r and "truncated page" in r for r in rows), rows
        # z offset in µm with a z-stack; brightness with bleach rate and the forecast text.
        assert "2.39 µm" in panel_text(app, "z")
        assert "bleach -4.80 %/min" in panel_text(app, "brightness")
        detail = str(app.query_one("#panel-brightness .detail").content)
        assert "brightness −20 % in ~3 min" in detail
        # Fractions in files, % on screen: 0.0002 -> 0.02 %.
        assert "0.020 %  clipped 0.00 %" in panel_text(app, "saturation")
        # the border says what the plot's axis marks w and a stand for
        assert app.query_one("#panel-displacement").border_subtitle == "w warn > 2 · a alarm > 5 µm"
        await finish(pilot, app, monitor)


async def test_quit_stops_the_watch_and_leaves_after_run_returns():
    app, monitor = make_app()
    monitor.finish_gate.clear()  # the watch is "writing the summary" until the gate opens
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        await pilot.press("q")
        await until(pilot, lambda: ("stop",) in monitor.calls, "stop()")
        await pilot.pause(0.1)
        assert app.return_value is None and app.watch_running  # still there while the summary is written
        assert "writing the summary" in str(app.query_one("#session-facts").content)
        monitor.finish_gate.set()
        await until(pilot, lambda: app.return_value is not None, "the app to exit")
    assert app.return_value == monitor.result
    assert monitor.calls.index(("stop",)) < monitor.calls.index(("run returned",))


async def test_new_reference_keys():
    app, monitor = make_app()
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        await pilot.press("r")
        await pilot.press("c")
        await pilot.press("R")
        await until(pilot, monitor.idle, "the reference events")
        assert ("new_reference", None, None) in monitor.calls  # all channels and planes
        assert ("new_reference", 0, 1) in monitor.calls  # the shown stream after switching
        await until(pilot, lambda: sum("⟲ reference" in r for r in app.query_one(EventList).plain_rows()) == 2, "two reference rows")
        await finish(pilot, app, monitor)


async def test_note_goes_to_the_watch_and_comes_back_in_the_event_list():
    app, monitor = make_app()
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        await pilot.press("n")
        await until(pilot, lambda: isinstance(app.screen, NoteScreen), "the note screen")
        await pilot.press(*"refocused", "enter")
        await until(pilot, lambda: ("add_note", "refocused") in monitor.calls, "add_note")
        await until(pilot, lambda: any("✎ note" in r and "refocused" in r for r in app.query_one(EventList).plain_rows()), "the note row")
        # Escape cancels: nothing is added.
        await pilot.press("n")
        await until(pilot, lambda: isinstance(app.screen, NoteScreen), "the note screen")
        await pilot.press("x", "escape")
        await pilot.pause()
        assert [c for c in monitor.calls if c[0] == "add_note"] == [("add_note", "refocused")]
        await finish(pilot, app, monitor)


async def test_pause_freezes_the_display_while_data_keeps_coming():
    first = script(0, 100)
    app, monitor = make_app(first)
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        before = panel_text(app, "displacement"), str(app.query_one("#session-facts").content)
        assert "200 frames" in before[1]
        await pilot.press("p")
        more = script(100, N_FRAMES)
        app._last_fed_frames = last_frames(more)
        monitor.feed(*more)
        await replayed(pilot, app, monitor)
        await pilot.pause(0.05)
        assert app.status.frames_measured == 2 * N_FRAMES  # measuring went on
        assert panel_text(app, "displacement") == before[0]  # the display did not
        facts = str(app.query_one("#session-facts").content)
        assert "200 frames" in facts and "PAUSED" in facts
        assert not any("alarm" in r for r in app.query_one(EventList).plain_rows())
        await pilot.press("p")
        await pilot.pause()
        assert panel_text(app, "displacement") == "7.00 µm | ‼ alarm"
        assert any("‼ alarm" in r for r in app.query_one(EventList).plain_rows())
        await finish(pilot, app, monitor)


async def test_stream_switch_shows_the_other_plane_and_focus_without_stack():
    app, monitor = make_app()
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        await pilot.press("c")
        assert app.stream == (0, 1)
        assert "c0 p1 ·" in str(app.query_one("#session-facts").content)
        assert "‼" not in panel_text(app, "displacement")
        # No z-stack on plane 1: the z panel falls back to the focus correlation against the reference.
        assert "focus corr 0.98" in panel_text(app, "z")
        assert "focus 0.98" not in panel_text(app, "z")  # not twice
        assert app.query_one("#panel-z").border_subtitle == "w warn < 0.9 · a alarm < 0.8"
        await pilot.press("c")
        assert app.stream == (0, 0)
        await finish(pilot, app, monitor)


async def test_window_key_cycles_the_plot_window():
    app, monitor = make_app()
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        plot = app.query_one("#panel-displacement TrendPlot", TrendPlot)
        # the session is 119.5 s long: the plots show all of it until it reaches the chosen span
        assert app.window_min == 5 and plot._window_s == 119.5
        assert "plots 2:00/5 min" in str(app.query_one("#session-facts").content)
        seen = []
        for _ in range(4):
            await pilot.press("w")
            seen.append((app.window_min, plot._window_s))
        assert seen == [(15, 119.5), (60, 119.5), (1, 60.0), (5, 119.5)]
        await pilot.press("w", "w", "w")  # 1 min: newest frame at 119.5 s, so 59.5 s .. 119.5 s = 121 frames
        assert plot._t.size == 121 and plot._t[0] == pytest.approx(59.5)
        assert "1-min plots" in str(app.query_one("#session-facts").content)
        await finish(pilot, app, monitor)


async def test_backlog_and_waiting_reason_are_shown():
    items = script(0, 20)
    behind = status_at(19)
    behind.backlog_frames, behind.paused_reason = 37, "building reference"
    items.append(("status", behind))
    app, monitor = make_app(items)
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        facts = str(app.query_one("#session-facts").content)
        assert "building reference" in facts.splitlines()[0]
        assert "behind by 37 frames" in facts.splitlines()[1]
        await finish(pilot, app, monitor)


class FailingMonitor(ReplayMonitor):
    def run(self, listener):
        super().run(listener)
        raise ValueError("session_000.tif: not a TIFF file")


async def test_a_failing_watch_is_reported_and_quit_gives_exit_code_1():
    monitor = FailingMonitor(script(0, 20))
    app = QcmonApp(monitor)
    async with app.run_test(size=(80, 24)) as pilot:
        monitor.stop()  # the double's run returns, then raises
        await until(pilot, lambda: app.error is not None, "the error")
        await pilot.pause()
        assert "WATCH FAILED: session_000.tif: not a TIFF file" in str(app.query_one("#session-facts").content)
        await pilot.press("q")
        await until(pilot, lambda: app.return_code is not None, "exit")
    assert app.return_code == 1 and app.return_value is None


@pytest.mark.parametrize("caution", [PROFILE.caution, ""])
async def test_help_shows_keys_and_caution(caution):
    profile = FakeProfile(caution=caution, limits=PROFILE.limits)
    app, monitor = make_app(script(0, 20), profile=profile)
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        await pilot.press("question_mark")
        await until(pilot, lambda: isinstance(app.screen, HelpScreen), "help")
        # The profile's caution on laser power and animal welfare; a general one when it has none.
        assert str(app.screen.query_one("#caution").content) == (caution or CAUTION)
        await pilot.press("escape")
        await until(pilot, lambda: not isinstance(app.screen, HelpScreen), "help to close")
        await finish(pilot, app, monitor)


async def test_watch_ending_by_itself_keeps_the_dashboard_until_quit():
    app, monitor = make_app(script(0, 40))
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        monitor.stop()  # e.g. the watch went idle
        await until(pilot, lambda: app.result is not None, "the result")
        assert "session ended" in str(app.query_one("#session-facts").content)
        assert app.return_value is None
        await pilot.press("q")
        await until(pilot, lambda: app.return_value is not None, "exit")
    assert app.return_value == monitor.result


async def test_layout_survives_sizes_and_resize():
    app, monitor = make_app()
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        for size, columns in [((80, 24), 2), ((200, 50), 3), ((120, 30), 2), ((120, 40), 2)]:
            await pilot.resize_terminal(*size)
            await pilot.pause()
            panels = list(app.query(MetricPanel))
            assert len(panels) == 6
            compact = size[0] < 150 and size[1] < 36
            # compact: the two worst panels with plots (the alarm first), the others one line each
            full = [p for p in panels if not p.mini]
            assert len(full) == (2 if compact else 6), size
            assert len({p.region.x for p in full}) == columns, size
            if compact:
                assert full[0].id == "panel-displacement" and full[0].region.x == 0  # the alarm, first
            for panel in panels:  # each panel whole, inside the screen, above the footer
                r = panel.region
                assert r.height >= (1 if panel.mini else 5), (size, panel.id, r)
                assert r.right <= size[0] and r.bottom <= size[1] - 1, (size, panel.id, r)
            events = app.query_one(EventList).region
            assert events.height >= 6 and events.bottom <= size[1] - 1
        for size in [(60, 15), (30, 8), (200, 50), (30, 8)]:
            await pilot.resize_terminal(*size)
            await pilot.pause()
        assert not app.screen.has_class("-wide")  # back at 30 columns
        assert not app.query_one(EventList).display  # 8 lines: the panels keep the room
        assert all(p.region.height >= 1 for p in app.query(MetricPanel))
        await finish(pilot, app, monitor)


# ----------------------------------------------------------------------------- snapshots
def _normalise(svg: str) -> str:
    # Class prefixes are a hash of the content; keep the comparison to what is drawn.
    return re.sub(r"terminal-\d+", "terminal", svg)


def check_snapshot(request, name: str, svg: str) -> None:
    path = SNAPSHOTS / f"{name}.svg"
    update = request.config.getoption("--snapshot-update", default=False) or os.environ.get("QCMON_UPDATE_SNAPSHOTS")
    if update:
        SNAPSHOTS.mkdir(exist_ok=True)
        path.write_text(svg, encoding="utf-8")
        return
    if not path.exists():
        pytest.fail(f"no snapshot {path}; create it with --snapshot-update and review it")
    if _normalise(path.read_text(encoding="utf-8")) != _normalise(svg):
        actual = path.with_suffix(".actual.svg")
        actual.write_text(svg, encoding="utf-8")
        pytest.fail(f"{name} looks different from {path}; compare with {actual}")


@pytest.mark.parametrize("size", [(80, 24), (200, 50)])
async def test_snapshot_main_screen(request, size):
    app, monitor = make_app()
    async with app.run_test(size=size) as pilot:
        await replayed(pilot, app, monitor)
        svg = app.export_screenshot(title="qcmon")
        check_snapshot(request, f"main_{size[0]}x{size[1]}", svg)
        await finish(pilot, app, monitor)


async def test_snapshot_help_screen(request):
    app, monitor = make_app()
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        await pilot.press("question_mark")
        await until(pilot, lambda: isinstance(app.screen, HelpScreen), "help")
        check_snapshot(request, "help_80x24", app.export_screenshot(title="qcmon"))
        await pilot.press("escape")
        await finish(pilot, app, monitor)


# ----------------------------------------------------------------------------- pieces
def test_braille_dots_follow_the_unicode_pattern_block():
    # Unicode Braille Patterns block (U+2800–U+28FF): dot n sets bit n-1; dots 1-3 and 7 run down the left
    # column, 4-6 and 8 down the right (The Unicode Standard, ch. 21 "Braille").
    t = np.array([0.0, 0.6])
    v = np.array([1.0, 0.0])
    text = render_plot(t, v, width=1, height=1, t_end=1.0, window_s=1.0).plain
    # Left column: value 1 at the top (dot 1). Right column: value 0 at the bottom, joined up to the left
    # column's row, so dots 4, 5, 6 and 8.
    assert ord(text) - 0x2800 == 0x01 | 0x08 | 0x10 | 0x20 | 0x80
    single = render_plot(np.array([0.0]), np.array([5.0]), width=1, height=1, t_end=1.0, window_s=1.0).plain
    # A lone value in a flat range sits mid-height in the left column: dot 2 or 3 (bits 0x02, 0x04).
    assert ord(single) - 0x2800 in (0x02, 0x04)


def test_plot_keeps_every_spike_and_draws_levels():
    t = np.arange(0, 600, 0.1)
    v = np.zeros_like(t)
    v[1234] = 10.0  # one frame of a 6000-frame window
    text = render_plot(t, v, width=30, height=4, t_end=600.0, window_s=600.0, levels=(Level(2.0, "warning"), Level(5.0, "alarm")))
    lines = text.plain.split("\n")
    assert len(lines) == 4 and all(len(line) == 30 for line in lines)
    assert lines[0].startswith("  10.0 ")
    assert any(line.startswith("a    5") and "━" in line for line in lines)
    assert any(line.startswith("w    2") for line in lines)  # its line lies under the data here
    # The spike's column has dots in the top row.
    col = 7 + int(v.argmax() / len(v) * 23 * 2) // 2
    assert lines[0][col] != " "


def test_plot_column_ranges_match_a_plain_numpy_reference():
    from qcmon.ui.dashboard.plot import _column_ranges

    rng = np.random.default_rng(3)
    t = np.sort(rng.uniform(0, 300, 5000))
    v = rng.normal(size=t.size)
    v[rng.random(t.size) < 0.2] = np.nan
    v[(t > 100) & (t < 130)] = np.nan  # whole columns without a value
    lo, hi = _column_ranges(t, v, 0.0, 300.0, 40)
    # Reference: numpy's nanmin/nanmax over each column's points, column = floor(t / window × ncols).
    col = np.minimum((t / 300.0 * 40).astype(int), 39)
    for c in range(40):
        sel = v[col == c]
        if np.isfinite(sel).any():
            assert lo[c] == np.nanmin(sel) and hi[c] == np.nanmax(sel), c
        else:
            assert np.isnan(lo[c]) and np.isnan(hi[c]), c


def test_history_drops_rows_older_than_the_longest_window():
    h = StreamHistory(keep_s=10.0)
    for i in range(1000):
        h.append({"time_s": i * 0.1, "snr": float(i)})
    assert len(h) == 101  # 89.9 s .. 99.9 s
    t, v = h.window("snr", window_s=1.0)
    np.testing.assert_allclose(v, np.arange(989, 1000))
    with pytest.raises(ValueError, match="column"):
        h.window("nope", window_s=1.0)
    with pytest.raises(ValueError, match="keep_s"):
        StreamHistory(keep_s=0)


def test_event_cells_have_no_wall_clock():
    e = Event(kind="end", metric="z_um", state="warning", time_s=3725.0, started_time_s=3600.0, wall_time="2026-12-01T10:00:00")
    when, stream, what, detail = event_cells(e)
    assert when == "1:00:00–1:02:05" and stream == "c0 p0" and what == "✓ warning ended"
    assert "10:00" not in detail
    assert format_clock(float("nan")) == "—"


async def test_long_events_wrap_with_their_advice_and_nothing_is_cut():
    # 80×24: a warning with a long message and advice wraps inside the event box; no line is wider than the
    # box less its scrollbar column, and the whole advice is there to read
    advice = ("the field moves back and forth by up to 8.4 µm (typical 6.2 µm) — the animal is probably moving; "
              "check the animal and the head fixation (see caution: qcmon never changes the microscope)")
    ev = Event(kind="start", metric="displacement_um", state="warning", value=6.2, limit=2.0, frame=10,
               time_s=5.0, started_frame=10, started_time_s=5.0, advice=advice, caution="local rules",
               message="Displacement warning: 6.2 µm typical, peak 8.4 µm; above 2 µm (warning level) for 1.0 s "
                       "of the last 2 s (from t=4.0 s, frame 8) (channel 0, plane 0)")
    app, monitor = make_app(script(0, 40) + [("event", ev)])
    async with app.run_test(size=(80, 24)) as pilot:
        await replayed(pilot, app, monitor)
        log = app.query_one(EventList)
        await until(pilot, lambda: any(advice in r for r in log.plain_rows()), "the advice row")
        width = log.scrollable_content_region.width
        assert width <= log.region.width - 2 - 1  # borders and the scrollbar column
        texts = [strip.text for strip in log.lines]
        assert all(len(t.rstrip()) <= width for t in texts), texts
        joined = " ".join(t.strip() for t in texts)
        assert "→" in joined and "head fixation" in joined and "(channel 0, plane 0)" not in joined
        await finish(pilot, app, monitor)
