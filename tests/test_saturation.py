"""Tests of saturated and clipped pixel fractions."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from qcmon.metrics.saturation import detector_max, saturation_fractions


def test_exact_fractions():
    frame = np.full((10, 10), 100, np.uint16)
    frame[0, :7] = 4095
    frame[1, :3] = 0
    assert saturation_fractions(frame, max_value=4095) == (0.07, 0.03)
    assert saturation_fractions(frame, max_value=4095, floor=100) == (0.07, 0.93)


def test_detector_max():
    # numpy.iinfo ranges and 2**bits - 1 (common practice, no source).
    assert detector_max(np.uint16) == 65535
    assert detector_max(np.uint8) == 255
    assert detector_max(np.int16) == 32767
    assert detector_max(np.uint16, bit_depth=12) == 4095
    assert detector_max(np.float32) == math.inf
    assert detector_max(np.float32, bit_depth=14) == 16383
    with pytest.raises(ValueError, match="bit_depth"):
        detector_max(np.uint8, bit_depth=12)
    with pytest.raises(ValueError, match="bit_depth"):
        detector_max(np.int16, bit_depth=16)
    with pytest.raises(ValueError, match="dtype"):
        detector_max(np.bool_)


@settings(max_examples=60, deadline=None)
@given(frame=hnp.arrays(st.sampled_from([np.uint8, np.uint16, np.int16]), hnp.array_shapes(min_dims=2, max_dims=2, max_side=30)),
       hi=st.integers(1, 300), lo=st.integers(-5, 0))
def test_equals_direct_count(frame, hi, lo):
    sat, clip = saturation_fractions(frame, max_value=hi, floor=lo)
    assert sat == np.count_nonzero(frame >= hi) / frame.size
    assert clip == np.count_nonzero(frame <= lo) / frame.size


def test_float_with_nan_counts_neither():
    frame = np.array([[np.nan, 1.0], [0.0, 10.0]], np.float32)
    assert saturation_fractions(frame, max_value=10.0) == (0.25, 0.25)


def test_bad_input():
    with pytest.raises(ValueError, match="floor"):
        saturation_fractions(np.zeros((4, 4)), max_value=0, floor=0)
    with pytest.raises(ValueError, match="frame"):
        saturation_fractions(np.zeros(4), max_value=10)


def test_on_simulated_session():
    # qcmon's simulator records the saturated and clipped fractions of each noisy frame.
    from qcmon.simulate import SimConfig, simulate

    result = simulate(SimConfig(n_frames=5, mean_photons_per_px=30.0, bits=12))
    truth = result.truth
    assert truth["saturated_frac"].max() > 0
    for i, page in enumerate(result.pages):
        sat, clip = saturation_fractions(page, max_value=detector_max(page.dtype, bit_depth=12))
        assert sat == truth["saturated_frac"][i]
        assert clip == truth["clipped_frac"][i]
