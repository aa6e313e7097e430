"""``qcmon demo``: the simulator writes a session live into a folder and qcmon watches it.

The scenario ("demo", our own) plants a slow z-drift, a burst of motion and a detector-gain step that saturates
cells, so a newcomer sees warnings appear and clear. Nothing but qcmon itself is needed.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from pathlib import Path

from qcmon.monitor.loop import Monitor, MonitorOptions
from qcmon.ui.watch import run_watch


def start_writer(out: Path, *, scenario: str = "demo", seconds: float | None = None, layout: str = "chunks",
                 extra: list[str] | None = None) -> subprocess.Popen:
    """Start the simulator's live writer in its own process (like a microscope, it knows nothing of qcmon)."""
    cmd = [sys.executable, "-m", "qcmon", "simulate", str(out), "--scenario", scenario, "--live",
           "--layout", layout]
    cmd += ["--frames", str(int(round((seconds or 90.0) * 30.0))), "--rate", "30"]
    cmd += extra or []
    return subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


def wait_for(path: Path, proc: subprocess.Popen, timeout_s: float = 60.0) -> None:
    """Wait until the writer has created ``path`` (or failed)."""
    t0 = time.monotonic()
    while not path.exists():
        if proc.poll() is not None:
            err = proc.stderr.read().decode(errors="replace") if proc.stderr else ""
            raise RuntimeError(f"the simulator stopped before writing {path}: {err.strip()}")
        if time.monotonic() - t0 > timeout_s:
            raise RuntimeError(f"the simulator wrote no {path} within {timeout_s:.0f} s")
        time.sleep(0.05)


def run_demo(*, plain: bool, seconds: float | None = None, out: Path | None = None) -> int:
    keep = out is not None
    base = Path(out) if keep else Path(tempfile.mkdtemp(prefix="qcmon-demo-"))
    base.mkdir(parents=True, exist_ok=True)
    session = base / "session"
    writer = start_writer(session, seconds=seconds)
    try:
        wait_for(session / "zstack.tif", writer)
        (session / "frames").mkdir(parents=True, exist_ok=True)
        options = MonitorOptions(path=session / "frames", out_dir=base / "record", profile="default",
                                 zstack=session / "zstack.tif", follow=True,
                                 until_idle_s=4.0 if plain else None, resume=False)
        print(f"qcmon demo: the simulator writes into {session / 'frames'}; the record goes to {base / 'record'}",
              flush=True)
        code = run_watch(Monitor(options), plain=plain)
    finally:
        if writer.poll() is None:
            writer.terminate()
        writer.wait(timeout=10)
    if not keep:
        print(f"(demo files in {base}; delete them when done)")
    return code
