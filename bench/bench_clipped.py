"""Frames per second of the engine on frames with clipped pixels, against the same frames without them, in one run.

Run: ``python bench/bench_clipped.py [--quick] [--size N]``. The frames are ``bench_engine.make_frames`` (cells on
neuropil, 1.5 photons/px, 12 bits, shifts up to ±8 px) at 512² by default; the clipped set is the same frames with a
stationary patch at the 12-bit ceiling over 12.2 % of the field (rows 80-240, columns 200-400 of 512², scaled to
the size), which makes every frame take the masked path (mask, masked noise and mean, masked registration with
its likelihood refinement) — once from frame 30 on (the reference is clean), once from the first frame (the
reference has the patch too: the likelihood also leaves out the pixels meeting it). Each set has its own
``Engine``; they are given their frames in turn, frame by frame, on one core with one BLAS thread, so that the
machine's changing load falls on all alike, and each frame's time is the processor time of this thread
(``time.thread_time``: time spent waiting for a core shared with other work does not count). Printed: the median time per steady frame of each set and its ratio
(frames/s) to the clean set's.
No assertions: speed is printed, never tested.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_engine import make_frames  # noqa: E402


def patched(frames: np.ndarray, start: int = 0) -> np.ndarray:
    out = frames.copy()
    k = frames.shape[1] / 512
    out[start:, int(80 * k):int(240 * k), int(200 * k):int(400 * k)] = 4095
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer frames and runs")
    parser.add_argument("--size", type=int, default=512, help="frame side, px (default 512)")
    parser.add_argument("--frames", type=int, default=None, help="frames per run (default 400, 150 with --quick)")
    parser.add_argument("--runs", type=int, default=None, help="runs of each set (default 5, 2 with --quick)")
    args = parser.parse_args()
    n = args.frames or (150 if args.quick else 400)
    runs = args.runs or (2 if args.quick else 5)
    try:
        os.sched_setaffinity(0, {sorted(os.sched_getaffinity(0))[0]})
    except (AttributeError, OSError):
        pass
    try:
        from threadpoolctl import threadpool_limits
        limit = threadpool_limits(1)
    except ImportError:
        limit = None
    clean, _ = make_frames(args.size, n, seed=3)
    sets = {"clean": clean, "patch after the reference": patched(clean, 30),
            "patch from the first frame": patched(clean)}
    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    times: dict[str, list[float]] = {name: [] for name in sets}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        for _ in range(runs):
            engines = {name: Engine(EngineSettings(frame_rate_hz=30.0, bit_depth=12)) for name in sets}
            # frame by frame, each set's engine in turn: the machine's load drifts alike for all of them
            for i in range(n):
                for name, frames in sets.items():
                    t0 = time.thread_time()
                    engines[name].process(Frame(frames[i], i))
                    if i >= 40:  # the reference is built and the running means are full
                        times[name].append(time.thread_time() - t0)
    c = float(np.median(times["clean"]))
    print(f"{args.size}² uint16, {n} frames × {runs} runs, frame by frame in turn on one core (median time per "
          "frame; a saturated patch over 12 % of the field):")
    for name, v in times.items():
        m = float(np.median(v))
        print(f"  {name:>28}: {m * 1e3:6.2f} ms = {1 / m:5.0f} frames/s, ratio to clean {c / m:.2f}")
    del limit
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
