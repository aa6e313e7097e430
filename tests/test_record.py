"""The appended session record: crash safety, atomic writes, unwritable folders, and rebuilding the summary."""

from __future__ import annotations

import errno
import json
import math
import os
import subprocess
import sys

import numpy as np
import pytest
from numpy.testing import assert_allclose

from qcmon.columns import NAMES
from qcmon.errors import QcmonError
from qcmon.events import Event
from qcmon.record.journal import SessionRecord, read_events, read_traces, rows_to_traces, write_atomic
from qcmon.record.outputs import rebuild
from qcmon.record.summary import exclude_ranges, fit_bleaching, summarize_traces, summary_json
from qcmon.thresholds import ThresholdTracker, load_profile
from reliability_data import as_unprivileged, unprivileged_env

FPS = 10.0


def make_rows(n=600, *, plane=0, step=(200, 260), bleach_tau_s=12000.0, seed=0):
    """Synthetic rows: a displacement step beyond the 5 µm alarm of 'default' during ``step`` frames."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        t = i / FPS
        d = abs(0.3 + 0.1 * rng.standard_normal()) + (7.0 if step[0] <= i < step[1] else 0.0)
        b = 500.0 * math.exp(-t / bleach_tau_s)
        rows.append({
            "frame": i, "channel": 0, "plane": plane, "time_s": t, "dx_px": d, "dy_px": 0.0,
            "displacement_px": d, "displacement_um": d, "reg_corr": 0.9, "z_um": math.nan,
            "focus_corr": 0.97 + 0.001 * rng.standard_normal(), "mean_f": b, "baseline_f": b,
            "brightness_pct": 100 * b / 500.0, "bleach_pct_per_min": -100 * 60 / bleach_tau_s,
            "saturated_frac": 0.0, "clipped_frac": 0.0, "noise_sigma": 10.0, "snr": b / 10.0,
            "photons_per_px": math.nan, "shot_snr": math.nan, "line_offset_px": 0.05,
            "source": f"run,{i // 100}.tif", "page": i % 100,
        })
    return rows


def test_rows_round_trip_exactly(tmp_path):
    rows = make_rows(50)
    rows[3]["snr"] = 1 / 3  # repr keeps every digit
    with SessionRecord(tmp_path) as rec:
        rec.append_rows(rows)
    tr = read_traces(tmp_path / "traces.csv")
    assert tuple(tr) == NAMES
    assert tr["snr"][3] == 1 / 3 and np.isnan(tr["z_um"]).all()
    assert tr["source"][10] == "run,0.tif" and tr["page"].dtype == np.int64
    mem = rows_to_traces(rows)
    for k in NAMES:
        if mem[k].dtype == object:
            assert list(mem[k]) == list(tr[k])
        else:
            np.testing.assert_array_equal(mem[k], tr[k])


def test_kill_mid_line_then_resume_keeps_complete_rows(tmp_path):
    rows = make_rows(100)
    rec = SessionRecord(tmp_path)
    rec.append_rows(rows[:60])
    rec.append_event(Event(kind="note", message="whiskers twitching", frame=10, time_s=1.0))
    rec.flush()
    # simulate kill -9 while writing: half a row and half an event on the disk
    path, epath = tmp_path / "traces.csv", tmp_path / "events.jsonl"
    rec._traces.close()
    rec._events.close()
    rec._lock.close()  # the kernel releases the record's lock of a killed process
    with open(path, "ab") as fh:
        fh.write(b"60,0,0,6.0,0.31")
    with open(epath, "ab") as fh:
        fh.write(b'{"kind": "no')
    # readers ignore the partial last line
    assert len(read_traces(path)["frame"]) == 60 and len(read_events(epath)) == 1
    rec2 = SessionRecord(tmp_path, resume=True)
    assert rec2.last_frames() == {(0, 0): 59}
    rec2.append_rows(rows[60:])
    rec2.append_event(Event(kind="note", message="resumed", frame=60, time_s=6.0))
    rec2.close()
    tr = read_traces(path)
    np.testing.assert_array_equal(tr["frame"], np.arange(100))
    assert [e.message for e in read_events(epath)] == ["whiskers twitching", "resumed"]


def test_existing_record_is_not_overwritten_without_consent(tmp_path):
    with SessionRecord(tmp_path) as rec:
        rec.append_rows(make_rows(5))
    with pytest.raises(QcmonError, match="already holds"):
        SessionRecord(tmp_path, resume=False)
    assert len(read_traces(tmp_path)["frame"]) == 5


def test_fsync_at_most_about_once_per_second(tmp_path, monkeypatch):
    calls = []
    real = os.fsync
    monkeypatch.setattr(os, "fsync", lambda fd: (calls.append(fd), real(fd)))
    rec = SessionRecord(tmp_path)
    calls.clear()
    for r in make_rows(200):
        rec.append_row(r)
    assert len(calls) <= 2 * 2  # both files, at most ~once in a fast loop (< 1 s)
    # but every row reached the operating system already (what survives kill -9)
    assert len(read_traces(tmp_path)["frame"]) == 200
    rec.close()


def test_write_atomic_replaces_whole_file(tmp_path):
    p = tmp_path / "summary.json"
    write_atomic(p, "old")
    assert write_atomic(p, b"new") == p
    assert p.read_text() == "new"
    assert [f.name for f in tmp_path.iterdir()] == ["summary.json"]  # no temporary file left


@pytest.mark.parametrize("err", [errno.EACCES, errno.ENOSPC, errno.EROFS])
def test_unwritable_folder_gives_qcmon_error_and_keeps_old_files(tmp_path, monkeypatch, err):
    p = tmp_path / "summary.json"
    write_atomic(p, "previous")
    import tempfile

    def refuse(*a, **k):
        raise OSError(err, os.strerror(err))

    monkeypatch.setattr(tempfile, "mkstemp", refuse)
    with pytest.raises(QcmonError) as info:
        write_atomic(p, "new")
    assert str(tmp_path) in str(info.value)
    assert p.read_text() == "previous"


def test_full_disk_while_appending_names_folder(tmp_path):
    rec = SessionRecord(tmp_path)
    rec.append_rows(make_rows(10))
    rec.flush()

    class Full:
        def write(self, b):
            raise OSError(errno.ENOSPC, "No space left on device")

        def flush(self):
            pass

    real = rec._traces
    rec._traces = Full()
    with pytest.raises(QcmonError, match="disk is full") as info:
        rec.append_rows(make_rows(3))
    assert str(tmp_path) in str(info.value)
    rec._traces = real
    rec.close()
    assert len(read_traces(tmp_path)["frame"]) == 10


def test_read_only_folder(open_dir):
    # root writes into read-only folders: as root (the CI), the record is opened by the user nobody
    d = open_dir / "ro"
    d.mkdir()
    d.chmod(0o555)
    code = "import sys; from qcmon.record.journal import SessionRecord; SessionRecord(sys.argv[1])"
    res = subprocess.run(as_unprivileged() + [sys.executable, "-c", code, str(d)], capture_output=True, text=True,
                         env=unprivileged_env(open_dir), timeout=60)
    assert res.returncode == 1 and "QcmonError" in res.stderr and "read-only" in res.stderr, res.stderr
    assert str(d) in res.stderr and os.listdir(d) == []


def test_bleach_fit_matches_truth_and_scipy():
    from scipy.optimize import curve_fit

    t = np.arange(0, 1800, 0.5)
    b = 800 * np.exp(-t / (45 * 60.0))  # tau 45 min
    slope, tau = fit_bleaching(t, b)
    assert_allclose(tau, 45.0, rtol=1e-9)
    assert_allclose(slope, -100 / 45.0, rtol=1e-9)
    # reference library: non-linear least squares on the same data (scipy.optimize.curve_fit)
    (b0, k), _ = curve_fit(lambda x, b0, k: b0 * np.exp(k * x), t / 60, b, p0=(700, -0.01))
    assert_allclose(slope, 100 * k, rtol=1e-6)
    with pytest.warns(UserWarning, match="at least 3"):
        assert math.isnan(fit_bleaching(t[:2], b[:2])[0])


def _session(tmp_path, rows, profile):
    tr = ThresholdTracker(profile)
    events = []
    with SessionRecord(tmp_path) as rec:
        rec.write_info(facts={"pixel_size_um": {"value": 1.0, "origin": "option"}}, profile=profile.name,
                       extra={"photon_transfer.gain": 2.5, "photon_transfer.dark_level": 100.0})
        for r in rows:
            rec.append_row(r)
            for ev in tr.update(r):
                rec.append_event(ev)
                events.append(ev)
        for ev in tr.close():
            rec.append_event(ev)
            events.append(ev)
    return events


def test_summary_statistics_and_verdicts(tmp_path):
    prof = load_profile("default")
    rows = make_rows()
    events = _session(tmp_path, rows, prof)
    s = summarize_traces(rows_to_traces(rows), events, facts={}, profile=prof,
                         extra={"photon_transfer.gain": 2.5})
    d = np.array([r["displacement_px"] for r in rows])
    assert_allclose(s["motion"]["max_px"], d.max())
    assert_allclose(s["motion"]["rms_px"], np.sqrt(np.mean(d ** 2)))
    assert s["motion"]["verdict"] == "fail" and s["verdict"] == "fail"
    assert s["saturation"]["verdict"] == "pass" and s["z"]["verdict"] == "unknown"  # no z data
    assert_allclose(s["bleach"]["tau_min"], 200.0, rtol=1e-9)  # planted tau 12000 s
    assert_allclose(s["snr"]["median"], np.median([r["snr"] for r in rows]))
    assert s["photon_transfer"]["gain"] == 2.5 and math.isnan(s["photon_transfer"]["dark_level"])
    assert s["schema"] == "qcmon.summary/1" and s["frames"] == 600
    assert_allclose(s["duration_s"], 59.9)
    # the alarm lasted from its declaration (persist_s after the step began) until 1.5 × persist_s after the
    # step ended (the rule of qcmon.thresholds): 6 s − 1 s + 1.5 s
    assert 6.4 < s["motion"]["alarm_s"] < 6.7


def test_exclude_ranges_match_planted_alarms(tmp_path):
    prof = load_profile("default")
    rows = make_rows(step=(200, 260)) + []
    rows += [dict(r, plane=1, displacement_px=0.3, displacement_um=0.3, dx_px=0.3) for r in make_rows(step=(0, 0))]
    tracker = ThresholdTracker(prof)
    events = [ev for r in rows for ev in tracker.update(r)]
    ranges = exclude_ranges(rows_to_traces(rows), events, prof)
    assert len(ranges) == 1
    r = ranges[0]
    assert (r.channel, r.plane) == (0, 0)
    # planted step at frames 200..259; values beyond alarm from 200, alarm declared 1 s later and ended 1 s after
    assert r.first_frame == 200
    end = next(e for e in events if e.kind == "end" and e.metric == "displacement_um")
    assert r.last_frame == end.frame
    assert "alarm: displacement_um" in r.reason and "displacement_um beyond alarm level" in r.reason


def test_rebuild_from_record_gives_the_same_summary(tmp_path):
    prof = load_profile("default")
    rows = make_rows()
    events = _session(tmp_path, rows, prof)
    direct = summarize_traces(rows_to_traces(rows), events,
                              facts={"pixel_size_um": {"value": 1.0, "origin": "option"}}, profile=prof,
                              extra={"photon_transfer.gain": 2.5, "photon_transfer.dark_level": 100.0})
    rebuilt = rebuild(tmp_path)
    assert summary_json(rebuilt) == summary_json(direct)
    on_disk = json.loads((tmp_path / "summary.json").read_text())
    assert on_disk["verdict"] == "fail" and on_disk["z"]["max_abs_um"] is None
    lines = (tmp_path / "exclude.csv").read_text().splitlines()
    assert lines[0] == "channel,plane,first_frame,last_frame,reason" and lines[1].startswith("0,0,200,")
    assert (tmp_path / "report.html").exists()


def test_extra_never_replaces_qcmon_keys():
    prof = load_profile("default")
    rows = make_rows(50, step=(0, 0))
    s = summarize_traces(rows_to_traces(rows), [], facts={}, profile=prof,
                         extra={"streams": {"0,0": {"gain": 2}}, "z.start_um": 1.5, "photon_transfer.r2": 0.99})
    assert isinstance(s["streams"], list) and s["engine"]["streams"] == {"0,0": {"gain": 2}}
    assert s["z"]["start_um"] == 1.5 and s["photon_transfer"]["r2"] == 0.99


def test_rebuild_without_session_info_uses_previous_summary(tmp_path):
    prof = load_profile("anaesthetised")
    rows = make_rows(300)
    tracker = ThresholdTracker(prof)
    events = [ev for r in rows for ev in tracker.update(r)] + tracker.close()
    with SessionRecord(tmp_path) as rec:
        rec.append_rows(rows)
        rec.append_events(events)
    facts = {"frame_rate_hz": {"value": 10.0, "origin": "OME-TIFF"}}
    first = summarize_traces(rows_to_traces(rows), events, facts=facts, profile=prof,
                             extra={"photon_transfer.gain": 1.5, "photon_transfer.dark_level": 90.0})
    write_atomic(tmp_path / "summary.json", summary_json(first))
    assert summary_json(rebuild(tmp_path)) == summary_json(first)


def test_record_in_unwritable_folder_gives_qcmon_error_and_keeps_old_record(tmp_path, monkeypatch):
    with SessionRecord(tmp_path) as rec:
        rec.append_rows(make_rows(7))
    before = (tmp_path / "traces.csv").read_bytes()
    import qcmon.record.journal

    def refuse(path, mode="r", *a, **k):
        if any(c in mode for c in "wa+"):
            raise PermissionError(errno.EACCES, "Permission denied", str(path))
        return open(path, mode, *a, **k)

    monkeypatch.setattr(qcmon.record.journal, "open", refuse, raising=False)
    with pytest.raises(QcmonError, match="read-only") as info:
        SessionRecord(tmp_path, resume=True)
    assert str(tmp_path) in str(info.value)
    monkeypatch.undo()
    assert (tmp_path / "traces.csv").read_bytes() == before
