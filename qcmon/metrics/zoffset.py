"""Axial (z) drift from a reference z-stack, and the motion-corrected running mean it is measured on.

Public API: :class:`ZEstimator`, :class:`ZResult`, :class:`RunningMean`.
"""

from __future__ import annotations

import math
import warnings
from typing import NamedTuple

import numpy as np

from qcmon.metrics._imageops import add_shifted, as_image, as_stack, auto_bin, bin_image, finite_float32, shift_integer
from qcmon.metrics.registration import ShiftEstimator

__all__ = ["RunningMean", "ZEstimator", "ZResult"]


class ZResult(NamedTuple):
    """Focal-plane position measured against a reference z-stack.

    Attributes
    ----------
    z_um : float
        Offset of the focal plane from its position at the start (µm), + deeper (toward increasing stack index).
        At the first or last plane the value is that plane's position (the true offset may be larger).
    corr : float
        Pearson correlation of the image with the best-matching plane (interpolated between planes).
    plane_index : int
        Index of the best-matching stack plane (0 = most superficial).
    """

    z_um: float
    corr: float
    plane_index: int


def _normalise_rows(mat: np.ndarray) -> np.ndarray:
    mat = mat - mat.mean(axis=1, keepdims=True)
    norms = np.sqrt(np.einsum("ij,ij->i", mat, mat))
    return mat / np.where(norms > 0, norms, np.inf)[:, None]


def _parabolic_peak(c: np.ndarray) -> tuple[float, float, int]:
    """Sub-sample maximum of ``c`` by a parabola through the peak and its neighbours: (position, value, index)."""
    i = int(np.argmax(c))
    if 0 < i < len(c) - 1:
        a, b, d = float(c[i - 1]), float(c[i]), float(c[i + 1])
        den = a - 2 * b + d
        if den < 0:
            off = 0.5 * (a - d) / den
            return i + off, b - 0.25 * (a - d) * off, i
    return float(i), float(c[i]), i


class ZEstimator:
    """Measure the focal-plane offset by correlating an image with every plane of a reference z-stack.

    Parameters
    ----------
    stack : (P, M, N) array_like
        Reference z-stack, planes from superficial (index 0) to deep, at least 3 planes.
    z_step_um : float
        Distance between planes (µm, > 0).
    reference : (M, N) array_like, optional
        Session reference image. When given, the stack is registered laterally to it once (the shift of the
        best-matching plane is applied to all planes: a stack is taken in a short time, so drift within it is
        neglected) and ``z_um`` is measured from the plane position that best matches it. Without it, the stack
        is used as it is and ``z_um`` is measured from the stack's centre.
    bin_factor : int, optional
        Block size for the correlation (None: so that the larger side is at most about 128 px). The correlation
        of smooth cell-sized structure with depth needs no finer sampling, and the matrix-vector product over
        all planes then costs well under a millisecond.

    Attributes
    ----------
    start_um : float
        Position of the start (the plane matching ``reference``) relative to the stack's centre (µm, + deeper).
    shift_px : tuple of float
        Content shift (dy, dx) of the stack relative to ``reference`` that was removed at construction.

    Notes
    -----
    Each plane and the image are cropped by 1/16 of their size at every border (so a lateral shift does not
    bring in unmatched edges), binned, mean-subtracted and normalised; one matrix-vector product then gives the
    Pearson correlation with every plane. Between planes the peak is refined with a parabola through the best
    plane and its two neighbours (three-point parabolic interpolation): near its maximum the correlation with
    depth is smooth — for a Gaussian axial point-spread function it is itself Gaussian with a width of the
    axial resolution, several µm for two-photon imaging — so with 1 µm steps the quadratic term dominates and
    the interpolation bias is a small fraction of the step. A Gaussian (log-parabola) fit is less biased for an
    exactly Gaussian profile but is undefined where a correlation is zero or negative.
    """

    def __init__(self, stack, *, z_step_um: float, reference=None, bin_factor: int | None = None):
        st = as_stack(stack, "stack", min_planes=3)
        if not (isinstance(z_step_um, (int, float, np.number)) and math.isfinite(z_step_um) and z_step_um > 0):
            raise ValueError(f"z_step_um must be a positive number of µm, got {z_step_um!r}")
        as_image(st[0], "stack plane", min_size=16)
        if bin_factor is None:
            bin_factor = auto_bin(st.shape[1:], 128)
        elif isinstance(bin_factor, bool) or not isinstance(bin_factor, (int, np.integer)) or bin_factor < 1:
            raise ValueError(f"bin_factor must be a positive integer or None, got {bin_factor!r}")
        self.z_step_um = float(z_step_um)
        self.bin_factor = int(bin_factor)
        self.n_planes = st.shape[0]
        self.shape: tuple[int, int] = st.shape[1:]
        m, n = self.shape
        self._crop = (slice(m // 16, m - m // 16), slice(n // 16, n - n // 16))
        planes = st.astype(np.float32)
        if not np.isfinite(planes).all():
            raise ValueError("stack has non-finite pixels")
        self.shift_px = (0.0, 0.0)
        start = (self.n_planes - 1) / 2
        if reference is not None:
            ref = as_image(reference, "reference", shape=self.shape)
            ref32 = finite_float32(ref, "reference", warn=False)
            if ref32 is None:
                raise ValueError("reference is constant or has no finite pixel")
            profile = self._matrix(planes) @ self._vector(ref32)
            best = int(np.argmax(profile))
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)
                res = ShiftEstimator(ref32).estimate(planes[best])
            if math.isfinite(res.dy_px):
                self.shift_px = (float(res.dy_px), float(res.dx_px))
                from scipy import ndimage  # only with a z-stack: not loaded by every start of qcmon

                for p in range(self.n_planes):
                    planes[p] = ndimage.shift(planes[p], (-res.dy_px, -res.dx_px), order=1, mode="nearest")
            self._q = self._matrix(planes)
            start = _parabolic_peak(self._q @ self._vector(ref32))[0]
        else:
            self._q = self._matrix(planes)
        self._start_index = start
        self.start_um = (start - (self.n_planes - 1) / 2) * self.z_step_um

    def _vector(self, image: np.ndarray) -> np.ndarray:
        v = bin_image(image[self._crop], self.bin_factor).ravel()
        return _normalise_rows(v[None, :])[0]

    def _matrix(self, planes: np.ndarray) -> np.ndarray:
        rows = [bin_image(p[self._crop], self.bin_factor).ravel() for p in planes]
        return np.ascontiguousarray(_normalise_rows(np.stack(rows)), dtype=np.float32)

    def profile(self, mean_image) -> np.ndarray:
        """Pearson correlation of ``mean_image`` with each stack plane, shape (P,) (NaN, warned, if constant)."""
        img = finite_float32(as_image(mean_image, "mean_image", shape=self.shape), "mean_image", stacklevel=3)
        if img is None:
            return np.full(self.n_planes, np.nan)
        return self._q @ self._vector(img)

    def estimate(self, mean_image) -> ZResult:
        """Focal-plane offset of a motion-corrected mean image.

        Parameters
        ----------
        mean_image : (M, N) array_like
            Motion-corrected running mean (aligned to the session reference), e.g. :attr:`RunningMean.mean`.

        Returns
        -------
        ZResult
            ``(z_um, corr, plane_index)``; NaN values and index -1 (with a UserWarning) for a constant or
            all-NaN image.
        """
        img = finite_float32(as_image(mean_image, "mean_image", shape=self.shape), "mean_image", stacklevel=3)
        if img is None:
            return ZResult(math.nan, math.nan, -1)
        pos, value, index = _parabolic_peak(self._q @ self._vector(img))
        return ZResult((pos - self._start_index) * self.z_step_um, value, index)


class RunningMean:
    """Motion-corrected mean of the last ``K`` frames, in constant memory.

    Each frame is moved back onto the reference grid by its measured shift rounded to whole pixels (edge pixels
    repeated) and added into the float32 sum of the current *block* of ``block`` frames. A ring of ``K / block``
    block sums holds the window: when a block begins, it takes the place of the oldest. The mean is therefore
    over exactly the last ``K`` frames whenever a block has just been completed (the number of frames pushed is a
    multiple of ``block``; always, with ``block=1``), and over the last ``K - block + j`` frames when ``j`` frames
    of the current block are in. For integer frames of up to 16 bits every float32 sum is exact (``K`` up to
    256), so no rounding can accumulate.

    A frame costs one shifted addition into its block's sum: there is no copy of the frame and no subtraction
    of a frame leaving the window, and the few block sums stay in the processor's caches. Whole-pixel shifts
    leave a residual of at most 0.5 px (0.29 px RMS for uniformly spread shifts; with ``even_rows``, 1 px and
    0.58 px along the columns), which blurs the mean far less than the optical point-spread function (several px)
    that limits the z and focus measures made from it; interpolating every frame would cost more than the
    registration itself.

    Parameters
    ----------
    K : int
        Number of frames averaged (>= 1).
    block : int, optional
        Frames per block; must divide ``K``. Default 1.
    even_rows : bool, optional
        Round the row shift to an even number of rows, so that every row keeps its parity: the lines of the two
        scan directions of a bidirectionally scanned frame stay apart, and the line offset can be measured on the
        mean (:func:`qcmon.metrics.line_offset.line_offset_rows`). Default False.
    rows : sequence of int, optional
        Keep only these rows of the motion-corrected mean (indices on the reference grid, repeats allowed): the
        mean is then ``(len(rows), N)``, its row ``i`` the row ``rows[i]`` of the whole mean. A frame then costs a
        gather of those rows and an addition of their size. Default: every row.
    """

    def __init__(self, K: int, *, block: int = 1, even_rows: bool = False, rows=None):
        if isinstance(K, bool) or not isinstance(K, (int, np.integer)) or K < 1:
            raise ValueError(f"K must be a positive integer, got {K!r}")
        if isinstance(block, bool) or not isinstance(block, (int, np.integer)) or block < 1 or K % block:
            raise ValueError(f"block must be a positive integer that divides K={K}, got {block!r}")
        self.K = int(K)
        self.block = int(block)
        self.even_rows = bool(even_rows)
        self.rows = None
        if rows is not None:
            self.rows = np.asarray(rows)
            if self.rows.ndim != 1 or self.rows.size == 0 or self.rows.dtype.kind not in "iu":
                raise ValueError("rows must be a non-empty sequence of row indices")
            self.rows = self.rows.astype(np.intp)
        self._ring: np.ndarray | None = None  # (K / block, M, N) float32 block sums (M = len(rows) with rows)
        self._shape: tuple[int, int] | None = None  # shape of the frames
        self._frames = np.zeros(self.K // self.block, dtype=np.int64)  # frames in each block sum
        self._slot = 0  # the block being filled
        self._in_block = 0  # frames in it so far
        self.count = 0

    def push(self, frame, dy_px: float = 0.0, dx_px: float = 0.0) -> None:
        """Add a frame whose content is shifted by (``dy_px``, ``dx_px``) px against the reference.

        A NaN shift (frame that could not be registered) adds the frame unshifted. Non-finite pixels are
        replaced by the frame's finite mean; a frame with no finite pixel is skipped (with a UserWarning).
        """
        arr = as_image(frame, "frame", min_size=1)
        if self._shape is None:
            if self.rows is not None and not (0 <= self.rows.min() and self.rows.max() < arr.shape[0]):
                raise ValueError(f"rows must lie within the frame's {arr.shape[0]} rows")
            self._shape = arr.shape
            kept = arr.shape if self.rows is None else (self.rows.size, arr.shape[1])
            self._ring = np.zeros((len(self._frames), *kept), dtype=np.float32)
        elif arr.shape != self._shape:
            raise ValueError(f"frame has shape {arr.shape}, expected {self._shape} like the earlier frames")
        if np.issubdtype(arr.dtype, np.floating) and not np.isfinite(arr).all():
            finite = np.isfinite(arr)
            if not finite.any():
                warnings.warn("frame has no finite pixel; not added to the running mean", UserWarning,
                              stacklevel=2)
                return
            arr = np.where(finite, arr, arr[finite].mean())
        if self.even_rows:
            dy = 2 * int(round(dy_px / 2)) if math.isfinite(dy_px) else 0
        else:
            dy = int(round(dy_px)) if math.isfinite(dy_px) else 0
        dx = int(round(dx_px)) if math.isfinite(dx_px) else 0
        if self.rows is not None:  # the kept rows of the moved frame: their source rows, moved along the columns
            src = self.rows + dy
            np.maximum(src, 0, out=src)
            np.minimum(src, arr.shape[0] - 1, out=src)
            arr = arr[src]
            dy = 0
        k = self._slot
        if self._in_block == 0:  # a new block: it takes the place of the oldest
            shift_integer(arr, dy, dx, self._ring[k])
            self._frames[k] = 1
        else:
            add_shifted(arr, dy, dx, self._ring[k])
            self._frames[k] += 1
        self._in_block += 1
        self.count += 1
        if self._in_block == self.block:
            self._slot = (k + 1) % len(self._frames)
            self._in_block = 0

    def zeros_like(self) -> "RunningMean":
        """A running mean with this one's parameters, in step with it, as if every frame pushed so far had been 0:
        from then on, pushed the same frames' companions (e.g. their masks), its window is this one's."""
        other = RunningMean(self.K, block=self.block, even_rows=self.even_rows, rows=self.rows)
        other._frames = self._frames.copy()
        other._slot, other._in_block, other.count = self._slot, self._in_block, self.count
        if self._ring is not None:
            other._shape = self._shape
            other._ring = np.zeros_like(self._ring)
        return other

    @property
    def n_frames(self) -> int:
        """Frames in the current mean."""
        return int(self._frames.sum())

    @property
    def mean(self) -> np.ndarray:
        """The current mean, (M, N) float32 (``(len(rows), N)`` with ``rows``), a new array. Raises ValueError
        before the first frame."""
        n = self.n_frames
        if self._ring is None or n == 0:
            raise ValueError("RunningMean has no frame yet: push a frame first")
        used = np.flatnonzero(self._frames)
        total = self._ring[used[0]].copy()
        for k in used[1:]:
            total += self._ring[k]
        total /= np.float32(n)
        return total
