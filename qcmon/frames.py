"""The unit that flows from sources to the engine: one 2-D image of one channel and plane."""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np


#: Without a frame rate, windows and persistence are counted in frames: this many frames stand for one second of
#: them (typical two-photon and camera rates are 15–60 Hz: common practice, no source). Never used for a time or
#: a per-minute value that is shown or recorded: those are blank without a frame rate.
UNTIMED_FRAMES_PER_S = 30.0

#: Said wherever a time or a per-minute value is blank because the frame rate is unknown.
RATE_UNKNOWN = "frame rate unknown: give --frame-rate"


@dataclass(frozen=True, slots=True)
class Frame:
    """One image as acquired.

    Attributes
    ----------
    data : (M, N) ndarray
        Pixel values in the detector's native dtype (rows, columns). Never modified by qcmon.
    index : int
        Time-point index of this frame within its (channel, plane), from 0.
    channel, plane : int
        Channel and plane (0-based) when the session interleaves several.
    time_s : float
        Seconds from the session's first frame; NaN when unknown (the engine then uses the frame rate, and leaves
        times blank without one).
    source : str
        File the frame was read from ("" for in-memory frames).
    page : int
        Page within ``source`` (0-based), -1 when not applicable.
    """

    data: np.ndarray
    index: int
    channel: int = 0
    plane: int = 0
    time_s: float = math.nan
    source: str = ""
    page: int = -1


@dataclass(slots=True)
class Fact:
    """An acquisition fact and where it came from (e.g. "OME-TIFF", "TIFF resolution tag", "option", "profile")."""

    value: object
    origin: str


@dataclass(slots=True)
class AcquisitionFacts:
    """What is known about the acquisition, each value with its origin.

    Keys used: ``frame_rate_hz``, ``pixel_size_um``, ``z_step_um``, ``bit_depth``, ``channels``, ``planes``,
    ``dtype``, ``shape``.
    """

    facts: dict[str, Fact] = field(default_factory=dict)

    def get(self, key: str, default=None):
        fact = self.facts.get(key)
        return default if fact is None else fact.value

    def set(self, key: str, value, origin: str, *, override: bool = False) -> None:
        """Record ``value`` unless a fact is already known (``override`` replaces it)."""
        if value is None:
            return
        if override or key not in self.facts:
            self.facts[key] = Fact(value, origin)

    def as_dict(self) -> dict[str, dict[str, object]]:
        return {k: {"value": _plain(f.value), "origin": f.origin} for k, f in self.facts.items()}


def _plain(value):
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, tuple):
        return list(value)
    return value
