"""Synthetic fluorescence frames with known photometry, made inside the tests (no files).

A field of view is neuropil (smoothed noise) plus round cell bodies; its expected photon count per pixel is
scaled to a chosen mean. A frame draws Poisson photons from it, multiplies by the conversion gain, adds the dark
level and Gaussian read noise, rounds and clips to the detector range — the usual camera/PMT model of EMVA 1288.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage


def field_of_view(shape, *, mean_photons, n_cells=60, rng, cell_radius=5.0, neuropil_frac=0.5):
    """Expected photons per pixel (float64 array of ``shape``), mean ``mean_photons``, plus cell masks."""
    rows, cols = shape
    neuropil = ndimage.gaussian_filter(rng.random(shape), 8.0, mode="wrap")
    neuropil = (neuropil - neuropil.min()) / (np.ptp(neuropil) + 1e-12)
    neuropil = 0.3 + neuropil
    cells = np.zeros(shape)
    masks = []
    half = int(4 * cell_radius) + 1
    for _ in range(n_cells):
        cy, cx = rng.uniform(0, rows), rng.uniform(0, cols)
        r = cell_radius * rng.uniform(0.7, 1.3)
        r0, r1 = max(int(cy) - half, 0), min(int(cy) + half, rows)
        c0, c1 = max(int(cx) - half, 0), min(int(cx) + half, cols)
        yy, xx = np.mgrid[r0:r1, c0:c1]
        blob = np.zeros(shape)
        blob[r0:r1, c0:c1] = np.exp(-0.5 * ((yy - cy) ** 2 + (xx - cx) ** 2) / (0.6 * r) ** 2)
        masks.append(blob)
        cells += rng.uniform(1.0, 3.0) * blob
    lam = neuropil_frac * neuropil / neuropil.mean() + (1 - neuropil_frac) * cells / max(cells.mean(), 1e-12)
    lam *= mean_photons / lam.mean()
    return lam, masks


def expose(lam, *, gain, dark, read_noise, rng, max_value=65535, dtype=np.uint16):
    """One frame: Poisson(lam) x gain + dark + N(0, read_noise), rounded and clipped to 0..max_value."""
    photons = rng.poisson(lam)
    value = photons * gain + dark + rng.normal(0.0, read_noise, lam.shape)
    return np.clip(np.rint(value), 0, max_value).astype(dtype)


def fourier_shift_rows(image, shift_px):
    """Shift every row's content by ``shift_px`` columns (+ toward increasing column), band-limited, circular."""
    n = image.shape[1]
    k = np.fft.rfftfreq(n)
    spec = np.fft.rfft(image, axis=1) * np.exp(-2j * np.pi * k * shift_px)
    return np.fft.irfft(spec, n=n, axis=1)


def bidirectional_field(shape, offset_px, *, mean_photons, rng, margin=32):
    """Expected photons of a field whose odd rows are shifted by ``offset_px`` (cut from a larger field)."""
    big = (shape[0] + 2 * margin, shape[1] + 2 * margin)
    lam, _ = field_of_view(big, mean_photons=mean_photons, rng=rng, n_cells=int(60 * big[0] * big[1] / 512**2))
    lam = lam.copy()
    lam[1::2] = fourier_shift_rows(lam[1::2], offset_px)
    lam = lam[margin : margin + shape[0], margin : margin + shape[1]]
    return np.clip(lam, 0.0, None)
