"""Faults met in use, each driven through the real command line in real processes: kill -9 and resume, two
watchers on one record, a full disk, a deleted output folder, unreadable and replaced files, a failing or hanging
``--on-alarm`` command, the reader library's log messages, a second Ctrl-C.

The contracts checked are qcmon's own promises (README "Exit status", "Where the record goes", "Limits and
cautions"): a resumed record equals an uninterrupted one; nothing measured is lost; the final files are one set.
Frames are the simulator's (qcmon's own) made saturated where an alarm is wanted — the measurement itself is
not under test here, only what happens around it.
"""

from __future__ import annotations

import json
import os
import shlex
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import tifffile

from qcmon.record.journal import read_events, read_traces
from reliability_data import as_unprivileged, good_pages, problem_events, qcmon_cmd, run_qcmon, unprivileged_env
from reliability_data import recorded_rows as _rows
from reliability_data import wait_until as _wait

RATE = "30"  # frames per second given on the command line (the files carry none)




def _saturating_pages(n: int, periods) -> np.ndarray:
    """``n`` simulated 64² frames; in each (first, last) period 2 % of the pixels sit at the uint16 maximum
    (beyond the default profile's 1 % alarm level for saturated pixels)."""
    pages = good_pages(n).copy()
    for first, last in periods:
        pages[first:last + 1, :8, :11] = 65535  # 88 of 4096 px
    return pages


def _write_frames(folder: Path, pages: np.ndarray, start: int = 0) -> None:
    """One TIFF per frame, each written under a hidden name and renamed (as acquisition software does)."""
    folder.mkdir(parents=True, exist_ok=True)
    for i, page in enumerate(pages, start=start):
        tmp = folder / f".f_{i:04d}.tif.part"
        tifffile.imwrite(tmp, page, photometric="minisblack")
        os.replace(tmp, folder / f"f_{i:04d}.tif")


class _Proc:
    """A ``qcmon`` process in the background, killed at the end of the test whatever happens."""

    def __init__(self, *args, **kw):
        self.proc = subprocess.Popen(qcmon_cmd(*args), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                     stdin=subprocess.DEVNULL, **kw)

    def wait_started(self) -> None:
        line = self.proc.stdout.readline().decode()
        assert "watching" in line, line + self.proc.stderr.read().decode()

    def finish(self, timeout: float = 60) -> tuple[int, str, str]:
        out, err = self.proc.communicate(timeout=timeout)
        return self.proc.returncode, out.decode(), err.decode()

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()
        for stream in (self.proc.stdout, self.proc.stderr):
            stream.close()


def _threshold_events(out: Path) -> list[tuple]:
    return [(e.kind, e.metric, e.state, e.channel, e.plane, e.frame, e.started_frame, e.time_s)
            for e in read_events(out / "events.jsonl") if e.kind in ("start", "end")]


def _alarm_logger(log: Path) -> str:
    """An ``--on-alarm`` command that appends its standard input (the event) to ``log``."""
    return shlex.join([sys.executable, "-c", "import sys; open(sys.argv[1], 'a').write(sys.stdin.read())",
                       str(log)])


# -------------------------------------------------------------------------------------------------------- 1, 2
def test_kill_9_during_an_alarm_then_resume_equals_an_uninterrupted_run(tmp_path):
    frames, out, ref = tmp_path / "frames", tmp_path / "record", tmp_path / "uninterrupted"
    pages = _saturating_pages(300, [(60, 120), (170, 260)])
    _write_frames(frames, pages[:200])
    (frames / "f_0050x.tif").write_bytes(b"not a TIFF at all")  # one bad file: one problem, whatever the restarts
    log = tmp_path / "alarms.jsonl"
    watch = _Proc("watch", frames, "--plain", "--until-idle", 60, "--frame-rate", RATE, "--out", out,
                  "--on-alarm", _alarm_logger(log))
    try:
        watch.wait_started()
        assert _wait(lambda: _rows(out) >= 200, 60), "the first 200 frames were not measured"
        time.sleep(0.3)  # the events of the last rows are appended right after them
        states = [(e.kind, e.state) for e in read_events(out / "events.jsonl") if e.metric == "saturated_frac"]
        assert states[-1] == ("start", "alarm"), f"the kill must come while the alarm is on: {states}"
        os.kill(watch.proc.pid, signal.SIGKILL)
        assert watch.proc.wait(10) == -signal.SIGKILL
    finally:
        watch.close()
    _write_frames(frames, pages[200:], start=200)
    res = run_qcmon("watch", frames, "--plain", "--until-idle", 1, "--frame-rate", RATE, "--out", out,
                    "--on-alarm", _alarm_logger(log), timeout=120)
    assert res.returncode == 0, res.stderr
    # again, with nothing new: a restart over a complete record changes nothing said before
    res = run_qcmon("summarize", frames, "--frame-rate", RATE, "--out", out, timeout=120)
    assert res.returncode == 0, res.stderr
    unbroken = run_qcmon("summarize", frames, "--frame-rate", RATE, "--out", ref, timeout=120)
    assert unbroken.returncode == 0, unbroken.stderr

    np.testing.assert_array_equal(read_traces(out)["frame"], np.arange(300))
    assert _threshold_events(out) == _threshold_events(ref)
    s, r = (json.loads((d / "summary.json").read_text(encoding="utf-8")) for d in (out, ref))
    assert s["events"] == r["events"] and s["events"]["alarms"] >= 2, (s["events"], r["events"])
    assert s["saturation"]["alarm_s"] == r["saturation"]["alarm_s"] > 0
    assert (out / "exclude.csv").read_text(encoding="utf-8") == (ref / "exclude.csv").read_text(encoding="utf-8")
    assert len(problem_events(out)) == 1 and "not a TIFF" in problem_events(out)[0], problem_events(out)
    assert s["problems"] == r["problems"]
    # the command ran once per alarm start, not again for the alarm under way at the kill
    starts = [json.loads(line) for line in log.read_text(encoding="utf-8").splitlines()]
    assert sorted((e["frame"], e["metric"]) for e in starts) == sorted(  # (the commands run side by side)
        (e[5], e[1]) for e in _threshold_events(ref) if e[0] == "start" and e[2] == "alarm")


# ----------------------------------------------------------------------------------------------------------- 3
def test_a_second_watcher_on_the_same_record_refuses_and_a_dead_ones_lock_does_not_stay(tmp_path):
    frames = tmp_path / "frames"
    _write_frames(frames, good_pages(40))
    out = tmp_path / "frames.qcmon"  # the default record beside the folder
    first = _Proc("watch", frames, "--plain", "--until-idle", 60, "--frame-rate", RATE)
    try:
        first.wait_started()
        second = run_qcmon("watch", frames, "--plain", "--until-idle", 1, "--frame-rate", RATE, timeout=60)
        assert second.returncode == 2, second.stderr
        assert "already writing this record" in second.stderr and str(out) in second.stderr, second.stderr
        assert f"process {first.proc.pid}" in second.stderr
        assert "Traceback" not in second.stderr
        assert _wait(lambda: _rows(out) == 40, 30)
        os.kill(first.proc.pid, signal.SIGKILL)  # a crash: the kernel drops the lock with the process
        first.proc.wait(10)
    finally:
        first.close()
    third = run_qcmon("summarize", frames, "--frame-rate", RATE, timeout=60)
    assert third.returncode == 0, third.stderr
    np.testing.assert_array_equal(read_traces(out)["frame"], np.arange(40))  # one writer: each frame once


# ----------------------------------------------------------------------------------------------------------- 4
class _Disk:
    """A nearly full disk for the record: a real one (a 1 MiB tmpfs: ENOSPC from the kernel; needs root, as in the
    CI) or, where nothing can be mounted, qcmon run through ``full_disk_layer.py`` with the same free space."""

    def __init__(self, path: Path, layered: bool):
        self.path, self.layered, self.quota = path, layered, 1 << 20

    def fill(self, leave: int) -> None:
        """Leave ``leave`` bytes free."""
        if self.layered:
            used = sum(p.stat().st_size for p in self.path.rglob("*") if p.is_file())
            self.quota = used + leave
            return
        st = os.statvfs(self.path)
        with open(self.path / "filler", "wb") as fh:
            fh.write(b"\0" * max(0, st.f_bavail * st.f_frsize - leave))

    def empty(self) -> None:
        if self.layered:
            self.quota = 1 << 40
        else:
            (self.path / "filler").unlink()

    def run(self, *args) -> subprocess.CompletedProcess:
        if not self.layered:
            return run_qcmon(*args, timeout=120)
        layer = Path(__file__).with_name("full_disk_layer.py")
        return subprocess.run([sys.executable, str(layer), str(self.path), str(self.quota), *map(str, args)],
                              capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)


def _disk(tmp_path: Path, kind: str):
    mnt = tmp_path / "disk"
    mnt.mkdir()
    if kind == "tmpfs":
        res = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m", "tmpfs", str(mnt)], capture_output=True)
        if res.returncode == 0:
            try:
                yield _Disk(mnt, layered=False)
            finally:
                subprocess.run(["umount", "-l", str(mnt)], capture_output=True)
            return
        pytest.skip("mounting a tmpfs needs root (the CI runs as root; see .ci/run); the 'layer' case stands in")
    yield _Disk(mnt, layered=True)


@pytest.fixture(params=["tmpfs", "layer"])
def small_disk(request, tmp_path):
    """Both kinds of full disk (the layer is checked against the real one here)."""
    yield from _disk(tmp_path, request.param)


@pytest.fixture
def one_small_disk(tmp_path):
    """A real full disk where it can be mounted, else the layer."""
    mnt = tmp_path / "probe"
    mnt.mkdir()
    ok = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", str(mnt)], capture_output=True)
    if ok.returncode == 0:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)
    yield from _disk(tmp_path, "tmpfs" if ok.returncode == 0 else "layer")


def test_disk_full_mid_session_exits_2_without_traceback_and_keeps_complete_rows(tmp_path, small_disk):
    frames = tmp_path / "frames"
    _write_frames(frames, good_pages(300))
    out = small_disk.path / "record"
    small_disk.fill(leave=96 * 1024)  # room for the first 256 rows (appended at once), not for 300 (~100 kB)
    res = small_disk.run("summarize", frames, "--frame-rate", RATE, "--out", out)
    assert res.returncode == 2, (res.returncode, res.stderr)  # README: 2 on an input or output error
    assert "Traceback" not in res.stderr and "disk is full" in res.stderr and str(out) in res.stderr, res.stderr
    rows = read_traces(out)["frame"]  # the complete rows written before the disk filled (a partial line ignored)
    assert 0 < len(rows) < 300
    np.testing.assert_array_equal(rows, np.arange(len(rows)))
    assert not (out / "summary.json").exists() and not [p for p in os.listdir(out) if p.endswith(".tmp")]


def test_disk_full_at_the_end_keeps_the_old_set_of_final_files(tmp_path, one_small_disk):
    small_disk = one_small_disk
    frames = tmp_path / "frames"
    pages = good_pages(120)
    _write_frames(frames, pages[:80])
    out = small_disk.path / "record"
    assert small_disk.run("summarize", frames, "--frame-rate", RATE, "--out", out).returncode == 0
    final = ("summary.json", "report.html", "exclude.csv", "reference.tif")
    before = {name: (out / name).read_bytes() for name in final}
    _write_frames(frames, pages[80:], start=80)
    # room for the 40 new rows, the summary, exclude list and reference image, but not the report as well
    small_disk.fill(leave=128 * 1024)
    assert len(before["report.html"]) > 128 * 1024, "the report must not fit: make the free space smaller"
    res = small_disk.run("summarize", frames, "--frame-rate", RATE, "--out", out)
    assert res.returncode == 2 and "disk is full" in res.stderr and "Traceback" not in res.stderr, res.stderr
    assert {name: (out / name).read_bytes() for name in final} == before  # the old set, whole
    assert not [p for p in os.listdir(out) if p.endswith(".tmp")]
    np.testing.assert_array_equal(read_traces(out)["frame"], np.arange(120))  # the rows are kept
    small_disk.empty()
    assert small_disk.run("summarize", frames, "--frame-rate", RATE, "--out", out).returncode == 0
    assert json.loads((out / "summary.json").read_text(encoding="utf-8"))["frames"] == 120


# ----------------------------------------------------------------------------------------------------------- 5
def test_output_folder_deleted_mid_watch_is_recreated_with_every_row(tmp_path):
    frames, out = tmp_path / "frames", tmp_path / "record"
    pages = good_pages(300)
    _write_frames(frames, pages[:150])
    watch = _Proc("watch", frames, "--plain", "--until-idle", 60, "--frame-rate", RATE, "--out", out)
    try:
        watch.wait_started()
        assert _wait(lambda: _rows(out) == 150, 60)
        shutil.rmtree(out)
        t0 = time.monotonic()
        assert _wait(lambda: (out / "traces.csv").exists(), 10), "the deleted output folder was not recreated"
        noticed_s = time.monotonic() - t0
        assert noticed_s < 5
        _write_frames(frames, pages[150:], start=150)
        assert _wait(lambda: _rows(out) == 300, 60)
        watch.proc.send_signal(signal.SIGTERM)  # ends the watch cleanly
        rc, stdout, stderr = watch.finish()
    finally:
        watch.close()
    assert rc == 0, stderr
    np.testing.assert_array_equal(read_traces(out)["frame"], np.arange(300))  # none lost, none twice
    said = [m for m in problem_events(out) if "deleted" in m]
    assert len(said) == 1 and str(out) in said[0], problem_events(out)
    assert "output folder was deleted" in stdout  # said on the console as it happens
    assert json.loads((out / "summary.json").read_text(encoding="utf-8"))["frames"] == 300


# ----------------------------------------------------------------------------------------------------------- 6
def _compressed_without_decoder(path: Path, page: np.ndarray) -> str:
    """Write ``page`` and mark it compressed with a scheme tifffile has no decoder for here (LZW without the
    imagecodecs package, else another one it lacks). Returns the scheme's name."""
    missing = [c for c in tifffile.COMPRESSION if c not in tifffile.TIFF.DECOMPRESSORS]
    if not missing:
        pytest.skip("every TIFF compression scheme has a decoder here")
    scheme = tifffile.COMPRESSION.LZW if tifffile.COMPRESSION.LZW in missing else missing[0]
    tifffile.imwrite(path, page, photometric="minisblack")
    with tifffile.TiffFile(path) as tif:
        tag = tif.pages[0].tags["Compression"]
        where = tag.valueoffset
    data = bytearray(path.read_bytes())
    data[where:where + 2] = int(scheme).to_bytes(2, "little")  # tifffile writes little-endian files
    path.write_bytes(bytes(data))
    return scheme.name


def test_a_page_without_its_decoder_is_one_problem_and_holds_back_nothing(tmp_path):
    frames, out = tmp_path / "frames", tmp_path / "record"
    pages = good_pages(80)
    _write_frames(frames, pages[:40])
    name = _compressed_without_decoder(frames / "f_0040.tif", pages[40])
    _write_frames(frames, pages[41:], start=41)
    watch = _Proc("watch", frames, "--plain", "--until-idle", 60, "--frame-rate", RATE, "--out", out)
    try:
        watch.wait_started()
        # the frames behind the bad page are measured at once, not after a wait of 30 s
        assert _wait(lambda: _rows(out) == 79, 15), f"{_rows(out)} rows: the bad page held back the rest"
        watch.proc.send_signal(signal.SIGTERM)
        rc, stdout, stderr = watch.finish()
    finally:
        watch.close()
    assert rc == 0, stderr
    said = problem_events(out)
    assert len(said) == 1 and "f_0040.tif" in said[0] and name in said[0], said
    frames_recorded = read_traces(out)["frame"]  # the bad page keeps its slot: frame 40 is missing, no other
    np.testing.assert_array_equal(frames_recorded, np.delete(np.arange(80), 40))


def test_an_unreadable_file_is_one_problem_and_holds_back_nothing(open_dir):
    frames, out = open_dir / "frames", open_dir / "record"
    pages = good_pages(80)
    _write_frames(frames, pages)
    (frames / "f_0040.tif").chmod(0o000)  # the microscope's user only (or a permission gone wrong)
    frames.chmod(0o755)
    out.mkdir(mode=0o777)
    out.chmod(0o777)
    env = unprivileged_env(open_dir)
    cmd = as_unprivileged() + qcmon_cmd("watch", frames, "--plain", "--until-idle", 60, "--frame-rate", RATE,
                                   "--out", out)
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, stdin=subprocess.DEVNULL,
                            env=env)
    try:
        assert _wait(lambda: _rows(out) == 79, 20), f"{_rows(out)} rows: the unreadable file held back the rest"
        proc.send_signal(signal.SIGTERM)
        stdout, stderr = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
    assert proc.returncode == 0, stderr.decode()
    said = problem_events(out)
    assert len(said) == 1 and "f_0040.tif" in said[0] and "cannot be opened" in said[0], said


# ----------------------------------------------------------------------------------------------------------- 9
def test_a_file_replaced_under_the_same_name_is_reported_not_spliced(tmp_path):
    frames, out = tmp_path / "frames", tmp_path / "record"
    frames.mkdir()
    first, second = good_pages(100, seed=1), good_pages(250, seed=2)
    tifffile.imwrite(frames / ".run.tif.part", first, photometric="minisblack", metadata=None)
    os.replace(frames / ".run.tif.part", frames / "run.tif")
    watch = _Proc("watch", frames, "--plain", "--until-idle", 60, "--frame-rate", RATE, "--out", out)
    try:
        watch.wait_started()
        assert _wait(lambda: _rows(out) == 100, 30)
        # another acquisition under the same name, longer than the first
        tifffile.imwrite(frames / ".run.tif.part", second, photometric="minisblack", metadata=None)
        os.replace(frames / ".run.tif.part", frames / "run.tif")
        assert _wait(lambda: any("replaced" in m for m in problem_events(out)), 10), problem_events(out)
        watch.proc.send_signal(signal.SIGTERM)
        rc, stdout, stderr = watch.finish()
    finally:
        watch.close()
    assert rc == 0, stderr
    tr = read_traces(out)
    np.testing.assert_array_equal(tr["page"], np.arange(100))  # the first file's pages only
    said = [m for m in problem_events(out) if "replaced" in m]
    assert len(said) == 1 and "run.tif" in said[0], said


# ---------------------------------------------------------------------------------------------------------- 10
@pytest.mark.parametrize("command, why", [("notify-lab --room '3", "cannot be read as a command"),
                                          ("qcmon-no-such-program --x", "not found on PATH"),
                                          ("./relative/none", "not an executable file")])
def test_on_alarm_command_checked_at_start(tmp_path, command, why):
    frames = tmp_path / "frames"
    _write_frames(frames, good_pages(5))
    t0 = time.monotonic()
    res = run_qcmon("watch", frames, "--plain", "--until-idle", 30, "--on-alarm", command, timeout=60)
    assert res.returncode == 2 and why in res.stderr and "Traceback" not in res.stderr, res.stderr
    assert time.monotonic() - t0 < 25  # at start, not after the 30 s of --until-idle
    assert not (tmp_path / "frames.qcmon").exists()


def _alarm_session(tmp_path: Path) -> Path:
    frames = tmp_path / "frames"
    _write_frames(frames, _saturating_pages(300, [(40, 80), (120, 160), (200, 240)]))  # three alarms
    return frames


def test_on_alarm_command_that_hangs_is_stopped_with_what_it_started(tmp_path):
    import psutil

    frames = _alarm_session(tmp_path)
    marker = f"{time.time_ns() % 10**9 + 1000}"  # sleep seconds that name this test's processes
    hang = shlex.join(["sh", "-c", f"sleep {marker} & sleep {marker}"])  # a child that would outlive it
    t0 = time.monotonic()
    res = run_qcmon("watch", frames, "--plain", "--until-idle", 1, "--frame-rate", RATE, "--out",
                    tmp_path / "r", "--on-alarm", hang, timeout=120)
    took = time.monotonic() - t0
    assert res.returncode == 0, res.stderr
    import qcmon.monitor.loop

    ALARM_COMMAND_LIMIT_S = getattr(qcmon.monitor.loop, "ALARM_COMMAND_LIMIT_S", 10.0)  # (10 s: an earlier version's wait)
    assert took < ALARM_COMMAND_LIMIT_S + 20, took  # the three runs waited for side by side, not one after another
    left = [p for p in psutil.process_iter(["cmdline"]) if marker in " ".join(p.info["cmdline"] or [])]
    assert not left, left
    said = [m for m in problem_events(tmp_path / "r") if "--on-alarm" in m]
    assert len(said) == 1 and "stopped" in said[0], said
    runs = sum(e.kind == "start" and e.state == "alarm" for e in read_events(tmp_path / "r"))
    assert runs >= 3 and took < runs * ALARM_COMMAND_LIMIT_S  # waited one after another, it took runs × limit


def test_on_alarm_command_that_fails_is_said_once(tmp_path):
    frames = _alarm_session(tmp_path)
    res = run_qcmon("watch", frames, "--plain", "--until-idle", 1, "--frame-rate", RATE, "--out",
                    tmp_path / "r", "--on-alarm", "false", timeout=120)
    assert res.returncode == 0, res.stderr
    said = [m for m in problem_events(tmp_path / "r") if "--on-alarm" in m]
    assert len(said) == 1 and "exit status 1" in said[0], said
    assert "exit status 1" in res.stdout  # shown to the user as it happens
    summary = json.loads((tmp_path / "r" / "summary.json").read_text(encoding="utf-8"))
    assert sum("--on-alarm" in p for p in summary["problems"]) == 1


# ---------------------------------------------------------------------------------------------------------- 15
def test_the_tiff_librarys_log_messages_are_not_printed(tmp_path):
    frames = tmp_path / "frames"
    frames.mkdir()
    pages = good_pages(40)
    tifffile.imwrite(frames / "run.tif", pages, photometric="minisblack", description="x" * 300,
                     software="writer", metadata=None)
    # an invalid field type in the Software tag: tifffile logs it (and skips the tag); the pages are fine
    data = bytearray((frames / "run.tif").read_bytes())
    with tifffile.TiffFile(frames / "run.tif") as tif:
        entry = tif.pages[0].tags["Software"].offset
    data[entry + 2:entry + 4] = (253).to_bytes(2, "little")
    (frames / "run.tif").write_bytes(bytes(data))
    res = run_qcmon("watch", frames, "--plain", "--until-idle", 1, "--frame-rate", RATE, "--out", tmp_path / "r",
                    timeout=60)
    assert res.returncode == 0, res.stderr
    assert "TiffTag" not in res.stderr + res.stdout and "raised" not in res.stderr, res.stderr
    assert len(read_traces(tmp_path / "r")["frame"]) == 40


# ---------------------------------------------------------------------------------------------------------- 16
def test_second_ctrl_c_aborts_without_the_summary_and_keeps_the_rows(tmp_path):
    frames, out = tmp_path / "frames", tmp_path / "record"
    _write_frames(frames, _saturating_pages(100, [(40, 80)]))
    watch = _Proc("watch", frames, "--plain", "--until-idle", 60, "--frame-rate", RATE, "--out", out)
    try:
        watch.wait_started()
        assert _wait(lambda: _rows(out) == 100, 60)
        watch.proc.send_signal(signal.SIGINT)  # the first Ctrl-C: the watch ends and writes the summary set,
        time.sleep(0.5)  # which takes a second or more (the report's plots) ...
        watch.proc.send_signal(signal.SIGINT)  # ... when the second comes
        rc, stdout, stderr = watch.finish()
    finally:
        watch.close()
    assert rc == 130, (rc, stderr)
    assert "Traceback" not in stderr and "no summary" in stderr, stderr
    written = [n for n in ("summary.json", "report.html", "exclude.csv", "reference.tif") if (out / n).exists()]
    assert written == [], f"an abort wrote {written}"
    np.testing.assert_array_equal(read_traces(out)["frame"], np.arange(100))
    # the record is whole: the next run resumes it and writes the summary
    res = run_qcmon("summarize", frames, "--frame-rate", RATE, "--out", out, timeout=60)
    assert res.returncode == 0 and (out / "summary.json").exists(), res.stderr


# --------------------------------------------------------------------------------- the dashboard's terminal closes
def test_a_closed_terminal_ends_the_dashboard_and_writes_the_summary(tmp_path):
    # The dashboard on a real pseudo-terminal (its controlling terminal); closing the terminal's other end is what a
    # dropped remote login does: the kernel sends SIGHUP (POSIX, "Terminal Hangup"). Before, the watch went on and
    # then the dashboard hung for ever on its way out (its writes to the dead terminal blocked), with no summary.
    import fcntl
    import pty
    import termios
    import threading

    frames, out = tmp_path / "frames", tmp_path / "record"
    _write_frames(frames, good_pages(80))
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, b"\x28\x00\xa0\x00\x00\x00\x00\x00")  # 40 rows x 160 columns

    def controlling_terminal():
        os.setsid()
        fcntl.ioctl(0, termios.TIOCSCTTY, 0)

    env = dict(os.environ, TERM="xterm-256color")
    proc = subprocess.Popen(qcmon_cmd("watch", frames, "--until-idle", 600, "--frame-rate", RATE, "--out", out),
                            stdin=slave, stdout=slave, stderr=slave, preexec_fn=controlling_terminal, env=env,
                            close_fds=True)
    os.close(slave)

    def drain():  # a terminal shows what it is sent; unread, the dashboard's writes would fill its buffer
        try:
            while os.read(master, 65536):
                pass
        except OSError:
            pass

    threading.Thread(target=drain, daemon=True).start()
    try:
        assert _wait(lambda: _rows(out) == 80, 60), f"{_rows(out)} rows"
        os.close(master)  # the terminal is gone
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
            pytest.fail("the dashboard did not end when its terminal closed")
    summary = json.loads((out / "summary.json").read_text())
    assert summary["frames"] == 80
