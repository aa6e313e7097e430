"""Audit throughput against the engine on the same frames, in the same run.

Run: ``python bench/bench_audit.py [--sessions N] [--frames N] [--size PX]``. Simulates an archive, then prints
frames per second of: the engine alone (frames already in memory, one process), ``qcmon audit`` with 1 and with 2
local worker processes (reading, measuring, records, reports, outputs), and a re-run that reuses every record;
and the ratios between them. No assertions: speed is read, never asserted.
"""

from __future__ import annotations

import argparse
import math
import os
import tempfile
import time
from pathlib import Path

import numpy as np
import tifffile

from qcmon.audit import AuditOptions, discover_sessions, run_audit
from qcmon.engine import Engine, EngineSettings
from qcmon.frames import Frame
from qcmon.monitor.loop import read_zstack
from qcmon.simulate import SimConfig
from qcmon.simulate._write import write_session


def make_archive(root: Path, sessions: int, frames: int, size: int) -> None:
    for i in range(sessions):
        write_session(SimConfig(n_frames=frames, height=size, width=size, seed=100 + i, frame_rate_hz=30.0,
                                bleach_tau_min=(math.inf,)), root / f"m{i // 2}" / f"2026-11-{1 + i:02d}")


def engine_fps(root: Path) -> tuple[float, int]:
    """Frames per second of :class:`qcmon.engine.Engine` alone, over frames read beforehand."""
    total_s, total = 0.0, 0
    for e in discover_sessions([root]):
        pages = np.concatenate([tifffile.imread(f).reshape(-1, *tifffile.imread(f).shape[-2:])
                                for f in e.frame_files])
        stack, z_step = read_zstack(e.zstack)
        frames = [Frame(data=p, index=i, time_s=i / 30.0) for i, p in enumerate(pages)]
        t0 = time.perf_counter()
        eng = Engine(EngineSettings(frame_rate_hz=30.0, pixel_size_um=1.0, bit_depth=12, dark_level=None,
                                    zstack=stack, z_step_um=z_step, motion_channel=None))
        for fr in frames:
            eng.process(fr)
        eng.flush()
        total_s += time.perf_counter() - t0
        total += len(frames)
    return total / total_s, total


def audit_fps(root: Path, out: Path, workers: int) -> tuple[float, dict]:
    t0 = time.perf_counter()
    res = run_audit(AuditOptions(roots=[root], out_dir=out, workers=workers), progress=False)
    dt = time.perf_counter() - t0
    frames = sum(int(r["frames"] or 0) for r in res["rows"])
    return frames / dt, res


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sessions", type=int, default=6)
    p.add_argument("--frames", type=int, default=300)
    p.add_argument("--size", type=int, default=128)
    a = p.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "lab"
        t0 = time.perf_counter()
        make_archive(root, a.sessions, a.frames, a.size)
        print(f"archive: {a.sessions} sessions × {a.frames} frames of {a.size}×{a.size} px "
              f"(simulated in {time.perf_counter() - t0:.1f} s); {os.cpu_count()} cores")
        eng, n = engine_fps(root)
        print(f"engine alone (frames in memory, 1 process): {eng:8.1f} frames/s over {n} frames")
        fps1, r1 = audit_fps(root, Path(tmp) / "out1", 1)
        print(f"audit, 1 worker:                            {fps1:8.1f} frames/s  ({r1['measured']} measured)")
        fps2, r2 = audit_fps(root, Path(tmp) / "out2", 2)
        print(f"audit, 2 workers:                           {fps2:8.1f} frames/s  ({r2['measured']} measured)")
        fpsr, rr = audit_fps(root, Path(tmp) / "out2", 2)
        print(f"audit re-run (records reused):              {fpsr:8.1f} frames/s  ({rr['reused']} reused)")
        print(f"ratio audit 1 worker / engine alone:  {fps1 / eng:.2f}")
        print(f"ratio audit 2 workers / 1 worker:     {fps2 / fps1:.2f}")
        print(f"ratio re-run / first run (2 workers): {fpsr / fps2:.1f}")


if __name__ == "__main__":
    main()
