"""Tests of photon transfer (EMVA 1288 mean–variance method)."""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from photometry_data import expose, field_of_view, fourier_shift_rows

from qcmon.metrics.photon_transfer import (
    MAX_DARK_SE_DN,
    PhotonTransfer,
    estimate_dark_level,
    k3_from_sums,
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


def test_without_dark_frames_or_triples_the_dark_level_is_blank_with_a_lower_bound():
    # Without dark frames, read noise or frame triples the line's intercept gives only a lower bound, low by
    # read_noise**2 / K (EMVA 1288 line: intercept = s² - K·D); the dark level is blank with the reason.
    rng_read, gain, dark = 6.0, 12.0, 300.0
    res = _session(mean_photons=4.0, gain=gain, dark=dark, read_noise=rng_read, n_frames=60, motion_px=0.0)
    assert_allclose(res.dark_level_dn, dark, rtol=0.02)  # read noise given
    pt = PhotonTransfer(max_value=65535, pair_step=1, row_step=1)
    rng = np.random.default_rng(11)
    lam, _ = field_of_view((160, 160), mean_photons=4.0, rng=rng, n_cells=20)
    previous = None
    for _ in range(60):
        frame = expose(lam, gain=gain, dark=dark, read_noise=rng_read, rng=rng)
        pt.update(frame, previous)
        previous = frame
    r = pt.result()
    assert math.isnan(r.read_noise_dn) and math.isnan(r.dark_level_dn) and r.dark_origin == ""
    assert "dark level unknown" in r.bias
    assert_allclose(r.dark_floor_dn, dark - (rng_read**2 + 1 / 12) / gain, atol=0.02 * dark)


def test_k3_from_sums_is_scipy_kstat():
    # scipy.stats.kstat(x, 3) is the unbiased k-statistic (Fisher 1930): the running sums give the same number.
    from scipy import stats

    rng = np.random.default_rng(12)
    for x in (rng.gamma(2.0, 3.0, 5000), rng.poisson(4.0, 300) * 2.5 - 7.0, rng.normal(0, 8, 50)):
        k3 = k3_from_sums(x.size, x.sum(), (x * x).sum(), (x**3).sum())
        assert_allclose(k3, stats.kstat(x, 3), rtol=1e-9, atol=1e-9 * np.std(x) ** 3)


def _triples(frames, **kw):
    pt = PhotonTransfer(max_value=kw.pop("max_value", 4095), pair_step=1, row_step=1, **kw)
    for i in range(1, len(frames)):
        pt.update(frames[i], frames[i - 1], frames[i - 2] if i >= 2 else None)
    return pt


def test_running_third_cumulant_equals_kstat_of_the_triple_samples():
    # The accumulated sums of one frame triple give scipy.stats.kstat of the used samples Δ = a - 2b + c (its
    # third cumulant; scipy is the reference library), on the real specimen under the EMVA 1288 camera model.
    from scipy import stats
    from outside_data import detect, nuclei_2d, specimen_crop

    rng = np.random.default_rng(13)
    lam = specimen_crop(nuclei_2d().astype(float), (96, 96), 0.0, 0.0) + 2.0
    frames = [detect(lam, rng, gain=2.5, offset=100, read_noise_dn=8, bits=12) for _ in range(4)]
    pt = _triples(frames[:3])  # the line forms on the first pair; the second call adds the first triple
    acc_before = pt._k3.copy()
    x, nbr, delta, ok = pt._triple_samples(frames[3], frames[2], frames[1])  # judged by the line before the pair
    pt.update(frames[3], frames[2], frames[1])
    acc = pt._k3 - acc_before
    assert acc[0].sum() == ok.sum() > 5000
    k3 = k3_from_sums(*(acc[i].sum() for i in (0, 2, 3, 4)))
    assert_allclose(k3, stats.kstat(delta[ok], 3), rtol=1e-6)


@functools.lru_cache(maxsize=None)
def _living_triples(n_frames, shape, *, scale, background, motion=0.0, rate=0.0, gain=2.5, read=8.0, seed=1,
                    gain_shape=None):
    """Photon transfer with frame triples of the real specimen (tests/outside_data.living_specimen) under the
    EMVA 1288 camera model (outside_data.detect), offset 100 DN."""
    from outside_data import detect, living_specimen

    rng = np.random.default_rng(seed)
    frames = []
    pt = PhotonTransfer(max_value=65535 if gain_shape else 4095, pair_step=1, row_step=1)
    for lam in living_specimen(shape, n_frames, rng, photons_scale=scale, background=background, motion_px=motion,
                               rate_hz=rate):
        frames.append(detect(lam, rng, gain=gain, offset=100.0, read_noise_dn=read, bits=16 if gain_shape else 12,
                             gain_shape=gain_shape))
        if len(frames) >= 2:
            pt.update(frames[-1], frames[-2], frames[-3] if len(frames) >= 3 else None)
        frames = frames[-3:]
    return pt


@pytest.mark.parametrize("motion, rate", [(0.0, 0.0), (0.3, 0.3)])
def test_third_cumulant_gives_the_dark_level_without_dark_frames(motion, rate):
    # Issue target on data not made by qcmon: camera-like detector (EMVA 1288 model, K = 2.5 DN/photon, 8 DN read
    # noise, offset 100 DN), no dark frames: dark level within 3 DN, gain within 10 %, read noise within 10 %; the
    # real specimen dim (0.5-photon background), still and moving ±0.3 px with calcium-like transients.
    pt = _living_triples(300, (192, 192), scale=0.2, background=0.5, motion=motion, rate=rate)
    res = pt.result()
    assert res.quality == "" and res.dark_origin == "third cumulant", res
    assert abs(res.dark_level_dn - 100.0) < 3.0 and res.dark_se_dn <= MAX_DARK_SE_DN
    assert_allclose(res.gain_dn_per_photon, 2.5, rtol=0.10)
    assert_allclose(res.read_noise_dn, math.hypot(8.0, math.sqrt(1 / 12)), rtol=0.10)
    found = pt.cumulant_dark()
    assert_allclose(found.slope, -6 * 2.5**2, rtol=0.25)  # κ3(Δ) = -6 K² (mean - D): derived in the docstring


def test_third_cumulant_dark_level_of_a_multiplying_detector():
    # Compound Poisson: gamma-distributed gain per photon (mean 10 DN, shape 4: excess noise factor 1.25) on the
    # real specimen. κ3 = (E[G³]/E[G]) (mean - D) still crosses zero at the dark level; its slope is
    # -6 E[G³]/E[G] = -6 · 10² (k+1)(k+2)/k² (moments of the gamma distribution, handbook values).
    pt = _living_triples(160, (128, 128), scale=0.05, background=0.3, gain=10.0, read=8.0, gain_shape=4.0)
    found = pt.cumulant_dark()
    assert found is not None and abs(found.dark_level_dn - 100.0) < max(3.0, 3 * found.se_dn)
    assert_allclose(found.slope, -6 * 100 * 5 * 6 / 16, rtol=0.25)
    assert_allclose(pt.result().gain_dn_per_photon, 10.0 * 5 / 4, rtol=0.10)  # E[G²]/E[G] = g (k+1)/k


def test_a_dark_level_carried_over_a_reset_serves_until_the_new_triples_give_one():
    # After a brightness step the engine resets photon transfer and carries the third-cumulant dark level over it
    # (a gain or power step leaves the offset): the carried level is used while the new triples are too few, and
    # the new estimate replaces it once within its limit (real specimen, EMVA 1288 camera model).
    pt = _living_triples(300, (192, 192), scale=0.2, background=0.5)
    own = pt.result()
    from outside_data import detect, living_specimen

    rng = np.random.default_rng(5)
    fresh = PhotonTransfer(max_value=4095, pair_step=1, row_step=1)
    fresh.carried = (own.dark_level_dn, own.dark_se_dn, "third cumulant, before the brightness step at frame 9")
    frames = [detect(lam, rng, gain=2.5, offset=100.0, read_noise_dn=8.0, bits=12)
              for lam in living_specimen((192, 192), 8, rng, photons_scale=0.2, background=0.5)]
    for i in range(1, len(frames)):
        fresh.update(frames[i], frames[i - 1], frames[i - 2] if i >= 2 else None)
    res = fresh.result()
    assert res.dark_origin.endswith("frame 9") and res.dark_level_dn == own.dark_level_dn
    new = fresh.cumulant_dark()
    assert new is None or new.se_dn > MAX_DARK_SE_DN  # the new triples: not yet
    assert pt.carried is None
    try:
        pt.carried = (50.0, 0.1, "carried")
        assert pt.result().dark_origin == "third cumulant"  # its own estimate, within its limit, comes first
    finally:
        pt.carried = None  # pt is shared (cached) with the other tests


def test_an_uncertain_third_cumulant_leaves_the_dark_level_blank():
    # A bright specimen (background of 10+ photons) in a short session: the κ3 line must be extrapolated far to
    # its zero, its standard error is wider than the limit, and the dark level is blank with the reason
    # (EMVA 1288 camera model on the real specimen).
    pt = _living_triples(60, (96, 96), scale=1.0, background=2.0)
    res = pt.result()
    assert math.isnan(res.dark_level_dn) and res.dark_origin == "" and "uncertain" in res.bias
    assert res.dark_se_dn > MAX_DARK_SE_DN
    assert res.dark_floor_dn < 100.0  # the intercept alone: a lower bound


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


# ---------------------------------------------------------------- against data and references from outside qcmon
def _emva_flat_field_series(rng, *, gain=2.5, offset=100.0, read_noise=8.0, shape=(64, 64), bits=12):
    """Pairs of flat-field frames at 12 photon levels and one dark pair, the way EMVA 1288 (release 4.0, section 6)
    takes them, drawn by the EMVA 1288 linear camera model (tests/outside_data.detect)."""
    from outside_data import detect

    levels = [0.0, *np.linspace(20, 1200, 12)]
    return {lv: [detect(np.full(shape, lv), rng, gain=gain, offset=offset, read_noise_dn=read_noise, bits=bits)
                 for _ in range(2)] for lv in levels}


def _emva_reference_gain(pairs):
    """K from the EMVA 1288 reference implementation (the emva1288 package) on the same pairs."""
    import logging

    from outside_data import emva1288_modules

    process, routines = emva1288_modules()

    def stats(imgs):
        g = routines.get_int_imgs(imgs)
        return {"sum": np.sum(g["sum"]), "pvar": np.sum(g["pvar"]), "dmean": g["dmean"]}

    levels = sorted(pairs)
    shape = pairs[levels[0]][0].shape
    data = {"width": shape[1], "height": shape[0],
            "temporal": {1000.0: {lv: stats(pairs[lv]) for lv in levels}},
            "spatial": {1000.0: {0.0: routines.get_int_imgs(pairs[0.0]),
                                 levels[6]: routines.get_int_imgs(pairs[levels[6]])}}}
    d = process.Data1288(data, loglevel=logging.ERROR)
    return process.Results1288(d.data, loglevel=logging.ERROR).K


def test_gain_agrees_with_emva1288_reference_in_any_order_of_the_pairs():
    # EMVA 1288 reference implementation (emva1288 package) on flat-field series made the standard's way; the
    # running fit must not depend on the order of the pairs, a dark pair first included (it used to end NaN).
    rng = np.random.default_rng(21)
    pairs = _emva_flat_field_series(rng)
    k_ref = _emva_reference_gain(pairs)
    assert_allclose(k_ref, 2.5, rtol=0.03)  # the reference itself recovers the model's gain
    levels = sorted(pairs)
    orders = [levels, levels[::-1]] + [list(rng.permutation(levels)) for _ in range(6)]
    for order in orders:
        pt = PhotonTransfer(max_value=4095, pair_step=1, row_step=1)
        for lv in order:
            pt.update(pairs[lv][1], pairs[lv][0])
        res = pt.result()
        assert_allclose(res.gain_dn_per_photon, k_ref, rtol=0.03), order[0]
        assert res.quality == "" and res.r2 > 0.95


def test_dark_frames_give_dark_level_and_read_noise_as_emva1288_defines_them():
    # EMVA 1288 release 4.0, section 6: mu_dark and sigma_d from two dark images; model truth 100 DN and 8 DN
    # (plus 1/12 DN² of quantisation).
    rng = np.random.default_rng(5)
    pairs = _emva_flat_field_series(rng)
    pt = PhotonTransfer(max_value=4095, pair_step=1, row_step=1)
    d0, d1 = pairs[0.0]
    pt.dark.add(d0, None)
    pt.dark.add(d1, d0)
    for lv in sorted(pairs)[1:]:
        pt.dark.add_lit(float(pairs[lv][0].mean()))
        pt.update(pairs[lv][1], pairs[lv][0])
    res = pt.result()
    assert res.dark_origin.startswith("dark frames") and res.bias == ""
    assert abs(res.dark_level_dn - 100.0) < 0.5
    assert_allclose(res.read_noise_dn, math.sqrt(64 + 1 / 12), rtol=0.05)
    # without them (and without frame triples) the dark level is blank; the intercept gives a lower bound, low by
    # the read noise² / gain of the EMVA 1288 line
    pt2 = PhotonTransfer(max_value=4095, pair_step=1, row_step=1)
    for lv in sorted(pairs)[1:]:
        pt2.update(pairs[lv][1], pairs[lv][0])
    res2 = pt2.result()
    assert res2.dark_origin == "" and math.isnan(res2.dark_level_dn) and "dark level unknown" in res2.bias
    assert_allclose(100.0 - res2.dark_floor_dn, (64 + 1 / 12) / 2.5, atol=4.0)


def test_structureless_flat_field_is_not_taken_for_dark():
    # A uniformly lit frame has no structure either; it is dark only below the lit frames (common practice).
    from qcmon.metrics.photon_transfer import DarkFrames, is_structureless
    from qcmon.metrics.noise import immerkaer_sigma
    from outside_data import detect, nuclei_2d

    rng = np.random.default_rng(6)
    flat = [detect(np.full((96, 96), 300.0), rng, gain=2.5, offset=100, read_noise_dn=8) for _ in range(2)]
    assert is_structureless(flat[0], immerkaer_sigma(flat[0]))
    lit = detect(nuclei_2d()[:96, :96].astype(float) + 1, rng, gain=2.5, offset=100, read_noise_dn=8)
    assert not is_structureless(lit, immerkaer_sigma(lit))  # the real specimen has structure
    dark = DarkFrames()
    dark.add(flat[0], None)
    dark.add(flat[1], flat[0])
    dark.add_lit(float(lit.mean()))  # the lit specimen is dimmer than the flat field
    assert dark.result() is None


def test_a_break_in_the_line_is_flagged_not_used():
    # Two gains in one fit (a detector gain change without reset): the line breaks; the result says so.
    rng = np.random.default_rng(8)
    from outside_data import detect

    pt = PhotonTransfer(max_value=65535, pair_step=1, row_step=1)
    for lv in np.linspace(5, 300, 10):
        a, b = (detect(np.full((64, 64), lv), rng, gain=2.0, offset=100) for _ in range(2))
        pt.update(a, b)
    for lv in np.linspace(300, 2000, 10):
        a, b = (detect(np.full((64, 64), lv), rng, gain=8.0, offset=100 - 6 * 300) for _ in range(2))
        pt.update(a, b)
    res = pt.result()
    assert res.quality, res  # r² too low or a break: not a gain to use


@functools.lru_cache(maxsize=None)
def _engine_session(n_dark_start=0, n_dark_end=0, *, n_lit=90, gain=2.5, offset=100.0, read_noise=8.0, seed=1):
    """Camera-like frames of the real specimen nuclei_2d (tests/outside_data.detect, EMVA 1288 model) through the
    engine; closed-shutter frames (no photons) at the start and/or end."""
    from outside_data import detect, nuclei_2d, specimen_crop

    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    rng = np.random.default_rng(seed)
    lam = specimen_crop(nuclei_2d().astype(float), (160, 160), 0.0, 0.0) + 2.0
    eng = Engine(EngineSettings(frame_rate_hz=30.0))
    rows = []
    kinds = ["dark"] * n_dark_start + ["lit"] * n_lit + ["dark"] * n_dark_end
    for i, kind in enumerate(kinds):
        frame = detect(lam if kind == "lit" else np.zeros_like(lam), rng, gain=gain, offset=offset,
                       read_noise_dn=read_noise, bits=12)
        rows += eng.process(Frame(data=frame, index=i, time_s=i / 30.0))
    rows += eng.flush()
    return rows, eng.stream_info()[(0, 0)], kinds, float(lam.mean())


@pytest.mark.parametrize("n_dark_start, n_dark_end", [(3, 0), (0, 4)])
def test_camera_like_detector_with_dark_frames_meets_the_targets(n_dark_start, n_dark_end):
    # Issue targets on data not made by qcmon's simulator: gain within 10 %, dark level within 3 DN, photons per
    # pixel within 10 % (truth: the EMVA 1288 model's K = 2.5, offset 100 DN, read noise 8 DN).
    rows, info, kinds, photons = _engine_session(n_dark_start, n_dark_end)
    assert_allclose(info["gain_dn_per_photon"], 2.5, rtol=0.10)
    assert abs(info["ptc_dark_level_dn"] - 100.0) < 3.0
    assert info["ptc_dark_origin"].startswith("dark frames") and info["ptc_quality"] == ""
    assert_allclose(info["read_noise_dn"], 8.0, rtol=0.1)
    if n_dark_start:  # the rows use the dark frames' level from the start
        assert abs(info["dark_level_dn"] - 100.0) < 3.0 and info["dark_level_origin"].startswith("dark frames")
        lit = [r["photons_per_px"] for r, k in zip(rows, kinds) if k == "lit"]
        assert_allclose(np.median(lit), photons, rtol=0.10)


def test_camera_like_detector_without_dark_frames_leaves_photons_blank_rather_than_biased():
    # No dark frames, read noise unknown, a bright specimen in a short session: the intercept of the EMVA 1288 line
    # is only a lower bound of the dark level (low by read noise² / gain, 25.6 DN here) and the third cumulant is
    # still too uncertain, so photons per pixel are blank in every row and the summary gives the reason. Gain
    # 2.5 DN/photon under 8 DN read noise resolves no photon peaks: no zero-photon peak is claimed either.
    rows, info, _, _ = _engine_session(0, 0)
    assert_allclose(info["gain_dn_per_photon"], 2.5, rtol=0.10)
    assert "lower bound" in info["dark_level_origin"]
    assert abs(100.0 - info["dark_level_dn"] - (64 + 1 / 12) / 2.5) < 10.0  # the lower bound, where brightness starts
    assert math.isnan(info["ptc_dark_level_dn"]) and info["ptc_dark_origin"] == ""
    assert "dark level" in info["ptc_bias"] and ("uncertain" in info["ptc_bias"] or "unknown" in info["ptc_bias"])
    assert all(math.isnan(r["photons_per_px"]) for r in rows)


@pytest.mark.parametrize("scale, gain, read_noise, offset", [(0.05, 30.0, 3.0, 100.0), (0.02, 100.0, 8.0, 500.0),
                                                             (0.2, 30.0, 5.0, 200.0)])
def test_zero_photon_peak_gives_dark_level_without_dark_frames(scale, gain, read_noise, offset):
    # Photon counting (gain >> read noise) on the real specimen nuclei_2d at 0.2-5 photons/px, EMVA 1288 model
    # (outside_data.detect): the zero-photon peak gives the offset within 1 DN and the read noise within 15 %,
    # also where the one-photon peak is the taller (dim background of about a photon).
    from outside_data import detect, nuclei_2d, specimen_crop

    rng = np.random.default_rng(3)
    lam = specimen_crop(nuclei_2d().astype(float), (128, 128), 0.0, 0.0) * scale + 0.2
    frames = [detect(lam, rng, gain=gain, offset=offset, read_noise_dn=read_noise) for _ in range(30)]
    pt = PhotonTransfer(max_value=65535, pair_step=1)
    for a, b in zip(frames[1:], frames[:-1]):
        pt.update(a, b)
    peak = pt.find_zero_photon_peak(np.stack(frames))
    assert peak is not None
    assert abs(peak[0] - offset) < 1.0
    assert_allclose(peak[1], math.hypot(read_noise, math.sqrt(1 / 12)), rtol=0.15)
    res = pt.result()
    assert res.dark_origin == "zero-photon peak" and res.bias == ""


def test_a_session_without_structure_gets_no_dark_level_from_itself():
    # Frames that all look structureless (a flat lit field) are not dark: without lit frames clearly above them
    # their mean is not taken as the dark level (EMVA 1288 flat field under detect; common practice).
    from outside_data import detect

    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    rng = np.random.default_rng(9)
    eng = Engine(EngineSettings(frame_rate_hz=30.0))
    for i in range(40):
        frame = detect(np.full((64, 64), 50.0), rng, gain=2.5, offset=100, read_noise_dn=8)
        eng.process(Frame(data=frame, index=i, time_s=i / 30.0))
    eng.flush()
    info = eng.stream_info()[(0, 0)]
    assert not info["dark_level_origin"].startswith("dark frames")
    assert not info.get("ptc_dark_origin", "").startswith("dark frames")


def test_photons_per_px_start_once_a_trusted_dark_level_arrives_mid_session():
    # A closed shutter in the middle of a session (6 dark frames between lit ones): until then the dark level is only
    # the line's lower bound and photons per pixel are blank; from the next check on they are counted from the dark
    # frames' level (EMVA 1288 dark images), said in a detector event — within 10 % of the truth (the real specimen
    # nuclei_2d under the EMVA 1288 camera model, tests/outside_data.py).
    from outside_data import detect, nuclei_2d, specimen_crop

    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    rng = np.random.default_rng(2)
    lam = specimen_crop(nuclei_2d().astype(float), (128, 128), 0.0, 0.0) + 2.0
    eng = Engine(EngineSettings(frame_rate_hz=30.0, photon_transfer_every=1))
    kinds = ["lit"] * 40 + ["dark"] * 6 + ["lit"] * 60
    rows = []
    for i, kind in enumerate(kinds):
        frame = detect(lam if kind == "lit" else np.zeros_like(lam), rng, gain=2.5, offset=100.0, read_noise_dn=8.0,
                       bits=12)
        rows += eng.process(Frame(data=frame, index=i, time_s=i / 30.0))
    rows += eng.flush()
    events = [e for e in eng.take_events() if e.kind == "detector" and "dark level" in e.message]
    assert len(events) == 1 and "dark frames" in events[0].message
    start = events[0].frame
    assert 46 <= start <= 46 + 16
    photons = np.array([r["photons_per_px"] for r in rows])
    assert np.isnan(photons[:start]).all()
    assert_allclose(np.median(photons[start:]), lam.mean(), rtol=0.10)
    info = eng.stream_info()[(0, 0)]
    assert "lower bound" in info["dark_level_origin"] and abs(info["ptc_dark_level_dn"] - 100.0) < 1.0


def test_start_up_frames_give_the_dark_level_of_a_dim_session_from_the_first_row():
    # Dim camera-like data without dark frames (the real specimen nuclei_2d × 0.2 + 0.5 photons, EMVA 1288 model,
    # K = 2.5 DN/photon, 8 DN read noise, offset 100 DN): the start-up frames read every row, and their triples give
    # the dark level by the third cumulant before the first row — so brightness and photons per pixel count from
    # it from the start (targets of the issue: dark level within 3 DN, photons per pixel within 10 %). The stated
    # error at start-up is 0.7-1.0 DN here (seeds 4-7; conservative for consecutive triples, docs/accuracy.md).
    from outside_data import detect, nuclei_2d, specimen_crop

    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    rng = np.random.default_rng(4)
    lam = specimen_crop(nuclei_2d().astype(float), (448, 448), 0.0, 0.0) * 0.2 + 0.5
    eng = Engine(EngineSettings(frame_rate_hz=30.0, reference_frames=60))
    rows = []
    for i in range(61):
        frame = detect(lam, rng, gain=2.5, offset=100.0, read_noise_dn=8.0, bits=12)
        rows += eng.process(Frame(data=frame, index=i, time_s=i / 30.0))
    rows += eng.flush()
    info = eng.stream_info()[(0, 0)]
    assert info["dark_level_origin"].startswith("photon transfer (third cumulant")
    assert abs(info["dark_level_dn"] - 100.0) < 3.0
    photons = np.array([r["photons_per_px"] for r in rows])
    assert np.isfinite(photons).all()
    assert_allclose(np.median(photons), lam.mean(), rtol=0.10)
    assert_allclose(np.median([r["mean_f"] for r in rows]), 2.5 * lam.mean(), rtol=0.10)


def test_nan_pixels_in_float_frames_are_left_out_not_a_crash():
    # Float frames may carry NaN for pixels the acquisition did not fill (common practice, no source). The first
    # pairs, before the mean–variance line exists, used to let NaN stencils through to the bin index (a negative
    # index, and np.bincount raised). Outside data: the real specimen under the EMVA 1288 model.
    from outside_data import detect, nuclei_2d, specimen_crop

    img = nuclei_2d().astype(np.float64) + 1.0
    still = specimen_crop(img, (128, 128), 0.0, 0.0) * (10.0 / img.mean())
    gains = []
    for with_nan in (False, True):
        rng = np.random.default_rng(3)
        pt = PhotonTransfer(max_value=4095, floor=0.0)
        prev = before = None
        for i in range(60):
            f = detect(still, rng, gain=3.0, offset=100.0, read_noise_dn=2.0).astype(np.float32)
            if with_nan and i % 4 == 0:
                f[rng.integers(0, 128, 40), rng.integers(0, 128, 40)] = np.nan
            pt.update(f, prev, before)
            before, prev = prev, f
        gains.append(pt.result().gain_dn_per_photon)
    assert all(math.isfinite(g) for g in gains), gains
    assert gains[1] == pytest.approx(gains[0], rel=0.05)  # a few stencils fewer, the same gain
    assert gains[0] == pytest.approx(3.0, rel=0.1)  # and the detector's (EMVA 1288 model's) gain
