"""Tests of photon transfer (EMVA 1288 mean–variance method)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from photometry_data import expose, field_of_view, fourier_shift_rows

from qcmon.metrics.photon_transfer import (
    PhotonTransfer,
    estimate_dark_level,
    photons_per_px,
    shot_snr,
)


def _session(*, mean_photons, gain, dark, read_noise, n_frames=120, shape=(192, 192), activity=0.05,
             motion_px=0.3, seed=0, max_value=65535, **kw):
    """Feed a simulated session with cell activity and residual subpixel motion; return the result."""
    rng = np.random.default_rng(seed)
    lam, masks = field_of_view(shape, mean_photons=mean_photons, rng=rng, n_cells=25)
    pt = PhotonTransfer(max_value=max_value, read_noise_dn=read_noise, pair_step=1, row_step=1, **kw)
    previous = None
    for _ in range(n_frames):
        active = lam.copy()
        for mask in masks:  # transients of ΔF/F up to 100 % in a minority of cells
            if rng.random() < activity:
                active += mask * lam.max() * rng.uniform(0.2, 1.0)
        dx = rng.uniform(-motion_px, motion_px)  # residual motion left after integer alignment
        active = np.clip(fourier_shift_rows(active, dx), 0, None)
        frame = expose(active, gain=gain, dark=dark, read_noise=read_noise, rng=rng, max_value=max_value)
        pt.update(frame, previous)
        previous = frame
    return pt.result()


@pytest.mark.parametrize(
    "mean_photons, gain, dark, read_noise",
    [(0.5, 1.0, 50.0, 1.0), (0.5, 100.0, 500.0, 8.0), (20.0, 1.0, 50.0, 2.0), (20.0, 100.0, 500.0, 10.0),
     (3.0, 10.0, 200.0, 4.0)],
)
def test_gain_and_dark_within_5_percent(mean_photons, gain, dark, read_noise):
    # Ground truth of the simulation; accuracy target 5 % (EMVA 1288 model: Poisson x K + dark + read noise).
    res = _session(mean_photons=mean_photons, gain=gain, dark=dark, read_noise=read_noise)
    assert_allclose(res.gain_dn_per_photon, gain, rtol=0.05)
    assert_allclose(res.dark_level_dn, dark, rtol=0.05)
    assert res.n_points >= 10 and res.r2 > 0.9


def test_without_configured_read_noise_bias_is_read_variance_over_gain():
    # Documented bias: dark underestimated by read_noise**2 / K when read noise is not configured.
    rng_read, gain, dark = 6.0, 12.0, 300.0
    res = _session(mean_photons=4.0, gain=gain, dark=dark, read_noise=rng_read, n_frames=60, motion_px=0.0)
    pt = PhotonTransfer(max_value=65535, pair_step=1, row_step=1)
    rng = np.random.default_rng(11)
    lam, _ = field_of_view((160, 160), mean_photons=4.0, rng=rng, n_cells=20)
    previous = None
    for _ in range(60):
        frame = expose(lam, gain=gain, dark=dark, read_noise=rng_read, rng=rng)
        pt.update(frame, previous)
        previous = frame
    r = pt.result()
    assert math.isnan(r.read_noise_dn)
    assert_allclose(r.dark_level_dn, dark - (rng_read**2 + 1 / 12) / gain, atol=0.02 * dark)
    assert_allclose(res.dark_level_dn, dark, rtol=0.02)


def test_binomial_split_of_poisson_pairs():
    # For a, b iid Poisson, (a - b) given a + b = n is 2 Binomial(n, 1/2) - n: var = n exactly (textbook
    # Poisson property; e.g. Johnson, Kemp & Kotz, Univariate Discrete Distributions, from memory).
    rng = np.random.default_rng(2)
    lam = rng.uniform(0.5, 20, 400_000)
    a, b = rng.poisson(lam), rng.poisson(lam)
    n, d = a + b, a - b
    for value in (2, 5, 10, 20):
        sel = n == value
        assert_allclose(np.mean(d[sel] ** 2), value, rtol=0.03)


def test_saturated_pixels_do_not_bias_gain():
    res = _session(mean_photons=10.0, gain=20.0, dark=100.0, read_noise=3.0, max_value=700, n_frames=80)
    assert_allclose(res.gain_dn_per_photon, 20.0, rtol=0.05)


def test_pair_step_and_none_previous():
    pt = PhotonTransfer(max_value=4095, pair_step=3)
    rng = np.random.default_rng(4)
    frame = rng.poisson(np.linspace(1, 50, 32 * 32).reshape(32, 32)).astype(np.uint16) + 100
    assert pt.update(frame, None) is False
    used = [pt.update(frame, frame[::-1]) for _ in range(6)]
    assert used == [True, False, False, True, False, False]


@pytest.mark.parametrize("dtype", [np.uint16, np.int16, np.float32])
def test_constant_frames_nan_with_warning(dtype):
    pt = PhotonTransfer(max_value=30000, pair_step=1)
    frame = np.full((32, 32), 500, dtype)
    for _ in range(3):
        pt.update(frame, frame)
    with pytest.warns(UserWarning, match="undefined"):
        res = pt.result()
    assert math.isnan(res.gain_dn_per_photon) and math.isnan(res.dark_level_dn)


def test_helpers():
    assert photons_per_px(250.0, 10.0) == 25.0
    assert math.isnan(photons_per_px(250.0, 0.0))
    assert shot_snr(25.0) == 5.0  # Poisson: SNR = sqrt(N) (Janesick 2007)
    assert math.isnan(shot_snr(-1.0))
    assert_allclose(shot_snr(np.array([0.0, 4.0])), [0.0, 2.0])


def test_dark_level_fallback_percentile():
    rng = np.random.default_rng(3)
    lam, _ = field_of_view((128, 128), mean_photons=0.5, rng=rng)
    frame = expose(lam, gain=30.0, dark=200.0, read_noise=2.0, rng=rng)
    # Low percentile: below the dark level by ~2.3 read-noise sigmas (normal quantile, handbook value).
    assert_allclose(estimate_dark_level(frame, percentile=1.0), 200.0 - 2.33 * 2.0, atol=1.5)
    with pytest.raises(ValueError, match="percentile"):
        estimate_dark_level(frame, percentile=101)


def test_bad_input():
    with pytest.raises(ValueError, match="floor"):
        PhotonTransfer(max_value=10, floor=20)
    with pytest.raises(ValueError, match="n_bins"):
        PhotonTransfer(max_value=10, n_bins=2)
    with pytest.raises(ValueError, match="read_noise_dn"):
        PhotonTransfer(max_value=10, read_noise_dn=-1)
    pt = PhotonTransfer(max_value=10)
    with pytest.raises(ValueError, match="shape"):
        pt.update(np.zeros((8, 8)), np.zeros((8, 9)))


def test_on_simulated_session():
    # qcmon's simulator (detector truth: gain, dark level, read noise) with its default activity and motion.
    from qcmon.simulate import SimConfig, simulate

    result = simulate(SimConfig(n_frames=120, gain_dn_per_photon=20.0, dark_dn=200.0, read_noise_dn=3.0))
    truth = result.truth
    pt = PhotonTransfer(max_value=4095, read_noise_dn=float(truth["read_noise_dn"][0]), pair_step=1, row_step=2)
    for previous, frame in zip(result.pages[:-1], result.pages[1:]):
        pt.update(frame, previous)
    res = pt.result()
    assert_allclose(res.gain_dn_per_photon, truth["gain"][0], rtol=0.05)
    assert_allclose(res.dark_level_dn, truth["dark_level"][0], rtol=0.05)
    photons = photons_per_px(result.pages[60].mean() - res.dark_level_dn, res.gain_dn_per_photon)
    assert_allclose(photons, truth["mean_photons_per_px"][60], rtol=0.1)
