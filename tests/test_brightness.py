"""Tests of the brightness baseline and bleach rate."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.signal import lfilter

from qcmon.metrics.brightness import BrightnessTracker


def _session(tau_min, minutes, *, fs=30.0, n_cells=40, seed=0, f0=1000.0):
    """Frame means above dark: exponential bleaching x (1 + calcium activity) + shot noise of the mean."""
    rng = np.random.default_rng(seed)
    t = np.arange(int(minutes * 60 * fs)) / fs
    activity = np.zeros_like(t)
    decay = math.exp(-1.0 / (0.7 * fs))  # ~0.7 s transient decay (common practice, no source)
    for _ in range(n_cells):
        spikes = np.zeros_like(t)
        hits = rng.random(t.size) < 0.2 / fs
        spikes[hits] = rng.uniform(0.3, 1.0, hits.sum())  # ΔF/F up to 100 %
        activity += (1.0 / n_cells) * 0.5 * lfilter([1.0], [1.0, -decay], spikes)
    resting = f0 * np.exp(-t / 60.0 / tau_min)
    return t, resting * (1 + activity) + rng.normal(0, 0.5, t.size)


def _run(t, f, **kw):
    tracker = BrightnessTracker(**kw)
    states = [tracker.update(ti, fi) for ti, fi in zip(t, f)]
    return tracker, states


@pytest.mark.parametrize("tau_min, minutes", [(20.0, 10.0), (60.0, 20.0)])
def test_session_fit_slope_within_5_percent(tau_min, minutes):
    # Ground truth of the simulation: slope at t = 0 is -100 / tau %/min of the initial brightness.
    t, f = _session(tau_min, minutes)
    tracker, _ = _run(t, f)
    fit = tracker.session_fit()
    assert_allclose(fit.slope_pct_per_min, -100.0 / tau_min, rtol=0.05)
    assert_allclose(fit.tau_min, tau_min, rtol=0.05)
    assert fit.r2 > 0.95


def test_row_slope_tracks_truth_despite_activity():
    tau = 20.0
    t, f = _session(tau, 10.0, seed=1)
    _, states = _run(t, f, window_s=120.0)
    slope = np.array([s.bleach_pct_per_min for s in states])
    ok = ~np.isnan(slope)
    # Truth at each frame: d/dt of 100 exp(-t / tau), % of the initial level per minute (no lag of a window).
    truth = -100.0 / tau * np.exp(-t / 60.0 / tau)
    assert ok.sum() > 0.7 * t.size
    assert_allclose(np.median(slope[ok] / truth[ok]), 1.0, atol=0.05)
    late = ok & (t > 300)
    assert_allclose(slope[late].mean() / truth[late].mean(), 1.0, atol=0.05)


def test_activity_does_not_move_baseline():
    t, f = _session(1e9, 2.0, seed=2)  # no bleaching
    _, states = _run(t, f)
    pct = np.array([s.brightness_pct for s in states])
    pct = pct[~np.isnan(pct)]
    assert np.all(np.abs(pct - 100) < 2.0)  # the mean itself swings by much more
    assert np.ptp(f) / np.median(f) > 0.05


def test_forecast_and_sign():
    t, f = _session(20.0, 5.0, seed=3)
    tracker, _ = _run(t, f)
    state = tracker.state
    assert state.bleach_pct_per_min < 0  # negative = dimming
    expect = (state.brightness_pct - 50.0) / -state.bleach_pct_per_min
    assert tracker.forecast_min(50.0) == pytest.approx(expect)
    assert tracker.forecast_min(0.0) == 0.0
    rising, _ = _run(t, f[::-1])
    assert rising.forecast_min(10.0) == math.inf


def test_memory_is_bounded():
    tracker = BrightnessTracker(max_history=64, block_s=0.1, baseline_s=1.0, initial_s=1.0, window_s=5.0)
    for i in range(30000):
        tracker.update(i / 100.0, 100.0 * math.exp(-i / 100.0 / 600.0))
    assert len(tracker._hist_t) < 64
    assert_allclose(tracker.session_fit().tau_min, 10.0, rtol=0.01)


def test_undefined_before_data():
    tracker = BrightnessTracker()
    with pytest.warns(UserWarning, match="undefined"):
        assert math.isnan(tracker.session_fit().tau_min)
    with pytest.warns(UserWarning, match="undefined"):
        assert math.isnan(tracker.forecast_min(10))
    state = tracker.update(0.0, math.nan)
    assert math.isnan(state.baseline_f)


def test_bad_input():
    with pytest.raises(ValueError, match="window_s"):
        BrightnessTracker(window_s=0)
    with pytest.raises(ValueError, match="percentile"):
        BrightnessTracker(percentile=120)
    tracker = BrightnessTracker()
    tracker.update(1.0, 5.0)
    with pytest.raises(ValueError, match="time_s"):
        tracker.update(0.5, 5.0)
    with pytest.raises(ValueError, match="loss_pct"):
        tracker.forecast_min(-1)


def test_session_fit_on_simulated_session():
    # qcmon's simulator: bleaching exp(-t / tau) of the indicator (truth column bleach_factor) under calcium
    # activity and slow neuropil fluctuations; 10 min at 2.5 Hz, 64 x 64 px to stay fast.
    from qcmon.simulate import SimConfig, simulate

    config = SimConfig(n_frames=1500, height=64, width=64, frame_rate_hz=2.5, bleach_tau_min=(20.0,),
                       channel_brightness=(1.0,), channel_neuropil=(1.0,), zstack_half_planes=1, zstack_average=1,
                       jitter_px=0.0, slow_drift_px=0.0)
    result = simulate(config)
    truth = result.truth
    tracker = BrightnessTracker(block_s=1.0)
    for page, t, dark in zip(result.pages, truth["time_s"], truth["dark_level"]):
        tracker.update(t, page.mean() - dark)
    rate = np.polyfit(truth["time_s"] / 60.0, np.log(truth["bleach_factor"]), 1)[0]
    assert_allclose(tracker.session_fit().slope_pct_per_min, 100.0 * rate, rtol=0.05)


# ------------------------------------------------- against sessions made outside qcmon's simulator (bleach_data)
from bleach_data import bleaching_means  # noqa: E402

from qcmon.metrics.brightness import bleach_rate, judgeable  # noqa: E402


def test_bleach_slope_short_session_within_15_percent():
    # Issue target: 20-s session at tau = 2 min, true slope -100 / tau = -50 %/min, within 15 %. Real specimen
    # (nuclei_2d), transients defined in bleach_data, EMVA 1288 photon statistics (outside_data.detect). The
    # transients leave a random error: over 10 sessions at least 8 within 15 %, the median within 8 %, and
    # every error within 3.5 of its stated standard errors.
    errors, ses = [], []
    for seed in range(10):
        t, f = bleaching_means(seconds=20.0, tau_min=2.0, seed=seed)
        rate, se = bleach_rate(t, f)
        errors.append(rate + 50.0)
        ses.append(se)
    rel = np.abs(errors) / 50.0
    assert np.sum(rel < 0.15) >= 8 and np.median(rel) < 0.08, np.round(errors, 1)
    assert np.all(np.abs(errors) < 3.5 * np.array(ses)), (np.round(errors, 1), np.round(ses, 1))


@pytest.mark.parametrize("seed", [0, 1])
def test_bleach_slope_two_minutes_within_5_percent(seed):
    t, f = bleaching_means(seconds=120.0, tau_min=2.0, seed=seed, fs=15.0)
    rate, se = bleach_rate(t, f)
    assert_allclose(rate, -50.0, rtol=0.05)
    tracker, states = _run(t, f)
    assert_allclose(tracker.session_fit().slope_pct_per_min, -50.0, rtol=0.05)
    # the row value is in % of the initial brightness: -50 x exp(-t / tau) at the end (here exp(-1))
    assert_allclose(states[-1].bleach_pct_per_min, -50.0 * math.exp(-1.0), rtol=0.1)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_short_session_with_slow_bleaching_is_judged_only_when_its_interval_is_narrow(seed):
    # 30 s at tau = 20 min (true -5 %/min): the issue saw -1.8 and +3.8 printed without qualifier. Either the
    # slope is withheld ("too short to judge") or the truth lies within its stated 95 % interval.
    t, f = bleaching_means(seconds=30.0, tau_min=20.0, seed=seed)
    rate, se = bleach_rate(t, f)
    if judgeable(rate, se):
        assert abs(rate + 5.0) <= 2.5 * se
    t, f = t[t < 10.0], f[t < 10.0]  # 10 s: always too short for a -5 %/min slope
    rate, se = bleach_rate(t, f)
    assert not judgeable(rate, se)
    _, states = _run(t, f)
    assert math.isnan(states[-1].bleach_pct_per_min)


def test_gain_step_found_once_and_everything_restarts():
    # x16 detector gain at 10 s of a 30-s session: one step of about x16, found within the 3-s window, and the
    # slope after it is that of the bleaching alone (tau = 2 min: -50 %/min of the level at the step).
    t, f = bleaching_means(seconds=30.0, tau_min=2.0, seed=4, step_at_s=10.0, step_factor=16.0)
    tracker, states = _run(t, f)
    steps = [(ti, s.step_factor) for ti, s in zip(t, states) if not math.isnan(s.step_factor)]
    assert len(steps) == 1
    assert_allclose(steps[0][1], 16.0, rtol=0.1)
    assert 10.0 <= steps[0][0] <= 13.5
    fit = tracker.session_fit()
    assert abs(fit.slope_pct_per_min + 50.0) < 3.0 * fit.se_pct_per_min  # 20 s after the step: within its error
    assert 95 < states[-1].brightness_pct < 105  # % of the level after the step, not 1600 %
    # the summary's fit, one level per segment, gives the bleaching rate across the step
    seg = (t >= steps[0][0]).astype(int)
    rate, se = bleach_rate(t, f, segments=seg)
    assert abs(rate + 50.0) < 3.0 * se


@pytest.mark.parametrize("seed", [0, 1])
def test_no_step_on_strong_transients_or_fast_bleaching(seed):
    # Many large transients (1 Hz per nucleus) and bleaching at tau = 1 min: no step (common practice: a step
    # is a sustained change by more than x1.5 within seconds).
    t, f = bleaching_means(seconds=60.0, tau_min=1.0, seed=seed, rate_hz=1.0, fs=10.0)
    _, states = _run(t, f)
    assert all(math.isnan(s.step_factor) for s in states)


def test_gain_step_in_the_engine_is_an_event_restarts_and_is_never_normal():
    # qcmon's simulator (gain x16 at half a 20-s session, its scenario "gain_saturation"): the engine reports the
    # step once, photons per pixel are blank until photon transfer has refitted, and the summary's brightness
    # verdict is a warning with the step listed. (The step detector itself is held against outside data above.)
    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame
    from qcmon.monitor.loop import step_event
    from qcmon.record.journal import rows_to_traces
    from qcmon.simulate import simulate
    from qcmon.simulate.scenarios import scenario_config
    from qcmon.record.summary import summarize_traces
    from qcmon.thresholds import load_profile

    config = scenario_config("gain_saturation", n_frames=600, height=64, width=64, frame_rate_hz=30.0)
    result = simulate(config)
    eng = Engine(EngineSettings(frame_rate_hz=30.0))
    rows = []
    for i, page in enumerate(result.pages):
        rows += eng.process(Frame(data=page, index=i, time_s=i / 30.0))
    rows += eng.flush()
    steps = [r for r in rows if math.isfinite(r["level_step"])]
    assert len(steps) == 1 and steps[0]["level_step"] > 4  # x16, less what saturation clips
    assert 10.0 <= steps[0]["time_s"] <= 13.5
    after = [r for r in rows if r["time_s"] > steps[0]["time_s"]]
    assert math.isnan(after[0]["photons_per_px"])
    event = step_event(steps[0], "follow your local rules")
    assert event.kind == "step" and "brightness ×" in event.message and "gain or laser power" in event.message
    # what to check, and the caution beside it (the advice touches gain and excitation power)
    assert "add a note" in event.advice and "see caution" in event.advice
    assert event.caution == "follow your local rules"
    summary = summarize_traces(rows_to_traces(rows), [event], profile=load_profile("default"))
    assert summary["brightness"]["verdict"] in ("warning", "fail") and len(summary["brightness"]["steps"]) == 1
    assert any("brightness ×" in n for n in summary["notes"])


def test_percentile_helper_equals_numpy():
    # numpy.percentile (linear interpolation) is the reference; the trackers use a faster sort-based copy.
    from qcmon.metrics.brightness import _percentile

    rng = np.random.default_rng(0)
    for n in (1, 2, 3, 12, 40, 52):
        a = rng.normal(size=n)
        for q in (0.0, 20.0, 50.0, 99.0, 100.0):
            assert _percentile(a, q) == pytest.approx(float(np.percentile(a, q)), abs=1e-12)
