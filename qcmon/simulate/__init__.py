"""Simulated two-photon calcium-imaging sessions with known ground truth (qcmon's demo and test data)."""

from __future__ import annotations

from qcmon.simulate._activity import hill, indicator_fluorescence
from qcmon.simulate._config import SimConfig, config_from_dict, config_to_dict
from qcmon.simulate._core import TRUTH_COLUMNS, SimResult, Simulator, iter_pages, simulate
from qcmon.simulate._motion import planted_events
from qcmon.simulate._optics import axial_profile, axial_radius_um, lateral_radius_um, sphere_axial_fraction
from qcmon.simulate._write import LAYOUTS, RAW_SIDECAR_KEYS, write_session
from qcmon.simulate.scenarios import SCENARIOS, scenario_config

__all__ = [
    "SimConfig", "SimResult", "Simulator", "TRUTH_COLUMNS", "simulate", "iter_pages", "hill",
    "indicator_fluorescence", "axial_radius_um", "lateral_radius_um", "axial_profile", "sphere_axial_fraction",
    "planted_events", "config_to_dict", "config_from_dict", "write_session", "LAYOUTS", "RAW_SIDECAR_KEYS",
    "SCENARIOS", "scenario_config",
]
