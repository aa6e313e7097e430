"""Data and reference implementations that qcmon did not make: the outside half of every accuracy check.

A test against qcmon's own simulator shares the simulator's blind spots. The functions here give real images
(made by microscopes, shipped inside public packages) to use as specimens, and a detector model that follows the
published noise model of the EMVA 1288 standard, so that a metric can be held against ground truth on data whose
structure nobody on this project chose.

Sources
-------
- :func:`nuclei_2d`: ``stardist/data/images/img2d.tif`` of the ``stardist`` 0.9.2 wheel on the package index
  (BSD-3-Clause): a 512 × 512 uint16 widefield fluorescence image of stained cell nuclei. ``make setup`` fetches
  the wheel (``pip download --no-deps``) into ``.venv/outside/``; nothing is downloaded at test time and the
  package is never imported or installed (only its data file is read from the wheel).
- :func:`nuclei_3d`: ``stardist/data/images/img3d.tif`` of the same wheel: a 31 × 61 × 57 uint16 fluorescence
  volume of nuclei (planes × rows × columns).
- scikit-image's bundled images (``skimage.data``) are real photographs and micrographs, not fluorescence; use
  them where any real structure will do (the peer library's own registration tests use ``camera``).
- The EMVA 1288 reference implementation is the ``emva1288`` package (test extra); it calls ``numpy.asfarray``,
  removed in numpy 2: :func:`emva1288_modules` restores that alias before importing it.

The detector model (:func:`detect`) is the linear camera model of EMVA 1288 release 4.0, section 2: photons
arrive Poisson-distributed, the conversion gain K turns electrons into DN, a Gaussian dark noise σ_d (DN) and an
offset μ_dark are added, and the result is quantised and clipped to the digitiser's range [0, 2ⁿ − 1].
"""

from __future__ import annotations

import functools
import glob
import io
import math
import os
import zipfile
from pathlib import Path

import numpy as np
import tifffile

__all__ = ["OutsideDataMissing", "nuclei_2d", "nuclei_3d", "specimen_crop", "fourier_mover", "specimen_fourier",
           "specimen_area", "living_specimen", "detect", "emva1288_modules"]

_REPO = Path(__file__).resolve().parents[1]


class OutsideDataMissing(RuntimeError):
    """The wheel holding the outside images is not where ``make setup`` puts it."""


def _wheel() -> Path:
    folder = Path(os.environ.get("QCMON_OUTSIDE_DATA", _REPO / ".venv" / "outside"))
    found = sorted(glob.glob(str(folder / "stardist-0.9.2-*.whl")))
    if not found:
        raise OutsideDataMissing(
            f"no stardist-0.9.2 wheel in {folder}: run `make setup` (it fetches the wheel whose package data are "
            "the real fluorescence images of the outside checks), or set QCMON_OUTSIDE_DATA to its folder")
    return Path(found[-1])


@functools.lru_cache(maxsize=None)
def _read(member: str) -> np.ndarray:
    with zipfile.ZipFile(_wheel()) as zf:
        data = zf.read(member)
    arr = tifffile.imread(io.BytesIO(data))
    arr.setflags(write=False)
    return arr


def nuclei_2d() -> np.ndarray:
    """The 512 × 512 uint16 fluorescence image of nuclei shipped in the stardist 0.9.2 wheel (read-only)."""
    return _read("stardist/data/images/img2d.tif")


def nuclei_3d() -> np.ndarray:
    """The 31 × 61 × 57 uint16 fluorescence volume of nuclei shipped in the stardist 0.9.2 wheel (read-only)."""
    return _read("stardist/data/images/img3d.tif")


def specimen_crop(image: np.ndarray, shape: tuple[int, int], dy: float, dx: float, *, margin: int = 0) -> np.ndarray:
    """A window of ``image`` whose content is moved by (``dy``, ``dx``) px, with real (non-periodic) edges.

    The window of ``shape`` sits at the centre of ``image`` (less ``margin``); its content is ``image`` shifted by
    (dy, dx) — + toward increasing row/column, the sign of qcmon's ``dy_px``/``dx_px`` — by cubic-spline
    interpolation (``scipy.ndimage.shift``, order 3) of the whole image before cropping, so nothing wraps around.
    """
    from scipy import ndimage

    h, w = shape
    H, W = image.shape
    if h + 2 * margin > H or w + 2 * margin > W:
        raise ValueError(f"a window of {shape} with margin {margin} does not fit in {image.shape}")
    top, left = (H - h) // 2, (W - w) // 2
    pad = int(np.ceil(max(abs(dy), abs(dx)))) + 4
    r0, r1 = max(top - pad, 0), min(top + h + pad, H)
    c0, c1 = max(left - pad, 0), min(left + w + pad, W)
    sub = ndimage.shift(image[r0:r1, c0:c1].astype(np.float64), (dy, dx), order=3, mode="nearest")
    out = sub[top - r0:top - r0 + h, left - c0:left - c0 + w]
    return np.clip(out, 0, None)


def fourier_mover(image: np.ndarray):
    """A function ``move(shape, dy, dx, margin=0)`` giving windows of ``image`` moved by a band-limited (Fourier) shift.

    The scene is the band-limited interpolant of the image's even (mirror) extension to twice its size: the
    extension is continuous across every period boundary, so the periodic wrap of the transform — which lands on the
    image's own edges, where the image meets its mirrored copy — makes no jump, only a kink in the slope. A shift
    of (dy, dx) moves that boundary (dy, dx) px into the image: the window (at the centre of ``image``, like
    :func:`specimen_crop`) must keep it outside, so ``move`` refuses a shift larger than the window's distance to
    the image's edges on that side (less ``margin``). Within the window every frame is then samples of one and the
    same continuous scene at positions moved by exactly (dy, dx) px — + toward increasing row/column, the sign of
    :func:`specimen_crop` — with real (non-periodic) specimen edges: the exact case of the shift theorem, which
    the Cramér–Rao bound of the still frame assumes. Equal to ``scipy.ndimage.fourier_shift`` of the mirrored
    image (real part, so the Nyquist row and column are scaled by cos(π·shift)), cropped. The mirrored spectrum is
    computed once per mover (about 15 ms per 512² frame after that).
    """
    import scipy.fft as sfft

    img = np.asarray(image, dtype=np.float64)
    if img.ndim != 2:
        raise ValueError(f"image must be 2-D, got shape {img.shape}")
    H, W = img.shape
    big = np.pad(img, ((0, H), (0, W)), mode="symmetric")
    spec = sfft.rfft2(big, workers=1)
    fy = sfft.fftfreq(2 * H)
    fx = sfft.rfftfreq(2 * W)

    def move(shape: tuple[int, int], dy: float, dx: float, margin: int = 0) -> np.ndarray:
        h, w = shape
        if h + 2 * margin > H or w + 2 * margin > W:
            raise ValueError(f"a window of {shape} with margin {margin} does not fit in {img.shape}")
        top, left = (H - h) // 2, (W - w) // 2
        # rows [top, top + h) show the scene's rows [top - dy, top + h - dy): all inside the image itself
        if not (-(H - h - top - margin) <= dy <= top - margin and -(W - w - left - margin) <= dx <= left - margin):
            raise ValueError(f"a shift of ({dy:g}, {dx:g}) px would bring the mirrored copy of the {img.shape} image "
                             f"into the {shape} window (margin {margin}): at most {top - margin} px each way")
        py = np.exp(-2j * np.pi * fy * dy)
        px = np.exp(-2j * np.pi * fx * dx)
        py[H] = math.cos(math.pi * dy)  # a real signal's Nyquist terms: the real part of their shift (as irfft2 takes)
        px[W] = math.cos(math.pi * dx)
        moved = sfft.irfft2(spec * py[:, None] * px[None, :], s=big.shape, workers=1)
        return moved[top:top + h, left:left + w].copy()

    return move


def specimen_fourier(image: np.ndarray, shape: tuple[int, int], dy: float, dx: float, *, margin: int = 0) -> np.ndarray:
    """A window of ``image`` whose content is moved by (``dy``, ``dx``) px by the Fourier shift theorem (one call of
    :func:`fourier_mover`; make the mover once to move the same image many times). May hold small negative values
    (the band-limited interpolant rings near sharp edges): clip before using it as expected photons."""
    return fourier_mover(image)(shape, dy, dx, margin)


def specimen_area(scene: np.ndarray, factor: int, shape: tuple[int, int], dy: float, dx: float) -> np.ndarray:
    """A frame of ``shape`` detector pixels, each the mean of ``factor`` × ``factor`` pixels of ``scene``, the scene
    moved by (``dy``, ``dx``) detector px — the physical detector's pixel-area integration of a scene finer than its
    grid (aliased where the scene holds detail finer than two detector pixels).

    The scene moves by whole scene pixels, so a shift must be a multiple of 1 / ``factor`` detector px (to within
    1e-9); no interpolation is involved. The frame's window sits at the centre of ``scene`` and must, once moved,
    stay inside it (no wrap, no padding): the scene's real content fills every frame. + toward increasing
    row/column, the sign of :func:`specimen_crop`.
    """
    b = int(factor)
    if b != factor or b < 1:
        raise ValueError(f"factor must be a positive whole number of scene pixels, got {factor!r}")
    sc = np.asarray(scene, dtype=np.float64)
    H, W = sc.shape
    h, w = shape
    steps = []
    for name, d in (("dy", dy), ("dx", dx)):
        k = round(d * b)
        if abs(d * b - k) > 1e-9:
            raise ValueError(f"{name}={d!r} px is not a multiple of 1/{b} px (the scene moves by whole scene pixels)")
        steps.append(int(k))
    iy, ix = steps
    top, left = (H - h * b) // 2, (W - w * b) // 2
    r0, c0 = top - iy, left - ix
    if r0 < 0 or c0 < 0 or r0 + h * b > H or c0 + w * b > W:
        raise ValueError(f"a frame of {shape} px of {b}x{b} scene px moved by ({dy:g}, {dx:g}) px does not fit in the "
                         f"{sc.shape} scene")
    return sc[r0:r0 + h * b, c0:c0 + w * b].reshape(h, b, w, b).mean(axis=(1, 3))


def living_specimen(shape: tuple[int, int], n_frames: int, rng: np.random.Generator, *, photons_scale: float = 1.0,
                    background: float = 2.0, motion_px: float = 0.0, rate_hz: float = 0.0, fs: float = 30.0):
    """Expected photons per pixel of ``n_frames`` frames of the real specimen :func:`nuclei_2d`, living and moving.

    Each frame is :func:`specimen_crop` of the image (× ``photons_scale``, + ``background`` photons) moved by a
    random shift uniform in ±``motion_px`` on each axis (residual motion, drawn anew for every frame), and its
    nuclei (the brightest 30 % of the image, labelled by ``scipy.ndimage.label``) carry calcium-like transients:
    events at ``rate_hz`` per nucleus, ΔF/F uniform in 0.3–1.0, exponential decay of 0.7 s at ``fs`` frames/s
    (common practice, no source), stationary from the first frame. Yields (M, N) float arrays.
    """
    from scipy import ndimage

    image = nuclei_2d().astype(np.float64)
    labels, n = ndimage.label(image > np.percentile(image, 70))
    decay = math.exp(-1.0 / (0.7 * fs))
    level = np.zeros(n + 1)
    warm = int(round(5.0 * fs))  # the activity runs 5 s before the first frame
    for j in range(warm + n_frames):
        if rate_hz > 0:
            level[1:] = level[1:] * decay + np.where(rng.random(n) < rate_hz / fs, rng.uniform(0.3, 1.0, n), 0.0)
        if j < warm:
            continue
        lit = image * (1.0 + level[labels])
        dy, dx = rng.uniform(-motion_px, motion_px, 2) if motion_px else (0.0, 0.0)
        yield specimen_crop(lit, shape, float(dy), float(dx)) * photons_scale + background


def detect(expected_photons: np.ndarray, rng: np.random.Generator, *, gain: float = 1.0, offset: float = 0.0,
           read_noise_dn: float = 0.0, bits: int = 16, dtype=np.uint16, gain_shape: float | None = None) -> np.ndarray:
    """One frame of the EMVA 1288 linear camera model: Poisson photons × gain + offset + Gaussian dark noise.

    Parameters
    ----------
    expected_photons : (M, N) ndarray
        Mean detected photons (electrons) per pixel.
    gain : float
        Conversion gain K, DN per photon.
    offset : float
        Dark level μ_dark, DN.
    read_noise_dn : float
        Dark noise σ_d, DN.
    bits : int
        Digitiser bits n: values are rounded and clipped to [0, 2ⁿ − 1] (a 12-bit digitiser in a 16-bit file:
        ``bits=12, dtype=np.uint16``).
    gain_shape : float, optional
        A multiplying detector (photomultiplier): each photon's gain is gamma-distributed with mean ``gain`` and
        this shape k (excess noise factor (k + 1) / k; the sum of N photons' gains is gamma with shape N·k).
        None: the camera model's constant gain.
    """
    electrons = rng.poisson(np.clip(expected_photons, 0, None)).astype(np.float64)
    if gain_shape is None:
        dn = electrons * gain + offset
    else:
        dn = offset + np.where(electrons > 0, rng.gamma(np.maximum(electrons, 1) * gain_shape, gain / gain_shape), 0.0)
    if read_noise_dn:
        dn += rng.normal(0.0, read_noise_dn, dn.shape)
    info = np.iinfo(dtype) if np.dtype(dtype).kind in "ui" else None
    hi = float(2 ** bits - 1)
    lo = 0.0
    if info is not None:
        hi = min(hi, float(info.max))
        lo = max(lo, float(info.min))
    return np.clip(np.rint(dn), lo, hi).astype(dtype)


@functools.lru_cache(maxsize=None)
def emva1288_modules():
    """Import the EMVA 1288 reference implementation (``emva1288.process``), giving numpy 2 its ``asfarray``."""
    if not hasattr(np, "asfarray"):
        np.asfarray = lambda a, dtype=np.float64: np.asarray(a, dtype=dtype)  # removed in numpy 2.0
    import emva1288.process as process
    import emva1288.process.routines as routines

    return process, routines
