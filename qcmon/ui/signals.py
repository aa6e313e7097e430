"""Signals that end a watch cleanly: Ctrl-C, SIGTERM, and SIGHUP (the terminal closed). Used by the plain watch
(:mod:`qcmon.ui.watch`) and the dashboard (:mod:`qcmon.ui.dashboard.app`)."""

from __future__ import annotations

import os
import signal
import sys
import threading

__all__ = ["stop_on_signals"]


def stop_on_signals(monitor, *, also=None) -> None:
    """First Ctrl-C, SIGTERM or SIGHUP (the terminal closed, e.g. a dropped remote login) ends the watch cleanly
    (the summary is written); a second Ctrl-C aborts without writing the summary, report, exclude list and
    reference image (``Monitor.abort``). ``also``: called first on each clean end (the dashboard leaves then)."""
    hits = {"n": 0}
    sighup = getattr(signal, "SIGHUP", None)

    def handler(signum, frame):
        hits["n"] += 1
        if hits["n"] > 1 and signum == signal.SIGINT:
            monitor.abort()
            raise KeyboardInterrupt
        if sighup is not None and signum == sighup:
            # the terminal is gone: what the screens still write (the dashboard restoring the terminal as it
            # leaves, these lines) goes nowhere instead of failing or blocking the way out
            devnull = os.open(os.devnull, os.O_RDWR)
            for fd in (0, 1, 2):
                try:
                    os.dup2(devnull, fd)
                except OSError:
                    pass
        if also is not None:
            also()
        try:
            print("\nqcmon: ending the watch, writing the summary…", file=sys.stderr, flush=True)
        except OSError:  # the terminal is gone
            pass
        monitor.stop()

    if threading.current_thread() is threading.main_thread():
        for name in ("SIGINT", "SIGTERM", "SIGHUP"):
            if hasattr(signal, name):
                signal.signal(getattr(signal, name), handler)
