"""Recent values of one (channel, plane) stream, kept for the trend plots.

The dashboard computes no metric: it only keeps what the watch already measured, for at most the longest plot
window, so memory does not grow with the length of the session.
"""

from __future__ import annotations

import math

import numpy as np

from qcmon.frames import UNTIMED_FRAMES_PER_S

#: Columns of ``traces.csv`` that the panels show.
SHOWN_COLUMNS: tuple[str, ...] = (
    "displacement_um",
    "displacement_px",
    "z_um",
    "focus_corr",
    "brightness_pct",
    "bleach_pct_per_min",
    "saturated_frac",
    "clipped_frac",
    "snr",
    "line_offset_px",
)


def _as_float(value: object) -> float:
    try:
        return float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return math.nan


class StreamHistory:
    """Session times and shown columns of the newest rows of one stream.

    Parameters
    ----------
    keep_s : float
        Rows older than this (s, before the newest row) are dropped.
    columns : tuple of str
        Columns to keep.
    """

    def __init__(self, *, keep_s: float = 3600.0, columns: tuple[str, ...] = SHOWN_COLUMNS) -> None:
        if not keep_s > 0:
            raise ValueError(f"keep_s must be > 0, got {keep_s!r}")
        self.keep_s = float(keep_s)
        self.columns = tuple(columns)
        self._index = {name: i for i, name in enumerate(self.columns)}
        self._t = np.empty(256)
        self._v = np.empty((256, len(self.columns)))
        self._start = 0
        self._stop = 0
        self.latest: dict = {}
        self.seen_finite: set[str] = set()
        self._untimed: bool | None = None

    def __len__(self) -> int:
        return self._stop - self._start

    def append(self, row: dict) -> None:
        """Add one row (a dict keyed by column name, NaN for unknown)."""
        t = _as_float(row.get("time_s"))
        if self._untimed is None:
            self._untimed = not math.isfinite(t)
        if self._untimed or not math.isfinite(t):  # no time base at the start: the frame counts throughout
            frame = _as_float(row.get("frame"))  # (the plots have no time axis; a rate found later keeps it)
            t = (frame / UNTIMED_FRAMES_PER_S if math.isfinite(frame)
                 else self._t[self._stop - 1] if len(self) else 0.0)
        if self._stop == len(self._t):
            self._make_room()
        self._t[self._stop] = t
        values = self._v[self._stop]
        for name, i in self._index.items():
            v = _as_float(row.get(name))
            values[i] = v
            if math.isfinite(v):
                self.seen_finite.add(name)
        self._stop += 1
        self.latest = row
        # Rows come in time order per stream; drop what no window can show any more.
        cut = np.searchsorted(self._t[self._start : self._stop], t - self.keep_s, side="left")
        self._start += int(cut)

    def _make_room(self) -> None:
        n = len(self)
        size = len(self._t)
        if n > size // 2:
            size *= 2
        t = np.empty(size)
        v = np.empty((size, len(self.columns)))
        t[:n] = self._t[self._start : self._stop]
        v[:n] = self._v[self._start : self._stop]
        self._t, self._v, self._start, self._stop = t, v, 0, n

    @property
    def oldest_time_s(self) -> float:
        """Session time of the oldest row kept, s (NaN when empty)."""
        return float(self._t[self._start]) if len(self) else math.nan

    @property
    def newest_time_s(self) -> float:
        """Session time of the newest row, s (NaN when empty)."""
        return float(self._t[self._stop - 1]) if len(self) else math.nan

    def window(self, column: str, *, window_s: float) -> tuple[np.ndarray, np.ndarray]:
        """Times (s) and values of ``column`` over the last ``window_s`` seconds (views, do not modify)."""
        if column not in self._index:
            raise ValueError(f"column must be one of {self.columns}, got {column!r}")
        t = self._t[self._start : self._stop]
        if not len(t):
            return t, t
        lo = int(np.searchsorted(t, t[-1] - window_s, side="left"))
        return t[lo:], self._v[self._start + lo : self._stop, self._index[column]]
