"""The Cramér–Rao bound of a rigid shift (qcmon.metrics.shift_bound) and the registration held against it on
outside data (a real fluorescence image, tests/outside_data.py), plus the engine's handling of shifts beyond range."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats
from skimage.registration import phase_cross_correlation

from outside_data import detect, nuclei_2d, specimen_area, specimen_crop
from qcmon.engine import Engine, EngineSettings
from qcmon.frames import Frame
from qcmon.metrics.registration import ShiftEstimator
from qcmon.metrics.shift_bound import area_shift_crb, shift_crb, spectral_gradient


def _gaussian_spot(shape, centre, sigma):
    """A Gaussian spot integrated over each pixel (exact, from the normal CDF)."""
    def axis(n, c):
        x = np.arange(n)
        return stats.norm.cdf(x + 0.5, c, sigma) - stats.norm.cdf(x - 0.5, c, sigma)
    return np.outer(axis(shape[0], centre[0]), axis(shape[1], centre[1]))


@pytest.mark.parametrize("sigma, photons", [(2.0, 500.0), (2.5, 3000.0)])
def test_bound_of_a_gaussian_spot(sigma, photons):
    # Published value: a Gaussian spot of width s on pixels of size a with N photons and no background has a
    # localisation bound of sqrt((s^2 + a^2/12) / N) per axis (Mortensen, Churchman, Spudich & Flyvbjerg 2010,
    # Nat. Methods 7:377, the background-free limit of their eq. 6; Thompson, Larson & Webb 2002 without
    # pixelation). The pixel term is itself an approximation there, good for spots sampled at s >= 2 px (at 1.5 px
    # the spectral derivative of the pixel-integrated spot aliases): we hold ours within 2 %.
    img = _gaussian_spot((64, 64), (31.7, 32.2), sigma)
    sy, sx = shift_crb(img, photons / img.size)
    expected = math.sqrt((sigma ** 2 + 1 / 12) / photons)
    assert_allclose((sy, sx), (expected, expected), rtol=0.02)


def test_bound_scales_with_photons_and_background():
    img = nuclei_2d()[100:228, 100:228].astype(np.float64) + 1.0
    a = shift_crb(img, 1.0)
    b = shift_crb(img, 4.0)
    # Poisson information grows in proportion to the photon count: the bound falls as 1/sqrt (exact)
    assert_allclose(np.array(b) * 2.0, a, rtol=1e-9)
    # a uniform background adds noise and no information: the bound rises
    assert shift_crb(img, 1.0, background_photons=1.0)[0] > a[0]


def test_spectral_gradient_against_analytic_derivative():
    # A smooth blob inside the frame whose derivative is known in closed form (calculus).
    y, x = np.mgrid[0:96, 0:80].astype(np.float64)
    f = np.exp(-((x - 37.3) ** 2 + (y - 50.1) ** 2) / (2 * 5.0 ** 2))
    gy, gx = spectral_gradient(f)
    assert_allclose(gx, -(x - 37.3) / 25.0 * f, atol=1e-6)
    assert_allclose(gy, -(y - 50.1) / 25.0 * f, atol=1e-6)
    # Finite differences (numpy.gradient) understate the derivative of fine detail: on a pattern of period 3 px
    # the central difference's response is sin(w)/w = 0.41 of the true derivative (standard result).
    fine = np.sin(2 * np.pi * x / 3.0)
    gfy, gfx = spectral_gradient(fine)
    true_amp = 2 * np.pi / 3.0
    inner = (slice(8, -8), slice(8, -8))
    assert np.max(np.abs(gfx[inner])) == pytest.approx(true_amp, rel=0.05)
    assert np.max(np.abs(np.gradient(fine, axis=1)[inner])) < 0.5 * true_amp


def test_bound_over_the_usable_pixels():
    # Fisher information is a sum over pixels (Cramér 1946; the bound's own definition): leaving pixels out can only
    # raise the bound, pixels without structure carry none, and the information of two disjoint masks adds up.
    img = _gaussian_spot((64, 64), (20.3, 22.8), 2.0) + 1e-3
    everywhere = np.ones(img.shape, bool)
    assert shift_crb(img, 5.0, valid=everywhere) == shift_crb(img, 5.0)
    far = everywhere.copy()
    far[40:, 40:] = False  # far from the spot: no gradient there
    assert_allclose(shift_crb(img, 5.0, valid=far), shift_crb(img, 5.0), rtol=1e-6)
    half = everywhere.copy()
    half[:, :23] = False  # the spot's left half
    sy_h, sx_h = shift_crb(img, 5.0, valid=half)
    sy_o, sx_o = shift_crb(img, 5.0, valid=~half)
    sy, sx = shift_crb(img, 5.0)
    assert sy_h > sy and sx_h > sx
    # the two halves' informations (1/σ², the cross term vanishing by symmetry along rows) add to the whole's
    assert_allclose(sy_h ** -2 + sy_o ** -2, sy ** -2, rtol=1e-3)
    with pytest.raises(ValueError, match="valid"):
        shift_crb(img, 5.0, valid=np.ones((3, 3), bool))


def _spots(rng, n, sigma, size, margin):
    """f(dy, dx): a scene of Gaussian spots (closed form) moved by (dy, dx) scene px, sampled at whole scene px."""
    ys, xs = rng.uniform(margin, size - margin, (2, n))
    amps = rng.uniform(0.5, 2.0, n)
    y, x = np.mgrid[0:size, 0:size].astype(np.float64)

    def f(dy, dx):
        out = np.full((size, size), 0.2)
        for a, yc, xc in zip(amps, ys, xs):
            out += a * np.exp(-((y - dy - yc) ** 2 + (x - dx - xc) ** 2) / (2 * sigma ** 2))
        return out
    return f


@pytest.mark.parametrize("b", [2, 4])
def test_pixel_area_bound_is_the_brute_force_fisher_information(b):
    # Fisher information of Poisson pixels, I = sum (d lambda/d d)^2 / lambda (its definition: Cramér 1946; Ober,
    # Ram & Ward 2004), with d lambda/d d by central differences of the closed-form scene moved by 1e-4 detector px
    # and integrated by b x b detector pixels (tests/outside_data.specimen_area) — no transform involved. Spots of
    # 1.5 scene px are finer than the detector's grid (0.75 or 0.375 detector px): the frame is aliased.
    f = _spots(np.random.default_rng(3), 40, 1.5, 128, 12)
    n, p, h = 128 // b, 3.0, 1e-4
    frame = specimen_area(f(0, 0), b, (n, n), 0, 0)
    scale = p / frame.mean()

    def lam(dy, dx):
        return specimen_area(f(dy * b, dx * b), b, (n, n), 0, 0) * scale
    gy = (lam(h, 0) - lam(-h, 0)) / (2 * h)
    gx = (lam(0, h) - lam(0, -h)) / (2 * h)
    fisher = np.array([[np.sum(gy * gy / (frame * scale)), np.sum(gy * gx / (frame * scale))],
                       [np.sum(gx * gy / (frame * scale)), np.sum(gx * gx / (frame * scale))]])
    brute = np.sqrt(np.diag(np.linalg.inv(fisher)))
    assert_allclose(area_shift_crb(f(0, 0), b, p), brute, rtol=1e-4)  # measured within 1e-6
    # the spectral derivative of the sampled (aliased) frame is not the motion's derivative: shift_crb of the frame
    # is 0.97x the true bound at b = 2 and 0.72x at b = 4 here (measured)
    off = np.array(shift_crb(frame, p)) / brute
    assert np.all(np.abs(off - 1) > (0.02 if b == 2 else 0.2))


def test_pixel_area_bound_agrees_with_shift_crb_on_a_band_limited_scene():
    # Spots of 6 scene px (3 detector px at b = 2) hold nothing above the detector's Nyquist frequency (their
    # spectrum there is exp(-44) of its peak): the binned frame samples a band-limited function, whose motion
    # derivative is its spectral derivative (the sampling theorem), so both bounds must agree.
    f = _spots(np.random.default_rng(4), 12, 6.0, 160, 40)
    frame = specimen_area(f(0, 0), 2, (80, 80), 0, 0)
    assert_allclose(area_shift_crb(f(0, 0), 2, 2.0), shift_crb(frame, 2.0), rtol=1e-4)
    # factor 1 over the whole scene is shift_crb itself; a window takes the scene's derivative at its edges
    img = nuclei_2d()[:96, :96].astype(np.float64) + 1.0
    assert_allclose(area_shift_crb(img, 1, 1.5), shift_crb(img, 1.5), rtol=1e-12)
    win = area_shift_crb(img, 1, 1.5, window=(slice(8, 88), slice(8, 88)))
    assert_allclose(win, shift_crb(img[8:88, 8:88], 1.5), rtol=0.05)
    with pytest.raises(ValueError, match="multiple of factor=4"):
        area_shift_crb(img, 4, 1.5, window=(slice(0, 90), slice(0, 96)))
    with pytest.raises(ValueError, match="factor"):
        area_shift_crb(img, 1.5, 1.5)


def test_estimator_against_the_bound_on_a_real_specimen():
    # Outside data: the real nuclei image (stardist wheel) moved by known subpixel shifts (specimen_crop: cubic
    # spline, real edges), EMVA 1288 detector (Poisson x gain 20 + offset 100), 1.5 photons/px; the reference is
    # the mean of 30 such frames, as the engine builds it. Measured at 480 px: 5-6x the bound with a 30-frame
    # reference (the reference's own noise dominates; 2x with a noise-free one); scikit-image 8-10x.
    rng = np.random.default_rng(5)
    img = nuclei_2d().astype(np.float64) + 1.0
    shape = (256, 256)
    photons, gain, dark = 1.5, 20.0, 100.0
    scale = photons / img.mean()
    clean = specimen_crop(img, shape, 0.0, 0.0) * scale
    reference = np.mean([detect(clean, rng, gain=gain, offset=dark) for _ in range(30)], axis=0)
    est = ShiftEstimator(reference, dark_level=dark, gain=gain, read_noise_dn=0.0, reference_frames=30)
    ours, theirs = [], []
    for _ in range(16):
        d = rng.uniform(-6, 6, 2)
        frame = detect(specimen_crop(img, shape, *d) * scale, rng, gain=gain, offset=dark)
        r = est.estimate(frame)
        ours.append((r.dy_px - d[0], r.dx_px - d[1]))
        s, _, _ = phase_cross_correlation(reference, frame.astype(np.float64), upsample_factor=100)
        theirs.append((-s[0] - d[0], -s[1] - d[1]))
    bound = np.array(shift_crb(clean, photons))
    rms = np.sqrt(np.mean(np.square(ours), axis=0))
    rms_sk = np.sqrt(np.mean(np.square(theirs), axis=0))
    print("RMS / bound:", rms / bound, "scikit-image:", rms_sk / bound)
    assert np.all(rms < 8.0 * bound), (rms, bound)
    assert np.mean(rms) < 0.8 * np.mean(rms_sk)


def test_saturated_stationary_patch_does_not_capture_the_shift():
    # A bright patch fixed on the detector (e.g. a reflection), saturated in every frame, over a real specimen that
    # moves: with the patch's pixels marked unusable the shift is the specimen's, not zero.
    rng = np.random.default_rng(9)
    img = nuclei_2d().astype(np.float64) + 1.0
    shape = (192, 192)
    scale = 3.0 / img.mean()
    patch = (slice(60, 110), slice(70, 130))

    def frame_at(d):
        f = detect(specimen_crop(img, shape, *d) * scale, rng, gain=20.0, offset=100.0, bits=12)
        f[patch] = 4095
        return f

    reference = np.mean([frame_at((0.0, 0.0)) for _ in range(20)], axis=0)
    valid = np.ones(shape, bool)
    valid[patch] = False
    est = ShiftEstimator(reference, dark_level=100.0, reference_valid=valid)
    d = (2.6, -3.3)
    frame = frame_at(d)
    r = est.estimate(frame, valid=valid)
    # Measured: within 0.13 px of the planted shift on 4 seeds × 3 shifts with the likelihood over the usable
    # pixels (phase correlation alone: up to 0.31 px short, the masked region's edges pulling toward zero);
    # without the masks the patch holds the estimate tens of px off.
    assert_allclose((r.dy_px, r.dx_px), d, atol=0.25)
    bad = ShiftEstimator(reference, dark_level=100.0).estimate(frame)
    assert max(abs(bad.dy_px - d[0]), abs(bad.dx_px - d[1])) > 1.0


def test_engine_reports_a_shift_beyond_range_as_blank_and_problem():
    rng = np.random.default_rng(2)
    img = nuclei_2d().astype(np.float64) + 1.0
    shape = (128, 128)
    scale = 5.0 / img.mean()
    eng = Engine(EngineSettings(frame_rate_hz=30.0, max_shift_px=16.0))
    rows = []
    shifts = [(0.0, 0.0)] * 32 + [(40.0, -45.0), (1.0, 0.5)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        for i, d in enumerate(shifts):
            data = detect(specimen_crop(img, shape, *d) * scale, rng, gain=20.0, offset=100.0)
            rows += eng.process(Frame(data=data, index=i, time_s=i / 30.0, source="run.tif", page=i))
    problems = eng.take_problems()
    assert len(problems) == 1 and "frame 32" in problems[0] and "run.tif page 32" in problems[0]
    assert math.isnan(rows[32]["dx_px"]) and math.isnan(rows[32]["dy_px"])
    assert_allclose((rows[33]["dy_px"], rows[33]["dx_px"]), (1.0, 0.5), atol=0.2)
    assert eng.take_problems() == []
