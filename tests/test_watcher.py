"""Folder watching (change notification and polling) and the live loop over a session being written.

Sessions are written by qcmon's simulator, live at the frame rate, while they are read; the reference for the
pixels is tifffile reading the finished files, and for "no frame twice, none missed" the page count the
simulator reports.
"""

from __future__ import annotations

import os
import threading
import time

import numpy as np
import pytest
import tifffile

from qcmon.simulate import SimConfig
from qcmon.simulate._write import write_session
from qcmon.sources import FolderWatcher, SessionSource, iter_live


def _later(delay_s, action):
    t = threading.Thread(target=lambda: (time.sleep(delay_s), action()))
    t.start()
    return t


@pytest.mark.parametrize("poll_interval_s", [None, 0.1])
def test_watcher_wakes_on_a_new_file_and_leaves_no_threads(tmp_path, poll_interval_s):
    before = set(threading.enumerate())
    with FolderWatcher(tmp_path, poll_interval_s=poll_interval_s) as watcher:
        assert watcher.backend == ("notify" if poll_interval_s is None else "polling")
        assert watcher.wait(0.3) is False  # nothing happened
        writer = _later(0.2, lambda: tifffile.imwrite(tmp_path / "a.tif", np.zeros((4, 4), np.uint16)))
        assert watcher.wait(5.0) is True
        writer.join()
        observer_threads = set(threading.enumerate()) - before
        assert observer_threads  # the observer runs in its own thread(s)
    time.sleep(0.05)
    assert not [t for t in observer_threads if t.is_alive()]


def test_watcher_is_not_woken_by_reading(tmp_path):
    tifffile.imwrite(tmp_path / "a.tif", np.zeros((3, 4, 4), np.uint16), photometric="minisblack")
    source = SessionSource(tmp_path)
    with FolderWatcher(tmp_path) as watcher:
        watcher.wait(0.2)
        assert len(source.poll(final=True)) == 3
        assert watcher.wait(0.3) is False  # our own read-only opens and closes are not changes


def test_watcher_validation(tmp_path):
    with pytest.raises(ValueError, match="poll_interval_s"):
        FolderWatcher(tmp_path, poll_interval_s=0)
    with pytest.raises(ValueError, match="path"):
        FolderWatcher(tmp_path / "missing")


@pytest.mark.parametrize("layout,poll_interval_s", [("multipage", None), ("per_frame", 0.1), ("raw", None),
                                                    ("chunks", 0.1)])
def test_live_session_read_while_written(tmp_path, layout, poll_interval_s):
    config = SimConfig(n_frames=30, height=24, width=24, channels=1, planes=2, frame_rate_hz=60.0)
    folder = tmp_path / "frames"
    folder.mkdir()
    writer = threading.Thread(target=write_session, args=(config, tmp_path),
                              kwargs={"layout": layout, "live": True, "chunk_frames": 7, "overwrite": True})
    source = SessionSource(folder, planes=2)
    stop = threading.Event()
    got = []
    with FolderWatcher(folder, poll_interval_s=poll_interval_s) as watcher:
        writer.start()
        for frames in iter_live(source, watcher, stop_event=stop, idle_timeout_s=1.0, tick_s=0.05):
            got += frames
            if not writer.is_alive() and len(got) >= config.n_pages:
                stop.set()
    writer.join()
    assert source.problems == []
    assert len(got) == config.n_pages == 60
    assert [(f.index, f.plane) for f in got] == [(t, z) for t in range(30) for z in range(2)]
    # reference: the same session read after the fact (one code path, same frames)
    after = list(SessionSource(folder, planes=2))
    for a, b in zip(got, after):
        np.testing.assert_array_equal(a.data, b.data)
        assert (a.index, a.plane, a.page, a.source) == (b.index, b.plane, b.page, b.source)
    if layout == "multipage":
        np.testing.assert_array_equal(np.stack([f.data for f in got]),
                                      tifffile.imread(os.path.join(folder, "run_00001.tif")).reshape(60, 24, 24))


def test_iter_live_ends_when_idle_with_a_final_poll(tmp_path):
    source = SessionSource(tmp_path)
    (tmp_path / "a.tif").write_bytes(b"")  # created, never written
    stop = threading.Event()
    with FolderWatcher(tmp_path, poll_interval_s=0.05) as watcher:
        t0 = time.monotonic()
        batches = list(iter_live(source, watcher, stop_event=stop, idle_timeout_s=0.3, tick_s=0.05))
    assert batches == []
    assert time.monotonic() - t0 < 5
    assert len(source.problems) == 1 and source.problems[0].path.endswith("a.tif")  # reported by the final poll
