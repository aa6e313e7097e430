"""Threshold profiles and the tracker that turns measurement rows into warning/alarm events.

A profile is a TOML file in ``thresholds/`` (or a folder named by the environment variable
``QCMON_THRESHOLDS``, or any path). Layout::

    description = "Awake, head-fixed two-photon imaging"
    caution = "qcmon only advises; ..."
    extends = "default"          # optional: start from another profile (name or path)

    [limits.displacement_um]
    warn = 2.0                   # µm; common practice, no source
    alarm = 5.0
    direction = "above"          # "above", "below" or "abs_above"
    persist_s = 1.0              # s the value must stay beyond (and back within) before the state changes
    label = "Displacement"
    unit = "µm"
    # enabled = false            # drops a metric inherited from the extended profile

Every metric is a column of ``traces.csv`` (:mod:`qcmon.columns`). A profile that extends another replaces
only the keys it names (per metric). An invalid profile raises :class:`qcmon.errors.ProfileError` naming the
file, the key and the allowed values, when it is loaded — before any frame is measured.

The tracker's rule (per channel, plane and metric, on session time ``time_s``) judges the time spent beyond a
level, so that a level crossed again and again (a burst of motion) counts as much as one long excursion:

* each frame stands for the time since the stream's previous frame, at most ``persist_s`` (so that one frame,
  after a pause in the acquisition or at a slow frame rate, never enters a state alone);
* a metric **enters** a more severe state when its value was beyond that state's level for more than
  ``persist_s`` seconds of the trailing window of ``2 × persist_s`` seconds (``2.5`` frame intervals when frames
  are further apart; one noisy frame never does; a steady excursion enters after ``persist_s``, as before; a
  burst beyond the level more than half the time does);
* it **leaves** the state when less than ``persist_s / 2`` of the trailing window was beyond the level (a
  steady return ends it after ``1.5 × persist_s``); the new state is the most severe lower level still beyond
  for at least ``persist_s / 2`` of the window, else normal;
* ``persist_s = 0`` follows the value frame by frame;
* a change of state is an ``end`` event of the old state followed by a ``start`` event of the new one
  (warning → alarm: end of warning + start of alarm; alarm → warning: end of alarm + start of warning);
  a ``start`` event carries ``advice`` (what the state likely means and what to check, :mod:`qcmon.advice`)
  and, where that advice touches laser power, gain or the animal, the profile's ``caution``;
* unknown values (NaN or a missing column) count for no level and keep the current state; a row with an
  unknown ``time_s`` and no frame index is skipped; ``displacement_px`` is judged only in rows without ``displacement_um`` (when
  the profile limits that: the pixel size is unknown), so one movement raises one event;
* :meth:`ThresholdTracker.close` ends open states at the session's end with ``end`` events whose
  ``closed_by`` is ``"session end"``, and keeps the states as they were (the end is not a recovery);
* without a time (``time_s`` blank: no timestamps and no frame rate) the window runs on the frame index,
  :data:`qcmon.frames.UNTIMED_FRAMES_PER_S` frames for each second of ``persist_s``; the events then carry no
  time and their messages count frames.

Values of fractions (``saturated_frac``, ``clipped_frac``) are written in messages as % of pixels, as on screen.
"""

from __future__ import annotations

import math
import os
import sys
from collections import deque
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Mapping

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on Python 3.10 only
    import tomli as tomllib

import qcmon
from qcmon.columns import BY_NAME
from qcmon.errors import ProfileError
from qcmon.events import STATES, Event
from qcmon.frames import RATE_UNKNOWN, UNTIMED_FRAMES_PER_S

__all__ = [
    "DIRECTIONS",
    "METRICS",
    "PERCENT_METRICS",
    "Limit",
    "Profile",
    "ThresholdTracker",
    "list_profiles",
    "load_profile",
    "profile_dirs",
]

#: How a value is compared with its levels.
DIRECTIONS: tuple[str, ...] = ("above", "below", "abs_above")

#: Columns of ``traces.csv`` a profile may set limits on (the numeric measurement columns).
METRICS: tuple[str, ...] = tuple(
    c.name for c in BY_NAME.values() if c.kind == "float" and c.name != "time_s"
)

#: Metrics stored as fractions (0..1) in the record and shown as % of pixels in messages and on screen.
PERCENT_METRICS: tuple[str, ...] = ("saturated_frac", "clipped_frac")

_TOP_KEYS = ("description", "caution", "extends", "limits")
_LIMIT_KEYS = ("warn", "alarm", "direction", "persist_s", "label", "unit", "enabled")
_REQUIRED_LIMIT_KEYS = ("warn", "alarm", "direction", "persist_s")
_ENV = "QCMON_THRESHOLDS"
#: Levels a metric can reach at all (fractions 0..1, correlations −1..1); any other level beyond ±_MAX_LEVEL of
#: its unit (µm, px, %, %/min, DN, photons) is taken for a typing error, as is persistence beyond a day.
_LEVEL_RANGES = {"saturated_frac": (0.0, 1.0), "clipped_frac": (0.0, 1.0), "reg_corr": (-1.0, 1.0),
                 "z_corr": (-1.0, 1.0), "focus_corr": (-1.0, 1.0)}
_MAX_LEVEL = 1e6
_MAX_PERSIST_S = 86400.0
_RANK = {s: i for i, s in enumerate(STATES)}


@dataclass(frozen=True, slots=True)
class Limit:
    """Warning and alarm levels of one metric.

    Attributes
    ----------
    metric : str
        Column of ``traces.csv`` (e.g. ``"displacement_um"``).
    warn, alarm : float
        Levels in the metric's unit. For ``"above"`` alarm ≥ warn; for ``"below"`` alarm ≤ warn; for
        ``"abs_above"`` 0 ≤ warn ≤ alarm and the levels apply to ``abs(value)``.
    direction : str
        ``"above"``, ``"below"`` or ``"abs_above"``.
    persist_s : float
        Seconds (session time) a value must stay beyond a level before the state is entered, and back within it
        before the state is left.
    label, unit : str
        For display (e.g. ``"Displacement"``, ``"µm"``).
    """

    metric: str
    warn: float
    alarm: float
    direction: str
    persist_s: float
    label: str
    unit: str

    def state_of(self, value: float) -> str:
        """Instantaneous state of ``value`` (no persistence).

        Returns
        -------
        state : str
            ``"normal"``, ``"warning"`` or ``"alarm"``; ``"unknown"`` when ``value`` is NaN or missing (the
            tracker then keeps the previous state).
        """
        try:
            v = float(value)
        except (TypeError, ValueError):
            return "unknown"
        if math.isnan(v):
            return "unknown"
        if self.direction == "below":
            return "alarm" if v < self.alarm else "warning" if v < self.warn else "normal"
        if self.direction == "abs_above":
            v = abs(v)
        return "alarm" if v > self.alarm else "warning" if v > self.warn else "normal"

    def level(self, state: str) -> float:
        """The level belonging to ``state`` ("warning" or "alarm")."""
        return self.alarm if state == "alarm" else self.warn

    @property
    def shown_scale(self) -> float:
        """Factor from the file's unit to the unit shown to people (100 for fractions shown in %)."""
        return 100.0 if self.metric in PERCENT_METRICS and self.unit in ("", "%") else 1.0

    @property
    def shown_unit(self) -> str:
        """The unit shown to people: ``"%"`` for fractions, else :attr:`unit`."""
        return "%" if self.shown_scale == 100.0 else self.unit

    def show(self, value: float) -> str:
        """``value`` in the shown unit, e.g. ``"1.2 %"`` for ``saturated_frac = 0.012``; "unknown" for NaN."""
        try:
            v = float(value) * self.shown_scale
        except (TypeError, ValueError):
            return "unknown"
        if math.isnan(v):
            return "unknown"
        unit = self.shown_unit
        text = f"{v:.0f}" if abs(v) >= 1000 else f"{v:.3g}"
        return f"{text}{' ' + unit if unit else ''}"

    def describe(self, state: str) -> str:
        """E.g. ``"above 5 µm (alarm level)"`` or ``"beyond ±2 µm (warning level)"``, in the shown unit."""
        word = {"above": "above", "below": "below", "abs_above": "beyond ±"}[self.direction]
        return f"{word}{'' if word.endswith('±') else ' '}{self.show(self.level(state))} ({state} level)"


@dataclass(frozen=True, slots=True)
class Profile:
    """A loaded threshold profile.

    Attributes
    ----------
    name : str
        File stem (e.g. ``"awake_headfixed"``).
    path : pathlib.Path
        The TOML file.
    description : str
    caution : str
        Text shown wherever advice touches laser power or the animal.
    limits : dict of str to Limit
        Keyed by metric (column name).
    extends : tuple of str
        Names of the profiles this one was built on, nearest first.
    """

    name: str
    path: Path
    description: str
    caution: str
    limits: dict[str, Limit] = field(default_factory=dict)
    extends: tuple[str, ...] = ()


def profile_dirs() -> list[Path]:
    """Folders searched for profiles by name: ``$QCMON_THRESHOLDS`` (``os.pathsep``-separated), then the bundled ones.

    The bundled profiles are ``thresholds/`` at the top of a checkout (editable install) or ``qcmon/profiles/``
    inside an installed package (pyproject.toml maps the one onto the other)."""
    dirs = [Path(p) for p in os.environ.get(_ENV, "").split(os.pathsep) if p]
    package = Path(qcmon.__file__).resolve().parent
    installed = package / "profiles"
    dirs.append(installed if installed.is_dir() else package.parent / "thresholds")
    return dirs


def list_profiles() -> dict[str, Path]:
    """Profiles that can be loaded by name, ``{name: path}``; earlier folders of :func:`profile_dirs` win."""
    found: dict[str, Path] = {}
    for d in profile_dirs():
        if d.is_dir():
            for p in sorted(d.glob("*.toml")):
                found.setdefault(p.stem, p)
    return dict(sorted(found.items()))


def load_profile(name_or_path: str | os.PathLike) -> Profile:
    """Load and validate a threshold profile.

    Parameters
    ----------
    name_or_path : str or path-like
        A profile name (file stem looked up in :func:`profile_dirs`) or the path of a TOML file.

    Returns
    -------
    Profile

    Raises
    ------
    ProfileError
        Unknown name, unreadable file, bad TOML, unknown key or metric, wrong type, levels on the wrong side
        for the direction, negative persistence, or a cycle of ``extends``. The message names the file and key.
    """
    return _load(_resolve(name_or_path, None), ())


def _resolve(name_or_path: str | os.PathLike, relative_to: Path | None) -> Path:
    text = os.fspath(name_or_path)
    if isinstance(name_or_path, os.PathLike) or text.endswith(".toml") or os.sep in text or "/" in text:
        p = Path(text).expanduser()
        if not p.is_absolute() and relative_to is not None:
            p = relative_to.parent / p
        if not p.is_file():
            raise ProfileError(f"{p}: threshold profile not found")
        return p
    available = list_profiles()
    if text not in available:
        raise ProfileError(
            f"unknown threshold profile {text!r}; allowed: {', '.join(available) or '(none found)'} "
            f"(searched {', '.join(str(d) for d in profile_dirs())}), or give the path of a .toml file"
        )
    return available[text]


def _load(path: Path, chain: tuple[Path, ...]) -> Profile:
    path = path.resolve()
    if path in chain:
        raise ProfileError(
            f"{path}: key 'extends': profiles extend each other in a cycle: "
            + " -> ".join(str(p.name) for p in (*chain, path))
        )
    try:
        with open(path, "rb") as fh:
            doc = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(f"{path}: not valid TOML: {exc}") from None
    except UnicodeDecodeError as exc:
        raise ProfileError(f"{path}: not UTF-8 text (byte 0x{exc.object[exc.start]:02x} at byte {exc.start}); "
                           "TOML files are UTF-8: save the profile as UTF-8") from None
    except OSError as exc:
        raise ProfileError(f"{path}: cannot read threshold profile: {exc.strerror or exc}") from None

    def err(key: str, what: str) -> ProfileError:
        return ProfileError(f"{path}: key '{key}': {what}")

    for key in doc:
        if key not in _TOP_KEYS:
            raise err(key, f"unknown key; allowed: {', '.join(_TOP_KEYS)}")
    for key in ("description", "caution", "extends"):
        if key in doc and not isinstance(doc[key], str):
            raise err(key, f"must be a string, got {type(doc[key]).__name__}")
    limits_doc = doc.get("limits", {})
    if not isinstance(limits_doc, dict):
        raise err("limits", "must be a table of metrics ([limits.<metric>])")

    if "extends" in doc:
        try:
            base = _load(_resolve(doc["extends"], path), (*chain, path))
        except ProfileError as exc:
            raise err("extends", str(exc)) from None
        merged = {m: _limit_fields(lim) for m, lim in base.limits.items()}
        description, caution = base.description, base.caution
        extends = (base.name, *base.extends)
    else:
        merged, description, caution, extends = {}, "", "", ()

    for metric, table in limits_doc.items():
        where = f"limits.{metric}"
        if metric not in METRICS:
            raise err(where, f"unknown metric; allowed: {', '.join(METRICS)}")
        if not isinstance(table, dict):
            raise err(where, "must be a table with keys " + ", ".join(_LIMIT_KEYS))
        for key, value in table.items():
            if key not in _LIMIT_KEYS:
                raise err(f"{where}.{key}", f"unknown key; allowed: {', '.join(_LIMIT_KEYS)}")
            _check_type(err, f"{where}.{key}", key, value)
        if table.get("enabled", True) is False:
            merged.pop(metric, None)
            continue
        fields = merged.setdefault(metric, {})
        fields.update({k: v for k, v in table.items() if k != "enabled"})

    limits: dict[str, Limit] = {}
    for metric, fields in merged.items():
        where = f"limits.{metric}"
        for key in _REQUIRED_LIMIT_KEYS:
            if key not in fields:
                raise err(f"{where}.{key}", "missing; every metric needs " + ", ".join(_REQUIRED_LIMIT_KEYS))
        warn, alarm, direction = float(fields["warn"]), float(fields["alarm"]), fields["direction"]
        low, high = _LEVEL_RANGES.get(metric, (-_MAX_LEVEL, _MAX_LEVEL))
        for key, value in (("warn", warn), ("alarm", alarm)):
            if not low <= value <= high:
                raise err(f"{where}.{key}", f"{_fmt(value)} is outside the values {metric} can take or a user "
                                            f"would set ({_fmt(low)} .. {_fmt(high)})")
        if float(fields["persist_s"]) > _MAX_PERSIST_S:
            raise err(f"{where}.persist_s", f"{_fmt(float(fields['persist_s']))} s is longer than a day "
                                            f"(at most {_fmt(_MAX_PERSIST_S)} s)")
        if direction == "above" and alarm < warn:
            raise err(where, f"direction 'above' needs alarm >= warn (warn={_fmt(warn)}, alarm={_fmt(alarm)})")
        if direction == "below" and alarm > warn:
            raise err(where, f"direction 'below' needs alarm <= warn (warn={_fmt(warn)}, alarm={_fmt(alarm)})")
        if direction == "abs_above" and not 0 <= warn <= alarm:
            raise err(where, f"direction 'abs_above' needs 0 <= warn <= alarm (warn={_fmt(warn)}, alarm={_fmt(alarm)})")
        column = BY_NAME[metric]
        limits[metric] = Limit(
            metric=metric,
            warn=warn,
            alarm=alarm,
            direction=direction,
            persist_s=float(fields["persist_s"]),
            label=fields.get("label", metric.replace("_", " ")),
            unit=fields.get("unit", column.unit),
        )
    description = doc.get("description", description)
    caution = doc.get("caution", caution)
    if not caution.strip():
        raise err("caution", "missing or empty (set it here or in the profile this one extends); "
                             "every profile carries the caution shown beside advice on laser power")
    return Profile(name=path.stem, path=path, description=description, caution=caution, limits=limits,
                   extends=extends)


def _limit_fields(lim: Limit) -> dict[str, object]:
    return {"warn": lim.warn, "alarm": lim.alarm, "direction": lim.direction, "persist_s": lim.persist_s,
            "label": lim.label, "unit": lim.unit}


def _check_type(err, where: str, key: str, value: object) -> None:
    if key in ("warn", "alarm", "persist_s"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise err(where, f"must be a number, got {type(value).__name__} {value!r}")
        if not math.isfinite(value):
            raise err(where, f"must be a finite number, got {value!r}")
        if key == "persist_s" and value < 0:
            raise err(where, f"must be >= 0 seconds, got {value!r}")
    elif key == "direction":
        if value not in DIRECTIONS:
            raise err(where, f"got {value!r}; allowed: {', '.join(DIRECTIONS)}")
    elif key in ("label", "unit"):
        if not isinstance(value, str):
            raise err(where, f"must be a string, got {type(value).__name__}")
    elif key == "enabled":
        if not isinstance(value, bool):
            raise err(where, f"must be true or false, got {value!r}")


def _fmt(v: float) -> str:
    return f"{v:.4g}"


def _now() -> str:
    return datetime.now().astimezone().isoformat(timespec="seconds")


@dataclass(slots=True)
class _MetricState:
    state: str = "normal"
    started_frame: int = -1
    started_time_s: float = math.nan
    # known frames of the trailing window: (time_s, weight_s, rank, value, frame)
    window: deque = field(default_factory=deque)
    # seconds of the window spent at or beyond the warning (index 1) and alarm (index 2) levels
    beyond: list = field(default_factory=lambda: [0.0, 0.0, 0.0])
    span: float = 0.0  # length of the window at the last frame, s


_EPS = 1e-6  # s: sums of frame intervals are compared with this tolerance
#: Metrics judged only in rows where the metric named here is unknown (the pixel size is unknown).
_FALLBACK = {"displacement_px": "displacement_um"}


class ThresholdTracker:
    """Turns measurement rows into warning/alarm events according to a :class:`Profile`.

    Parameters
    ----------
    profile : Profile

    Notes
    -----
    Each (channel, plane) and metric is tracked independently; see the module docstring for the rule.
    Rows of one (channel, plane) must come in acquisition order. The public state a resumed watch needs to
    rebuild is built by feeding the same rows again through :meth:`update` (the events it returns then are the
    ones already recorded).
    """

    def __init__(self, profile: Profile):
        if not isinstance(profile, Profile):
            raise ValueError(f"profile must be a Profile (see load_profile), got {type(profile).__name__}")
        self.profile = profile
        self._state: dict[tuple[int, int], dict[str, _MetricState]] = {}
        self._last_row: dict[tuple[int, int], Mapping[str, object]] = {}
        self._timed: dict[tuple[int, int], bool] = {}
        self._last_t: dict[tuple[int, int], float] = {}

    @property
    def states(self) -> dict[tuple[int, int], dict[str, str]]:
        """Current state per (channel, plane) and metric: ``"normal"``, ``"warning"`` or ``"alarm"``.

        After :meth:`close` the states stay as they were when the session ended (the session's end is not a
        recovery).
        """
        return {key: {m: s.state for m, s in per.items()} for key, per in self._state.items()}

    @property
    def overall(self) -> str:
        """The worst current state over every channel, plane and metric (``"normal"`` before any row)."""
        worst = "normal"
        for per in self._state.values():
            for s in per.values():
                if _RANK[s.state] > _RANK[worst]:
                    worst = s.state
        return worst

    def update(self, row: Mapping[str, object]) -> list[Event]:
        """Feed one measurement row; return the events it causes (possibly none).

        Parameters
        ----------
        row : mapping
            Keyed by :data:`qcmon.columns.NAMES`; needs ``frame``, ``time_s``, ``channel``, ``plane``.
        """
        key = (int(row.get("channel", 0)), int(row.get("plane", 0)))
        per = self._state.get(key)
        if per is None:
            per = self._state[key] = {m: _MetricState() for m in self.profile.limits}
        self._last_row[key] = row
        frame = int(row.get("frame", -1))
        t = _as_float(row.get("time_s"))
        # Without a time (no timestamp, no frame rate) persistence is counted in frames (UNTIMED_FRAMES_PER_S a
        # second); events then carry no time. When the stream's time base changes (a rate estimated later), the
        # runs in progress start again on the new clock.
        timed = math.isfinite(t)
        clock = t if timed else (frame / UNTIMED_FRAMES_PER_S if frame >= 0 else math.nan)
        events: list[Event] = []
        if not math.isfinite(clock):
            return events  # neither a time nor a frame index: nothing can be counted, every state is kept
        if self._timed.setdefault(key, timed) != timed:
            self._timed[key] = timed
            self._last_t.pop(key, None)
            for ms in per.values():
                ms.window.clear()
                ms.beyond = [0.0, 0.0, 0.0]
        t_prev = self._last_t.get(key, math.nan)
        self._last_t[key] = clock
        interval = clock - t_prev if math.isfinite(t_prev) and clock > t_prev else 0.0
        for metric, lim in self.profile.limits.items():
            ms = per[metric]
            p = lim.persist_s
            win = ms.window
            # forget frames older than the window: 2 × persist_s, or 2.5 frame intervals at slow frame rates (so
            # that the window always holds the previous frames)
            span = max(2.0 * p, 2.5 * interval)
            ms.span = span
            while win and win[0][0] <= clock - span + _EPS * 1e-3:
                old = win.popleft()
                for level in range(1, old[2] + 1):
                    ms.beyond[level] -= old[1]
                if not win:
                    ms.beyond = [0.0, 0.0, 0.0]
            value = _as_float(row.get(metric))
            if metric in _FALLBACK and _FALLBACK[metric] in self.profile.limits \
                    and math.isfinite(_as_float(row.get(_FALLBACK[metric]))):
                value = math.nan  # the same quantity is judged in its physical unit
            now = lim.state_of(value)
            if now == "unknown":
                continue  # counts for no level; the state is kept
            rank = _RANK[now]
            weight = min(interval, p)  # one frame (after a gap, or at a slow rate) never enters a state alone
            if p > 0:
                win.append((clock, weight, rank, value, frame))
                for level in range(1, rank + 1):
                    ms.beyond[level] += weight
                target = _target(ms, p)
            else:
                target = now
            if target != ms.state:
                events.extend(self._change(key, ms, lim, target, value, frame, t, row=row))
        return events

    def close(self, row: Mapping[str, object] | None = None) -> list[Event]:
        """End every open warning/alarm at the end of the session.

        Parameters
        ----------
        row : mapping, optional
            The session's last row (frame, time_s, channel, plane); by default the last row seen for each
            (channel, plane).

        Returns
        -------
        list of Event
            One ``end`` event per open state, its message saying the session ended it and its ``closed_by``
            ``"session end"``. :attr:`states` keep the states the session ended in.
        """
        events: list[Event] = []
        for key, per in self._state.items():
            last = self._last_row.get(key, {})
            if row is not None and (int(row.get("channel", 0)), int(row.get("plane", 0))) == key:
                last = row
            frame = int(last.get("frame", -1))
            t = _as_float(last.get("time_s"))
            for metric, ms in per.items():
                if ms.state != "normal":
                    lim = self.profile.limits[metric]
                    state = ms.state
                    events.extend(self._change(key, ms, lim, "normal", _as_float(last.get(metric)), frame, t,
                                               by_session_end=True))
                    ms.state = state  # the session's end is not a recovery: the state is shown as it ended
                ms.window.clear()
                ms.beyond = [0.0, 0.0, 0.0]
        return events

    def _change(self, key, ms: _MetricState, lim: Limit, target: str, value: float, frame: int, t: float,
                *, by_session_end: bool = False, row: Mapping[str, object] | None = None) -> list[Event]:
        from qcmon.advice import advice_for

        channel, plane = key
        where = f" (channel {channel}, plane {plane})"
        timed = math.isfinite(t)
        # without a time base, spans are said in frames (never in assumed seconds)
        span_text = (f"{_fmt(ms.span)} s" if timed
                     else f"{_fmt(round(ms.span * UNTIMED_FRAMES_PER_S))} frames ({RATE_UNKNOWN})")
        events = []
        if ms.state != "normal":
            lasted = t - ms.started_time_s
            # without a time base, durations are said in frames (never in assumed seconds)
            took = f"{lasted:.1f} s" if math.isfinite(lasted) else f"{frame - ms.started_frame} frames"
            if by_session_end:
                msg = (f"{lim.label} {ms.state} still open when the session ended, after {took} "
                       f"{lim.describe(ms.state)}; last value {lim.show(value)}{where}")
            elif _RANK[target] > _RANK[ms.state]:
                msg = f"{lim.label} {ms.state} rises to {target} after {took}{where}"
            else:
                msg = (f"{lim.label} back from {ms.state} after {took}: now {lim.show(value)}, "
                       f"{lim.describe(ms.state)} < ¼ of the last {span_text}{where}")
            events.append(Event(kind="end", metric=lim.metric, state=ms.state, value=value,
                                limit=lim.level(ms.state), frame=frame, time_s=t, started_frame=ms.started_frame,
                                started_time_s=ms.started_time_s, channel=channel, plane=plane, message=msg,
                                wall_time=_now(), closed_by="session end" if by_session_end else ""))
        if target != "normal":
            level = _RANK[target]
            beyond = [(e[0], e[3], e[4]) for e in ms.window if e[2] >= level] or [(t, value, frame)]
            vals = sorted(abs(v) if lim.direction == "abs_above" else v for _, v, _ in beyond)
            typical = _signed_median([v for _, v, _ in beyond])
            peak = vals[0] if lim.direction == "below" else vals[-1]
            if lim.persist_s > 0:
                spent = ms.beyond[level]
                how = (f"{lim.show(typical)} typical, {'lowest' if lim.direction == 'below' else 'peak'} "
                       f"{lim.show(peak)}; {lim.describe(target)} for "
                       + (f"{spent:.1f} s of the last {span_text} (from t={beyond[0][0]:.1f} s, frame "
                          f"{beyond[0][2]})" if timed else
                          f"{round(spent * UNTIMED_FRAMES_PER_S)} frames of the last {span_text} (from frame "
                          f"{beyond[0][2]})"))
            else:
                how = f"{lim.describe(target)}: {lim.show(value)}"
            msg = f"{lim.label} {target}: {how}{where}"
            # share of the time beyond in the last unbroken run: ~1 for a lasting excursion, less for a burst
            run = 0.0
            for e in reversed(ms.window):
                if e[2] < level:
                    break
                run += e[1]
            lasting = run >= 0.75 * ms.beyond[level] if lim.persist_s > 0 else True
            advice, caution = advice_for(lim, target, typical=typical, peak=peak, time_s=t, row=row or {},
                                         caution=self.profile.caution, lasting=lasting)
            events.append(Event(kind="start", metric=lim.metric, state=target, value=typical,
                                limit=lim.level(target), frame=frame, time_s=t, started_frame=frame,
                                started_time_s=t, channel=channel, plane=plane, message=msg, wall_time=_now(),
                                advice=advice, caution=caution))
        ms.state = target
        ms.started_frame, ms.started_time_s = frame, t
        return events


def _target(ms: _MetricState, p: float) -> str:
    """The state the window asks for: enter a level beyond it for more than ``p`` of the last ``2 p`` seconds,
    keep a level while at least ``p / 2`` of them were beyond it."""
    cur = _RANK[ms.state]
    for level in (2, 1):
        if level > cur and ms.beyond[level] > p + _EPS:
            return STATES[level]
    if cur > 0 and ms.beyond[cur] < 0.5 * p - _EPS:
        for level in range(cur - 1, 0, -1):
            if ms.beyond[level] >= 0.5 * p - _EPS:
                return STATES[level]
        return "normal"
    return ms.state


def _signed_median(values: list[float]) -> float:
    v = sorted(values)
    n = len(v)
    return v[n // 2] if n % 2 else 0.5 * (v[n // 2 - 1] + v[n // 2])


def _as_float(value: object) -> float:
    if value is None or value == "":
        return math.nan
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan
