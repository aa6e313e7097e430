"""Focus metrics without a z-stack: correlation with the session reference and a sharpness measure.

Public API: :func:`focus_corr`, :func:`focus_measure`.
"""

from __future__ import annotations

import math

import numpy as np

from qcmon.metrics._imageops import as_image, finite_float32

__all__ = ["focus_corr", "focus_measure"]


def focus_corr(mean_image, reference) -> float:
    """Pearson correlation of a motion-corrected running mean with the session reference.

    A slow fall of this value while the displacement stays small means the sample has left the reference's focal
    plane (or the field has changed); 1 = unchanged up to gain and offset, so bleaching alone does not lower it.

    Parameters
    ----------
    mean_image : (M, N) array_like
        Motion-corrected running mean (e.g. :attr:`qcmon.metrics.zoffset.RunningMean.mean`).
    reference : (M, N) array_like
        The session reference, same shape.

    Returns
    -------
    float
        Correlation in [-1, 1]; NaN with a UserWarning when either image is constant or has no finite pixel.
        Non-finite pixels are replaced by the image's finite mean.
    """
    ref = as_image(reference, "reference")
    img = as_image(mean_image, "mean_image", shape=ref.shape)
    a = finite_float32(img, "mean_image", stacklevel=3)
    if a is None:
        return math.nan
    b = finite_float32(ref, "reference", stacklevel=3)
    if b is None:
        return math.nan
    a = a.astype(np.float64).ravel()
    b = b.astype(np.float64).ravel()
    a -= a.mean()
    b -= b.mean()
    return float(np.dot(a, b) / math.sqrt(np.dot(a, a) * np.dot(b, b)))


def focus_measure(image) -> float:
    """Sharpness of an image: variance of its Laplacian divided by the image variance.

    The variance of the Laplacian ("LAP4" in the survey of Pertuz, Puig & Garcia 2013, after Pech-Pacheco et
    al. 2000) is among the best-ranked focus operators there for accuracy and noise tolerance at low cost. We
    divide it by the variance of the image so the value does not change with detector gain, dark offset or
    bleaching, only with the share of fine detail: an in-focus running mean gives a larger value than the same
    field out of focus. Shot noise raises it (white noise gives 20, the sum of squares of the 5-point kernel),
    so compare values from running means of the same length and photon level.

    Parameters
    ----------
    image : (M, N) array_like
        Typically a motion-corrected running mean.

    Returns
    -------
    float
        Dimensionless; NaN with a UserWarning for a constant or all-NaN image.

    References
    ----------
    .. [1] S. Pertuz, D. Puig and M. A. Garcia, "Analysis of focus measure operators for shape-from-focus",
       Pattern Recognition 46(5), 1415-1432 (2013).
    .. [2] J. L. Pech-Pacheco, G. Cristobal, J. Chamorro-Martinez and J. Fernandez-Valdivia, "Diatom
       autofocusing in brightfield microscopy: a comparative study", Proc. ICPR 2000, 3:314-317.
    """
    img = finite_float32(as_image(image, "image", min_size=3), "image", stacklevel=3)
    if img is None:
        return math.nan
    # Mean removed, then float32 throughout with pairwise sums (relative error ~1e-6).
    x = img - img.mean(dtype=np.float32)
    # 5-point Laplacian with the edge pixels repeated beyond the border, which for a 3-point stencil is the
    # same as ``scipy.ndimage.laplace(mode="reflect")`` (the pixel beyond the edge mirrors the edge pixel).
    lap = np.empty_like(x)
    np.add(x[:-2], x[2:], out=lap[1:-1])
    np.add(x[0], x[1], out=lap[0])
    np.add(x[-2], x[-1], out=lap[-1])
    # Horizontal neighbours as the pixels before and after in memory (two contiguous passes, much cheaper than
    # column-offset slices); the first and last columns took a pixel of the neighbouring row there, which is
    # replaced by the edge pixel itself.
    xf, lf = x.reshape(-1), lap.reshape(-1)
    lf[1:] += xf[:-1]
    lf[:-1] += xf[1:]
    lap[1:, 0] -= x[:-1, -1]
    lap[:-1, -1] -= x[1:, 0]
    lap[:, 0] += x[:, 0]
    lap[:, -1] += x[:, -1]
    lap -= np.float32(4.0) * x
    n = x.size
    lap_mean = float(lap.sum()) / n
    np.square(lap, out=lap)
    lap_var = float(lap.sum()) / n - lap_mean * lap_mean
    x_mean = float(x.sum()) / n  # zero up to rounding
    np.square(x, out=x)
    img_var = float(x.sum()) / n - x_mean * x_mean
    return lap_var / img_var
