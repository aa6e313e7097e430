"""Photon transfer: conversion gain, dark level and photons per pixel from the temporal mean–variance relation."""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np

from qcmon.metrics._validate import as_image, finite_float, positive_int

__all__ = ["CumulantDark", "DarkFrames", "MAX_DARK_SE_DN", "PhotonTransfer", "PhotonTransferResult",
           "estimate_dark_level", "is_structureless", "k3_from_sums", "photons_per_px", "shot_snr"]

#: Samples whose squared high-passed difference exceeds this many predicted variances are outliers (6 sigma).
_OUTLIER_VAR = 36.0
#: Stencils whose neighbours' squared gradient exceeds this many times its flat-field expectation are left out.
_FLAT_GRAD = 3.0
#: Fewest samples a bin needs to enter the fit.
_MIN_BIN_COUNT = 50
#: Fine bins equally spaced in sqrt(level - floor) over the detector's whole range: fixed before any data, so the
#: result does not depend on the order of the pairs (bins set by the first pair rejected everything after a dark
#: first pair). They are merged into about ``n_bins`` points for the fit.
_FINE_BINS = 8192
#: A fit is used only with r² at least this (weighted; a clean photon-transfer line gives > 0.99) ...
_MIN_R2 = 0.9
#: ... unless the points scatter about the line no more than this (reduced χ²) times their own noise.
_MAX_CHI2 = 4.0
#: Largest relative standard error of the gain that is still a gain to use.
_MAX_GAIN_SE = 0.1
#: A break in the line: the slopes of the lower and upper halves of the signal range differ by more than this
#: fraction (and by more than 4 standard errors).
_BREAK_FRAC = 0.25
#: Fewest frame triples' samples a point of the third-cumulant line needs.
_MIN_K3_COUNT = 200
#: Largest standard error (DN) of the dark level from the third cumulant that is still a dark level to use;
#: wider, the dark level is left blank with the reason (the target is 3 DN: 2 standard errors and the ~1 DN that
#: motion and activity added on the real specimen, docs/accuracy.md, fit inside it).
MAX_DARK_SE_DN = 1.0


def _stencil_rows(frames, step: int):
    """The rows of 3-row stencils centred on every ``step``-th row (1, 1 + step, ...) of each frame, as float32,
    and the slices of those arrays that hold the rows above, at and below the centres.

    Each pixel enters every computation on these rows once: with ``step`` up to 3 the stencils' rows overlap or
    touch, so the whole frames are used (no copy for float32 frames) and the slices step through them; with a
    larger step the rows are gathered (three rows per centre) and the slices are three blocks. The values in the
    three slices are the same either way, so anything computed pixel by pixel from them is too.
    """
    m = frames[0].shape[0]
    if step <= 3:
        return ([f.astype(np.float32, copy=False) for f in frames],
                (slice(0, m - 2, step), slice(1, m - 1, step), slice(2, m, step)))
    centre = np.arange(1, m - 1, step)
    rows = np.concatenate((centre - 1, centre, centre + 1))
    k = centre.size
    return [f[rows].astype(np.float32) for f in frames], (slice(0, k), slice(k, 2 * k), slice(2 * k, 3 * k))


@dataclass(frozen=True, slots=True)
class PhotonTransferResult:
    """Fit of ``var = K (mean - dark) + read_noise**2``.

    Attributes
    ----------
    gain_dn_per_photon : float
        Conversion gain K in DN per detected photon.
    dark_level_dn : float
        Detector output with no light (offset) in DN.
    read_noise_dn : float
        Read noise (with quantisation) in DN as configured; NaN when not configured (then assumed negligible).
    n_points : int
        Mean–variance points (bins) in the fit.
    r2 : float
        Weighted coefficient of determination of the line fit.
    quality : str
        "" when the fit can be used; otherwise why not, in plain words (r² too low, a break in the line, too few
        points). A caller must not use the gain when this is not empty.
    dark_origin : str
        Where dark level and read noise come from: "dark frames (n)", "zero-photon peak", "read noise given",
        "third cumulant" or "" (no dark level: see ``bias``).
    bias : str
        Why the dark level is blank or what remains uncertain about it, in plain words ("" when nothing).
    dark_se_dn : float
        Standard error of the dark level from the third cumulant, DN (NaN for the other origins).
    dark_floor_dn : float
        ``-intercept / gain``: a lower bound of the dark level (read noise² ≥ 0), DN.
    """

    gain_dn_per_photon: float
    dark_level_dn: float
    read_noise_dn: float
    n_points: int
    r2: float
    quality: str = ""
    dark_origin: str = ""
    bias: str = ""
    dark_se_dn: float = math.nan
    dark_floor_dn: float = math.nan


@dataclass(frozen=True, slots=True)
class CumulantDark:
    """Dark level from the third cumulant of second differences of three frames (:meth:`PhotonTransfer.cumulant_dark`).

    Attributes
    ----------
    dark_level_dn : float
        Zero crossing of the κ₃ line, DN.
    se_dn : float
        Its standard error, DN (delta method on the weighted line fit).
    slope : float
        Slope of κ₃(D) against the mean, DN²: ``-6 K²`` for a camera (constant gain),
        ``-6 E[G³]/E[G]`` for a multiplying detector with gain distribution G.
    slope_se : float
        Standard error of the slope.
    n_samples : int
        Samples in the fit.
    n_points : int
        Points (bins of the mean) in the fit.
    """

    dark_level_dn: float
    se_dn: float
    slope: float
    slope_se: float
    n_samples: int
    n_points: int


class PhotonTransfer:
    """Accumulate the mean–variance relation of pairs of consecutive frames (EMVA 1288 photon transfer).

    Parameters
    ----------
    max_value : float
        Detector maximum in DN; pixels at or above it (and at or below ``floor``) are left out.
    floor : float, optional
        Lowest recordable value in DN (default 0).
    read_noise_dn : float, optional
        Known read noise in DN (including quantisation, ``1/sqrt(12)`` DN for a unit step). Used to split the
        intercept into dark level and read noise; when None the read noise is taken as negligible (see Notes).
    n_bins : int, optional
        Mean–variance points (default 32).
    row_step : int, optional
        Use every ``row_step``-th row as a stencil centre (default 8: 1/8 of the pixels, 32 k stencils per
        512 x 512 pair).
    pair_step : int, optional
        Process every ``pair_step``-th call of :meth:`update` only (default 8). Frames are independent noise
        samples, so skipping pairs only lengthens the time to a given precision.

    Notes
    -----
    For a pixel with expected photon count ``lam`` per frame, gain K, dark level D and Gaussian read noise s,
    two frames a, b give ``E[(a - b)**2 / 2] = K**2 lam + s**2`` and ``E[(a + b) / 2] = K lam + D``, hence the
    photon transfer line ``var = K (mean - D) + s**2`` (EMVA 1288, eq. for the temporal variance). Three
    choices make it hold on a structured, living, slightly moving scene:

    * **Temporal difference with a vertical high-pass.** ``h = d[r] - (d[r-1] + d[r+1]) / 2`` with
      ``d = a - b`` removes any change between the frames that is constant or linear down a column (slow
      activity of a cell, residual subpixel motion of smooth structure). With independent pixels
      ``E[h**2] / 3`` and the matching weighted pair mean ``x = (m[r] + (m[r-1] + m[r+1]) / 4) / 1.5`` obey
      the same line exactly.
    * **Binning by the neighbours.** Points are grouped by the pair mean of the left and right neighbours of the
      centre pixel, whose noise is independent of ``h`` and ``x``; within any such group the expectations
      stay on the line, so there is no errors-in-variables attenuation (which binning by the pixel's own noisy
      mean would cause when read noise is comparable to the gain). For pure Poisson light even binning by
      the pair's own mean would be unbiased, because ``a - b`` given ``a + b = n`` is binomial
      (``var = n``); read noise breaks that.
    * **Robustness.** Samples with ``h**2 / 3`` above 36 predicted variances (6 sigma, from the running fit)
      are dropped (abrupt activity, motion at edges); stencils touching a saturated or clipped pixel are
      dropped, and so are those whose neighbours are within 6 predicted sigma of the maximum.

    The intercept is ``s**2 - K D``: the line alone cannot split it into dark level and read noise
    (``-intercept / K`` is low by ``s**2 / K``, 25.6 DN for s = 8 DN at K = 2.5 DN/photon). Without dark frames,
    a zero-photon peak or a given read noise, the dark level comes from the **third cumulant**: photons × gain
    plus symmetric read noise has ``κ₃ = K² (mean - D)`` (cumulants of independent terms add; a Poisson count's
    cumulants all equal its mean, a constant gain scales the n-th by Kⁿ; a Gaussian's κ₃ is 0), which is zero
    at the dark level whatever the read noise. The second difference of three consecutive frames
    ``Δ = a - 2 b + c`` cancels the scene where it is constant or changes linearly in time and has
    ``κ₃(Δ) = (1 - 8 + 1) κ₃ = -6 K² (mean - D)`` (cumulants of a weighted sum: weights cubed) and
    ``var(Δ) = 6 (K (mean - D) + s**2)``. Its sums Σ Δ, Σ Δ², Σ Δ³ are kept per fine bin of the neighbours' mean
    (as for the pairs: no selection by the pixel's own noise); per point the unbiased k-statistic k₃ (Fisher
    1930; ``scipy.stats.kstat``) is taken, and the zero crossing of a weighted line through them is the dark
    level, with its standard error (var k₃ ≈ 6 var(Δ)³ / n for near-Gaussian Δ). For a multiplying detector
    (photomultiplier) with random gain G the slope is ``-6 E[G³]/E[G]`` and the zero crossing is still D.
    The read noise is then ``sqrt(intercept + K D)``. A dark level whose standard error exceeds
    :data:`MAX_DARK_SE_DN` is left blank with the reason.

    Memory is ``n_bins`` accumulators; a change of detector gain mid-session needs :meth:`reset`.

    References
    ----------
    .. [1] EMVA Standard 1288, "Standard for characterization of image sensors and cameras", release 4.0,
       European Machine Vision Association (2021).
    .. [2] J. R. Janesick, "Photon Transfer: DN -> lambda", SPIE Press, Bellingham (2007).
    """

    def __init__(self, *, max_value: float, floor: float = 0.0, read_noise_dn: float | None = None,
                 n_bins: int = 32, row_step: int = 8, pair_step: int = 8):
        # float data without a bit depth have no limits: +inf / -inf (the bins then follow the first data)
        self.max_value, self.floor = float(max_value), float(floor)
        for name, v in (("max_value", self.max_value), ("floor", self.floor)):
            if math.isnan(v):
                raise ValueError(f"{name} must be a number, got {v!r}")
        if self.floor >= self.max_value:
            raise ValueError(f"floor ({self.floor}) must be below max_value ({self.max_value})")
        if read_noise_dn is not None:
            read_noise_dn = finite_float(read_noise_dn, "read_noise_dn")
            if read_noise_dn < 0:
                raise ValueError(f"read_noise_dn must be >= 0, got {read_noise_dn}")
        self.read_noise_dn = read_noise_dn
        self.n_bins = positive_int(n_bins, "n_bins")
        if self.n_bins < 3:
            raise ValueError(f"n_bins must be at least 3, got {n_bins}")
        self.row_step = positive_int(row_step, "row_step")
        #: Row step of the frame triples (the third-cumulant dark level needs more samples than the gain; the
        #: caller may read more rows for them); None: ``row_step``.
        self.triple_row_step: int | None = None
        self.pair_step = positive_int(pair_step, "pair_step")
        self.reset()

    def reset(self) -> None:
        """Forget everything accumulated (e.g. after the detector gain was changed)."""
        self._calls = 0
        self.n_pairs = 0
        self._edges: tuple[float, float] | None = None
        if math.isfinite(self.max_value) and math.isfinite(self.floor):  # fixed before any data: independent of the order of the pairs
            self._edges = (self.floor, _FINE_BINS / math.sqrt(self.max_value - self.floor))
        self._count = np.zeros(_FINE_BINS)
        self._sum_x = np.zeros(_FINE_BINS)
        self._sum_y = np.zeros(_FINE_BINS)
        self._line: tuple[float, float] | None = None
        self._chi2_dof = math.nan
        self._slope_se = math.nan
        self._centre = (math.nan, math.nan)
        self.dark = DarkFrames()
        self.peak: tuple[float, float] | None = None
        # third-cumulant accumulators of frame triples, per fine bin: count, Σ mean, Σ Δ, Σ Δ², Σ Δ³
        self._k3 = np.zeros((5, _FINE_BINS))
        self.n_triples = 0
        #: (dark level, standard error, origin) found before a reset (a gain or power step leaves the offset as it
        #: was): used until the new triples give a dark level of their own. Set by the caller after :meth:`reset`.
        self.carried: tuple[float, float, str] | None = None

    def update(self, frame, previous, before=None) -> bool:
        """Add the pair (``previous``, ``frame``) of the same channel and plane, and the triple with ``before``.

        Parameters
        ----------
        frame, previous : (M, N) array_like
            Two consecutive frames, ``previous`` already aligned to ``frame`` (same shape, M, N >= 3). If
            ``previous`` is None nothing is done.
        before : (M, N) array_like, optional
            The frame before ``previous``, aligned likewise: the triple feeds the third-cumulant dark level.

        Returns
        -------
        used : bool
            Whether the pair entered the accumulators (see ``pair_step``).
        """
        if previous is None:
            return False
        a = as_image(frame, "frame", min_shape=(3, 3))
        b = as_image(previous, "previous", min_shape=(3, 3))
        if a.shape != b.shape:
            raise ValueError(f"previous has shape {b.shape}, frame has {a.shape}; align and crop them alike")
        self._calls += 1
        if (self._calls - 1) % self.pair_step:
            return False
        x, y, nbr, grad2, ok = self._samples(a, b)
        if self._edges is None:
            self._set_edges(nbr[ok])
            if self._edges is None:
                return False
        if self._line is not None:
            slope, intercept = self._line
            # The looser of the predictions from the stencil's own mean and from its neighbours': at a few photons
            # the neighbours alone would reject ordinary photon events of the centre pixel and bias the fit.
            predicted = np.maximum(slope * np.maximum(x, nbr) + intercept, 1e-6)
            ok &= y <= _OUTLIER_VAR * predicted
            ok &= nbr + 6.0 * np.sqrt(predicted) < self.max_value
            # Residual motion turns local structure into frame-to-frame change; keep stencils whose
            # surroundings look flat at the noise level (a selection by independent pixels: no bias).
            ok &= grad2 <= _FLAT_GRAD * 8.0 * np.maximum(slope * nbr + intercept, 1e-6)
        lo, scale = self._edges
        idx = np.sqrt(np.maximum(nbr[ok] - lo, 0.0)) * scale
        idx = np.minimum(idx.astype(np.intp), _FINE_BINS - 1)
        xs, ys = x[ok], y[ok]
        self._count += np.bincount(idx, minlength=_FINE_BINS)
        self._sum_x += np.bincount(idx, weights=xs, minlength=_FINE_BINS)
        self._sum_y += np.bincount(idx, weights=ys, minlength=_FINE_BINS)
        self.n_pairs += 1
        if before is not None and self._line is not None:  # samples are judged against the line, as the pairs'
            c = as_image(before, "before", min_shape=(3, 3))
            if c.shape != a.shape:
                raise ValueError(f"before has shape {c.shape}, frame has {a.shape}; align and crop them alike")
            self._add_triple(a, b, c)
        line = self._fit()
        # Outliers are judged against the line only once it is one (a rising line that fits): a single pair at one
        # level (a dark or flat first pair) gives a noise-driven line that would reject everything after it.
        self._line = line[:2] if line is not None and line[0] > 0 and line[2] >= _MIN_R2 and line[3] >= 5 else None
        return True

    def _add_triple(self, a: np.ndarray, b: np.ndarray, c: np.ndarray) -> None:
        """Accumulate Σ Δ, Σ Δ², Σ Δ³ of ``Δ = c - 2 b + a`` per fine bin of the neighbours' three-frame mean."""
        x, nbr, delta, ok = self._triple_samples(a, b, c)
        lo, scale = self._edges
        idx = np.minimum((np.sqrt(np.maximum(nbr[ok] - lo, 0.0)) * scale).astype(np.intp), _FINE_BINS - 1)
        dd = delta[ok]
        d2 = dd * dd
        acc = self._k3
        acc[0] += np.bincount(idx, minlength=_FINE_BINS)
        acc[1] += np.bincount(idx, weights=x[ok], minlength=_FINE_BINS)
        acc[2] += np.bincount(idx, weights=dd, minlength=_FINE_BINS)
        acc[3] += np.bincount(idx, weights=d2, minlength=_FINE_BINS)
        acc[4] += np.bincount(idx, weights=d2 * dd, minlength=_FINE_BINS)
        self.n_triples += 1

    def _triple_samples(self, a: np.ndarray, b: np.ndarray, c: np.ndarray):
        """Per stencil: the centre's three-frame mean, the neighbours' mean, Δ and whether the sample is used."""
        (fa, fb, fc), (up, mid, down) = _stencil_rows((a, b, c), self.triple_row_step or self.row_step)
        bad = ~((fa < self.max_value) & (fa > self.floor) & (fb < self.max_value) & (fb > self.floor)
                & (fc < self.max_value) & (fc > self.floor))  # NaN pixels too, as in _samples
        s = fa + fb + fc
        delta = (fc[mid, 1:-1] - 2.0 * fb[mid, 1:-1] + fa[mid, 1:-1]).astype(np.float64).ravel()
        x = (s[mid, 1:-1] / 3.0).ravel()
        nbr = ((s[mid, :-2] + s[mid, 2:]) / 6.0).ravel()
        # structure seen by the columns either side, as for the pairs (sums of three frames: 12 × the pixel
        # variance on a flat field)
        gx = s[mid, 2:] - s[mid, :-2]
        gy_left = s[down, :-2] - s[up, :-2]
        gy_right = s[down, 2:] - s[up, 2:]
        grad2 = (gx * gx + 0.5 * (gy_left * gy_left + gy_right * gy_right)).ravel()
        badc = bad[up] | bad[mid] | bad[down]
        ok = ~(badc[:, 1:-1] | badc[:, :-2] | badc[:, 2:]).ravel()
        slope, intercept = self._line
        predicted = np.maximum(slope * np.maximum(x, nbr) + intercept, 1e-6)
        ok &= delta * delta <= _OUTLIER_VAR * 6.0 * predicted
        ok &= nbr + 6.0 * np.sqrt(predicted) < self.max_value
        ok &= grad2 <= _FLAT_GRAD * 12.0 * np.maximum(slope * nbr + intercept, 1e-6)
        return x, nbr, delta, ok

    def cumulant_dark(self) -> CumulantDark | None:
        """The dark level where the line of κ₃(Δ) over the mean crosses zero, with its standard error, or None.

        The fine bins are merged from the low end into points of at least ``total / (2 n_bins)`` samples; per
        point k₃ is the unbiased k-statistic from the power sums (Fisher 1930; equal to ``scipy.stats.kstat(Δ, 3)``
        of the point's samples). The line is fitted with weights ``n / (6 v³)``, v the variance of Δ predicted by
        the photon-transfer line (var k₃ ≈ 6 v³ / n for near-Gaussian Δ). None when there is no photon-transfer
        line, fewer than three points, or a κ₃ slope not clearly negative (3 standard errors).

        The standard error takes the samples as independent: right for triples that share no frame (the engine's
        after the start-up: 20 sessions of the real specimen, error scatter 2.01 DN for a stated 1.94), and
        conservative for consecutive overlapping triples, whose second differences are negatively correlated
        (−2/3 for neighbours: the start-up's, and tests' with ``pair_step=1``; scatter 1.04 for a stated 1.86).
        """
        fit = self._fit()
        if fit is None or not fit[0] > 0:
            return None
        gain, intercept = fit[0], fit[1]
        acc = self._k3
        total = float(acc[0].sum())
        if total <= 0:
            return None
        need = max(_MIN_K3_COUNT, total / (2 * self.n_bins))
        group = np.floor(np.cumsum(acc[0]) / need).astype(np.intp)
        group = np.concatenate(([0], group[:-1]))
        sums = np.stack([np.bincount(group, weights=row) for row in acc])
        n, sx, s1, s2, s3 = sums[:, sums[0] >= _MIN_K3_COUNT]
        if n.size < 3:
            return None
        x = sx / n
        k3 = k3_from_sums(n, s1, s2, s3)
        v = 6.0 * np.maximum(gain * x + intercept, 1e-3 * gain)
        w = n / (6.0 * v ** 3)
        if np.ptp(x) <= 0:
            return None
        sw = float(w.sum())
        xm = float(np.dot(w, x)) / sw
        km = float(np.dot(w, k3)) / sw
        dx = x - xm
        sxx = float(np.dot(w, dx * dx))
        slope = float(np.dot(w * dx, k3 - km)) / sxx
        # the points' scatter beyond their predicted noise (non-Poisson change between frames) widens the errors
        chi2 = float(np.dot(w, (k3 - km - slope * dx) ** 2)) / max(n.size - 2, 1)
        inflate = max(1.0, chi2)
        slope_se = math.sqrt(inflate / sxx)
        if not slope < -3.0 * slope_se:
            return None
        level = xm - km / slope
        # delta method: the centred parameters (km, slope) are uncorrelated
        se = math.sqrt(inflate / sw / slope ** 2 + (km / slope ** 2) ** 2 * slope_se ** 2)
        return CumulantDark(float(level), float(se), slope, float(slope_se), int(total), int(n.size))

    def _samples(self, a: np.ndarray, b: np.ndarray):
        """Per-stencil weighted pair mean x, variance sample y, neighbour pair mean and a validity mask."""
        (fa, fb), (up, mid, down) = _stencil_rows((a, b), self.row_step)
        # a limit, or no number at all (NaN in float frames: a comparison with NaN is never true)
        bad = ~((fa < self.max_value) & (fa > self.floor) & (fb < self.max_value) & (fb > self.floor))
        d = fa - fb
        s = fa + fb
        h = d[mid, 1:-1] - 0.5 * (d[up, 1:-1] + d[down, 1:-1])
        y = (h * h) / 3.0
        x = (0.5 * s[mid, 1:-1] + 0.125 * (s[up, 1:-1] + s[down, 1:-1])) / 1.5
        nbr = 0.25 * (s[mid, :-2] + s[mid, 2:])
        # Local structure seen by the columns either side (independent of the stencil's noise): squared
        # horizontal and vertical differences of the pair sums; 8 x the pixel variance on a flat field.
        gx = s[mid, 2:] - s[mid, :-2]
        gy_left = s[down, :-2] - s[up, :-2]
        gy_right = s[down, 2:] - s[up, 2:]
        grad2 = gx * gx + 0.5 * (gy_left * gy_left + gy_right * gy_right)
        badc = bad[up] | bad[mid] | bad[down]
        ok = ~(badc[:, 1:-1] | badc[:, :-2] | badc[:, 2:])
        return x.ravel(), y.ravel(), nbr.ravel(), grad2.ravel(), ok.ravel()

    def _set_edges(self, nbr: np.ndarray) -> None:
        """Only for a detector without a finite maximum (float data without a bit depth): fine bins equally spaced
        in sqrt(neighbour mean - low end) up to 16 times the span of the first pair with light."""
        if nbr.size < 100:
            return
        lo, hi = np.percentile(nbr, [0.5, 99.5])
        span = math.sqrt(max(hi - lo, 0.0))
        if not span > 0:
            return
        self._edges = (float(min(lo, self.floor if math.isfinite(self.floor) else lo)), _FINE_BINS / (4.0 * span))

    def _points(self):
        """The fine bins merged, from the low end, into points of at least ``total / n_bins`` samples each (and
        at least the minimum count): arrays (n, mean x, mean y)."""
        total = float(self._count.sum())
        if total <= 0:
            return np.zeros(0), np.zeros(0), np.zeros(0)
        need = max(_MIN_BIN_COUNT, total / (2 * self.n_bins))
        cum = np.cumsum(self._count)
        group = np.floor(cum / need).astype(np.intp)
        group = np.concatenate(([0], group[:-1]))  # a bin closes its group when the group reaches `need`
        n = np.bincount(group, weights=self._count)
        sx = np.bincount(group, weights=self._sum_x)
        sy = np.bincount(group, weights=self._sum_y)
        keep = n >= _MIN_BIN_COUNT
        return n[keep], sx[keep] / n[keep], sy[keep] / n[keep]

    def _fit(self):
        """Weighted line fit through the bins: (slope, intercept, r2, n_points) or None."""
        n, x, y = self._points()
        if n.size < 3:
            return None
        if np.ptp(x) <= 0:
            return None
        # Weights from the fitted line, not from each bin's own scatter (which correlates with its mean and
        # biases the fit): var(mean of y) ~ 2 E[y]**2 / n for a Gaussian variance sample; two reweightings.
        w = n / np.maximum(y, 1e-12) ** 2
        for _ in range(3):
            slope, intercept = _weighted_line(x, y, w)
            pred = np.maximum(slope * x + intercept, 1e-3 * max(float(np.max(y)), 1e-12))
            w = n / pred**2
        resid = y - (slope * x + intercept)
        ybar = np.average(y, weights=w)
        ss_tot = float(np.sum(w * (y - ybar) ** 2))
        r2 = 1.0 - float(np.sum(w * resid**2)) / ss_tot if ss_tot > 0 else math.nan
        # w / 2 are inverse variances of the bin means (variance samples of Gaussian noise: var = 2 E[y]**2 / n)
        self._chi2_dof = float(np.sum(0.5 * w * resid**2)) / max(n.size - 2, 1)
        xm = np.average(x, weights=w)
        dx = x - xm
        self._slope_se = math.sqrt(2.0 / max(float(np.dot(w, dx * dx)), 1e-300))
        # the line at its weighted centre: the mean and its variance (uncorrelated with the slope's)
        self._centre = (float(xm), 2.0 / float(np.sum(w)))
        return float(slope), float(intercept), r2, int(n.size)

    def find_zero_photon_peak(self, values) -> tuple[float, float] | None:
        """Dark level and read noise from the zero-photon peak of the pixel histogram, when the data show one.

        Parameters
        ----------
        values : array_like
            Pixel values of some frames of the session (any shape; clipped values are left out).

        Returns
        -------
        (dark_level_dn, read_noise_dn) or None
            Also kept in :attr:`peak` (used by :meth:`result` when there are no dark frames).

        Notes
        -----
        At a few photons per pixel and a gain well above the read noise (photon counting with a PMT), pixels that
        caught no photon form a Gaussian peak at the dark level with the read noise as its width, one gain below
        the one-photon peak. The lowest peak of the histogram is taken as that only if it is narrow (read noise
        below a quarter of the gain) and lies on the photon-transfer line: the intercept must equal
        ``s² - K·D`` within ``K²/4`` — an n-photon peak misses it by ``n·K²``, a broad population of dim pixels
        by its width. Common practice of photon-counting calibration (e.g. Janesick 2007, single-photon
        histograms, from memory); the check against the line is ours.
        """
        fit = self._fit()
        if fit is None or not fit[0] > 0:
            return None
        k, c = fit[0], fit[1]
        v = np.asarray(values, dtype=np.float64).ravel()
        v = v[(v > self.floor) & (v < self.max_value)]
        if v.size < 1000:
            return None
        lo = float(np.percentile(v, 0.1))
        if np.all(v == np.round(v)):  # integer data: whole-DN bins starting half a DN low (no aliasing)
            width, lo = max(1.0, float(round(k / 20.0))), math.floor(lo) - 0.5
        else:
            width = k / 20.0
        sel = v[v < lo + 1.5 * k]
        if sel.size < 500:
            return None
        n_bins = max(int(math.ceil((float(sel.max()) - lo) / width)), 1)
        hist, edges = np.histogram(sel, bins=n_bins, range=(lo, lo + n_bins * width))
        mode = 0.5 * (edges[int(np.argmax(hist))] + edges[int(np.argmax(hist)) + 1])

        def refine(centre: float, spread: float):
            for _ in range(3):  # the peak's centre and width from the values near it
                near = v[np.abs(v - centre) <= 2.0 * spread]
                if near.size < 100:
                    return None
                centre = float(np.median(near))
                lower = near[near < centre] - centre
                # values equal to the centre (integer data) count half to each side; E[x² | 0 < x < 2σ] of a
                # Gaussian is 0.774 σ²
                n_low = lower.size + 0.5 * int(np.count_nonzero(near == centre))
                spread = max(math.sqrt(float(np.sum(lower * lower)) / max(n_low, 1.0) / 0.774), 0.3)
            return centre, spread

        found = refine(mode, k / 4.0)
        if found is None or not found[1] < k / 4.0:
            return None
        # the tallest narrow peak may be the n-photon one (dim background of a photon or two): the line says
        # which n, and the zero-photon peak must then be found n gains lower
        n = round((found[0] - (found[1] ** 2 - c) / k) / k)
        if n >= 1:
            found = refine(found[0] - n * k, found[1])
            if found is None or not found[1] < k / 4.0:
                return None
        centre, spread = found
        if abs(spread * spread - k * centre - c) > k * k / 4.0:
            return None
        self.peak = (centre, spread)
        return self.peak

    def _read_noise(self, intercept: float, gain: float, dark: float, dark_se: float) -> float:
        """Read noise ``sqrt(intercept + K·D)``; NaN when its square is uncertain by more than half of it.

        At the line's weighted centre x̄ the read noise² is ``ȳ - K (x̄ - D)``, whose variance is
        ``var ȳ + (x̄ - D)² var K + K² var D`` (the centred mean and slope are uncorrelated): a high gain turns a
        DN of dark level into K DN² of read noise², and a long extrapolation from x̄ multiplies the gain's error.
        """
        r2 = intercept + gain * dark
        xm, var_ybar = self._centre
        var = var_ybar + (xm - dark) ** 2 * self._slope_se ** 2 + gain ** 2 * dark_se ** 2
        if not r2 > 0 or not math.sqrt(var) <= 0.5 * r2:
            return math.nan
        return math.sqrt(r2)

    def _break(self) -> str:
        """A break in the line: the lower and upper halves of the points (by samples) have different slopes."""
        n, x, y = self._points()
        if n.size < 8:
            return ""
        half = np.searchsorted(np.cumsum(n), 0.5 * n.sum())
        half = min(max(half, 4), n.size - 4)
        fits = []
        for sel in (slice(0, half), slice(half, None)):
            nn, xx, yy = n[sel], x[sel], y[sel]
            if np.ptp(xx) <= 0:
                return ""
            w = nn / np.maximum(yy, 1e-12) ** 2
            for _ in range(2):
                slope, icpt = _weighted_line(xx, yy, w)
                w = nn / np.maximum(slope * xx + icpt, 1e-3 * max(float(np.max(yy)), 1e-12)) ** 2
            # var(y mean of a bin) ~ 2 E[y]**2 / n (Gaussian variance samples): w / 2 are inverse variances
            dx = xx - np.average(xx, weights=w)
            fits.append((slope, math.sqrt(2.0 / float(np.dot(w, dx * dx)))))
        (s1, e1), (s2, e2) = fits
        ref = max(abs(s1), abs(s2), 1e-12)
        if abs(s2 - s1) > _BREAK_FRAC * ref and abs(s2 - s1) > 4.0 * math.hypot(e1, e2):
            return (f"break in the photon-transfer line: slope {s1:.3g} DN/photon in the lower half of the signal "
                    f"range, {s2:.3g} in the upper (detector gain changed, or a non-linear detector?)")
        return ""

    def result(self) -> PhotonTransferResult:
        """The current fit; NaN fields with a UserWarning when it is undefined (too few pairs, no light range)."""
        fit = self._fit()
        dark = self.dark.result()
        read = math.nan if self.read_noise_dn is None else self.read_noise_dn
        if fit is None or not fit[0] > 0:
            warnings.warn("photon transfer undefined: too few frame pairs or no spread of signal levels yet",
                          UserWarning, stacklevel=2)
            return PhotonTransferResult(math.nan, math.nan, read, 0 if fit is None else fit[3], math.nan,
                                        quality="too few frame pairs or no spread of signal levels")
        slope, intercept, r2, n_points = fit
        quality = ""
        if not r2 >= _MIN_R2 and not self._chi2_dof <= _MAX_CHI2:
            # a low r² alone may be a narrow range of levels; with points scattering beyond their noise it is a
            # line that does not fit (two gains mixed, a non-linear detector, structure leaking into the samples)
            quality = (f"poor photon-transfer fit (r² {r2:.2f}; the points scatter {math.sqrt(self._chi2_dof):.1f}× "
                       "beyond their noise)")
        else:
            quality = self._break()
        if not quality and not self._slope_se <= _MAX_GAIN_SE * slope:
            quality = f"too few samples: gain uncertain by ±{100 * self._slope_se / slope:.0f} %"
        bias = ""
        se = math.nan
        if dark is None and self.peak is not None:
            level, read = self.peak
            origin = "zero-photon peak"
        elif dark is not None:
            # EMVA 1288: the dark level and dark noise are measured on dark images (release 4.0, section 6).
            level, read = dark
            origin = f"dark frames ({self.dark.n_frames})"
        elif self.read_noise_dn is not None:
            level, origin = (self.read_noise_dn**2 - intercept) / slope, "read noise given"
        else:
            found = self.cumulant_dark()
            level, origin = math.nan, ""
            if self.carried is not None and not (found is not None and found.se_dn <= MAX_DARK_SE_DN):
                level, se, origin = self.carried
                read = self._read_noise(intercept, slope, level, se)
                if math.isnan(read):
                    bias = "read noise uncertain: the dark level's error times the gain is beyond half of read noise²"
            elif found is None:
                bias = ("dark level unknown: no dark frames, and too few frame triples for the third-cumulant "
                        "estimate")
            elif not found.se_dn <= MAX_DARK_SE_DN:
                se = found.se_dn
                bias = (f"dark level uncertain (±{found.se_dn:.2g} DN from the third cumulant of "
                        f"{found.n_samples} samples): needs dark frames or a longer session")
            else:
                level, se, origin = found.dark_level_dn, found.se_dn, "third cumulant"
                read = self._read_noise(intercept, slope, level, se)
                if math.isnan(read):
                    bias = "read noise uncertain: the dark level's error times the gain is beyond half of read noise²"
        return PhotonTransferResult(slope, float(level), read, n_points, r2, quality, origin, bias, se,
                                    -intercept / slope)


def is_structureless(frame, noise_sigma: float, *, bin_factor: int = 8, ratio: float = 2.0) -> bool:
    """Whether a frame shows no structure beyond its pixel noise (a closed shutter, no specimen).

    Parameters
    ----------
    frame : (M, N) array_like
        One frame.
    noise_sigma : float
        Its pixel noise σ in DN (e.g. :func:`qcmon.metrics.noise.immerkaer_sigma`).
    bin_factor : int
        Side of the blocks averaged before the variance is taken (default 8: cell-sized structure stays, the
        noise variance falls 64-fold).
    ratio : float
        A frame is structureless when the variance of its ``bin_factor``-binned image is below ``ratio`` times
        what noise alone gives (``σ² / bin_factor²``).

    Notes
    -----
    Binning keeps structure (cells, vessels, the illumination's fall-off) and averages independent noise down by
    the block's area, so the test does not need to know the gain. A uniformly lit field (a flat field) is
    structureless too: whether structureless frames are *dark* is decided against the session's other frames
    (see :class:`DarkFrames`). Common practice, no source.
    """
    a = as_image(frame, "frame", min_shape=(2, 2))
    b = max(1, min(int(bin_factor), a.shape[0] // 2, a.shape[1] // 2))
    h, w = (a.shape[0] // b) * b, (a.shape[1] // b) * b
    binned = a[:h, :w].astype(np.float64).reshape(h // b, b, w // b, b).mean(axis=(1, 3))
    s2 = float(noise_sigma) ** 2
    if not math.isfinite(s2):
        return False
    return float(binned.var()) <= ratio * max(s2, 1.0 / 12.0) / (b * b)


class DarkFrames:
    """Dark level and read noise from the session's dark frames (closed shutter at its start or end).

    The engine hands on frames that showed no structure (:func:`is_structureless`) with their mean; the frames are
    counted as dark only if the session also holds lit frames (with structure) clearly above them. The read noise
    is half the variance of the difference of two consecutive dark frames (EMVA 1288 release 4.0, section 6:
    temporal dark noise from two dark images), which includes quantisation.
    """

    #: Dark frames used at most (their statistics are settled long before; a session of structureless frames
    #: would otherwise pay a pass over every frame).
    MAX_FRAMES = 64
    #: Largest fraction of a dark frame's pixels at the detector's floor or ceiling: more, and its mean is biased.
    MAX_CLIPPED = 0.001

    def __init__(self) -> None:
        self.n_frames = 0
        self._sum_mean = 0.0
        self._n_pairs = 0
        self._sum_var = 0.0
        self.lit_min_mean = math.inf
        self.refused = ""

    def add(self, frame: np.ndarray, previous_dark: np.ndarray | None, *, clipped_frac: float = 0.0) -> None:
        """Add a structureless frame (and, when the frame before it was one too, their pair)."""
        if self.n_frames >= self.MAX_FRAMES:  # enough for both figures; each frame costs a pass over its pixels
            return
        if clipped_frac > self.MAX_CLIPPED:
            self.refused = f"dark frames with {100 * clipped_frac:.2g} % of their pixels clipped: not used"
            return
        a = np.asarray(frame, dtype=np.float64)
        self.n_frames += 1
        self._sum_mean += float(a.mean())
        if previous_dark is not None and previous_dark.shape == a.shape:
            d = a - np.asarray(previous_dark, dtype=np.float64)
            self._n_pairs += 1
            self._sum_var += 0.5 * float(d.var())

    def add_lit(self, mean: float) -> None:
        """A frame with structure (light): its mean."""
        if math.isfinite(mean):
            self.lit_min_mean = min(self.lit_min_mean, float(mean))

    def result(self) -> tuple[float, float] | None:
        """(dark level, read noise) in DN, or None when there are no usable dark frames."""
        if self.n_frames < 2 or self._n_pairs < 1:
            return None
        level = self._sum_mean / self.n_frames
        read = math.sqrt(self._sum_var / self._n_pairs)
        # dark only if the lit frames sit clearly above: a flat, lit field is structureless too
        if not (math.isfinite(self.lit_min_mean) and self.lit_min_mean > level + 3.0 * max(read, 0.5)):
            return None
        return level, read


def k3_from_sums(n, s1, s2, s3):
    """Unbiased k-statistic k₃ (estimate of the third cumulant) from the count and the power sums Σx, Σx², Σx³.

    ``k3 = (n² S3 - 3 n S1 S2 + 2 S1³) / (n (n - 1) (n - 2))`` (Fisher 1930; the formula of
    ``scipy.stats.kstat(x, 3)``). Works elementwise on arrays of bins.
    """
    n, s1, s2, s3 = (np.asarray(v, dtype=np.float64) for v in (n, s1, s2, s3))
    return (n * n * s3 - 3.0 * n * s1 * s2 + 2.0 * s1 ** 3) / (n * (n - 1.0) * (n - 2.0))


def _weighted_line(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[float, float]:
    """Weighted least-squares line ``y = slope x + intercept`` minimising ``sum(w (y - slope x - intercept)**2)``.

    The closed form of the normal equations, centred on the weighted means (the same fit as
    ``numpy.polynomial.polynomial.polyfit(x, y, 1, w=sqrt(w))`` at a fraction of its cost).
    """
    sw = float(np.sum(w))
    xm = float(np.dot(w, x)) / sw
    ym = float(np.dot(w, y)) / sw
    dx = x - xm
    slope = float(np.dot(w * dx, y - ym)) / float(np.dot(w * dx, dx))
    return slope, ym - slope * xm


def photons_per_px(mean_above_dark, gain):
    """Mean detected photons per pixel, ``mean_above_dark / gain``.

    Parameters
    ----------
    mean_above_dark : float or ndarray
        Mean pixel value above the dark level, DN.
    gain : float
        Conversion gain, DN per photon (:attr:`PhotonTransferResult.gain_dn_per_photon`).

    Returns
    -------
    photons : float or ndarray
        Photons per pixel (NaN where the gain is not positive and finite).
    """
    g = np.asarray(gain, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where((g > 0) & np.isfinite(g), np.asarray(mean_above_dark, dtype=float) / g, np.nan)
    return float(out) if out.ndim == 0 else out


def shot_snr(photons):
    """Photon-limited SNR of one pixel, ``sqrt(photons)`` (Poisson statistics; Janesick 2007).

    Parameters
    ----------
    photons : float or ndarray
        Mean detected photons per pixel.

    Returns
    -------
    snr : float or ndarray
        ``sqrt(photons)``; 0 for 0 photons, NaN for negative values.
    """
    p = np.asarray(photons, dtype=float)
    with np.errstate(invalid="ignore"):
        out = np.where(p >= 0, np.sqrt(np.abs(p)), np.nan)
    return float(out) if out.ndim == 0 else out


def estimate_dark_level(frame, *, percentile: float = 1.0) -> float:
    """Dark level estimated as a low percentile of one frame's pixel values (fallback without photon transfer).

    Parameters
    ----------
    frame : (M, N) array_like
        One frame.
    percentile : float, optional
        Percentile in 0..100 (default 1).

    Returns
    -------
    dark_level_dn : float
        The percentile, DN.

    Notes
    -----
    Biased both ways: read noise pulls it below the true offset (about 2.3 read-noise sigmas for the 1st
    percentile when many pixels see no photons), and a frame without dark pixels pushes it above. Use the
    photon transfer result when available. Common practice, no source.
    """
    a = as_image(frame, "frame")
    q = finite_float(percentile, "percentile")
    if not 0 <= q <= 100:
        raise ValueError(f"percentile must be within 0..100, got {percentile}")
    return float(np.percentile(a, q))
