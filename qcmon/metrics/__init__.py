"""The metrics: pure functions and small state classes on numpy arrays (see the contributor guide).

:func:`bin_image` is the one image operation of the metrics' own toolbox (``_imageops``) that the engine uses too.
"""

from __future__ import annotations

from qcmon.metrics._imageops import bin_image

__all__ = ["bin_image"]
