"""Two-photon focal volume: widths after Zipfel, Williams & Webb (2003) and the axial weight of a soma."""

from __future__ import annotations

import math

import numpy as np
from scipy.special import erf

__all__ = ["axial_radius_um", "lateral_radius_um", "axial_profile", "sphere_axial_fraction"]


def _check_optics(na: float, wavelength_um: float, refractive_index: float | None = None) -> None:
    if not (na > 0 and math.isfinite(na)):
        raise ValueError(f"na must be positive, got {na!r}")
    if not (wavelength_um > 0 and math.isfinite(wavelength_um)):
        raise ValueError(f"wavelength_um must be positive, got {wavelength_um!r}")
    if refractive_index is not None and not na < refractive_index:
        raise ValueError(f"na ({na}) must be below refractive_index ({refractive_index})")


def lateral_radius_um(na: float, wavelength_um: float) -> float:
    """Lateral 1/e radius of the squared illumination PSF (µm).

    Parameters
    ----------
    na : float
        Numerical aperture of the objective.
    wavelength_um : float
        Excitation wavelength (µm).

    Returns
    -------
    w_xy : float
        ``0.320 λ / (√2 NA)`` for NA ≤ 0.7, ``0.325 λ / (√2 NA^0.91)`` for NA > 0.7 (µm).

    References
    ----------
    Zipfel, W. R., Williams, R. M. & Webb, W. W. (2003). Nonlinear magic: multiphoton microscopy in the
    biosciences. Nature Biotechnology 21, 1369-1377 (Gaussian fit of the squared illumination PSF).
    """
    _check_optics(na, wavelength_um)
    if na <= 0.7:
        return 0.320 * wavelength_um / (math.sqrt(2.0) * na)
    return 0.325 * wavelength_um / (math.sqrt(2.0) * na**0.91)


def axial_radius_um(na: float, wavelength_um: float, refractive_index: float) -> float:
    """Axial 1/e radius of the squared illumination PSF (µm).

    Parameters
    ----------
    na : float
        Numerical aperture (below ``refractive_index``).
    wavelength_um : float
        Excitation wavelength (µm).
    refractive_index : float
        Refractive index of the immersion medium.

    Returns
    -------
    w_z : float
        ``0.532 λ / √2 · 1 / (n - √(n² - NA²))`` (µm).

    References
    ----------
    Zipfel, Williams & Webb (2003), Nature Biotechnology 21, 1369-1377.
    """
    _check_optics(na, wavelength_um, refractive_index)
    n = refractive_index
    return 0.532 * wavelength_um / math.sqrt(2.0) / (n - math.sqrt(n * n - na * na))


def axial_profile(z_um, w_z_um: float) -> np.ndarray:
    """Axial excitation profile ``exp(-z² / w_z²)`` of the Gaussian focal volume (peak 1).

    Parameters
    ----------
    z_um : array_like
        Axial distance from the focal plane (µm).
    w_z_um : float
        Axial 1/e radius (µm), see :func:`axial_radius_um`.
    """
    z = np.asarray(z_um, dtype=float)
    return np.exp(-((z / w_z_um) ** 2))


def _cum(u: np.ndarray, w: float) -> np.ndarray:
    # fraction of the axial profile below u: ∫_{-∞}^{u} exp(-z²/w²) dz / (√π w)
    return 0.5 * (1.0 + erf(u / w))


def sphere_axial_fraction(rho_um, radius_um, dz_um, w_z_um: float) -> np.ndarray:
    """Fraction of the axial focal profile that lies inside a sphere, per lateral position.

    The sphere (centre ``dz_um`` from the focal plane, + deeper) spans ``dz ± √(R² - ρ²)`` along the optical
    axis at lateral distance ``ρ`` from its centre; the excitation there is the Gaussian axial profile, so
    the fraction is ``½[erf((dz + h)/w_z) - erf((dz - h)/w_z)]``.

    Parameters
    ----------
    rho_um : array_like
        Lateral distance from the sphere's axis (µm).
    radius_um : array_like
        Sphere radius (µm), broadcast against ``rho_um``.
    dz_um : array_like
        Axial position of the sphere's centre relative to the focal plane (µm).
    w_z_um : float
        Axial 1/e radius (µm).

    Returns
    -------
    fraction : ndarray
        Between 0 (sphere out of focus or not under this pixel) and 1 (the whole focal volume inside).
    """
    rho = np.asarray(rho_um)
    r = np.asarray(radius_um)
    dz = np.asarray(dz_um)
    h = np.sqrt(np.maximum(r * r - rho * rho, 0.0))
    return _cum(dz + h, w_z_um) - _cum(dz - h, w_z_um)
