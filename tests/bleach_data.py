"""A bleaching session made outside qcmon's simulator: a real specimen, transients defined here, EMVA 1288 photons.

The specimen is a crop of the real fluorescence image :func:`outside_data.nuclei_2d`; its nuclei (found by a
threshold and ``scipy.ndimage.label``) carry calcium-like transients (events at a given rate, ΔF/F 0.3–1.0,
exponential decay of 0.7 s — common practice, no source), the whole field dims as ``exp(-t / tau)``, and each
frame is drawn by :func:`outside_data.detect` (Poisson photons × gain + offset + read noise). Nothing of qcmon is
used to make it.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from outside_data import detect, nuclei_2d, specimen_crop


def bleaching_means(*, seconds: float, tau_min: float, fs: float = 30.0, shape=(64, 64), rate_hz: float = 0.3,
                    gain: float = 2.5, offset: float = 100.0, read_noise_dn: float = 8.0, seed: int = 0,
                    photons_scale: float = 1.0, step_at_s: float | None = None, step_factor: float = 1.0):
    """(time_s, frame means above the true dark level, resting brightness factor) of a session; ``step_at_s``
    multiplies the detector gain by ``step_factor`` from that time on."""
    rng = np.random.default_rng(seed)
    spec = specimen_crop(nuclei_2d().astype(float), shape, 0.0, 0.0) * photons_scale + 1.0
    labels, n = ndimage.label(spec > np.percentile(spec, 70))
    n_t = int(round(seconds * fs))
    t = np.arange(n_t) / fs
    decay = math.exp(-1.0 / (0.7 * fs))
    warm = int(round(5.0 * fs))  # the activity runs 5 s before the first frame: stationary from the start
    activity = np.zeros((max(n, 1), n_t))
    for i in range(n):
        hits = rng.random(n_t + warm) < rate_hz / fs
        kick = np.where(hits, rng.uniform(0.3, 1.0, n_t + warm), 0.0)
        acc = 0.0
        for j in range(n_t + warm):
            acc = acc * decay + kick[j]
            if j >= warm:
                activity[i, j - warm] = acc
    means = np.empty(n_t)
    lab = labels.ravel()
    for j in range(n_t):
        boost = np.concatenate(([0.0], activity[:, j]))[lab].reshape(shape)
        lam = spec * (1.0 + boost) * math.exp(-t[j] / 60.0 / tau_min)
        g = gain * (step_factor if step_at_s is not None and t[j] >= step_at_s else 1.0)
        frame = detect(lam, rng, gain=g, offset=offset, read_noise_dn=read_noise_dn, bits=16)
        means[j] = frame.mean() - offset
    return t, means
