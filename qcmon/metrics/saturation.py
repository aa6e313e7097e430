"""Saturated and clipped pixels: exact fractions of pixels at the detector's limits."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from qcmon.metrics._validate import as_image, finite_float

__all__ = ["detector_max", "detector_min", "saturation_fractions", "find_pileup", "RangeFinder", "RangeLevel"]


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


def detector_min(dtype) -> float:
    """Lowest value a ``dtype`` can hold: 0 for unsigned, the dtype minimum for signed, ``-inf`` for float."""
    dt = np.dtype(dtype)
    if dt.kind in "ui":
        return float(np.iinfo(dt).min)
    return -math.inf


#: Fewest pixels at one extreme value that can count as a pile-up (a clipped detector range). Below this, a
#: missed ceiling changes a saturated fraction by less than 16 / 65536 = 0.00024 even at 256².
PILEUP_MIN_PIXELS = 16
#: Width (in values, integer data) of each of the two bands of the histogram next to the extreme value from which
#: the count at the extreme is predicted.
_BAND_VALUES = 8


def find_pileup(frame, *, top: bool, extreme: float | None = None) -> tuple[float, int] | None:
    """The value at which pixels pile up at one end of the histogram, if they do: ``(value, count)`` or None.

    A detector that clips records every value beyond its range as the range's end, so the histogram shows an
    excess count at the extreme value over what its neighbouring values predict. The test: let ``c`` be the
    count at the extreme value ``v`` (the frame's maximum for ``top=True``, its minimum otherwise), ``r1`` and
    ``r2`` the mean counts per *occupied* value in the two bands of 8 values next to ``v`` (``r1`` the nearer;
    counting occupied values only keeps combs — a gain of several DN per photon without read noise — from
    diluting the rates). A smooth histogram predicts at ``v`` at most ``p = r1 · max(1, r1 / r2)`` (a geometric
    extrapolation one band on, never below the nearer band). ``v`` is a pile-up when ``c ≥ 16`` and
    ``c > 3 p + 5 √(p + 1)``: for a Poisson count of mean ``p`` that bound lies more than 5 standard deviations
    out. When no value within the two bands is occupied (integer data whose comb is wider than 16 values: a
    photon-counting detector without read noise at more than 16 DN per photon), the bands are the next 8 and the
    8 after them of the *occupied* values instead. A histogram that rises steeply toward ``v`` (``r1 > 0 = r2``, e.g. the zero-photon peak of
    photon-counting data at the floor) gives no decision (None): a steep natural peak and a clip cannot be told
    apart there. A constant frame gives None (nothing to compare with), except at a ceiling of 2ⁿ − 1
    (n = 8…16): a digitiser clipped over the whole field (2ⁿ − 1: common practice, no source). The rule and its
    constants are our own choice (no published source); they are tested on n-bit camera-model data and on smooth
    tails.

    Float frames: bands of 1/256 of the frame's range instead of 8 values.
    """
    a = as_image(frame, "frame")
    if a.dtype.kind == "f":
        a = a[np.isfinite(a)]
        if a.size == 0:
            return None
    lo_v, hi_v = float(a.min()), float(a.max())
    if lo_v == hi_v:
        # a constant frame: a ceiling only at a digitiser's 2^n - 1 (n = 8..16), the whole frame clipped there
        n = math.log2(hi_v + 1) if hi_v > 0 else 0.0
        if top and a.size >= PILEUP_MIN_PIXELS and n == int(n) and 8 <= n <= 16:
            return hi_v, int(a.size)
        return None
    v = (hi_v if top else lo_v) if extreme is None else float(extreme)
    c = int(np.count_nonzero(a == v))
    if c < PILEUP_MIN_PIXELS:
        return None
    if a.dtype.kind in "ui":
        w = _BAND_VALUES
        if top:
            sel = a[a >= v - 2 * w]
            counts = np.bincount((sel - (v - 2 * w)).astype(np.int64), minlength=2 * w + 1)[::-1]
        else:
            sel = a[a <= v + 2 * w]
            counts = np.bincount((sel - v).astype(np.int64), minlength=2 * w + 1)
        b1, b2 = counts[1:w + 1], counts[w + 1:2 * w + 1]
        if not b1.any() and not b2.any():
            # a comb wider than the bands (a gain of more than 2w DN per photon without read noise): compare with
            # the next 2w occupied values instead — the zero-photon peak of such data must not read as a clip
            vals, cnt = np.unique(a[a < v] if top else a[a > v], return_counts=True)
            near = cnt[::-1][:2 * w] if top else cnt[:2 * w]
            b1, b2 = near[:w], near[w:]
    else:
        w = (hi_v - lo_v) / 256.0
        if top:
            sel = a[a >= v - 2 * w]
            d = v - sel
        else:
            sel = a[a <= v + 2 * w]
            d = sel - v
        vals, cnt = np.unique(d, return_counts=True)
        b1 = cnt[(vals > 0) & (vals <= w)]
        b2 = cnt[(vals > w) & (vals <= 2 * w)]
    r1 = float(b1[b1 > 0].mean()) if np.any(b1 > 0) else 0.0
    r2 = float(b2[b2 > 0].mean()) if np.any(b2 > 0) else 0.0
    if r1 > 0 and r2 == 0:
        return None
    p = r1 * max(1.0, r1 / r2) if r1 > 0 else 0.0
    if c > 3.0 * p + 5.0 * math.sqrt(p + 1.0):
        return v, c
    return None


@dataclass(slots=True)
class RangeLevel:
    """One end of the detector's range: its value (DN), where it came from, and a sentence saying so.

    ``origin`` is one of ``"option"``, ``"metadata"``, ``"inferred"`` (a pile-up in the data), ``"dtype"``.
    """

    value: float
    origin: str
    text: str


def _power_note(v: float) -> str:
    n = math.log2(v + 1) if v > 0 else 0
    return f" (2^{int(round(n))} − 1)" if v > 0 and abs(n - round(n)) < 1e-12 else ""


class RangeFinder:
    """The detector's saturation ceiling and floor, from the bit depth when given, else from the data.

    ``--bit-depth`` or metadata fix the ceiling at ``2ⁿ − 1``; otherwise it is the dtype's maximum until a pile-up
    (:func:`find_pileup`) shows the level the data actually reach. The floor is the dtype's minimum (0 for unsigned
    data) until a pile-up at the lowest value shows it. The check is cheap per frame: the engine hands each
    frame's minimum and maximum (computed anyway for the saturated fractions); the histogram test runs on the
    first frames, whenever a frame reaches a new extreme, and every ``recheck`` frames otherwise. A level found
    late applies from that frame on and :meth:`observe` returns a sentence for the record; an inferred level
    that a later frame exceeds is withdrawn, also with a sentence.

    ``clip_floor`` is True when the floor is a demonstrated clip (a pile-up): only then do floor pixels get zero
    weight in the linear measurements. The dtype minimum alone is no evidence of clipping — 0 is a true value
    of photon-counting data.
    """

    def __init__(self, dtype, *, bit_depth: int | None = None, bit_depth_origin: str = "option",
                 recheck: int = 32, first: int = 8):
        dt = np.dtype(dtype)
        self._dtype_max = detector_max(dt)
        self._dtype_min = detector_min(dt)
        if bit_depth is not None:
            v = detector_max(dt, bit_depth)
            self.ceiling = RangeLevel(v, bit_depth_origin,
                                      f"{v:g} from the bit depth {bit_depth} ({'--bit-depth' if bit_depth_origin == 'option' else bit_depth_origin})")
        else:
            self.ceiling = RangeLevel(self._dtype_max, "dtype", f"{self._dtype_max:g}, the largest value of {dt}"
                                      if math.isfinite(self._dtype_max) else f"none ({dt} has no ceiling)")
        self.floor = RangeLevel(self._dtype_min, "dtype", f"{self._dtype_min:g}, the smallest value of {dt}"
                                if math.isfinite(self._dtype_min) else f"none ({dt} has no floor)")
        self.clip_floor = False
        self.recheck = int(recheck)
        self.first = int(first)
        self._seen = 0
        self._last = {True: -10**9, False: -10**9}
        self._record = {True: -math.inf, False: math.inf}  # most extreme value tested so far

    def observe(self, frame: np.ndarray, fmin: float, fmax: float) -> list[str]:
        """Update the levels from one frame (with its precomputed minimum and maximum); sentences for the record."""
        notes: list[str] = []
        self._seen += 1
        for top in (True, False):
            lvl = self.ceiling if top else self.floor
            ext = fmax if top else fmin
            if not math.isfinite(ext):
                continue
            if lvl.origin == "inferred" and (ext > lvl.value if top else ext < lvl.value):
                dflt = self._dtype_max if top else self._dtype_min
                what = "ceiling" if top else "floor"
                notes.append(f"detector {what} {lvl.value:g} withdrawn: a frame reaches {ext:g}; "
                             f"the {what} is {dflt:g} (dtype) from here on")
                src = RangeLevel(dflt, "dtype", f"{dflt:g}, from the dtype (an inferred {what} was withdrawn)")
                if top:
                    self.ceiling = src
                else:
                    self.floor, self.clip_floor = src, False
                lvl = src
            if lvl.origin != "dtype" or (top and ext >= lvl.value):
                continue  # a level given or found; or pixels at the dtype's maximum, saturated whatever the depth
            beyond = ext > self._record[True] if top else ext < self._record[False]
            if not (self._seen <= self.first or beyond or self._seen - self._last[top] >= self.recheck):
                continue
            self._last[top] = self._seen
            self._record[top] = max(self._record[top], ext) if top else min(self._record[top], ext)
            found = find_pileup(frame, top=top, extreme=ext)
            if found is None:
                continue
            v, n = found
            what = "ceiling" if top else "floor"
            level = RangeLevel(v, "inferred", f"{v:g}{_power_note(v) if top else ''}, inferred from {n} pixels "
                                              f"piled up at {v:g}")
            if top:
                self.ceiling = level
            else:
                self.floor, self.clip_floor = level, True
            notes.append(f"detector {what} {level.text}")
        return notes
