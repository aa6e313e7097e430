"""Planted time courses: lateral motion, focal-plane drift, bleaching and gain, one value per sampled plane."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from qcmon.simulate._config import SimConfig

__all__ = ["Trajectory", "make_trajectory", "planted_events"]


@dataclass(frozen=True)
class Trajectory:
    """Per-instant truth, sampled once per (time point, plane): index ``k = frame * planes + plane``.

    Attributes
    ----------
    time_s : (K,) ndarray
        Acquisition instant of each plane image (s from the first frame).
    dx_px, dy_px : (K,) ndarray
        Shift of the content against the undisplaced specimen (the z-stack's position), + toward increasing
        column / row (px).
    z_um : (K,) ndarray
        Focal-plane offset from its starting position (µm, + deeper).
    gain : (K,) ndarray
        Conversion gain in force (DN/photon).
    bleach : (K, C) ndarray
        Remaining fraction of the fluorophore per channel, ``exp(-t / τ)``.
    """

    time_s: np.ndarray
    dx_px: np.ndarray
    dy_px: np.ndarray
    z_um: np.ndarray
    gain: np.ndarray
    bleach: np.ndarray


def ornstein_uhlenbeck(n: int, dt: float, tau: float, sigma: float, rng: np.random.Generator) -> np.ndarray:
    """Ornstein-Uhlenbeck samples starting at 0 (stationary standard deviation ``sigma``)."""
    a = np.exp(-dt / tau)
    noise = rng.standard_normal(n) * sigma * np.sqrt(1.0 - a * a)
    noise[0] = 0.0
    # x[k] = a x[k-1] + e[k]  — a first-order IIR filter
    from scipy.signal import lfilter  # scipy.signal takes seconds to load: only when a session is simulated

    return lfilter([1.0], [1.0, -a], noise)


def make_trajectory(config: SimConfig, rng: np.random.Generator) -> Trajectory:
    """Draw the motion and compute drift, gain and bleaching for every plane image of a session."""
    c = config
    k = np.arange(c.n_frames * c.planes)
    dt = 1.0 / (c.frame_rate_hz * c.planes)
    t = k * dt
    shifts = []
    for _axis in range(2):
        s = ornstein_uhlenbeck(k.size, dt, c.slow_drift_tau_s, c.slow_drift_px, rng)
        s = s + c.jitter_px * rng.standard_normal(k.size)
        shifts.append(s)
    dx, dy = shifts
    for t_jump, jx, jy in c.jumps:
        on = t >= t_jump
        dx = dx + jx * on
        dy = dy + jy * on
    for start, duration, amplitude in c.bursts:
        inside = (t >= start) & (t < start + duration)
        taper = np.where(inside, np.sin(np.pi * np.clip((t - start) / duration, 0, 1)) ** 2, 0.0)
        # fast wander (0.2 s correlation) scaled to the burst amplitude, zero outside the burst
        bx = ornstein_uhlenbeck(k.size, dt, 0.2, amplitude * np.sqrt(2.0), rng)
        by = ornstein_uhlenbeck(k.size, dt, 0.2, amplitude * np.sqrt(2.0), rng)
        dx = dx + bx * taper
        dy = dy + by * taper
    z = c.z_drift_um_per_min * t / 60.0
    for t_step, dz in c.z_steps:
        z = z + dz * (t >= t_step)
    gain = np.full(k.size, c.gain_dn_per_photon)
    if c.gain_change_time_s is not None:
        gain[t >= c.gain_change_time_s] *= c.gain_change_factor
    tau_s = np.asarray(c.bleach_tau_min[: c.channels], dtype=float) * 60.0
    bleach = np.exp(-t[:, None] / tau_s[None, :])
    return Trajectory(t, dx, dy, z, gain, bleach)


def planted_events(config: SimConfig) -> list[dict]:
    """The events a config plants, in time order, as JSON-ready dicts (what a QC tool should find)."""
    c = config
    ev: list[dict] = []
    if c.z_drift_um_per_min:
        ev.append({"kind": "z_drift", "time_s": 0.0, "end_s": c.duration_s,
                   "rate_um_per_min": c.z_drift_um_per_min,
                   "description": f"steady focal drift of {c.z_drift_um_per_min:+g} µm/min (+ deeper)"})
    for t, dz in c.z_steps:
        ev.append({"kind": "z_step", "time_s": t, "dz_um": dz,
                   "description": f"focal plane steps by {dz:+g} µm (+ deeper)"})
    for t, jx, jy in c.jumps:
        ev.append({"kind": "motion_jump", "time_s": t, "dx_px": jx, "dy_px": jy,
                   "description": f"content jumps by ({jx:+g}, {jy:+g}) px (x, y) and stays"})
    for t, d, a in c.bursts:
        ev.append({"kind": "motion_burst", "time_s": t, "end_s": t + d, "amplitude_px": a,
                   "description": f"strong motion (std up to {a:g} px) for {d:g} s"})
    if c.gain_change_time_s is not None and c.gain_change_factor != 1:
        ev.append({"kind": "gain_change", "time_s": c.gain_change_time_s, "factor": c.gain_change_factor,
                   "description": f"detector gain × {c.gain_change_factor:g}"})
    if c.line_offset_px:
        ev.append({"kind": "line_offset", "time_s": 0.0, "offset_px": c.line_offset_px,
                   "description": f"odd rows shifted {c.line_offset_px:+g} px against even rows"})
    return sorted(ev, key=lambda e: e["time_s"])
