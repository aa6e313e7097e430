"""The measurement engine: frames in, one row of QC numbers per frame out.

The engine keeps a small, explicit state per (channel, plane) *stream* — a reference image, the motion estimator,
motion-corrected running means (of the binned frames, for focus and z; of the rows the line offset reads),
optional reference z-stack, brightness history and photon-transfer accumulators —
and turns each :class:`~qcmon.frames.Frame` into a row (a ``dict`` keyed by :data:`qcmon.columns.NAMES`).
Memory does not grow with the session: every accumulator is bounded.

The same frames in the same order give the same rows, whether they come from a live watch or an offline replay.

Start-up
--------
The first ``reference_frames`` frames of each stream are held back until the reference is built from them
(iterative alignment), then measured against it like every later frame. No frame is skipped; rows of the first
frames simply appear ``reference_frames`` frames late (about 1 s at 30 Hz).
"""

from __future__ import annotations

import math
import warnings
from collections import deque
from dataclasses import dataclass, field

import numpy as np

from qcmon.columns import NAMES
from qcmon.errors import FrameError
from qcmon.frames import Frame
from qcmon.metrics.brightness import BrightnessTracker
from qcmon.metrics._imageops import bin_image
from qcmon.metrics.focus import focus_corr, focus_measure
from qcmon.metrics.line_offset import line_offset_rows, line_rows
from qcmon.metrics.noise import immerkaer_sigma
from qcmon.metrics.photon_transfer import PhotonTransfer, estimate_dark_level
from qcmon.metrics.registration import ShiftEstimator, build_reference
from qcmon.metrics.saturation import detector_max, saturation_fractions
from qcmon.metrics.zoffset import RunningMean, ZEstimator

NAN = math.nan
#: ``noise_sigma`` uses every k-th output row of the Immerkær filter, k chosen so that about this many pixels
#: enter: a relative standard error of about 0.6 % (see :func:`~qcmon.metrics.noise.immerkaer_sigma`) at a cost
#: that does not grow with the frame (k = 8 at 512², 1 at 256² and below).
_NOISE_PIXELS = 32768
#: ``line_offset_px`` uses every k-th odd row of the running mean, k chosen so that about this many odd rows enter
#: (k = 7 at 512 rows, 1 up to 128): on the mean of 30 frames its precision stays far below what the threshold
#: profiles resolve, at a cost that does not grow with the frame.
_LINE_ROWS = 36


@dataclass(slots=True)
class EngineSettings:
    """Options of the engine. Units: Hz, µm, DN, frames, s.

    Attributes
    ----------
    frame_rate_hz : float or None
        Time points per second; used for ``time_s`` when frames carry no timestamp.
    pixel_size_um : float or None
        Pixel size; ``displacement_um`` is blank without it.
    bit_depth : int or None
        Detector bit depth; the saturation level is ``2**bit_depth - 1``. Default: from the dtype.
    dark_level : float or None
        Detector offset in DN. Default: estimated from the first frames (photon-transfer intercept, falling back
        to a low percentile).
    zstack : (Z, M, N) ndarray or None
        Reference z-stack, superficial to deep, for ``z_um``.
    z_step_um : float or None
        Plane spacing of ``zstack``.
    reference_frames : int
        Frames used to build the reference.
    running_mean_frames : int
        Frames in the motion-corrected running means used for focus, z and the line offset.
    z_every : int
        Frames between two z / focus / line-offset estimates (the value is carried between estimates).
    upsample : int
        Subpixel upsampling factor of the registration (1/upsample px resolution).
    bin_factor : int or None
        Binning before registration; None chooses from the frame size.
    motion_channel : int or None
        Measure motion on this channel only and apply it to the others of the same time point and plane.
    max_shift_px : float or None
        Largest displacement searched, px; None: a quarter of the smaller frame side (beyond that the apodised
        frames share too little content for a trustworthy peak).
    bleach_window_s : float
        Trailing window of ``bleach_pct_per_min``.
    photon_transfer_every : int
        Frames between two photon-transfer updates after the start-up (each update uses a frame pair; every
        pair of the start-up frames is used). Default 16: about 2 pairs per second at 30 Hz, each of 1/8 of the
        frame's pixels (32 k samples at 512²), so the fit still rests on about 10⁵ samples a second.
    """

    frame_rate_hz: float | None = None
    pixel_size_um: float | None = None
    bit_depth: int | None = None
    dark_level: float | None = None
    zstack: np.ndarray | None = None
    z_step_um: float | None = None
    reference_frames: int = 30
    running_mean_frames: int = 30
    z_every: int = 10
    upsample: int = 20
    bin_factor: int | None = None
    motion_channel: int | None = None
    max_shift_px: float | None = None
    bleach_window_s: float = 60.0
    photon_transfer_every: int = 16

    def __post_init__(self) -> None:
        for name in ("frame_rate_hz", "pixel_size_um", "z_step_um"):
            v = getattr(self, name)
            if v is not None and not (math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be a positive number, got {v!r}")
        if self.bit_depth is not None and not (1 <= int(self.bit_depth) <= 32):
            raise ValueError(f"bit_depth must be between 1 and 32, got {self.bit_depth!r}")
        for name in ("reference_frames", "running_mean_frames", "z_every", "upsample", "photon_transfer_every"):
            if int(getattr(self, name)) < 1:
                raise ValueError(f"{name} must be at least 1, got {getattr(self, name)!r}")
        if self.zstack is not None:
            if self.zstack.ndim != 3 or self.zstack.shape[0] < 3:
                raise ValueError(f"zstack must be a (planes, rows, columns) array with ≥ 3 planes, got {self.zstack.shape}")
            if self.z_step_um is None:
                raise ValueError("z_step_um is required with a zstack")


@dataclass(slots=True)
class _Stream:
    """State of one (channel, plane)."""

    channel: int
    plane: int
    shape: tuple[int, int] | None = None
    dtype: np.dtype | None = None
    pending: list[Frame] = field(default_factory=list)
    shift: ShiftEstimator | None = None
    reference: np.ndarray | None = None
    running: RunningMean | None = None
    line_mean: RunningMean | None = None
    zest: ZEstimator | None = None
    brightness: BrightnessTracker | None = None
    ptc: PhotonTransfer | None = None
    dark_level: float = NAN
    dark_origin: str = ""
    gain: float = NAN
    max_value: float = NAN
    prev: np.ndarray | None = None
    prev_shift: tuple[int, int] = (0, 0)
    n_measured: int = 0
    last_z: tuple[float, float] = (NAN, NAN)
    last_focus: tuple[float, float] = (NAN, NAN)
    focus_bin: int = 1
    exact_binning: bool = False  # integer frames whose binned sums are exact in float32 and cover every pixel
    noise_row_step: int = 1
    line_row_step: int = 1
    reference_binned: np.ndarray | None = None
    last_line_offset: float = NAN
    t0: float = NAN
    new_reference_requested: bool = False


class Engine:
    """Turns frames into rows, keeping O(1) state per (channel, plane).

    Parameters
    ----------
    settings : EngineSettings

    Notes
    -----
    ``process`` may return no row (frames held back while the reference is built) or several (the held-back frames,
    once it is). ``flush`` measures what is still held back at the end of a session.
    """

    def __init__(self, settings: EngineSettings | None = None):
        self.settings = settings or EngineSettings()
        self._streams: dict[tuple[int, int], _Stream] = {}
        # motion of the motion channel by (time index, plane), for the other channels; bounded
        self._shared_motion: dict[tuple[int, int], tuple[float, float, float]] = {}
        self._shared_order: deque[tuple[int, int]] = deque()
        self._waiting: dict[tuple[int, int], list[Frame]] = {}
        #: messages about frames that were measured but left partly blank (e.g. moved beyond the searched range);
        #: the caller reports and clears them (:meth:`take_problems`)
        self.problems: list[str] = []

    # ------------------------------------------------------------------ public
    @property
    def streams(self) -> list[tuple[int, int]]:
        return sorted(self._streams)

    def process(self, frame: Frame) -> list[dict]:
        """Measure one frame (or hold it back); return the rows that are ready."""
        st = self._stream(frame)
        self._check(st, frame)
        if st.shift is None or st.new_reference_requested:
            st.pending.append(frame)
            if len(st.pending) < self.settings.reference_frames:
                return []
            return self._start(st)
        return self._measure_or_wait(st, frame)

    def flush(self) -> list[dict]:
        """Measure every frame still held back (end of session)."""
        rows: list[dict] = []
        for st in list(self._streams.values()):
            if st.pending:
                rows.extend(self._start(st))
        for key, frames in list(self._waiting.items()):
            for fr in frames:
                rows.extend(self._measure(self._streams[(fr.channel, fr.plane)], fr, None))
            del self._waiting[key]
        return rows

    def take_problems(self) -> list[str]:
        """The problems noted since the last call (and forget them)."""
        out, self.problems = self.problems, []
        return out

    def new_reference(self, channel: int | None = None, plane: int | None = None) -> None:
        """Take a new reference from the next frames (after the experimenter refocused)."""
        for (c, p), st in self._streams.items():
            if (channel is None or c == channel) and (plane is None or p == plane):
                st.new_reference_requested = True

    def stream_info(self) -> dict[tuple[int, int], dict]:
        """Per-stream facts the engine established: dark level, gain, photon transfer, z start."""
        out = {}
        for key, st in self._streams.items():
            info: dict = {"dark_level_dn": st.dark_level, "dark_level_origin": st.dark_origin,
                          "saturation_level_dn": st.max_value, "frames": st.n_measured}
            if st.ptc is not None:
                try:
                    res = st.ptc.result()
                except Exception:  # pragma: no cover - never lose the summary over a failed fit
                    res = None
                if res is not None:
                    info.update(gain_dn_per_photon=res.gain_dn_per_photon, ptc_dark_level_dn=res.dark_level_dn,
                                read_noise_dn=res.read_noise_dn, ptc_points=res.n_points, ptc_r2=res.r2)
            if st.brightness is not None:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", UserWarning)  # too short a session: NaN fit
                    fit = st.brightness.session_fit()
                info.update(bleach_slope_pct_per_min=fit.slope_pct_per_min, bleach_tau_min=fit.tau_min,
                            bleach_r2=fit.r2)
            if st.zest is not None:
                info["z_start_um"] = st.zest.start_um
            out[key] = info
        return out

    def reference_image(self, channel: int, plane: int) -> np.ndarray | None:
        """The current reference of a stream (float32, rows × columns), or None before it is built."""
        st = self._streams.get((channel, plane))
        return None if st is None else st.reference

    def forecast_min(self, channel: int, plane: int, loss_pct: float) -> float:
        st = self._streams.get((channel, plane))
        if st is None or st.brightness is None:
            return NAN
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # no bleach rate yet: NaN
            return st.brightness.forecast_min(loss_pct)

    # ----------------------------------------------------------------- private
    def _stream(self, frame: Frame) -> _Stream:
        key = (frame.channel, frame.plane)
        st = self._streams.get(key)
        if st is None:
            st = self._streams[key] = _Stream(frame.channel, frame.plane)
        return st

    def _check(self, st: _Stream, frame: Frame) -> None:
        data = frame.data
        if not isinstance(data, np.ndarray) or data.ndim != 2:
            raise FrameError(f"expected a 2-D image, got shape {getattr(data, 'shape', None)}",
                             path=frame.source or None, page=frame.page if frame.page >= 0 else None)
        if data.dtype.kind not in "uif":
            raise FrameError(f"unsupported pixel type {data.dtype}", path=frame.source or None,
                             page=frame.page if frame.page >= 0 else None)
        if st.shape is None:
            st.shape, st.dtype = data.shape, data.dtype
        elif data.shape != st.shape or data.dtype != st.dtype:
            raise FrameError(
                f"frame of {data.shape[0]}×{data.shape[1]} {data.dtype} in a session of "
                f"{st.shape[0]}×{st.shape[1]} {st.dtype} (channel {st.channel}, plane {st.plane}); frame skipped",
                path=frame.source or None, page=frame.page if frame.page >= 0 else None)

    def _start(self, st: _Stream) -> list[dict]:
        """Build the reference (and the dark level, on first start) from the held-back frames, then measure them."""
        frames, st.pending = st.pending, []
        stack = np.stack([f.data for f in frames]).astype(np.float32, copy=False)
        s = self.settings
        if st.shift is None:  # first start: detector facts
            st.max_value = float(detector_max(frames[0].data.dtype, s.bit_depth))
            # every start-up pair counts for the dark level; later pairs are thinned by the accumulator itself
            st.ptc = PhotonTransfer(max_value=st.max_value, pair_step=1)
            for a, b in zip(stack[1:], stack[:-1]):
                st.ptc.update(a, b)
            st.ptc.pair_step = s.photon_transfer_every
            self._set_dark_level(st, stack)
            st.brightness = BrightnessTracker(window_s=s.bleach_window_s)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # constant frames give NaN; reported per row
            st.reference = build_reference(stack, upsample=s.upsample)
            max_shift = s.max_shift_px or min(st.reference.shape) / 4
            read_noise = NAN
            try:
                res = st.ptc.result() if st.ptc is not None else None
                if res is not None:
                    read_noise = float(res.read_noise_dn)
            except Exception:  # no photon transfer yet: the estimator falls back to its own floor
                pass
            # the likelihood refinement models photon counts: the detector's dark level, gain and read noise
            st.shift = ShiftEstimator(st.reference, upsample=s.upsample, bin_factor=s.bin_factor,
                                      max_shift_px=max_shift, dark_level=st.dark_level, gain=st.gain,
                                      read_noise_dn=read_noise, reference_frames=len(frames),
                                      reference_valid=_unsaturated(st.reference, st.max_value))
        # Two running means in block sums of gcd(running_mean_frames, z_every) frames (at every estimate each is
        # over exactly the last running_mean_frames frames): the frame binned as for the registration, for focus
        # and z, which need no finer sampling (their correlations bin further; the sharpness is of cell-sized
        # detail), and the rows the line offset reads, at full resolution and moved by even numbers of rows so
        # that the two scan directions' lines stay apart.
        b = st.shift.bin_factor
        block = math.gcd(s.running_mean_frames, s.z_every)
        h, w = st.reference.shape
        st.noise_row_step = max(1, round((h - 2) * (w - 2) / _NOISE_PIXELS))
        st.line_row_step = max(1, ((h - 1) // 2) // _LINE_ROWS)
        st.running = RunningMean(s.running_mean_frames, block=block)
        st.line_mean = RunningMean(s.running_mean_frames, block=block, even_rows=True,
                                   rows=np.concatenate(line_rows(h, row_step=st.line_row_step)))
        # focus correlation on binned images: shot noise averages out, cell-sized structure (≥ 8 px) stays
        st.focus_bin = b * max(1, (2 if min(h, w) < 256 else 4) // b)
        st.exact_binning = (st.dtype.kind in "ui" and h % b == 0 and w % b == 0
                            and b * b * int(np.iinfo(st.dtype).max) < 2 ** 24)
        st.reference_binned = bin_image(st.reference, st.focus_bin)
        if s.zstack is not None:
            if s.zstack.shape[1:] != st.reference.shape:
                raise FrameError(f"z-stack planes are {s.zstack.shape[1]}×{s.zstack.shape[2]} but frames are "
                                 f"{st.reference.shape[0]}×{st.reference.shape[1]}")
            st.zest = ZEstimator(np.stack([bin_image(p, b) for p in s.zstack]), z_step_um=s.z_step_um,
                                 reference=bin_image(st.reference, b))
        st.new_reference_requested = False
        st.prev = None
        rows: list[dict] = []
        for fr in frames:
            rows.extend(self._measure_or_wait(st, fr))
        return rows

    def _set_dark_level(self, st: _Stream, stack: np.ndarray) -> None:
        s = self.settings
        if s.dark_level is not None:
            st.dark_level, st.dark_origin = float(s.dark_level), "option"
            return
        res = None
        try:
            res = st.ptc.result()
        except Exception:
            res = None
        if res is not None and math.isfinite(res.dark_level_dn) and math.isfinite(res.gain_dn_per_photon) \
                and res.gain_dn_per_photon > 0:
            st.dark_level, st.dark_origin = float(res.dark_level_dn), "photon transfer"
            st.gain = float(res.gain_dn_per_photon)
            return
        st.dark_level, st.dark_origin = float(estimate_dark_level(stack[0])), "low percentile"

    def _measure_or_wait(self, st: _Stream, frame: Frame) -> list[dict]:
        mc = self.settings.motion_channel
        if mc is None or frame.channel == mc:
            rows = self._measure(st, frame, None)
            if mc is not None:
                rows.extend(self._release(frame.index, frame.plane))
            return rows
        motion = self._shared_motion.get((frame.index, frame.plane))
        if motion is None:
            self._waiting.setdefault((frame.index, frame.plane), []).append(frame)
            return []
        return self._measure(st, frame, motion)

    def _release(self, index: int, plane: int) -> list[dict]:
        rows: list[dict] = []
        for fr in self._waiting.pop((index, plane), []):
            rows.extend(self._measure(self._streams[(fr.channel, fr.plane)], fr,
                                      self._shared_motion[(index, plane)]))
        return rows

    def _measure(self, st: _Stream, frame: Frame, motion: tuple[float, float, float] | None) -> list[dict]:
        s = self.settings
        data = frame.data
        # Integer pixels of up to 16 bits are handed to the metrics as they are: each converts what it reads (a
        # binned image, a few rows) to float32 itself, so the whole frame is never copied to float.
        img = data if data.dtype.kind in "ui" and data.dtype.itemsize <= 2 else data.astype(np.float32, copy=False)
        row = dict.fromkeys(NAMES, NAN)
        row.update(frame=frame.index, channel=frame.channel, plane=frame.plane, source=frame.source,
                   page=frame.page)
        t = frame.time_s
        if not math.isfinite(t):
            t = frame.index / s.frame_rate_hz if s.frame_rate_hz else float(frame.index)
        if not math.isfinite(st.t0):
            st.t0 = t
        row["time_s"] = t

        # The metrics that read the frame's pixels come first, one after the other, while the pixels are in the
        # processor's caches. The frame binned as for the registration serves the running mean of focus and z;
        # for integer frames whose sides the binning divides (float32, exact sums of integers below 2**24) it
        # also serves the registration and gives the exact frame mean.
        factor = st.shift.bin_factor
        binned = bin_image(img, factor)
        sat, clip = saturation_fractions(frame.data, max_value=st.max_value)
        sigma = immerkaer_sigma(img, row_step=st.noise_row_step)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # undefined values come out as NaN in the row
            mean_binned = None
            if st.exact_binning:
                total = float(np.add.reduce(binned, axis=None, dtype=np.float64))  # exact: integer values
                mean_raw, mean_binned = total / img.size, total / binned.size
            else:
                mean_raw = float(np.add.reduce(img, axis=None, dtype=np.float64)) / img.size
            if motion is None:
                if img.dtype.kind in "ui" or np.isfinite(binned).all():
                    res = st.shift.estimate_binned(binned, mean=mean_binned)
                else:  # non-finite pixels: the estimator replaces them (and warns) before binning
                    res = st.shift.estimate(img)
            if motion is None and st.shift.out_of_range:
                where = f"{frame.source} page {frame.page}: " if frame.source else ""
                self.problems.append(
                    f"{where}frame {frame.index} (channel {frame.channel}, plane {frame.plane}) moved beyond the "
                    f"searched range of ±{st.shift.max_shift_px:g} px; its displacement is left blank")
            if motion is None:
                dy, dx, corr = res.dy_px, res.dx_px, res.corr
                if s.motion_channel is not None:
                    self._remember_motion(frame.index, frame.plane, (dy, dx, corr))
            else:
                dy, dx, corr = motion
            row.update(dx_px=dx, dy_px=dy, reg_corr=corr)
            disp = math.hypot(dx, dy)
            row["displacement_px"] = disp
            if s.pixel_size_um:
                row["displacement_um"] = disp * s.pixel_size_um

            # focus, z and line offset from the motion-corrected running means, when a block of z_every frames is
            # complete (and at each of the first z_every frames)
            ishift = (int(round(dy)), int(round(dx))) if math.isfinite(dx) and math.isfinite(dy) else (0, 0)
            st.running.push(binned, dy / factor, dx / factor)
            st.line_mean.push(img, dy, dx)
            if (st.n_measured + 1) % s.z_every == 0 or st.n_measured < s.z_every:
                mean_img = st.running.mean
                if st.running.n_frames >= s.running_mean_frames:  # a partial mean is noisier than the reference
                    st.last_focus = (focus_corr(bin_image(mean_img, st.focus_bin // factor), st.reference_binned),
                                     focus_measure(mean_img))
                if st.zest is not None:
                    zr = st.zest.estimate(mean_img)
                    st.last_z = (zr.z_um, zr.corr)
                # Line offset is a property of the scanner, not of one frame: it is measured on the running mean
                # of the rows it reads, whose frames were moved by whole, even numbers of rows (the two scan
                # directions' rows stay apart).
                rows = st.line_mean.mean  # rows above, odd rows, rows below (line_rows), stacked
                k = rows.shape[0] // 3
                st.last_line_offset = line_offset_rows(rows[:k], rows[k:2 * k], rows[2 * k:])
            row["focus_corr"], row["focus_measure"] = st.last_focus
            row["z_um"], row["z_corr"] = st.last_z
            row["line_offset_px"] = st.last_line_offset

            # photometry
            mean_f = mean_raw - st.dark_level
            row["mean_f"] = mean_f
            b = st.brightness.update(t, mean_f)
            row.update(baseline_f=b.baseline_f, brightness_pct=b.brightness_pct,
                       bleach_pct_per_min=b.bleach_pct_per_min)
            row.update(saturated_frac=sat, clipped_frac=clip)
            row["noise_sigma"] = sigma
            row["snr"] = mean_f / sigma if sigma > 0 else NAN
            if st.prev is not None:
                cur, prev = _overlap(img, st.prev, (ishift[0] - st.prev_shift[0], ishift[1] - st.prev_shift[1]))
                if cur.size:
                    st.ptc.update(cur, prev)
            gain = st.gain
            if math.isfinite(gain) and gain > 0:
                photons = mean_f / gain
                row["photons_per_px"] = photons
                row["shot_snr"] = math.sqrt(photons) if photons > 0 else 0.0
        st.prev, st.prev_shift = img, ishift
        st.n_measured += 1
        return [row]

    def _remember_motion(self, index: int, plane: int, motion: tuple[float, float, float]) -> None:
        key = (index, plane)
        self._shared_motion[key] = motion
        self._shared_order.append(key)
        while len(self._shared_order) > 256:
            self._shared_motion.pop(self._shared_order.popleft(), None)


def _unsaturated(reference: np.ndarray, max_value: float) -> np.ndarray | None:
    """Pixels of the reference below the detector's ceiling (a pixel saturated in its frames carries no shift
    information), or None if all are."""
    if not math.isfinite(max_value):
        return None
    ok = reference < np.float32(max_value) - 0.5
    return None if ok.all() else ok


def _overlap(current: np.ndarray, previous: np.ndarray, shift: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Views of ``current`` and ``previous`` over the pixels they share, with ``previous`` moved by ``shift``.

    ``shift`` (rows, columns) is how far the content moved from ``previous`` to ``current``; pixels that left the
    field are dropped rather than wrapped around.
    """
    dy, dx = shift
    h, w = current.shape
    if abs(dy) >= h or abs(dx) >= w:
        return current[:0, :0], previous[:0, :0]
    cur = current[max(dy, 0):h + min(dy, 0), max(dx, 0):w + min(dx, 0)]
    prev = previous[max(-dy, 0):h + min(-dy, 0), max(-dx, 0):w + min(-dx, 0)]
    return cur, prev
