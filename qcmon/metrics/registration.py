"""Rigid frame-to-reference displacement: phase correlation with DFT-upsampled subpixel refinement.

Public API: :class:`ShiftEstimator`, :class:`ShiftResult`, :func:`build_reference`.
"""

from __future__ import annotations

import copy
import math
import warnings
from typing import NamedTuple

import numpy as np
import scipy.fft as sfft

from qcmon.metrics import _fft
from qcmon.metrics._imageops import as_image, auto_bin, bin_image, finite_float32, shift_integer, tukey_window

__all__ = ["ShiftEstimator", "ShiftResult", "build_reference"]

_TWO_PI = 2.0 * math.pi


class ShiftResult(NamedTuple):
    """Displacement of one frame against the reference.

    Attributes
    ----------
    dy_px, dx_px : float
        Shift of the frame's content relative to the reference in original pixels: +y toward increasing row,
        +x toward increasing column (the opposite sign of ``skimage.registration.phase_cross_correlation``).
        NaN when the frame holds nothing to register (constant or all-NaN).
    corr : float
        Pearson correlation of the frame with the reference after alignment (1 = identical, up to gain and
        offset); see :class:`ShiftEstimator` for how it is computed. NaN together with the shifts.
    """

    dy_px: float
    dx_px: float
    corr: float


_NAN_RESULT = ShiftResult(math.nan, math.nan, math.nan)


def _tukey2d(shape: tuple[int, int], alpha: float) -> np.ndarray:
    wr = tukey_window(shape[0], alpha, sym=False).astype(np.float32)
    wc = tukey_window(shape[1], alpha, sym=False).astype(np.float32)
    return np.outer(wr, wc)


def _signed_freqs(n: int, keep: int) -> np.ndarray:
    """Integer frequencies (cycles per ``n`` samples) of the ``keep`` rows kept from a length-``n`` FFT axis."""
    half = keep // 2
    return np.concatenate([np.arange(half), np.arange(-(keep - half), 0)]).astype(np.float64)


def _crop(spec: np.ndarray, keep_rows: int, keep_cols: int) -> np.ndarray:
    """The ``keep_rows`` lowest signed row frequencies and the first ``keep_cols`` columns of a half spectrum."""
    if keep_rows == spec.shape[0]:
        return spec[:, :keep_cols]
    half = keep_rows // 2
    return np.concatenate([spec[:half, :keep_cols], spec[spec.shape[0] - (keep_rows - half):, :keep_cols]], axis=0)


class ShiftEstimator:
    """Measure the rigid shift of frames against a fixed reference image.

    The reference's spectrum is computed once; each call of :meth:`estimate` costs one real FFT of the (binned,
    apodised) frame, one small inverse FFT over a low-pass band and a few tiny matrix-multiply DFTs.

    Parameters
    ----------
    reference : (M, N) array_like
        Reference image (integer or floating point), e.g. from :func:`build_reference`.
    upsample : int, optional
        Subpixel precision: shifts are resolved to 1/``upsample`` of an original pixel.
    bin_factor : int, optional
        Sum ``bin_factor`` x ``bin_factor`` pixel blocks before the FFT. None chooses ``max(M, N) // 256``
        (1 below 512 px, 2 at 512 px, 4 at 1024 px), so the FFT is at most about 256 x 256. Results are always
        in original pixels.
    window : bool, optional
        Apodise both images with a separable Tukey window (``alpha`` = 0.25) after subtracting their mean, so
        that the non-periodic image borders do not produce a false correlation peak at zero shift.
    max_shift_px : float, optional
        Largest shift searched along either axis, in original pixels. None searches the whole correlation
        surface (up to half the image size).
    workers : int, optional
        Threads for ``scipy.fft`` (default 1).
    dark_level, gain, read_noise_dn : float, optional
        The detector's offset (DN), conversion gain (DN per photon) and read noise (DN), e.g. from photon transfer;
        NaN or None when unknown. The likelihood refinement models the frame's photon counts with them; without a
        gain it estimates the reference's noise from its highest frequencies, without a dark level it takes 0
        (then the likelihood tends to plain cross-correlation, the estimator for uniform Gaussian noise).
    reference_frames : int, optional
        How many frames the reference is the mean of (its noise is the frames' over this number).
    reference_valid : (M, N) bool ndarray, optional
        True where a reference pixel is usable; the others (e.g. saturated in the frames it was built from) are
        replaced by the mean of the usable ones, so that a patch fixed on the detector does not hold the shift, and
        the likelihood refinement gives no weight to frame pixels that meet them.

    Notes
    -----
    *Method.* Phase correlation (Kuglin & Hines 1975) locates the peak of the inverse transform of the
    normalised cross-power spectrum ``C = G conj(F)`` (``G`` frame, ``F`` reference); the peak is refined to
    1/``upsample`` px by evaluating the inverse DFT on progressively finer grids around it with matrix
    multiplications, as in Guizar-Sicairos, Thurman & Fienup (2008), Opt. Lett. 33:156. Here the grid is
    refined in stages of 5x over +-1 step of the previous stage, the last stage straight to the final step (at
    512 px, binned 2x: 8 → 1.6 → 0.32 → 0.05 original px), each stage a grid of at most 17 x 17 points (11 x 11,
    11 x 11 and 15 x 15 here). The DFT matrices of every stage are computed once and only moved to the current
    peak by a phase ramp (looked up for the coarse peak, then the chosen row of the previous stage's matrix).
    All stages use the same weighted spectrum, so the refined peak is the maximum of one continuous surface.

    *Low-pass band.* Only the lowest half of the (binned) frequencies along each axis is used for the
    refinement: every DFT stage sums over that band only. At the photon counts of calcium imaging the discarded
    high frequencies are dominated by shot noise; a smooth cosine taper over the outer part of the band avoids
    ringing from the crop. The coarse surface, which only has to place the peak within one of its grid steps,
    is the inverse FFT of the inner half of that band (at most 64 frequencies along each axis, tapered alike):
    the strongest, least noisy frequencies, and a quarter of the cost.

    *Spectral weighting (low photon counts).* Pure phase correlation divides ``C`` by ``|C|`` (whitening), which
    gives every frequency the same weight; at 0.5-2 photons/px most frequencies hold only shot noise, and
    whitening lifts that noise to the level of the signal. Plain cross-correlation (no division) is the
    maximum-likelihood estimator for white noise but lets the strongest low frequencies — neuropil, slow
    brightness changes, the window itself — dominate, which broadens the peak and biases it. We use a Wiener
    weighting of the whitened spectrum::

        R = C / |C| * S / (S + 1),    S = |F|^2 / (a * sigma^2)

    where ``S`` is the signal-to-noise power ratio of the frame at each frequency, ``sigma^2`` the frame's
    noise power (mean of ``|G|^2`` over the highest frequencies, where the sample holds no signal) and ``a``
    the reference-to-frame power ratio (so that the reference and the frame may differ in gain, e.g. by
    bleaching). Where ``S >> 1`` this is phase correlation; where ``S << 1`` the weight falls as ``S``, like
    the matched filter. It is the usual compromise between the two (a Wiener-filtered phase correlation).

    *Correlation.* ``corr`` is the Pearson correlation of the binned, mean-subtracted, apodised frame with the
    reference shifted by the measured subpixel shift (circularly), computed from the unweighted cross-power
    spectrum at that one shift (Parseval), i.e. with all frequencies: at low photon counts it is limited by
    shot noise (about ``sqrt(S/(1+S))`` of the pixels) and so is a measure of registration quality, not of
    the shift error.

    References
    ----------
    .. [1] C. D. Kuglin and D. C. Hines, "The phase correlation image alignment method", Proc. IEEE Int. Conf.
       on Cybernetics and Society, 163-165 (1975).
    .. [2] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient subpixel image registration
       algorithms", Optics Letters 33(2), 156-158 (2008).
    """

    _BAND = 0.5  # fraction of the binned frequencies kept along each axis
    _TAPER = 0.35  # outer fraction of the band over which the cosine taper falls to zero
    _ALPHA = 0.25  # Tukey window parameter
    # A peak beyond the range must be twice the best one inside and top it by this many standard deviations of the
    # coarse surface (a weak frame's side lobe outside may top a weak true peak inside a little)
    _OUT_OF_RANGE = 3.0
    _ML_FLOOR = 0.02  # least expected count of the likelihood model, as a fraction of the reference's mean
    _ML_STEPS = 2  # Newton steps of the maximum-likelihood refinement (from within 0.1 binned px: quadratic)
    _ML_BAND = (0.5, 1.0)  # the likelihood's frequencies roll off between these fractions of the Nyquist frequency
    _fine = False  # whether the likelihood models the frame with a reference on a grid twice as fine (_ml_setup_fine)
    _FINE_STEPS = 1  # Fisher scoring steps with the fine model, from the likelihood's estimate on the frame's grid

    def __init__(self, reference, *, upsample: int = 20, bin_factor: int | None = None, window: bool = True,
                 max_shift_px: float | None = None, workers: int = 1, dark_level: float | None = None,
                 gain: float | None = None, read_noise_dn: float | None = None, reference_frames: int | None = None,
                 reference_valid: np.ndarray | None = None):
        ref = as_image(reference, "reference", min_size=16)
        if reference_valid is not None:
            rv = np.asarray(reference_valid)
            if rv.shape != ref.shape or rv.dtype != np.bool_:
                raise ValueError(f"reference_valid must be a boolean mask of shape {ref.shape}, got {rv.dtype} "
                                 f"{rv.shape}")
            if not rv.any():
                raise ValueError("reference_valid marks no pixel of the reference as usable")
        if isinstance(upsample, bool) or not isinstance(upsample, (int, np.integer)) or upsample < 1:
            raise ValueError(f"upsample must be a positive integer, got {upsample!r}")
        if bin_factor is None:
            bin_factor = auto_bin(ref.shape)
        elif isinstance(bin_factor, bool) or not isinstance(bin_factor, (int, np.integer)) or bin_factor < 1:
            raise ValueError(f"bin_factor must be a positive integer or None, got {bin_factor!r}")
        if min(ref.shape) // int(bin_factor) < 16:
            raise ValueError(f"bin_factor={bin_factor} leaves fewer than 16 px of the {ref.shape} reference")
        if reference_valid is not None and not rv.all():
            ref = _featureless(ref, rv, int(bin_factor))
        if max_shift_px is not None and not (max_shift_px > 0):
            raise ValueError(f"max_shift_px must be positive or None, got {max_shift_px!r}")
        self.shape: tuple[int, int] = ref.shape
        self.upsample = int(upsample)
        self.bin_factor = int(bin_factor)
        self.window = bool(window)
        self.max_shift_px = None if max_shift_px is None else float(max_shift_px)
        self.workers = int(workers)
        self._vmask_last: tuple[np.ndarray, np.ndarray] | None = None  # the last mask's counts and weights
        self._wm_last: tuple | None = None  # the likelihood's weight spectrum for the last mask (_ml_masked)
        # the reference's usable pixels as binned weights (None: all): the likelihood leaves out frame pixels that
        # meet the reference's unusable (featureless) parts, wherever the frame's own mask leaves them in
        self._ref_vmask = None
        if reference_valid is not None and not rv.all():
            from scipy import ndimage

            # every pixel _featureless changed (1 px and a bin's soft edge) and a bin more for the rounding of d0
            # (at 128², 200 photons/px, the shift was biased 0.03 px toward the patch with 1 px, 0.07 px with none)
            grow = 2 * self.bin_factor + 1
            self._ref_vmask = self._binned_valid(~ndimage.binary_dilation(~rv, iterations=grow))

        refb = bin_image(ref.astype(np.float32, copy=False), self.bin_factor)
        refb = finite_float32(refb, "reference", warn=False)
        if refb is None:
            raise ValueError("reference is constant or has no finite pixel: there is nothing to register to")
        mb, nb = refb.shape
        self._bshape = (mb, nb)
        self._win = _tukey2d((mb, nb), self._ALPHA) if self.window else None
        self._kr_full = _signed_freqs(mb, mb)
        self._kc_full = np.arange(nb // 2 + 1, dtype=np.float64)

        # Low-pass band for the search and the refinement.
        br = mb if mb <= 64 else 2 * int(round(mb * self._BAND / 2))
        bc = nb if nb <= 64 else 2 * int(round(nb * self._BAND / 2))
        self._band = (br, bc)
        kcb = bc // 2 + 1
        self._kcb = kcb
        self._kr = _signed_freqs(mb, br)
        self._kc = np.arange(kcb, dtype=np.float64)
        self._set_reference(refb)
        # Noise band: the outer quarter of frequencies along both axes of the full spectrum (a contiguous block).
        r0 = math.ceil(0.375 * mb)
        self._noise_rows = slice(r0, max(r0 + 1, mb - r0 + 1))
        self._noise_c0 = min(math.ceil(0.375 * nb), nb // 2)

        # Coarse search on the inner half of the band (at most 64 frequencies along each axis), with its own taper:
        # the peak is first found from the strongest, lowest frequencies, on a grid of mb/cr x nb/cc binned px.
        cr = br if br <= 64 else 2 * int(round(br / 4))
        cc = bc if bc <= 64 else 2 * int(round(bc / 4))
        self._coarse = (cr, cc)
        self._kcc = cc // 2 + 1
        self._coarse_taper = None
        if (cr, cc) != (br, bc):
            kr_c = _signed_freqs(mb, cr)
            kc_c = np.arange(self._kcc, dtype=np.float64)
            self._coarse_taper = np.outer(self._taper(np.abs(kr_c) / (cr / 2)),
                                          self._taper(kc_c / (cc / 2))).astype(np.float32)
        self._coarse_step = (mb / cr, nb / cc)
        self._final_step = 1.0 / (self.upsample * self.bin_factor)
        lim_r = lim_c = math.inf
        if self.max_shift_px is not None:
            lim_r = lim_c = self.max_shift_px / self.bin_factor
        self._coarse_r = _signed_freqs(cr, cr) * self._coarse_step[0]
        self._coarse_c = _signed_freqs(cc, cc) * self._coarse_step[1]
        mask = ((np.abs(self._coarse_r)[:, None] <= lim_r + self._coarse_step[0])
                & (np.abs(self._coarse_c)[None, :] <= lim_c + self._coarse_step[1]))
        # added to the coarse surface: -inf outside the searched range
        self._coarse_mask = None if mask.all() else np.where(mask, 0.0, -np.inf).astype(np.float32)
        self._lim = (lim_r, lim_c)
        self._stages = self._refinement_stages()
        # Phase ramps that move the refinement grids to a coarse peak (one row per coarse grid point): a table
        # look-up instead of complex exponentials per frame. Later stages reuse the rows of the grid matrices.
        self._ramp_r = np.exp((1j * _TWO_PI / mb) * np.outer(self._coarse_r, self._kr)).astype(np.complex64)
        self._ramp_c = np.exp((1j * _TWO_PI / nb) * np.outer(self._coarse_c, self._kc)).astype(np.complex64)
        #: True when the last frame's correlation peak lay beyond ``max_shift_px`` (its shift is then NaN)
        self.out_of_range = False
        self._facts = (dark_level, gain, read_noise_dn)  # the detector, for with_reference
        self._ml_setup(refb, dark_level, gain, read_noise_dn, reference_frames)

    def _set_reference(self, refb: np.ndarray) -> None:
        """The spectra of the (binned, finite) reference that the search and the correlation use."""
        mb, nb = self._bshape
        br, bc = self._band
        kcb = self._kcb
        fw = self._prepare(refb)
        f_full = sfft.rfft2(fw, workers=self.workers)
        # For the Pearson correlation: conj(F) over the whole half-spectrum, Hermitian weights, DC removed.
        h_full = np.full(f_full.shape, 2.0, dtype=np.float32)
        h_full[:, 0] = 1.0
        if nb % 2 == 0:
            h_full[:, -1] = 1.0
        h_full[0, 0] = 0.0
        self._hconjf_full = (h_full * np.conj(f_full)).astype(np.complex64)
        fw_c = fw - fw.mean()
        self._ref_norm = float(np.sqrt(np.dot(fw_c.ravel(), fw_c.ravel())))
        f_band = _crop(f_full, br, kcb)
        taper = np.outer(self._taper(np.abs(self._kr) / (br / 2)), self._taper(self._kc / (bc / 2)))
        h = np.full((br, kcb), 2.0)
        h[:, 0] = 1.0
        if kcb == f_full.shape[1] and nb % 2 == 0:
            h[:, -1] = 1.0
        h[0, 0] = 0.0  # the mean carries no shift information
        self._absf2 = (np.abs(f_band) ** 2).astype(np.float32)
        # The frame-independent factor of the weighted spectrum (see _weighted): conj(F) |F| h taper.
        self._q = (np.conj(f_band) * np.abs(f_band) * h * taper).astype(np.complex64)
        self._band_power_ref = float(np.sum(self._absf2))
        self._n_band = self._absf2.size

    @property
    def detector(self) -> tuple[float | None, float | None, float | None]:
        """The detector this estimator models: (dark level DN, gain DN per photon, read noise DN), None or NaN
        where unknown."""
        return self._facts

    def with_reference(self, binned_reference: np.ndarray, *, reference_frames: float,
                       ml_band: tuple[float, float] | None = None, fine_reference: np.ndarray | None = None,
                       fine_edge: int = 0) -> "ShiftEstimator":
        """A copy of this estimator (same binning, band, range and detector) measuring against a new reference.

        Parameters
        ----------
        binned_reference : (M // bin_factor, N // bin_factor) array_like
            The new reference, binned as this estimator bins frames (block sums), in the same coordinates as the
            frames it will measure: shifts are measured against it, so its origin is the shifts' zero.
        reference_frames : float
            How many frames' photons it holds (its noise is a frame's over this number; see the likelihood's
            Wiener filter in :meth:`_ml_setup`).
        ml_band : (float, float), optional
            Where the likelihood's frequencies roll off (fractions of the binned Nyquist frequency, as
            ``_ML_BAND``; ``(inf, inf)`` keeps every frequency), e.g. chosen by the growing reference from how its
            frames follow a rigid shift (:mod:`qcmon.metrics.reference_growth`). None keeps this estimator's.
        fine_reference : (2 M // bin_factor, 2 N // bin_factor) array_like, optional
            The reference on a grid twice as fine (binned px of half the size; sample ``(2y, 2x)`` is binned pixel
            ``(y, x)``), e.g. :func:`qcmon.metrics.fine_reference.fine_reference`, denoised: the likelihood then
            models a frame as this reference moved and sampled at the frame's pixels (:meth:`_ml_setup_fine`), which
            follows a frame aliased by its pixels' area at every fractional shift. Frames with unusable pixels, and
            shifts of ``fine_edge`` binned px or more, keep the model of ``binned_reference``.
        fine_edge : int, optional
            Binned px at each edge where ``fine_reference`` is not the specimen's (at least 2; see
            :mod:`qcmon.metrics.fine_reference`). The estimator's window is zero over twice this margin, for every
            frame, so that no weighted frame pixel meets those parts at a shift the fine model measures.
        """
        refb = np.asarray(binned_reference)
        if refb.shape != self._bshape:
            raise ValueError(f"binned_reference must have the binned shape {self._bshape}, got {refb.shape}")
        refb = finite_float32(refb.astype(np.float32, copy=False), "binned_reference", warn=False)
        if refb is None:
            raise ValueError("binned_reference is constant or has no finite pixel: there is nothing to register to")
        if not (reference_frames > 0):
            raise ValueError(f"reference_frames must be positive, got {reference_frames!r}")
        if ml_band is not None:
            lo, hi = (float(v) for v in ml_band)
            if not (0 < lo <= hi):
                raise ValueError(f"ml_band must be (low, high) with 0 < low <= high, got {ml_band!r}")
        fine = None
        if fine_reference is not None:
            mb, nb = self._bshape
            fine = np.asarray(fine_reference, dtype=np.float64)
            if fine.shape != (2 * mb, 2 * nb):
                raise ValueError(f"fine_reference must have twice the binned shape, {(2 * mb, 2 * nb)}, got "
                                 f"{fine.shape}")
            if not np.all(np.isfinite(fine)):
                raise ValueError("fine_reference has non-finite samples")
            edge = int(fine_edge)
            if not (2 <= edge < min(mb, nb) // 8) or not self.window:
                raise ValueError(f"fine_edge must be 2 to an eighth of the binned {mb} x {nb} frame (and the "
                                 f"estimator windowed), got {fine_edge!r}")
        new = copy.copy(self)
        if ml_band is not None:
            new._ML_BAND = (lo, hi)  # this estimator's own roll-off (the class's is the default)
        new.out_of_range = False
        new._wm_last = None
        new._fine = False
        if fine is not None:
            # the window of every frame leaves out the edges where the fine reference is not the specimen's
            mb, nb = self._bshape
            win = np.zeros((mb, nb), np.float32)
            e2 = 2 * edge
            win[e2:mb - e2, e2:nb - e2] = _tukey2d((mb - 2 * e2, nb - 2 * e2), self._ALPHA)
            new._win = win
        new._set_reference(refb)
        new._ml_setup(refb, *self._facts, reference_frames)
        if fine is not None:
            new._ml_setup_fine(fine, edge)
        return new

    # ------------------------------------------------------------------ maximum likelihood
    def _ml_setup(self, refb: np.ndarray, dark_level, gain, read_noise_dn, reference_frames) -> None:
        """Precompute the Poisson log-likelihood surface's reference factors (see :meth:`_ml_refine`)."""
        mb, nb = self._bshape
        b2 = float(self.bin_factor ** 2)
        dark = float(dark_level) if dark_level is not None and math.isfinite(dark_level) else 0.0
        self._dark_b = b2 * dark
        rb = refb.astype(np.float64) - self._dark_b
        noise = None
        if gain is not None and math.isfinite(gain) and gain > 0 and reference_frames:
            # the reference is the mean of reference_frames frames: its noise power per frequency (unnormalised
            # transform) is the sum of its pixels' variances, gain * counts + read noise^2, over the frames
            rn2 = read_noise_dn ** 2 if read_noise_dn is not None and math.isfinite(read_noise_dn) else 0.0
            noise = (gain * float(np.clip(rb, 0.0, None).sum()) + rb.size * b2 * rn2) / float(reference_frames)
        rd, wiener = _wiener_denoise(rb, self._ml_rolloff(), noise=noise)
        floor = self._ml_floor(rd)
        # a constant added to the model keeps the frame's expected counts and the model equal up to a constant
        # (which the likelihood's window correction absorbs); clipping negative ringing would not
        # The same constant is added to the frame (as read noise is in the model of Huang et al. 2013, Nat. Methods
        # 10:653): then the frame's expected counts and the model agree, and the reference registers to itself at 0.
        self._ml_add = floor + max(0.0, -float(rd.min()))
        lam = rd + self._ml_add
        w = self._win if self._win is not None else np.ones((mb, nb), np.float32)
        h = np.full((mb, nb // 2 + 1), 2.0)
        h[:, 0] = 1.0
        if nb % 2 == 0:
            h[:, -1] = 1.0
        h[0, 0] = 0.0
        # The frame is filtered as the reference was (Wiener, roll-off), so that the frame's expected counts and
        # the model differ by a constant only: registering the reference to itself gives zero.
        lf = sfft.rfft2(np.log(lam))
        wf = sfft.rfft2(w.astype(np.float64))
        lamf = sfft.rfft2(lam)
        hl = h * wiener * np.conj(lf)
        self._ml_conjl = hl.astype(np.complex64)
        # The window's terms (c1 W conj(L) and a W conj(Lam), see _ml_refine) matter only where the window's
        # spectrum does: a small block of the lowest frequencies (|W| above 1e-5 of its peak), added there only.
        big = np.abs(wf) > 1e-5 * abs(wf[0, 0])
        ky = np.abs(_signed_freqs(mb, mb))
        kr = int(ky[big.any(axis=1)].max())
        kc = int(np.nonzero(big.any(axis=0))[0].max()) + 1
        self._ml_blocks = [(slice(0, kr + 1), slice(0, kc))]
        if kr > 0:
            self._ml_blocks.append((slice(mb - kr, mb), slice(0, kc)))
        self._ml_p1 = [(wf * hl)[blk].astype(np.complex64) for blk in self._ml_blocks]
        self._ml_p2 = [(h * wf * np.conj(lamf))[blk].astype(np.complex64) for blk in self._ml_blocks]
        self._ml_hconjlam, self._ml_lam0 = (h * np.conj(lamf)).astype(np.complex64), float(lamf[0, 0].real)
        self._ml_sum_w = float(w.sum(dtype=np.float64))
        self._ml_sum_wlam = float(np.sum(w * lam))
        taper = self._ALPHA / 2 if self._win is not None else 0.0
        self._ml_reach = (max(0.5 * taper * mb, 1.0), max(0.5 * taper * nb, 1.0))  # binned px
        self._ml_uy = (_TWO_PI / mb) * _signed_freqs(mb, mb)
        self._ml_ux = (_TWO_PI / nb) * np.arange(nb // 2 + 1, dtype=np.float64)

    def _ml_floor(self, rd: np.ndarray) -> float:
        """The least expected count (DN above dark, per binned px) of the likelihood's model of reference ``rd``:
        the read noise as extra Poisson counts, at least :attr:`_ML_FLOOR` of its mean."""
        _, gain, read_noise_dn = self._facts
        mean_sig = float(np.mean(np.clip(rd, 0.0, None)))
        floor = 0.0
        if gain is not None and read_noise_dn is not None and math.isfinite(gain) and gain > 0 \
                and math.isfinite(read_noise_dn):
            floor = self.bin_factor ** 2 * read_noise_dn ** 2 / gain  # read noise as extra Poisson counts
        return max(floor, self._ML_FLOOR * mean_sig, 1e-6 * max(abs(mean_sig), 1e-30))

    def _ml_setup_fine(self, fine: np.ndarray, edge: int) -> None:
        """Precompute the model of a frame for a reference on a grid twice as fine (see :meth:`_ml_refine_fine`).

        The frame's pixel ``x`` (binned px) expects the fine reference's value at ``2x - 2d`` at shift ``d``: the
        fine model moved by the shift theorem and read at its even samples.
        """
        mb, nb = self._bshape
        mf, nf = 2 * mb, 2 * nb
        rd = fine - self._dark_b
        v = 2 * edge  # fine px at each edge that are not the specimen's
        inner = (slice(v, mf - v), slice(v, nf - v))
        floor = self._ml_floor(rd[inner])
        add = floor + max(0.0, -float(rd[inner].min()))
        lam = np.maximum(rd + add, floor)
        # The model is moved by the shift theorem, periodic over the fine grid: across its edges it would jump, and
        # the derivative of a jump rings over the whole image. Over the margin (which no weighted frame pixel meets
        # at a shift measured here) the model is drawn smoothly to its mean, so that it wraps around continuously.
        mean = float(lam[inner].mean())
        ty, tx = (np.sin(0.5 * np.pi * np.clip(np.minimum(np.arange(k), k - 1 - np.arange(k)) / v, 0, 1)) ** 2
                  for k in (mf, nf))
        lam = mean + (lam - mean) * (ty[:, None] * tx[None, :])
        self._fine_spec = sfft.rfft2(lam).astype(np.complex64)
        uy = (_TWO_PI / mf) * _signed_freqs(mf, mf)
        ux = (_TWO_PI / nf) * np.arange(nf // 2 + 1, dtype=np.float64)
        # spectral derivatives per binned px of shift (lam(2x - 2d): -2 d/du), the Nyquist terms (no derivative
        # for a real signal) left out
        dy, dx = -2j * uy, -2j * ux
        dy[mf // 2] = 0.0
        dx[-1] = 0.0
        self._fine_dy, self._fine_dx = dy.astype(np.complex64), dx.astype(np.complex64)
        self._fine_uy, self._fine_ux = uy, ux
        self._fine_flip_rows = (-np.arange(mb)) % mb
        self._fine_add = add
        self._fine_reach = edge - 1.0
        self._fine = True

    def _fine_sampled(self, rows: np.ndarray) -> np.ndarray:
        """The image at the frame's pixels (the fine grid's even samples) of a fine half spectrum whose two halves of
        rows are already summed (``rows``, the frame's rows by the fine grid's columns): its columns folded onto
        the frame grid's (each frame frequency is the sum of its two fine ones per axis)."""
        mb, nb = self._bshape
        half = nb // 2
        out = np.empty((mb, half + 1), dtype=np.complex64)
        np.add(rows[:, :half], np.conj(rows[self._fine_flip_rows, nb:half:-1]), out=out[:, :half])
        out[:, half] = rows[:, half]
        out *= np.complex64(0.25)
        return _fft.irfft2(out, self._bshape, self.workers)

    def _ml_rolloff(self) -> np.ndarray:
        """Radial cosine roll-off of the highest binned frequencies (between the fractions ``_ML_BAND`` of the
        Nyquist frequency), over the half spectrum."""
        mb, nb = self._bshape
        fy = np.abs(_signed_freqs(mb, mb)) / (mb / 2)
        fx = np.arange(nb // 2 + 1) / (nb / 2)
        rad = np.hypot(fy[:, None], fx[None, :])
        lo, hi = self._ML_BAND
        if not math.isfinite(lo):
            return np.ones_like(rad)
        return 0.5 * (1 + np.cos(np.pi * np.clip((rad - lo) / max(hi - lo, 1e-9), 0.0, 1.0)))

    def _ml_refine(self, g_full: np.ndarray, mean: float, cy: float, cx: float, vmask: np.ndarray | None = None,
                   gb: np.ndarray | None = None) -> tuple[float, float] | None:
        """Maximise the Poisson log-likelihood of the frame over the shift by Newton's method, from (cy, cx).

        The frame's expected counts are the reference moved by ``d`` and scaled by the frame's brightness ``a``:
        ``lambda(x) = a * lam_ref(x - d)``; the log-likelihood of the apodised frame is, up to terms free of ``d``,
        ``J(d) = sum_x w(x) [g(x) log lam_ref(x - d) - a lam_ref(x - d)]`` — the correlation of the frame (less its
        dark level) with the logarithm of the reference, less a correction for the window. Its value and first
        two derivatives at any subpixel ``d`` are sums over the spectrum (no interpolation); the maximum is found
        to machine precision in 2-4 Newton steps. Returns None if Newton's method does not stay near the start.

        *Unusable pixels.* With ``vmask`` (the frame's binned weights, 0 on clipped pixels, :meth:`_binned_valid`)
        the sum runs over the usable pixels only: ``w`` becomes ``w · vmask``, and where the reference has unusable
        parts (drawn featureless, :func:`_featureless`) also ``· ref_vmask(x - d0)`` at the phase-correlation shift
        ``d0``, so that no frame pixel is held against a reference value that is not the specimen's. The weight is
        fixed on the frame's pixel grid — as a stationary saturated patch is fixed on the detector — while the
        model moves beneath it; the likelihood with any fixed weight has its maximum at the true shift, and the
        window's terms, no longer confined to the lowest frequencies, take the weight's whole spectrum (one more
        FFT). The brightness ``a`` is matched over the same weighted pixels at ``d0``.
        """
        c1 = mean - self._dark_b + self._ml_add
        c1_ = np.complex64(c1)
        if vmask is None and self._ref_vmask is None:
            swg = float(g_full[0, 0].real) + c1 * self._ml_sum_w
            a = swg / self._ml_sum_wlam if self._ml_sum_wlam > 0 else 0.0
            r = g_full * self._ml_conjl
            a_ = np.complex64(a)
            for blk, p1, p2 in zip(self._ml_blocks, self._ml_p1, self._ml_p2):
                r[blk] += c1_ * p1 - a_ * p2
        else:
            r = self._ml_masked(g_full, gb, c1, cy, cx, vmask)
            if r is None:
                return None
        return self._newton(r, self._ml_uy, self._ml_ux, cy, cx, 1.0)

    def _ml_refine_fine(self, g: np.ndarray, cy: float, cx: float) -> tuple[float, float] | None:
        """Maximise the Poisson likelihood of the frame ``g`` (binned, as measured) under the fine model
        (:meth:`_ml_setup_fine`), ``lambda(x) = a * lam_fine(2x - 2d)``, by Fisher scoring from (``cy``, ``cx``).

        Each step computes the model and its two derivatives at the frame's pixels for the current ``d`` (three
        inverse transforms of the frame's size) and solves ``I step = score`` with ``score = sum w (g / lambda - 1)
        grad lambda`` and ``I = sum w grad lambda grad lambda^T / lambda`` (``w`` the window). The score is exactly
        zero for a frame equal to the model, at every shift: no interpolation of the logarithm enters (the
        logarithm of a sharp model aliases, and its interpolated derivative would bias the shift by up to 0.01 px).
        The brightness ``a`` is matched over the window at each step. None if the steps leave 1 binned px of the
        start or the information is singular.
        """
        w = self._win
        gt = g - np.float32(self._dark_b - self._fine_add)
        sw_g = float(np.sum(w * gt, dtype=np.float64))
        y, x = cy, cx
        uy, ux = self._fine_uy, self._fine_ux
        mb = self._bshape[0]
        spec, dyv = self._fine_spec, self._fine_dy
        for _ in range(self._FINE_STEPS):
            # the model moved by d: the spectrum times exp(-i u 2d); the row halves folded before the columns' ramp
            ry = np.exp(-2j * uy * y).astype(np.complex64)
            rx = np.exp(-2j * ux * x).astype(np.complex64)
            top = spec[:mb] * ry[:mb, None]
            bot = spec[mb:] * ry[mb:, None]
            rows = (top + bot) * rx
            rows_y = (top * dyv[:mb, None] + bot * dyv[mb:, None]) * rx
            lam = np.maximum(self._fine_sampled(rows), np.float32(1e-30))
            ly = self._fine_sampled(rows_y)
            lx = self._fine_sampled(rows * self._fine_dx)
            a = sw_g / float(np.sum(w * lam, dtype=np.float64))
            inv = w / lam
            res = inv * gt - np.float32(a) * w
            wl = np.float32(a) * inv
            sy, sx = float(np.vdot(res, ly)), float(np.vdot(res, lx))
            wly, wlx = wl * ly, wl * lx
            iyy, iyx, ixx = float(np.vdot(wly, ly)), float(np.vdot(wly, lx)), float(np.vdot(wlx, lx))
            det = iyy * ixx - iyx * iyx
            if not (iyy > 0 and det > 0):
                return None
            dy = (ixx * sy - iyx * sx) / det
            dx = (iyy * sx - iyx * sy) / det
            y += dy
            x += dx
            if abs(y - cy) > 1.0 or abs(x - cx) > 1.0:
                return None
            if abs(dy) < 1e-4 and abs(dx) < 1e-4:
                break
        return y, x

    def _newton(self, r: np.ndarray, uy: np.ndarray, ux: np.ndarray, cy: float, cx: float,
                reach: float) -> tuple[float, float] | None:
        """Maximise ``J(y, x) = Re sum_k r(k) exp(i (uy_k y + ux_k x))`` (a half spectrum ``r`` over the angular
        frequencies ``uy``, ``ux``) by :attr:`_ML_STEPS` Newton steps from (``cy``, ``cx``); None if the surface is
        not concave there or the steps leave ``reach`` of the start."""
        y, x = cy, cx
        for _ in range(self._ML_STEPS):
            ec = np.exp(1j * ux * x)
            cols = np.stack([ec, ux * ec, ux * ux * ec], axis=1).astype(np.complex64)
            v = r @ cols
            er = np.exp(1j * uy * y)
            s0 = er @ v  # sum over rows of (V0, V1, V2)
            s1 = (er * uy) @ v[:, :2]
            s2 = (er * uy * uy) @ v[:, 0]
            gy, gx = -s1[0].imag, -s0[1].imag
            hyy, hxy, hxx = -s2.real, -s1[1].real, -s0[2].real
            det = hyy * hxx - hxy * hxy
            if not (hyy < 0 and det > 0):
                return None
            dy = -(hxx * gy - hxy * gx) / det
            dx = -(hyy * gx - hxy * gy) / det
            y += dy
            x += dx
            if abs(y - cy) > reach or abs(x - cx) > reach:
                return None
            if abs(dy) < 1e-4 and abs(dx) < 1e-4:
                break
        return y, x

    def _ml_masked(self, g_full: np.ndarray, gb: np.ndarray | None, c1: float, cy: float, cx: float,
                   vmask: np.ndarray | None) -> np.ndarray | None:
        """The likelihood's spectrum ``r`` (see :meth:`_ml_refine`) with the weight ``w · vmask · ref_vmask(x -
        d0)``; ``g_full`` is the transform of ``gb``, the frame less its mean times ``w · vmask``. None if no
        weight is left. The weight's spectral products are kept for the next frame with the same mask (a
        stationary patch) at the same whole-pixel shift."""
        iy, ix = (-int(round(cy)), -int(round(cx))) if self._ref_vmask is not None else (0, 0)
        key = (vmask, (iy, ix), self._ref_vmask, self._ml_conjl, self._ml_hconjlam)
        last = self._wm_last
        if last is not None and all(a is b if not isinstance(a, tuple) else a == b for a, b in zip(last[0], key)):
            extra, p1, p2, sum_wm = last[1]
        else:
            wm = self._win if self._win is not None else np.ones(self._bshape, np.float32)
            if vmask is not None:
                wm = wm * vmask
            extra = None
            if self._ref_vmask is not None:
                # the reference's unusable parts where they fall on the frame at the phase-correlation shift d0:
                # frame pixel x meets reference pixel x - d0
                extra = np.empty_like(self._ref_vmask)
                shift_integer(self._ref_vmask, iy, ix, extra)
                wm = wm * extra
            wmf = _fft.rfft2(np.ascontiguousarray(wm, dtype=np.float32), self.workers)
            sum_wm = float(wmf[0, 0].real)
            p1, p2 = wmf * self._ml_conjl, wmf * self._ml_hconjlam
            self._wm_last = (key, (extra, p1, p2, sum_wm))
        if not sum_wm > 0:
            return None
        if extra is not None:
            # the frame's transform must carry the same weight (its sum over the new weight is carried by c1)
            if gb is None:
                gb = _fft.irfft2(g_full, self._bshape, self.workers)
            g_full = _fft.rfft2(np.ascontiguousarray(gb * extra, dtype=np.float32), self.workers)
        mb, nb = self._bshape
        # sum_x wm(x) lam(x - d0), over the whole spectrum (the mean term apart: h holds 0 there)
        er = np.exp((1j * _TWO_PI / mb) * cy * _signed_freqs(mb, mb)).astype(np.complex64)
        ec = np.exp((1j * _TWO_PI / nb) * cx * np.arange(nb // 2 + 1)).astype(np.complex64)
        swlam = (float((er @ p2 @ ec).real) + sum_wm * self._ml_lam0) / (mb * nb)
        swg = float(g_full[0, 0].real) + c1 * sum_wm
        a = swg / swlam if swlam > 0 else 0.0
        r = g_full * self._ml_conjl
        r += np.complex64(c1) * p1
        r -= np.complex64(a) * p2
        return r

    # ------------------------------------------------------------------ helpers
    def _taper(self, frac: np.ndarray) -> np.ndarray:
        """Cosine roll-off from 1 (inside 1 - _TAPER of the band) to 0 at the band edge."""
        t = self._TAPER
        x = np.clip((frac - (1.0 - t)) / t, 0.0, 1.0)
        return 0.5 * (1.0 + np.cos(np.pi * x))

    def _prepare(self, img: np.ndarray) -> np.ndarray:
        out = img - np.float32(img.mean())
        if self._win is not None:
            out *= self._win
        return out

    def _refinement_stages(self) -> list[tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]]:
        """Grids of the DFT refinement: each stage 5x finer than the last, over +-1 step of the last.

        Returns, per stage, the row and column offsets (binned px) and the DFT matrices for a grid centred on 0;
        :meth:`estimate` moves them to the current peak with one phase ramp per axis.
        """
        mb, nb = self._bshape
        fin = self._final_step

        def schedule(step: float) -> list[tuple[int, float]]:
            out = []
            while step > fin * (1 + 1e-9):
                if step / fin > 8:  # else one last stage straight to the final step (up to 17 points)
                    out.append((5, step / 5))
                    step /= 5
                else:
                    out.append((math.ceil(step / fin - 1e-9), fin))
                    step = fin
            return out

        rows, cols = schedule(self._coarse_step[0]), schedule(self._coarse_step[1])
        stages = []
        for k in range(max(len(rows), len(cols))):
            ny, sy = rows[k] if k < len(rows) else (0, fin)
            nx, sx = cols[k] if k < len(cols) else (0, fin)
            offs_y = np.arange(-ny, ny + 1) * sy
            offs_x = np.arange(-nx, nx + 1) * sx
            er = np.exp((1j * _TWO_PI / mb) * np.outer(offs_y, self._kr)).astype(np.complex64)
            ec = np.exp((1j * _TWO_PI / nb) * np.outer(self._kc, offs_x)).astype(np.complex64)
            stages.append((offs_y, offs_x, er, ec))
        return stages

    def _weighted(self, g_band: np.ndarray, g_full: np.ndarray) -> np.ndarray:
        """The weighted cross-power spectrum ``R = C / |C| * S / (S + 1) * h * taper`` of the class notes.

        With ``C = G conj(F)`` and ``S = |F|^2 / (a sigma^2)`` this is ``G conj(F) |F| h taper / (|G| (|F|^2 +
        a sigma^2))``: the numerator's reference part is precomputed, so a frame costs a few passes over the band.
        """
        absg = np.abs(g_band)
        # Frame noise power per frequency from the highest frequencies (no signal there).
        noise = g_full[self._noise_rows, self._noise_c0:]
        sigma2 = float(np.vdot(noise, noise).real) / noise.size
        # Reference-to-frame signal power ratio over the band (frame power less its noise).
        total = float(np.vdot(absg, absg))
        frame_power = max(total - self._n_band * sigma2, 0.01 * total, 1e-30)
        a = self._band_power_ref / frame_power
        den = self._absf2 + np.float32(max(a * sigma2, 1e-30))
        den *= absg
        np.maximum(den, np.float32(1e-30), out=den)
        r = g_band * self._q
        r /= den
        return r

    # ------------------------------------------------------------------ public
    def estimate(self, frame, *, valid: np.ndarray | None = None) -> ShiftResult:
        """Shift of ``frame``'s content relative to the reference.

        Parameters
        ----------
        frame : (M, N) array_like
            Image of the reference's shape, any real integer or floating dtype. Non-finite pixels are replaced by
            the mean of the finite ones.
        valid : (M, N) bool ndarray, optional
            True where a pixel is usable; False (e.g. saturated or clipped at the detector's floor) carries no
            weight: every binned pixel that holds one is left out of the coarse search and of the likelihood.
            None: every pixel is usable.

        Returns
        -------
        ShiftResult
            ``(dy_px, dx_px, corr)`` in original pixels; all NaN (with a UserWarning) when the frame is constant
            (its apodised variance below 1e-12 of its squared mean) or has no finite pixel.
        """
        self.out_of_range = False
        arr = as_image(frame, "frame", shape=self.shape, min_size=16)
        gb = bin_image(arr, self.bin_factor)
        if np.issubdtype(arr.dtype, np.floating) and not np.isfinite(gb).all():
            gb = finite_float32(gb, "frame", stacklevel=3)
            if gb is None:
                return _NAN_RESULT
        return self._estimate_binned(gb, stacklevel=3, vmask=self._binned_valid(valid))

    def _binned_valid(self, valid, counts: np.ndarray | None = None) -> np.ndarray | None:
        """Weights of the binned pixels from a full-resolution ``valid`` mask (float32, binned shape); None when
        every pixel is valid. ``counts``, if given, is ``bin_image(valid.view(np.uint8), bin_factor)`` made by the
        caller (then it is not binned again). The weights of the last mask are kept (read-only) and handed out
        again for an equal one: a saturated patch fixed on the detector gives the same mask frame after frame.

        A binned pixel with any unusable pixel in it gets weight 0; the weight of the usable ones next to them
        rises over one binned pixel (``w0 · box3(w0)²``, ``w0`` the 0/1 weights, ``box3`` the 3 × 3 mean), so that
        the edge of an unusable region — a stationary saturated patch — is soft and carries no shift of its own
        (a hard edge correlates with itself and pulls the shift toward zero).
        """
        if valid is None:
            return None
        v = np.asarray(valid)
        if v.shape != self.shape or v.dtype != np.bool_:
            raise ValueError(f"valid must be a boolean mask of shape {self.shape}, got {v.dtype} {v.shape}")
        b = self.bin_factor
        if counts is None:
            if v.all():
                return None
            counts = bin_image(v.view(np.uint8), b) if b > 1 else v.astype(np.float32)
        elif counts.shape != self._bshape or counts.dtype != np.float32:
            raise ValueError(f"valid_counts must be a float32 image of shape {self._bshape}, got {counts.dtype} "
                             f"{counts.shape}")
        last = self._vmask_last
        if last is not None and np.array_equal(counts, last[0]):
            return last[1]
        w0 = (counts >= b * b - 0.5).astype(np.float32)
        if w0.all():
            return None
        pad = np.pad(w0, 1, mode="edge")
        rows = pad[:-2] + pad[1:-1]  # the 3 x 3 box sum, separably
        rows += pad[2:]
        box = rows[:, :-2] + rows[:, 1:-1]
        box += rows[:, 2:]
        box *= np.float32(1.0 / 9.0)
        w = w0 * box * box
        w.setflags(write=False)
        self._vmask_last = (counts.copy(), w)
        return w

    def estimate_binned(self, binned: np.ndarray, *, mean: float | None = None,
                        valid: np.ndarray | None = None, valid_counts: np.ndarray | None = None) -> ShiftResult:
        """:meth:`estimate` of a frame already binned by :attr:`bin_factor`, for callers that need the binned frame
        themselves (the engine takes the frame's exact mean from it).

        Parameters
        ----------
        binned : (M // bin_factor, N // bin_factor) float32 ndarray
            ``bin_image(frame, bin_factor)`` of a finite frame (not modified).
        mean : float, optional
            Mean of ``binned``, if the caller has computed it already.
        valid : (M, N) bool ndarray, optional
            Full-resolution mask of usable pixels, as for :meth:`estimate`.
        valid_counts : (M // bin_factor, N // bin_factor) float32 ndarray, optional
            ``bin_image(valid.view(np.uint8), bin_factor)``, if the caller has binned the mask already (with
            ``valid``; spares binning it twice).
        """
        self.out_of_range = False
        if binned.shape != self._bshape or binned.dtype != np.float32:
            raise ValueError(f"binned must be a float32 image of shape {self._bshape}, got {binned.dtype} "
                             f"{binned.shape}")
        return self._estimate_binned(binned, stacklevel=3, mean=mean,
                                     vmask=self._binned_valid(valid, valid_counts if valid is not None else None))

    def _estimate_binned(self, gb: np.ndarray, *, stacklevel: int, mean: float | None = None,
                         vmask: np.ndarray | None = None) -> ShiftResult:
        self.out_of_range = False
        if vmask is not None:
            n_valid = float(vmask.sum())
            if n_valid < 0.05 * vmask.size:
                warnings.warn("fewer than 5 % of the frame's pixels are usable; shift is NaN", UserWarning,
                              stacklevel=stacklevel)
                return _NAN_RESULT
            mean = float(np.dot(gb.ravel(), vmask.ravel())) / n_valid  # mean of the usable bins
        elif mean is None:
            mean = float(np.add.reduce(gb, axis=None)) / gb.size  # float32 pairwise summation: rel. error ~1e-7
        g_in = gb  # as measured, for the fine model's refinement
        gb = np.subtract(gb, np.float32(mean))  # a new array: the caller's binned frame is not modified
        if self._win is not None:
            gb *= self._win
        if vmask is not None:
            gb *= vmask
        gw = gb.ravel()
        g_full = _fft.rfft2(gb, self.workers)
        gsum = float(g_full[0, 0].real)  # the sum of the apodised frame
        gnorm2 = float(np.dot(gw, gw)) - gsum * gsum / gw.size
        if not gnorm2 > gw.size * (1e-6 * abs(mean)) ** 2 or not math.isfinite(gnorm2):
            warnings.warn("frame is constant; shift is NaN", UserWarning, stacklevel=stacklevel)
            return _NAN_RESULT
        g_band = _crop(g_full, self._band[0], self._kcb)
        r = self._weighted(g_band, g_full)
        if self._coarse_taper is None:
            surf = _fft.irfft2(r, self._band, self.workers)
        else:
            rc = _crop(r, self._coarse[0], self._kcc) * self._coarse_taper
            surf = _fft.irfft2(rc, self._coarse, self.workers)
        if self._coarse_mask is not None:
            top = int(surf.argmax())
            if not np.isfinite(self._coarse_mask.flat[top]):
                inside = float((surf + self._coarse_mask).max())
                outside = float(surf.flat[top])
                if outside > 2.0 * inside and outside - inside > self._OUT_OF_RANGE * float(surf.std()):
                    # the correlation peaks clearly beyond the searched range: a shift there is not measured, and
                    # the best peak inside the range would be a side lobe (or a wrapped-around one)
                    self.out_of_range = True
                    return _NAN_RESULT
            surf += self._coarse_mask
        i, j = divmod(int(surf.argmax()), surf.shape[1])
        cy, cx = float(self._coarse_r[i]), float(self._coarse_c[j])
        ramp_r, ramp_c = self._ramp_r[i], self._ramp_c[j]
        # The likelihood refinement holds the circularly moved reference against the apodised frame: beyond half
        # the window's taper, content wrapped around the reference's edges gets weight and would bias it, so
        # larger shifts keep the phase-correlation estimate. Newton's method needs no grid finer than the
        # second-last stage's (steps of 1/3 binned px at 512 px), so the last stage runs only if it is not used.
        # Frames with unusable (clipped) pixels, and frames meeting the reference's unusable parts, are refined with
        # the likelihood over their usable pixels (see _ml_refine).
        use_ml = (self._ML_STEPS > 0 and abs(cy) <= self._ml_reach[0] + self._coarse_step[0]
                  and abs(cx) <= self._ml_reach[1] + self._coarse_step[1])
        stages = self._stages[:-1] if use_ml and len(self._stages) > 1 else self._stages
        for offs_y, offs_x, er0, ec0 in stages:
            # grid matrices moved to the current peak; the row of the chosen point is the next stage's ramp
            er = er0 * ramp_r
            ec = ec0 * ramp_c[:, None]
            vals = er @ (r @ ec)  # (r @ ec) first: the cheaper order for these shapes
            a, b = divmod(int(vals.real.argmax()), vals.shape[1])
            cy += float(offs_y[a])
            cx += float(offs_x[b])
            ramp_r, ramp_c = er[a], ec[:, b]
        ml = None
        if use_ml and abs(cy) <= self._ml_reach[0] and abs(cx) <= self._ml_reach[1]:
            ml = self._ml_refine(g_full, mean, cy, cx, vmask, gb)
            if ml is not None and self._fine and vmask is None and self._ref_vmask is None \
                    and max(abs(ml[0]), abs(ml[1])) <= self._fine_reach:
                ml = self._ml_refine_fine(g_in, *ml) or ml
        if ml is not None:
            cy, cx = ml
        elif len(stages) < len(self._stages):  # no refinement after all: the last grid stage
            offs_y, offs_x, er0, ec0 = self._stages[-1]
            er = er0 * ramp_r
            ec = ec0 * ramp_c[:, None]
            vals = er @ (r @ ec)
            a, b = divmod(int(vals.real.argmax()), vals.shape[1])
            cy += float(offs_y[a])
            cx += float(offs_x[b])
        lim_r, lim_c = self._lim
        if abs(cy) > lim_r or abs(cx) > lim_c:
            self.out_of_range = True
            return _NAN_RESULT
        corr = self._pearson(g_full, gnorm2, cy, cx)
        b = self.bin_factor
        return ShiftResult(float(cy * b), float(cx * b), corr)

    def _pearson(self, g_full: np.ndarray, gnorm2: float, sy: float, sx: float) -> float:
        mb, nb = self._bshape
        er = np.exp((1j * _TWO_PI / mb) * sy * self._kr_full).astype(np.complex64)
        ec = np.exp((1j * _TWO_PI / nb) * sx * self._kc_full).astype(np.complex64)
        g_full *= self._hconjf_full  # g_full is not used after this
        cross = float((er @ g_full @ ec).real) / (mb * nb)
        return cross / (math.sqrt(gnorm2) * self._ref_norm)


def _featureless(ref: np.ndarray, valid: np.ndarray, bin_factor: int) -> np.ndarray:
    """``ref`` drawn to the mean of its usable pixels where ``valid`` is False (and 1 px around), over a soft edge
    as wide as a registration bin, so that a frame whose unusable pixels get zero weight meets a reference with
    the same featureless hole rather than a bright blob or a hard edge (either pulls the shift toward zero)."""
    from scipy import ndimage

    good = ~ndimage.binary_dilation(~valid)
    if not good.any():
        good = valid
    weight = ndimage.uniform_filter(good.astype(np.float32), size=2 * bin_factor + 1) * good
    weight *= weight
    m = np.float32(ref[good].mean())
    return (m + (ref.astype(np.float32) - m) * weight).astype(np.float32)


def build_reference(frames, *, iterations: int = 3, upsample: int = 10, trim: float = 0.1,
                    bin_factor: int | None = None) -> np.ndarray:
    """Motion-corrected reference image from the first frames of a session.

    Starts from the plain mean of ``frames``; then, ``iterations`` times, measures each frame's shift against
    the current reference (:class:`ShiftEstimator`), moves every frame back and averages. The earlier passes
    only give the next one a better reference to measure shifts against: they move frames by whole pixels and take
    the plain mean. The last pass moves every frame by its subpixel shift with the Fourier shift theorem (on the
    frame mirrored at its edges, so that content does not wrap around) and takes a trimmed mean. The shifts are
    re-centred on their median, so the reference sits at the median position of the frames, not at whichever
    frame came first.

    Parameters
    ----------
    frames : (T, M, N) array_like or sequence of (M, N) arrays
        Typically 20-60 frames; T >= 2.
    iterations : int, optional
        Align-and-average passes (>= 1).
    upsample : int, optional
        Subpixel precision of the alignment, 1/``upsample`` px.
    trim : float, optional
        Fraction cut from each end at every pixel by the trimmed mean (0 gives the mean; 0 <= trim < 0.5). The
        trimmed mean keeps a transiently active cell or a frame with a motion artefact from marking the reference.
    bin_factor : int, optional
        Passed to :class:`ShiftEstimator`.

    Returns
    -------
    (M, N) ndarray of float32
        The reference.
    """
    if isinstance(frames, np.ndarray):
        stack = frames
    else:
        stack = np.stack([np.asarray(f) for f in frames]) if len(frames) else np.empty((0,))
    if stack.ndim != 3 or stack.shape[0] < 2:
        raise ValueError(f"frames must be at least 2 images of the same (M, N) shape, got shape {stack.shape}")
    as_image(stack[0], "frames[0]", min_size=16)
    if isinstance(iterations, bool) or not isinstance(iterations, (int, np.integer)) or iterations < 1:
        raise ValueError(f"iterations must be a positive integer, got {iterations!r}")
    if not 0.0 <= trim < 0.5:
        raise ValueError(f"trim must be in [0, 0.5), got {trim!r}")
    data = stack.astype(np.float32)
    finite = np.isfinite(data)
    if not finite.all():
        if not finite.any():
            raise ValueError("frames have no finite pixel")
        data = np.where(finite, data, np.float32(np.nanmean(data)))
    ref = data.mean(axis=0)
    aligned = np.empty_like(data)
    for it in range(int(iterations)):
        est = ShiftEstimator(ref, upsample=upsample, bin_factor=bin_factor)
        last = it == int(iterations) - 1
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # a constant frame just stays where it is
            shifts = np.array([est.estimate(f)[:2] for f in data], dtype=np.float64)
        shifts = np.where(np.isfinite(shifts), shifts, np.nanmedian(shifts, axis=0))
        shifts -= np.median(shifts, axis=0)
        shifts = np.round(shifts * upsample) / upsample  # the alignment's stated precision, 1/upsample px
        if last:
            _fourier_unshift(data, shifts, aligned)
        else:
            for t in range(data.shape[0]):
                shift_integer(data[t], int(round(shifts[t, 0])), int(round(shifts[t, 1])), aligned[t])
        if trim > 0 and last:
            # trimmed mean, cutting int(trim * T) frames at each end as scipy.stats.trim_mean does (tested against
            # it); a sort along the frames is faster here, and spares loading scipy.stats at start-up
            cut = int(trim * aligned.shape[0])
            ref = np.sort(aligned, axis=0)[cut:aligned.shape[0] - cut].mean(axis=0)
        else:
            ref = aligned.mean(axis=0)
    return np.ascontiguousarray(ref, dtype=np.float32)


def _wiener_denoise(image: np.ndarray, band: np.ndarray | None = None, *,
                    noise: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """``image`` with its white noise removed by a Wiener filter estimated from the image itself, and the filter
    (over the half spectrum of ``scipy.fft.rfft2``).

    The noise power per frequency is ``noise`` if given (white noise: the sum of the pixels' variances), else the
    mean of ``|F|^2`` over the outer quarter of frequencies along both axes (where a microscope image holds little
    signal); the signal power is ``|F|^2`` smoothed over 5 x 5
    neighbouring frequencies, less the noise; the filter is ``S / (S + N)`` (Wiener 1949).
    """
    from scipy import ndimage

    m, n = image.shape
    mu = float(image.mean())
    spec = sfft.rfft2(image - mu)
    p = np.abs(spec) ** 2
    r0 = math.ceil(0.375 * m)
    c0 = min(math.ceil(0.375 * n), p.shape[1] - 1)
    if noise is None:
        noise = float(np.mean(p[r0:max(r0 + 1, m - r0 + 1), c0:]))
    smooth = ndimage.uniform_filter(p, 5, mode=("wrap", "nearest"))
    sig = np.clip(smooth - noise, 0.0, None)
    filt = sig / np.maximum(sig + noise, 1e-300)
    # the columns that hold both k and -k (0, and n/2 for even n) must weigh them alike, as irfft2 assumes
    mirror = (-np.arange(m)) % m
    for col in ((0, n // 2) if n % 2 == 0 else (0,)):
        filt[:, col] = 0.5 * (filt[:, col] + filt[mirror, col])
    if band is not None:  # a band limit of the caller's, applied with the filter
        filt *= band
    return sfft.irfft2(spec * filt, s=(m, n)) + mu, filt


def _fourier_unshift(data: np.ndarray, shifts: np.ndarray, out: np.ndarray) -> None:
    """``out[t]`` = ``data[t]`` with its content moved back by ``shifts[t]`` (rows, columns; subpixel).

    Fourier shift theorem (band-limited interpolation) on each frame mirrored at its edges (``numpy.pad``,
    ``symmetric``) by a margin larger than the largest shift, so that no content wraps around; a few times
    faster than a cubic spline (``scipy.ndimage.shift``) at 512 x 512 px.
    """
    _, m, n = data.shape
    margin = max(16, math.ceil(float(np.max(np.abs(shifts)))) + 8)
    pm = sfft.next_fast_len(m + 2 * margin, real=True)
    pn = sfft.next_fast_len(n + 2 * margin, real=True)
    top, left = (pm - m) // 2, (pn - n) // 2
    pad = ((top, pm - m - top), (left, pn - n - left))
    ky = sfft.fftfreq(pm)
    kx = sfft.rfftfreq(pn)
    for t in range(data.shape[0]):
        spec = sfft.rfft2(np.pad(data[t], pad, mode="symmetric"))
        # content moved by +d is moved back by -d: multiply by exp(+2 pi i k d)
        spec *= np.exp((2j * np.pi * shifts[t, 0]) * ky).astype(np.complex64)[:, None]
        spec *= np.exp((2j * np.pi * shifts[t, 1]) * kx).astype(np.complex64)[None, :]
        out[t] = sfft.irfft2(spec, s=(pm, pn))[top:top + m, left:left + n]
