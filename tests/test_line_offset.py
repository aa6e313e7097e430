"""Tests of the bidirectional-scan line offset."""

from __future__ import annotations

import math

import numpy as np
import pytest
from photometry_data import bidirectional_field, expose, fourier_shift_rows

from qcmon.metrics.line_offset import line_offset_px


@pytest.mark.parametrize("mean_photons", [1.0, 5.0])
@pytest.mark.parametrize("offset", [-3.0, -1.37, -0.4, 0.0, 0.25, 0.8, 2.1, 3.0])
def test_recovers_true_offset_at_low_light(offset, mean_photons):
    # Ground truth: odd rows Fourier-shifted by `offset` in a larger field, then cropped (no wrap-around).
    rng = np.random.default_rng(int(100 * offset) % 997 + int(mean_photons))
    lam = bidirectional_field((512, 512), offset, mean_photons=mean_photons, rng=rng)
    frame = expose(lam, gain=12.0, dark=200.0, read_noise=3.0, rng=rng)
    assert abs(line_offset_px(frame) - offset) < 0.1


def test_sign_convention_with_integer_roll():
    # + means the odd rows' content moved toward increasing column (qcmon convention).
    rng = np.random.default_rng(1)
    image = rng.random((64, 256))
    from scipy import ndimage

    image = ndimage.gaussian_filter(image, 2.0, mode="wrap")
    image[1::2] = np.roll(image[1::2], 2, axis=1)
    assert line_offset_px(image) == pytest.approx(2.0, abs=0.05)


def test_rows_without_vertical_structure_exact():
    rng = np.random.default_rng(2)
    from scipy import ndimage

    row = ndimage.gaussian_filter1d(rng.random(600), 3.0, mode="wrap")
    image = np.tile(row, (100, 1))
    image[1::2] = fourier_shift_rows(image[1::2], 1.3)
    assert line_offset_px(image[:, 40:-40]) == pytest.approx(1.3, abs=0.01)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.int16, np.float32])
def test_dtypes(dtype):
    rng = np.random.default_rng(3)
    lam = bidirectional_field((128, 256), 1.5, mean_photons=20.0, rng=rng)
    frame = np.clip(lam * 5, 0, 120).astype(dtype)
    assert line_offset_px(frame) == pytest.approx(1.5, abs=0.15)


def test_constant_frame_nan_with_warning():
    with pytest.warns(UserWarning, match="no structure"):
        assert math.isnan(line_offset_px(np.full((32, 32), 7, np.uint16)))


def test_bad_input():
    with pytest.raises(ValueError, match="frame"):
        line_offset_px(np.zeros((2, 32)))
    with pytest.raises(ValueError, match="row_step"):
        line_offset_px(np.zeros((8, 32)), row_step=0)


def test_on_simulated_session():
    # qcmon's simulator plants the bidirectional offset (truth column line_offset_px); 256 x 256 at 1.5 photons/px.
    from qcmon.simulate import SimConfig, simulate

    result = simulate(SimConfig(n_frames=12, line_offset_px=-1.7))
    estimates = [line_offset_px(page) for page in result.pages]
    assert abs(np.median(estimates) - result.truth["line_offset_px"][0]) < 0.1


@pytest.mark.parametrize("shape, row_step", [((512, 300), 7), ((33, 64), 1), ((34, 64), 2), ((3, 16), 1)])
def test_offset_from_its_rows_only_equals_the_whole_frame(shape, row_step):
    # line_offset_rows is line_offset_px on the rows line_rows names: the same value, to the last bit (the
    # reference is line_offset_px itself, whose accuracy the tests above check against planted offsets).
    from qcmon.metrics.line_offset import line_offset_rows, line_rows

    rng = np.random.default_rng(shape[0])
    lam = bidirectional_field(shape, 1.3, mean_photons=3.0, rng=rng)
    frame = expose(lam, gain=12.0, dark=200.0, read_noise=3.0, rng=rng)
    above, odd, below = line_rows(shape[0], row_step=row_step)
    assert np.array_equal(odd - above, np.ones_like(odd)) and np.all(odd % 2 == 1)
    whole = line_offset_px(frame, row_step=row_step)
    assert line_offset_rows(frame[above], frame[odd], frame[below]) == whole
    if shape[0] >= 256:  # enough rows for the planted offset to show (target of the tests above: 0.1 px)
        assert abs(whole - 1.3) < 0.1
    with pytest.raises(ValueError, match="one shape"):
        line_offset_rows(frame[above], frame[odd][:, 1:], frame[below])
    with pytest.raises(ValueError, match="3 rows"):
        line_rows(2)
