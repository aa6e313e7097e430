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
from qcmon.events import Event
from qcmon.frames import UNTIMED_FRAMES_PER_S, Frame
from qcmon.metrics.brightness import BrightnessTracker
from qcmon.metrics import bin_image
from qcmon.metrics.focus import focus_corr, focus_measure
from qcmon.metrics.line_offset import line_offset_rows, line_rows
from qcmon.metrics.noise import immerkaer_sigma
from qcmon.metrics.photon_transfer import PhotonTransfer, estimate_dark_level, is_structureless
from qcmon.metrics import reference_growth
from qcmon.metrics.reference_growth import ReferenceGrowth
from qcmon.metrics.registration import ShiftEstimator, ShiftResult, build_reference
from qcmon.metrics.saturation import RangeFinder
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
        Time points per second; used for ``time_s`` when frames carry no timestamp. Without it (and without
        timestamps) ``time_s`` and every per-minute value are blank; it may be given later
        (:meth:`Engine.set_frame_rate`, e.g. once estimated while watching).
    pixel_size_um : float or None
        Pixel size; ``displacement_um`` is blank without it.
    bit_depth : int or None
        Detector bit depth; the saturation level is ``2**bit_depth - 1``. Default: the level the data pile up at
        (:class:`~qcmon.metrics.saturation.RangeFinder`), else the dtype's maximum.
    bit_depth_origin : str
        Where ``bit_depth`` came from ("option" or "metadata"), for the record.
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
    reference_updates : tuple of int
        Counts of frames measured since a reference was built at which the shift estimator gets a reference
        accumulated from the registered frames (:mod:`qcmon.metrics.reference_growth`; its zero stays the first
        reference's). Default :data:`~qcmon.metrics.reference_growth.REFERENCE_UPDATES` (60 … 1920); empty: the
        first reference is kept.
    """

    frame_rate_hz: float | None = None
    pixel_size_um: float | None = None
    bit_depth: int | None = None
    bit_depth_origin: str = "option"
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
    reference_updates: tuple[int, ...] = field(default_factory=lambda: reference_growth.REFERENCE_UPDATES)

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
    pending_structured: int = 0
    pending_flags: list[bool] = field(default_factory=list)  # per held-back frame: shows structure
    prev_cells: np.ndarray | None = None  # cell means of the last frame tested for structure (before a reference)
    blank_since: tuple[int, float] | None = None  # first frame (index, time) of a run of frames without structure
    blank_reason: str = ""
    blank_last: tuple | None = None
    shift: ShiftEstimator | None = None
    grow: ReferenceGrowth | None = None  # the registration reference accumulated from measured frames
    reference: np.ndarray | None = None
    running: RunningMean | None = None
    line_mean: RunningMean | None = None
    line_clip: RunningMean | None = None  # clipped pixels in line_mean's frames, while any are in its window
    zest: ZEstimator | None = None
    brightness: BrightnessTracker | None = None
    ptc: PhotonTransfer | None = None
    dark_level: float = NAN
    dark_origin: str = ""
    gain: float = NAN
    max_value: float = NAN
    range: RangeFinder | None = None
    prev: np.ndarray | None = None
    prev_shift: tuple[int, int] = (0, 0)
    prev2: np.ndarray | None = None  # the frame before prev when of the same kind (dark/lit): photon-transfer triples
    prev2_shift: tuple[int, int] = (0, 0)
    photon_dark: float = NAN         # dark level of photons per pixel: NaN while it is unknown (see _photon_dark)
    photon_dark_checked: int = 0     # photon-transfer triples at the last look for a third-cumulant dark level
    photon_dark_origin: str = ""     # where photon_dark came from, and its standard error (NaN if not stated)
    photon_dark_se: float = NAN
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
    untimed: bool | None = None  # True: the brightness tracker runs on frames (no time when the stream began)
    last_brightness: object = None
    prev_dark: bool = False          # the previous frame showed no structure (closed shutter?)
    pending_dark: dict = field(default_factory=dict)  # start-up frames' dark/lit, by frame index, until measured
    refit_gain: bool = False         # after a brightness step: take the gain from the new fit once it passes
    gain_checked_pairs: int = 0      # photon-transfer pairs at the last attempt to take the gain from the fit
    classified_upto: int = -1        # frames up to this index were sorted dark/lit when the reference was built


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
        self._events: list[Event] = []
        self._range_log: list[tuple[int, tuple[int, int], tuple]] = []  # see range_log
        #: messages about frames that were measured but left partly blank (e.g. moved beyond the searched range);
        #: the caller reports and clears them (:meth:`take_problems`)
        self.problems: list[str] = []
        # registrations measured ahead by a copy of this engine (give_registrations), by (frame, channel, plane)
        self._given: dict[tuple[int, int, int], tuple] = {}

    # ------------------------------------------------------------------ public
    @property
    def streams(self) -> list[tuple[int, int]]:
        return sorted(self._streams)

    def process(self, frame: Frame) -> list[dict]:
        """Measure one frame (or hold it back); return the rows that are ready."""
        st = self._stream(frame)
        rows = self._check(st, frame)
        st = self._stream(frame)  # a new one if the frame size changed
        if st.range is None:
            st.range = RangeFinder(frame.data.dtype, bit_depth=self.settings.bit_depth,
                                   bit_depth_origin=self.settings.bit_depth_origin)
        if st.shift is None or st.new_reference_requested:
            # The reference waits for frames with structure (a closed shutter, a flat or saturated field has none):
            # frames without structure ahead of the first one with structure are measured without motion (or
            # against the old reference). The last frame is always held: it shows structure if the next shares it.
            self._observe_range(st, frame)  # the detector's limits first: a mostly clipped frame has no structure
            structured = self._structured(st, frame)
            if structured and st.pending and not st.pending_flags[-1]:
                st.pending_flags[-1] = True  # the previous frame shares this one's structure
                st.pending_structured += 1
            if not structured and not st.pending_structured:
                held, st.pending, st.pending_flags = st.pending, [], []
                for fr in held:
                    rows.extend(self._measure_early(st, fr) if st.shift is None else self._measure_or_wait(st, fr))
            st.pending.append(frame)
            st.pending_flags.append(structured)
            st.pending_structured += structured
            n = self.settings.reference_frames
            if st.pending_structured >= n or len(st.pending) >= 4 * n:
                rows.extend(self._start(st))
            return rows
        return rows + self._measure_or_wait(st, frame)

    def flush(self) -> list[dict]:
        """Measure every frame still held back (end of session)."""
        rows: list[dict] = []
        for st in list(self._streams.values()):
            if st.pending:
                rows.extend(self._start(st))
            self._end_blank(st)
        for key, frames in list(self._waiting.items()):
            for fr in frames:
                rows.extend(self._measure(self._streams[(fr.channel, fr.plane)], fr, None))
            del self._waiting[key]
        return rows

    def set_frame_rate(self, hz: float) -> None:
        """Use ``hz`` time points per second from now on (rows measured before keep a blank ``time_s``)."""
        hz = float(hz)
        if not (math.isfinite(hz) and hz > 0):
            raise ValueError(f"frame rate must be a positive number, got {hz!r}")
        self.settings.frame_rate_hz = hz

    def _per_min_scale(self, st: _Stream) -> float:
        """Factor from the stream's brightness-tracker units to per minute (NaN without a frame rate)."""
        if not st.untimed:
            return 1.0
        rate = self.settings.frame_rate_hz
        return rate / UNTIMED_FRAMES_PER_S if rate else NAN

    def take_events(self) -> list[Event]:
        """Events the engine raised since the last call (a detector level found or withdrawn), oldest first."""
        out, self._events = self._events, []
        return out

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
            if st.grow is not None:  # frames the registration reference is made of (it grows at fixed counts)
                info["registration_reference_frames"] = st.grow.frames
                # the likelihood's roll-off (fractions of the binned Nyquist frequency; "none": every frequency),
                # as the growing reference last chose it from how the frames follow a rigid shift
                lo, hi = st.shift._ML_BAND
                info["registration_rolloff"] = "none" if not math.isfinite(lo) else [lo, hi]
                info["registration_rolloff_chosen_at"] = st.grow.choices[-1][0] if st.grow.choices else None
                # the model of a frame: the reference on the frames' own grid, or on a grid twice as fine
                # (reconstructed from the frames at their fractional shifts, for frames aliased by their pixels)
                info["registration_model"] = "fine grid" if st.shift._fine else "frame grid"
            if st.range is not None:
                info.update(saturation_level_origin=st.range.ceiling.origin,
                            saturation_level_text=st.range.ceiling.text, floor_level_dn=st.range.floor.value,
                            floor_level_origin=st.range.floor.origin, floor_level_text=st.range.floor.text,
                            floor_is_clip=st.range.clip_floor)
            if st.ptc is not None:
                try:
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore", UserWarning)  # undefined (too few pairs): NaN in the summary
                        res = st.ptc.result()
                except Exception:  # pragma: no cover - never lose the summary over a failed fit
                    res = None
                if res is not None:
                    # a fit that failed its checks is not a gain: blank, with the reason beside it
                    usable = not res.quality
                    info.update(gain_dn_per_photon=res.gain_dn_per_photon if usable else NAN,
                                ptc_dark_level_dn=res.dark_level_dn if usable or "dark" in res.dark_origin else NAN,
                                read_noise_dn=res.read_noise_dn, ptc_points=res.n_points, ptc_r2=res.r2,
                                ptc_quality=res.quality, ptc_dark_origin=res.dark_origin, ptc_bias=res.bias)
            if st.brightness is not None:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", UserWarning)  # too short a session: NaN fit
                    fit = st.brightness.session_fit()
                scale = self._per_min_scale(st)  # a tracker on frames: its "minute" is 60 × 30 frames
                info.update(bleach_slope_pct_per_min=fit.slope_pct_per_min * scale, bleach_tau_min=fit.tau_min / scale,
                            bleach_r2=fit.r2)
            if st.zest is not None:
                info["z_start_um"] = st.zest.start_um
            out[key] = info
        return out

    def range_text(self, channel: int, plane: int) -> str:
        """Short words for the stream's saturation level and its origin ("" before the stream started)."""
        st = self._streams.get((channel, plane))
        if st is None or st.range is None:
            return ""
        c = st.range.ceiling
        words = {"option": "--bit-depth", "metadata": "metadata", "inferred": "inferred", "dtype": "dtype"}
        return f"saturates at {c.value:g} ({words.get(c.origin, c.origin)})"

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
            return st.brightness.forecast_min(loss_pct) / self._per_min_scale(st)  # NaN without a frame rate

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
        rows: list[dict] = []
        if st.shape is None:
            st.shape, st.dtype = data.shape, data.dtype
        elif data.shape != st.shape or data.dtype != st.dtype:
            # the source lets a new size through only where a session really changes it (after a first file of
            # another size): what is held back is measured, then the stream starts anew
            if st.pending:
                rows.extend(self._start(st))
            self._end_blank(st)
            old = st
            st = self._streams[(frame.channel, frame.plane)] = _Stream(frame.channel, frame.plane)
            st.shape, st.dtype = data.shape, data.dtype
            t = self._time(frame)
            self._events.append(Event(
                kind="reference", frame=frame.index, time_s=t, started_frame=frame.index, started_time_s=t,
                channel=frame.channel, plane=frame.plane,
                message=f"frames change from {old.shape[0]}×{old.shape[1]} {old.dtype} to {data.shape[0]}×"
                        f"{data.shape[1]} {data.dtype} at {frame.source or 'frame'} page {frame.page}: measured anew "
                        "from here (new reference, detector range and brightness baseline)"))
        return rows

    def _time(self, frame: Frame) -> float:
        t = frame.time_s
        if not math.isfinite(t):
            t = frame.index / self.settings.frame_rate_hz if self.settings.frame_rate_hz else float(frame.index)
        return t

    def _structured(self, st: _Stream, frame: Frame) -> bool:
        """Whether a frame shares structure with the frame before it (tested before a reference exists).

        The frame is cut into cells (8 × 8 px from 128 px on, 4 × 4 from 32, else 2 × 2) and the Pearson
        correlation ``r`` of its cell sums with the previous frame's is taken. Noise is independent from frame to
        frame, the specimen is not: with no common structure (closed shutter, flat field with shot and read
        noise) ``r`` is normal with mean 0 and standard deviation 1/√n over n cells (Fisher 1915, large n); the
        frame shows structure when ``r > 5/√n`` (5 standard deviations) — the spatial variance that both
        frames share, beyond their temporal noise. A constant frame, one with more than half of its pixels at a
        detector limit, or one of fewer than 16 cells has none. The first frame is decided with the second.
        """
        data = frame.data
        prev, st.prev_cells = st.prev_cells, None
        h, w = data.shape
        side = 8 if min(h, w) >= 128 else 4 if min(h, w) >= 32 else 2
        if (h // side) * (w // side) < 16:
            return False
        hi, lo = st.range.ceiling.value, st.range.floor.value
        clipped = np.count_nonzero(data >= hi) + (np.count_nonzero(data <= lo) if st.range.clip_floor else 0)
        if clipped > data.size / 2:
            return False
        img = data if data.dtype.kind in "ui" and data.dtype.itemsize <= 2 else data.astype(np.float32, copy=False)
        cells = bin_image(img, side).astype(np.float64).ravel()
        if not np.isfinite(cells).all():
            return False
        cells -= cells.mean()
        norm = float(np.dot(cells, cells))
        if norm <= 0:
            return False
        st.prev_cells = cells / math.sqrt(norm)
        if prev is None or prev.shape != st.prev_cells.shape:
            return False
        return float(np.dot(prev, st.prev_cells)) > 5.0 / math.sqrt(cells.size)

    def _alike_in_clipping(self, st: _Stream, frames: list[Frame]) -> list[Frame]:
        """The frames to build a reference from: those alike in their clipped pixels. A saturated patch that
        appears among the reference's frames (a light leak switched on, a gain raised) would otherwise enter their
        alignment in some frames and not in others, and the average of the two kinds registers to neither (clean,
        unmoved frames came out tens of px off). The larger of the two groups — frames within half a percent of
        the field of the least clipped one, and the rest — is kept if it has two frames or more; a patch in every
        frame keeps all of them (the estimator then makes its place featureless)."""
        if len(frames) < 4:
            return frames
        hi, lo = st.range.ceiling.value, st.range.floor.value
        frac = []
        for f in frames:
            d = f.data
            n = np.count_nonzero(d >= hi) if math.isfinite(hi) else 0
            if st.range.clip_floor and math.isfinite(lo):
                n += np.count_nonzero(d <= lo)
            frac.append(n / d.size)
        frac = np.asarray(frac)
        low = frac <= frac.min() + 0.005
        keep = low if low.sum() >= (~low).sum() else ~low
        if keep.all() or keep.sum() < 2:
            return frames
        return [f for f, k in zip(frames, keep) if k]

    def _reference_valid(self, st: _Stream, reference: np.ndarray, stack: np.ndarray) -> np.ndarray | None:
        """Pixels of the reference usable for the registration, or None if all are: not clipped in half of the
        reference's frames or more, nor at the detector's ceiling in the reference itself. The estimator makes the
        rest featureless, as every frame's clipped pixels get zero weight (moving saturated cells then still
        register by their surroundings, a stationary bright patch does not capture the shift)."""
        hi, lo = st.range.ceiling.value, st.range.floor.value
        bad = (stack >= hi).mean(axis=0) >= 0.5
        if st.range.clip_floor:
            bad |= (stack <= lo).mean(axis=0) >= 0.5
        unsat = _unsaturated(reference, st.max_value)
        if unsat is not None:
            bad |= ~unsat
        if not bad.any() or bad.mean() > 0.95:
            return None
        return ~bad

    def _measure_early(self, st: _Stream, frame: Frame) -> list[dict]:
        """The row of a frame without structure before any reference exists: no motion, focus or z."""
        if st.ptc is None:
            self._init_detector(st, [frame])
        self._observe_range(st, frame)
        data = frame.data
        img = data if data.dtype.kind in "ui" and data.dtype.itemsize <= 2 else data.astype(np.float32, copy=False)
        row = dict.fromkeys(NAMES, NAN)
        row.update(frame=frame.index, channel=frame.channel, plane=frame.plane, source=frame.source,
                   page=frame.page, time_s=self._time(frame))
        sat, clip, valid = self._clipped(st, data)
        row.update(saturated_frac=sat, clipped_frac=clip)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            sigma = immerkaer_sigma(img, valid=valid) if min(img.shape) >= 3 else NAN
            row["noise_sigma"] = sigma
            vals = img if valid is None else img[valid]
            mean_raw = float(np.mean(vals, dtype=np.float64)) if vals.size else NAN
            mean_f = mean_raw - st.dark_level
            row["mean_f"] = mean_f
            row["snr"] = mean_f / sigma if sigma > 0 else NAN
            if math.isfinite(st.gain) and st.gain > 0:
                row["photons_per_px"] = (mean_raw - self._photon_dark(st, frame)) / st.gain
        if frame.index in st.pending_dark:  # sorted dark/lit with the first frames
            dark = st.pending_dark.pop(frame.index)
        else:
            dark = self._sort_dark(st, data, st.prev if st.prev_dark else None)
        if st.prev is not None and st.prev.shape == img.shape and dark == st.prev_dark:
            before = st.prev2 if st.prev2 is not None and st.prev2.shape == img.shape else None
            st.ptc.update(img, st.prev, before)  # a dark and a lit frame make no photon-transfer sample
            st.prev2 = st.prev
        else:
            st.prev2 = None
        st.prev, st.prev_shift, st.prev_dark = img, (0, 0), dark
        self._note_blank(st, frame, "before any reference: dark, flat or clipped frames, or fewer than two frames "
                                    "with structure")
        st.n_measured += 1
        return [row]

    def _note_blank(self, st: _Stream, frame: Frame, reason: str) -> None:
        if st.blank_since is None:
            st.blank_since, st.blank_reason = (frame.index, self._time(frame)), reason
        st.blank_last = (frame.index, self._time(frame), frame.channel, frame.plane)

    def _end_blank(self, st: _Stream) -> None:
        """Close a run of frames without structure: one event says which frames and why values are blank."""
        if st.blank_since is None:
            return
        (f0, t0), (f1, t1, c, p) = st.blank_since, st.blank_last
        self._events.append(Event(
            kind="blank", frame=f1, time_s=t1, started_frame=f0, started_time_s=t0, channel=c, plane=p,
            message=f"frames {f0}–{f1} without structure to measure ({st.blank_reason}): displacement, "
                    "registration, focus and z are blank there"))
        st.blank_since = None

    def _clipped(self, st: _Stream, data: np.ndarray, fmin: float | None = None,
                 fmax: float | None = None) -> tuple[float, float, np.ndarray | None]:
        """Saturated and clipped fractions, and the mask of usable pixels (None when every pixel is). With the
        frame's extremes, integer frames skip the count of a limit they do not reach, and the mask is the saturated
        pixels' inverted in place (float frames keep ``data < hi``, which also leaves NaN pixels out)."""
        hi, lo = st.range.ceiling.value, st.range.floor.value
        whole = data.dtype.kind in "ui"
        sat_mask = None
        if whole and fmax is not None and fmax < hi:
            n_sat = 0
        else:
            sat_mask = data >= hi
            n_sat = int(np.count_nonzero(sat_mask))
        n_clip = 0 if whole and fmin is not None and fmin > lo else int(np.count_nonzero(data <= lo))
        valid = None
        if n_sat or (n_clip and st.range.clip_floor):
            if not n_sat:
                valid = np.ones(data.shape, bool)
            elif whole:
                valid = np.logical_not(sat_mask, out=sat_mask)
            else:
                valid = data < hi
            if n_clip and st.range.clip_floor:
                valid &= data > lo
        return n_sat / data.size, n_clip / data.size, valid

    def _init_detector(self, st: _Stream, frames: list[Frame]) -> None:
        """Detector facts on the first frames measured: range, photon-transfer accumulator, dark level."""
        s = self.settings
        stack = np.stack([f.data for f in frames]).astype(np.float32, copy=False)
        for fr in frames:  # the detector's range from the start-up frames, before anything is measured
            self._observe_range(st, fr)
        st.max_value = st.range.ceiling.value
        # every start-up pair counts for the dark level; later pairs are thinned by the accumulator itself
        st.ptc = PhotonTransfer(max_value=st.max_value, floor=st.range.floor.value, pair_step=1)
        # frames without structure (closed shutter) give the dark level and read noise; pairs of a dark and a lit
        # frame are no photon-transfer sample
        dark = self._sort_frames(st, frames)
        st.ptc.row_step, row_step = _startup_row_step(stack.shape[1:], st.ptc.row_step), st.ptc.row_step
        for i in range(1, len(frames)):
            if dark[i] == dark[i - 1]:
                st.ptc.update(stack[i], stack[i - 1], stack[i - 2] if i >= 2 and dark[i - 2] == dark[i] else None)
        st.ptc.pair_step, st.ptc.row_step = s.photon_transfer_every, row_step
        h, w = stack.shape[1:]
        rows = max(1, _TRIPLE_SAMPLES // max(w - 2, 1))
        st.ptc.triple_row_step = min(row_step, max(_TRIPLE_ROW_STEP, (h - 2) // rows))
        self._set_dark_level(st, stack)
        st.brightness = BrightnessTracker(window_s=s.bleach_window_s)

    def _start(self, st: _Stream) -> list[dict]:
        """Build the reference (and the dark level, on first start) from the held-back frames with structure, then
        measure every held-back frame. Without two such frames (or a reference that holds nothing to register to)
        the frames are measured without motion."""
        frames, st.pending = st.pending, []
        flags, st.pending_flags = st.pending_flags, []
        st.pending_structured = 0
        st.prev_cells = None
        s = self.settings
        first = st.shift is None
        if first and st.ptc is None:
            self._init_detector(st, frames)
        elif first:  # frames without structure came first: the dark level again, now from frames with structure
            for fr in frames:
                self._observe_range(st, fr)
            # the lit frames tell dark frames from a flat, lit field; their pairs all count, as at a first start
            dark = self._sort_frames(st, frames)
            st.ptc.pair_step = 1
            st.ptc.row_step, row_step = _startup_row_step(frames[0].data.shape, st.ptc.row_step), st.ptc.row_step
            for i in range(1, len(frames)):
                if dark[i] == dark[i - 1]:
                    st.ptc.update(frames[i].data, frames[i - 1].data,
                                  frames[i - 2].data if i >= 2 and dark[i - 2] == dark[i] else None)
            st.ptc.pair_step, st.ptc.row_step = s.photon_transfer_every, row_step
            if s.dark_level is None:
                self._set_dark_level(st, np.stack([f.data for f in frames]).astype(np.float32, copy=False))
        use = [f for f, ok in zip(frames, flags) if ok]
        if len(use) < 2:  # one frame is no reference for itself: its shift would be 0 by construction
            if first:
                return [r for fr in frames for r in self._measure_early(st, fr)]
            st.new_reference_requested = False  # nothing to build a new one on: keep the old reference
            return [r for fr in frames for r in self._measure_or_wait(st, fr)]
        use = self._alike_in_clipping(st, use)
        stack = np.stack([f.data for f in use]).astype(np.float32, copy=False)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # constant frames give NaN; reported per row
            try:
                reference = build_reference(stack, upsample=s.upsample)
                max_shift = s.max_shift_px or min(reference.shape) / 4
                read_noise = NAN
                try:
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore", UserWarning)
                        res = st.ptc.result() if st.ptc is not None else None
                    if res is not None:
                        read_noise = float(res.read_noise_dn)
                except Exception:  # no photon transfer yet: the estimator falls back to its own floor
                    pass
                # the likelihood refinement models photon counts: the detector's dark level, gain and read noise
                ref_valid = self._reference_valid(st, reference, stack)
                shift = ShiftEstimator(reference, upsample=s.upsample, bin_factor=s.bin_factor,
                                       max_shift_px=max_shift, dark_level=st.dark_level, gain=st.gain,
                                       read_noise_dn=read_noise, reference_frames=len(use),
                                       reference_valid=ref_valid)
            except ValueError:  # nothing to register to (e.g. frames too small for the registration)
                if first:
                    return [r for fr in frames for r in self._measure_early(st, fr)]
                st.new_reference_requested = False
                return [r for fr in frames for r in self._measure_or_wait(st, fr)]
        st.reference, st.shift = reference, shift
        # The registration reference grows from the frames measured against it (its zero stays this one's); not
        # where a stationary clipped patch was made featureless (frames with clipped pixels never join), nor on
        # channels that take their motion from another.
        own_motion = s.motion_channel is None or st.channel == s.motion_channel
        st.grow = (ReferenceGrowth(shift, initial_frames=len(use), updates=s.reference_updates)
                   if s.reference_updates and own_motion and ref_valid is None else None)
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
        st.prev = st.prev2 = None
        rows: list[dict] = []
        for fr in frames:
            rows.extend(self._measure_or_wait(st, fr))
        return rows

    def range_state(self) -> dict:
        """Each stream's detector levels: ``{(channel, plane): (ceiling, floor, floor_is_clip)}`` (picklable), for
        :meth:`carry_range` of a copy of this engine that measures later frames (a split run's next chunk)."""
        return {k: (st.range.ceiling, st.range.floor, st.range.clip_floor)
                for k, st in self._streams.items() if st.range is not None}

    @property
    def range_log(self) -> list[tuple[int, tuple[int, int], tuple]]:
        """Every change of a stream's detector levels: ``(frame, (channel, plane), (ceiling, floor,
        floor_is_clip))`` from that frame on, in order (a split run compares and carries them between chunks)."""
        return list(self._range_log)

    def carry_range(self, state: dict) -> None:
        """Take the detector levels an engine had after the frames before this one's (:meth:`range_state`), as
        one engine measuring them all would have them: no event (the engine that found a level said so)."""
        for key, (ceiling, floor, clip) in state.items():
            st = self._streams.get(key)
            if st is None or st.range is None:
                continue
            if (st.range.ceiling, st.range.floor, st.range.clip_floor) == (ceiling, floor, clip):
                continue
            st.range.ceiling, st.range.floor, st.range.clip_floor = ceiling, floor, clip
            st.max_value = ceiling.value
            if st.ptc is not None:
                st.ptc.max_value = st.max_value
                st.ptc.floor = floor.value

    def _observe_range(self, st: _Stream, frame: Frame) -> tuple[float, float]:  # noqa: D401
        """Hand the frame's extremes to the range finder; record a level found or withdrawn. (min, max)."""
        a = frame.data
        if a.dtype.kind == "f":  # NaN pixels are ignored (fmin/fmax); all NaN gives NaN
            fmin, fmax = float(np.fmin.reduce(a, axis=None)), float(np.fmax.reduce(a, axis=None))
        else:
            fmin, fmax = float(a.min()), float(a.max())
        notes = st.range.observe(a, fmin, fmax)
        if notes:
            self._range_log.append((frame.index, (frame.channel, frame.plane),
                                    (st.range.ceiling, st.range.floor, st.range.clip_floor)))
            st.max_value = st.range.ceiling.value
            if st.ptc is not None:
                st.ptc.max_value = st.max_value
                st.ptc.floor = st.range.floor.value
            t = frame.time_s
            if not math.isfinite(t) and self.settings.frame_rate_hz:
                t = frame.index / self.settings.frame_rate_hz
            for note in notes:
                self._events.append(Event(kind="detector", frame=frame.index, time_s=t, started_frame=frame.index,
                                          started_time_s=t, channel=frame.channel, plane=frame.plane,
                                          message=f"{note}; applies from frame {frame.index} on"))
        return fmin, fmax

    def _set_dark_level(self, st: _Stream, stack: np.ndarray) -> None:
        s = self.settings
        if s.dark_level is not None:
            st.dark_level, st.dark_origin = float(s.dark_level), "option"
            return
        res = None
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)  # too few pairs (e.g. dark frames): the fallback below
                res = st.ptc.result()
        except Exception:
            res = None
        dark = st.ptc.dark.result()
        if res is not None and math.isfinite(res.gain_dn_per_photon) and res.gain_dn_per_photon > 0 \
                and not res.quality:
            st.gain = float(res.gain_dn_per_photon)
        if dark is not None:
            st.dark_level, st.dark_origin = dark[0], f"dark frames ({st.ptc.dark.n_frames} at the start)"
            return
        if not math.isnan(st.gain):
            # no dark frames: photon counting (gain well above the read noise) shows the zero-photon peak
            peak = st.ptc.find_zero_photon_peak(stack[:, ::2, ::2])
            if peak is not None:
                st.dark_level, st.dark_origin = peak[0], "zero-photon peak"
                return
        if not math.isnan(st.gain) and math.isfinite(res.dark_level_dn):
            st.dark_level = float(res.dark_level_dn)
            st.dark_origin = f"photon transfer ({res.dark_origin}, ±{res.dark_se_dn:.2g} DN)"
            return
        if not math.isnan(st.gain) and math.isfinite(res.dark_floor_dn):
            # the line's intercept alone: a lower bound, low by read noise² / gain; photons per pixel wait for a
            # dark level that can be trusted (_photon_dark)
            st.dark_level = float(res.dark_floor_dn)
            st.dark_origin = "photon-transfer line, a lower bound (read noise unknown)"
            return
        st.dark_level, st.dark_origin = float(estimate_dark_level(stack[0])), "low percentile"

    _TRUSTED_DARK = ("option", "dark frames", "zero-photon peak", "photon transfer (third cumulant")

    def _photon_dark(self, st: _Stream, frame: Frame) -> float:
        """The dark level photons per pixel are counted from: the stream's when it can be trusted, else the
        photon transfer's once it has one (third cumulant within its limit, dark frames at the end; looked for
        every 16 frame triples, said in a ``detector`` event), else NaN (photons per pixel blank: a lower bound
        of the dark level would overstate them)."""
        if math.isfinite(st.photon_dark):
            return st.photon_dark
        if st.dark_origin.startswith(self._TRUSTED_DARK):
            st.photon_dark, st.photon_dark_origin = st.dark_level, st.dark_origin
            return st.photon_dark
        if st.ptc is None or st.ptc.n_triples < st.photon_dark_checked + 16:
            return NAN
        st.photon_dark_checked = st.ptc.n_triples
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            res = st.ptc.result()
        if res.quality or not math.isfinite(res.dark_level_dn):
            return NAN
        st.photon_dark = float(res.dark_level_dn)
        st.photon_dark_origin, st.photon_dark_se = res.dark_origin, res.dark_se_dn
        t = self._time(frame)
        se = f" ± {res.dark_se_dn:.2g}" if math.isfinite(res.dark_se_dn) else ""
        self._events.append(Event(
            kind="detector", frame=frame.index, time_s=t, started_frame=frame.index, started_time_s=t,
            channel=frame.channel, plane=frame.plane,
            message=f"dark level {st.photon_dark:.1f}{se} DN from {res.dark_origin}: photons per pixel counted from "
                    f"it from frame {frame.index} on (blank before; brightness keeps the start-up level "
                    f"{st.dark_level:.1f} DN, {st.dark_origin})"))
        return st.photon_dark

    @staticmethod
    def _dark_to_carry(st: _Stream, frame: Frame) -> tuple[float, float, str] | None:
        """The dark level to carry over a brightness step (a gain or power step leaves the detector's offset as it
        was; new triples replace it once they can): photon transfer's third-cumulant level if it has one now, else
        the one photons per pixel were counted from (found before the frames of the new gain mixed into the line)."""
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            res = st.ptc.result()
        if st.ptc.carried is not None and res.dark_origin == st.ptc.carried[2]:
            return st.ptc.carried
        where = f"before the brightness step at frame {frame.index}"
        if res.dark_origin.startswith("third cumulant") and math.isfinite(res.dark_level_dn):
            return res.dark_level_dn, res.dark_se_dn, f"third cumulant, {where}"
        if math.isfinite(st.photon_dark):
            return st.photon_dark, st.photon_dark_se, f"{st.photon_dark_origin}, {where}"
        return None

    def _sort_frames(self, st: _Stream, frames: list[Frame]) -> list[bool]:
        """Sort held-back frames into dark (no structure) and lit before they are measured; their flags wait in
        ``st.pending_dark`` for :meth:`_measure`. Returns the flags."""
        dark: list[bool] = []
        prev_dark = st.prev_dark if st.prev is not None else False
        prev = st.prev if prev_dark else None
        for f in frames:
            dark.append(self._sort_dark(st, f.data, prev))
            st.pending_dark[f.index] = dark[-1]
            prev = f.data if dark[-1] else None
        st.classified_upto = max(st.classified_upto, frames[-1].index)
        return dark

    def _sort_dark(self, st: _Stream, data: np.ndarray, prev: np.ndarray | None, sigma: float = NAN) -> bool:
        """Whether a frame shows no structure (closed shutter); hands it to the dark-frame statistics or its mean to
        the lit frames'. ``prev`` is the previous frame when it was structureless too."""
        if not math.isfinite(sigma):
            sigma = immerkaer_sigma(data)
        dark = is_structureless(data, sigma)
        if dark:
            self._add_dark(st, data, prev)
        else:
            st.ptc.dark.add_lit(float(np.mean(data, dtype=np.float64)))
        return dark

    @staticmethod
    def _add_dark(st: _Stream, data: np.ndarray, prev: np.ndarray | None) -> None:
        kind = data.dtype.kind
        floor = 0 if kind == "u" else np.iinfo(data.dtype).min if kind == "i" else -np.inf
        st.ptc.dark.add(data, prev, clipped_frac=float(np.mean((data >= st.max_value) | (data <= floor))))

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
        if not math.isfinite(t) and s.frame_rate_hz:
            t = frame.index / s.frame_rate_hz
        if st.untimed is None:  # the stream's first measured frame decides the brightness tracker's clock
            st.untimed = not math.isfinite(t)
        if not math.isfinite(st.t0):
            st.t0 = t
        row["time_s"] = t  # blank (NaN) without a timestamp or a frame rate: never an assumed rate
        # The brightness tracker's clock: seconds, or without a time base frames (UNTIMED_FRAMES_PER_S a "second",
        # so that its windows hold as many frames as at a typical rate); its per-minute values are then converted
        # with the frame rate once one is known, and blank until then.
        track_t = frame.index / UNTIMED_FRAMES_PER_S if st.untimed else t

        # The metrics that read the frame's pixels come first, one after the other, while the pixels are in the
        # processor's caches. The frame binned as for the registration serves the running mean of focus and z;
        # for integer frames whose sides the binning divides (float32, exact sums of integers below 2**24) it
        # also serves the registration and gives the exact frame mean.
        factor = st.shift.bin_factor
        binned = bin_image(img, factor)
        # Saturated and floor-clipped pixels: counted, then given zero weight in every linear measurement (the
        # mask is made only on frames that reach a limit; the floor only when it is a demonstrated clip).
        fmin, fmax = self._observe_range(st, frame)
        hi, lo = st.range.ceiling.value, st.range.floor.value
        if fmax >= hi or fmin <= lo:  # most frames reach neither limit: two reductions, no counting
            sat, clip, valid = self._clipped(st, data, fmin, fmax)
        else:
            sat, clip, valid = 0.0, 0.0, None
        sigma = immerkaer_sigma(img, row_step=st.noise_row_step, valid=valid)
        # a constant frame or one mostly at a detector limit has no motion, focus or z to measure (a dark frame
        # with noise is left to the registration, whose correlation then says it found nothing)
        structured = fmax > fmin and sat + (clip if st.range.clip_floor else 0.0) <= 0.5
        if structured:
            self._end_blank(st)
        else:
            self._note_blank(st, frame, "constant frames, or more than half of the pixels at a detector limit")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # undefined values come out as NaN in the row
            mean_binned = valid_counts = None
            if valid is not None:
                n_valid = int(np.count_nonzero(valid))
                floor_out = clip > 0 and st.range.clip_floor
                if img.dtype.kind in "ui" and fmax <= hi and (not floor_out or fmin >= lo):
                    # every clipped pixel sits exactly at its limit: the usable pixels' sum is the frame's less
                    # theirs, exact in float64, without a pass that indexes the frame by the mask
                    total = float(np.add.reduce(binned if st.exact_binning else img, axis=None, dtype=np.float64))
                    usable = total - round(sat * data.size) * hi - (round(clip * data.size) * lo if floor_out else 0)
                else:
                    usable = float(np.add.reduce(img[valid], axis=None, dtype=np.float64))
                mean_raw = usable / n_valid if n_valid else NAN
                # bins holding a clipped pixel take the mean of the usable pixels in the running means
                # the mask binned once: here and in the registration's weights
                valid_counts = bin_image(valid.view(np.uint8), factor)
                full = valid_counts >= factor * factor
                fill = mean_raw * factor * factor if n_valid else 0.0
                if img.dtype.kind in "ui":  # a whole number: the running means' float32 sums stay exact (the
                    fill = round(fill)      # same in any order, so a split run's workers sum what one process does)
                binned_clean = np.where(full, binned, np.float32(fill))
            elif st.exact_binning:
                total = float(np.add.reduce(binned, axis=None, dtype=np.float64))  # exact: integer values
                mean_raw, mean_binned = total / img.size, total / binned.size
            else:
                mean_raw = float(np.add.reduce(img, axis=None, dtype=np.float64)) / img.size
            if not structured:
                res = (NAN, NAN, NAN)
                if s.motion_channel is not None and motion is None:
                    self._remember_motion(frame.index, frame.plane, res)
            elif motion is None:
                finite = img.dtype.kind in "ui" or bool(np.isfinite(binned).all())
                given = self._given.pop((frame.index, frame.channel, frame.plane), None) if self._given else None
                if given is not None and given[4] == _growth_state(st):
                    # measured by a copy of this engine in the same state (register_only): the same numbers
                    res, st.shift.out_of_range = ShiftResult(*given[:3]), given[3]
                else:
                    res = _estimate_shift(st.shift, img, binned, finite, mean_binned, valid, valid_counts)
            if structured and motion is None and st.shift.out_of_range:
                where = f"{frame.source} page {frame.page}: " if frame.source else ""
                self.problems.append(
                    f"{where}frame {frame.index} (channel {frame.channel}, plane {frame.plane}) moved beyond the "
                    f"searched range of ±{st.shift.max_shift_px:g} px; its displacement is left blank")
            if not structured:
                dy, dx, corr = res
            elif motion is None:
                dy, dx, corr = res.dy_px, res.dx_px, res.corr
                if s.motion_channel is not None:
                    self._remember_motion(frame.index, frame.plane, (dy, dx, corr))
            else:
                dy, dx, corr = motion
            row.update(dx_px=dx, dy_px=dy, reg_corr=corr)
            if st.grow is not None and structured and motion is None and valid is None and finite \
                    and not st.shift.out_of_range and not self._off_plane(st):
                st.grow.offer(binned, dy, dx, corr)  # frames fit to join the registration reference
            disp = math.hypot(dx, dy)
            row["displacement_px"] = disp
            if s.pixel_size_um:
                row["displacement_um"] = disp * s.pixel_size_um

            # focus, z and line offset from the motion-corrected running means, when a block of z_every frames is
            # complete (and at each of the first z_every frames)
            ishift = (int(round(dy)), int(round(dx))) if math.isfinite(dx) and math.isfinite(dy) else (0, 0)
            if structured:
                st.running.push(binned if valid is None else binned_clean, dy / factor, dx / factor)
                if valid is not None and st.line_clip is None:  # the window's first clipped frame: none before
                    st.line_clip = st.line_mean.zeros_like()
                st.line_mean.push(img, dy, dx)
                if st.line_clip is not None:  # which of the line offset's pixels were clipped in the window
                    st.line_clip.push(np.zeros(img.shape, np.uint8) if valid is None else (~valid).view(np.uint8),
                                      dy, dx)
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
                    line_valid = None
                    if st.line_clip is not None:  # pixels clipped in any frame of the window carry no weight
                        good = st.line_clip.mean == 0
                        if good.all():  # no clipped frame left in the window
                            st.line_clip = None
                        else:
                            line_valid = good[:k] & good[k:2 * k] & good[2 * k:]
                    st.last_line_offset = line_offset_rows(rows[:k], rows[k:2 * k], rows[2 * k:], valid=line_valid)
            if structured:
                row["focus_corr"], row["focus_measure"] = st.last_focus
                row["z_um"], row["z_corr"] = st.last_z
                row["line_offset_px"] = st.last_line_offset

            # photometry
            mean_f = mean_raw - st.dark_level
            row["mean_f"] = mean_f
            fresh = math.isfinite(track_t)
            if fresh:
                b = st.last_brightness = st.brightness.update(track_t, mean_f)
            else:  # a frame without a timestamp in a session timed by timestamps: the tracker waits
                b = st.last_brightness
            if b is not None:
                row.update(baseline_f=b.baseline_f, brightness_pct=b.brightness_pct,
                           bleach_pct_per_min=b.bleach_pct_per_min * self._per_min_scale(st),
                           level_step=b.step_factor if fresh else NAN)
            if fresh and not math.isnan(b.step_factor):
                # detector gain or laser power changed: photon transfer starts again (the dark frames stay), and
                # photons per pixel are blank until a new fit passes its checks
                dark = st.ptc.dark
                carried = self._dark_to_carry(st, frame)
                st.ptc.reset()
                st.ptc.dark = dark
                st.ptc.carried = carried
                st.ptc.pair_step = 1
                st.gain, st.refit_gain = NAN, True
            elif st.refit_gain and st.ptc.n_pairs >= 30 and st.ptc.n_pairs % 10 == 0 \
                    and st.ptc.n_pairs != st.gain_checked_pairs:
                st.gain_checked_pairs = st.ptc.n_pairs
                st.ptc.pair_step = s.photon_transfer_every
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", UserWarning)
                    res = st.ptc.result()
                if not res.quality and res.gain_dn_per_photon > 0:
                    st.gain, st.refit_gain = res.gain_dn_per_photon, False
            row.update(saturated_frac=sat, clipped_frac=clip)
            row["noise_sigma"] = sigma
            row["snr"] = mean_f / sigma if sigma > 0 else NAN
            if frame.index > st.classified_upto:  # frames of the start-up were sorted when the reference was built
                dark = _structureless_binned(binned, factor, sigma)
                if not dark:
                    st.ptc.dark.add_lit(mean_raw)
                elif st.ptc.dark.n_frames < st.ptc.dark.MAX_FRAMES:  # a pass over the frame: only while needed
                    self._add_dark(st, img, st.prev if st.prev_dark else None)
            else:
                dark = st.pending_dark.pop(frame.index, False)
            if st.prev is not None and dark == st.prev_dark:  # a dark and a lit frame make no sample
                shifts = [(ishift[0] - st.prev_shift[0], ishift[1] - st.prev_shift[1])]
                if st.prev2 is not None:  # the triple (frame before, previous, this) of one kind
                    shifts.append((ishift[0] - st.prev2_shift[0], ishift[1] - st.prev2_shift[1]))
                views = _overlap_all(img, [st.prev, st.prev2][:len(shifts)], shifts)
                if views[0].size:
                    st.ptc.update(*views)
                st.prev2, st.prev2_shift = st.prev, st.prev_shift
            else:
                st.prev2 = None
            st.prev_dark = dark
            gain = st.gain
            if math.isfinite(gain) and gain > 0:
                above = mean_raw - self._photon_dark(st, frame)
                if math.isfinite(above):
                    photons = above / gain
                    row["photons_per_px"] = photons
                    row["shot_snr"] = math.sqrt(photons) if photons > 0 else 0.0
        st.prev, st.prev_shift = img, ishift
        st.n_measured += 1
        self._tick_growth(st, report=True)
        return [row]

    def _tick_growth(self, st: _Stream, *, report: bool) -> None:
        """Count a measured frame in the stream's reference growth; at its fixed counts of frames the stream takes
        the estimator of the accumulated reference. Once the growth is settled its notes become problems
        (``report``) or are dropped (a copy that only registers: the engine measuring the frames reports them)."""
        if st.grow is None:
            return
        new = st.grow.tick()
        if new is not None:
            st.shift = new
        if st.grow.settled:
            if report:
                for note in st.grow.notes:
                    self.problems.append(f"channel {st.channel}, plane {st.plane}: {note}")
            st.grow.notes.clear()

    def _off_plane(self, st: _Stream) -> bool:
        """The last z estimate (from the start's plane) is more than one z-stack step away: the frames show
        another plane, which the registration reference of this one must not take in."""
        z = st.last_z[0]
        return st.zest is not None and math.isfinite(z) and abs(z) > float(self.settings.z_step_um)

    def references_settled(self) -> bool:
        """Every stream's registration reference is final (built, and no further update scheduled): from here on
        the rows depend on the frame and this state only (see :mod:`qcmon.monitor.split`)."""
        return bool(self._streams) and all(
            st.shift is not None and (st.grow is None or st.grow.settled) for st in self._streams.values())

    def can_register_only(self) -> bool:
        """Whether :meth:`register_only` can advance every stream of this engine (see there)."""
        s = self.settings
        return bool(self._streams) and s.zstack is None and s.motion_channel is None and all(
            st.shift is not None and not st.new_reference_requested and not st.pending and st.range is not None
            for st in self._streams.values())

    def frames_to_final(self) -> int:
        """Frames each stream still measures before every registration reference is final (the most of any)."""
        last = max((int(u) for u in self.settings.reference_updates), default=0)  # the growth's last update
        return max((max(0, last - st.grow.seen) for st in self._streams.values()
                    if st.grow is not None and not st.grow.settled), default=0)

    def register_only(self, frame: Frame) -> tuple | None:
        """Advance the registration of ``frame``'s stream as :meth:`process` would, and nothing else: no row.

        For a copy of this engine that must reach the final registration reference of a later part of the session
        without measuring every frame before it (:mod:`qcmon.monitor.split`): the frame is checked, its extremes go
        to the detector's range finder, it is binned and registered against the current reference, offered to the
        reference's growth and counted, exactly as in :meth:`_measure`; photometry, noise, the running means and
        photon transfer are left alone. Returns the registration, for :meth:`give_registrations` of an engine in
        the same state; None, with nothing changed, when the frame cannot be handled so (a stream without a
        reference yet, a reference requested anew, a changed frame size, motion taken from another channel, a
        z-stack whose estimates decide which frames join): :meth:`process` it then. Raises
        :class:`~qcmon.errors.FrameError` for a bad frame, as :meth:`process` does.
        """
        s = self.settings
        st = self._streams.get((frame.channel, frame.plane))
        data = frame.data
        if s.zstack is not None or s.motion_channel is not None or st is None or st.shift is None \
                or st.new_reference_requested or st.pending or st.range is None \
                or not isinstance(data, np.ndarray) or data.shape != st.shape or data.dtype != st.dtype:
            return None
        self._check(st, frame)  # the same size and type: only its checks of the pixels' type
        img = data if data.dtype.kind in "ui" and data.dtype.itemsize <= 2 else data.astype(np.float32, copy=False)
        factor = st.shift.bin_factor
        binned = bin_image(img, factor)
        fmin, fmax = self._observe_range(st, frame)
        hi, lo = st.range.ceiling.value, st.range.floor.value
        if fmax >= hi or fmin <= lo:
            sat, clip, valid = self._clipped(st, data, fmin, fmax)
        else:
            sat, clip, valid = 0.0, 0.0, None
        structured = fmax > fmin and sat + (clip if st.range.clip_floor else 0.0) <= 0.5
        if structured:
            self._end_blank(st)
        else:
            self._note_blank(st, frame, "constant frames, or more than half of the pixels at a detector limit")
        dy = dx = corr = NAN
        before = _growth_state(st)
        if structured:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", UserWarning)
                mean_binned = valid_counts = None
                if valid is not None:
                    valid_counts = bin_image(valid.view(np.uint8), factor)
                elif st.exact_binning:
                    mean_binned = float(np.add.reduce(binned, axis=None, dtype=np.float64)) / binned.size
                finite = img.dtype.kind in "ui" or bool(np.isfinite(binned).all())
                res = _estimate_shift(st.shift, img, binned, finite, mean_binned, valid, valid_counts)
                dy, dx, corr = res.dy_px, res.dx_px, res.corr
                if st.grow is not None and valid is None and finite and not st.shift.out_of_range:
                    st.grow.offer(binned, dy, dx, corr)
        st.prev, st.prev_shift = img, ((int(round(dy)), int(round(dx))) if math.isfinite(dx) and math.isfinite(dy)
                                       else (0, 0))
        st.prev2 = None  # photon transfer's triples start again with the frames measured in full
        st.n_measured += 1
        out = (dy, dx, corr, bool(structured and st.shift.out_of_range), before)
        self._tick_growth(st, report=False)  # the engine that measures these frames in full reports the notes
        return out

    def give_registrations(self, items) -> None:
        """Registrations of frames still to come, from :meth:`register_only` of a copy of this engine:
        ``(frame, channel, plane, registration)``. Each is used instead of registering the frame if this engine's
        reference growth is where the copy's was (else the frame is registered here); None forgets them all."""
        if items is None:
            self._given.clear()
            return
        for index, channel, plane, reg in items:
            self._given[(index, channel, plane)] = reg

    def split_digest(self) -> dict:
        """The state a later part of the session's rows depend on beyond the last few hundred frames, per stream
        (picklable, comparable): registration reference, detector levels, dark levels and gain. Two engines with
        the same digest, warmed up on the same frames, give the same rows (see :mod:`qcmon.monitor.split`)."""
        import hashlib

        out = {}
        for key, st in sorted(self._streams.items()):
            ref = None
            if st.shift is not None:  # the estimator's arrays and numbers (a pickle's bytes vary with sharing)
                h = hashlib.sha256()
                for name, v in sorted(vars(st.shift).items()):
                    h.update(name.encode())
                    h.update(v.tobytes() if isinstance(v, np.ndarray) else repr(v).encode())
                ref = h.hexdigest()
            grow = None if st.grow is None else (st.grow.frames, st.grow.joined, st.grow.settled)
            levels = None if st.range is None else (st.range.ceiling, st.range.floor, st.range.clip_floor)
            out[key] = repr((ref, st.shape, grow, levels, st.dark_level, st.dark_origin, st.gain, st.refit_gain,
                             st.photon_dark, st.photon_dark_origin, st.new_reference_requested,
                             st.untimed))  # repr: NaN equals NaN
        return out

    @property
    def frames_measured(self) -> int:
        """The fewest frames any stream has measured."""
        return min((st.n_measured for st in self._streams.values()), default=0)

    def _remember_motion(self, index: int, plane: int, motion: tuple[float, float, float]) -> None:
        key = (index, plane)
        self._shared_motion[key] = motion
        self._shared_order.append(key)
        while len(self._shared_order) > 256:
            self._shared_motion.pop(self._shared_order.popleft(), None)



#: Photon-transfer samples per start-up frame: the start-up pairs and triples read more rows than later ones (a
#: one-time cost of about 20 ms a frame), so that the dark level of the first rows can come from the third cumulant.
_STARTUP_SAMPLES = 1 << 17
#: Later frame triples (every ``photon_transfer_every``-th frame) read every ``_TRIPLE_ROW_STEP``-th row at most and
#: about ``_TRIPLE_SAMPLES`` stencils, never fewer rows than the pairs: the third cumulant needs more samples than
#: the gain, at a bounded cost (every 4th row at 256², 7th at 512², 8th at 1024²; bench_photometry).
_TRIPLE_ROW_STEP = 4
_TRIPLE_SAMPLES = 1 << 15


def _estimate_shift(shift: ShiftEstimator, img: np.ndarray, binned: np.ndarray, finite: bool, mean_binned,
                    valid, valid_counts):
    """The frame's shift: from its binned image when every pixel is finite, else from the frame itself (the
    estimator replaces non-finite pixels, and warns, before binning)."""
    if finite:
        return shift.estimate_binned(binned, mean=mean_binned, valid=valid, valid_counts=valid_counts)
    return shift.estimate(img, valid=valid)


def _growth_state(st: _Stream) -> tuple[int, int] | None:
    """Where the stream's reference growth is: frames counted and joined (None without a growth)."""
    return None if st.grow is None else (st.grow.seen, st.grow.joined)


def _startup_row_step(shape: tuple[int, ...], row_step: int, samples: int = _STARTUP_SAMPLES) -> int:
    """A row step for the accumulator giving about ``samples`` stencils a frame, never fewer rows than
    ``row_step``."""
    h, w = shape[0], shape[1]
    rows = max(1, samples // max(w - 2, 1))
    return max(1, min(row_step, (h - 2) // rows))


def _structureless_binned(binned: np.ndarray, factor: int, sigma: float) -> bool:
    """:func:`~qcmon.metrics.photon_transfer.is_structureless` on the frame binned by ``factor`` (already made for
    the registration): its variance against what the pixel noise alone leaves after binning."""
    if not math.isfinite(sigma):
        return False
    # binned further to blocks of about 8 px (cell-sized structure stays); it holds block sums: noise alone gives
    # (side)² σ² per block
    more = max(1, 8 // factor)
    sums = bin_image(binned, more) if more > 1 and min(binned.shape) >= 2 * more else binned
    side = factor * (more if sums is not binned else 1)
    return float(np.var(sums, dtype=np.float64)) <= 2.0 * max(sigma * sigma, 1.0 / 12.0) * (side * side)


def _unsaturated(reference: np.ndarray, max_value: float) -> np.ndarray | None:
    """Pixels of the reference below the detector's ceiling (a pixel saturated in its frames carries no shift
    information), or None if all are."""
    if not math.isfinite(max_value):
        return None
    ok = reference < np.float32(max_value) - 0.5
    return None if ok.all() else ok


def _overlap_all(current: np.ndarray, others: list[np.ndarray], shifts: list[tuple[int, int]]) -> list[np.ndarray]:
    """Views of ``current`` and each of ``others`` over the pixels all of them share (each moved by its shift,
    rows and columns the content moved from it to ``current``); pixels that left the field are dropped."""
    h, w = current.shape
    dys, dxs = [0] + [sh[0] for sh in shifts], [0] + [sh[1] for sh in shifts]
    r0, r1 = max(dys), h + min(dys)
    c0, c1 = max(dxs), w + min(dxs)
    if r1 <= r0 or c1 <= c0:
        return [a[:0, :0] for a in (current, *others)]
    return [current[r0:r1, c0:c1]] + [a[r0 - dy:r1 - dy, c0 - dx:c1 - dx]
                                      for a, (dy, dx) in zip(others, shifts)]
