"""Cramér–Rao bound of a rigid shift measured from one frame under Poisson (shot) noise.

Public API: :func:`shift_crb` (a frame band-limited at its own grid) and :func:`area_shift_crb` (a frame whose
pixels integrate a finer scene: the physical detector, aliased where the scene holds finer detail).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft as sfft

from qcmon.metrics._imageops import as_image

__all__ = ["area_shift_crb", "shift_crb", "spectral_gradient"]


def spectral_gradient(image: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Row and column derivatives of ``image`` (per pixel) by the Fourier derivative theorem.

    The transform is of the image's even (mirror) extension to twice its size, which is continuous across every
    period boundary, so the image's non-periodic edges do not ring (a slope through an edge leaves a kink there:
    within a few px of it the derivative is a few per cent off); the Nyquist frequency, whose derivative is not
    defined for a real signal, is dropped. Finite differences act as a low-pass filter (the central difference's
    response is ``sin(w)/w``) and understate the derivative of fine detail.
    """
    img = np.asarray(image, dtype=np.float64)
    m, n = img.shape
    big = np.pad(img, ((0, m), (0, n)), mode="symmetric")
    pm, pn = big.shape
    spec = sfft.rfft2(big)
    ky = 2j * np.pi * sfft.fftfreq(pm)
    kx = 2j * np.pi * sfft.rfftfreq(pn)
    ky[pm // 2] = 0.0  # pm, pn are even
    kx[-1] = 0.0
    gy = sfft.irfft2(spec * ky[:, None], s=(pm, pn))[:m, :n]
    gx = sfft.irfft2(spec * kx[None, :], s=(pm, pn))[:m, :n]
    return gy, gx


def shift_crb(image, photons_per_px: float, *, background_photons: float = 0.0,
              read_noise_photons: float = 0.0, valid=None) -> tuple[float, float]:
    """Cramér–Rao lower bound on the standard deviation of a rigid (dy, dx) shift estimated from one frame.

    Parameters
    ----------
    image : (M, N) array_like
        Noise-free specimen (any linear scale; only its shape matters), non-negative.
    photons_per_px : float
        Mean detected photons per pixel of the frame (the image is scaled to this mean).
    background_photons : float, optional
        Uniform background added to every pixel, photons (carries no shift information, adds shot noise).
    read_noise_photons : float, optional
        Gaussian read noise of the detector in photon units (its variance is added to each pixel's, the usual
        Gaussian approximation of Poisson + read noise).
    valid : (M, N) bool array_like, optional
        True where a pixel of the frame is usable (e.g. not saturated). The bound is then that of the usable pixels
        alone: a mask fixed on the detector (a stationary saturated patch) removes their information while the
        specimen moves beneath it. The image is still scaled to ``photons_per_px`` over all its pixels.

    Returns
    -------
    (sigma_dy, sigma_dx) : tuple of float
        Lower bound on the standard deviation of any unbiased estimator of the shift along rows and columns, px.
        A frame is ``Poisson(lambda(x - d))`` with ``lambda`` the scaled image; the shift's Fisher information is
        ``I_ij = sum_x d_i lambda d_j lambda / (lambda + read_noise^2)`` and the bound is ``sqrt(diag(I^-1))``
        (Cramér 1946, Rao 1945; the same expression as the localisation bound of single emitters, Ober, Ram & Ward
        2004, Biophys. J. 86:1185). The derivatives are spectral (:func:`spectral_gradient`).
        Both are ``inf`` when the image holds no structure.
    """
    img = as_image(image, "image", min_size=4).astype(np.float64)
    if not np.isfinite(img).all():
        raise ValueError("image must be finite")
    if img.min() < 0:
        raise ValueError(f"image must be non-negative, its minimum is {img.min():g}")
    _check_levels(photons_per_px, background_photons, read_noise_photons)
    mean = img.mean()
    if not mean > 0:
        raise ValueError("image must have a positive mean")
    lam = img * (photons_per_px / mean)
    gy, gx = spectral_gradient(lam)
    return _bound(lam, gy, gx, background_photons, read_noise_photons, valid)


def area_shift_crb(scene, factor: int, photons_per_px: float, *, window=None, background_photons: float = 0.0,
                   read_noise_photons: float = 0.0, valid=None) -> tuple[float, float]:
    """Cramér–Rao bound of a rigid shift of a frame whose every pixel integrates ``factor`` × ``factor`` pixels of a
    finer scene (the detector's pixel area), the scene moving beneath the detector.

    When the scene holds detail finer than two detector pixels the frame is aliased, and the derivative of a frame
    pixel with respect to the motion is not the spectral derivative of the sampled frame (which :func:`shift_crb`
    takes): it is the pixel's integral of the scene's own derivative. Here the scene's derivative is spectral
    (:func:`spectral_gradient` of the whole scene, its even extension) and is integrated over each detector pixel:
    ``d lambda_i / d d = factor * mean over pixel i of d scene / d x`` (per detector px of shift), and the Fisher
    information is ``sum (d lambda)^2 / lambda`` as in :func:`shift_crb`. For a scene band-limited below the
    detector's Nyquist frequency the two functions agree; ``factor=1`` with a ``window`` is the exact bound of a
    window cut from a band-limited (Fourier-shifted) scene, whose derivative near the window's edges is the
    scene's, not that of the window's own mirror extension.

    Parameters
    ----------
    scene : (H, W) array_like
        Noise-free scene, finer than the detector by ``factor`` (any linear scale), non-negative.
    factor : int
        Scene pixels per detector pixel along each axis.
    photons_per_px : float
        Mean detected photons per detector pixel of the frame (the frame is scaled to this mean).
    window : (slice, slice), optional
        The part of the scene the frame sees, in scene pixels, each length a multiple of ``factor``. Default: the
        whole scene, trimmed to a multiple of ``factor`` at its far ends.
    background_photons, read_noise_photons, valid
        As in :func:`shift_crb`, per detector pixel (``valid`` has the frame's shape).

    Returns
    -------
    (sigma_dy, sigma_dx) : tuple of float
        Lower bound on the standard deviation of any unbiased estimator of the shift, detector px; ``inf`` when
        the frame holds no structure.
    """
    sc = as_image(scene, "scene", min_size=4).astype(np.float64)
    b = int(factor) if isinstance(factor, (int, np.integer)) else 0
    if b < 1:
        raise ValueError(f"factor must be a positive whole number of scene pixels, got {factor!r}")
    if not np.isfinite(sc).all():
        raise ValueError("scene must be finite")
    if sc.min() < 0:
        raise ValueError(f"scene must be non-negative, its minimum is {sc.min():g}")
    _check_levels(photons_per_px, background_photons, read_noise_photons)
    H, W = sc.shape
    if window is None:
        window = (slice(0, H - H % b), slice(0, W - W % b))
    rows, cols = window
    r0, r1, rs = rows.indices(H)
    c0, c1, cs = cols.indices(W)
    h, w = (r1 - r0) // b, (c1 - c0) // b
    if rs != 1 or cs != 1 or (r1 - r0) % b or (c1 - c0) % b or min(h, w) < 4:
        raise ValueError(f"window must be contiguous slices of the {sc.shape} scene, each at least 4 detector px and "
                         f"a multiple of factor={b} scene px long, got {window!r}")
    frame = sc[r0:r1, c0:c1].reshape(h, b, w, b).mean(axis=(1, 3))
    mean = frame.mean()
    if not mean > 0:
        raise ValueError("the frame must have a positive mean")
    scale = photons_per_px / mean
    gy, gx = (b * scale * g[r0:r1, c0:c1].reshape(h, b, w, b).mean(axis=(1, 3)) for g in spectral_gradient(sc))
    return _bound(frame * scale, gy, gx, background_photons, read_noise_photons, valid)


def _check_levels(photons_per_px, background_photons, read_noise_photons) -> None:
    for name, v, pos in (("photons_per_px", photons_per_px, True), ("background_photons", background_photons, False),
                         ("read_noise_photons", read_noise_photons, False)):
        if not math.isfinite(v) or v < 0 or (pos and v == 0):
            raise ValueError(f"{name} must be a {'positive' if pos else 'non-negative'} number, got {v!r}")


def _bound(lam, gy, gx, background_photons, read_noise_photons, valid) -> tuple[float, float]:
    """sqrt(diag(I^-1)) of the Fisher information of expected photons ``lam`` with derivatives ``gy``, ``gx``."""
    var = lam + background_photons + read_noise_photons ** 2
    # pixels expecting under 1e-9 of the brightest one's count contribute nothing measurable (their derivative is
    # below the transform's rounding error, whose square divided by a vanishing count would dominate)
    w = 1.0 / np.maximum(var, 1e-9 * float(var.max()))
    if valid is not None:
        v = np.asarray(valid)
        if v.shape != lam.shape or v.dtype != np.bool_:
            raise ValueError(f"valid must be a boolean mask of shape {lam.shape}, got {v.dtype} {v.shape}")
        w = w * v
    fisher = np.array([[np.sum(gy * gy * w), np.sum(gy * gx * w)],
                       [np.sum(gx * gy * w), np.sum(gx * gx * w)]])
    det = fisher[0, 0] * fisher[1, 1] - fisher[0, 1] ** 2
    if not det > 1e-12 * max(fisher[0, 0] * fisher[1, 1], 1e-300):
        return math.inf, math.inf
    return math.sqrt(fisher[1, 1] / det), math.sqrt(fisher[0, 0] / det)
