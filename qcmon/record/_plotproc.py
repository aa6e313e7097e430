"""Start-up of the report's plot processes (:class:`qcmon.record.report.PlotWorkers`).

Kept free of heavy imports: a spawned process imports this module before anything else of qcmon's, and should
lower its priority before it loads numpy and matplotlib (about 0.7 s of processor time), so that the frames being
measured by the main process keep their core.
"""

from __future__ import annotations

import os

#: Niceness of the plot processes (POSIX: 19 is the lowest priority, 0 the default).
NICENESS = 19


def start() -> None:
    """Lower this process's priority, then load what drawing a plot needs.

    At its end the process leaves at once, without tearing its modules down (0.1 s with matplotlib loaded, which
    the main process would wait for): it holds no file or resource, and its results are sent before it ends.
    """
    import atexit

    atexit.register(os._exit, 0)  # registered last, run first
    try:
        os.nice(NICENESS)
    except (AttributeError, OSError):  # no os.nice (Windows) or not permitted: stays at normal priority
        pass
    from qcmon.record.report import _load_matplotlib

    _load_matplotlib()
