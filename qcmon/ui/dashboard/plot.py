"""A small braille line plot with the warning and alarm levels drawn as lines.

Each character cell holds 2 × 4 braille dots, so a plot of W × H cells has 2W × 4H dots. Per dot column the plot
draws the whole range (min to max) of the values that fall into it, so a one-frame spike stays visible however
long the window. Level lines are drawn with different characters (dotted for warning, heavy for alarm) and a
letter on the axis, so they read without colour.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from rich.text import Text
from textual.widget import Widget

# Bit of dot (row 0..3, column 0..1) in a braille cell (Unicode block U+2800).
_BRAILLE_BITS = np.array([[0x01, 0x08], [0x02, 0x10], [0x04, 0x20], [0x40, 0x80]], dtype=np.int32)
_LEVEL_CHAR = {"warning": "┈", "alarm": "━"}
_LEVEL_MARK = {"warning": "w", "alarm": "a"}
_LEVEL_STYLE = {"warning": "yellow", "alarm": "bold red"}


@dataclass(frozen=True, slots=True)
class Level:
    """A horizontal line across the plot: ``value`` in plot units, ``state`` "warning" or "alarm"."""

    value: float
    state: str


def short_number(value: float) -> str:
    """At most 5 characters for an axis label (e.g. ``12.3``, ``0.05``, ``1.2k``)."""
    if not math.isfinite(value):
        return "—"
    a = abs(value)
    if a >= 10_000:
        return f"{value / 1000:.0f}k"
    if a >= 100:
        return f"{value:.0f}"
    if a >= 10:
        return f"{value:.1f}"
    if a >= 0.01 or a == 0:
        return f"{value:.2f}".rstrip("0").rstrip(".") if a else "0"
    return f"{value:.0e}"


def _column_ranges(t: np.ndarray, v: np.ndarray, t0: float, window_s: float, ncols: int):
    """Min and max of the finite values per dot column; NaN where a column has none. ``t`` must be sorted."""
    lo = np.full(ncols, np.nan)
    hi = np.full(ncols, np.nan)
    if not t.size:
        return lo, hi
    starts = np.searchsorted(t, t0 + window_s * np.arange(ncols) / ncols, side="left")
    starts[0] = 0  # anything older than the window's start belongs to its first column
    stops = np.r_[starts[1:], t.size]
    used = np.flatnonzero(stops > starts)
    if used.size:
        # fmin/fmax skip NaN; a column of only NaN stays NaN.
        lo[used] = np.fmin.reduceat(v, starts[used])
        hi[used] = np.fmax.reduceat(v, starts[used])
    return lo, hi


def render_plot(
    t: np.ndarray,
    v: np.ndarray,
    *,
    width: int,
    height: int,
    t_end: float,
    window_s: float,
    levels: tuple[Level, ...] = (),
) -> Text:
    """Draw values ``v`` at session times ``t`` (s) over ``[t_end - window_s, t_end]`` into ``width × height`` cells.

    The left 7 cells hold the axis: the top and bottom values and a ``w``/``a`` mark at each level's row.
    """
    if width < 1 or height < 1:
        return Text("")
    axis = 7 if width >= 16 else 0
    pw = width - axis
    nrows, ncols = 4 * height, 2 * pw
    lo, hi = _column_ranges(np.asarray(t, float), np.asarray(v, float), t_end - window_s, window_s, ncols)
    have = np.isfinite(lo)
    if not have.any():
        lines = [" " * width for _ in range(height)]
        msg = "no values in this window"
        lines[height // 2] = msg[:width].center(width)
        return Text("\n".join(lines), style="dim", no_wrap=True, overflow="crop")
    vmin, vmax = float(np.nanmin(lo)), float(np.nanmax(hi))
    shown_levels = [lv for lv in levels if math.isfinite(lv.value)]
    for lv in shown_levels:
        vmin, vmax = min(vmin, lv.value), max(vmax, lv.value)
    if vmax - vmin < 1e-12 * max(1.0, abs(vmax)):
        pad = 0.5 if vmax == 0 else abs(vmax) * 0.05
        vmin, vmax = vmin - pad, vmax + pad

    def label(x: float) -> str:
        return short_number(0.0 if abs(x) < 1e-3 * (vmax - vmin) else x)

    def to_row(x):
        return np.clip(np.rint((vmax - np.asarray(x)) / (vmax - vmin) * (nrows - 1)), 0, nrows - 1).astype(int)

    grid = np.zeros((nrows, ncols), dtype=bool)
    top, bottom = to_row(np.where(have, hi, vmin)), to_row(np.where(have, lo, vmin))
    prev_mid = None
    for j in np.flatnonzero(have):
        r0, r1 = top[j], bottom[j]
        if prev_mid is not None and prev_mid[0] == j - 1:  # join to the neighbouring column
            r0, r1 = min(r0, prev_mid[1]), max(r1, prev_mid[1])
        grid[r0 : r1 + 1, j] = True
        prev_mid = (j, (top[j] + bottom[j]) // 2)
    codes = (grid.reshape(height, 4, pw, 2) * _BRAILLE_BITS[None, :, None, :]).sum(axis=(1, 3))

    level_rows: dict[int, Level] = {}
    for lv in sorted(shown_levels, key=lambda lv: lv.state == "alarm"):
        level_rows[int(to_row(lv.value)) // 4] = lv  # alarm wins a shared row

    text = Text(no_wrap=True, overflow="crop")
    for cy in range(height):
        lv = level_rows.get(cy)
        if axis:
            if lv is not None:
                text.append(f"{_LEVEL_MARK[lv.state]}{label(lv.value):>5} "[:axis], style=_LEVEL_STYLE[lv.state])
            elif cy == 0:
                text.append(f"{label(vmax):>6} ", style="dim")
            elif cy == height - 1:
                text.append(f"{label(vmin):>6} ", style="dim")
            else:
                text.append(" " * axis)
        if lv is None:
            text.append("".join(chr(0x2800 + int(c)) if c else " " for c in codes[cy]))
        else:
            for c in codes[cy]:  # data dots win; the level line fills the empty cells
                if c:
                    text.append(chr(0x2800 + int(c)))
                else:
                    text.append(_LEVEL_CHAR[lv.state], style=_LEVEL_STYLE[lv.state])
        if cy < height - 1:
            text.append("\n")
    return text


class TrendPlot(Widget):
    """Trend of one metric over the recent minutes, with its warning and alarm levels.

    The parent sets the data with :meth:`show`; the plot draws at its own size.
    """

    DEFAULT_CSS = """
    TrendPlot { height: 1fr; min-height: 1; }
    """

    def __init__(self, *, name: str | None = None, id: str | None = None, classes: str | None = None) -> None:
        super().__init__(name=name, id=id, classes=classes)
        self._t = np.empty(0)
        self._v = np.empty(0)
        self._t_end = 0.0
        self._window_s = 300.0
        self._levels: tuple[Level, ...] = ()

    def show(self, t, v, *, t_end: float, window_s: float, levels: tuple[Level, ...] = ()) -> None:
        """Set what to draw: values ``v`` at times ``t`` (s), window ending at ``t_end`` (s), ``window_s`` long."""
        if not window_s > 0:
            raise ValueError(f"window_s must be > 0, got {window_s!r}")
        self._t = np.array(t, dtype=float)
        self._v = np.array(v, dtype=float)
        self._t_end = float(t_end) if math.isfinite(t_end) else 0.0
        self._window_s = float(window_s)
        self._levels = tuple(levels)
        self.refresh()

    def render(self) -> Text:
        return render_plot(
            self._t,
            self._v,
            width=self.size.width,
            height=self.size.height,
            t_end=self._t_end,
            window_s=self._window_s,
            levels=self._levels,
        )
