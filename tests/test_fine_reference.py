"""The reference on a grid twice as fine (qcmon.metrics.fine_reference) and the likelihood that models a frame with it
(ShiftEstimator.with_reference(fine_reference=)), held against a physical detector we did not write the maths of.

The specimen is the nuclei image of tests/outside_data.py (a real fluorescence micrograph), as a scene on a grid
twice as fine as the image (its band-limited interpolant, ``fourier_mover``, checked against scipy in
tests/test_outside_data.py). A frame is what a detector whose pixels integrate over their area records of it:
``specimen_area`` — each detector pixel the mean of 4 × 4 scene pixels (2 × 2 image pixels), the scene moved by
whole scene pixels (quarter detector pixels), no interpolation (checked against scikit-image's
``downscale_local_mean`` in tests/test_outside_data.py). Such frames are aliased:
a frame at a quarter-pixel shift is not the frame at zero moved by a quarter pixel with band-limited
interpolation (``scipy.ndimage.fourier_shift``, the reference library here for the frames' own grid).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import ndimage

from outside_data import fourier_mover, nuclei_2d, specimen_area
from qcmon.metrics.fine_reference import fine_reference
from qcmon.metrics.registration import ShiftEstimator

B = 4  # scene px per detector px (2 image px)
SHAPE = (100, 100)  # detector px: 200 of the 512 image px, room for shifts of a few detector px


@pytest.fixture(scope="module")
def scene() -> np.ndarray:
    """The middle 480² of the nuclei image on a grid twice as fine (960²), in photons, no pixel near zero."""
    img = nuclei_2d().astype(np.float64)
    move = fourier_mover(img)
    out = np.empty((960, 960))
    for a in (0, 1):
        for c in (0, 1):
            out[a::2, c::2] = move((480, 480), -a / 2, -c / 2)  # the middle at (row + a/2, column + c/2)
    return np.clip(out, 0.0, None) * (20.0 / img.mean()) + 5.0


def _frame(scene, dy, dx) -> np.ndarray:
    return specimen_area(scene, B, SHAPE, dy, dx)


def _fourier_move(img: np.ndarray, dy: float, dx: float) -> np.ndarray:
    """``img``'s content moved by (dy, dx) px with band-limited interpolation on its own grid (scipy), mirrored at
    its edges first so that nothing wraps around."""
    pad = 8
    ext = np.pad(img, pad, mode="symmetric")
    moved = np.fft.ifftn(ndimage.fourier_shift(np.fft.fftn(ext), (dy, dx))).real
    return moved[pad:-pad, pad:-pad]


def _rel_rms(a: np.ndarray, b: np.ndarray, edge: int = 12) -> float:
    inner = (slice(edge, -edge), slice(edge, -edge))
    return float(np.sqrt(np.mean((a[inner] - b[inner]) ** 2)) / np.std(b[inner]))


def test_fine_reference_predicts_the_detector_at_half_pixels_from_frames_at_quarter_pixels(scene):
    # Four frames at (+-1/4, +-1/4) px hold the four unknowns per frequency (each frame frequency and its alias) of
    # the pixel-integrated scene: the reconstruction must give the frames at whole and half px, which it never saw
    # (sampling theory of shifted aliased images, Tsai & Huang 1984). The frame grid's own method — band-limited
    # interpolation of one frame (scipy.ndimage.fourier_shift) — cannot: the aliasing moves differently.
    shifts = [(a, b) for a in (0.25, -0.25) for b in (0.25, -0.25)]
    means = [_frame(scene, *s) for s in shifts]
    fine = fine_reference(means, shifts, [1000] * 4, noise=1e-3 * float(np.sum(means[0])), edge=2)
    naive = []
    for (py, px), (a, b) in (((0.0, 0.0), (0, 0)), ((-0.5, 0.0), (1, 0)), ((0.0, -0.5), (0, 1)),
                             ((-0.5, -0.5), (1, 1))):
        truth = _frame(scene, py, px)  # the detector at (py, px): fine sample (2y + a, 2x + b), a = -2 py
        got = _rel_rms(fine[a::2, b::2], truth)
        # the nearest quarter-px frame moved the rest of the way on its own grid
        src = (0.25 if py > -0.25 else -0.25, 0.25 if px > -0.25 else -0.25)
        moved = _fourier_move(_frame(scene, *src), py - src[0], px - src[1])
        naive.append(_rel_rms(moved, truth))
        assert got < 0.01, (py, px, got)
        assert got < 0.2 * naive[-1], (py, px, got, naive[-1])


def test_fine_reference_of_frames_at_one_shift_is_that_frame(scene):
    # Frames at one fractional shift say nothing of the aliases: the reconstruction falls back to the frame's own
    # band (the partners' prior is zero): at the frame's pixels it is the frame itself, not a guess.
    frame = _frame(scene, 0.0, 0.0)
    fine = fine_reference([frame], [(0.0, 0.0)], [500], noise=1e-3 * float(frame.sum()), edge=2)
    assert np.all(np.isfinite(fine))
    assert _rel_rms(fine[::2, ::2], frame) < 1e-4


def _estimators(scene, fine: np.ndarray):
    ref = _frame(scene, 0.0, 0.0)
    base = ShiftEstimator(ref, upsample=20, bin_factor=1, dark_level=0.0, gain=1.0, read_noise_dn=0.0,
                          reference_frames=10 ** 6)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        every = base.with_reference(ref, reference_frames=10 ** 6, ml_band=(math.inf, math.inf))
        rolled = base.with_reference(ref, reference_frames=10 ** 6)
        finer = base.with_reference(ref, reference_frames=10 ** 6, fine_reference=fine, fine_edge=4)
    return every, rolled, finer


def test_fine_model_registers_pixel_area_frames_that_the_frame_grid_model_cannot(scene):
    # The model on the fine grid is the pixel-integrated scene at half px (the exact detector at 0 and 1/2 px,
    # interleaved). Noise-free frames at quarter-px shifts (between the model's samples): the fine model must find
    # their shift; the likelihood on the frame's own grid, with every frequency, is biased by the aliasing, and
    # with its roll-off still errs (the roll-off only lessens the bias).
    fine = np.empty((2 * SHAPE[0], 2 * SHAPE[1]))
    for a in (0, 1):
        for b in (0, 1):
            fine[a::2, b::2] = _frame(scene, -a / 2, -b / 2)
    every, rolled, finer = _estimators(scene, fine)
    truths = [(0.25, -0.75), (-0.5, 0.25), (1.25, 0.5), (-0.25, -1.5)]
    errs = {name: [] for name in ("every", "rolled", "fine")}
    for t in truths:
        frame = _frame(scene, *t)
        for name, est in (("every", every), ("rolled", rolled), ("fine", finer)):
            errs[name].append(np.array(est.estimate(frame)[:2]) - t)
    rms = {k: float(np.sqrt(np.mean(np.square(v)))) for k, v in errs.items()}
    assert rms["fine"] < 0.003, rms
    assert rms["fine"] < 0.25 * rms["every"] and rms["fine"] < 0.5 * rms["rolled"], rms
    # a frame equal to the model's own samples registers to their shift exactly (the score vanishes there)
    assert np.allclose(finer.estimate(fine[1::2, ::2])[:2], (-0.5, 0.0), atol=5e-4)


def test_fine_model_is_left_for_frames_with_clipped_pixels_and_for_large_shifts(scene):
    fine = np.kron(_frame(scene, 0.0, 0.0), np.ones((2, 2)))
    _, rolled, finer = _estimators(scene, fine)
    frame = _frame(scene, 0.25, 0.5)
    valid = np.ones(SHAPE, bool)
    valid[:10, :10] = False
    # with unusable pixels the frame grid's likelihood (and its mask) measures it: the same as without the model
    got = finer.estimate(frame, valid=valid)
    assert np.isfinite(got.dy_px) and abs(got.dy_px - 0.25) < 0.05
    with pytest.raises(ValueError, match="fine_reference"):
        rolled.with_reference(fine[::2, ::2], reference_frames=10, fine_reference=fine[:-2], fine_edge=4)
    with pytest.raises(ValueError, match="fine_edge"):
        rolled.with_reference(fine[::2, ::2], reference_frames=10, fine_reference=fine, fine_edge=1)


def test_growing_reference_chooses_the_fine_grid_for_aliased_frames_and_measures_closer(scene, monkeypatch):
    # A session of the pixel-area detector at 20 photons/px (EMVA 1288 model: Poisson x gain + offset), 200² px, the
    # specimen on a random walk of quarter px: at the second choice (frame 480) the growth must pick the fine grid's
    # model, and the frames after it must be measured closer to their known shifts than with the roll-offs alone
    # (on the bench's 240² harness, bench/bench_shift_bound.py: 1.9x the Cramér–Rao bound with them, 1.5x with it).
    from outside_data import detect
    from qcmon.metrics import bin_image, reference_growth
    from qcmon.metrics.reference_growth import ReferenceGrowth
    from qcmon.metrics.registration import build_reference

    shape = (200, 200)
    rng = np.random.default_rng(11)
    walk = np.clip(np.cumsum(rng.normal(0.0, 0.15, (600, 2)), axis=0), -3.0, 3.0)
    walk = np.round(walk * B) / B
    frames = np.stack([detect(specimen_area(scene, B, shape, *d), rng, gain=20.0, offset=100.0)
                       for d in walk]).astype(np.float32)
    errs, choices = {}, None
    for fine in (True, False):
        monkeypatch.setattr(reference_growth, "FINE_CANDIDATE", fine)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            est = ShiftEstimator(build_reference(frames[:30], upsample=20), upsample=20, max_shift_px=25,
                                 dark_level=100.0, gain=20.0, read_noise_dn=0.0, reference_frames=30)
            growth = ReferenceGrowth(est, initial_frames=30, updates=(60, 120, 240, 480))
            got = []
            for f in frames:
                fb = bin_image(f, est.bin_factor)
                r = est.estimate_binned(fb)
                got.append(r[:2])
                growth.offer(fb, r.dy_px, r.dx_px, r.corr)
                new = growth.tick()
                if new is not None:
                    est = new
        err = np.array(got) - walk
        err -= np.median(err[:150], axis=0)  # the first reference's zero
        errs[fine] = float(np.sqrt(np.mean(err[480:] ** 2)))
        if fine:
            choices = growth.choices
    assert choices[-1][:2] == (480, reference_growth.FINE), (choices, errs)
    assert errs[True] < 0.85 * errs[False], errs
