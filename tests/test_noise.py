"""Tests of the Immerkær noise estimate."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose
from scipy import ndimage

from qcmon.metrics.noise import immerkaer_sigma


def _paper_formula(image):
    """Immerkær 1996, eq. 5, written out with the full 3x3 kernel (scipy.ndimage.convolve), in float64."""
    kernel = np.array([[1, -2, 1], [-2, 4, -2], [1, -2, 1]], float)
    response = ndimage.convolve(np.asarray(image, float), kernel)[1:-1, 1:-1]
    h, w = image.shape
    return np.sqrt(np.pi / 2) / (6 * (w - 2) * (h - 2)) * np.abs(response).sum()


def _skimage_estimate_sigma():
    pytest.importorskip("pywt", reason="skimage.restoration.estimate_sigma needs PyWavelets")
    from skimage.restoration import estimate_sigma

    return estimate_sigma


@pytest.mark.parametrize("sigma", [0.5, 3.0, 40.0])
def test_known_gaussian_sigma(sigma):
    # Immerkær 1996: unbiased for white Gaussian noise; relative SE ~ 0.3 % at 512 x 512.
    rng = np.random.default_rng(3)
    image = 1000 + rng.normal(0, sigma, (512, 512))
    assert_allclose(immerkaer_sigma(image), sigma, rtol=0.02)


def test_matches_paper_formula_exactly():
    # The separable float32 computation equals the paper's 3x3 convolution (Immerkær 1996, eq. 5).
    rng = np.random.default_rng(4)
    image = rng.integers(0, 4096, (200, 300)).astype(np.uint16)
    assert_allclose(immerkaer_sigma(image), _paper_formula(image), rtol=1e-5)


def test_agrees_with_skimage_wavelet_estimate_on_noise():
    # skimage.restoration.estimate_sigma (Donoho & Johnstone wavelet MAD) agrees within a few % on white noise.
    estimate_sigma = _skimage_estimate_sigma()
    rng = np.random.default_rng(5)
    image = rng.normal(100, 7.0, (512, 512))
    assert_allclose(immerkaer_sigma(image), estimate_sigma(image), rtol=0.03)


def test_agrees_with_skimage_on_smooth_image_with_noise():
    # On smooth structure both ignore the signal; agreement within 5 % (structure inflates both slightly).
    estimate_sigma = _skimage_estimate_sigma()
    rng = np.random.default_rng(6)
    smooth = 500 * ndimage.gaussian_filter(rng.random((512, 512)), 10)
    image = smooth + rng.normal(0, 5.0, smooth.shape)
    ours, ref = immerkaer_sigma(image), estimate_sigma(image)
    assert_allclose(ours, ref, rtol=0.05)
    assert_allclose(ours, 5.0, rtol=0.03)


def test_row_step_subsample_is_unbiased():
    rng = np.random.default_rng(7)
    image = rng.normal(0, 10.0, (512, 512)).astype(np.float32)
    assert_allclose(immerkaer_sigma(image, row_step=4), 10.0, rtol=0.02)


def test_quadratic_surface_gives_zero():
    # The kernel annihilates locally quadratic signals (Immerkær 1996, section 2).
    yy, xx = np.mgrid[0:64, 0:64].astype(float)
    assert immerkaer_sigma(0.01 * xx**2 + 0.3 * yy + 0.002 * yy**2 + 5) == pytest.approx(0.0, abs=1e-3)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.int16, np.float32])
def test_dtypes_agree(dtype):
    rng = np.random.default_rng(8)
    image = np.clip(rng.normal(100, 5, (128, 128)), 0, 255).round()
    assert_allclose(immerkaer_sigma(image.astype(dtype)), _paper_formula(image), rtol=1e-5)


@settings(max_examples=30, deadline=None)
@given(value=st.integers(0, 65535), shape=st.tuples(st.integers(3, 40), st.integers(3, 40)))
def test_constant_frame_is_zero(value, shape):
    assert immerkaer_sigma(np.full(shape, value, np.uint16)) == 0.0


def test_bad_input():
    with pytest.raises(ValueError, match="image"):
        immerkaer_sigma(np.zeros((2, 10)))
    with pytest.raises(ValueError, match="image"):
        immerkaer_sigma(np.zeros(10))
    with pytest.raises(ValueError, match="row_step"):
        immerkaer_sigma(np.zeros((10, 10)), row_step=0)


def test_on_simulated_dark_frames():
    # qcmon's simulator with no light: the frames are dark level + read noise (truth column read_noise_dn).
    from qcmon.simulate import SimConfig, simulate

    result = simulate(SimConfig(n_frames=3, mean_photons_per_px=1e-9, read_noise_dn=8.0, dark_dn=100.0))
    sigma = np.mean([immerkaer_sigma(p) for p in result.pages])
    expected = np.sqrt(result.truth["read_noise_dn"][0] ** 2 + 1 / 12)  # + rounding to integers
    assert_allclose(sigma, expected, rtol=0.05)
