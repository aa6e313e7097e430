"""qcmon: live quality control of fluorescence imaging sessions."""

from __future__ import annotations

__version__ = "0.1.0"
