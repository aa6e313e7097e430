"""The outside data are what tests/outside_data.py says they are (so that a check resting on them can fail)."""

from __future__ import annotations

import numpy as np
from numpy.testing import assert_allclose

import pytest
from scipy import ndimage
from skimage.transform import downscale_local_mean

from outside_data import (detect, emva1288_modules, fourier_mover, nuclei_2d, nuclei_3d, specimen_area, specimen_crop,
                          specimen_fourier)


def test_nuclei_images_are_the_documented_real_images():
    a, v = nuclei_2d(), nuclei_3d()
    assert a.shape == (512, 512) and a.dtype == np.uint16
    assert v.shape == (31, 61, 57) and v.dtype == np.uint16
    # a real fluorescence image: dark background, bright sparse nuclei (values as read from the file)
    assert np.percentile(a, 50) < np.percentile(a, 99) / 3


def test_specimen_crop_moves_content_by_the_given_shift():
    # scikit-image's phase_cross_correlation (the peer library) finds the shift we put in, sign flipped
    from skimage.registration import phase_cross_correlation

    img = nuclei_2d().astype(float)
    ref = specimen_crop(img, (256, 256), 0.0, 0.0)
    mov = specimen_crop(img, (256, 256), 3.25, -5.5)
    shift, _, _ = phase_cross_correlation(ref, mov, upsample_factor=20)
    assert_allclose(-shift, [3.25, -5.5], atol=0.1)


def test_fourier_mover_is_scipy_fourier_shift_of_the_mirrored_image():
    # Reference: scipy.ndimage.fourier_shift (the shift theorem) of the image's even extension, real part, cropped.
    img = nuclei_2d()[:96, :80].astype(float)
    big = np.pad(img, ((0, 96), (0, 80)), mode="symmetric")
    move = fourier_mover(img)
    for dy, dx in ((0.0, 0.0), (1.37, -2.5), (-3.5, 0.25)):
        want = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(big), (dy, dx))).real[8:8 + 80, 4:4 + 72]
        assert_allclose(move((80, 72), dy, dx), want, atol=1e-9 * img.max())
    # a whole-pixel shift is plain slicing of the image (the interpolant passes through its samples)
    assert_allclose(specimen_fourier(img, (80, 72), 3.0, -4.0), img[5:85, 8:80], atol=1e-9 * img.max())
    # the mirrored copy may not enter the window: at most 8 px down, 4 px across here
    with pytest.raises(ValueError, match="mirrored copy"):
        move((80, 72), 8.5, 0.0)
    with pytest.raises(ValueError, match="mirrored copy"):
        move((80, 72), 0.0, -4.01)


def test_pixel_area_mover_is_downscale_local_mean_of_the_moved_scene():
    # Reference: skimage.transform.downscale_local_mean of the scene moved by whole scene pixels (numpy.roll).
    scene = nuclei_2d()[:128, :128].astype(float)
    for b, (dy, dx) in ((2, (1.5, -3.0)), (4, (-2.25, 0.75)), (4, (0.0, 0.0))):
        iy, ix = round(dy * b), round(dx * b)
        h, w = 128 // b - 8, 128 // b - 6
        top, left = (128 - h * b) // 2, (128 - w * b) // 2
        rolled = np.roll(scene, (iy, ix), axis=(0, 1))[top:top + h * b, left:left + w * b]
        assert_allclose(specimen_area(scene, b, (h, w), dy, dx), downscale_local_mean(rolled, (b, b)), rtol=1e-12)
    with pytest.raises(ValueError, match="multiple of 1/4"):
        specimen_area(scene, 4, (24, 24), 0.3, 0.0)
    with pytest.raises(ValueError, match="does not fit"):
        specimen_area(scene, 4, (30, 30), 2.0, 0.0)


def test_detector_model_mean_and_variance_follow_emva1288():
    # EMVA 1288 release 4.0, eq. (4), (6): mu_y = K mu_e + mu_dark, sigma_y^2 = K^2 mu_e + sigma_d^2 (+ 1/12)
    rng = np.random.default_rng(1)
    y = detect(np.full((400, 400), 50.0), rng, gain=2.5, offset=100, read_noise_dn=8).astype(float)
    assert_allclose(y.mean(), 2.5 * 50 + 100, rtol=0.002)
    assert_allclose(y.var(), 2.5 ** 2 * 50 + 64 + 1 / 12, rtol=0.02)


def test_emva1288_reference_implementation_imports():
    process, routines = emva1288_modules()
    assert hasattr(routines, "get_int_imgs") or hasattr(process, "Data1288")
