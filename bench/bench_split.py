"""``qcmon summarize`` as a whole process, on one and on two processes, against the engine alone, in one run.

Writes a multi-page TIFF session (cells on neuropil at 1.5 photons/px with planted shifts, the frames of
``bench_engine.make_frames`` cycled), then prints frames per second of:
- the engine alone over the same frames held in memory (one core),
- ``qcmon summarize PATH`` (reading, measuring, the record, summary and report) with ``--workers 1`` and ``2``,
- two engine processes side by side, each over half the frames (the sum of their rates): what two processes of
  this machine give at that moment (the ceiling of any split: on a virtual machine whose two cores are shared,
  or busy with other work, it is well below 2),
and the ratios of their medians over interleaved rounds: summarize / engine (target ≥ 0.8), two / one process
(target ≥ 1.8 on two idle cores) and two engines / one. Consecutive identical runs of summarize differ by up to 15 % on this
machine; one run of each would say more about the moment than about qcmon.

With ``--costs`` it prints instead what the split's plan rests on (qcmon.monitor.split FAST_COST, FED_SAVING), per
frame of the growing reference's span, frames in memory, one core, best of interleaved rounds: measuring in full
(``Engine.process``), registering only (``Engine.register_only``) and measuring in full with the registrations given
(``Engine.give_registrations``), as ratios to the first.

No assertions: speed is read, never asserted. Run: ``python bench/bench_split.py [--size PX] [--frames N] [--costs]``.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import tifffile
from threadpoolctl import threadpool_limits

sys.path.insert(0, os.path.dirname(__file__))
from bench_engine import make_frames  # noqa: E402


def engine_fps(frames: np.ndarray, n: int) -> float:
    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    eng = Engine(EngineSettings(frame_rate_hz=30.0, bit_depth=12))
    with threadpool_limits(1):
        t0 = time.perf_counter()
        for i in range(n):
            eng.process(Frame(frames[i % len(frames)], i))
        eng.flush()
        return n / (time.perf_counter() - t0)


def costs(frames: np.ndarray, rounds: int) -> None:
    """Per frame: full, register only, full with registrations given (see the module notes)."""
    import pickle

    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    n = 900
    settings = EngineSettings(frame_rate_hz=30.0, bit_depth=12, reference_updates=(60, 120, 240, 480, 960))
    with threadpool_limits(1):
        eng = Engine(settings)
        at = next(i + 1 for i in range(len(frames)) if eng.process(Frame(frames[i], i)))
        blob = pickle.dumps(eng)
        t: dict[str, list[float]] = {"full": [], "register": [], "given": []}
        for _ in range(rounds):
            full = pickle.loads(blob)
            t0 = time.perf_counter()
            for j in range(at, at + n):
                full.process(Frame(frames[j % len(frames)], j))
            t["full"].append(time.perf_counter() - t0)
            reg = pickle.loads(blob)
            regs = []
            t0 = time.perf_counter()
            for j in range(at, at + n):
                regs.append((j, 0, 0, reg.register_only(Frame(frames[j % len(frames)], j))))
            t["register"].append(time.perf_counter() - t0)
            fed = pickle.loads(blob)
            fed.give_registrations(regs)
            t0 = time.perf_counter()
            for j in range(at, at + n):
                fed.process(Frame(frames[j % len(frames)], j))
            t["given"].append(time.perf_counter() - t0)
            if fed.split_digest() != full.split_digest():
                raise SystemExit("the registrations given did not reproduce the engine's state")
    f, r, g = (min(t[k]) / n * 1e3 for k in ("full", "register", "given"))
    print(f"{frames.shape[1]}² uint16, frames {at}-{at + n - 1} while the reference grows, best of {rounds} rounds")
    print(f"  measured in full                        {f:6.2f} ms/frame")
    print(f"  registered only (a worker)              {r:6.2f} ms/frame  {r / f:5.2f}× (FAST_COST)")
    print(f"  in full, registrations given (monitor)  {g:6.2f} ms/frame  {g / f:5.2f}× (1 - FED_SAVING)")


def pair_fps(frames: np.ndarray, n: int) -> float:
    """Two engine processes at once, each over ``n // 2`` frames: the sum of their rates."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(2, mp_context=multiprocessing.get_context("spawn")) as pool:
        list(pool.map(engine_fps, [frames[:2], frames[:2]], [1, 1]))  # processes started and qcmon imported first
        return sum(pool.map(engine_fps, [frames, frames], [n // 2, n // 2]))


def warm(path: Path) -> None:
    """Read the file once, so that it is in the page cache (some virtual machines page out idle file pages within
    seconds: warmed right before each timed run, the reads measure qcmon, not the disk)."""
    with open(path, "rb") as f:
        while f.read(1 << 24):
            pass


def summarize_fps(path: Path, out: Path, workers: int, n: int) -> float:
    warm(path)
    exe = Path(sys.executable).with_name("qcmon")
    t0 = time.perf_counter()
    subprocess.run([str(exe), "summarize", str(path), "--out", str(out), "--frame-rate", "30", "--bit-depth", "12",
                    "--workers", str(workers), "--restart"], check=True, stdout=subprocess.DEVNULL)
    return n / (time.perf_counter() - t0)


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--size", type=int, default=512)
    p.add_argument("--frames", type=int, default=4000)
    p.add_argument("--rounds", type=int, default=3, help="interleaved rounds of the three measurements")
    p.add_argument("--costs", action="store_true", help="the per-frame costs the split's plan rests on")
    args = p.parse_args()
    distinct, _ = make_frames(args.size, 200)
    if args.costs:
        costs(distinct, args.rounds)
        return
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "session" / "run.tif"
        path.parent.mkdir()
        with tifffile.TiffWriter(path, bigtiff=True) as tw:
            for i in range(args.frames):
                tw.write(distinct[i % len(distinct)], contiguous=True)
        # written to disk before anything is timed (the kernel's write-back would otherwise slow the first
        # measurement); summarize_fps warms the page cache before each run
        os.sync()
        eng, one, two, pair = [], [], [], []
        for r in range(args.rounds):  # interleaved, so that a slow spell of the machine hits all alike
            eng.append(engine_fps(distinct, args.frames))
            pair.append(pair_fps(distinct, args.frames))
            one.append(summarize_fps(path, Path(tmp) / f"out1_{r}", 1, args.frames))
            two.append(summarize_fps(path, Path(tmp) / f"out2_{r}", 2, args.frames))
    e, o, t, q = (float(np.median(x)) for x in (eng, one, two, pair))
    spread = [b / a for a, b in zip(eng, one)]
    print(f"{args.size}² uint16, {args.frames} frames, {os.cpu_count()} cores, "
          f"median of {args.rounds} interleaved rounds")
    print(f"  engine alone (frames in memory, one core)   {e:8.1f} frames/s   (rounds: {_fmt(eng)})")
    print(f"  qcmon summarize --workers 1                 {o:8.1f} frames/s   {o / e:5.2f}× the engine "
          f"(rounds: {_fmt(one)}; per round {min(spread):.2f}–{max(spread):.2f}×)")
    print(f"  two engines side by side (the ceiling)      {q:8.1f} frames/s   {q / e:5.2f}× one engine "
          f"(rounds: {_fmt(pair)})")
    print(f"  qcmon summarize --workers 2                 {t:8.1f} frames/s   {t / o:5.2f}× one process "
          f"(rounds: {_fmt(two)}; per round {min(b / a for a, b in zip(one, two)):.2f}–"
          f"{max(b / a for a, b in zip(one, two)):.2f}×)")


def _fmt(values) -> str:
    return ", ".join(f"{v:.0f}" for v in values)


if __name__ == "__main__":
    main()
