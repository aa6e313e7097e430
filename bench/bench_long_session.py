"""Long sessions: memory of the engine and the record does not grow with the number of frames.

Small Poisson frames (a fixed random field of cells, shifted by whole pixels, plus shot noise) are generated on
the fly and driven through :class:`qcmon.engine.Engine` and :class:`qcmon.record.journal.SessionRecord`, as the monitor
does. The resident memory (psutil RSS) and the process's peak (``ru_maxrss``) are printed at 10⁴, 10⁵ and 10⁶
frames (and 3×10⁴, 3×10⁵), with the throughput, and at the end the record is closed, reopened and appended to (``traces.csv`` stays
appendable). Figures only, no assertion.

Run: ``python bench/bench_long_session.py [--frames 1000000] [--size 32]``.
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from pathlib import Path

import numpy as np
import psutil
from threadpoolctl import threadpool_limits

from qcmon.engine import Engine, EngineSettings
from qcmon.frames import Frame
from qcmon.record.journal import SessionRecord, read_traces

CHECKPOINTS = (10_000, 30_000, 100_000, 300_000, 1_000_000)


def _field(size: int, rng: np.random.Generator) -> np.ndarray:
    """Mean photon counts of a field of Gaussian cells on a dim background (photons/px)."""
    yy, xx = np.mgrid[:size, :size]
    field = np.full((size, size), 2.0)
    for cy, cx in rng.uniform(0, size, (max(4, size // 4), 2)):
        field += 20.0 * np.exp(-((yy - cy) ** 2 + (xx - cx) ** 2) / (2 * 1.5**2))
    return field


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=CHECKPOINTS[-1], help="frames in the session (default 10⁶)")
    ap.add_argument("--size", type=int, default=32, help="frame size, px (default 32)")
    args = ap.parse_args(argv)
    rng = np.random.default_rng(0)
    field = _field(args.size, rng)
    gain, dark = 16.0, 100.0  # DN per photon and offset (DN), as the simulator's defaults are in spirit
    proc = psutil.Process()
    checkpoints = [c for c in CHECKPOINTS if c <= args.frames] or [args.frames]
    if checkpoints[-1] != args.frames:
        checkpoints.append(args.frames)
    with tempfile.TemporaryDirectory() as tmp, threadpool_limits(limits=1, user_api="blas"):
        out = Path(tmp) / "record"
        engine = Engine(EngineSettings(frame_rate_hz=30.0, pixel_size_um=1.0))
        record = SessionRecord(out)
        rows = 0
        t0 = time.perf_counter()
        start_rss = proc.memory_info().rss
        print(f"long session: {args.frames} frames of {args.size}×{args.size} px, engine + record")
        print(f"{'frames':>9} {'rows':>9} {'RSS MiB':>9} {'peak MiB':>9} {'traces MiB':>10} {'frames/s':>9}")
        shifts = rng.integers(-2, 3, (1024, 2))
        for i in range(args.frames):
            dy, dx = shifts[i % 1024]
            photons = rng.poisson(np.roll(field, (int(dy), int(dx)), axis=(0, 1)))
            data = np.minimum(photons * gain + dark, 4095).astype(np.uint16)
            out_rows = engine.process(Frame(data, i))
            if out_rows:
                record.append_rows(out_rows)
                rows += len(out_rows)
            record.maybe_flush()
            if i + 1 in checkpoints:
                if i + 1 == args.frames:
                    tail = engine.flush()
                    record.append_rows(tail)
                    rows += len(tail)
                    record.flush()
                el = time.perf_counter() - t0
                rss = proc.memory_info().rss / 2**20
                peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
                size = (out / "traces.csv").stat().st_size / 2**20
                print(f"{i + 1:>9} {rows:>9} {rss:>9.1f} {peak:>9.1f} {size:>10.1f} {(i + 1) / el:>9.0f}", flush=True)
        record.close()
        print(f"RSS growth from the start: {(proc.memory_info().rss - start_rss) / 2**20:.1f} MiB "
              f"(the first checkpoint includes the reference build and imports)")
        # the record stays appendable: reopen (resume) and add one row after the last
        again = SessionRecord(out, resume=True)
        last = again.last_frames()
        again.append_rows([{"frame": last[(0, 0)] + 1, "channel": 0, "plane": 0, "time_s": (last[(0, 0)] + 1) / 30.0,
                            "source": "", "page": -1}])
        again.close()
        tr = read_traces(out / "traces.csv", columns=["frame"])
        print(f"reopened and appended: {len(tr['frame'])} rows, last frame {int(tr['frame'][-1])} "
              f"(was {last[(0, 0)]}); frames 0..N-1 without gaps: "
              f"{bool(np.array_equal(tr['frame'], np.arange(len(tr['frame']))))}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
