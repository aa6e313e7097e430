"""Run a watch on a screen: the dashboard, or plain lines with commands read from standard input; the first
Ctrl-C, SIGTERM or SIGHUP ends the watch cleanly. Used by ``qcmon watch`` (:mod:`qcmon.cli`) and ``qcmon demo``
(:mod:`qcmon.demo`)."""

from __future__ import annotations

import sys
import threading

from qcmon import __version__
from qcmon.arguments import EXIT_OK
from qcmon.errors import display_path
from qcmon.frames import RATE_UNKNOWN
from qcmon.ui.signals import stop_on_signals


def read_commands(monitor, stream) -> None:
    """Plain mode: lines on standard input are commands ("r" new reference, "n TEXT" note, "q" end)."""
    for line in stream:
        line = line.strip()
        if not line:
            continue
        word, _, rest = line.partition(" ")
        if word in ("r", "ref", "reference"):
            monitor.new_reference()
        elif word in ("n", "note") and rest:
            monitor.add_note(rest)
        elif word in ("q", "quit"):
            monitor.stop()
            return


def run_watch(monitor, *, plain: bool) -> int:
    if not plain:
        from qcmon.ui.dashboard.app import run_dashboard

        return run_dashboard(monitor)  # with its own stop_on_signals, which also leaves the dashboard
    stop_on_signals(monitor)
    from qcmon.ui.console import PlainConsole

    console = PlainConsole()
    print(f"qcmon {__version__}: watching {display_path(monitor.path)} → record in {display_path(monitor.out_dir)} "
          f"(profile {monitor.profile.name})", flush=True)
    if monitor.profile.caution:
        print(f"caution: {monitor.profile.caution}", flush=True)
    if sys.stdin is not None and sys.stdin.isatty():
        print("commands: r = new reference, n TEXT = add a note, q = end the watch", flush=True)
        threading.Thread(target=read_commands, args=(monitor, sys.stdin), daemon=True).start()
    paths = monitor.run(console)
    if "frame_rate_hz" not in monitor.facts.facts and not monitor.timed:
        print(f"qcmon: {RATE_UNKNOWN}: times, durations and per-minute values (bleaching) are blank", flush=True)
    if "earlier" in paths:
        print(f"earlier record moved to {display_path(paths['earlier'])}", flush=True)
    print(f"verdict: {paths['verdict']}\nsummary: {display_path(paths['summary'])}\nreport:  {display_path(paths['report'])}", flush=True)
    return EXIT_OK
