"""Widgets of the main screen: the session header, one panel per metric, the event list.

Widgets only show what they are given ("attributes down"): the app hands them the newest status, rows and events.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from rich.text import Text
from textual.app import ComposeResult
from textual.containers import Horizontal
from textual.widget import Widget
from textual.widgets import RichLog, Static

from qcmon.columns import BY_NAME
from qcmon.ui.dashboard.history import StreamHistory
from qcmon.ui.dashboard.plot import Level, TrendPlot
from qcmon.events import STATES, SYMBOLS, Event
from qcmon.frames import RATE_UNKNOWN
from qcmon.status import Status

_DIRECTION_SIGN = {"above": "> ", "below": "< ", "abs_above": "±"}


def worst_state(states) -> str:
    """Most severe of ``states`` ("normal" < "warning" < "alarm"); "unknown" when none is known."""
    known = [s for s in states if s in STATES]
    return max(known, key=STATES.index) if known else "unknown"


def state_text(state: str) -> str:
    """A state as symbol and word, e.g. ``"‼ alarm"`` (readable without colour)."""
    return f"{SYMBOLS.get(state, SYMBOLS['unknown'])} {state}"


def format_value(value: float) -> str:
    """A measured value with about three significant digits; "—" when unknown."""
    try:
        value = float(value)
    except (TypeError, ValueError):
        return "—"
    if not math.isfinite(value):
        return "—"
    a = abs(value)
    if a >= 100:
        return f"{value:.0f}"
    if a >= 10:
        return f"{value:.1f}"
    if a >= 0.1 or a == 0:
        return f"{value:.2f}"
    return f"{value:.3f}"


def format_clock(seconds: float) -> str:
    """Session time as ``m:ss`` or ``h:mm:ss``; "—" when unknown."""
    if not isinstance(seconds, (int, float)) or not math.isfinite(seconds):
        return "—"
    s = int(round(max(seconds, 0.0)))
    h, rest = divmod(s, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def shorten_path(path: str, width: int) -> str:
    """Keep the end of ``path`` (the informative part) within ``width`` characters."""
    if len(path) <= width:
        return path
    return "…" + path[-(width - 1) :] if width > 1 else "…"


@dataclass(frozen=True, slots=True)
class Quantity:
    """A column as shown on screen: ``scale`` turns file units into shown units (fractions → %)."""

    column: str
    unit: str
    label: str = ""
    scale: float = 1.0


@dataclass(frozen=True, slots=True)
class PanelSpec:
    """What a metric panel shows.

    ``choices`` are tried in order: the first column with a finite value in the stream is plotted (e.g. µm when
    the pixel size is known, else px). ``extras`` are shown as numbers beside the main value. ``metrics`` are the
    names whose states decide the panel's state; ``forecast_keys`` pick the forecast texts shown.
    """

    key: str
    title: str
    choices: tuple[Quantity, ...]
    extras: tuple[Quantity, ...] = ()
    forecast_keys: tuple[str, ...] = ()

    @property
    def metrics(self) -> tuple[str, ...]:
        return tuple(dict.fromkeys(q.column for q in self.choices + self.extras))


PANELS: tuple[PanelSpec, ...] = (
    PanelSpec("displacement", "Displacement", (Quantity("displacement_um", "µm"), Quantity("displacement_px", "px"))),
    PanelSpec(
        "z",
        "Z offset",
        (Quantity("z_um", "µm"), Quantity("focus_corr", "", "focus corr")),
        extras=(Quantity("focus_corr", "", "focus"),),
        forecast_keys=("z_um", "focus_corr"),
    ),
    PanelSpec(
        "brightness",
        "Brightness",
        (Quantity("brightness_pct", "%"),),
        extras=(Quantity("bleach_pct_per_min", "%/min", "bleach"),),
        forecast_keys=("baseline_f", "brightness_pct", "bleach_pct_per_min"),
    ),
    PanelSpec(
        "saturation",
        "Saturated",
        (Quantity("saturated_frac", "%", scale=100.0),),
        extras=(Quantity("clipped_frac", "%", "clipped", scale=100.0),),
    ),
    PanelSpec("snr", "SNR", (Quantity("snr", ""),), forecast_keys=("snr",)),
    PanelSpec("line", "Line offset", (Quantity("line_offset_px", "px"),)),
)


def pick_quantity(spec: PanelSpec, history: StreamHistory | None) -> Quantity:
    """The first of ``spec.choices`` with any finite value in ``history`` (the first choice when none has)."""
    if history is not None:
        for q in spec.choices:
            if q.column in history.seen_finite:
                return q
    return spec.choices[0]


def _limit_values(limit, scale: float):
    """(state, value in shown units) for the finite warn and alarm values of a profile limit."""
    for state, attr in (("warning", "warn"), ("alarm", "alarm")):
        try:
            value = float(getattr(limit, attr, math.nan)) * scale
        except (TypeError, ValueError):
            continue
        if math.isfinite(value):
            yield state, value


def levels_of(limit, quantity: Quantity, *, negative: bool) -> tuple[Level, ...]:
    """Warning and alarm lines of a profile limit in shown units; mirrored below zero for ``abs_above``."""
    if limit is None:
        return ()
    mirror = getattr(limit, "direction", "") == "abs_above" and negative
    out = []
    for state, value in _limit_values(limit, quantity.scale):
        out.append(Level(value, state))
        if mirror:
            out.append(Level(-value, state))
    return tuple(out)


def limit_text(limit, quantity: Quantity) -> str:
    """E.g. ``"w warn > 2 · a alarm > 5 µm"`` for a border (the legend of the plot's ``w``/``a`` marks)."""
    if limit is None:
        return ""
    sign = _DIRECTION_SIGN.get(getattr(limit, "direction", ""), "")
    words = {"warning": "w warn", "alarm": "a alarm"}  # w and a mark the levels on the plot's axis
    parts = [f"{words[state]} {sign}{value:.3g}" for state, value in _limit_values(limit, quantity.scale)]
    if not parts:
        return ""
    return " · ".join(parts) + (f" {quantity.unit}" if quantity.unit else "")


#: s: the shortest span a plot shows at the start of a session.
MIN_WINDOW_S = 10.0


def shown_window_s(history: StreamHistory | None, window_s: float) -> float:
    """The plots' span: the session so far (at least :data:`MIN_WINDOW_S`) until it reaches ``window_s``."""
    if history is None or not len(history):
        return window_s
    span = history.newest_time_s - history.oldest_time_s
    if not math.isfinite(span):
        return window_s
    return min(window_s, max(span, MIN_WINDOW_S))


class MetricPanel(Widget):
    """Current value, state (symbol and word) and trend plot of one metric for the shown stream."""

    def __init__(self, spec: PanelSpec, *, id: str | None = None) -> None:
        super().__init__(id=id or f"panel-{spec.key}", classes="metric-panel")
        self.spec = spec
        self.state = "unknown"
        self.border_title = spec.title
        #: Shown as one line (title, value, state) without a plot: the compact layout's less urgent panels.
        self.mini = False

    def compose(self) -> ComposeResult:
        with Horizontal(classes="reading"):
            yield Static("—", classes="value")
            yield Static(state_text("unknown"), classes="state")
        yield Static("", classes="detail")
        yield TrendPlot()

    def show(
        self,
        *,
        history: StreamHistory | None,
        states: dict,
        limits: dict,
        forecasts: dict,
        window_s: float,
    ) -> None:
        """Show the stream in ``history`` with its ``states`` ({metric: state}) and the profile's ``limits``."""
        spec = self.spec
        quantity = pick_quantity(spec, history)
        latest = history.latest if history is not None else {}

        def shown(q: Quantity) -> str:
            raw = latest.get(q.column, math.nan)
            try:
                text = format_value(float(raw) * q.scale)
            except (TypeError, ValueError):
                text = "—"
            return f"{q.label + ' ' if q.label else ''}{text}{' ' + q.unit if q.unit and text != '—' else ''}"

        value = Text()
        if self.mini:
            value.append(f"{spec.title:<13}", style="dim")
        value.append(shown(quantity), style="bold")
        for extra in spec.extras:
            if extra.column != quantity.column:
                value.append(f"  {shown(extra)}")
        self.query_one(".value", Static).update(value)

        known = [states[m] for m in spec.metrics if m in states]
        has_limit = any(m in limits for m in spec.metrics)
        self.state = worst_state(known)
        label = state_text(self.state) if (known or not has_limit) else state_text("unknown")
        if not known and not has_limit:
            label = "· no limit"
        state_widget = self.query_one(".state", Static)
        state_widget.update(label)
        for s in ("normal", "warning", "alarm", "unknown"):
            self.set_class(self.state == s, f"-{s}")

        texts = [forecasts[k] for k in spec.forecast_keys if forecasts.get(k)]
        detail = self.query_one(".detail", Static)
        detail.update(" · ".join(texts))
        detail.display = bool(texts)

        limit = limits.get(quantity.column)
        self.border_subtitle = limit_text(limit, quantity)
        plot = self.query_one(TrendPlot)
        if history is None or not len(history):
            plot.show([], [], t_end=0.0, window_s=window_s)
            return
        window_s = shown_window_s(history, window_s)
        t, v = history.window(quantity.column, window_s=window_s)
        v = v * quantity.scale
        finite = v[v == v]
        plot.show(
            t,
            v,
            t_end=history.newest_time_s,
            window_s=window_s,
            levels=levels_of(limit, quantity, negative=bool(finite.size and finite.min() < 0)),
        )


class SessionHeader(Widget):
    """Session facts (folder, file, frames, frame rate and its origin, elapsed, backlog) and the overall state."""

    def compose(self) -> ComposeResult:
        yield Static("", id="session-facts")
        yield Static(state_text("unknown"), id="overall")

    def show(self, status: Status | None, *, stream_text: str, window_min: int, flags: str,
             shown_s: float | None = None) -> None:
        """Show ``status``; ``stream_text`` names the shown stream, ``flags`` is e.g. "PAUSED"; ``shown_s`` is
        the plots' span while it still grows toward ``window_min``."""
        facts = self.query_one("#session-facts", Static)
        overall = self.query_one("#overall", Static)
        width = max(self.size.width - 14, 20)
        if status is None:
            facts.update(Text(f"waiting for the watch to start …\n{stream_text} · window {window_min} min", no_wrap=True))
            return
        rate = status.frame_rate_hz
        known = isinstance(rate, float) and math.isfinite(rate)
        rate_text = f"{rate:.3g} Hz" if known else status.frame_rate_origin or RATE_UNKNOWN
        if known and status.frame_rate_origin:
            rate_text += f" ({status.frame_rate_origin})"
        first = Text(no_wrap=True, overflow="ellipsis")
        idle = getattr(status, "idle_s", 0.0) or 0.0
        if not flags and idle > 0:
            flags = f"no new frame for {idle:.0f} s"
        flags = flags or status.paused_reason  # ours first (PAUSED, stopping), else the watch's ("waiting …")
        if flags:
            first.append(flags, style="bold reverse")
            first.append(" ")
        folder = shorten_path(status.folder or "—", max((width - len(flags)) // 2, 12))
        first.append(folder, style="bold")
        first.append("  file ")
        first.append(shorten_path(status.current_file or "—", max(width - len(flags) - len(folder) - 8, 8)))
        second = Text(no_wrap=True, overflow="ellipsis")
        second.append(f"{status.frames_measured} frames · ")
        # without a frame rate the header says so loudly: times and per-minute values are blank
        second.append(rate_text, style="bold reverse" if rate_text == RATE_UNKNOWN else "")
        second.append(f" · elapsed {format_clock(status.elapsed_s)}")
        if status.range_text:
            second.append(f" · {status.range_text}")
        if status.backlog_frames:
            second.append(f" · behind by {status.backlog_frames} frames", style="bold reverse")
        stream_part = f" · {stream_text}" if len(status.streams or ()) > 1 else ""  # one stream: no news
        if shown_s is not None and shown_s < 60.0 * window_min:
            second.append(f"{stream_part} · plots {format_clock(shown_s)}/{window_min} min")
        else:
            second.append(f"{stream_part} · {window_min}-min plots")
        facts.update(Text("\n").join([first, second]))
        overall.update(Text(f"{state_text(status.overall)}\noverall", justify="center"))
        for s in ("normal", "warning", "alarm", "unknown"):
            overall.set_class(status.overall == s, f"-{s}")


_KIND_TEXT = {
    "note": "✎ note",
    "reference": "⟲ reference",
    "problem": "✗ problem",
    "detector": "▣ detector",
    "idle": "⏸ no frames",
    "resumed": "▶ frames again",
    "step": "! brightness step",
}


def event_cells(event: Event) -> tuple[str, str, str, str]:
    """The cells (time, stream, what, detail) of an event row; no wall-clock time, so replays show the same."""
    unit = BY_NAME[event.metric].unit if event.metric in BY_NAME else ""
    if event.kind == "end":
        when = f"{format_clock(event.started_time_s)}–{format_clock(event.time_s)}"
        if event.closed_by:  # the session ended while the state was open: not a recovery
            what = f"■ {event.state} open at end"
        else:
            what = f"{SYMBOLS['normal']} {event.state} ended"
    elif event.kind == "start":
        when = format_clock(event.time_s)
        what = state_text(event.state or "unknown")
    else:
        when = format_clock(event.time_s)
        what = _KIND_TEXT.get(event.kind, event.kind)
    detail = event.message
    if not detail and event.kind in ("start", "end"):
        detail = f"{event.metric} {format_value(event.value)} {unit} (limit {format_value(event.limit)})".strip()
    detail = detail.replace(f" (channel {event.channel}, plane {event.plane})", "")  # the stream cell says it
    stream = f"c{event.channel} p{event.plane}"
    return when, stream, what, detail


class EventList(RichLog):
    """Warnings and alarms (when each started and ended, with their advice), notes, reference changes, pauses
    of the acquisition and input problems. Lines wrap at the widget's width: no event text is cut."""

    MAX_ROWS = 2000

    def __init__(self, *, id: str | None = None) -> None:
        # min_width: RichLog wraps at no less than this (78 by default: one column cut in an 80-column terminal)
        super().__init__(id=id, wrap=True, markup=False, highlight=False, auto_scroll=True, max_lines=8 * 2000,
                         min_width=20)
        self._rows: list[tuple[str, Text]] = []
        self._width = 0

    def add_events(self, events: list[Event]) -> None:
        """Append rows for ``events`` (oldest first) and scroll to the newest."""
        for event in events:
            row = _event_text(event)
            self._rows.append(row)
            self.write(row[1])
        if len(self._rows) > self.MAX_ROWS:
            del self._rows[: len(self._rows) - self.MAX_ROWS]
            self._rewrite()

    def on_resize(self) -> None:
        if self.size.width != self._width:
            self._width = self.size.width
            self._rewrite()

    def _rewrite(self) -> None:
        self.clear()
        for _, text in self._rows:
            self.write(text)

    def plain_rows(self) -> list[str]:
        """The rows as plain text, oldest first (for people reading logs and for tests)."""
        return [plain for plain, _ in self._rows]


def _event_text(event: Event) -> tuple[str, Text]:
    when, stream, what, detail = event_cells(event)
    style = {"start": event.state, "problem": "alarm", "idle": "warning", "step": "warning"}.get(event.kind, "")
    cell_style = {"warning": "bold yellow", "alarm": "bold red"}.get(style, "bold")
    text = Text(no_wrap=False, overflow="fold")
    text.append(f"{when} ", style="dim")
    text.append(f"{stream} ", style="dim")
    text.append(what, style=cell_style)
    text.append(f"  {detail}")
    plain = "  ".join((when, stream, what, detail))
    if event.advice:
        text.append("\n  → ", style="bold")
        text.append(event.advice, style="italic")
        plain += "  → " + event.advice
    return plain, text
