"""Modal screens: help (keys, limits, caution) and the note editor."""

from __future__ import annotations

import math

from rich.table import Table
from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical, VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Input, Label, Static


#: Shown in the help screen when the threshold profile carries no caution of its own.
CAUTION = (
    "qcmon only advises: it never controls the microscope. Decisions on laser power, imaging duration and "
    "animal welfare follow your local rules, your licence and your facility's practice."
)


_WHEN = {"above": "above", "below": "below", "abs_above": "beyond ±"}


def _limits_table(profile) -> Table:
    table = Table(box=None, pad_edge=False, show_edge=False, header_style="bold", expand=False)
    for name in ("metric", "warn", "alarm", "unit", "when", "for at least"):
        table.add_column(name)
    limits = getattr(profile, "limits", None) or {}
    for metric, limit in limits.items():
        persist = getattr(limit, "persist_s", math.nan)
        scale = getattr(limit, "shown_scale", 1.0)  # fractions in the profile, % on screen
        table.add_row(
            getattr(limit, "label", "") or metric,
            f"{getattr(limit, 'warn', math.nan) * scale:.3g}",
            f"{getattr(limit, 'alarm', math.nan) * scale:.3g}",
            getattr(limit, "shown_unit", getattr(limit, "unit", "")),
            _WHEN.get(getattr(limit, "direction", ""), getattr(limit, "direction", "")),
            f"{persist:.3g} s",
        )
    return table


class HelpScreen(ModalScreen[None]):
    """Keys, the threshold profile and the safety caution."""

    BINDINGS = [
        Binding("escape", "close", "Close"),
        Binding("question_mark", "close", "Close", show=False),
        Binding("h", "close", "Close", show=False),
    ]

    def __init__(self, *, keys: list[tuple[str, str]], profile) -> None:
        super().__init__()
        self._keys = keys
        self._profile = profile

    def compose(self) -> ComposeResult:
        keys = Table(box=None, show_header=False, pad_edge=False)
        keys.add_column(style="bold")
        keys.add_column()
        for key, text in self._keys:
            keys.add_row(key, text)
        name = getattr(self._profile, "name", "") or "—"
        caution = getattr(self._profile, "caution", "") or ""
        with Vertical(id="help-box"):
            with VerticalScroll(id="help-body"):
                yield Static(Text("Keys", style="bold underline"))
                yield Static(keys)
                yield Static(Text("\nCaution", style="bold underline"))
                # Every profile carries its caution; this general one stands in for a profile without.
                yield Static(caution or CAUTION, id="caution")
                yield Static(Text(f"\nThreshold profile: {name}", style="bold underline"))
                yield Static(_limits_table(self._profile))
                yield Static(Text("\nA state is entered when the value was beyond its level for more than "
                                  "\"for at least\" within twice that time, and left when less than a quarter "
                                  "of that time was beyond it.", style="dim"))
            # outside the scrolling part: always visible, whatever the terminal's height
            yield Static(Text("esc closes this help · ↑↓ scroll", style="dim"), id="help-close")

    def action_close(self) -> None:
        self.dismiss(None)


class NoteScreen(ModalScreen[str | None]):
    """One line of text for the session record; enter saves, escape cancels."""

    BINDINGS = [Binding("escape", "cancel", "Cancel")]

    def compose(self) -> ComposeResult:
        with Vertical(id="note-box"):
            yield Label("Note for the session record")
            yield Input(placeholder="e.g. refocused, added water, animal moved", id="note-input")
            yield Label(Text("enter saves · esc cancels", style="dim"))

    def on_input_submitted(self, event: Input.Submitted) -> None:
        text = event.value.strip()
        self.dismiss(text or None)

    def action_cancel(self) -> None:
        self.dismiss(None)
