"""Input checks shared by the photometric metrics."""

from __future__ import annotations

import numpy as np


def as_image(image, name: str, *, min_shape: tuple[int, int] = (1, 1)) -> np.ndarray:
    """Return ``image`` as a 2-D numeric ndarray (no copy when possible) or raise ValueError naming ``name``."""
    a = np.asarray(image)
    if a.ndim != 2:
        raise ValueError(f"{name} must be a 2-D array (rows, columns), got shape {a.shape}")
    if a.dtype.kind not in "uif":
        raise ValueError(f"{name} must have an integer or float dtype, got {a.dtype}")
    if a.shape[0] < min_shape[0] or a.shape[1] < min_shape[1]:
        raise ValueError(f"{name} must be at least {min_shape[0]} x {min_shape[1]} pixels, got {a.shape}")
    return a


def positive_int(value, name: str) -> int:
    """Return ``value`` as int if it is a positive integer, else raise ValueError naming ``name``."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")
    return int(value)


def finite_float(value, name: str) -> float:
    """Return ``value`` as a finite float, else raise ValueError naming ``name``."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number, got {value!r}") from None
    if not np.isfinite(v):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return v
