"""Per-frame cost of the photometric metrics at 256², 512² and 1024² uint16, one core, with references.

Prints µs per frame for each function and, in the same run, for a reference doing the same job with a
general-purpose library (skimage.restoration.estimate_sigma, plain numpy), and their ratio. No assertions.
Photon transfer and the line offset are meant to run on every k-th frame; the amortised cost is printed too.

The third-cumulant dark level (photon transfer without dark frames) is timed as a triple against the pair
update in the same run, and its accuracy is printed on the real specimen of ``tests/outside_data.py`` (EMVA 1288
camera model, truth 100 DN): dark level, standard error and samples for sessions of growing length
(``--no-accuracy`` skips that part, which takes about a minute).

Run: ``python bench/bench_photometry.py``
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

from qcmon.metrics.line_offset import line_offset_px  # noqa: E402
from qcmon.metrics.noise import immerkaer_sigma  # noqa: E402
from qcmon.metrics.photon_transfer import MAX_DARK_SE_DN, PhotonTransfer  # noqa: E402
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


def _smooth_frames(n):
    """Three frames of a smooth field (the photon-transfer line fits, so triples are taken): 1-60 photons × 20."""
    from scipy import ndimage

    rng = np.random.default_rng(1)
    smooth = ndimage.gaussian_filter(rng.random((n, n)), 6.0, mode="wrap")
    ramp = np.linspace(0.0, 1.0, n)[None, :] + 0.3 * (smooth - smooth.min()) / np.ptp(smooth)
    lam = 1.0 + 60.0 * ramp / ramp.max()
    return [(rng.poisson(lam) * 20 + 100).astype(np.uint16) for _ in range(3)]


def dark_level_accuracy() -> None:
    """Third-cumulant dark level on the real specimen: error and standard error against session length."""
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
    from outside_data import OutsideDataMissing, detect, living_specimen

    print("\nthird-cumulant dark level, real specimen (nuclei_2d) under the EMVA 1288 camera model: K = 2.5 DN/photon, "
          "read noise 8 DN, offset 100 DN, 12 bits; 256², moving ±0.3 px, transients 0.3 Hz; every row and triple")
    print(f"{'specimen':<36} {'frames':>6} {'samples':>10} {'dark DN':>8} {'± SE':>6} {'shown':>6}")
    for label, scale, background in (("dim (background ~1 photon)", 0.2, 0.5),
                                     ("bright (background 10-25 photons)", 1.0, 2.0)):
        rng = np.random.default_rng(1)
        pt = PhotonTransfer(max_value=4095, pair_step=1, row_step=1)
        frames = []
        try:
            stream = living_specimen((256, 256), 400, rng, photons_scale=scale, background=background,
                                     motion_px=0.3, rate_hz=0.3)
            for i, lam in enumerate(stream, 1):
                frames.append(detect(lam, rng, gain=2.5, offset=100.0, read_noise_dn=8.0, bits=12))
                if len(frames) >= 2:
                    pt.update(frames[-1], frames[-2], frames[-3] if len(frames) >= 3 else None)
                frames = frames[-3:]
                if i in (50, 100, 200, 400):
                    found = pt.cumulant_dark()
                    if found is None:
                        print(f"{label:<36} {i:>6} {'':>10} {'none':>8}")
                        continue
                    shown = "yes" if found.se_dn <= MAX_DARK_SE_DN else "blank"
                    print(f"{label:<36} {i:>6} {found.n_samples:>10} {found.dark_level_dn:>8.2f} "
                          f"{found.se_dn:>6.2f} {shown:>6}")
        except OutsideDataMissing as exc:
            print(f"skipped: {exc}")
            return


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
        f0, f1, f2 = _smooth_frames(n)
        pt3 = PhotonTransfer(max_value=65535, pair_step=1)
        for _ in range(10):  # until the line fits: triples are taken only then
            pt3.update(f1, f0)
            pt3.update(f2, f1)
            if pt3._line is not None:
                break
        pair_us = _time_us(lambda: pt3.update(f2, f1))
        before = pt3.n_triples
        triple_us = _time_us(lambda: pt3.update(f2, f1, f0))
        if pt3.n_triples == before:
            print(f"{n:>5}² (no triple taken: the photon-transfer line did not fit)")
        # the engine's later triples: every 4th row at most, about 2**15 stencils, never fewer rows than the pairs
        pt3.triple_row_step = min(pt3.row_step, max(4, (n - 2) // max(1, (1 << 15) // (n - 2))))
        engine_us = _time_us(lambda: pt3.update(f2, f1, f0))
        print(f"{n:>5}² {'  same, triples every ' + str(pt3.triple_row_step) + ' rows':<34} {engine_us:>10.1f} "
              f"{'PhotonTransfer.update (pair)':<34} {pair_us:>10.1f} {pair_us / engine_us:>7.2f}  (triple alone, "
              f"amortised every 16th frame: {(engine_us - pair_us) / 16:.1f} µs)")
        print(f"{n:>5}² {'PhotonTransfer.update (pair+triple)':<34} {triple_us:>10.1f} {'PhotonTransfer.update (pair)':<34} "
              f"{pair_us:>10.1f} {pair_us / triple_us:>7.2f}  (triple alone, amortised every {PAIR_STEP}th frame: "
              f"{(triple_us - pair_us) / PAIR_STEP:.1f} µs)")
    if "--no-accuracy" not in sys.argv:
        dark_level_accuracy()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
