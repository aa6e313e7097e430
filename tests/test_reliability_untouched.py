"""qcmon never writes to, renames, deletes or touches the microscope's files.

Before and after ``watch`` (the simulator writing live in another process), ``summarize`` (also of a read-only
folder) and the batch audit: the same entries, with the same SHA-256 (FIPS 180-4), size, modification and
status-change times (ns), inode numbers and modes. The status-change time (ctime) moves on any write, rename,
chmod or link change, even by root, so an unchanged ctime shows that no file was opened for writing and
modified (common practice, no source).
"""

from __future__ import annotations

import os
import stat
import subprocess
import time
from pathlib import Path

import pytest

from qcmon.audit import AuditOptions, run_audit
from qcmon.monitor.loop import Monitor, MonitorOptions
from qcmon.simulate import scenario_config, write_session
from reliability_data import qcmon_cmd, run_qcmon, snapshot


def test_live_watch_leaves_the_session_as_the_simulator_wrote_it(tmp_path):
    session, out = tmp_path / "sim", tmp_path / "record"
    sim = subprocess.Popen(qcmon_cmd("simulate", session, "--frames", 90, "--size", 64, 64,
                                     "--layout", "chunks", "--chunk-frames", 40, "--live"),
                           stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL)
    try:
        end = time.monotonic() + 30
        while not (session / "frames").is_dir() and time.monotonic() < end:
            time.sleep(0.05)
        watch = subprocess.Popen(qcmon_cmd("watch", session / "frames", "--plain", "--until-idle", 3, "--out", out),
                                 stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL)
        try:
            assert sim.wait(60) == 0, sim.stderr.read().decode()
            written = snapshot(session)  # what the microscope wrote, as soon as it finished
            assert watch.wait(60) == 0, watch.stderr.read().decode()
        finally:
            if watch.poll() is None:
                watch.kill()
                watch.wait()
            watch.stderr.close()
    finally:
        if sim.poll() is None:
            sim.kill()
            sim.wait()
        sim.stderr.close()
    assert snapshot(session) == written
    assert sorted(os.listdir(session / "frames")) == ["run_00001.tif", "run_00002.tif", "run_00003.tif"]
    assert (out / "summary.json").is_file() and not any(session.rglob("*.qcmon"))


@pytest.fixture
def finished(tmp_path) -> Path:
    config = scenario_config("clean", n_frames=50, height=64, width=64, seed=5)
    return Path(write_session(config, tmp_path / "archive" / "mouse1" / "2026-11-30", layout="chunks",
                              chunk_frames=20)["frames_dir"])


def test_summarize_and_audit_leave_the_files_as_they_were(tmp_path, finished):
    root = finished.parents[2]
    before = snapshot(root)
    Monitor(MonitorOptions(path=finished, out_dir=tmp_path / "summary", follow=False)).run()
    assert snapshot(root) == before
    result = run_audit(AuditOptions(roots=[root], out_dir=tmp_path / "audit"), progress=False)
    assert result["measured"] == 1 and result["errors"] == 0
    assert snapshot(root) == before


def test_summarize_of_a_read_only_session(tmp_path, finished):
    # as root the mode bits do not stop writes; the snapshot (ctime, inode, content) shows none happened
    for path in [finished, *finished.iterdir()]:
        os.chmod(path, stat.S_IMODE(os.stat(path).st_mode) & ~0o222)
    try:
        before = snapshot(finished)
        res = run_qcmon("summarize", finished, "--out", tmp_path / "record")
        assert res.returncode == 0, res.stderr
        assert snapshot(finished) == before
        assert (tmp_path / "record" / "traces.csv").is_file()
    finally:
        for path in [finished, *finished.iterdir()]:
            os.chmod(path, stat.S_IMODE(os.stat(path).st_mode) | 0o200)


@pytest.mark.skipif(not os.path.isdir("/proc/self/fd"), reason="lists open files through Linux's /proc")
def test_while_watching_no_frame_file_is_open_during_measurement(tmp_path, finished, monkeypatch):
    # Some systems refuse to rename or delete a file another program holds open: while the microscope writes, a
    # batch of frames is read and its file closed before the frames are measured (qcmon.monitor.loop.Monitor._frames).
    # A finished session is measured as it is read, its file open meanwhile: the check sees both.
    from qcmon.engine import Engine

    real = Engine.process
    seen = {True: set(), False: set()}
    mode = {"follow": True}

    def process(self, frame):
        for fd in os.listdir("/proc/self/fd"):
            try:
                target = os.readlink(f"/proc/self/fd/{fd}")
            except OSError:
                continue
            if target.startswith(str(finished)):
                seen[mode["follow"]].add(target)
        return real(self, frame)

    monkeypatch.setattr(Engine, "process", process)
    for follow in (True, False):
        mode["follow"] = follow
        Monitor(MonitorOptions(path=finished, out_dir=tmp_path / f"rec_{follow}", follow=follow,
                               until_idle_s=0.5 if follow else None, poll_interval_s=0.1)).run()
    assert seen[True] == set()
    assert seen[False]  # the other mode, so that the check itself is seen to work
