"""Faults: a watch killed mid-session and restarted, an output folder that cannot be written, a clock that jumps,
a writer that pauses. Nothing measured is lost, no frame is measured twice.

The contract checked is qcmon's own (see qcmon.record.journal: "a crash, kill -9 or power cut loses at most the last
second"; qcmon.monitor.loop: "only frames after the last recorded one are appended"); the frames come from qcmon's
simulator, written live by a separate process.
"""

from __future__ import annotations

import os
import signal
import subprocess
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

from qcmon.monitor.loop import Monitor, MonitorOptions
from qcmon.record.journal import LOCK_FILE, read_traces
from qcmon.simulate import scenario_config, write_session
from reliability_data import good_pages, qcmon_cmd, run_qcmon, snapshot, wait_until
from reliability_data import recorded_rows as _rows

N_FRAMES = 300  # 10 s at 30 Hz


def _wait(cond, timeout: float) -> bool:
    return wait_until(cond, timeout, step=0.1)


FLOAT_COLUMNS = ("time_s", "dx_px", "dy_px", "displacement_px", "reg_corr", "focus_corr", "focus_measure",
                 "mean_f", "baseline_f", "saturated_frac", "noise_sigma", "snr", "line_offset_px")




def test_kill_9_mid_watch_then_restart_measures_every_frame_once_as_summarize_does(tmp_path):
    session, out = tmp_path / "sim", tmp_path / "record"
    (session / "frames").mkdir(parents=True)  # the watch is started first, on the empty folder (armed acquisition)
    watch = subprocess.Popen(qcmon_cmd("watch", session / "frames", "--plain", "--until-idle", 30, "--out", out),
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL)
    sim = None
    try:
        assert "watching" in watch.stdout.readline().decode()  # printed once the monitor is set up
        sim = subprocess.Popen(qcmon_cmd("simulate", session, "--scenario", "clean", "--frames", N_FRAMES,
                                         "--size", 64, 64, "--layout", "multipage", "--live"),
                               stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL)
        # the engine holds back its first 30 frames for the reference: wait for some rows after them
        assert _wait(lambda: _rows(out) >= 40, 60)
        assert sim.poll() is None, "the simulator finished before the kill: make the session longer"
        os.kill(watch.pid, signal.SIGKILL)
        assert watch.wait(10) == -signal.SIGKILL
        killed_rows = _rows(out)
        assert sim.wait(60) == 0, sim.stderr.read().decode()
    finally:
        for proc in (watch, sim):
            if proc is not None:
                if proc.poll() is None:
                    proc.kill()
                    proc.wait()
                for stream in (proc.stdout, proc.stderr):
                    if stream is not None:
                        stream.close()
    assert killed_rows < N_FRAMES

    res = run_qcmon("watch", session / "frames", "--plain", "--until-idle", 1, "--out", out, timeout=90)
    assert res.returncode == 0, res.stderr
    tr = read_traces(out / "traces.csv")
    # every frame exactly once, in order (a partial last line from the kill is cut off on resume)
    np.testing.assert_array_equal(tr["frame"], np.arange(N_FRAMES))
    assert set(tr["channel"]) == {0} and set(tr["plane"]) == {0}

    Monitor(MonitorOptions(path=session / "frames", out_dir=tmp_path / "offline", follow=False)).run()
    ref = read_traces(tmp_path / "offline" / "traces.csv")
    np.testing.assert_array_equal(ref["frame"], tr["frame"])
    np.testing.assert_array_equal(ref["page"], tr["page"])
    for name in FLOAT_COLUMNS:
        # the same frames through the same engine: the same numbers (up to float formatting, which is exact)
        np.testing.assert_allclose(tr[name], ref[name], rtol=1e-9, atol=0, equal_nan=True, err_msg=name)


@pytest.fixture
def small_session(tmp_path) -> Path:
    config = scenario_config("clean", n_frames=60, height=64, width=64, seed=3)
    info = write_session(config, tmp_path / "s", layout="per_frame")
    return Path(info["frames_dir"])


def test_record_under_a_file_gives_exit_2_and_names_the_folder(tmp_path, small_session):
    blocker = tmp_path / "not_a_folder"
    blocker.write_text("x", encoding="utf-8")
    res = run_qcmon("summarize", small_session, "--out", blocker / "record")
    assert res.returncode == 2, res.stderr
    assert str(blocker / "record") in res.stderr or str(blocker) in res.stderr, res.stderr
    assert "Traceback" not in res.stderr
    assert blocker.read_text(encoding="utf-8") == "x"


def test_restart_over_an_earlier_record_sets_it_aside_unchanged(tmp_path, small_session):
    """``--restart`` starts a new record; the earlier one is moved, byte for byte, never deleted."""
    out = tmp_path / "record"
    first = run_qcmon("summarize", small_session, "--out", out)
    assert first.returncode == 0, first.stderr
    (out / "my_notes.txt").write_text("kept where it is", encoding="utf-8")  # not a qcmon file: left alone
    before = snapshot(out)
    again = run_qcmon("summarize", small_session, "--out", out, "--restart")
    assert again.returncode == 0, again.stderr
    earlier = [p for p in out.iterdir() if p.name.startswith("earlier-")]
    assert len(earlier) == 1 and f"earlier record moved to {earlier[0]}" in again.stdout
    # sha256 and size; the lock file (qcmon's, not part of the record) stays where it is
    content = {k: v[:2] for k, v in before.items() if k not in ("my_notes.txt", ".", LOCK_FILE)}
    assert content == {k: v[:2] for k, v in snapshot(earlier[0]).items() if k != "."}
    assert (out / "my_notes.txt").read_text(encoding="utf-8") == "kept where it is"
    assert _rows(out) == _rows(earlier[0]) == 60  # a full new record, not appended to the old one


def test_read_only_record_folder_gives_exit_2_and_keeps_the_previous_record(tmp_path, small_session):
    out = tmp_path / "mnt"
    out.mkdir()
    if subprocess.run(["mount", "-t", "tmpfs", "-o", "size=4m", "tmpfs", str(out)], capture_output=True).returncode:
        pytest.skip("mounting a tmpfs needs privileges this machine does not grant")
    try:
        Monitor(MonitorOptions(path=small_session, out_dir=out, follow=False)).run()
        before = snapshot(out)
        assert subprocess.run(["mount", "-o", "remount,ro", str(out)], capture_output=True).returncode == 0
        res = run_qcmon("summarize", small_session, "--out", out)  # resumes the record: needs to write
        assert res.returncode == 2, res.stderr
        assert str(out) in res.stderr and "read-only" in res.stderr, res.stderr
        assert "Traceback" not in res.stderr
        assert snapshot(out) == before
    finally:
        subprocess.run(["umount", str(out)], capture_output=True)


def test_clock_jumps_do_not_change_session_times(tmp_path, small_session, monkeypatch):
    real = time.time
    calls = {"n": 0}

    def jumping():
        calls["n"] += 1
        return real() + (-3600.0 if calls["n"] % 2 else 7200.0)  # the wall clock jumps back and forth

    monkeypatch.setattr(time, "time", jumping)
    Monitor(MonitorOptions(path=small_session, out_dir=tmp_path / "out", follow=False, frame_rate_hz=10.0)).run()
    tr = read_traces(tmp_path / "out" / "traces.csv")
    np.testing.assert_array_equal(tr["frame"], np.arange(60))
    # files without timestamps: time = frame index / frame rate (common practice, no source)
    np.testing.assert_allclose(tr["time_s"], tr["frame"] / 10.0, rtol=0, atol=1e-12)
    assert np.all(np.diff(tr["time_s"]) > 0)


def test_writer_pause_shorter_than_until_idle_misses_no_frame(tmp_path):
    frames_dir = tmp_path / "frames"
    frames_dir.mkdir()
    pages = good_pages(50)

    def writer():
        for i, page in enumerate(pages):
            if i == 40:
                time.sleep(3.0)  # the acquisition pauses
            tmp = frames_dir / f".f_{i:03d}.tif.part"
            tifffile.imwrite(tmp, page, photometric="minisblack")
            os.replace(tmp, frames_dir / f"f_{i:03d}.tif")
            time.sleep(0.01)

    thread = threading.Thread(target=writer)
    thread.start()
    try:
        Monitor(MonitorOptions(path=frames_dir, out_dir=tmp_path / "out", follow=True, until_idle_s=6.0,
                               poll_interval_s=0.2)).run()
    finally:
        thread.join()
    tr = read_traces(tmp_path / "out" / "traces.csv")
    np.testing.assert_array_equal(tr["frame"], np.arange(50))
    assert [os.path.basename(s) for s in tr["source"]] == [f"f_{i:03d}.tif" for i in range(50)]
