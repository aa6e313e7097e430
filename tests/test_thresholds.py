"""Threshold profiles and the persistence/hysteresis rule of the tracker."""

from __future__ import annotations

import math

import pytest

from qcmon.errors import ProfileError
from qcmon.thresholds import Limit, ThresholdTracker, list_profiles, load_profile

FPS = 30.0  # frames per second of the synthetic sessions (a common two-photon resonant rate, from memory)


def _rows(values, *, metric="displacement_um", fps=FPS, channel=0, plane=0):
    for i, v in enumerate(values):
        yield {"frame": i, "time_s": i / fps, "channel": channel, "plane": plane, metric: v}


def _run(profile, rows):
    tr = ThresholdTracker(profile)
    events = []
    for r in rows:
        events += tr.update(r)
    return tr, events


def _write(tmp_path, text, name="p.toml"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


GOOD = """
caution = "advice only"
[limits.displacement_um]
warn = 2.0
alarm = 5.0
direction = "above"
persist_s = 1.0
"""


@pytest.mark.parametrize("name", ["default", "awake_headfixed", "anaesthetised", "one_photon_camera"])
def test_bundled_profiles_load(name):
    prof = load_profile(name)
    assert prof.name == name and name in list_profiles()
    assert "local rules" in prof.caution  # every profile carries the laser-power / welfare caution
    # z limits: two-photon axial resolution ~2 µm, soma ~10 µm (from memory); one-photon looser
    z = prof.limits["z_um"]
    assert z.direction == "abs_above" and 0 < z.warn < z.alarm <= 10
    assert prof.limits["saturated_frac"].warn <= 0.001 < prof.limits["saturated_frac"].alarm


def test_anaesthetised_is_tighter_than_awake():
    awake, anaes = load_profile("awake_headfixed"), load_profile("anaesthetised")
    assert anaes.limits["displacement_um"].alarm < awake.limits["displacement_um"].alarm
    assert awake.limits["displacement_um"].warn == 2.0 and awake.limits["displacement_um"].alarm == 5.0


def test_extends_overrides_only_named_keys_and_can_disable(tmp_path):
    p = _write(tmp_path, 'extends = "default"\n[limits.snr]\nalarm = 0.5\n[limits.line_offset_px]\nenabled = false\n')
    prof, base = load_profile(p), load_profile("default")
    assert prof.limits["snr"].alarm == 0.5 and prof.limits["snr"].warn == base.limits["snr"].warn
    assert "line_offset_px" not in prof.limits and prof.caution == base.caution
    assert load_profile("one_photon_camera").limits.get("line_offset_px") is None


def test_env_folder_is_searched_first(tmp_path, monkeypatch):
    _write(tmp_path, GOOD, "mine.toml")
    monkeypatch.setenv("QCMON_THRESHOLDS", str(tmp_path))
    assert load_profile("mine").limits["displacement_um"].alarm == 5.0
    assert "mine" in list_profiles() and "default" in list_profiles()


BAD = {
    "unknown metric": ('[limits.wobble]\nwarn=1\nalarm=2\ndirection="above"\npersist_s=1\n', "limits.wobble", "allowed"),
    "unknown top key": ('colour = "red"\n' + GOOD, "colour", "allowed"),
    "unknown limit key": (GOOD + "speed = 3\n", "limits.displacement_um.speed", "allowed"),
    "above alarm below warn": (GOOD.replace("alarm = 5.0", "alarm = 1.0"), "limits.displacement_um", "alarm >= warn"),
    "below alarm above warn": ('caution="c"\n[limits.snr]\nwarn=2\nalarm=3\ndirection="below"\npersist_s=1\n',
                               "limits.snr", "alarm <= warn"),
    "abs negative warn": ('caution="c"\n[limits.z_um]\nwarn=-2\nalarm=3\ndirection="abs_above"\npersist_s=1\n',
                          "limits.z_um", "0 <= warn"),
    "negative persistence": (GOOD.replace("persist_s = 1.0", "persist_s = -1"), "persist_s", ">= 0"),
    "string level": (GOOD.replace("warn = 2.0", 'warn = "2"'), "limits.displacement_um.warn", "number"),
    "bool level": (GOOD.replace("warn = 2.0", "warn = true"), "limits.displacement_um.warn", "number"),
    "nan level": (GOOD.replace("warn = 2.0", "warn = nan"), "limits.displacement_um.warn", "finite"),
    "bad direction": (GOOD.replace('"above"', '"sideways"'), "direction", "abs_above"),
    "missing persistence": (GOOD.replace("persist_s = 1.0", ""), "persist_s", "missing"),
    "label not a string": (GOOD + "label = 3\n", "label", "string"),
    "limits not a table": ('caution="c"\nlimits = 3\n', "limits", "table"),
    "no caution": (GOOD.replace('caution = "advice only"', ""), "caution", "missing"),
    "bad toml": ("caution = \n[limits", "", "TOML"),
    "extends unknown": ('extends = "nosuchprofile"\n', "extends", "allowed"),
    "enabled not bool": (GOOD + "enabled = 1\n", "enabled", "true or false"),
}


@pytest.mark.parametrize("case", sorted(BAD))
def test_invalid_profiles_name_file_and_key(tmp_path, case):
    text, key, allowed = BAD[case]
    p = _write(tmp_path, text)
    with pytest.raises(ProfileError) as info:
        load_profile(p)
    msg = str(info.value)
    assert str(p.resolve()) in msg and key in msg and allowed in msg, msg


def test_extends_cycle_is_an_error(tmp_path):
    _write(tmp_path, 'extends = "b.toml"\n' + GOOD, "a.toml")
    _write(tmp_path, 'extends = "a.toml"\n', "b.toml")
    with pytest.raises(ProfileError, match="cycle"):
        load_profile(tmp_path / "a.toml")


def test_unknown_profile_name_lists_the_allowed_ones():
    with pytest.raises(ProfileError, match="default"):
        load_profile("no_such_profile")


@pytest.mark.parametrize("direction,warn,alarm,value,expected", [
    ("above", 2, 5, 1.9, "normal"), ("above", 2, 5, 2.1, "warning"), ("above", 2, 5, 5.1, "alarm"),
    ("below", 0.9, 0.8, 0.95, "normal"), ("below", 0.9, 0.8, 0.85, "warning"), ("below", 0.9, 0.8, 0.7, "alarm"),
    ("abs_above", 2, 4, -3, "warning"), ("abs_above", 2, 4, -4.5, "alarm"), ("abs_above", 2, 4, 1.0, "normal"),
    ("above", 2, 5, math.nan, "unknown"),
])
def test_state_of(direction, warn, alarm, value, expected):
    lim = Limit("z_um", warn, alarm, direction, 1.0, "z", "µm")
    assert lim.state_of(value) == expected


def _profile(tmp_path, persist=1.0):
    return load_profile(_write(tmp_path, GOOD.replace("persist_s = 1.0", f"persist_s = {persist}")))


def test_single_noisy_frame_does_not_alarm(tmp_path):
    values = [0.5] * 100
    values[50] = 50.0  # one wild frame
    tr, events = _run(_profile(tmp_path), _rows(values))
    assert events == [] and tr.overall == "normal"


def test_real_drift_alarms_within_persistence_plus_one_frame(tmp_path):
    # step to 6 µm (beyond the 5 µm alarm) at frame 100
    values = [0.5] * 100 + [6.0] * 200
    tr, events = _run(_profile(tmp_path), _rows(values))
    starts = [e for e in events if e.kind == "start"]
    assert [e.state for e in starts] == ["alarm"]
    delay = starts[0].time_s - 100 / FPS
    assert 1.0 - 1e-9 <= delay <= 1.0 + 1 / FPS + 1e-9
    assert tr.states[(0, 0)]["displacement_um"] == "alarm" and tr.overall == "alarm"


def test_hysteresis_a_dip_does_not_end_the_alarm(tmp_path):
    values = [6.0] * 100 + [0.5] * 10 + [6.0] * 100 + [0.5] * 100
    _, events = _run(_profile(tmp_path), _rows(values))
    kinds = [(e.kind, e.state) for e in events]
    assert kinds == [("start", "alarm"), ("end", "alarm")]
    end = events[1]
    # back within from frame 210: the alarm ends once less than a quarter of the trailing 2 × persist_s was
    # beyond, 1.5 × persist_s later (the rule of qcmon.thresholds)
    assert 1.5 - 1e-9 <= end.time_s - 210 / FPS <= 1.5 + 1 / FPS + 1e-9
    assert end.started_frame == events[0].frame


def test_escalation_is_end_of_warning_then_start_of_alarm(tmp_path):
    values = [3.0] * 100 + [6.0] * 100 + [3.0] * 100 + [0.0] * 100
    tr, events = _run(_profile(tmp_path), _rows(values))
    assert [(e.kind, e.state) for e in events] == [
        ("start", "warning"), ("end", "warning"), ("start", "alarm"), ("end", "alarm"), ("start", "warning"),
        ("end", "warning")]
    assert events[1].frame == events[2].frame
    assert tr.overall == "normal"


def test_unknown_values_keep_the_state_and_never_start_one(tmp_path):
    prof = _profile(tmp_path)
    # alternating beyond/unknown never persists without a gap
    _, events = _run(prof, _rows([6.0, math.nan] * 100))
    assert events == []
    # once in alarm, a run of NaN keeps the alarm
    tr, events = _run(prof, _rows([6.0] * 60 + [math.nan] * 200))
    assert [e.kind for e in events] == ["start"] and tr.overall == "alarm"


def test_channels_and_planes_are_independent(tmp_path):
    prof = _profile(tmp_path)
    tr = ThresholdTracker(prof)
    events = []
    for a, b in zip(_rows([6.0] * 100, plane=0), _rows([0.5] * 100, plane=1)):
        events += tr.update(a) + tr.update(b)
    assert {(e.channel, e.plane) for e in events} == {(0, 0)}
    assert tr.states[(0, 1)]["displacement_um"] == "normal"


def test_close_ends_open_states_at_session_end(tmp_path):
    tr, events = _run(_profile(tmp_path), _rows([6.0] * 100))
    closing = tr.close()
    assert len(closing) == 1 and closing[0].kind == "end" and "session end" in closing[0].message
    assert closing[0].frame == 99 and closing[0].closed_by == "session end"
    # the session's end is not a recovery: the state stays as it ended
    assert tr.overall == "alarm" and tr.states[(0, 0)]["displacement_um"] == "alarm"
