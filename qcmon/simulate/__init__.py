"""Simulated two-photon calcium-imaging sessions with known ground truth (qcmon's demo and test data).

The names below load their modules on first use (PEP 562), so that ``qcmon`` commands that do not simulate — and
``qcmon.simulate.cli``, which the command line builds its options from — do not pay for the simulator's imports.
"""

from __future__ import annotations

import importlib

_WHERE = {
    "hill": "_activity", "indicator_fluorescence": "_activity",
    "SimConfig": "_config", "config_from_dict": "_config", "config_to_dict": "_config", "LAYOUTS": "_config",
    "TRUTH_COLUMNS": "_core", "SimResult": "_core", "Simulator": "_core", "iter_pages": "_core", "simulate": "_core",
    "planted_events": "_motion",
    "axial_profile": "_optics", "axial_radius_um": "_optics", "lateral_radius_um": "_optics",
    "sphere_axial_fraction": "_optics",
    "RAW_SIDECAR_KEYS": "_write", "write_session": "_write",
    "SCENARIOS": "scenarios", "scenario_config": "scenarios",
}

__all__ = [
    "SimConfig", "SimResult", "Simulator", "TRUTH_COLUMNS", "simulate", "iter_pages", "hill",
    "indicator_fluorescence", "axial_radius_um", "lateral_radius_um", "axial_profile", "sphere_axial_fraction",
    "planted_events", "config_to_dict", "config_from_dict", "write_session", "LAYOUTS", "RAW_SIDECAR_KEYS",
    "SCENARIOS", "scenario_config",
]


def __getattr__(name: str):
    module = _WHERE.get(name)
    if module is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(f"{__name__}.{module}"), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
