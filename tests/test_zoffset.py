"""Accuracy of z offset, running mean and focus metrics (qcmon.metrics.zoffset, qcmon.metrics.focus).

The test volume is made here: cells (Gaussian blobs, sigma 3 px laterally, 3 µm axially) in dim neuropil
(small blobs, sigma 1.2 px and 1.5 µm), imaged with a Gaussian axial point-spread function (sigma 1.5 µm).
An image at depth z is the lateral sum of blobs each weighted by its axial overlap with the focal plane.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import ndimage
from skimage import filters

from qcmon.metrics.focus import focus_corr, focus_measure
from qcmon.metrics.zoffset import RunningMean, ZEstimator, ZResult

SHAPE = (128, 128)
PSF_Z_UM = 1.5


class Volume:
    def __init__(self, rng, depth_um=40.0):
        m, n = SHAPE
        self.groups = []
        for count, sigma_xy, sigma_z, amp in ((90, 3.0, 3.0, 3.0), (2500, 1.2, 1.5, 0.4)):
            y = rng.integers(0, m, count)
            x = rng.integers(0, n, count)
            z = rng.uniform(-depth_um / 2, depth_um / 2, count)
            a = amp * rng.uniform(0.5, 1.5, count)
            self.groups.append((y, x, z, a, sigma_xy, math.hypot(sigma_z, PSF_Z_UM)))

    def image(self, z_um, dy=0, dx=0):
        """Noise-free image at depth z_um (+ deeper), content shifted by whole pixels (dy, dx)."""
        out = np.full(SHAPE, 0.05)
        for y, x, z, a, sxy, sz in self.groups:
            w = a * np.exp(-0.5 * ((z - z_um) / sz) ** 2)
            plane = np.zeros(SHAPE)
            np.add.at(plane, ((y + dy) % SHAPE[0], (x + dx) % SHAPE[1]), w)
            out += ndimage.gaussian_filter(plane, sxy, mode="wrap") * (2 * math.pi * sxy ** 2)
        return out


def noisy_mean(vol, z, rng, *, photons=1.5, k=30):
    img = vol.image(z)
    lam = img / img.mean() * photons
    return rng.poisson(lam, (k, *SHAPE)).mean(axis=0)


@pytest.fixture(scope="module")
def setup():
    rng = np.random.default_rng(1)
    vol = Volume(rng)
    z_start = 0.3  # the session starts 0.3 µm below the stack's centre
    planes = np.arange(-12, 13) * 1.0  # 25 planes, 1 µm step, superficial -> deep
    # stack taken with the field shifted laterally by (3, -2) px against the session
    stack = np.stack([vol.image(z, 3, -2) for z in planes]) * 200 + 100
    reference = noisy_mean(vol, z_start, rng, k=60) * 8 + 100
    return vol, stack, reference, z_start, rng


def test_z_offset_accuracy(setup):
    vol, stack, reference, z_start, rng = setup
    est = ZEstimator(stack, z_step_um=1.0, reference=reference)
    # the stack's lateral shift (3, -2) px was found (ground truth of the test volume)
    assert_allclose(est.shift_px, (3.0, -2.0), atol=0.2)
    # the start lies 0.3 µm deeper than the stack's centre (ground truth)
    assert abs(est.start_um - z_start) <= 0.3
    errors = []
    for z in rng.uniform(-8, 8, 12) + z_start:
        r = est.estimate(noisy_mean(vol, z, rng))
        assert isinstance(r, ZResult)
        errors.append(r.z_um - (z - z_start))
        assert r.plane_index == int(np.argmin(np.abs(np.arange(-12, 13) - z))) or abs(r.z_um - (z - z_start)) < 0.5
    # Project accuracy goal: |error| <= 0.5 µm within +-8 µm on a 1 µm-step stack (simulated ground truth).
    print("z errors (µm):", np.round(errors, 3))
    assert np.max(np.abs(errors)) <= 0.5


def test_z_sign_deeper_is_positive_and_no_reference(setup):
    vol, stack, _, _, rng = setup
    unshifted = np.stack([vol.image(z) for z in np.arange(-12, 13) * 1.0])
    est = ZEstimator(unshifted, z_step_um=1.0)
    assert est.start_um == 0.0
    r = est.estimate(vol.image(4.0))
    assert_allclose(r.z_um, 4.0, atol=0.2)  # + deeper: toward increasing stack index (project convention)
    assert r.plane_index == 16
    # a 2 µm step stack measures in µm, not planes
    est2 = ZEstimator(unshifted[::2], z_step_um=2.0)
    assert_allclose(est2.estimate(vol.image(-5.0)).z_um, -5.0, atol=0.3)


def test_z_profile_and_nan(setup):
    _, stack, reference, _, _ = setup
    est = ZEstimator(stack, z_step_um=1.0, reference=reference)
    prof = est.profile(reference)
    # the profile is the Pearson correlation with each registered plane (numpy corrcoef on the same crop/bin
    # would need the registered planes; here its range and peak are checked)
    assert prof.shape == (25,) and np.all(prof <= 1 + 1e-6)
    assert int(np.argmax(prof)) == 12
    with pytest.warns(UserWarning, match="constant"):
        r = est.estimate(np.full(SHAPE, 7.0))
    assert math.isnan(r.z_um) and r.plane_index == -1


def test_z_validation():
    stack = np.random.default_rng(0).random((5, 32, 32))
    with pytest.raises(ValueError, match="z_step_um"):
        ZEstimator(stack, z_step_um=0)
    with pytest.raises(ValueError, match="stack"):
        ZEstimator(stack[0], z_step_um=1)
    with pytest.raises(ValueError, match="stack"):
        ZEstimator(stack[:2], z_step_um=1)
    with pytest.raises(ValueError, match="reference"):
        ZEstimator(stack, z_step_um=1, reference=np.zeros((16, 16)))
    with pytest.raises(ValueError, match="mean_image"):
        ZEstimator(stack, z_step_um=1).estimate(np.zeros((16, 16)))


def test_running_mean_matches_numpy():
    rng = np.random.default_rng(3)
    base = rng.random((40, 50)).astype(np.float32)
    rm = RunningMean(4)
    frames, shifts = [], []
    for t in range(11):
        dy, dx = int(rng.integers(-3, 4)), int(rng.integers(-3, 4))
        # content moved by (+dy, +dx) (edge-repeated), plus noise
        frame = ndimage.shift(base, (dy, dx), order=0, mode="nearest") + rng.normal(0, 0.01, base.shape)
        frames.append(frame)
        shifts.append((dy + rng.uniform(-0.4, 0.4), dx + rng.uniform(-0.4, 0.4)))  # rounded back to (dy, dx)
        rm.push(frame, *shifts[-1])
    assert rm.n_frames == 4 and rm._ring.shape == (4, 40, 50)  # constant memory: K block sums of one frame
    aligned = [ndimage.shift(f, (-round(s[0]), -round(s[1])), order=0, mode="nearest")
               for f, s in zip(frames[-4:], shifts[-4:])]
    # reference: scipy.ndimage.shift (whole pixels, nearest edge) and numpy's mean
    assert_allclose(rm.mean, np.mean(aligned, axis=0), atol=1e-5)
    inner = (slice(4, -4), slice(4, -4))
    assert_allclose(rm.mean[inner], base[inner], atol=0.02)


def test_running_mean_validation_and_nan():
    with pytest.raises(ValueError, match="K"):
        RunningMean(0)
    rm = RunningMean(3)
    with pytest.raises(ValueError, match="RunningMean"):
        _ = rm.mean
    rm.push(np.ones((8, 8)))
    with pytest.raises(ValueError, match="frame"):
        rm.push(np.ones((9, 8)))
    with pytest.warns(UserWarning, match="no finite pixel"):
        rm.push(np.full((8, 8), np.nan))
    rm.push(np.ones((8, 8)) * 3, math.nan, math.nan)
    assert_allclose(rm.mean, 2.0)


def test_focus_measure_reference_values():
    rng = np.random.default_rng(5)
    noise = rng.standard_normal((256, 256))
    # White noise: variance of the 5-point Laplacian = 4*1 + 16 = 20 times the pixel variance (analytic, from the
    # kernel's coefficients).
    assert_allclose(focus_measure(noise), 20.0, rtol=0.03)
    # Reference library: scikit-image's Laplace filter (same 3x3 kernel), divided by the image variance.
    img = ndimage.gaussian_filter(noise, 1.0)
    expected = filters.laplace(img).var() / img.var()
    assert_allclose(focus_measure(img), expected, rtol=0.02)
    # Gain and offset do not change it.
    assert_allclose(focus_measure(5 * img + 100), focus_measure(img), rtol=1e-5)


def test_focus_measure_and_corr_peak_at_focus(setup):
    vol, _, _, _, _ = setup
    # Focus operators are largest at best focus (Pertuz, Puig & Garcia 2013): defocus = lateral blur here.
    sharp = vol.image(0.0)
    values = [focus_measure(ndimage.gaussian_filter(sharp, s)) for s in (0.0, 1.0, 2.0, 3.0)]
    assert all(a > b for a, b in zip(values, values[1:]))
    corrs = [focus_corr(vol.image(z), sharp) for z in (0.0, 2.0, 4.0, 8.0)]
    assert_allclose(corrs[0], 1.0, atol=1e-9)
    assert all(a > b for a, b in zip(corrs, corrs[1:]))
    other = vol.image(3.0)
    assert_allclose(focus_corr(other, sharp), np.corrcoef(other.ravel(), sharp.ravel())[0, 1], atol=1e-6)


def test_focus_nan_with_warning():
    with pytest.warns(UserWarning, match="constant"):
        assert math.isnan(focus_measure(np.full((16, 16), 3, np.uint16)))
    with pytest.warns(UserWarning, match="no finite pixel"):
        assert math.isnan(focus_corr(np.full((16, 16), np.nan), np.random.default_rng(0).random((16, 16))))
    with pytest.raises(ValueError, match="mean_image"):
        focus_corr(np.zeros((8, 16)), np.zeros((16, 16)))


def _simulated_z_session():
    from qcmon.simulate import SimConfig, simulate

    # z steps to 0, +3, -4, +7.5 and -7.8 µm from the start, one per second (ground truth from the simulator)
    cfg = SimConfig(n_frames=150, height=128, width=128, mean_photons_per_px=1.5, seed=5,
                    z_steps=((1.0, 3.0), (2.0, -7.0), (3.0, 11.5), (4.0, -15.3)))
    return simulate(cfg)


def test_z_offset_on_simulated_session():
    from qcmon.metrics.registration import ShiftEstimator, build_reference

    res = _simulated_z_session()
    frames, truth = res.frames_for(), res.truth
    reference = build_reference(frames[:25])
    zest = ZEstimator(res.zstack, z_step_um=res.z_step_um, reference=reference)
    assert abs(zest.start_um) <= 0.5  # the simulator's stack is centred on the starting plane
    shifts = ShiftEstimator(reference)
    measured = RunningMean(20)  # motion corrected with qcmon's own registration
    known = RunningMean(20)  # motion corrected with the simulator's true shifts
    for i, frame in enumerate(frames):
        r = shifts.estimate(frame)
        measured.push(frame, r.dy_px, r.dx_px)
        known.push(frame, truth["dy_px"][i], truth["dx_px"][i])
        if i % 30 == 29:
            z_true = float(np.mean(truth["z_um"][i - 19:i + 1]))
            # Project goal: <= 0.5 µm within +-8 µm on a 1 µm stack (simulated ground truth).
            assert abs(zest.estimate(known.mean).z_um - z_true) <= 0.5
            if abs(z_true) <= 4:
                # Registration against the start reference holds within a few axial resolutions only.
                assert abs(zest.estimate(measured.mean).z_um - z_true) <= 0.5


def test_running_mean_of_uint16_frames_is_exact_over_many_cycles():
    # Integer frames are kept as they are and summed in float32, which is exact for these sums: after many
    # cycles of the ring buffer the mean equals numpy's float64 mean of the last K aligned frames (reference:
    # scipy.ndimage.shift with whole pixels and nearest edges, numpy's mean) to float32 rounding of the result.
    rng = np.random.default_rng(8)
    rm = RunningMean(5)
    frames, shifts = [], []
    for _ in range(37):
        frames.append(rng.integers(0, 65535, (24, 30), endpoint=True).astype(np.uint16))
        shifts.append((int(rng.integers(-3, 4)), int(rng.integers(-3, 4))))
        rm.push(frames[-1], *shifts[-1])
    assert rm._ring.shape == (5, 24, 30)
    aligned = [ndimage.shift(f.astype(np.float64), (-s[0], -s[1]), order=0, mode="nearest")
               for f, s in zip(frames[-5:], shifts[-5:])]
    expected = np.mean(aligned, axis=0)
    assert_allclose(rm.mean, expected, rtol=1e-7, atol=0)
    # a float frame after integer ones: the mean stays right
    rm.push(frames[0].astype(np.float32) + 0.5)
    aligned = aligned[1:] + [frames[0].astype(np.float64) + 0.5]
    assert_allclose(rm.mean, np.mean(aligned, axis=0), rtol=1e-6)


def test_add_shifted_equals_scipy_shift_plus_add():
    # Reference: scipy.ndimage.shift with whole pixels and nearest edges (what RunningMean adds per frame).
    from qcmon.metrics._imageops import add_shifted

    rng = np.random.default_rng(11)
    for _ in range(200):
        m, n = (int(v) for v in rng.integers(1, 24, 2))
        src = rng.integers(0, 4096, (m, n)).astype(np.uint16)
        dy, dx = (int(v) for v in rng.integers(-30, 31, 2))
        base = rng.integers(0, 1000, (m, n)).astype(np.float32)
        got = add_shifted(src, dy, dx, base.copy())
        want = base + ndimage.shift(src.astype(np.float32), (-dy, -dx), order=0, mode="nearest")
        assert_allclose(got, want, rtol=0, atol=0, err_msg=f"{(m, n, dy, dx)}")


def test_running_mean_blocks_hold_exactly_the_last_frames():
    # With blocks of 3 frames and K = 6, the mean is over the last 6 frames whenever a block has just been completed
    # and over the last 3 + j frames with j frames of the current block (reference: numpy's mean of the frames
    # moved back by scipy.ndimage.shift, whole pixels, rows rounded to an even number).
    rng = np.random.default_rng(12)
    rm = RunningMean(6, block=3, even_rows=True)
    frames, moves = [], []
    for t in range(20):
        frames.append(rng.integers(0, 4096, (20, 26)).astype(np.uint16))
        dy, dx = rng.uniform(-4, 4, 2)
        rm.push(frames[-1], dy, dx)
        moves.append((2 * round(dy / 2), round(dx)))
        j = (t + 1) % 3
        last = 6 if j == 0 or t < 3 else 3 + j
        last = min(last, t + 1)
        assert rm.n_frames == last
        aligned = [ndimage.shift(f.astype(np.float64), (-my, -mx), order=0, mode="nearest")
                   for f, (my, mx) in zip(frames[-last:], moves[-last:])]
        assert_allclose(rm.mean, np.mean(aligned, axis=0), rtol=1e-7, atol=0)
    assert rm._ring.shape == (2, 20, 26)  # constant memory: K / block sums
    with pytest.raises(ValueError, match="block"):
        RunningMean(6, block=4)


def test_running_mean_of_chosen_rows_equals_those_rows_of_the_whole_mean():
    # With rows=..., the mean holds the chosen rows (repeats allowed) of the whole motion-corrected mean: the
    # reference is numpy's mean of the frames moved back by scipy.ndimage.shift (whole pixels, nearest edges,
    # rows rounded to even numbers), indexed by those rows. Shifts reach past the edges, where rows repeat.
    rng = np.random.default_rng(13)
    rows = np.array([0, 1, 2, 9, 10, 11, 10, 20, 21])
    part = RunningMean(4, block=2, even_rows=True, rows=rows)
    frames, moves = [], []
    for t in range(11):
        frames.append(rng.integers(0, 4096, (22, 17)).astype(np.uint16))
        dy, dx = rng.uniform(-25, 25), rng.uniform(-6, 6)
        part.push(frames[-1], dy, dx)
        moves.append((2 * round(dy / 2), round(dx)))
    last = 4 if len(frames) % 2 == 0 else 3
    aligned = [ndimage.shift(f.astype(np.float64), (-my, -mx), order=0, mode="nearest")
               for f, (my, mx) in zip(frames[-last:], moves[-last:])]
    assert part.n_frames == last
    assert_allclose(part.mean, np.mean(aligned, axis=0)[rows], rtol=1e-7, atol=0)
    assert part._ring.shape == (2, rows.size, 17)  # only the chosen rows are kept
    with pytest.raises(ValueError, match="rows"):
        RunningMean(4, rows=[])
    with pytest.raises(ValueError, match="rows"):
        RunningMean(4, rows=[30]).push(frames[0])


def test_running_mean_with_even_rows_keeps_the_line_offset():
    # A bidirectional scan (ground truth made here): the content moves by odd numbers of rows between frames, and
    # the scanner shifts the odd *acquired* rows by 1.3 px. Moved back by even row shifts, the frames keep their
    # rows' parity and the mean keeps the offset; rounded to the nearest row, the two scan directions mix.
    from photometry_data import expose, field_of_view, fourier_shift_rows

    from qcmon.metrics.line_offset import line_offset_px

    rng = np.random.default_rng(13)
    content, _ = field_of_view((160 + 16, 256 + 16), mean_photons=4.0, rng=rng, n_cells=40)
    kept, mixed = RunningMean(10, block=5, even_rows=True), RunningMean(10, block=5)
    for t in range(10):
        dy = (-1, 1, 3, -3, 1)[t % 5]
        lam = np.roll(content, dy, axis=0)
        lam[1::2] = fourier_shift_rows(lam[1::2], 1.3)  # the scanner's offset, on the acquired rows
        frame = expose(np.clip(lam[8:-8, 8:-8], 0, None), gain=10.0, dark=100.0, read_noise=2.0, rng=rng)
        kept.push(frame, dy, 0.0)
        mixed.push(frame, dy, 0.0)
    assert abs(line_offset_px(kept.mean) - 1.3) < 0.1
    assert abs(line_offset_px(mixed.mean) - 1.3) > 0.3


def test_add_shifted_refuses_an_output_it_cannot_write_through_a_flat_view():
    from qcmon.metrics._imageops import add_shifted

    with pytest.raises(ValueError, match="C-contiguous"):
        add_shifted(np.ones((4, 6), np.uint16), 1, 1, np.zeros((6, 4), np.float32).T)
