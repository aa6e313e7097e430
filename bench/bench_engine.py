"""Frames per second of qcmon's whole metric set against the loop a scientist would write with scikit-image.

Prints, for 256², 512² and 1024² uint16 frames on one core:
- qcmon's ``Engine`` (every metric of traces.csv, z against a stack included),
- the reference loop: ``skimage.registration.phase_cross_correlation(upsample_factor=20)`` plus numpy statistics
  (mean, saturated and zero fractions) and ``skimage.restoration.estimate_sigma``,
- the ratio of the two and both RMS displacement errors against the planted shifts,
- the rate of two engine processes side by side, one per core, against one alone (two cores),
- the cost of the growing registration reference: 1,200 frames at 512² with and without it, interleaved,
- peak memory of the engine after 10,000 and 100,000 frames (the frames cycle; memory must not grow).

No assertions: speed is printed, never tested.  Run: ``python bench/bench_engine.py [--quick]``.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np
from scipy import ndimage
from threadpoolctl import threadpool_limits


def make_frames(size: int, n: int, *, photons: float = 1.5, seed: int = 0):
    """Cells on neuropil, cropped from a larger field after a subpixel Fourier shift (non-periodic edges)."""
    rng = np.random.default_rng(seed)
    big = size + 64
    field = ndimage.gaussian_filter(rng.random((big, big)), 3.0)
    field = (field - field.min()) / np.ptp(field)
    cells = np.zeros((big, big))
    idx = rng.integers(0, big, size=(big * big // 400, 2))
    cells[idx[:, 0], idx[:, 1]] = 1.0
    cells = ndimage.gaussian_filter(cells, 4.0)
    cells /= cells.max()
    scene = 0.4 + 0.6 * field + 4.0 * cells
    scene *= photons / scene.mean()
    spec = np.fft.fft2(scene)
    shifts = rng.uniform(-8, 8, size=(n, 2))
    frames = np.empty((n, size, size), np.uint16)
    for i, (dy, dx) in enumerate(shifts):
        moved = np.fft.ifft2(ndimage.fourier_shift(spec, (dy, dx))).real
        lam = np.clip(moved[32:32 + size, 32:32 + size], 0, None)
        frames[i] = np.clip(rng.poisson(lam) * 30.0 + 100 + rng.normal(0, 8, lam.shape), 0, 4095)
    return frames, shifts


def run_engine(frames, *, repeat: int = 1, zstack=None, keep_rows: bool = True, updates=None):
    """Returns (seconds of steady measuring, rows, seconds of start-up). Start-up = building the reference from
    the first frames and measuring them; steady = every frame after that."""
    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    settings = EngineSettings(frame_rate_hz=30.0, zstack=zstack, bit_depth=12,
                              z_step_um=1.0 if zstack is not None else None)
    if updates is not None:
        settings.reference_updates = tuple(updates)
    eng = Engine(settings)
    rows = []
    t0 = time.perf_counter()
    i = 0
    t_steady = None
    for _ in range(repeat):
        for f in frames:
            got = eng.process(Frame(f, i))
            if keep_rows:
                rows.extend(got)
            i += 1
            if i == settings.reference_frames:
                t_steady = time.perf_counter()
    rows.extend(eng.flush())
    end = time.perf_counter()
    return end - t_steady, rows, t_steady - t0


def run_skimage(frames):
    from skimage.registration import phase_cross_correlation
    from skimage.restoration import estimate_sigma

    ref = frames[:30].astype(np.float32).mean(axis=0)
    out = []
    t0 = time.perf_counter()
    for f in frames:
        img = f.astype(np.float32)
        shift, _, _ = phase_cross_correlation(ref, img, upsample_factor=20)
        mean = img.mean()
        sat = np.count_nonzero(f >= 4095) / f.size
        low = np.count_nonzero(f == 0) / f.size
        sigma = estimate_sigma(img)
        out.append((-shift[0], -shift[1], mean, sat, low, sigma))
    return time.perf_counter() - t0, np.array(out)


def rms_error(measured_dy, measured_dx, truth):
    e = np.stack([measured_dy, measured_dx], axis=1) - truth
    e -= np.median(e, axis=0)
    return float(np.sqrt(np.mean(e ** 2)))


def _steady(args):
    """Steady-state rate of one engine over ``repeat`` passes of ``frames``, pinned to ``cpu`` where possible."""
    frames, repeat, cpu = args
    if cpu is not None and hasattr(os, "sched_setaffinity"):
        os.sched_setaffinity(0, {cpu})
    with threadpool_limits(limits=1):
        dt, _, _ = run_engine(frames, repeat=repeat, keep_rows=False)
    return (repeat * len(frames) - 30) / dt


def peak_rss_mb() -> float:
    import psutil

    return psutil.Process().memory_info().rss / 2 ** 20


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="fewer frames (a smoke run)")
    args = ap.parse_args()
    n = 120 if args.quick else 400
    print(f"qcmon engine benchmark — {os.cpu_count()} cores, one BLAS thread, {n} frames per size, 1.5 photons/px")
    print(f"{'size':>6} {'qcmon fps':>10} {'skimage fps':>12} {'ratio':>6} {'qcmon RMS px':>13} {'skimage RMS px':>15}")
    with threadpool_limits(limits=1):
        for size in (256, 512, 1024):
            frames, truth = make_frames(size, n if size < 1024 else n // 2)
            run_engine(frames[:40])  # warm caches and imports
            dt_q, rows, startup = run_engine(frames)
            dy = np.array([r["dy_px"] for r in rows])
            dx = np.array([r["dx_px"] for r in rows])
            dt_s, sk = run_skimage(frames)
            fq, fs = (len(frames) - 30) / dt_q, len(frames) / dt_s
            print(f"{size:>5}² {fq:>10.0f} {fs:>12.1f} {fq / fs:>6.1f} {rms_error(dy, dx, truth):>13.3f} "
                  f"{rms_error(sk[:, 0], sk[:, 1], truth):>15.3f}   (start-up {startup:.1f} s)")
            if size == 512:
                frames512 = frames

    # two cores: one engine process, then two side by side, each pinned to its own core and measuring the same
    # 1,200 frames (steady state: long enough that the start-up and the machine's moment-to-moment noise weigh little)
    cores = sorted(os.sched_getaffinity(0))[:2] if hasattr(os, "sched_getaffinity") else [None, None]
    with ProcessPoolExecutor(max_workers=1) as pool:
        one = pool.submit(_steady, (frames512, 3, cores[0])).result()
    with ProcessPoolExecutor(max_workers=2) as pool:
        two = list(pool.map(_steady, [(frames512, 3, c) for c in cores]))
    print(f"512², two processes: {two[0]:.0f} + {two[1]:.0f} = {sum(two):.0f} frames/s; {sum(two) / one:.2f}× one "
          f"process ({one:.0f} frames/s on the same frames)")

    # the growing registration reference (updates at 60 … 960 within these 1,200 frames) against the first
    # reference kept, the same frames, interleaved (the machine's speed drifts; medians of 3 each)
    times = {"growing": [], "fixed": []}
    with threadpool_limits(limits=1):
        for _ in range(3):
            for name, upd in (("fixed", ()), ("growing", None)):
                dt, _, startup = run_engine(frames512, repeat=3, keep_rows=False, updates=upd)
                times[name].append((3 * len(frames512) - 30) / dt)
    g, f = float(np.median(times["growing"])), float(np.median(times["fixed"]))
    print(f"512², 1,200 frames: growing reference {g:.0f} frames/s, first reference kept {f:.0f} frames/s "
          f"({g / f:.2f}×; updates and accumulation included)")

    # memory does not grow with the session (frames cycle through the engine)
    small, _ = make_frames(128, 100, seed=1)
    for total in ((2_000, 20_000) if args.quick else (10_000, 100_000)):
        base = peak_rss_mb()
        dt, _, _ = run_engine(small, repeat=total // len(small), keep_rows=False)
        print(f"{total:>7} frames of 128²: {total / dt:.0f} frames/s, RSS {peak_rss_mb():.0f} MiB "
              f"(was {base:.0f} MiB before)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
