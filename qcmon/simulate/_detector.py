"""Photon detection: Poisson counts, conversion gain, dark level, read noise, rounding and clipping."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["detect"]


def detect(photons: np.ndarray, *, gain_dn_per_photon: float, dark_dn: float, read_noise_dn: float, bits: int,
           rng: np.random.Generator, average: int = 1) -> tuple[np.ndarray, float, float]:
    """Turn expected photons per pixel into detector values.

    ``DN = round(N · gain + dark + ε)`` with ``N ~ Poisson(photons)`` and ``ε ~ Normal(0, read_noise)``,
    clipped to ``[0, 2**bits - 1]``. With ``average > 1`` the result is the mean of that many such frames
    (the sum of Poisson counts is Poisson; the read noise shrinks by √average; rounding after averaging).

    Parameters
    ----------
    photons : (M, N) ndarray
        Expected detected photons per pixel (≥ 0).
    gain_dn_per_photon : float
        Conversion gain (DN per photon).
    dark_dn : float
        Dark level (DN).
    read_noise_dn : float
        Read noise standard deviation (DN).
    bits : int
        Bit depth (12, 14 or 16).
    rng : numpy.random.Generator
    average : int
        Frames averaged.

    Returns
    -------
    image : (M, N) ndarray of uint16
    saturated_frac : float
        Fraction of pixels at the detector maximum.
    clipped_frac : float
        Fraction of pixels clipped at 0 (their noisy value was 0 or below).

    References
    ----------
    EMVA Standard 1288, release 4.0 (2021): linear camera model with Poisson photon noise and normal dark
    noise, whose photon-transfer relation ``σ²_DN = K² μ_p + σ²_d`` this model obeys.
    """
    if average < 1:
        raise ValueError(f"average must be a positive integer, got {average!r}")
    top = 2**bits - 1
    lam = np.asarray(photons, dtype=np.float64)
    counts = rng.poisson(lam * average) if average > 1 else rng.poisson(lam)
    value = counts * (gain_dn_per_photon / average) + dark_dn
    if read_noise_dn > 0:
        value += rng.standard_normal(lam.shape) * (read_noise_dn / math.sqrt(average))
    np.rint(value, out=value)
    n = value.size
    clipped = np.count_nonzero(value <= 0) / n
    saturated = np.count_nonzero(value >= top) / n
    np.clip(value, 0, top, out=value)
    return value.astype(np.uint16), saturated, clipped
