"""Terminal dashboard of a live watch (textual)."""

from __future__ import annotations

from qcmon.ui.dashboard.app import QcmonApp, run_dashboard

__all__ = ["QcmonApp", "run_dashboard"]
