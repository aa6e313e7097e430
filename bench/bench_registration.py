"""Frames per second of ShiftEstimator against a scikit-image phase_cross_correlation loop, on one core.

Run: ``python bench/bench_registration.py [--frames N]``. Prints, for uint16 frames of 256², 512² and 1024² px
(1.5 photons/px, shifts up to ±20 px, non-periodic edges), the frame rate and RMS shift error of both methods
and their ratio, plus the cost of a float32 rfft2+irfft2 pair at the FFT size qcmon uses. No assertions.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import time  # noqa: E402
from contextlib import nullcontext  # noqa: E402

import numpy as np  # noqa: E402
import scipy.fft as sfft  # noqa: E402
from scipy import ndimage  # noqa: E402
from skimage.registration import phase_cross_correlation  # noqa: E402

from qcmon.metrics.registration import ShiftEstimator  # noqa: E402

try:
    from threadpoolctl import threadpool_limits
except ImportError:  # environment variables above already hold BLAS/OpenMP to one thread
    threadpool_limits = None


def make_field(shape, rng, cell_diam):
    """Periodic field, mean 1: smooth dim neuropil plus bright ring-shaped cells."""
    m, n = shape
    neuropil = ndimage.gaussian_filter(rng.standard_normal(shape), 6, mode="wrap")
    field = np.clip(0.3 + 0.15 * neuropil / neuropil.std(), 0.02, None)
    r = cell_diam / 2
    yy, xx = np.mgrid[-int(2 * r):int(2 * r) + 1, -int(2 * r):int(2 * r) + 1]
    ring = np.exp(-(((np.hypot(yy, xx) - 0.7 * r) / (0.35 * r)) ** 2))
    centres = np.zeros(shape)
    count = int(0.33 * m * n / cell_diam ** 2)
    np.add.at(centres, (rng.integers(0, m, count), rng.integers(0, n, count)), rng.uniform(1, 4, count))
    field = field + np.real(np.fft.ifft2(np.fft.fft2(centres) * np.fft.fft2(ring, s=shape)))
    return field / field.mean()


def frames_for(size, count, rng):
    pad = 32
    field = make_field((size + 2 * pad, size + 2 * pad), rng, 12.0 * size / 512)
    spec = np.fft.fft2(field)
    crop = (slice(pad, pad + size), slice(pad, pad + size))
    reference = np.fft.ifft2(spec).real[crop].astype(np.float32)
    shifts = rng.uniform(-20, 20, (count, 2))
    frames = []
    for d in shifts:
        img = np.fft.ifft2(ndimage.fourier_shift(spec, d)).real[crop]
        frames.append((rng.poisson(np.clip(img, 0, None) * 1.5) * 8 + 100).astype(np.uint16))
    return reference, frames, shifts


def run(fn, frames, repeats=3):
    out = [fn(f) for f in frames]  # warm-up and results
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        for f in frames:
            fn(f)
        best = min(best, time.perf_counter() - t0)
    return len(frames) / best, np.asarray(out)


def fft_pair_ms(n, reps=200):
    a = np.random.default_rng(0).random((n, n), dtype=np.float32)
    t0 = time.perf_counter()
    for _ in range(reps):
        sfft.irfft2(sfft.rfft2(a, workers=1), s=a.shape, workers=1)
    return (time.perf_counter() - t0) / reps * 1e3


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=40, help="frames per size (default 40)")
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    limit = threadpool_limits(1) if threadpool_limits is not None else nullcontext()
    with limit:
        print(f"float32 rfft2+irfft2 pair: 256² {fft_pair_ms(256):.2f} ms, 512² {fft_pair_ms(512):.2f} ms")
        print(f"{'size':>6} {'qcmon fps':>10} {'skimage fps':>12} {'ratio':>7} {'qcmon ms':>9} "
              f"{'qcmon RMS px':>13} {'skimage RMS px':>15}")
        for size in (256, 512, 1024):
            count = args.frames if size < 1024 else max(5, args.frames // 2)
            reference, frames, truth = frames_for(size, count, rng)
            est = ShiftEstimator(reference, upsample=20)
            fps_q, res_q = run(lambda f: est.estimate(f)[:2], frames)
            fps_s, res_s = run(lambda f: phase_cross_correlation(reference, f.astype(np.float32),
                                                                 upsample_factor=20)[0], frames, repeats=1)
            rms_q = float(np.sqrt(np.mean((res_q - truth) ** 2)))
            rms_s = float(np.sqrt(np.mean((-res_s - truth) ** 2)))  # skimage's sign is the opposite
            print(f"{size:>5}² {fps_q:>10.0f} {fps_s:>12.1f} {fps_q / fps_s:>6.1f}x {1e3 / fps_q:>9.2f} "
                  f"{rms_q:>13.3f} {rms_s:>15.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
