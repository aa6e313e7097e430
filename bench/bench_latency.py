"""Latency from a page being written to its row in the record, while a writer runs at 30 Hz and 60 Hz (512², one
channel). A writer thread puts one TIFF per frame into a folder (written to a temporary name, then renamed, as
acquisition programs do) at the real frame rate; ``Monitor`` watches the folder in this process; the listener
notes when each row arrives. Prints median and 99th percentile latency and whether a backlog grew.
No assertions. Run: ``python bench/bench_latency.py [--seconds S]``.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import tifffile

sys.path.insert(0, str(Path(__file__).parent))
from bench_engine import make_frames  # noqa: E402


class Clock:
    def __init__(self):
        self.written: dict[int, float] = {}
        self.arrived: dict[int, float] = {}

    def on_rows(self, rows):
        now = time.monotonic()
        for r in rows:
            self.arrived[int(r["frame"])] = now

    def on_event(self, ev):
        pass

    def on_status(self, st):
        pass


def writer(folder: Path, frames: np.ndarray, rate: float, clock: Clock, n: int) -> None:
    t0 = time.monotonic()
    for i in range(n):
        due = t0 + i / rate
        delay = due - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        tmp = folder / f".run_{i:06d}.tif.part"
        tifffile.imwrite(tmp, frames[i % len(frames)])
        os.replace(tmp, folder / f"run_{i:06d}.tif")
        clock.written[i] = time.monotonic()


def run(rate: float, seconds: float, frames: np.ndarray) -> None:
    from qcmon.monitor.loop import Monitor, MonitorOptions

    n = int(rate * seconds)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "frames"
        folder.mkdir()
        clock = Clock()
        mon = Monitor(MonitorOptions(path=folder, out_dir=Path(tmp) / "rec", follow=True,
                                     frame_rate_hz=rate, resume=False))
        m = threading.Thread(target=mon.run, args=(clock,))
        m.start()
        writer(folder, frames, rate, clock, n)
        t_end = time.monotonic()
        while len(clock.arrived) < n - 30 and time.monotonic() - t_end < 60:  # let it catch up, then stop
            time.sleep(0.1)
        mon.stop()
        m.join()
    # the first 30 frames are held back for the reference, and the frames written while it is built queue up:
    # that start-up is reported on its own; the steady latency is measured from the first row on time
    idx = [i for i in range(n) if i in clock.arrived]
    lat_all = np.array([clock.arrived[i] - clock.written[i] for i in idx])
    on_time = [k for k, i in enumerate(idx) if i >= 30 and lat_all[k] < 0.3]
    start = on_time[0] if on_time else len(idx)
    lat = lat_all[start:]
    catch_up = clock.arrived[idx[start]] - clock.written[0] if on_time else float("nan")
    late_half = lat[len(lat) // 2:]
    first_half = lat[: len(lat) // 2]
    grow = np.median(late_half) - np.median(first_half) if lat.size > 1 else float("nan")
    print(f"{rate:>4.0f} Hz, 512², {n} frames: start-up (reference, then catching up) {catch_up:.1f} s; after it, "
          f"latency median {1e3 * np.median(lat):.0f} ms, 99th percentile {1e3 * np.percentile(lat, 99):.0f} ms, "
          f"max {1e3 * lat.max():.0f} ms; second half minus first half {1e3 * grow:+.0f} ms "
          f"({'backlog grows' if grow > 0.1 else 'no growing backlog'}); rows {len(clock.arrived)}/{n}")


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args()
    seconds = 6.0 if args.quick else args.seconds
    frames, _ = make_frames(512, 60)
    for rate in (30.0, 60.0):
        run(rate, seconds, frames)
    return 0


if __name__ == "__main__":
    sys.exit(main())
