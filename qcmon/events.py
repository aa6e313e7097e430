"""Threshold events and experimenter notes: what the record, the console and the dashboard show."""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass

#: States of a metric, in order of severity. Shown with a word and a symbol, never by colour alone.
STATES: tuple[str, ...] = ("normal", "warning", "alarm")
SYMBOLS: dict[str, str] = {"normal": "✓", "warning": "!", "alarm": "‼", "unknown": "?"}


@dataclass(slots=True)
class Event:
    """A metric entering or leaving a warning/alarm state, or a note/command of the experimenter.

    Attributes
    ----------
    kind : str
        "start" (a state begins), "end" (it ends), "note" (text from the experimenter), "reference" (a new
        reference was taken), "problem" (bad input that was skipped), "detector" (a level of the detector's range
        found in the data or withdrawn), "idle" (no new frame for a while while watching), "resumed" (frames
        arrive again after an idle event), "step" (a sudden,
        sustained step of the above-dark brightness: detector gain or laser power changed).
    metric : str
        Metric name as in ``traces.csv`` (e.g. "displacement_um"); "" for notes.
    state : str
        "warning" or "alarm" for start/end events; "" otherwise.
    value, limit : float
        Value that triggered the event and the limit it crossed (NaN when not applicable).
    frame, time_s : int, float
        Frame and session time at which the event happened.
    started_frame, started_time_s : int, float
        For "end" events: when the state had started; equal to frame/time_s otherwise.
    channel, plane : int
    message : str
        One line for people.
    wall_time : str
        ISO 8601 local time when the event was emitted.
    advice : str
        For warning/alarm starts (and other events people should act on): what it likely means and what to
        check, in one or two sentences; "" otherwise.
    caution : str
        The profile's caution text when the advice touches laser power, detector gain or the animal; "" otherwise.
        Show it beside the advice.
    closed_by : str
        For "end" events: "" when the value came back within its level, "session end" when the session ended
        while the state was open (not a recovery).
    """

    kind: str
    metric: str = ""
    state: str = ""
    value: float = math.nan
    limit: float = math.nan
    frame: int = -1
    time_s: float = math.nan
    started_frame: int = -1
    started_time_s: float = math.nan
    channel: int = 0
    plane: int = 0
    message: str = ""
    wall_time: str = ""
    advice: str = ""
    caution: str = ""
    closed_by: str = ""

    def to_json(self) -> str:
        d = asdict(self)
        for k, v in d.items():
            if isinstance(v, float) and not math.isfinite(v):
                d[k] = None
        return json.dumps(d, ensure_ascii=False)

    @classmethod
    def from_json(cls, line: str) -> "Event":
        d = json.loads(line)
        for k in ("value", "limit", "time_s", "started_time_s"):
            if d.get(k) is None:
                d[k] = math.nan
        return cls(**d)
