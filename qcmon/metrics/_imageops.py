"""Small array helpers shared by the motion and focus metrics (validation, binning, integer shifts)."""

from __future__ import annotations

import warnings

import numpy as np


def as_image(image, name: str, *, shape: tuple[int, int] | None = None, min_size: int = 8) -> np.ndarray:
    """Check that ``image`` is a 2-D real numeric array and return it as an ndarray (no copy when possible).

    Raises
    ------
    ValueError
        Naming ``name`` when the array is not 2-D, is too small, has a non-numeric, boolean or complex dtype,
        or does not match ``shape``.
    """
    arr = np.asarray(image)
    if arr.dtype == bool or not (np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)):
        raise ValueError(f"{name} must hold real integer or floating-point pixels, got dtype {arr.dtype}")
    if arr.ndim != 2:
        raise ValueError(f"{name} must be a 2-D (rows, columns) image, got shape {arr.shape}")
    if shape is not None and arr.shape != tuple(shape):
        raise ValueError(f"{name} has shape {arr.shape}, expected {tuple(shape)} (the reference's shape)")
    if min(arr.shape) < min_size:
        raise ValueError(f"{name} must be at least {min_size} x {min_size} px, got shape {arr.shape}")
    return arr


def as_stack(stack, name: str, *, min_planes: int = 1) -> np.ndarray:
    """Check that ``stack`` is a 3-D (planes, rows, columns) real numeric array."""
    arr = np.asarray(stack)
    if arr.dtype == bool or not (np.issubdtype(arr.dtype, np.integer) or np.issubdtype(arr.dtype, np.floating)):
        raise ValueError(f"{name} must hold real integer or floating-point pixels, got dtype {arr.dtype}")
    if arr.ndim != 3:
        raise ValueError(f"{name} must be a 3-D (planes, rows, columns) array, got shape {arr.shape}")
    if arr.shape[0] < min_planes:
        raise ValueError(f"{name} must have at least {min_planes} planes, got {arr.shape[0]}")
    return arr


def finite_float32(arr: np.ndarray, name: str, *, stacklevel: int = 3, warn: bool = True) -> np.ndarray | None:
    """Return ``arr`` as float32 with non-finite pixels replaced by the mean of the finite ones.

    Returns None (after a UserWarning) when no pixel is finite or the image is constant, i.e. when nothing can
    be measured from it (``warn=False`` for callers that raise instead).
    """
    out = arr.astype(np.float32, copy=False)
    problem = None
    if np.issubdtype(arr.dtype, np.floating):
        finite = np.isfinite(out)
        if not finite.all():
            if not finite.any():
                problem = f"{name} has no finite pixel; result is NaN"
            else:
                out = np.where(finite, out, np.float32(out[finite].mean()))
    if problem is None:
        lo, hi = out.min(), out.max()
        if hi > lo:
            return out
        problem = f"{name} is constant (all pixels {float(lo):g}); result is NaN"
    if warn:
        warnings.warn(problem, UserWarning, stacklevel=stacklevel)
    return None


def auto_bin(shape: tuple[int, int], target: int = 256) -> int:
    """Integer bin factor that brings the larger side of ``shape`` to at most about ``target`` px."""
    return max(1, int(max(shape)) // int(target))


def tukey_window(n: int, alpha: float, *, sym: bool = True) -> np.ndarray:
    """Tukey (tapered cosine) window of ``n`` points, float64: flat, with cosine tapers over ``alpha`` of it.

    The same values as ``scipy.signal.windows.tukey(n, alpha, sym)`` for 0 < ``alpha`` < 1 (``sym=False``: the
    periodic window, for spectral analysis), without importing :mod:`scipy.signal`, which takes seconds to load
    and would delay every qcmon command's start.
    """
    if n <= 1:
        return np.ones(max(n, 0))
    m = n if sym else n + 1
    k = np.arange(m, dtype=np.float64)
    width = int(np.floor(alpha * (m - 1) / 2.0))
    w = np.ones(m)
    w[:width + 1] = 0.5 * (1 + np.cos(np.pi * (-1 + 2.0 * k[:width + 1] / alpha / (m - 1))))
    w[m - width - 1:] = 0.5 * (1 + np.cos(np.pi * (-2.0 / alpha + 1 + 2.0 * k[m - width - 1:] / alpha / (m - 1))))
    return w if sym else w[:-1]


def bin_image(image: np.ndarray, factor: int) -> np.ndarray:
    """Sum ``factor`` x ``factor`` blocks into float32 (trailing rows/columns that do not fill a block are dropped)."""
    if factor == 1:
        return image.astype(np.float32, copy=False)
    m = (image.shape[0] // factor) * factor
    n = (image.shape[1] // factor) * factor
    img = image[:m, :n]
    rows = np.add(img[0::factor], img[1::factor], dtype=np.float32)
    for i in range(2, factor):
        rows += img[i::factor]
    out = rows[:, 0::factor] + rows[:, 1::factor]
    for j in range(2, factor):
        out += rows[:, j::factor]
    return out


def shift_integer(src: np.ndarray, dy: int, dx: int, out: np.ndarray) -> np.ndarray:
    """Write ``src`` moved so that ``out[r, c] = src[r + dy, c + dx]``, edge pixels repeated outside ``src``.

    With (dy, dx) the content shift of a frame against its reference, this brings the frame back onto the
    reference grid.
    """
    m, n = src.shape
    dy = min(max(int(dy), -(m - 1)), m - 1)
    dx = min(max(int(dx), -(n - 1)), n - 1)
    r0, r1 = max(0, -dy), min(m, m - dy)  # destination rows with a source row
    c0, c1 = max(0, -dx), min(n, n - dx)
    out[r0:r1, c0:c1] = src[r0 + dy:r1 + dy, c0 + dx:c1 + dx]
    if r0 > 0:
        out[:r0, c0:c1] = out[r0, c0:c1]
    if r1 < m:
        out[r1:, c0:c1] = out[r1 - 1, c0:c1]
    if c0 > 0:
        out[:, :c0] = out[:, c0:c0 + 1]
    if c1 < n:
        out[:, c1:] = out[:, c1 - 1:c1]
    return out


def add_shifted(src: np.ndarray, dy: int, dx: int, out: np.ndarray) -> np.ndarray:
    """Add ``src`` moved as in :func:`shift_integer` to ``out`` in place, without an intermediate copy.

    ``out[r, c] += src[r + dy, c + dx]``, the edge pixels of ``src`` repeated outside it. ``out`` must be
    C-contiguous (it is written through a flat view), of ``src``'s shape.

    The rows that have a source row are added in one pass over the flattened arrays, offset by ``dy * N + dx``
    (a contiguous addition; a 2-D slice with a column offset is several times slower). That pass adds, in the
    ``|dx|`` columns at one side, pixels of the neighbouring source row; those columns are kept aside before it and
    given their edge pixel after it.
    """
    if out.shape != src.shape or not out.flags.c_contiguous:
        raise ValueError(f"out must be a C-contiguous array of the source's shape {src.shape}")  # flat view below
    m, n = src.shape
    dy = min(max(int(dy), -(m - 1)), m - 1)
    dx = min(max(int(dx), -(n - 1)), n - 1)
    r0, r1 = max(0, -dy), min(m, m - dy)  # destination rows with a source row
    cols = slice(n - dx, n) if dx > 0 else slice(0, -dx)  # columns whose source lies beyond the row's end
    kept = out[r0:r1, cols].copy() if dx else None
    off = dy * n + dx
    a, b = max(r0 * n, -off), min(r1 * n, m * n - off)
    flat = out.reshape(-1)
    np.add(flat[a:b], src.reshape(-1)[a + off:b + off], out=flat[a:b])
    if dx:
        edge = n - 1 if dx > 0 else 0
        np.add(kept, src[r0 + dy:r1 + dy, edge:edge + 1], out=out[r0:r1, cols])
    if r0 > 0 or r1 < m:  # rows without a source row repeat the edge row, moved by dx
        moved = np.arange(dx, n + dx)  # np.minimum / np.maximum: np.clip's own overhead is larger at this size
        np.maximum(moved, 0, out=moved)
        np.minimum(moved, n - 1, out=moved)
        if r0 > 0:
            out[:r0] += src[0, moved]
        if r1 < m:
            out[r1:] += src[m - 1, moved]
    return out
