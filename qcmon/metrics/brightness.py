"""Brightness above the dark level and its bleaching: a robust slow baseline and its slope."""

from __future__ import annotations

import math
import warnings
from collections import deque
from dataclasses import dataclass
from statistics import NormalDist

import numpy as np

from qcmon.metrics._validate import finite_float, positive_int

__all__ = ["BleachFit", "BrightnessState", "BrightnessTracker", "LevelSteps", "bleach_rate", "judgeable"]

#: Quantile of the log block means that the bleach fit follows: below the median, so positive calcium transients
#: pull it little; any stationary activity shifts a quantile by a constant factor, which leaves the rate unchanged.
_QUANTILE = 0.1
#: A slope is "too short to judge" when its 95 % interval (± 2 standard errors) is wider than ± this (%/min) and
#: than ± ``_JUDGE_REL`` of the slope: the interval then spans the usual warning level (-1 %/min,
#: thresholds/default.toml) or the sign and size of the slope are not settled.
_JUDGE_ABS = 1.0
#: Fewest points (frames) whose fit gets a standard error: with fewer, a slope is never judged.
_MIN_POINTS = 30
_JUDGE_REL = 0.3
#: A sustained change of the above-dark level by more than this factor (up or down) is a step (detector gain or
#: laser power changed); common practice, no source. Bleaching by this much within ``_STEP_RECENT_S`` would need a
#: time constant under 8 s; whole-field calcium transients last about a second.
_STEP_FACTOR = 1.5
#: The level after a step is the low percentile of the blocks of the last this many seconds ...
_STEP_RECENT_S = 3.0
#: ... compared with that of the blocks of this many seconds before them.
_STEP_BEFORE_S = 10.0
#: Levels are this low percentile of the blocks, not their median: a gain or power step scales the resting level
#: too, while a burst of activity raises the low percentile much less than the median.
_STEP_PERCENTILE = 20.0


def bleach_rate(time_s, level, *, quantile: float = _QUANTILE, segments=None) -> tuple[float, float]:
    """Rate of exponential bleaching from a brightness series with transients: quantile regression of ``ln level``.

    Parameters
    ----------
    time_s : (N,) array_like
        Times, s.
    level : (N,) array_like
        Brightness above dark (block means or frame means), DN. Non-finite and non-positive values are left out.
    quantile : float
        Quantile of the fit (default 0.1).
    segments : (N,) array_like of int, optional
        Segment of each point (after a detector-gain or laser-power step): one intercept per segment, one rate.

    Returns
    -------
    rate_pct_per_min : float
        ``100 k`` for ``level ∝ exp(k t)``, k in 1/min: the slope in % of the current level per minute (negative
        = dimming). NaN with fewer than 4 points or no time span.
    se_pct_per_min : float
        Its standard error (see Notes); NaN when undefined or with fewer than 30 points.

    Notes
    -----
    Quantile regression (Koenker & Bassett, Econometrica 46:33, 1978) solved by iteratively reweighted least
    squares. Calcium transients only add light: a low quantile of ``ln level`` follows the resting level, and
    stationary activity that scales with it (ΔF/F) moves every quantile by the same constant, so the rate is
    unbiased. The whole record is fitted at once (no trailing filter: no lag). The lower the quantile, the less
    transients move it (on sessions with frequent transients, 20 s at tau = 2 min: median error 9 % at 0.3,
    5.5 % at 0.1; docs/accuracy.md). The standard error is the iid quantile-regression one,
    ``sqrt(q (1 - q)) × sparsity × sqrt((X'X)⁻¹)`` with the sparsity from the residuals' quantiles at the
    Hall-Sheather bandwidth (Koenker, Quantile Regression, 2005, §3.4, from memory), times the square root of the
    residuals' integrated autocorrelation time (transients and slow activity last many frames; see
    ``_correlation_inflation``). An approximation; the tests check its coverage.
    """
    t = np.asarray(time_s, dtype=float)
    y = np.asarray(level, dtype=float)
    seg = np.zeros(t.size, dtype=np.intp) if segments is None else np.asarray(segments, dtype=np.intp)
    ok = np.isfinite(t) & np.isfinite(y) & (y > 0)
    t, y, seg = t[ok] / 60.0, np.log(y[ok]), seg[ok]
    if t.size < 4 or np.ptp(t) <= 0:
        return math.nan, math.nan
    _, seg = np.unique(seg, return_inverse=True)
    # the error needs residuals enough for their quantiles and autocorrelation: none below _MIN_POINTS
    few = t.size < _MIN_POINTS
    nseg = int(seg.max()) + 1
    X = np.zeros((t.size, nseg + 1))
    X[np.arange(t.size), seg] = 1.0
    X[:, -1] = t - t.mean()
    if np.linalg.matrix_rank(X) < X.shape[1]:
        return math.nan, math.nan

    def wls(w):
        if nseg == 1:  # closed form of the weighted line (the usual case: no step)
            sw = float(w.sum())
            tm = float(np.dot(w, X[:, 1])) / sw
            ym = float(np.dot(w, y)) / sw
            dt = X[:, 1] - tm
            k = float(np.dot(w * dt, y - ym)) / float(np.dot(w * dt, dt))
            return np.array([ym - k * tm, k])
        sq = np.sqrt(w)
        return np.linalg.lstsq(X * sq[:, None], y * sq, rcond=None)[0]

    beta = wls(np.ones(t.size))
    scale = max(float(np.median(np.abs(y - X @ beta))), 1e-9)
    for _ in range(40):
        r = y - X @ beta
        w = np.where(r > 0, quantile, 1.0 - quantile) / np.maximum(np.abs(r), 1e-3 * scale)
        new = wls(w)
        done = np.max(np.abs(new - beta)) < 1e-8
        beta = new
        if done:
            break
    r = y - X @ beta
    # sparsity 1 / f(0) of the residuals at the fitted quantile, by the difference quotient of their quantiles
    # with the Hall-Sheather bandwidth (Koenker, Quantile Regression, 2005, section 3.4)
    n = r.size
    nd = NormalDist()
    zq = nd.inv_cdf(quantile)
    h = n ** (-1 / 3) * nd.inv_cdf(0.975) ** (2 / 3) * (1.5 * nd.pdf(zq) ** 2 / (2 * zq * zq + 1)) ** (1 / 3)
    h = min(h, 0.99 * quantile, 0.99 * (1 - quantile))
    lo, hi = np.quantile(r, [quantile - h, quantile + h])
    sparsity = max(float(hi - lo) / (2 * h), 1e-12)
    inflation = _correlation_inflation(r)
    try:
        cov = np.linalg.inv(X.T @ X)
    except np.linalg.LinAlgError:
        return 100.0 * float(beta[-1]), math.nan
    # iid quantile-regression variance q (1 - q) s² (X'X)⁻¹, inflated for serially correlated residuals (AR(1))
    se = sparsity * math.sqrt(quantile * (1 - quantile) * max(float(cov[-1, -1]), 0.0)) * inflation
    return 100.0 * float(beta[-1]), math.nan if few else 100.0 * se


def _correlation_inflation(r: np.ndarray) -> float:
    """``sqrt`` of the integrated autocorrelation time of the residuals, ``1 + 2 sum rho_k`` summed while the
    autocorrelation stays positive (Geyer's initial positive sequence, Statistical Science 7:473, 1992): how many
    points count as one independent one. Autocorrelation by FFT (numpy)."""
    n = r.size
    rc = r - r.mean()
    den = float(np.dot(rc, rc))
    if n < 4 or den <= 0:
        return 1.0
    spec = np.fft.rfft(rc, 2 * n)
    acf = np.fft.irfft(spec * np.conj(spec))[: n // 2] / den
    neg = np.flatnonzero(acf[1:] <= 0)
    stop = int(neg[0]) + 1 if neg.size else acf.size
    tau = 1.0 + 2.0 * float(np.sum(acf[1:stop]))
    return math.sqrt(min(max(tau, 1.0), float(n)))


def _percentile(values, q: float) -> float:
    """``numpy.percentile(values, q)`` (its default linear interpolation) for the short arrays of the trackers, by
    a sort: numpy's general routine costs about 100 µs a call, several times a block (the tests hold them equal)."""
    a = np.sort(np.asarray(values, dtype=float))
    pos = (a.size - 1) * q / 100.0
    i = int(math.floor(pos))
    j = min(i + 1, a.size - 1)
    return float(a[i] + (a[j] - a[i]) * (pos - i))


def judgeable(slope_pct_per_min: float, se_pct_per_min: float) -> bool:
    """Whether a bleach slope is known well enough to print: its 95 % interval is within ± 1 %/min or ± 30 % of
    itself (see ``_JUDGE_ABS``)."""
    if not (math.isfinite(slope_pct_per_min) and math.isfinite(se_pct_per_min)):
        return False
    return 2.0 * se_pct_per_min <= max(_JUDGE_ABS, _JUDGE_REL * abs(slope_pct_per_min))


class LevelSteps:
    """Sudden, sustained changes of the above-dark brightness (detector gain or laser power changed).

    Fed block means; a step is found when the 20th percentile of the last ``_STEP_RECENT_S`` seconds differs by
    more than ``_STEP_FACTOR`` from that of the ``_STEP_BEFORE_S`` seconds before them, and the level stayed on the
    new side through the recent window. Low percentiles follow the resting level, which a gain or power step
    scales and transients leave; bleaching never changes the level by that factor within seconds. After a step the comparison starts again from the blocks after it.
    """

    def __init__(self, block_s: float, *, factor: float = _STEP_FACTOR):
        self.factor = float(factor)
        self._recent_n = max(3, int(round(_STEP_RECENT_S / block_s)))
        self._before_n = max(3, int(round(_STEP_BEFORE_S / block_s)))
        self._blocks: deque[tuple[float, float]] = deque(maxlen=self._recent_n + self._before_n)

    def update(self, t: float, level: float) -> tuple[float, float, list[tuple[float, float]]] | None:
        """Add a block; return (factor, time of the step, blocks after it) when a step is found, else None."""
        self._blocks.append((t, level))
        if len(self._blocks) < self._recent_n + max(3, self._before_n // 5):  # at least 2 s before the recent 3 s
            return None
        vals = np.fromiter((b for _, b in self._blocks), float)
        before = _percentile(vals[: -self._recent_n], _STEP_PERCENTILE)
        after = _percentile(vals[-self._recent_n:], _STEP_PERCENTILE)
        if not (before > 0 and after > 0):
            # levels at or below dark: a ratio means nothing; a change of sign of a big level is still a step
            return None
        ratio = after / before
        if 1.0 / self.factor <= ratio <= self.factor:
            return None
        # where: the first of the recent blocks past the geometric mean of the two levels, counted from the end
        mid = math.sqrt(before * after)
        recent = list(self._blocks)[-self._recent_n:]
        up = ratio > 1
        start = len(recent)
        for i in range(len(recent) - 1, -1, -1):
            if (recent[i][1] > mid) == up:
                start = i
            else:
                break
        # a step needs the level on the new side through (nearly) all of the recent window: sustained for 3 s
        kept = recent[start:]
        if len(kept) < self._recent_n - 1:
            return None
        # the factor between the levels on either side of the step point
        n_before = len(self._blocks) - len(kept)
        ratio = _percentile([b for _, b in kept], _STEP_PERCENTILE) / _percentile(vals[:n_before], _STEP_PERCENTILE)
        self._blocks.clear()
        for item in kept:
            self._blocks.append(item)
        return ratio, kept[0][0], kept



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
        Bleach slope over the trailing window (from the first block on), % of the initial baseline per minute;
        negative means dimming. NaN while it is too uncertain to judge (:func:`judgeable`).
    step_factor : float
        Set (new level / old level) on the one update at which a step of the level was found; NaN otherwise.
    """

    baseline_f: float
    brightness_pct: float
    bleach_pct_per_min: float
    step_factor: float = math.nan


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
    se_pct_per_min : float
        Standard error of the slope (:func:`bleach_rate`).
    """

    slope_pct_per_min: float
    tau_min: float
    r2: float
    se_pct_per_min: float = math.nan


class BrightnessTracker:
    """Baseline brightness and bleach rate in constant memory.

    Parameters
    ----------
    window_s : float, optional
        Kept for the settings' sake (default 60): the bleach slope is fitted to every block since the start of the
        session (or the last step), which has no lag.
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
        Frame means kept for the bleach fit (default 1024); when full, neighbouring points are merged in pairs.

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
                 percentile: float = 20.0, block_s: float = 0.25, max_history: int = 1024):
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
        self._steps = LevelSteps(self.block_s)
        self._n_blocks = 0
        self._next_fit = 0
        self._step: float = math.nan
        self.n_steps = 0

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
        self._add_history(t, f)
        if not math.isnan(self._step):  # reported once, on the update that found it
            step, self._step = self._step, math.nan
            st = self._state
            return BrightnessState(st.baseline_f, st.brightness_pct, st.bleach_pct_per_min, step)
        return self._state

    def _restart(self, kept: list[tuple[float, float]], t0: float) -> None:
        """After a step: baseline, initial level, bleach window and history start again from the blocks after it."""
        self._blocks.clear()
        self._window.clear()
        self._hist_t, self._hist_b, self._hist_w = [], [], []
        self._unit = 1
        self._pend_t = self._pend_b = 0.0
        self._pend_n = 0
        self._t0 = t0
        self.initial_f = math.nan
        self._n_blocks = 0
        self._next_fit = 0
        self._state = BrightnessState(math.nan, math.nan, math.nan)
        self.n_steps += 1
        for t, b in kept[:-1]:
            self._add_history(t, b)
            self._block(t, b)
        self._add_history(*kept[-1])  # the block being closed (its frames went to the history just cleared)

    def _close_block(self) -> None:
        mid = self._block_start + 0.5 * self.block_s
        value = self._block_sum / self._block_n
        self._block_sum, self._block_n = 0.0, 0
        found = self._steps.update(mid, value)
        if found is not None:
            self._step = found[0]
            self._restart(found[2], found[1] - 0.5 * self.block_s)
        self._block(mid, value)

    def _block(self, mid: float, value: float) -> None:
        self._blocks.append(value)
        baseline = _percentile(np.fromiter(self._blocks, float), self.percentile)
        ready = len(self._blocks) == self._blocks.maxlen
        if math.isnan(self.initial_f) and ready and mid - self._t0 >= self.initial_s:
            self.initial_f = baseline
        # the bleach slope rests on the block means themselves, from the first block on (no trailing filter),
        # refitted once a second over every block since the start (or the last step), decimated in the history
        self._n_blocks += 1
        slope = self._state.bleach_pct_per_min
        # refitted every second for the first minute, then every 1/60 of the time elapsed (a few ms a fit; about
        # 60 + 60 ln(T / 1 min) fits in a session of T minutes)
        every = max(1, int(round(max(1.0, (mid - self._t0) / 60.0) / self.block_s)))
        if self._n_blocks >= 8 and self._n_blocks >= self._next_fit:
            self._next_fit = self._n_blocks + every
            rate, se = bleach_rate(self._hist_t, self._hist_b)
            slope = math.nan
            if judgeable(rate, se):
                # % of the current level per minute -> % of the initial level per minute, from the fitted
                # exponential itself (the percentile baseline would bring its lag back)
                slope = rate * math.exp(rate / 100.0 * (mid - self._t0) / 60.0)
        if not ready:
            self._state = BrightnessState(baseline, math.nan, float(slope))
            return
        pct = 100.0 * baseline / self.initial_f if self.initial_f > 0 else math.nan
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
        """Quantile fit of ``b0 exp(-t / tau)`` to the block means since the start (or the last step), decimated.

        Returns
        -------
        fit : BleachFit
            NaN fields with a UserWarning when fewer than 4 points or non-positive levels.
        """
        t = np.asarray(self._hist_t)
        b = np.asarray(self._hist_b)
        if t.size < 4 or np.ptp(t) <= 0 or not np.any(b > 0):
            warnings.warn("bleach fit undefined: fewer than 4 brightness points or a level <= 0",
                          UserWarning, stacklevel=2)
            return BleachFit(math.nan, math.nan, math.nan)
        rate, se = bleach_rate(t, b)
        minutes = (t - self._t0) / 60.0
        ok = b > 0
        logb = np.log(b[ok])
        resid = logb - (np.median(logb - rate / 100.0 * minutes[ok]) + rate / 100.0 * minutes[ok])
        ss_tot = float(np.sum((logb - logb.mean()) ** 2))
        r2 = 1.0 - float(np.sum(resid**2)) / ss_tot if ss_tot > 0 else math.nan
        tau = -100.0 / rate if rate < 0 else math.inf
        return BleachFit(float(rate), float(tau), r2, float(se))

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
