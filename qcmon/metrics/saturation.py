"""Saturated and clipped pixels: exact fractions of pixels at the detector's limits."""

from __future__ import annotations

import math

import numpy as np

from qcmon.metrics._validate import as_image, finite_float

__all__ = ["detector_max", "saturation_fractions"]


def detector_max(dtype, bit_depth: int | None = None) -> float:
    """Largest value the detector can record.

    Parameters
    ----------
    dtype : numpy dtype or type
        Pixel dtype of the frames as stored.
    bit_depth : int, optional
        Significant bits of the digitiser (e.g. 12 or 14 when 16-bit words are stored). Required for a
        meaningful limit with float frames.

    Returns
    -------
    max_value : float
        ``2**bit_depth - 1`` when ``bit_depth`` is given, else the largest value of an integer ``dtype``
        (``numpy.iinfo(dtype).max``); ``inf`` for a float dtype without ``bit_depth`` (nothing counts as
        saturated).

    Raises
    ------
    ValueError
        If ``dtype`` is not numeric, or ``bit_depth`` is not a positive integer or needs more bits than an
        integer ``dtype`` holds.

    Notes
    -----
    A signed integer dtype stores ``bit_depth`` significant bits in its non-negative half, so ``bit_depth`` may be
    at most ``bits - 1`` there (e.g. 15 for int16). Common practice, no source.
    """
    try:
        dt = np.dtype(dtype)
    except TypeError:
        raise ValueError(f"dtype must be a numpy dtype, got {dtype!r}") from None
    if dt.kind not in "uif":
        raise ValueError(f"dtype must be an integer or float dtype, got {dt}")
    if bit_depth is not None:
        if isinstance(bit_depth, bool) or not isinstance(bit_depth, (int, np.integer)) or bit_depth < 1:
            raise ValueError(f"bit_depth must be a positive integer, got {bit_depth!r}")
        if dt.kind in "ui":
            usable = dt.itemsize * 8 - (1 if dt.kind == "i" else 0)
            if bit_depth > usable:
                raise ValueError(f"bit_depth={bit_depth} does not fit in {dt} (at most {usable} bits)")
        return float(2 ** int(bit_depth) - 1)
    if dt.kind in "ui":
        return float(np.iinfo(dt).max)
    return math.inf


def saturation_fractions(frame, *, max_value: float, floor: float = 0) -> tuple[float, float]:
    """Fractions of pixels at or above the detector maximum and at or below the floor.

    Parameters
    ----------
    frame : (M, N) array_like
        One frame, any integer or float dtype.
    max_value : float
        Detector maximum in DN (see :func:`detector_max`); pixels ``>= max_value`` are saturated.
    floor : float, optional
        Lowest recordable value in DN; pixels ``<= floor`` are clipped. Default 0.

    Returns
    -------
    saturated_frac, clipped_frac : float
        Exact fractions (0..1) of all pixels. NaN pixels count as neither.

    Notes
    -----
    The minimum and maximum of the frame are computed first (two fast reductions); the pixels are counted only
    when a limit is actually reached, which on most frames it is not. The result is exact either way.
    """
    a = as_image(frame, "frame")
    hi = float(max_value) if np.isinf(max_value) else finite_float(max_value, "max_value")
    lo = finite_float(floor, "floor")
    if lo >= hi:
        raise ValueError(f"floor ({lo}) must be below max_value ({hi})")
    n = a.size
    if a.dtype.kind == "f" and np.isnan(a).any():
        # Comparisons with NaN are False, so NaN pixels count as neither; min/max shortcuts do not apply.
        return np.count_nonzero(a >= hi) / n, np.count_nonzero(a <= lo) / n
    saturated = np.count_nonzero(a >= hi) / n if a.max() >= hi else 0.0
    clipped = np.count_nonzero(a <= lo) / n if a.min() <= lo else 0.0
    return float(saturated), float(clipped)
