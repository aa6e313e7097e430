"""The outside data are what tests/outside_data.py says they are (so that a check resting on them can fail)."""

from __future__ import annotations

import numpy as np
from numpy.testing import assert_allclose

from outside_data import detect, emva1288_modules, nuclei_2d, nuclei_3d, specimen_crop


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


def test_detector_model_mean_and_variance_follow_emva1288():
    # EMVA 1288 release 4.0, eq. (4), (6): mu_y = K mu_e + mu_dark, sigma_y^2 = K^2 mu_e + sigma_d^2 (+ 1/12)
    rng = np.random.default_rng(1)
    y = detect(np.full((400, 400), 50.0), rng, gain=2.5, offset=100, read_noise_dn=8).astype(float)
    assert_allclose(y.mean(), 2.5 * 50 + 100, rtol=0.002)
    assert_allclose(y.var(), 2.5 ** 2 * 50 + 64 + 1 / 12, rtol=0.02)


def test_emva1288_reference_implementation_imports():
    process, routines = emva1288_modules()
    assert hasattr(routines, "get_int_imgs") or hasattr(process, "Data1288")
