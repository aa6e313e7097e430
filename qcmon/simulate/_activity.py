"""Calcium activity: Poisson spikes, a rise-and-decay calcium kernel and the Hill equation."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["hill", "indicator_fluorescence", "CalciumState"]


def hill(c, kd: float, n: float) -> np.ndarray:
    """Fraction of indicator bound at concentration ``c``: ``c^n / (c^n + Kd^n)``.

    Parameters
    ----------
    c : array_like
        Free concentration (any unit, the same as ``kd``; nM in qcmon). Negative values are an error.
    kd : float
        Dissociation constant, the concentration of half occupancy.
    n : float
        Hill coefficient (1 gives the Michaelis-Menten / Langmuir form ``c / (c + Kd)``).

    Returns
    -------
    fraction : ndarray
        Between 0 and 1.

    References
    ----------
    Hill, A. V. (1910). The possible effects of the aggregation of the molecules of haemoglobin on its
    dissociation curves. J. Physiol. 40, iv-vii.
    """
    if not (kd > 0 and math.isfinite(kd)):
        raise ValueError(f"kd must be positive, got {kd!r}")
    if not (n > 0 and math.isfinite(n)):
        raise ValueError(f"n must be positive, got {n!r}")
    c = np.asarray(c, dtype=float)
    if np.any(c < 0):
        raise ValueError("c must be non-negative")
    # (c/kd)^n / (1 + (c/kd)^n) is the same expression, stable for large c
    x = (c / kd) ** n
    return x / (1.0 + x)


def indicator_fluorescence(c, *, kd: float, n: float, f_min: float, f_max: float) -> np.ndarray:
    """Indicator fluorescence ``F = Fmin + (Fmax - Fmin) · hill(c, Kd, n)``.

    Parameters
    ----------
    c : array_like
        Free calcium (nM).
    kd, n : float
        Dissociation constant (nM) and Hill coefficient.
    f_min, f_max : float
        Fluorescence of the free and of the saturated indicator (any unit).
    """
    return f_min + (f_max - f_min) * hill(c, kd, n)


class CalciumState:
    """Calcium of many cells advanced one sampling interval at a time (constant memory).

    Each spike adds ``A · (exp(-t/τd) - exp(-t/τr)) / peak`` to the resting level, a difference of
    exponentials normalised to a peak of ``A`` (nM). Two first-order recursions carry the two exponentials.

    Parameters
    ----------
    n_cells : int
    rate_hz : float
        Poisson firing rate per cell (Hz).
    rest_nm, per_spike_nm : float
        Resting calcium and peak increment per spike (nM).
    tau_rise_s, tau_decay_s : float
        Time constants (s), rise shorter than decay.
    rng : numpy.random.Generator
    """

    def __init__(self, n_cells: int, *, rate_hz: float, rest_nm: float, per_spike_nm: float,
                 tau_rise_s: float, tau_decay_s: float, rng: np.random.Generator):
        self.rate_hz = rate_hz
        self.rest_nm = rest_nm
        self.tau_rise_s = tau_rise_s
        self.tau_decay_s = tau_decay_s
        self.rng = rng
        tr, td = tau_rise_s, tau_decay_s
        t_peak = tr * td / (td - tr) * math.log(td / tr)
        peak = math.exp(-t_peak / td) - math.exp(-t_peak / tr)
        self._amp = per_spike_nm / peak
        self._slow = np.zeros(n_cells)
        self._fast = np.zeros(n_cells)

    def step(self, dt_s: float) -> tuple[np.ndarray, np.ndarray]:
        """Advance by ``dt_s`` seconds; return (spikes in the interval, calcium at its end in nM)."""
        spikes = self.rng.poisson(self.rate_hz * dt_s, self._slow.size)
        self._slow *= math.exp(-dt_s / self.tau_decay_s)
        self._fast *= math.exp(-dt_s / self.tau_rise_s)
        self._slow += spikes
        self._fast += spikes
        return spikes, self.rest_nm + self._amp * (self._slow - self._fast)
