"""Start-up of the report's plot processes (:class:`qcmon.record.report.PlotWorkers`), and the drawing they load
ahead (:func:`load_matplotlib`, :func:`figure_png`, also used by the report in its own process).

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
    load_matplotlib()


def load_matplotlib() -> None:
    """Load what a plot needs ahead of the plots: the modules, and (by drawing a small figure) the font, the text
    layout caches and the PNG encoder, which the first plot of a process would otherwise load."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=(2, 1))
    ax = fig.add_subplot()
    ax.plot([0.0, 1.0], [0.0, 1.0], label="µm")
    ax.set_xlabel("time (s)")
    ax.legend(fontsize=7)
    figure_png(fig)


def figure_png(fig) -> str:
    """``fig`` (a matplotlib Figure) as base64 PNG text, drawn by the Agg backend."""
    import base64
    import io

    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90)
    return base64.b64encode(buf.getvalue()).decode("ascii")
