"""The plain console: events and a status line every few seconds on stdout, for scripts and logs."""

from __future__ import annotations

import math
import sys
import threading
import time
from typing import TextIO

from qcmon.events import SYMBOLS, Event
from qcmon.frames import RATE_UNKNOWN
from qcmon.status import Status


class PlainConsole:
    """A :class:`~qcmon.status.Listener` that prints one line per event and a status line every ``every_s``."""

    def __init__(self, stream: TextIO | None = None, *, every_s: float = 5.0):
        self.stream = stream or sys.stdout
        self.every_s = every_s
        self._last = -math.inf
        self._lock = threading.Lock()
        self.latest: dict[tuple[int, int], dict] = {}
        self._cautioned = False

    def _print(self, text: str) -> None:
        with self._lock:
            print(text, file=self.stream, flush=True)

    def on_rows(self, rows: list[dict]) -> None:
        for r in rows:
            self.latest[(r["channel"], r["plane"])] = r

    def on_event(self, ev: Event) -> None:
        text = format_event(ev)
        if ev.caution and not self._cautioned:  # the profile's caution in full once, beside the first such advice
            text += "\n" + " " * 13 + "caution: " + ev.caution
            self._cautioned = True
        self._print(text)

    def on_status(self, st: Status) -> None:
        now = time.monotonic()
        if now - self._last < self.every_s:
            return
        self._last = now
        self._print(format_status(st, self.latest))


def format_event(ev: Event) -> str:
    t = f"{ev.time_s:8.1f} s" if math.isfinite(ev.time_s) else "       – "
    where = f" ch{ev.channel} pl{ev.plane}" if (ev.channel or ev.plane) else ""
    if ev.kind in ("start", "end"):
        sym = SYMBOLS.get(ev.state, "?")
        verb = "begins" if ev.kind == "start" else "ends"
        if ev.kind == "end" and ev.closed_by:
            verb = "still open at the end"
        head = f"[{t}] {sym} {ev.state} {verb}{where}: "
        text = head + (ev.message or f"{ev.metric} = {ev.value:.4g} (limit {ev.limit:.4g}) at frame {ev.frame}")
    else:
        label = {"note": "note", "reference": "reference", "problem": "input problem",
                 "idle": "no new frame", "resumed": "frames again",
                 "step": "! brightness step"}.get(ev.kind, ev.kind)
        text = f"[{t}] {label}{where}: {ev.message}"
    if ev.advice:
        text += "\n" + " " * 13 + "→ " + ev.advice
    return text


def format_status(st: Status, latest: dict[tuple[int, int], dict]) -> str:
    rate = (f"{st.frame_rate_hz:.3g} Hz ({st.frame_rate_origin})" if math.isfinite(st.frame_rate_hz)
            else st.frame_rate_origin or RATE_UNKNOWN.upper())
    parts = [f"status {SYMBOLS.get(st.overall, '?')} {st.overall}", f"frames {st.frames_measured}",
             f"t {st.elapsed_s:.1f} s" if math.isfinite(st.elapsed_s) else "t –", rate]
    if st.backlog_frames:
        parts.append(f"backlog {st.backlog_frames}")
    if latest:
        r = latest[sorted(latest)[0]]
        disp = r.get("displacement_um")
        if disp is not None and math.isfinite(disp):
            parts.append(f"motion {disp:.2f} µm")
        elif math.isfinite(r.get("displacement_px", math.nan)):
            parts.append(f"motion {r['displacement_px']:.2f} px")
        if math.isfinite(r.get("z_um", math.nan)):
            parts.append(f"z {r['z_um']:+.2f} µm")
        elif math.isfinite(r.get("focus_corr", math.nan)):
            parts.append(f"focus {r['focus_corr']:.3f}")
        if math.isfinite(r.get("brightness_pct", math.nan)):
            parts.append(f"brightness {r['brightness_pct']:.1f} %")
        if math.isfinite(r.get("saturated_frac", math.nan)):
            parts.append(f"saturated {100 * r['saturated_frac']:.2f} %"
                         + (f" ({st.range_text})" if st.range_text else ""))
        if math.isfinite(r.get("snr", math.nan)):
            parts.append(f"SNR {r['snr']:.2f}")
    if getattr(st, "idle_s", 0.0):
        parts.append(f"no new frame for {st.idle_s:.0f} s")
    if st.paused_reason:
        parts.append(st.paused_reason)
    return " | ".join(parts)
