"""A registration reference that improves with the session without moving its zero.

Public API: :class:`ReferenceGrowth`, :data:`REFERENCE_UPDATES`.

The reference a session starts with is the (aligned, trimmed) mean of its first frames: at calcium-imaging photon
counts it holds a few tens of frames' photons, and its noise, not the frame's, limits how well a shift can be
measured. :class:`ReferenceGrowth` accumulates every frame that is fit to join, moved back by its measured
displacement, into the reference's own coordinates, and at fixed points of the session hands the shift estimator a
reference made from all of them.

Method
------
*Accumulation.* The engine registers frames binned (block sums); the accumulated reference is binned alike. A
frame measured at ``s`` (binned px) is added moved back by the whole-pixel part ``n = round(s)`` (edge pixels
repeated, :func:`~qcmon.metrics._imageops.add_shifted`: one pass over the binned frame) into one of
``PHASES`` × ``PHASES`` sums chosen by its fractional part ``f = s - n`` (bins of 1/``PHASES`` binned px); each
sum also keeps the sum of its frames' exact ``f``. At an update each sum's mean is moved back by its frames' mean
fractional shift with the Fourier shift theorem (band-limited interpolation on the image mirrored at its edges) and
the means are averaged, weighted by their frame counts. What remains of the fractional shifts is their spread
within a bin (at most ±1/(2 ``PHASES``) binned px about the bin's mean): a symmetric blur whose transfer at the
binned Nyquist frequency is above 0.97 for ``PHASES`` = 4, and no shift of the mean position.

*The zero.* Shifts measured against a reference are relative to wherever that reference sits, so a reference
built from frames placed by their own measured shifts inherits the mean error of those shifts, and the next
reference the mean error of the shifts measured against this one: the zero would wander as a random walk (or
drift, if the errors lean one way). Every new reference is therefore measured against the *initial* reference —
the one the experimenter saw at the start — by the initial estimator, and moved back by that shift before use: its
shift relative to the initial reference is zero by construction, to the precision with which a nearly noise-free
image is registered to the initial reference (a constant for the session, below its initial reference's noise).

*Denoising.* The new reference holds ``N`` frames' photons; the estimator's likelihood model Wiener-filters it
with the noise power of ``N`` frames from the detector's gain and read noise (``reference_frames``, see
:meth:`ShiftEstimator._ml_setup <qcmon.metrics.registration.ShiftEstimator>`), so the model follows the photon
count it has.

*Cadence.* Updates happen when the number of frames measured since the reference was built reaches one of
``updates`` (default :data:`REFERENCE_UPDATES`: 60, 120, … 1920 — each doubles the photons, so the reference's
noise halves in steps, and after 1920 frames, about a minute at 30 Hz, it no longer changes). An update costs a
few estimator set-ups (about 10-30 ms at 512²); between updates a frame costs one binned addition. Fixed points
keep the numbers reproducible: the same frames in the same order give the same references at the same frames,
live or offline, and a split run hands its workers the engine only once the reference is final
(:mod:`qcmon.monitor.split`).

Frames that are not fit to join are left out (the engine decides most of it): frames without structure, with
clipped pixels, without a finite shift or beyond the searched range, and here frames whose correlation with the
reference is below half the mean of the frames that joined (a failed registration, a frame from another field).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft as sfft

from qcmon.metrics._imageops import add_shifted
from qcmon.metrics.fine_reference import fine_noise, fine_reference
from qcmon.metrics.registration import ShiftEstimator

__all__ = ["ReferenceGrowth", "REFERENCE_UPDATES"]

#: Frames measured since the reference was built at which the estimator gets the accumulated reference.
REFERENCE_UPDATES: tuple[int, ...] = (60, 120, 240, 480, 960, 1920)

#: The likelihood's roll-offs (``ShiftEstimator._ML_BAND``, fractions of the binned Nyquist frequency) an update
#: chooses from; the first is the estimator's default.
ML_BANDS: tuple[tuple[float, float], ...] = ((0.5, 1.0), (0.9, 1.4), (math.inf, math.inf))
#: The roll-off of the yardstick the choice measures bias against (low frequencies move alike in every model of
#: motion: its bias stayed within 0.8x the bound on four, see ``bench/bench_shift_models.py``)
YARDSTICK_BAND = (0.25, 0.5)
#: The choice's other candidate: the likelihood with a reference on a grid twice as fine, reconstructed from the
#: frames at their many fractional shifts (:mod:`qcmon.metrics.fine_reference`), for frames aliased by their pixels
FINE = "fine grid"
#: Whether the choice considers :data:`FINE`
FINE_CANDIDATE = True
#: Fewest joined frames for a choice to consider :data:`FINE` (its reference holds four unknowns per frequency, and
#: its cross-fitted test halves the frames again: with 60 frames at 1.5 photons/px it was chosen and the first
#: seconds' error rose from 2.0 to 2.5x the bound on the pixel-area harness)
FINE_FROM = 240
#: :data:`FINE` is chosen only when its measured error (mean square) is below this fraction of the best roll-off's:
#: it costs more per frame (README, performance)
FINE_GAIN = 0.95
#: Fewest joined frames for an update to choose the roll-off (fewer: the estimator's stays)
CHOOSE_FROM = 60
#: The roll-off is chosen twice: at the first update with CHOOSE_FROM joined frames, and again (with more frames to
#: tell bias from noise) at the first update at or after this many frames measured; the other updates keep the
#: last choice (a choice costs about 0.25 s at 512²)
CHOOSE_AGAIN = 480


class ReferenceGrowth:
    """Accumulates registered frames into the reference's coordinates and makes improved shift estimators.

    Parameters
    ----------
    initial : ShiftEstimator
        The estimator of the reference the session (or the experimenter's new reference) started with: it defines
        the zero of every later reference.
    initial_frames : int
        How many frames the initial reference is made of; an update with fewer joined frames than twice this
        number would not improve it and is skipped.
    updates : sequence of int, optional
        Counts of frames measured (every call of :meth:`tick`) at which a new reference is made. After the last
        one the accumulation stops and its memory is freed (:attr:`settled`).

    Attributes
    ----------
    frames : int
        Frames the current estimator's reference is made of (the initial reference's count until the first
        update).
    joined : int
        Frames accumulated so far.
    notes : list of str
        Updates that were skipped, and why.
    """

    PHASES = 4  # fractional-shift bins per axis
    MIN_CORR_FRACTION = 0.5  # a frame joins when its correlation is at least this fraction of the joined frames' mean

    def __init__(self, initial: ShiftEstimator, *, initial_frames: int, updates=REFERENCE_UPDATES):
        points = sorted({int(u) for u in updates})
        if any(u < 1 for u in points):
            raise ValueError(f"updates must be positive frame counts, got {tuple(updates)!r}")
        if initial_frames < 1:
            raise ValueError(f"initial_frames must be at least 1, got {initial_frames!r}")
        self.initial = initial
        self.estimator = initial
        self.initial_frames = int(initial_frames)
        self.frames = int(initial_frames)
        self._updates = points
        self._next = 0  # index of the next update point
        self.seen = 0
        self.joined = 0
        self._corr_sum = 0.0
        p = self.PHASES
        # two sums per bin (alternate frames), so that their difference measures the noise (model_agreement)
        self._sums: list[np.ndarray | None] = [None] * (2 * p * p)
        self._count = np.zeros(2 * p * p, dtype=np.int64)
        self._frac = np.zeros((2 * p * p, 2), dtype=np.float64)
        self.notes: list[str] = []
        #: the roll-off each update chose, with the measured mean square error of every candidate (px²):
        #: ``(frames seen, chosen band, {band: mse})``
        self.choices: list[tuple[int, tuple[float, float], dict]] = []
        self.band: tuple[float, float] | None = None  # the roll-off last chosen (None: the initial estimator's)
        #: whether the last choice was the model on the fine grid (:data:`FINE`); ``band`` is then the roll-off of its
        #: model on the frames' grid (frames with clipped pixels, large shifts)
        self.fine = False
        self._whole = 0  # the largest whole-pixel shift (binned px) of a joined frame
        self._offset = (0.0, 0.0)  # the accumulated reference's shift to the initial one at the last update

    @property
    def settled(self) -> bool:
        """True once the last update point has passed: the reference no longer changes."""
        return self._next >= len(self._updates)

    def offer(self, binned: np.ndarray, dy_px: float, dx_px: float, corr: float) -> bool:
        """Accumulate a frame measured at (``dy_px``, ``dx_px``) original px with correlation ``corr``, if it is fit
        to join. ``binned`` is the frame binned as the estimator bins it (float32, finite). Returns whether it
        joined."""
        if self.settled or not (math.isfinite(dy_px) and math.isfinite(dx_px) and math.isfinite(corr)) \
                or corr <= 0:
            return False
        if self.joined >= 10 and corr < self.MIN_CORR_FRACTION * self._corr_sum / self.joined:
            return False
        b = self.initial.bin_factor
        sy, sx = dy_px / b, dx_px / b
        ny, nx = round(sy), round(sx)
        fy, fx = sy - ny, sx - nx
        p = self.PHASES
        k = min(int((fy + 0.5) * p), p - 1) * p + min(int((fx + 0.5) * p), p - 1)
        k = 2 * k + int(self._count[2 * k] > self._count[2 * k + 1])  # alternate frames go to the two halves
        acc = self._sums[k]
        if acc is None:
            acc = self._sums[k] = np.zeros(binned.shape, dtype=np.float32)
        add_shifted(binned, ny, nx, acc)  # acc(x) += frame(x + n): the frame moved back by its whole pixels
        self._whole = max(self._whole, abs(ny), abs(nx))
        self._count[k] += 1
        self._frac[k, 0] += fy
        self._frac[k, 1] += fx
        self.joined += 1
        self._corr_sum += corr
        return True

    def tick(self) -> ShiftEstimator | None:
        """Count one measured frame; at an update point return the estimator of the new reference (None otherwise,
        or when the update is skipped; see :attr:`notes`)."""
        self.seen += 1
        if self.settled or self.seen < self._updates[self._next]:
            return None
        self._next += 1
        new = None
        if self.joined < 2 * self.initial_frames:
            self.notes.append(f"reference not renewed at frame {self.seen} of it: only {self.joined} frames were "
                              f"fit to join")
        else:
            new = self._rebuild()
        if self.settled:
            self._sums = [None] * len(self._sums)  # the accumulation is over: free its memory
        if new is not None:
            self.estimator = new
        return new

    def reference(self) -> np.ndarray | None:
        """The accumulated reference (binned, float32) in the initial reference's coordinates before its zero is
        checked, or None when nothing joined."""
        groups = self._groups()
        return None if groups is None else groups[0]

    def _groups(self) -> tuple[np.ndarray, list] | None:
        """The accumulated reference, and per phase bin the means of its two halves, each moved back by its frames'
        mean fractional shift, with their frame counts (``((mean_a, n_a), (mean_b, n_b))``, a mean None where a
        half is empty); None when nothing joined."""
        used = [k for k in range(len(self._sums)) if self._count[k] > 0 and self._sums[k] is not None]
        if not used:
            return None
        counts = self._count[used]
        frac = self._frac[used] / counts[:, None]
        means = _moved_back_each([self._sums[k] / np.float32(c) for k, c in zip(used, counts)], frac)
        # the mean of every frame
        ref = np.sum([m * np.float32(c) for m, c in zip(means, counts)], axis=0) / np.float32(counts.sum())
        by_sum = {k: (m, int(c)) for k, m, c in zip(used, means, counts)}
        halves = [(by_sum.get(2 * b, (None, 0)), by_sum.get(2 * b + 1, (None, 0)))
                  for b in range(len(self._sums) // 2)]
        return ref.astype(np.float32, copy=False), halves

    def _choice_due(self) -> bool:
        """Whether this update chooses the likelihood's model (see :meth:`_choose_band`)."""
        due = not self.choices or (len(self.choices) == 1 and self.seen >= CHOOSE_AGAIN)
        return self.joined >= CHOOSE_FROM and due

    def _choose_band(self, ref: np.ndarray, halves: list, fine: tuple[np.ndarray, int] | None = None
                     ) -> tuple[float, float] | None:
        """The likelihood roll-off (of :data:`ML_BANDS`) with the smallest measured error, at the first update with
        :data:`CHOOSE_FROM` joined frames and the first at or after :data:`CHOOSE_AGAIN` frames measured; otherwise
        (and with fewer than four phase bins holding two halves) the last choice (None before any: the initial
        estimator's).

        How much of a frame's spectrum moves as a rigid shift depends on the specimen and the optics (a scene finer
        than the pixels aliases differently at every fractional shift) and cannot be known beforehand: keeping
        every frequency is the maximum-likelihood estimator when frames do follow a rigid shift, and biased by the
        fractional shift when they do not; rolling off the highest frequencies trades that bias for variance. Each
        candidate estimator (the new reference, one roll-off each) measures the means of the two halves of every
        phase bin (frames at about the same fractional shift, alternate frames in each half). Its bias is the
        difference to the yardstick (:data:`YARDSTICK_BAND`, which keeps only low frequencies — where every model of
        motion agrees — and has little bias and much variance) on the same means, where the sums' alignment error
        cancels; the difference's noise, measured by the two halves, is taken off. Its variance is measured on
        frames drawn from the new reference under the detector's model (:meth:`_trial_frames`): the variance of
        the groups' means would favour the estimator that aligned them. The choice minimises bias² + variance.
        """
        pairs = [(a, b) for a, b in halves if a[0] is not None and b[0] is not None]
        if not self._choice_due() or len(pairs) < 4:
            return self.band
        na = np.array([a[1] for a, _ in pairs], dtype=np.float64)
        nb = np.array([b[1] for _, b in pairs], dtype=np.float64)

        def measured(band) -> np.ndarray | None:
            """Shifts (px) of every pair's two half means, by the estimator of ``band``; None if any is not finite."""
            try:
                est = self.initial.with_reference(ref, reference_frames=self.joined, ml_band=band)
            except ValueError:
                return None
            with np.errstate(all="ignore"):
                out = np.array([[est.estimate_binned(m)[:2] for m in (a[0], b[0])] for a, b in pairs])
            return out if np.all(np.isfinite(out)) else None

        yard = measured(YARDSTICK_BAND)
        trials = self._trial_frames(ref)
        if yard is None or trials is None:
            return self.band
        frames, truth, drawn_ref = trials
        scores = {}
        full_noise = None
        for band in ML_BANDS:
            x = measured(band)
            if x is None:
                continue
            try:
                est = self.initial.with_reference(drawn_ref, reference_frames=self.joined, ml_band=band)
            except ValueError:
                continue
            with np.errstate(all="ignore"):
                got = np.array([est.estimate_binned(f)[:2] for f in frames])
            err = got - truth
            if not np.all(np.isfinite(err)):
                continue
            noise_var, bias2 = _mean_square(x - yard, na, nb)
            var = float(np.mean((err - err.mean(axis=0)) ** 2))
            scores[band] = max(bias2, 0.0) + var
            if fine is not None and not math.isfinite(band[0]):
                full_noise = noise_var  # one frame's variance of a difference to the yardstick (every frequency)
        if not scores:
            return self.band
        band_best = min(scores, key=scores.get)
        if fine is not None and full_noise is not None:
            score = self._fine_score(ref, fine, band_best, full_noise)
            if score is not None:
                scores[FINE] = score
        # the fine grid's model costs about 1.5x the frame's registration: it must pay for itself
        best = FINE if FINE in scores and scores[FINE] < FINE_GAIN * scores[band_best] else band_best
        self.choices.append((self.seen, best, scores))
        self.band = band_best
        self.fine = best == FINE
        return band_best

    def _fine_score(self, ref: np.ndarray, fine: tuple[np.ndarray, int], band, noise_var: float) -> float | None:
        """The measured error (bias² + variance, px²) of the likelihood with the fine reference, as
        :meth:`_choose_band` measures the others'.

        *Bias*, cross-fitted: the fine reference made from one half of every phase bin measures the mean of the
        other half *as its frames were* (moved back by whole pixels only: a mean moved back by the Fourier shift is
        no longer a frame at any shift of the fine model), less the yardstick's shift of the same mean; the groups'
        mean square less their noise (``noise_var``, one frame's variance of such a difference, as measured for
        the estimator with every frequency), less the error a reference of half the frames adds by its own noise
        (twice the full reference's, measured below). A reference made from the very frames it is tested on would
        follow their noise and their departures from a rigid shift (measured: a quarter of the error it then made
        on frames moved by a cubic spline). *Variance*: frames drawn from the fine reference itself (moved by the shift
        theorem on its grid, read at the frame's pixels, the detector's noise), measured against a fine reference
        made from the bin means drawn again with their photons (its own noise counts, as in the session).
        """
        image, edge = fine
        p = self.PHASES
        bins = [k for k in range(p * p) if self._count[2 * k] > 0 and self._count[2 * k + 1] > 0
                and self._sums[2 * k] is not None and self._sums[2 * k + 1] is not None]
        if len(bins) < 4 or noise_var is None:
            return None
        halves = [self._fine_model(self._offset, h) for h in (0, 1)]
        if any(h is None for h in halves):
            return None
        try:
            est = self.initial.with_reference(ref, reference_frames=self.joined, ml_band=band,
                                              fine_reference=image, fine_edge=edge)
            # the reference of each half: the other half's frames test it
            cross = [self.initial.with_reference(ref, reference_frames=self.joined / 2, ml_band=band,
                                                 fine_reference=h[0], fine_edge=max(h[1], edge)) for h in halves]
            yard = self.initial.with_reference(ref, reference_frames=self.joined, ml_band=YARDSTICK_BAND)
        except ValueError:
            return None
        x = []
        with np.errstate(all="ignore"):
            for k in bins:
                row = []
                for h in (0, 1):
                    mean = self._sums[2 * k + h] / np.float32(self._count[2 * k + h])
                    row.append(np.array(cross[1 - h].estimate_binned(mean)[:2])
                               - np.array(yard.estimate_binned(mean)[:2]))
                x.append(row)
        x = np.array(x)
        if not np.all(np.isfinite(x)):
            return None
        na = np.array([self._count[2 * k] for k in bins], dtype=np.float64)
        nb = np.array([self._count[2 * k + 1] for k in bins], dtype=np.float64)
        n = na + nb
        group = (na[:, None] * x[:, 0] + nb[:, None] * x[:, 1]) / n[:, None]
        bias2 = float(np.sum(n[:, None] * group ** 2) / (2 * n.sum())) - len(n) * noise_var / n.sum()
        trials = self._fine_trials(image)
        if trials is None:
            return None
        frames, truth = trials
        # measured against a fine reference made from bin means drawn from it with their photons: its own noise
        # counts, as it does in the session
        drawn = self._fine_model(self._offset, rng=np.random.default_rng(20261205), model=image)
        if drawn is None:
            return None
        try:
            est_drawn = self.initial.with_reference(ref, reference_frames=self.joined, ml_band=band,
                                                    fine_reference=drawn[0], fine_edge=drawn[1])
        except ValueError:
            return None
        with np.errstate(all="ignore"):
            err = np.array([est_drawn.estimate_binned(f)[:2] for f in frames]) - truth
            err_clean = np.array([est.estimate_binned(f)[:2] for f in frames]) - truth
        if not (np.all(np.isfinite(err)) and np.all(np.isfinite(err_clean))):
            return None
        var = float(np.mean((err - err.mean(axis=0)) ** 2))
        # the cross-fitted differences also hold the error of a reference made from half the frames: twice the
        # reference's own part of the variance (measured: drawn reference against the model itself)
        var_ref = max(var - float(np.mean((err_clean - err_clean.mean(axis=0)) ** 2)), 0.0)
        return max(bias2 - 2.0 * var_ref, 0.0) + var

    def _fine_trials(self, image: np.ndarray) -> tuple[list[np.ndarray], np.ndarray] | None:
        """:attr:`TRIALS` binned frames drawn from the fine reference ``image`` — moved by a random subpixel shift
        (the shift theorem on its grid), read at the frame's pixels (its even samples), the detector's noise — and
        their shifts (original px); None without a known gain. Seeded like :meth:`_trial_frames`."""
        det = self._binned_detector()
        if det is None:
            return None
        rng = np.random.default_rng(20261204)
        shifts = rng.uniform(-0.5, 0.5, (self.TRIALS, 2))
        frames = [_drawn(_fine_moved(image, (sy, sx)), rng, *det) for sy, sx in shifts]
        return frames, shifts * self.initial.bin_factor

    def _binned_detector(self) -> tuple[float, float, float] | None:
        """The detector for a binned frame: (dark level, gain, read noise) in DN per binned px; None without a
        known gain."""
        dark, gain, read_noise = self.initial.detector
        if gain is None or not (math.isfinite(gain) and gain > 0):
            return None
        b = self.initial.bin_factor
        dark_b = b * b * float(dark) if dark is not None and math.isfinite(dark) else 0.0
        rn = float(read_noise) * b if read_noise is not None and math.isfinite(read_noise) else 0.0
        return dark_b, float(gain), rn

    def _frac_mean(self, parts: list[int]) -> np.ndarray:
        """The mean fractional shift (binned px) of the frames in the sums ``parts``."""
        return sum(self._frac[j] for j in parts) / float(sum(self._count[j] for j in parts))

    def _fine_model(self, offset: tuple[float, float], half: int | None = None,
                    rng: np.random.Generator | None = None, model: np.ndarray | None = None
                    ) -> tuple[np.ndarray, int] | None:
        """The reference on the fine grid from the phase bins (both halves), in the initial reference's coordinates
        (the bins' shifts less the accumulated reference's ``offset`` to it), and the margin (binned px) where it is
        not the specimen's: the largest whole-pixel move of a joined frame (whose edge pixels were repeated) and 2 px
        of ringing. None without a known gain, with fewer than 4 phase bins, or when that margin exceeds an eighth of
        the frame. ``half`` (0 or 1): from that half of every bin only. ``rng`` and ``model`` (a fine reference):
        every bin's mean drawn from ``model`` at the bin's shift with the bin's photons (Poisson at the detector's
        gain, read noise), as :meth:`_trial_frames` draws a reference."""
        det = self._binned_detector()
        if det is None:
            return None
        p = self.PHASES
        means, shifts, counts = [], [], []
        for k in range(p * p):
            parts = [j for j in ((2 * k, 2 * k + 1) if half is None else (2 * k + half,))
                     if self._count[j] > 0 and self._sums[j] is not None]
            if not parts:
                continue
            n = int(sum(self._count[j] for j in parts))
            means.append(sum(self._sums[j] for j in parts) / np.float32(n))
            shifts.append(self._frac_mean(parts) + np.asarray(offset))
            if rng is not None:  # the bin's mean drawn anew from the fine model at the bin's shift, its photons
                means[-1] = _drawn(_fine_moved(model, shifts[-1]), rng, *det, frames=float(n))
            counts.append(n)
        if len(means) < 4:
            return None
        edge = self._whole + 2
        mb, nb = means[0].shape
        if edge >= min(mb, nb) // 8:
            return None
        dark_b, gain, rn = det
        mean = np.sum([m * c for m, c in zip(means, counts)], axis=0) / sum(counts)
        noise = fine_noise(mean, dark_b, gain, rn)
        return fine_reference(means, shifts, counts, noise=noise, edge=edge), edge

    #: Frames drawn from the new reference to measure each candidate's variance
    TRIALS = 16

    def _trial_frames(self, ref: np.ndarray) -> tuple[list[np.ndarray], np.ndarray, np.ndarray] | None:
        """:attr:`TRIALS` binned frames drawn from the reference under the detector's model — the reference moved by
        a random subpixel shift (Fourier), photon noise at the detector's gain, read noise — their shifts (original
        px), and a reference drawn alike with the photons of :attr:`joined` frames (the candidates measure the
        trial frames against it, so that a reference's own noise counts in their variance, as it does in the
        session's; the reference itself already holds that much noise, so this errs toward the roll-off); None
        without a known gain. The same seed at every update: the same frames give the same choice, live or
        offline."""
        det = self._binned_detector()
        if det is None:
            return None
        rng = np.random.default_rng(20261203)
        shifts = rng.uniform(-0.5, 0.5, (self.TRIALS, 2))
        moved = _moved_back_each([ref] * self.TRIALS, -shifts)  # content moved by +shift
        frames = [_drawn(lam, rng, *det) for lam in moved]
        drawn = _drawn(ref, rng, *det, frames=float(self.joined))
        return frames, shifts * self.initial.bin_factor, drawn

    def _rebuild(self) -> ShiftEstimator | None:
        groups = self._groups()
        if groups is None:
            return None
        ref, halves = groups
        # the zero: the new reference's shift against the initial one, measured by the initial estimator
        with np.errstate(all="ignore"):
            res = self.initial.estimate_binned(ref)
        self.initial.out_of_range = False
        b = self.initial.bin_factor
        oy, ox = res.dy_px / b, res.dx_px / b
        if not (math.isfinite(oy) and math.isfinite(ox)) or max(abs(oy), abs(ox)) > 1.0:
            self.notes.append(f"reference not renewed at frame {self.seen} of it: the accumulated reference does "
                              f"not register to the initial one within 1 binned px ({res.dy_px:.2f}, "
                              f"{res.dx_px:.2f} px)")
            return None
        ref = _moved_back_each([ref], [(oy, ox)])[0]
        self._offset = (oy, ox)
        fine = None
        if FINE_CANDIDATE and (self.fine or (self._choice_due() and self.joined >= FINE_FROM)):
            fine = self._fine_model((oy, ox))
        band = self._choose_band(ref, halves, fine)
        try:
            if self.fine and fine is not None:
                new = self.initial.with_reference(ref, reference_frames=self.joined, ml_band=band,
                                                  fine_reference=fine[0], fine_edge=fine[1])
            else:
                new = self.initial.with_reference(ref, reference_frames=self.joined, ml_band=band)
        except ValueError as err:
            self.notes.append(f"reference not renewed at frame {self.seen} of it: {err}")
            return None
        self.frames = self.joined
        return new


def _drawn(lam: np.ndarray, rng: np.random.Generator, dark_b: float, gain: float, rn: float, *,
           frames: float = 1.0) -> np.ndarray:
    """The mean of ``frames`` frames drawn from expected values ``lam`` (DN) under the detector's model: Poisson
    photons at ``gain`` DN each above ``dark_b``, Gaussian read noise ``rn`` DN; float32."""
    photons = np.clip(np.asarray(lam, dtype=np.float64) - dark_b, 0.0, None) / (gain / frames)
    out = rng.poisson(photons) * (gain / frames) + dark_b
    if rn > 0:
        out = out + rng.normal(0.0, rn / math.sqrt(frames), out.shape)
    return out.astype(np.float32)


def _fine_moved(image: np.ndarray, shift) -> np.ndarray:
    """A frame of the fine reference ``image`` with its content moved by ``shift`` (binned px; the shift theorem
    on the fine grid), read at the frame's pixels (the even samples), float64."""
    mf, nf = image.shape
    ky = sfft.fftfreq(mf)[:, None]
    kx = sfft.rfftfreq(nf)[None, :]
    spec = sfft.rfft2(image.astype(np.float64))
    spec *= np.exp(-2j * np.pi * (ky * 2 * shift[0] + kx * 2 * shift[1]))
    return sfft.irfft2(spec, s=(mf, nf))[::2, ::2]


def _mean_square(x: np.ndarray, na: np.ndarray, nb: np.ndarray) -> tuple[float, float]:
    """For differences ``x`` (groups, 2 halves, 2 axes) of two estimators' shifts measured on the means of each
    group's two halves (``na``, ``nb`` frames): one frame's variance of the difference, from the halves'
    differences (``var(x_a - x_b) = V (1/na + 1/nb)``), and the groups' mean square (weighted by frames) less its
    noise, ``sum_k (n_k/N) x_k^2 - K V / N``, per axis."""
    inv = (1.0 / na + 1.0 / nb)[:, None]
    var = float(np.mean((x[:, 0] - x[:, 1]) ** 2 / inv))
    n = na + nb
    group = (na[:, None] * x[:, 0] + nb[:, None] * x[:, 1]) / n[:, None]
    ms = float(np.sum(n[:, None] * group ** 2) / (2 * n.sum())) - len(n) * var / n.sum()
    return var, ms


def _moved_back_each(images: list[np.ndarray], shifts) -> list[np.ndarray]:
    """``images``, each with its content moved back by its subpixel shift (rows, columns; at most about a pixel),
    as float32.

    Fourier shift theorem (band-limited interpolation) on each image mirrored at its edges (``numpy.pad``,
    ``symmetric``, 16 px), so that no content wraps around.
    """
    m, n = images[0].shape
    margin = 16
    pm = sfft.next_fast_len(m + 2 * margin, real=True)
    pn = sfft.next_fast_len(n + 2 * margin, real=True)
    top, left = (pm - m) // 2, (pn - n) // 2
    pad = ((top, pm - m - top), (left, pn - n - left))
    ky = (2j * np.pi) * sfft.fftfreq(pm)
    kx = (2j * np.pi) * sfft.rfftfreq(pn)
    out = []
    for img, (fy, fx) in zip(images, shifts):
        spec = sfft.rfft2(np.pad(img, pad, mode="symmetric"))
        # content moved by +f is moved back by -f: multiply by exp(+2 pi i k f)
        spec *= np.exp(ky * fy).astype(np.complex64)[:, None]
        spec *= np.exp(kx * fx).astype(np.complex64)[None, :]
        out.append(np.ascontiguousarray(sfft.irfft2(spec, s=(pm, pn))[top:top + m, left:left + n],
                                        dtype=np.float32))
    return out
