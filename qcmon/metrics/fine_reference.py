"""A registration reference on a grid twice as fine as the frames', from frames at many fractional shifts.

Public API: :func:`fine_reference`, :func:`fine_noise`.

Why. A detector pixel integrates the light over its area. When the specimen holds detail finer than two pixels, the
frame is aliased, and how it is aliased changes with the fractional part of the shift: a frame moved by 0.3 px is
*not* the frame at 0 moved by 0.3 px with band-limited interpolation. A reference on the frames' own grid can only
be moved that way, so the finest frequencies disagree with the frames by an amount that depends on the shift — a
bias the likelihood must roll off (:mod:`qcmon.metrics.reference_growth` chooses how much), losing the information
those frequencies hold. The frames themselves, at many fractional shifts, hold what is needed to remove the
ambiguity: ``K`` groups of frames at fractional shifts ``f_k`` sample the pixel-integrated scene ``B`` at ``K``
different sub-pixel offsets. This is the frequency-domain reconstruction from shifted, aliased images of Tsai &
Huang (1984), regularised as a Wiener (maximum a posteriori) estimate.

Method. The frames' grid has ``M`` samples per axis; ``B`` on the grid twice as fine has ``2M``. Each detector
frequency ``kappa`` is the sum of two frequencies of the fine grid per axis, ``kappa`` and its partner
``kappa - M sign(kappa)``: four unknowns ``X_a`` in 2-D. A group mean ``P_k(x) = B(x - f_k)`` (moved back by its
whole pixels) has, at ``kappa``, ``P_k(kappa) = sum_a X_a exp(-2 pi i q_a . f_k / M)``. With ``n_k`` frames in group
``k`` and white noise of power ``N`` per frame, the estimate minimises ``sum_k n_k |P_k - A_k X|^2 / N + sum_a
|X_a|^2 / S_a``: per frequency a 4 × 4 linear system. The prior powers ``S_a`` come from the data (empirical Bayes):
for the term on the frames' own band, ``S_0`` is the mean group's power less its noise (the usual Wiener filter); for
the partner terms, the unregularised least-squares estimate's power less its noise variance, smoothed over 5 × 5
frequencies, never below zero. Where the groups' shifts do not tell the terms apart (frames all at one fractional
shift), that variance is large, the partners' prior is zero, and the result is the frames' own band: the reference
on the frames' grid, Wiener-filtered.

The groups' images are mirrored at their edges before the transforms; near the edges (within the largest whole-pixel
move of the frames, whose edge pixels were repeated, and a few pixels of ringing where the mirrored copy begins) the
reconstruction is not the specimen's: the caller must give those pixels no weight (``ShiftEstimator.with_reference``,
``fine_edge``). Measured on the nuclei image through a pixel-area detector (``bench/bench_shift_bound.py --motion
area``): from noise-free groups at 16 fractional shifts the reconstruction's interior equals the scene integrated
over the pixels within 0.7 % RMS at the fine grid's odd samples (0.1 % at the even ones).

References
----------
.. [1] R. Y. Tsai and T. S. Huang, "Multiframe image restoration and registration", in Advances in Computer Vision
   and Image Processing 1, 317-339 (1984).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

__all__ = ["fine_reference", "fine_noise"]

#: Mirrored margin (px) added to the group images before their transforms
MARGIN = 16


def fine_noise(mean_image: np.ndarray, dark: float, gain: float, read_noise: float) -> float:
    """One frame's white noise power per frequency (unnormalised transform; DN²) of frames whose mean is
    ``mean_image``: the sum of the pixels' variances, ``gain`` × counts above ``dark`` + ``read_noise``²."""
    counts = np.clip(np.asarray(mean_image, dtype=np.float64) - dark, 0.0, None)
    return float(gain * counts.sum() + counts.size * read_noise ** 2)


def fine_reference(means: list[np.ndarray], shifts, counts, *, noise: float, edge: int = 0) -> np.ndarray:
    """The reference on a grid twice as fine, from groups of frames at known fractional shifts.

    Parameters
    ----------
    means : list of (M, N) arrays
        Each group's mean frame, moved back by its frames' whole-pixel shifts: ``P_k(x) = B(x - f_k)``.
    shifts : (K, 2) array_like
        Each group's mean fractional shift ``f_k`` (rows, columns; px of the frames' grid; the content moved by
        ``+f_k``).
    counts : (K,) array_like
        Frames per group.
    noise : float
        One frame's white noise power per frequency (:func:`fine_noise`).

    Returns
    -------
    (2M, 2N) float32 ndarray
        ``B`` on the fine grid: sample ``(2y, 2x)`` is the frames' pixel ``(y, x)`` at zero shift, ``(2y + 1, 2x)``
        half a pixel further along the rows.
    """
    f = np.asarray(shifts, dtype=np.float64).reshape(-1, 2)
    n = np.asarray(counts, dtype=np.float64)
    if len(means) != len(f) or len(n) != len(f) or not len(f):
        raise ValueError("means, shifts and counts must describe the same non-empty groups")
    if not (noise > 0 and np.all(n > 0)):
        raise ValueError("noise and every count must be positive")
    m, w = means[0].shape
    e = int(edge)
    if not 0 <= e < min(m, w) // 4:
        raise ValueError(f"edge must be 0 to a quarter of the {m} x {w} frame, got {edge!r}")
    inner = (slice(e, m - e), slice(e, w - e))
    my = sfft.next_fast_len(m + 2 * MARGIN)
    mx = sfft.next_fast_len(w + 2 * MARGIN)
    top, left = (my - m) // 2 + e, (mx - w) // 2 + e  # where the inner part sits in the padded image
    pad = ((top, my - (m - 2 * e) - top), (left, mx - (w - 2 * e) - left))
    ky = np.rint(sfft.fftfreq(my) * my)  # signed frequency indices (whole numbers: they index the fine grid)
    kx = np.rint(sfft.fftfreq(mx) * mx)
    # the partner's offset (in periods) per axis: 0 for the own term, -sign(k) for the partner (k = 0: -1)
    dy = np.stack([np.zeros(my), np.where(ky > 0, -1.0, 1.0)])
    dx = np.stack([np.zeros(mx), np.where(kx > 0, -1.0, 1.0)])
    dy[1, ky == 0] = -1.0
    dx[1, kx == 0] = -1.0
    terms = [(a, b) for a in range(2) for b in range(2)]
    total = n.sum()
    # the groups moved back by their fractional shifts (Fourier), summed with the terms' phase factors:
    # rhs_a = sum_k n_k conj(c_ka) conj(E_k) P_k, E_k = exp(-2 pi i k . f_k / M), c_ka = exp(-2 pi i d_a . f_k)
    rhs = np.zeros((4, my, mx), dtype=np.complex128)
    mean_spec = np.zeros((my, mx), dtype=np.complex128)
    for img, (fy, fx), nk in zip(means, f, n):
        spec = sfft.fft2(np.pad(np.asarray(img, dtype=np.float64)[inner], pad, mode="symmetric"))
        spec *= np.exp(2j * np.pi * ky * fy / my)[:, None]
        spec *= np.exp(2j * np.pi * kx * fx / mx)[None, :]
        mean_spec += (nk / total) * spec
        for i, (a, b) in enumerate(terms):
            cy = np.exp(2j * np.pi * dy[a] * fy)[:, None]
            cx = np.exp(2j * np.pi * dx[b] * fx)[None, :]
            rhs[i] += nk * spec * cy * cx
    # The normal matrix depends on the frequency only through the partners' offsets, -1 (index >= 0) or +1 (< 0)
    # per axis: four distinct 4 x 4 matrices, and their inverses
    signs = (-1.0, 1.0)
    gram4 = np.zeros((2, 2, 4, 4), dtype=np.complex128)
    for (fy, fx), nk in zip(f, n):
        for i, sy in enumerate(signs):
            for j, sx in enumerate(signs):
                col = np.array([np.exp(-2j * np.pi * ((sy if a else 0.0) * fy + (sx if b else 0.0) * fx))
                                for a, b in terms])
                gram4[i, j] += nk * np.conj(col)[:, None] * col[None, :]
    eye = np.eye(4)
    scale = float(n.sum())  # the trace of every class's matrix over 4
    inv4 = np.linalg.inv(gram4 + 1e-9 * scale * eye)
    cls_y = (dy[1] > 0).astype(np.intp)  # the class of each row (partner offset +1: index < 0)
    cls_x = (dx[1] > 0).astype(np.intp)
    rhs_t = np.moveaxis(rhs, 0, -1)
    ls = np.empty_like(rhs_t)
    for i in range(2):
        for j in range(2):
            sel = np.ix_(cls_y == i, cls_x == j)
            ls[sel] = rhs_t[sel] @ inv4[i, j].T
    var = noise * np.real(np.einsum("ijaa->ija", inv4))[cls_y[:, None], cls_x[None, :]]
    power = np.abs(ls) ** 2 - var
    prior = np.stack([ndimage.uniform_filter(power[..., i], 5, mode="wrap") for i in range(4)], axis=-1)
    # the own term: the mean group's power less its noise, smoothed alike (the Wiener filter of the mean frame)
    own = ndimage.uniform_filter(np.abs(mean_spec) ** 2 - noise / total, 5, mode="wrap")
    prior[..., 0] = own
    prior = np.clip(prior, 0.0, None)
    # no prior power: the term is held at zero (a weight far above the data's)
    big = 1e12 * scale
    reg = np.divide(noise, prior, out=np.full(prior.shape, big), where=prior > noise / big)
    gram = gram4[cls_y[:, None], cls_x[None, :]]
    gram[..., range(4), range(4)] += reg
    x = np.linalg.solve(gram, rhs_t[..., None])[..., 0]
    fine = np.zeros((2 * my, 2 * mx), dtype=np.complex128)
    for i, (a, b) in enumerate(terms):
        qy = (ky + dy[a] * my).astype(np.int64) % (2 * my)
        qx = (kx + dx[b] * mx).astype(np.int64) % (2 * mx)
        fine[np.ix_(qy, qx)] += 4.0 * x[..., i]
    out = sfft.ifft2(fine).real
    t0, l0 = 2 * (top - e), 2 * (left - e)
    return np.ascontiguousarray(out[t0:t0 + 2 * m, l0:l0 + 2 * w], dtype=np.float32)
