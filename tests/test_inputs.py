"""Input-side reliability: hostile option values, file names, lying metadata, profiles, file modes, input errors,
and the frame rate, which is never assumed.

Every test here was written against a failure seen on the code before it (a traceback, a silent wrong number, a
record the user cannot read) and fails there. Where the failure was seen through the command line, the test runs
the real command line (``python -m qcmon``).

Sources of the checks: the TIFF files are written by tifffile (a general-purpose reference library) with the
ImageJ and OME metadata it writes; the OME rules are the OME Data Model's (``SizeC × SizeZ × SizeT`` planes,
``TiffData/@PlaneCount``, ``Plane/@DeltaT``; https://www.openmicroscopy.org/Schemas/OME/2016-06/ome.xsd); file
modes follow POSIX ``umask`` (a new file gets 0666 & ~umask, as Python's ``open`` gives it). Frame content is a
real fluorescence image we did not make (``outside_data.nuclei_2d``) through the EMVA 1288 camera model.
"""

from __future__ import annotations

import io
import json
import math
import os
import stat
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

from outside_data import detect, nuclei_2d
from qcmon.engine import Engine, EngineSettings
from qcmon.errors import ProfileError, display_path
from qcmon.frames import RATE_UNKNOWN, UNTIMED_FRAMES_PER_S, Frame
from qcmon.monitor.loop import Monitor, MonitorOptions, PaceEstimate
from qcmon.record.journal import read_events, read_traces
from qcmon.thresholds import load_profile
from reliability_data import PausedReasons, run_qcmon, snapshot

SIZE = 64


def _frames(n: int, *, seed: int = 0, tau_min: float | None = None, rate_hz: float = 30.0) -> np.ndarray:
    """``n`` uint16 frames of a real nuclei image (64² crop, ~40 photons/px at its mean) through the EMVA 1288
    model (gain 2 DN/photon, offset 100 DN, read noise 3 DN); with ``tau_min`` the photons decay as
    exp(−t / tau) at ``rate_hz``."""
    img = nuclei_2d()[200:200 + SIZE, 200:200 + SIZE].astype(float)
    photons = img / img.mean() * 40.0
    rng = np.random.default_rng(seed)
    out = np.empty((n, SIZE, SIZE), np.uint16)
    for i in range(n):
        k = math.exp(-(i / rate_hz) / 60.0 / tau_min) if tau_min else 1.0
        out[i] = detect(photons * k, rng, gain=2.0, offset=100.0, read_noise_dn=3.0, bits=16)
    return out


def _one_frame_files(folder: Path, frames: np.ndarray, times: np.ndarray | None) -> None:
    folder.mkdir()
    for i, f in enumerate(frames):
        p = folder / f"frame_{i:04d}.tif"
        tifffile.imwrite(p, f, photometric="minisblack")
        if times is not None:
            os.utime(p, ns=(int(times[i] * 1e9), int(times[i] * 1e9)))


def _summarize(path, **kw) -> tuple[dict, dict, list]:
    out = Path(kw.pop("out_dir", None) or Path(str(path) + ".qcmon"))
    Monitor(MonitorOptions(path=Path(path), out_dir=out, follow=False, **kw)).run()
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    return summary, read_traces(out / "traces.csv"), read_events(out / "events.jsonl")


def _problems(events) -> list[str]:
    return [e.message for e in events if e.kind == "problem"]


# ------------------------------------------------------------------------------------------------- frame rate
def test_without_a_rate_times_and_per_minute_values_are_blank_and_said_so(tmp_path):
    """A plain multi-page TIFF, no timing metadata, no --frame-rate: before, time_s was the frame index (a silent
    1 Hz) and the bleach rate and duration were off by the true rate."""
    path = tmp_path / "plain.tif"
    tifffile.imwrite(path, _frames(60, tau_min=2.0), photometric="minisblack")
    res = run_qcmon("summarize", path)
    assert res.returncode == 0, res.stderr
    assert RATE_UNKNOWN in res.stderr
    out = tmp_path / "plain.qcmon"
    traces = read_traces(out / "traces.csv")
    assert len(traces["frame"]) == 60
    assert np.isnan(traces["time_s"]).all()
    assert np.isnan(traces["bleach_pct_per_min"]).all()
    assert np.isfinite(traces["displacement_px"]).all()  # what needs no time is measured
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["duration_s"] is None
    assert summary["bleach"]["slope_pct_per_min"] is None
    assert summary["frame_rate"]["message"] == RATE_UNKNOWN
    assert any(RATE_UNKNOWN in n for n in summary["notes"])
    assert RATE_UNKNOWN in (out / "report.html").read_text(encoding="utf-8")


def test_given_rate_gives_frame_over_rate(tmp_path):
    path = tmp_path / "plain.tif"
    tifffile.imwrite(path, _frames(40), photometric="minisblack")
    summary, traces, _ = _summarize(path, frame_rate_hz=12.5)
    np.testing.assert_allclose(traces["time_s"], traces["frame"] / 12.5)  # time = frame / rate (definition)
    assert summary["frame_rate"] == {"hz": 12.5, "origin": "option", "message": ""}
    assert summary["duration_s"] == pytest.approx(39 / 12.5)


def test_rate_estimated_from_the_times_of_one_frame_files(tmp_path):
    """Files written at 30 Hz with 1 ms jitter (a writer's timing, common practice, no source): the rate is
    estimated, said so with its origin, and times are frame / rate."""
    rng = np.random.default_rng(3)
    n = 45
    times = 1.7e9 + np.arange(n) / 30.0 + rng.normal(0, 1e-3, n)
    _one_frame_files(tmp_path / "s", _frames(n), times)
    summary, traces, _ = _summarize(tmp_path / "s")
    rate = summary["frame_rate"]
    assert rate["hz"] == pytest.approx(30.0, rel=0.005)
    assert rate["origin"].startswith("estimated from the modification times")
    assert summary["facts"]["frame_rate_hz"]["origin"] == rate["origin"]
    np.testing.assert_allclose(traces["time_s"], traces["frame"] / rate["hz"])


@pytest.mark.parametrize("how", ["copied", "bursts", "too_few"])
def test_untrustworthy_file_times_give_no_rate(tmp_path, how):
    """Times that do not count the frames give no estimate: a copy that stamped files within microseconds in
    irregular order of work, a writer that saves ten frames at once, or too few files."""
    rng = np.random.default_rng(4)
    n = 15 if how == "too_few" else 45
    if how == "copied":
        times = 1.7e9 + np.cumsum(rng.exponential(2e-4, n))
    elif how == "bursts":
        times = 1.7e9 + (np.arange(n) // 10) * (10 / 30.0) + np.arange(n) % 10 * 1e-4
    else:
        times = 1.7e9 + np.arange(n) / 30.0
    _one_frame_files(tmp_path / "s", _frames(n), times)
    summary, traces, _ = _summarize(tmp_path / "s")
    assert summary["frame_rate"]["message"] == RATE_UNKNOWN
    assert np.isnan(traces["time_s"]).all()


def test_pace_estimate_is_steady_or_none():
    """Looks every 50–250 ms at a writer of 30 Hz: the estimate is within 1 % (a rate is frames ÷ time); a writer
    that pauses gives none until the pace is steady again over a later span."""
    rng = np.random.default_rng(5)
    est, now, got = PaceEstimate(), 0.0, None
    while got is None and now < 60:
        now += rng.uniform(0.05, 0.25)
        got = est.add(now, math.floor(now * 30.0))
    assert got is not None and got[0] == pytest.approx(30.0, rel=0.01) and now < 15
    assert "estimated from the pace" in got[1]

    est, now, results = PaceEstimate(), 0.0, []
    while now < 12:  # 6 s of frames, 6 s of nothing: the halves disagree
        now += 0.1
        results.append(est.add(now, math.floor(min(now, 6.0) * 30.0)))
    assert all(r is None for r in results)


def test_rate_found_later_times_later_rows_and_converts_the_bleach_rate():
    """An engine that begins without a rate and is given one at frame 100 (as when it is estimated while
    watching): earlier rows keep a blank time, later rows get frame / rate; at 30 Hz its per-minute bleach rate
    equals that of an engine that had the rate from the start (the tracker's frame clock is the same)."""
    frames = _frames(450, tau_min=2.0)  # 15 s: the baseline's 10 s and half of a 4-s trailing window
    timed = Engine(EngineSettings(frame_rate_hz=30.0, bleach_window_s=4.0))
    late = Engine(EngineSettings(bleach_window_s=4.0))
    rows_t, rows_l = [], []
    for i, f in enumerate(frames):
        if i == 100:
            late.set_frame_rate(30.0)
        rows_t += timed.process(Frame(f, i))
        rows_l += late.process(Frame(f, i))
    rows_t += timed.flush()
    rows_l += late.flush()
    t_late = np.array([r["time_s"] for r in rows_l])
    assert np.isnan(t_late[:70]).all()  # measured before the rate was known (30 held for the reference)
    np.testing.assert_allclose(t_late[130:], np.arange(130, 450) / 30.0)
    b_t = np.array([r["bleach_pct_per_min"] for r in rows_t])[130:]
    b_l = np.array([r["bleach_pct_per_min"] for r in rows_l])[130:]
    np.testing.assert_allclose(b_l, b_t, equal_nan=True)
    assert np.isfinite(b_l).any()


def test_session_bleach_slope_with_a_rate_estimated_later_matches_the_decay():
    """Frames decaying as exp(−t/τ), τ = 2 min at 15 Hz (60 s): an engine without a rate until frame 300 gives
    the whole session's initial slope −100/τ %/min = −50 %/min (derivative of the exponential) within 10 %."""
    rate = 15.0
    frames = _frames(900, tau_min=2.0, rate_hz=rate, seed=9)
    eng = Engine(EngineSettings())
    for i, f in enumerate(frames):
        if i == 300:
            eng.set_frame_rate(rate)
        eng.process(Frame(f, i))
    eng.flush()
    info = eng.stream_info()[(0, 0)]
    assert info["bleach_slope_pct_per_min"] == pytest.approx(-50.0, rel=0.10)
    assert Engine(EngineSettings()).forecast_min(0, 0, 20) != 0  # no stream yet: NaN, not an error


def test_thresholds_without_a_rate_count_frames():
    """Without times a state still begins (persistence counted as UNTIMED_FRAMES_PER_S frames a second) and its
    event carries no time; its message counts frames."""
    from qcmon.thresholds import ThresholdTracker

    tr = ThresholdTracker(load_profile("default"))
    lim = tr.profile.limits["displacement_px"]
    events = []
    needed = math.ceil(lim.persist_s * UNTIMED_FRAMES_PER_S)
    for i in range(needed + 2):
        events += tr.update({"frame": i, "channel": 0, "plane": 0, "time_s": math.nan,
                             "displacement_px": lim.alarm * 2})
    starts = [e for e in events if e.kind == "start"]
    assert starts and all(math.isnan(e.time_s) for e in starts)
    assert starts[-1].state == "alarm" and starts[-1].frame >= needed - 1
    assert RATE_UNKNOWN in starts[-1].message


def test_plain_console_and_dashboard_header_say_the_rate_is_unknown():
    from qcmon.ui.console import format_status
    from qcmon.status import Status

    line = format_status(Status(elapsed_s=math.nan), {})
    assert RATE_UNKNOWN.upper() in line and "nan" not in line


# ---------------------------------------------------------------------------------------------- command line
@pytest.mark.parametrize("option", [("--frame-rate", "inf"), ("--pixel-size", "inf"), ("--frame-rate", "nan"),
                                    ("--raw-dtype", "complex128"), ("--dark-level", "nan")])
def test_hostile_option_values_are_refused_at_once(tmp_path, option):
    """Before: tracebacks from deep inside (and a record folder left behind)."""
    path = tmp_path / "s.tif"
    tifffile.imwrite(path, _frames(3), photometric="minisblack")
    res = run_qcmon("summarize", path, *option)
    assert res.returncode == 2, res.stderr
    assert option[0] in res.stderr and "Traceback" not in res.stderr
    assert not (tmp_path / "s.qcmon").exists()


def test_out_inside_the_session_folder_is_refused(tmp_path):
    """Before, only --out SESSION was refused: --out SESSION/qc wrote into the microscope's folder."""
    sess = tmp_path / "sess"
    sess.mkdir()
    tifffile.imwrite(sess / "a.tif", _frames(3), photometric="minisblack")
    before = snapshot(sess)
    res = run_qcmon("summarize", sess, "--out", sess / "qc")
    assert res.returncode == 2 and "session folder" in res.stderr
    assert snapshot(sess) == before


# ------------------------------------------------------------------------------------------------ file names
def test_undecodable_and_newline_file_names_are_shown_escaped(tmp_path):
    """Names with a byte that is not UTF-8 and a newline: before, UnicodeEncodeError in the record (exit 1)."""
    sess = tmp_path / "sess"
    sess.mkdir()
    frames = _frames(34)
    for i, f in enumerate(frames):
        buf = io.BytesIO()
        tifffile.imwrite(buf, f, photometric="minisblack")
        with open(os.path.join(os.fsencode(sess), b"run\xff\n%02d.tif" % i), "wb") as fh:
            fh.write(buf.getvalue())
    with open(os.path.join(os.fsencode(sess), b"zz\xfe\nbad.tif"), "wb") as fh:
        fh.write(b"not a tiff at all")
    res = run_qcmon("summarize", sess, "--frame-rate", "30")
    assert res.returncode == 0, res.stderr
    problem_lines = [ln for ln in res.stderr.splitlines() if "input problem" in ln]
    assert len(problem_lines) == 1 and "zz\\xfe\\nbad.tif" in problem_lines[0]
    out = tmp_path / "sess.qcmon"
    (out / "traces.csv").read_bytes().decode("utf-8")  # valid UTF-8 throughout
    (out / "events.jsonl").read_bytes().decode("utf-8")
    traces = read_traces(out / "traces.csv")
    assert len(traces["frame"]) == 34
    assert str(traces["source"][0]).endswith("run\\xff\\n00.tif")
    assert display_path("a\tb\x07") == "a\\tb\\x07"


# -------------------------------------------------------------------------------------------- lying metadata
def test_imagej_negative_frame_interval_is_ignored_and_said(tmp_path):
    """ImageJ finterval=-1: before, a traceback (frame_rate_hz -1.0)."""
    path = tmp_path / "ij.tif"
    tifffile.imwrite(path, _frames(40), imagej=True, metadata={"axes": "TYX", "finterval": -1, "spacing": -2,
                                                                "unit": "um"})
    res = run_qcmon("summarize", path)
    assert res.returncode == 0, res.stderr
    assert "finterval=-1" in res.stderr
    summary = json.loads((tmp_path / "ij.qcmon" / "summary.json").read_text(encoding="utf-8"))
    assert "frame_rate_hz" not in summary["facts"] and "z_step_um" not in summary["facts"]
    assert any("spacing=-2" in p for p in summary["problems"])


def test_ome_channels_that_the_pages_contradict_are_not_used(tmp_path):
    """OME SizeC=3 written over a single-channel file (TiffData PlaneCount = the pages): before, the pages were
    split silently into three streams."""
    path = tmp_path / "a.ome.tif"
    tifffile.imwrite(path, _frames(60), ome=True, metadata={"axes": "TYX"})
    data = path.read_bytes()
    assert data.count(b'SizeC="1"') == 1
    path.write_bytes(data.replace(b'SizeC="1"', b'SizeC="3"'))
    summary, traces, events = _summarize(path, frame_rate_hz=30.0)
    assert len(summary["streams"]) == 1 and len(traces["frame"]) == 60
    assert any("SizeC=3" in p and "not used" in p for p in _problems(events))


def test_ome_sizes_checked_against_the_pages_of_a_finished_file(tmp_path):
    """No TiffData count: SizeC × SizeZ × SizeT must be the file's pages (OME data model), else not used."""
    path = tmp_path / "b.ome.tif"
    tifffile.imwrite(path, _frames(60), ome=True, metadata={"axes": "TYX"})
    data = path.read_bytes()
    head = data.replace(b'SizeC="1"', b'SizeC="2"').replace(b'<TiffData IFD="0" PlaneCount="60"/>',
                                                            b'<TiffData IFD="0"/>' + b" " * 16)
    assert len(head) == len(data)
    path.write_bytes(head)
    summary, traces, events = _summarize(path, frame_rate_hz=30.0)
    assert len(summary["streams"]) == 1
    assert any("declare 120 pages but the file holds 60" in p for p in _problems(events))


def test_zero_time_increment_negative_pixel_size_and_flat_delta_t(tmp_path):
    """OME TimeIncrement=0, PhysicalSizeX=-1 and DeltaT that does not increase: before, dropped without a note
    (or used: equal DeltaT gave every frame time 0)."""
    path = tmp_path / "c.ome.tif"
    n = 40
    tifffile.imwrite(path, _frames(n), ome=True, metadata={
        "axes": "TYX", "TimeIncrement": 0, "PhysicalSizeX": -1,
        "Plane": {"DeltaT": [0.0] * n}})
    summary, traces, events = _summarize(path)
    problems = " | ".join(_problems(events))
    assert "TimeIncrement='0'" in problems and "PhysicalSizeX=-1" in problems and "DeltaT does not increase" in problems
    assert np.isnan(traces["time_s"]).all() and summary["frame_rate"]["message"] == RATE_UNKNOWN


def test_pages_that_do_not_divide_into_channels_are_said(tmp_path):
    path = tmp_path / "d.tif"
    tifffile.imwrite(path, _frames(61), photometric="minisblack")
    _, _, events = _summarize(path, channels=2, frame_rate_hz=30.0)
    assert any("61 pages do not divide into 2 channel(s)" in p for p in _problems(events))


# --------------------------------------------------------------------------------------------------- profiles
def test_profile_not_utf8_is_a_profile_error(tmp_path):
    """Before: UnicodeDecodeError traceback."""
    path = tmp_path / "latin1.toml"
    path.write_bytes('extends = "default"\ndescription = "caf\xe9"\n'.encode("latin-1"))
    with pytest.raises(ProfileError, match="not UTF-8"):
        load_profile(path)
    res = run_qcmon("profiles")  # the command line itself still works
    assert res.returncode == 0


@pytest.mark.parametrize("metric,key,value", [("displacement_um", "warn", 1e308), ("displacement_um", "alarm", 1e308),
                                              ("saturated_frac", "alarm", 5.0), ("focus_corr", "alarm", -2.0),
                                              ("snr", "persist_s", 1e9)])
def test_absurd_profile_levels_are_refused(tmp_path, metric, key, value):
    """Before: 1e308 passed validation and broke the report's plot."""
    path = tmp_path / "p.toml"
    path.write_text(f'extends = "default"\n[limits.{metric}]\n{key} = {value!r}\n', encoding="utf-8")
    with pytest.raises(ProfileError, match=f"limits.{metric}.{key}"):
        load_profile(path)


def test_bundled_profiles_are_within_the_ranges():
    from qcmon.thresholds import list_profiles

    for name in list_profiles():
        load_profile(name)


# ------------------------------------------------------------------------------------------------ file modes
@pytest.mark.parametrize("mask", [0o022, 0o027])
def test_record_files_follow_the_umask(tmp_path, mask):
    """Before, summary.json, report.html, exclude.csv and reference.tif were 0600 whatever the umask."""
    path = tmp_path / "m.tif"
    tifffile.imwrite(path, _frames(35), photometric="minisblack")
    old = os.umask(mask)
    try:
        out = tmp_path / "m.qcmon"
        Monitor(MonitorOptions(path=path, out_dir=out, follow=False, frame_rate_hz=30.0)).run()
    finally:
        os.umask(old)
    modes = {p.name: stat.S_IMODE(p.stat().st_mode) for p in out.iterdir()}
    assert {"summary.json", "report.html", "exclude.csv", "reference.tif", "traces.csv"} <= set(modes)
    assert set(modes.values()) == {0o666 & ~mask}, modes


# ----------------------------------------------------------------------------------------------- input errors
def test_nothing_measurable_is_an_input_error(tmp_path):
    """Before: exit 0 with a new NAME.qcmon/ and verdict unknown."""
    notes = tmp_path / "notes.txt"
    notes.write_text("hello\n")
    fake = tmp_path / "fake"
    fake.mkdir()
    (fake / "a.tif").write_bytes(b"not a tiff")
    empty = tmp_path / "empty"
    empty.mkdir()
    for path, words in ((notes, "not a frame file"), (fake, "not a TIFF file"), (empty, "nothing measurable")):
        res = run_qcmon("summarize", path)
        assert res.returncode == 2 and words in res.stderr and "Traceback" not in res.stderr, res.stderr
    res = run_qcmon("watch", notes, "--plain", "--until-idle", "30", timeout=20)
    assert res.returncode == 2 and "not a frame file" in res.stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["empty", "fake", "notes.txt"]


def test_watched_folder_with_nothing_readable_says_so(tmp_path):
    """Before: '✓ normal | frames 0' for as long as it was watched."""
    sess = tmp_path / "sess"
    sess.mkdir()
    (sess / "a.tif").write_bytes(b"not a tiff")
    listener = PausedReasons()
    seen = listener.seen
    mon = Monitor(MonitorOptions(path=sess, out_dir=tmp_path / "out", follow=True, until_idle_s=0.6,
                                 poll_interval_s=0.1))
    started = time.monotonic()
    mon.run(listener)
    assert time.monotonic() - started < 20
    assert any(s == "no readable frame yet: 1 file problem" for s in seen), seen
