"""What a live watch reports to its consumers (plain console, dashboard) besides rows and events."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Protocol

from qcmon.events import Event


@dataclass(slots=True)
class Status:
    """A snapshot of the watch, sent a few times per second.

    Attributes
    ----------
    folder : str
        The session folder (or file) being watched.
    current_file : str
        File the newest frame came from.
    frames_measured : int
        Rows measured so far, all channels and planes.
    frame_rate_hz : float
        Frame rate (time points per second), NaN when unknown.
    frame_rate_origin : str
        Where the frame rate came from ("OME-TIFF", "option", "measured", ...).
    elapsed_s : float
        Session time of the newest frame, s.
    backlog_frames : int
        Frames complete on disk but not measured yet (0 when qcmon keeps up).
    overall : str
        Worst state over all metrics: "normal", "warning" or "alarm".
    states : dict
        ``{(channel, plane): {metric: state}}``.
    streams : list of (int, int)
        The (channel, plane) pairs seen so far.
    out_dir : str
        Where the record is written.
    forecasts : dict
        ``{metric: text}``, e.g. ``{"baseline_f": "brightness −20 % in ~14 min at this rate"}``.
    facts : dict
        Acquisition facts with origins (``AcquisitionFacts.as_dict()``).
    paused_reason : str
        Non-empty while waiting (e.g. "waiting for frames", "building reference").
    range_text : str
        The detector's saturation level and where it came from (first stream), e.g. "saturates at 4095
        (inferred)"; "" before it is known.
    idle_s : float
        While watching: seconds since the last new frame once that is unusually long (a few seconds, or three
        frame intervals), else 0.
    """

    folder: str = ""
    current_file: str = ""
    frames_measured: int = 0
    frame_rate_hz: float = float("nan")
    frame_rate_origin: str = ""
    elapsed_s: float = 0.0
    backlog_frames: int = 0
    overall: str = "normal"
    states: dict = field(default_factory=dict)
    streams: list = field(default_factory=list)
    out_dir: str = ""
    forecasts: dict = field(default_factory=dict)
    facts: dict = field(default_factory=dict)
    paused_reason: str = ""
    range_text: str = ""
    idle_s: float = 0.0


class Listener(Protocol):
    """Consumer of a live watch. Called from the watch's thread: a UI must hand over to its own thread."""

    def on_rows(self, rows: list[dict]) -> None: ...

    def on_event(self, event: Event) -> None: ...

    def on_status(self, status: Status) -> None: ...
