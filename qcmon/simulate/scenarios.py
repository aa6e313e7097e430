"""Named scenarios: configs with planted events at fixed fractions of the session length ``T``.

- ``clean``: no planted event; slow wander (0.5 px) and fast jitter (0.15 px) only.
- ``drift``: focal drift of +2 µm/min over the whole session and a +2 µm focal step at 0.6 T.
- ``motion_burst``: strong motion (3 px std) from 0.4 T for 0.1 T, and a lasting jump of (+4, -3) px at 0.7 T.
- ``gain_saturation``: detector gain × 16 at 0.5 T (bright cells saturate the detector).
- ``rig_start``: what rigs write: the shutter closed for the first 0.1 T, a 13-bit digitiser in 16-bit pages
  without the bit depth in the file, three somata bright enough to saturate (moving with the specimen), and a
  stationary saturated patch (light leak) over a sixteenth of the field from 0.5 T for 0.15 T.
- ``demo``: focal drift +1.5 µm/min, strong motion (3 px) from 0.3 T for 0.08 T, gain × 16 at 0.7 T.

The events also appear in ``scenario.json`` (see :func:`qcmon.simulate.planted_events`).
"""

from __future__ import annotations

from qcmon.simulate._config import SimConfig

__all__ = ["SCENARIOS", "scenario_config"]

SCENARIOS: dict[str, str] = {
    "clean": "no planted event; slow wander and fast jitter only",
    "drift": "focal drift +2 µm/min and a +2 µm focal step at 60 % of the session",
    "motion_burst": "strong motion from 40 % for 10 % of the session; lasting (+4, -3) px jump at 70 %",
    "gain_saturation": "detector gain × 16 at 50 % of the session",
    "rig_start": "closed shutter for 10 %, 13-bit data, saturating cells, a stationary saturated patch at 50 %",
    "demo": "focal drift +1.5 µm/min, strong motion at 30 % for 8 %, gain × 16 at 70 %",
}


def scenario_config(name: str, **overrides) -> SimConfig:
    """A config for a named scenario.

    Parameters
    ----------
    name : str
        One of :data:`SCENARIOS`.
    **overrides
        Any :class:`SimConfig` field (e.g. ``n_frames``, ``height``); event times scale with the resulting
        session length. Event fields given here replace the scenario's.

    Returns
    -------
    SimConfig
    """
    if name not in SCENARIOS:
        raise ValueError(f"scenario must be one of {', '.join(SCENARIOS)}, got {name!r}")
    base = SimConfig(**overrides)
    T = base.duration_s
    events: dict = {}
    if name == "drift":
        events = {"z_drift_um_per_min": 2.0, "z_steps": ((0.6 * T, 2.0),)}
    elif name == "motion_burst":
        events = {"bursts": ((0.4 * T, 0.1 * T, 3.0),), "jumps": ((0.7 * T, 4.0, -3.0),)}
    elif name == "gain_saturation":
        events = {"gain_change_time_s": 0.5 * T, "gain_change_factor": 16.0}
    elif name == "rig_start":
        events = {"shutter_closed_s": 0.1 * T, "bright_cells": 3, "bright_cell_factor": 150.0, "bits": 13,
                  "saturated_patch": (0.5 * T, 0.65 * T, 0.2, 0.55, 0.25, 0.25)}
    elif name == "demo":
        events = {"z_drift_um_per_min": 1.5, "bursts": ((0.3 * T, 0.08 * T, 3.0),),
                  "gain_change_time_s": 0.7 * T, "gain_change_factor": 16.0}
    events = {k: v for k, v in events.items() if k not in overrides}
    return base.replace(scenario=name, **events)
