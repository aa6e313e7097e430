"""Displacement error as a multiple of the Cramér–Rao bound, per photon level, next to frames per second.

Run: ``python bench/bench_shift_bound.py [--frames N] [--quick] [--motion {area,fourier,spline}]``. Needs ``make
setup`` (the outside data). The default sessions are 2,220 frames (74 s at 30 Hz; the reference's last update is at
frame 1,920): about 20 minutes on one core for both kinds of session, most of it making the frames.

For 0.5, 1.5, 5 and 20 photons/px it measures two sessions:
- *real specimen*: the nuclei image of ``tests/outside_data.py`` (a real fluorescence micrograph) along a random walk
  with a 8 px jump half-way (held within ±12 px), recorded through the EMVA 1288 detector model (Poisson × gain 20 +
  offset 100), the frames holding the given photons per px on average. ``--motion`` says how the specimen moves:

  - ``area`` (default; the physical detector): each detector px is the mean of b × b px of a scene finer than the
    detector's grid, the scene moving by whole scene px — no interpolation, aliased wherever the specimen holds
    detail finer than two detector px. The scene is the image's band-limited interpolant on a grid
    ``--area-steps / --area-pixel`` times finer than the image (default 2×, by the Fourier shift of the mirror
    extension), b = ``--area-steps`` (default 4): detector px of 2 image px, shifts in steps of 1/4 px (the walk is
    rounded to them; steps of 1/2 px alone would hide an estimator's bias at quarter px). The specimen makes the
    same motion as in the other models, in image px: in detector px it is ``--area-pixel`` times smaller (a walk
    within ±6 px, a 4 px jump, at the default). 240² frames, the field of 480 image px as in the others (a detector
    coarser than the image leaves at most 256² of the 512² image, less the walk's margin). The bound is
    ``area_shift_crb`` of the scene (the scene's derivative integrated over each detector px), not ``shift_crb`` of
    the sampled frame (1.13× higher for this specimen).
  - ``fourier``: the Fourier shift of the image's mirror extension (``tests/outside_data.fourier_mover``), a 480²
    window: exact for a scene band-limited at the image's grid. 480² and not 512²: the window keeps 16 px from the
    image's edges, where the mirrored copy begins, and the walk reaches 12 px. The bound is ``area_shift_crb`` with
    factor 1 over the window (the scene's derivative at the window's edges).
  - ``spline``: ``specimen_crop`` (cubic spline, ``scipy.ndimage.shift``), 480², the harness of the earlier runs;
    the spline errs 0.008 px RMS without noise (``bench/bench_shift_models.py``), 3× the bound at 20 photons/px.
    The bound is ``shift_crb`` of the still frame.
- *simulator*: qcmon's own simulator (scenario ``clean``, 512², its detector, gain and read noise).
Each session is measured like the engine does it: the reference is built from the first 30 frames
(``build_reference``), the estimator gets the dark level, gain and read noise, every frame is measured and offered
to the growing reference (``qcmon.metrics.reference_growth``, updates at 60 … 1920 frames), whose estimator
measures the frames after each update. The error is taken about its median over the session (the reference sits
at the median position of its first frames), and, in the last column, about its median over the first 5 s
(frames 0-149, within a few px of the start, where the first reference sets its zero; that median's own noise is
under half the bound): the walk spends most of a long session at its ±12 px limit, so the session's median is the
error *there*, and a bias that changes with the shift (measured: up to 0.006 px at 12 px on the Fourier harness at
20 photons/px, 0.013 px at 6 px on the pixel-area one) is taken out of the first columns and counted in the last. The bound is ``qcmon.metrics.shift_bound.shift_crb`` of the
noise-free specimen at the session's photon count.
Printed per session: RMS error (mean of the two axes, px) and RMS / bound over the first 5 s (frames 0-149) and
after the first minute (frames from 1,920 on; in ``--quick`` runs after the last update, at 480), for the growing
reference, for the first reference kept all along, and for the latter without the likelihood refinement (phase
correlation only); frames per second of each on one core (the growing reference's include its updates). No
assertions.

``--patch`` measures instead frames with a stationary saturated patch (12 % of the field at the 12-bit ceiling,
fixed on the detector), the construction of ``tests/test_range.py``: the nuclei specimen moved by known shifts
(uniform in ±2.5 px) through the EMVA 1288 model (gain 3 DN/photon, offset 100 DN, read noise 8 DN, 12 bits),
the reference from 10 unshifted frames without the patch, through the whole engine. Printed per photon level and
field size: the RMS error of the patch frames and of the same frames without the patch (absolute, against the
truth), the Cramér–Rao bound over the usable pixels (``shift_crb(valid=)``, the patch's pixels left out) and over
all, the error of the estimator without the likelihood on the patch frames (phase correlation only, as before), and
scikit-image's masked registration (``phase_cross_correlation`` with ``reference_mask``/``moving_mask``, Padfield
2012; whole pixels only) on the same frames.
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

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from outside_data import detect, fourier_mover, nuclei_2d, specimen_area, specimen_crop  # noqa: E402
from qcmon.metrics import bin_image  # noqa: E402
from qcmon.metrics.reference_growth import REFERENCE_UPDATES, ReferenceGrowth  # noqa: E402
from qcmon.metrics.registration import ShiftEstimator, build_reference  # noqa: E402
from qcmon.metrics.shift_bound import area_shift_crb, shift_crb  # noqa: E402

PHOTONS = (0.5, 1.5, 5.0, 20.0)


MOTIONS = ("area", "fourier", "spline")
WALK_LIMIT = 12.0  # px: the random walk (with its jump) is held within this on each axis


def _finer_scene(img: np.ndarray, k: int) -> np.ndarray:
    """The band-limited interpolant of ``img`` sampled on a grid ``k`` times finer (the image's samples kept), by the
    Fourier shift of its mirror extension (tests/outside_data.fourier_mover); the outermost image px is dropped, and
    the interpolant's ringing below zero next to the sharpest edges (a few px of 1020², down to -4 of a mean of 33)
    is clipped: the scene is then what the frames and the bound both use."""
    if k == 1:
        return img
    move = fourier_mover(img)
    shape = (img.shape[0] - 2, img.shape[1] - 2)
    out = np.empty((shape[0] * k, shape[1] * k))
    for a in range(k):
        for c in range(k):
            out[a::k, c::k] = move(shape, -a / k, -c / k)  # the image at (row + a/k, column + c/k)
    return np.clip(out, 0, None)


def real_session(photons: float, n: int, rng: np.random.Generator, motion: str = "area", area_pixel: int = 2,
                 area_steps: int = 4):
    """Frames of the real specimen moved along the session's walk by ``motion`` (see the module notes), the walk as
    the frames hold it, the Cramér–Rao bound of that motion model, the detector's facts, and a description."""
    img = nuclei_2d().astype(np.float64) + 1.0  # +1: no pixel expects exactly zero photons
    walk = np.cumsum(rng.normal(0, 0.3, (n, 2)), axis=0)
    walk[n // 2:] += 8.0
    walk = np.clip(walk, -WALK_LIMIT, WALK_LIMIT)
    m = int(WALK_LIMIT)
    if motion == "area":
        b = area_steps
        scene = _finer_scene(img, area_steps // area_pixel)
        # the same motion of the specimen, in detector px (coarser than the image's by area_pixel), on whole scene px
        walk = np.round(walk / area_pixel * b) / b
        m = int(np.ceil(WALK_LIMIT / area_pixel))
        size = (min(scene.shape) - 2 * m * b) // b // 8 * 8
        shape = (size, size)
        top = (scene.shape[0] - size * b) // 2
        window = (slice(top, top + size * b), slice(top, top + size * b))

        def move(dy, dx):
            return specimen_area(scene, b, shape, dy, dx)
        k = area_steps // area_pixel
        finer = "the image itself" if k == 1 else f"the image's band-limited interpolant on a {k}x finer grid"
        what = (f"pixel area: detector px = {area_pixel} image px = {b}x{b} px of the scene ({finer}), steps of 1/{b} "
                f"px, {size}²")
    elif motion == "fourier":
        b, scene, shape = 1, img, (480, 480)
        window = (slice(16, 496), slice(16, 496))
        fmove = fourier_mover(img)

        def move(dy, dx):
            return np.clip(fmove(shape, dy, dx), 0, None)  # the interpolant rings below zero at under 12 px of 480²
        what = "Fourier shift of the mirror-extended image, 480² window (16 px margin for shifts up to 12 px)"
    elif motion == "spline":
        shape, scene = (480, 480), None

        def move(dy, dx):
            return specimen_crop(img, shape, dy, dx)
        what = "cubic spline (specimen_crop, scipy.ndimage.shift order 3), 480²"
    else:
        raise ValueError(f"motion must be one of {MOTIONS}, got {motion!r}")
    still = move(0.0, 0.0)
    scale = photons / still.mean()  # the frames hold `photons` per px on average
    frames = np.stack([detect(move(*d) * scale, rng, gain=20.0, offset=100.0) for d in walk])
    sampled = shift_crb(still, photons)
    bound = sampled if scene is None else area_shift_crb(scene, b, photons, window=window)
    return frames, walk, bound, dict(dark_level=100.0, gain=20.0, read_noise_dn=0.0), what, sampled


def sim_session(photons: float, n: int, seed: int):
    from qcmon.simulate import scenario_config, simulate
    from qcmon.simulate._core import Simulator

    cfg = scenario_config("clean", n_frames=n, height=512, width=512, frame_rate_hz=30.0, seed=seed,
                          mean_photons_per_px=photons)
    res = simulate(cfg)
    truth = res.truth_for(0, 0)
    sim = Simulator(cfg)
    lam = sim.specimen.render(0.0, 0.0, 0.0, sim._rest_weights()[:1], sim._neuropil_weights(1.0)[:1])[0] \
        * sim.scale[0]
    gain = cfg.gain_dn_per_photon
    bound = shift_crb(lam, float(lam.mean()), read_noise_photons=cfg.read_noise_dn / gain)
    walk = np.stack([truth["dy_px"], truth["dx_px"]], axis=1)
    return res.frames_for(0, 0), walk, bound, dict(dark_level=cfg.dark_dn, gain=gain, read_noise_dn=cfg.read_noise_dn)


def measure(frames, walk, facts, steps: int, updates=()):
    """Shift errors of every frame (raw: the reference's zero not removed), frames per second, and the growing
    reference's choices of the likelihood's roll-off (``ReferenceGrowth.choices``; empty without growth)."""
    old = ShiftEstimator._ML_STEPS
    ShiftEstimator._ML_STEPS = steps
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            ref = build_reference(frames[:30].astype(np.float32), upsample=20)
            est = ShiftEstimator(ref, upsample=20, max_shift_px=min(ref.shape) / 4, reference_frames=30, **facts)
            growth = ReferenceGrowth(est, initial_frames=30, updates=updates) if updates else None
            res = np.empty((len(frames), 2))
            t0 = time.perf_counter()
            for i, f in enumerate(frames):
                fb = bin_image(f, est.bin_factor)
                r = est.estimate_binned(fb)
                res[i] = r[:2]
                if growth is not None:
                    growth.offer(fb, r.dy_px, r.dx_px, r.corr)
                    new = growth.tick()
                    if new is not None:
                        est = new
            dt = time.perf_counter() - t0
    finally:
        ShiftEstimator._ML_STEPS = old
    return res - walk, len(frames) / dt, (growth.choices if growth is not None else [])


def window_rms(err, window: slice) -> float:
    """RMS error of the frames in ``window``, the mean of the two axes."""
    return float(np.mean(np.sqrt(np.nanmean(err[window] ** 2, axis=0))))


def patch_session(photons: float, size: int, n: int, rng: np.random.Generator):
    """Frames 0-9 unshifted without the patch (the reference), then ``n`` shifted frames, each with and without a
    stationary patch at the 12-bit ceiling over 12.2 % of the field (the rows 20-60, columns 50-100 of 128²,
    scaled to the field)."""
    img = nuclei_2d().astype(np.float64)
    spec = img * (photons / img.mean())
    shape = (size, size)
    k = size / 128
    patch = (slice(int(20 * k), int(60 * k)), slice(int(50 * k), int(100 * k)))
    kw = dict(gain=3.0, offset=100.0, read_noise_dn=8.0, bits=12)
    ref = [detect(specimen_crop(spec, shape, 0.0, 0.0, margin=8), rng, **kw) for _ in range(10)]
    truth = rng.uniform(-2.5, 2.5, (n, 2))
    clean = [detect(specimen_crop(spec, shape, dy, dx, margin=8), rng, **kw) for dy, dx in truth]
    patched = []
    for f in clean:
        f = f.copy()
        f[patch] = 4095
        patched.append(f)
    valid = np.ones(shape, bool)
    valid[patch] = False
    still = specimen_crop(spec, shape, 0.0, 0.0, margin=8)
    bounds = (np.mean(shift_crb(still, float(still.mean()), read_noise_photons=8.0 / 3.0, valid=valid)),
              np.mean(shift_crb(still, float(still.mean()), read_noise_photons=8.0 / 3.0)))
    return ref, clean, patched, truth, valid, bounds


def engine_shifts(frames) -> np.ndarray:
    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    eng = Engine(EngineSettings(frame_rate_hz=30.0, reference_frames=10))
    rows: list[dict] = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        for i, fr in enumerate(frames):
            rows += eng.process(Frame(fr, i, time_s=i / 30.0))
        rows += eng.flush()
    return np.array([(r["dy_px"], r["dx_px"]) for r in rows]), eng


def rms(got, truth) -> float:
    return float(np.sqrt(np.mean(np.sum((got - truth) ** 2, axis=1))))


def patch_main(n: int, levels, sizes) -> int:
    from skimage.registration import phase_cross_correlation

    print(f"{'field':>6} {'photons/px':>10} {'bound usable':>12} {'bound all':>9} | {'patch RMS':>9} {'x bound':>7} "
          f"{'clean RMS':>9} {'x bound':>7} | {'PC only':>8} {'skimage masked':>14}")
    for size in sizes:
        for k, p in enumerate(levels):
            rng = np.random.default_rng(300 + k + size)
            ref, clean, patched, truth, valid, (b_use, b_all) = patch_session(p, size, n, rng)
            got_p, eng = engine_shifts(ref + patched)
            got_c, _ = engine_shifts(ref + clean)
            e_p, e_c = rms(got_p[10:], truth), rms(got_c[10:], truth)
            # the same estimator without the likelihood refinement, with the frames' masks
            est = eng._streams[(0, 0)].shift
            old = ShiftEstimator._ML_STEPS
            ShiftEstimator._ML_STEPS = 0
            try:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", UserWarning)
                    pc = np.array([est.estimate(f, valid=f < 4095)[:2] for f in patched])
            finally:
                ShiftEstimator._ML_STEPS = old
            refimg = eng.reference_image(0, 0)
            sk = np.array([-phase_cross_correlation(refimg, f.astype(np.float32), reference_mask=np.ones_like(valid),
                                                    moving_mask=f < 4095)[0] for f in patched])
            print(f"{size:>5}² {p:>10.1f} {2 ** 0.5 * b_use:>12.4f} {2 ** 0.5 * b_all:>9.4f} | {e_p:>9.4f} "
                  f"{e_p / (2 ** 0.5 * b_use):>6.1f}x {e_c:>9.4f} {e_c / (2 ** 0.5 * b_all):>6.1f}x | "
                  f"{rms(pc, truth):>8.4f} {rms(sk, truth):>14.4f}", flush=True)
    print("RMS = sqrt(mean(dy² + dx²)) against the truth; bound = sqrt(σy² + σx²) of shift_crb (read noise 8/3 "
          "photons), over the usable pixels for the patch frames, over all for the clean ones")
    return 0


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=None,
                        help="frames per session (default 2220; with --patch 120)")
    parser.add_argument("--quick", action="store_true",
                        help="700 frames, updates up to 480, 1.5 and 20 photons/px only (with --patch: 30 frames)")
    parser.add_argument("--sessions", default="real specimen,simulator", help="comma-separated session kinds")
    parser.add_argument("--motion", choices=MOTIONS, default="area",
                        help="how the real specimen moves (default area: the detector's pixel-area integration)")
    parser.add_argument("--area-pixel", type=int, default=2, choices=(2, 4),
                        help="--motion area: a detector px covers this many image px (default 2)")
    parser.add_argument("--area-steps", type=int, default=4,
                        help="--motion area: shift steps per detector px, a multiple of --area-pixel (default 4)")
    parser.add_argument("--patch", action="store_true",
                        help="frames with a stationary saturated patch, through the engine (see the module notes)")
    args = parser.parse_args()
    if args.patch:
        return patch_main(args.frames or (30 if args.quick else 120), (5.0, 20.0) if args.quick else PHOTONS,
                          (128, 256))
    if args.area_steps % args.area_pixel:
        parser.error(f"--area-steps {args.area_steps} is not a multiple of --area-pixel {args.area_pixel}")
    n = args.frames or (700 if args.quick else 2220)
    levels = (1.5, 20.0) if args.quick else PHOTONS
    updates = tuple(u for u in REFERENCE_UPDATES if u <= (480 if args.quick else n - 100))
    late = slice(updates[-1], n)
    early = slice(0, 150)
    try:
        from threadpoolctl import threadpool_limits
        limit = threadpool_limits(1)
    except ImportError:
        limit = None
    print(f"growing reference: updates at {updates}; first seconds = frames 0-149, late = frames {late.start}-{n - 1}")
    print(f"{'session':>14} {'photons/px':>10} {'bound px':>9} | {'growing: 5 s RMS':>16} {'x':>5} "
          f"{'late RMS':>9} {'x':>5} {'fps':>5} | {'first ref: 5 s':>14} {'x':>5} {'late':>7} {'x':>5} {'fps':>5} "
          f"| {'PC only: late':>13} {'x':>5} {'fps':>5} | {'growing, zero of 0-149: late':>28} {'x':>5}")
    for name in args.sessions.split(","):
        for k, p in enumerate(levels):
            rng = np.random.default_rng(100 + k)
            if name == "real specimen":
                frames, walk, bound, facts, what, sampled = real_session(p, n, rng, args.motion, args.area_pixel,
                                                                         args.area_steps)
                if k == 0:
                    print(f"real specimen moved by {what}; shift_crb of the sampled still frame / the motion's bound "
                          f"= {np.mean(sampled) / np.mean(bound):.3f}", flush=True)
            else:
                frames, walk, bound, facts = sim_session(p, n, seed=100 + k)
            b = float(np.mean(bound))
            cols = []
            for steps, upd in ((ShiftEstimator._ML_STEPS, updates), (ShiftEstimator._ML_STEPS, ()), (0, ())):
                raw, fps, choices = measure(frames, walk, facts, steps, upd)
                err = raw - np.nanmedian(raw, axis=0)
                cols.append((window_rms(err, early), window_rms(err, late), fps))
                if upd:
                    g0 = window_rms(raw - np.nanmedian(raw[early], axis=0), late)
                    chosen = ", ".join(f"{c[0]}: {c[1]}" for c in choices)
            (g5, gl, gf), (f5, fl, ff), (_p5, pl, pf) = cols
            print(f"{name:>14} {p:>10.1f} {b:>9.4f} | {g5:>16.4f} {g5 / b:>5.1f} {gl:>9.4f} {gl / b:>5.1f} {gf:>5.0f} "
                  f"| {f5:>14.4f} {f5 / b:>5.1f} {fl:>7.4f} {fl / b:>5.1f} {ff:>5.0f} | {pl:>13.4f} {pl / b:>5.1f} "
                  f"{pf:>5.0f} | {g0:>28.4f} {g0 / b:>5.1f}", flush=True)
            print(f"{'':>14} roll-off chosen by the growing reference (frames seen: band): {chosen or 'none'}",
                  flush=True)
            del frames
    # the refinement's cost at 512² (binned 2x, as the engine registers it), interleaved with and without it
    rng = np.random.default_rng(7)
    img = nuclei_2d().astype(np.float64) + 1.0
    lam = np.pad(img, 16, mode="reflect")[:512, :512] * (1.5 / img.mean())
    frames = [detect(lam, rng, gain=20.0, offset=100.0) for _ in range(40)]
    est = ShiftEstimator(np.mean(frames[:30], axis=0), dark_level=100.0, gain=20.0, read_noise_dn=0.0,
                         reference_frames=30)
    times = {0: [], ShiftEstimator._ML_STEPS: []}
    steps_new = ShiftEstimator._ML_STEPS
    for _ in range(7):
        for steps in (0, steps_new):
            ShiftEstimator._ML_STEPS = steps
            t0 = time.perf_counter()
            for f in frames:
                est.estimate(f)
            times[steps].append((time.perf_counter() - t0) / len(frames) * 1e3)
    ShiftEstimator._ML_STEPS = steps_new
    t_old, t_new = np.median(times[0]), np.median(times[steps_new])
    print(f"512² uint16 frame, per call of estimate (median of 7 interleaved runs): phase correlation only "
          f"{t_old:.3f} ms, with the likelihood refinement {t_new:.3f} ms (+{t_new - t_old:.3f} ms)")
    if limit is not None:
        limit.unregister() if hasattr(limit, "unregister") else None
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
