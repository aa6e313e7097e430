"""Brightness above the dark level and its bleaching: a robust slow baseline and its slope."""

from __future__ import annotations

import math
import warnings
from collections import deque
from dataclasses import dataclass

import numpy as np

from qcmon.metrics._validate import finite_float, positive_int

__all__ = ["BleachFit", "BrightnessState", "BrightnessTracker"]


@dataclass(frozen=True, slots=True)
class BrightnessState:
    """Baseline and bleaching after one frame.

    Attributes
    ----------
    baseline_f : float
        Slow robust baseline of the mean brightness above dark, DN (NaN until the first block closes).
    brightness_pct : float
        ``baseline_f`` in % of the initial baseline.
    bleach_pct_per_min : float
        Slope of the baseline over the trailing window, % of the initial baseline per minute; negative means
        dimming. NaN until the window holds enough points.
    """

    baseline_f: float
    brightness_pct: float
    bleach_pct_per_min: float


@dataclass(frozen=True, slots=True)
class BleachFit:
    """Exponential fit ``b(t) = b0 exp(-t / tau)`` of the whole session's baseline.

    Attributes
    ----------
    slope_pct_per_min : float
        Slope at the session start, % of b0 per minute (``-100 / tau_min``); negative means dimming.
    tau_min : float
        Time constant, minutes (``inf`` when the baseline does not fall).
    r2 : float
        Coefficient of determination of the log-linear fit.
    """

    slope_pct_per_min: float
    tau_min: float
    r2: float


class BrightnessTracker:
    """Baseline brightness and bleach rate in constant memory.

    Parameters
    ----------
    window_s : float, optional
        Trailing window of the bleach slope, s (default 60).
    baseline_s : float, optional
        Window of the running low percentile that makes the baseline, s (default 10).
    initial_s : float, optional
        The initial baseline is the baseline at the end of the first ``initial_s`` seconds (default 10; at least
        ``baseline_s`` is used).
    percentile : float, optional
        Percentile of the block means taken as baseline (default 20).
    block_s : float, optional
        Frames are averaged in blocks of this length, s (default 0.25): the decimated series.
    max_history : int, optional
        Points kept for :meth:`session_fit` (default 2048); when full, neighbouring points are merged in pairs.

    Notes
    -----
    Neural activity only adds light (positive ΔF/F transients), so a low percentile of the recent block means
    follows the resting brightness and ignores transients as long as they are present in fewer than
    ``100 - percentile`` % of the blocks. If the activity is stationary and scales with the resting
    brightness (ΔF/F), the percentile is a constant multiple of the resting brightness, so the slope expressed
    in % of the initial baseline is unbiased — the multiple cancels. A running median would be moved by activity
    that is present in many frames; the mean is moved by every transient. The low percentile lags the
    resting brightness by about ``baseline_s / 2``, negligible against bleach time constants of minutes.

    The slope is the least-squares slope of the baseline over the trailing ``window_s`` (at block resolution),
    i.e. the rate at the window's centre. Memory: ``baseline_s / block_s + window_s / block_s + max_history``
    numbers, whatever the session length. Common practice for the percentile baseline (no source); log-linear
    fit of an exponential decay, e.g. Press et al., Numerical Recipes, 3rd ed., §15.4 (from memory).
    """

    def __init__(self, *, window_s: float = 60.0, baseline_s: float = 10.0, initial_s: float = 10.0,
                 percentile: float = 20.0, block_s: float = 0.25, max_history: int = 2048):
        self.window_s = _positive(window_s, "window_s")
        self.baseline_s = _positive(baseline_s, "baseline_s")
        self.initial_s = _positive(initial_s, "initial_s")
        self.block_s = _positive(block_s, "block_s")
        self.percentile = finite_float(percentile, "percentile")
        if not 0 <= self.percentile <= 100:
            raise ValueError(f"percentile must be within 0..100, got {percentile}")
        self.max_history = positive_int(max_history, "max_history")
        if self.max_history < 4:
            raise ValueError(f"max_history must be at least 4, got {max_history}")
        self._blocks: deque[float] = deque(maxlen=max(3, int(round(self.baseline_s / self.block_s))))
        self._window: deque[tuple[float, float]] = deque(maxlen=max(3, int(round(self.window_s / self.block_s))))
        self._hist_t: list[float] = []
        self._hist_b: list[float] = []
        self._hist_w: list[float] = []
        self._unit = 1
        self._pend_t = self._pend_b = 0.0
        self._pend_n = 0
        self._block_start = math.nan
        self._block_sum = 0.0
        self._block_n = 0
        self._t0 = math.nan
        self._last_t = -math.inf
        self.initial_f = math.nan
        self._state = BrightnessState(math.nan, math.nan, math.nan)

    def update(self, time_s: float, mean_f: float) -> BrightnessState:
        """Add one frame's mean brightness above dark.

        Parameters
        ----------
        time_s : float
            Time of the frame, s from the session's first frame (non-decreasing).
        mean_f : float
            Mean pixel value above the dark level, DN. NaN values are skipped.

        Returns
        -------
        state : BrightnessState
            The state after this frame (unchanged until a block closes).
        """
        t = finite_float(time_s, "time_s")
        if t < self._last_t:
            raise ValueError(f"time_s must not decrease: {t} after {self._last_t}")
        self._last_t = t
        f = float(mean_f)
        if math.isnan(f):
            return self._state
        if math.isnan(self._t0):
            self._t0 = t
            self._block_start = t
        if t - self._block_start >= self.block_s and self._block_n:
            self._close_block()
            self._block_start = t
        self._block_sum += f
        self._block_n += 1
        return self._state

    def _close_block(self) -> None:
        mid = self._block_start + 0.5 * self.block_s
        self._blocks.append(self._block_sum / self._block_n)
        self._block_sum, self._block_n = 0.0, 0
        baseline = float(np.percentile(np.fromiter(self._blocks, float), self.percentile))
        # The baseline describes the blocks of the last baseline_s: it refers to the middle of that span.
        t_ref = mid - 0.5 * (len(self._blocks) - 1) * self.block_s
        ready = len(self._blocks) == self._blocks.maxlen
        if math.isnan(self.initial_f) and ready and mid - self._t0 >= self.initial_s:
            self.initial_f = baseline
        if not ready:
            self._state = BrightnessState(baseline, math.nan, math.nan)
            return
        self._window.append((t_ref, baseline))
        self._add_history(t_ref, baseline)
        pct = 100.0 * baseline / self.initial_f if self.initial_f > 0 else math.nan
        slope = math.nan
        if len(self._window) >= max(3, self._window.maxlen // 2) and self.initial_f > 0:
            tw, bw = np.array(self._window).T
            tw = tw - tw.mean()
            slope_per_s = np.dot(tw, bw - bw.mean()) / np.dot(tw, tw)  # least-squares slope, closed form
            slope = 100.0 * 60.0 * slope_per_s / self.initial_f
        self._state = BrightnessState(baseline, pct, float(slope))

    def _add_history(self, t: float, b: float) -> None:
        # Points of equal duration: incoming baselines are averaged in groups of ``_unit``; when the history is
        # full, neighbouring pairs are merged and ``_unit`` doubles (constant memory, uniform resolution).
        self._pend_t += t
        self._pend_b += b
        self._pend_n += 1
        if self._pend_n < self._unit:
            return
        self._hist_t.append(self._pend_t / self._pend_n)
        self._hist_b.append(self._pend_b / self._pend_n)
        self._hist_w.append(float(self._pend_n))
        self._pend_t = self._pend_b = 0.0
        self._pend_n = 0
        if len(self._hist_t) >= self.max_history:
            m = (len(self._hist_t) // 2) * 2
            t_arr, b_arr, w_arr = (np.asarray(v[:m]).reshape(-1, 2) for v in (self._hist_t, self._hist_b, self._hist_w))
            w2 = w_arr.sum(axis=1)
            self._hist_t = list((t_arr * w_arr).sum(axis=1) / w2) + self._hist_t[m:]
            self._hist_b = list((b_arr * w_arr).sum(axis=1) / w2) + self._hist_b[m:]
            self._hist_w = list(w2) + self._hist_w[m:]
            self._unit *= 2

    @property
    def state(self) -> BrightnessState:
        """The latest :class:`BrightnessState`."""
        return self._state

    def session_fit(self) -> BleachFit:
        """Log-linear least-squares fit of ``b0 exp(-t / tau)`` to the decimated baseline history.

        Returns
        -------
        fit : BleachFit
            NaN fields with a UserWarning when fewer than 3 points or non-positive baselines.
        """
        t = np.asarray(self._hist_t)
        b = np.asarray(self._hist_b)
        w = np.asarray(self._hist_w)
        if t.size < 3 or np.any(b <= 0) or np.ptp(t) <= 0:
            warnings.warn("bleach fit undefined: fewer than 3 baseline points or a baseline <= 0",
                          UserWarning, stacklevel=2)
            return BleachFit(math.nan, math.nan, math.nan)
        minutes = (t - self._t0) / 60.0
        logb = np.log(b)
        intercept, rate = np.polynomial.polynomial.polyfit(minutes, logb, 1, w=np.sqrt(w))
        resid = logb - (intercept + rate * minutes)
        mean = np.average(logb, weights=w)
        ss_tot = float(np.sum(w * (logb - mean) ** 2))
        r2 = 1.0 - float(np.sum(w * resid**2)) / ss_tot if ss_tot > 0 else math.nan
        tau = -1.0 / rate if rate < 0 else math.inf
        return BleachFit(100.0 * float(rate), float(tau), r2)

    def forecast_min(self, loss_pct: float) -> float:
        """Minutes until the brightness is ``loss_pct`` % of the initial below it, at the current bleach rate.

        Parameters
        ----------
        loss_pct : float
            Loss in % of the initial baseline (e.g. 20 for "down to 80 %"), 0..100.

        Returns
        -------
        minutes : float
            0 when already there, ``inf`` when not dimming, NaN (with a UserWarning) before a rate is known.
        """
        loss = finite_float(loss_pct, "loss_pct")
        if not 0 <= loss <= 100:
            raise ValueError(f"loss_pct must be within 0..100, got {loss_pct}")
        pct, rate = self._state.brightness_pct, self._state.bleach_pct_per_min
        if math.isnan(pct) or math.isnan(rate):
            warnings.warn("forecast undefined: no bleach rate yet", UserWarning, stacklevel=2)
            return math.nan
        target = 100.0 - loss
        if pct <= target:
            return 0.0
        if rate >= 0:
            return math.inf
        return (pct - target) / -rate


def _positive(value, name: str) -> float:
    v = finite_float(value, name)
    if v <= 0:
        raise ValueError(f"{name} must be > 0, got {value!r}")
    return v
