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


def _bidirectional_outside(shape, offset, photons, rng):
    """Expected photons of a real fluorescence image (the nuclei of tests/outside_data.py, stardist wheel) as a
    bidirectional scan writes it: the odd rows' content moved by ``offset`` px along the columns (cubic spline,
    specimen_crop), the even rows' not."""
    from outside_data import nuclei_2d, specimen_crop

    img = nuclei_2d().astype(np.float64)
    spec = img * (photons / img.mean())
    lam = specimen_crop(spec, shape, 0.0, 0.0, margin=8)
    lam[1::2] = specimen_crop(spec, shape, 0.0, offset, margin=8)[1::2]
    return lam


def test_clipped_pixels_do_not_hold_the_offset_at_zero():
    # A stationary patch at the 12-bit ceiling over 12 % of a real specimen (EMVA 1288 model: outside_data.detect):
    # the patch is the same in both scan directions, so its pixels and its edges say "offset 0". Measured on 6
    # seeds at 256², 20 photons/px: 1.20 px RMS with the patch counted, 0.14 px without it (0.13 px on the same
    # frames without any patch).
    from outside_data import detect

    errors, counted = [], []
    for seed in range(4):
        rng = np.random.default_rng(40 + seed)
        d = rng.uniform(-2.0, 2.0)
        frame = detect(_bidirectional_outside((256, 256), d, 20.0, rng), rng, gain=3.0, offset=100.0,
                       read_noise_dn=8.0, bits=12)
        frame[40:120, 100:200] = 4095
        errors.append(line_offset_px(frame, valid=frame < 4095) - d)
        counted.append(line_offset_px(frame) - d)
    assert math.sqrt(np.mean(np.square(errors))) < 0.3, errors
    assert math.sqrt(np.mean(np.square(counted))) > 0.8  # the check can fail: counted, the patch holds it
    with pytest.raises(ValueError, match="valid"):
        line_offset_px(frame, valid=np.ones((4, 4), bool))


def test_engine_line_offset_leaves_clipped_pixels_out():
    # Through the engine (its running mean of the line rows) on the same outside data: the patch appears after the
    # reference and stays; the line offset of the last frames is the planted one, not zero.
    from outside_data import detect

    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    rng = np.random.default_rng(45)
    lam = _bidirectional_outside((128, 128), 1.6, 20.0, rng)
    eng = Engine(EngineSettings(frame_rate_hz=30.0, reference_frames=10))
    rows = []
    for i in range(60):
        f = detect(lam, rng, gain=3.0, offset=100.0, read_noise_dn=8.0, bits=12)
        if i >= 15:
            f[20:60, 50:100] = 4095
        rows += eng.process(Frame(f, i, time_s=i / 30.0))
    rows += eng.flush()
    last = rows[-1]["line_offset_px"]
    assert abs(last - 1.6) < 0.2, last
