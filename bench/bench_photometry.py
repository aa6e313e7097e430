"""Per-frame cost of the photometric metrics at 256², 512² and 1024² uint16, one core, with references.

Prints µs per frame for each function and, in the same run, for a reference doing the same job with a
general-purpose library (skimage.restoration.estimate_sigma, plain numpy), and their ratio. No assertions.
Photon transfer and the line offset are meant to run on every k-th frame; the amortised cost is printed too.

Run: ``python bench/bench_photometry.py``
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import time  # noqa: E402

import numpy as np  # noqa: E402

from qcmon.metrics.line_offset import line_offset_px  # noqa: E402
from qcmon.metrics.noise import immerkaer_sigma  # noqa: E402
from qcmon.metrics.photon_transfer import PhotonTransfer  # noqa: E402
from qcmon.metrics.saturation import saturation_fractions  # noqa: E402

#: The engine's intended cadence (frames) for the two costlier metrics.
PAIR_STEP = PhotonTransfer(max_value=1).pair_step
LINE_OFFSET_EVERY = 16
NOISE_ROW_STEP = 8


def _time_us(fn, *, min_time=0.3, max_reps=2000) -> float:
    fn()
    reps, start = 0, time.perf_counter()
    best = np.inf
    while reps < max_reps and time.perf_counter() - start < min_time:
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
        reps += 1
    return best * 1e6


def _frames(n):
    rng = np.random.default_rng(0)
    lam = 2.0 + 3.0 * rng.random((n, n))
    a = (rng.poisson(lam) * 20 + 100).astype(np.uint16)
    b = (rng.poisson(lam) * 20 + 100).astype(np.uint16)
    return a, b


def _reference_sigma():
    try:
        from skimage.restoration import estimate_sigma
    except ImportError:  # pragma: no cover
        return None
    try:
        import pywt  # noqa: F401
    except ImportError:
        return None
    return estimate_sigma


def main() -> int:
    estimate_sigma = _reference_sigma()
    print(f"{'size':>6} {'function':<34} {'µs/frame':>10} {'reference':<34} {'µs/frame':>10} {'ratio':>7}")
    for n in (256, 512, 1024):
        a, b = _frames(n)
        pt = PhotonTransfer(max_value=65535, pair_step=1)  # default row_step; pairs skipped by the caller here
        pt.update(a, b)
        pt.update(b, a)  # a fit exists: outlier and flatness tests are on
        ref_sigma = (lambda: estimate_sigma(a)) if estimate_sigma else None
        rows = [
            ("immerkaer_sigma", lambda: immerkaer_sigma(a), "skimage estimate_sigma", ref_sigma),
            ("immerkaer_sigma(row_step=4)", lambda: immerkaer_sigma(a, row_step=4), "skimage estimate_sigma",
             ref_sigma),
            (f"immerkaer_sigma(row_step={NOISE_ROW_STEP})", lambda: immerkaer_sigma(a, row_step=NOISE_ROW_STEP),
             "skimage estimate_sigma", ref_sigma),
            ("saturation_fractions", lambda: saturation_fractions(a, max_value=65535),
             "numpy count_nonzero x 2", lambda: (np.count_nonzero(a >= 65535), np.count_nonzero(a <= 0))),
            ("PhotonTransfer.update (one pair)", lambda: pt.update(a, b), "numpy var(a - b) of the pair",
             lambda: np.var(a.astype(np.float32) - b)),
            ("line_offset_px", lambda: line_offset_px(a), "numpy rfft of all rows x 2",
             lambda: (np.fft.rfft(a[0::2], axis=1), np.fft.rfft(a[1::2], axis=1))),
            ("frame mean (numpy)", lambda: a.mean(), "numpy sum(dtype=int64)", lambda: a.sum(dtype=np.int64)),
        ]
        costs = {}
        for name, fn, ref_name, ref in rows:
            us = _time_us(fn)
            costs[name] = us
            ref_us = _time_us(ref) if ref is not None else float("nan")
            ref_label = ref_name if ref is not None else ref_name + " (needs PyWavelets)"
            print(f"{n:>5}² {name:<34} {us:>10.1f} {ref_label:<34} {ref_us:>10.1f} {ref_us / us:>7.2f}")
        amortised = (costs[f"immerkaer_sigma(row_step={NOISE_ROW_STEP})"] + costs["saturation_fractions"]
                     + costs["PhotonTransfer.update (one pair)"] / PAIR_STEP
                     + costs["line_offset_px"] / LINE_OFFSET_EVERY + costs["frame mean (numpy)"])
        print(f"{n:>5}² per-frame photometry, amortised (noise row_step={NOISE_ROW_STEP}, photon transfer every {PAIR_STEP}th pair, "
              f"line offset every {LINE_OFFSET_EVERY}th frame, mean): {amortised:.1f} µs")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
