"""Offset between the two scan directions of a bidirectionally scanned frame."""

from __future__ import annotations

import functools
import math
import warnings

import numpy as np
from scipy import fft as sfft

from qcmon.metrics._imageops import tukey_window
from qcmon.metrics._validate import as_image, positive_int

__all__ = ["line_offset_px", "line_offset_rows", "line_rows"]


def line_offset_px(frame, *, row_step: int = 1, upsample: int = 100, valid=None) -> float:
    """Subpixel shift of the odd rows' content against the even rows' (bidirectional scanning).

    Each odd row is compared with the mean of the even rows above and below it (so that a slanted structure,
    which shifts from one row to the next, does not bias the result). The 1-D cross-power spectra of these row
    pairs (row means removed) are summed, the integer peak of their inverse transform is found, and the peak is
    refined by evaluating the band-limited cross-correlation on a fine grid around it (the 1-D form of the
    matrix-multiply DFT upsampling of Guizar-Sicairos et al. 2008).

    Parameters
    ----------
    frame : (M, N) array_like
        One frame, rows by columns, M >= 3, N >= 8, any integer or float dtype.
    row_step : int, optional
        Use every ``row_step``-th odd row only (fewer FFTs; precision falls roughly as ``sqrt(row_step)``).
        Default 1.
    upsample : int, optional
        The peak is found on a 0.1 px grid, then on a ``1 / upsample`` px grid around it, then refined by a
        parabola through the three best points. Default 100.
    valid : (M, N) bool array_like, optional
        True where a pixel is usable; False (saturated, clipped at the floor) carries no weight. A pixel is left
        out of the comparison of an odd row with its even neighbours when it or the pixel above or below it is
        unusable; the weight rises again over a few pixels (:data:`_EDGE_PX`), so that the edge of an unusable
        region, the same in both scan directions, does not pull the offset toward zero. None: every pixel.

    Returns
    -------
    offset_px : float
        Shift of the odd rows' content relative to the even rows', in px, + toward increasing column index,
        in ``(-N/2, N/2)``. NaN with a UserWarning when the frame has no structure along the rows (e.g. constant).

    Notes
    -----
    A pure shift ``d`` makes the cross-correlation the autocorrelation translated by ``d``; the autocorrelation is
    symmetric, so the maximum of its band-limited interpolation lies exactly at ``d``. The spectrum is not
    whitened (no phase-correlation normalisation): at a few photons per pixel the high frequencies are mostly
    shot noise, and whitening would give them the same weight as the structured low frequencies. Frames are
    not periodic; content leaving one edge and entering the other makes a bias of order ``d / N`` of the shift,
    well below 0.01 px for ``|d| <= 3`` px at N = 512.

    References
    ----------
    .. [1] C. D. Kuglin and D. C. Hines, "The phase correlation image alignment method", Proc. IEEE Int. Conf.
       Cybernetics and Society, 163-165 (1975).
    .. [2] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient subpixel image registration
       algorithms", Optics Letters 33(2), 156-158 (2008).
    """
    a = as_image(frame, "frame", min_shape=(3, 8))
    row_step = positive_int(row_step, "row_step")
    m = a.shape[0]
    stop = 2 * ((m - 1) // 2)  # one past the last odd row that has an even row on both sides
    step = 2 * row_step
    v = None
    if valid is not None:
        v = np.asarray(valid)
        if v.shape != a.shape or v.dtype != np.bool_:
            raise ValueError(f"valid must be a boolean mask of shape {a.shape}, got {v.dtype} {v.shape}")
        v = (v[0:stop - 1:step], v[1:stop:step], v[2:stop + 1:step])
    # strided views of the chosen odd rows and of the even rows above and below them (no gather)
    return _offset(a[0:stop - 1:step], a[1:stop:step], a[2:stop + 1:step], upsample, stacklevel=3, valid=v)


def line_rows(n_rows: int, *, row_step: int = 1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The rows :func:`line_offset_px` reads from an ``n_rows``-row frame: (even rows above, odd rows, even rows
    below), each an index array, for callers that keep only those rows (:func:`line_offset_rows`)."""
    if n_rows < 3:
        raise ValueError(f"a frame needs at least 3 rows for the line offset, got {n_rows}")
    step = 2 * positive_int(row_step, "row_step")
    odd = np.arange(1, 2 * ((n_rows - 1) // 2), step)
    return odd - 1, odd, odd + 1


def line_offset_rows(above, odd, below, *, upsample: int = 100, valid=None) -> float:
    """:func:`line_offset_px` from the rows it reads only: ``odd`` rows and the even rows ``above`` and ``below``
    them, each (K, N), as chosen by :func:`line_rows`. The same computation, so the same value. ``valid``, if
    given, is a (K, N) bool array: True where the pixel of ``odd`` and those of ``above`` and ``below`` beside it
    are all usable (see :func:`line_offset_px`)."""
    rows = [as_image(r, name, min_shape=(1, 8)) for r, name in ((above, "above"), (odd, "odd"), (below, "below"))]
    if not rows[0].shape == rows[1].shape == rows[2].shape:
        raise ValueError(f"above, odd and below must have one shape, got {[r.shape for r in rows]}")
    if valid is not None:
        valid = np.asarray(valid)
        if valid.shape != rows[1].shape or valid.dtype != np.bool_:
            raise ValueError(f"valid must be a boolean mask of shape {rows[1].shape}, got {valid.dtype} "
                             f"{valid.shape}")
        valid = (valid,)
    return _offset(*rows, upsample, stacklevel=3, valid=valid)


#: Width (px) over which the weight beside an unusable pixel rises from 0 to 1 along a row.
_EDGE_PX = 3


def _row_weights(valid: tuple, taper: np.ndarray) -> np.ndarray | None:
    """Per-row weights: the edge taper times 0 where a pixel (or, given three masks, its neighbour above or below)
    is unusable, rising over :data:`_EDGE_PX` px beside it (``w0 · box(w0)²``, as the registration's weights).
    None when every pixel is usable."""
    good = valid[0].copy() if len(valid) == 1 else valid[0] & valid[1] & valid[2]
    if good.all():
        return None
    from scipy import ndimage

    w0 = good.astype(np.float32)
    box = ndimage.uniform_filter1d(w0, 2 * _EDGE_PX + 1, axis=1, mode="nearest")
    w0 *= box
    w0 *= box
    w0 *= taper
    return w0


def _offset(above: np.ndarray, odd: np.ndarray, below: np.ndarray, upsample: int, *, stacklevel: int,
            valid: tuple | None = None) -> float:
    upsample = positive_int(upsample, "upsample")
    n = odd.shape[1]
    odd = odd.astype(np.float32)
    even = np.add(above, below, dtype=np.float32)
    even *= np.float32(0.5)
    taper = _edge_taper(n)
    w = _row_weights(valid, taper) if valid is not None else None
    if w is None:
        odd -= odd.mean(axis=1, keepdims=True)
        odd *= taper
        even -= even.mean(axis=1, keepdims=True)
        even *= taper
    else:
        # each row less its mean over the weighted pixels, times the weights: the products hold no edge of their
        # own (rows without a usable pixel get weight 0 throughout)
        sw = w.sum(axis=1, keepdims=True)
        sw[sw <= 0] = np.inf
        for x in (odd, even):
            x -= (x * w).sum(axis=1, keepdims=True) / sw
            x *= w
    spec = sfft.rfft(np.concatenate((odd, even)), axis=1)
    k = odd.shape[0]
    cross = np.einsum("ij,ij->j", spec[:k], spec[k:].conj()).astype(np.complex128)
    if n % 2 == 0:
        cross[-1] = 0.0  # the Nyquist term has no well-defined phase for a fractional shift
    if not np.any(np.abs(cross) > 0):
        warnings.warn("line_offset_px: the frame has no structure along its rows; offset undefined",
                      UserWarning, stacklevel=stacklevel)
        return math.nan
    corr = sfft.irfft(cross, n=n)
    peak = int(np.argmax(corr))
    if peak > n // 2:
        peak -= n
    best = _refine_peak(cross, n, float(peak), half_width=1.0, step=0.1)
    best = _refine_peak(cross, n, best, half_width=0.1, step=0.1 * 10.0 / upsample)
    return float(best)


@functools.lru_cache(maxsize=8)
def _edge_taper(n: int) -> np.ndarray:
    """Tukey window (25 % cosine edges) so the jump between a row's two ends does not pull the peak to 0."""
    taper = tukey_window(n, 0.25).astype(np.float32)
    taper.setflags(write=False)  # shared between calls
    return taper


def _refine_peak(cross: np.ndarray, n: int, centre: float, *, half_width: float, step: float) -> float:
    """Maximum of the band-limited cross-correlation ``c(s)`` on a grid of ``step`` px around ``centre``.

    ``c(s) = Re[C_0 + 2 * sum_{k>=1} C_k exp(2 pi i k s / n)]`` from the half spectrum ``C`` of a real signal.
    """
    h = round(half_width / step)
    shifts = centre + step * np.arange(-h, h + 1)
    weighted = 2.0 * cross
    weighted[0] = cross[0]
    # exp(2 pi i k s / n) on the grid: the first point's phases, then rotated by one step at a time
    k = (2j * np.pi / n) * np.arange(cross.size)
    kernel = np.empty((shifts.size, cross.size), dtype=np.complex128)
    kernel[0] = np.exp(k * shifts[0])
    kernel[1:] = np.exp(k * step)
    np.cumprod(kernel, axis=0, out=kernel)
    values = (kernel @ weighted).real
    i = int(np.argmax(values))
    if 0 < i < values.size - 1:  # parabolic interpolation between the finest grid points
        y0, y1, y2 = values[i - 1], values[i], values[i + 1]
        denom = y0 - 2 * y1 + y2
        frac = 0.5 * (y0 - y2) / denom if denom < 0 else 0.0
        return float(shifts[i] + frac * step)
    return float(shifts[i])
