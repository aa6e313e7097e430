"""How the real specimen is moved decides how close to the Cramér–Rao bound the displacement can come.

Run: ``python bench/bench_shift_models.py [--frames N]``. Needs ``make setup`` (the outside data).

The bound of ``qcmon.metrics.shift_bound.shift_crb`` assumes that a moved frame is the band-limited (Fourier)
shift of the still one. A real specimen's frames need not be: a detector pixel integrates its area of a scene
finer than the pixel grid (aliasing when the optics resolve more than the sampling), and a test that moves an
image by spline interpolation (``tests/outside_data.specimen_crop``) damps its highest frequencies by an amount that
depends on the fractional shift. This benchmark measures qcmon's estimator against a **noise-free reference** (so
that only the estimator and the motion model count) on the real nuclei image of ``tests/outside_data.py``, moved
three ways:

- *Fourier*: the 512² image's mirror extension shifted by the shift theorem (``outside_data.fourier_mover``), a
  256² window cropped (real edges);
- *pixel area, 2× / 4×*: the 512² image taken as the scene, moved by whole scene pixels, each frame pixel the mean
  of 2×2 (224² frames) or 4×4 (112² frames) scene pixels (``outside_data.specimen_area``; shifts in steps of 1/2 or
  1/4 frame px);
- *spline*: ``specimen_crop`` (cubic spline, ``scipy.ndimage.shift``), 256².

The bound of each is that of its motion model: ``shift_crb`` of the still frame for the spline, ``area_shift_crb``
of the scene for the others (factor 1 over the window for the Fourier shift; for the pixel area the scene's
derivative integrated over each detector pixel, since the aliased frame's own spectral derivative is not the
derivative with respect to the motion).

For each: the error of noise-free frames (model mismatch alone) and, at 1.5 and 20 photons/px through the EMVA 1288
detector model (Poisson × gain 20 + offset 100), the RMS error per axis as a multiple of that bound, for the
estimator as it is and with the likelihood's roll-off of the highest frequencies switched off
(``ShiftEstimator._ML_BAND``). No assertions.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMEXPR_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import sys  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from outside_data import detect, fourier_mover, nuclei_2d, specimen_area, specimen_crop  # noqa: E402
from qcmon.metrics.registration import ShiftEstimator  # noqa: E402
from qcmon.metrics.shift_bound import area_shift_crb, shift_crb  # noqa: E402

BANDS = {"as built": ShiftEstimator._ML_BAND, "no roll-off": (2.0, 2.0)}


def movers(img: np.ndarray):
    """name -> (function (dy, dx) -> still-scale frame, shift sampler, bound function (scale, photons) -> (σy, σx))"""
    H, W = img.shape
    fmove = fourier_mover(img)

    def fourier(dy, dx):
        return np.clip(fmove((256, 256), dy, dx), 0, None)
    t = (H - 256) // 2
    fourier_bound = (lambda scale, p: area_shift_crb(img * scale, 1, p, window=(slice(t, t + 256),) * 2))

    def area(b, n):
        top = (H - n * b) // 2

        def move(dy, dx):
            return specimen_area(img, b, (n, n), dy, dx)

        def bound(scale, p):  # the scene's own bound: the frame is aliased (shift_bound.area_shift_crb)
            return area_shift_crb(img * scale, b, p, window=(slice(top, top + n * b),) * 2)
        return move, (lambda rng, k: rng.integers(-3 * b, 3 * b + 1, (k, 2)) / b), bound

    uniform = (lambda rng, k: rng.uniform(-2, 2, (k, 2)))
    out = {"Fourier 256²": (fourier, uniform, fourier_bound)}
    out["pixel area 2x 224²"] = area(2, 224)
    out["pixel area 4x 112²"] = area(4, 112)
    spline = (lambda dy, dx: specimen_crop(img, (256, 256), dy, dx))
    out["spline 256²"] = (spline, uniform, (lambda scale, p: shift_crb(spline(0.0, 0.0) * scale, p)))
    return out


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=120, help="frames per case (default 120)")
    args = parser.parse_args()
    img = nuclei_2d().astype(np.float64) + 1.0
    print(f"{'motion':>20} {'photons/px':>10} {'bound px':>9} " + " ".join(f"{k + ' RMS px':>18} {'x bound':>7}"
                                                                          for k in BANDS))
    saved = ShiftEstimator._ML_BAND
    try:
        for name, (move, sampler, bound_of) in movers(img).items():
            still = move(0.0, 0.0)
            for photons in (None, 1.5, 20.0):
                rng = np.random.default_rng(1)
                walk = sampler(rng, args.frames)
                scale = (photons or 20.0) / still.mean()
                if photons is None:
                    frames = [move(*d) * scale * 20 + 100 for d in walk]
                else:
                    frames = [detect(move(*d) * scale, rng, gain=20.0, offset=100.0) for d in walk]
                bound = float(np.mean(bound_of(scale, float((still * scale).mean()))))
                cells = []
                for band in BANDS.values():
                    ShiftEstimator._ML_BAND = band
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore", UserWarning)
                        est = ShiftEstimator(still * scale * 20 + 100, upsample=20, dark_level=100.0, gain=20.0,
                                             read_noise_dn=0.0, reference_frames=10 ** 6)
                        res = np.array([est.estimate(f)[:2] for f in frames])
                    rms = float(np.sqrt(np.mean((res - walk) ** 2)))
                    cells.append(f"{rms:>18.4f} {rms / bound:>6.2f}x")
                label = "noise-free" if photons is None else f"{photons:.1f}"
                print(f"{name:>20} {label:>10} {bound:>9.4f} " + " ".join(cells), flush=True)
    finally:
        ShiftEstimator._ML_BAND = saved
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
