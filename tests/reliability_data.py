"""Helpers shared by the reliability tests: simulated good frames, folder snapshots, records and subprocesses."""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from qcmon.record.journal import read_events, read_traces
from qcmon.simulate import scenario_config, simulate

#: Frame size of the reliability sessions (px): small, so that the tests are quick.
SIZE = 64


def good_pages(n: int, *, seed: int = 1, size: int = SIZE) -> np.ndarray:
    """``n`` simulated uint16 frames (clean scenario) of ``size`` × ``size`` px."""
    return simulate(scenario_config("clean", n_frames=n, height=size, width=size, seed=seed)).pages


def snapshot(folder: str | os.PathLike) -> dict[str, tuple]:
    """Every entry under ``folder`` (relative path → sha256, size, mtime_ns, ctime_ns, inode, mode).

    Symbolic links are described by their target text, not followed; folders by their own stat.
    """
    folder = Path(folder)
    out: dict[str, tuple] = {}
    for root, dirs, files in os.walk(folder, followlinks=False):
        for name in sorted(dirs + files):
            path = Path(root) / name
            st = os.lstat(path)
            rel = str(path.relative_to(folder))
            if path.is_symlink():
                out[rel] = ("link", os.readlink(path), st.st_mtime_ns, st.st_ctime_ns, st.st_ino)
            elif path.is_dir():
                out[rel] = ("dir", st.st_mtime_ns, st.st_ctime_ns, st.st_ino, st.st_mode)
            else:
                h = hashlib.sha256()
                with open(path, "rb") as fh:
                    for block in iter(lambda: fh.read(1 << 20), b""):
                        h.update(block)
                out[rel] = (h.hexdigest(), st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_ino, st.st_mode)
    st = os.stat(folder)
    out["."] = ("dir", st.st_mtime_ns, st.st_ctime_ns, st.st_ino, st.st_mode)
    return out


def recorded_pages(out_dir: str | os.PathLike) -> list[tuple[str, int]]:
    """(file name, page) of every row of ``OUT/traces.csv``, in row order."""
    tr = read_traces(Path(out_dir) / "traces.csv")
    return [(os.path.basename(str(s)), int(p)) for s, p in zip(tr["source"], tr["page"])]


def problem_events(out_dir: str | os.PathLike) -> list[str]:
    """Messages of the ``problem`` events in ``OUT/events.jsonl``."""
    return [e.message for e in read_events(Path(out_dir) / "events.jsonl") if e.kind == "problem"]


def qcmon_cmd(*args: str) -> list[str]:
    """The command line running ``qcmon ARGS`` with this interpreter."""
    return [sys.executable, "-m", "qcmon", *map(str, args)]


def run_qcmon(*args: str, timeout: float = 60.0) -> subprocess.CompletedProcess:
    """Run ``qcmon ARGS`` to its end (text output captured)."""
    return subprocess.run(qcmon_cmd(*args), capture_output=True, text=True, timeout=timeout,
                          stdin=subprocess.DEVNULL)


def as_unprivileged() -> list[str]:
    """The prefix that runs a command as the unprivileged user ``nobody`` (uid/gid 65534) when the tests run as
    root — root reads any file and writes into read-only folders, which would hide a permission failure (the CI
    runs as root) — and nothing otherwise. Raises ``RuntimeError`` when root cannot drop privileges here."""
    if os.geteuid() != 0:
        return []
    if shutil.which("setpriv") is None:
        raise RuntimeError("running as root without setpriv (util-linux): cannot test a permission failure")
    prefix = ["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups"]
    probe = subprocess.run(prefix + [sys.executable, "-c", "import qcmon"], capture_output=True, text=True,
                           cwd="/", timeout=60)
    if probe.returncode:
        raise RuntimeError("the user nobody cannot run this Python with qcmon (the checkout, the virtual "
                           f"environment or the interpreter is not readable by all users): {probe.stderr[-300:]}")
    return prefix


def unprivileged_env(home: os.PathLike) -> dict[str, str]:
    """Environment for :func:`as_unprivileged` commands: a home and a matplotlib folder that user may write."""
    return dict(os.environ, HOME=str(home), MPLCONFIGDIR=str(Path(home) / ".mpl"))


def recorded_rows(out_dir: str | os.PathLike) -> int:
    """Rows in a record's traces.csv so far (0 before it exists)."""
    try:
        with open(Path(out_dir) / "traces.csv", "rb") as fh:
            return max(0, fh.read().count(b"\n") - 1)
    except FileNotFoundError:
        return 0


def wait_until(cond, timeout: float, step: float = 0.05) -> bool:
    """Poll ``cond`` until it is true or ``timeout`` seconds passed; its last value."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if cond():
            return True
        time.sleep(step)
    return cond()


class PausedReasons:
    """A monitor listener that keeps the ``paused_reason`` of every status it is sent (rows and events ignored)."""

    def __init__(self) -> None:
        self.seen: list[str] = []

    def on_rows(self, rows) -> None:
        pass

    def on_event(self, ev) -> None:
        pass

    def on_status(self, st) -> None:
        self.seen.append(st.paused_reason)
