"""Parameters of the simulated two-photon session (:class:`SimConfig`)."""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

#: How ``write_session`` lays the frames out on disk.
LAYOUTS = ("multipage", "chunks", "per_frame", "raw")

__all__ = ["SimConfig", "config_from_dict", "config_to_dict"]


@dataclass(frozen=True)
class SimConfig:
    """Every parameter of a simulated session, with units.

    Defaults describe a plausible two-photon GCaMP recording at 30 Hz with a 12-bit detector.
    The simulated specimen, motion, drift and detector are fully determined by these values and ``seed``.

    Attributes
    ----------
    n_frames : int
        Time points. Each time point holds ``planes × channels`` pages.
    height, width : int
        Frame size (px): rows, columns.
    frame_rate_hz : float
        Time points per second (Hz). With several planes the pages of one channel come at
        ``planes × frame_rate_hz`` and each plane is sampled at its own instant.
    pixel_size_um : float
        Pixel size in the specimen (µm/px), the same along rows and columns.
    channels : int
        Channel 0 carries the calcium indicator; channels 1, 2, ... are structural (no activity).
    planes : int
        Focal planes per time point, ``plane_spacing_um`` apart, plane 0 the most superficial.
    plane_spacing_um : float
        Distance between successive planes (µm, + deeper).
    seed : int
        Seed of every random draw; equal configs give identical sessions.
    cell_density_per_mm3 : float
        Somata per mm³. From memory: mouse neocortex holds roughly 0.8-1.2 × 10⁵ neurons/mm³.
    cell_diameter_um : (float, float)
        Soma diameters are drawn uniformly from this range (µm).
    nucleus_fraction : float
        Nucleus radius / soma radius. Cytosolic indicators leave the nucleus dark (ring-shaped somata).
    nucleus_brightness : float
        Brightness of the nucleus relative to the cytoplasm.
    cell_brightness_cv : float
        Coefficient of variation (log-normal) of the cells' expression level.
    cell_to_neuropil : float
        Resting brightness of cytoplasm filling the focal volume relative to the mean neuropil.
    neuropil_contrast : float
        Standard deviation / mean of the neuropil texture.
    neuropil_grain_um : float
        Lateral correlation length (Gaussian σ, µm) of the neuropil texture.
    neuropil_layer_um : float
        Axial correlation length of the neuropil texture (µm): independent texture layers this far apart,
        interpolated in between.
    neuropil_fluctuation : float
        Relative standard deviation of the slow, global neuropil fluctuation (channel 0).
    neuropil_tau_s : float
        Correlation time of that fluctuation (s).
    spike_rate_hz : float
        Mean Poisson firing rate per cell (Hz).
    ca_rest_nm : float
        Resting free calcium (nM).
    ca_per_spike_nm : float
        Peak calcium increment of one action potential (nM).
    tau_rise_s, tau_decay_s : float
        Rise and decay time constants of the calcium transient (s).
    kd_nm : float
        Dissociation constant of the indicator (nM). From memory: GCaMP6s about 144 nM, GCaMP6m about 167 nM,
        GCaMP6f about 375 nM (Chen et al. 2013, Nature 499:295).
    hill_n : float
        Hill coefficient. From memory: 2.3-3.0 for GCaMP6 variants (same source).
    dynamic_range : float
        Fmax / Fmin of the indicator (from memory: tens for GCaMP6 in vitro, same source).
    na, wavelength_um, refractive_index : float
        Objective numerical aperture, excitation wavelength (µm) and immersion refractive index; they set the
        two-photon focal volume (Zipfel, Williams & Webb 2003).
    tissue_blur_um : float
        Extra lateral Gaussian blur (σ, µm) for scattering and aberrations, added in quadrature to the PSF.
    mean_photons_per_px : float
        Mean expected detected photons per pixel of channel 0 at rest at the start (photons).
    channel_brightness : tuple of float
        Mean brightness of each channel at the start relative to ``mean_photons_per_px`` (one per channel).
    channel_neuropil : tuple of float
        Neuropil weight of each channel relative to channel 0 (structural labels show little neuropil).
    bleach_tau_min : tuple of float
        Exponential bleaching time constant per channel (min); ``inf`` for none.
    slow_drift_px : float
        Standard deviation (px) of the slow lateral wander, a mean-reverting random walk
        (Ornstein-Uhlenbeck process) with correlation time ``slow_drift_tau_s``.
    slow_drift_tau_s : float
        Correlation time of the slow wander (s).
    jitter_px : float
        Standard deviation (px) of the independent fast jitter of every page, per axis.
    jumps : tuple of (time_s, dx_px, dy_px)
        Sudden lasting displacements of the content (px) from the given time (s) on.
    bursts : tuple of (start_s, duration_s, amplitude_px)
        Periods of strong motion (e.g. the animal moving): a fast random displacement of the given standard
        deviation (px), tapered in and out, that returns to the baseline afterwards.
    margin_px : int or None
        Extra specimen around the frame (px) so that shifted content is real, never wrapped; ``None`` picks it
        from the largest displacement.
    z_drift_um_per_min : float
        Steady drift of the focal plane (µm/min, + deeper).
    z_steps : tuple of (time_s, dz_um)
        Sudden lasting focal-plane steps (µm, + deeper).
    line_offset_px : float
        Bidirectional-scan offset: odd rows' content is shifted by this many px toward increasing column
        relative to even rows (even rows by -offset/2, odd rows by +offset/2, so the frame's mean shift is
        ``dx_px``).
    bits : int
        Digitiser bit depth, 8 to 16 (stored in 16-bit pages); the maximum value is ``2**bits - 1``.
    gain_dn_per_photon : float
        Conversion gain (DN per detected photon).
    dark_dn : float
        Dark level (offset, DN).
    read_noise_dn : float
        Gaussian read noise standard deviation (DN).
    gain_change_time_s : float or None
        Time (s) at which the gain is multiplied by ``gain_change_factor``; ``None`` for no change.
    gain_change_factor : float
        Factor applied to the gain from ``gain_change_time_s`` on.
    shutter_closed_s : float
        The shutter is closed for the first ``shutter_closed_s`` seconds: no photons, only the dark level and the
        read noise (dark frames, as a session often begins). Default 0.
    saturated_patch : tuple of 6 floats, or ()
        ``(start_s, end_s, top, left, height, width)``: a stationary artefact (a light leak, a reflection) that
        saturates the detector over that part of the field (fractions of the frame) from ``start_s`` to
        ``end_s``; it does not move with the specimen. Default (): none.
    bright_cells : int
        This many somata are ``bright_cell_factor`` times brighter than the rest, so that they saturate the
        detector and move with the specimen. Default 0.
    bright_cell_factor : float
    zstack_half_planes : int
        The reference z-stack spans ``±zstack_half_planes × z_step_um`` around the starting focal plane
        (2·half + 1 planes, superficial to deep).
    z_step_um : float
        Step of the reference z-stack (µm).
    zstack_average : int
        Frames averaged per stack plane (the stack is that much less noisy; no activity, no motion).
    zstack_channel : int
        Channel the stack is acquired in.
    scenario : str
        Name of the scenario the config was made from ("" for a hand-made config); informative only.
    """

    n_frames: int = 300
    height: int = 256
    width: int = 256
    frame_rate_hz: float = 30.0
    pixel_size_um: float = 1.0
    channels: int = 1
    planes: int = 1
    plane_spacing_um: float = 25.0
    seed: int = 0
    # specimen
    cell_density_per_mm3: float = 90000.0
    cell_diameter_um: tuple[float, float] = (10.0, 15.0)
    nucleus_fraction: float = 0.55
    nucleus_brightness: float = 0.15
    cell_brightness_cv: float = 0.3
    cell_to_neuropil: float = 3.0
    neuropil_contrast: float = 0.3
    neuropil_grain_um: float = 2.0
    neuropil_layer_um: float = 4.0
    neuropil_fluctuation: float = 0.05
    neuropil_tau_s: float = 10.0
    # activity and indicator
    spike_rate_hz: float = 0.3
    ca_rest_nm: float = 50.0
    ca_per_spike_nm: float = 15.0
    tau_rise_s: float = 0.05
    tau_decay_s: float = 1.0
    kd_nm: float = 144.0
    hill_n: float = 2.9
    dynamic_range: float = 50.0
    # optics
    na: float = 0.8
    wavelength_um: float = 0.92
    refractive_index: float = 1.33
    tissue_blur_um: float = 0.6
    # brightness per channel
    mean_photons_per_px: float = 1.5
    channel_brightness: tuple[float, ...] = (1.0, 0.6)
    channel_neuropil: tuple[float, ...] = (1.0, 0.3)
    bleach_tau_min: tuple[float, ...] = (60.0, 240.0)
    # lateral motion
    slow_drift_px: float = 0.5
    slow_drift_tau_s: float = 20.0
    jitter_px: float = 0.15
    jumps: tuple[tuple[float, float, float], ...] = ()
    bursts: tuple[tuple[float, float, float], ...] = ()
    margin_px: int | None = None
    # focal plane
    z_drift_um_per_min: float = 0.0
    z_steps: tuple[tuple[float, float], ...] = ()
    # scanner
    line_offset_px: float = 0.0
    # detector
    bits: int = 12
    gain_dn_per_photon: float = 30.0
    dark_dn: float = 100.0
    read_noise_dn: float = 8.0
    gain_change_time_s: float | None = None
    gain_change_factor: float = 1.0
    shutter_closed_s: float = 0.0
    saturated_patch: tuple[float, ...] = ()
    bright_cells: int = 0
    bright_cell_factor: float = 40.0
    # reference stack
    zstack_half_planes: int = 15
    z_step_um: float = 1.0
    zstack_average: int = 16
    zstack_channel: int = 0
    scenario: str = field(default="")

    def __post_init__(self) -> None:
        _validate(self)

    # derived quantities -------------------------------------------------------------------------------
    @property
    def duration_s(self) -> float:
        """Session length (s)."""
        return self.n_frames / self.frame_rate_hz

    @property
    def n_pages(self) -> int:
        """Pages in the session: time points × planes × channels."""
        return self.n_frames * self.planes * self.channels

    @property
    def detector_max(self) -> int:
        """Largest value the detector reports (DN): ``2**bits - 1``."""
        return 2**self.bits - 1

    def replace(self, **changes) -> SimConfig:
        """A copy with some fields changed (validated again)."""
        return dataclasses.replace(self, **changes)


def _positive(name: str, value: float, *, allow_zero: bool = False) -> None:
    ok = value >= 0 if allow_zero else value > 0
    if not (isinstance(value, (int, float)) and math.isfinite(value) and ok):
        need = "non-negative" if allow_zero else "positive"
        raise ValueError(f"{name} must be a finite {need} number, got {value!r}")


def _validate(c: SimConfig) -> None:
    for name in ("n_frames", "height", "width", "channels", "planes", "zstack_average"):
        v = getattr(c, name)
        if not isinstance(v, int) or isinstance(v, bool) or v < 1:
            raise ValueError(f"{name} must be a positive integer, got {v!r}")
    if c.height < 8 or c.width < 8:
        raise ValueError(f"height and width must be at least 8 px, got {c.height} x {c.width}")
    if not isinstance(c.zstack_half_planes, int) or c.zstack_half_planes < 0:
        raise ValueError(f"zstack_half_planes must be a non-negative integer, got {c.zstack_half_planes!r}")
    for name in ("frame_rate_hz", "pixel_size_um", "plane_spacing_um", "cell_to_neuropil", "neuropil_grain_um",
                 "neuropil_layer_um", "neuropil_tau_s", "ca_rest_nm", "tau_rise_s", "tau_decay_s", "kd_nm",
                 "hill_n", "na", "wavelength_um", "refractive_index", "mean_photons_per_px",
                 "gain_dn_per_photon", "slow_drift_tau_s", "z_step_um", "gain_change_factor"):
        _positive(name, getattr(c, name))
    for name in ("cell_density_per_mm3", "nucleus_fraction", "nucleus_brightness", "cell_brightness_cv",
                 "neuropil_contrast", "neuropil_fluctuation", "spike_rate_hz", "ca_per_spike_nm",
                 "tissue_blur_um", "slow_drift_px", "jitter_px", "dark_dn", "read_noise_dn"):
        _positive(name, getattr(c, name), allow_zero=True)
    if c.tau_rise_s >= c.tau_decay_s:
        raise ValueError(f"tau_rise_s ({c.tau_rise_s}) must be shorter than tau_decay_s ({c.tau_decay_s})")
    if c.nucleus_fraction >= 1:
        raise ValueError(f"nucleus_fraction must be below 1, got {c.nucleus_fraction}")
    if c.dynamic_range <= 1:
        raise ValueError(f"dynamic_range (Fmax/Fmin) must exceed 1, got {c.dynamic_range}")
    if c.na >= c.refractive_index:
        raise ValueError(f"na ({c.na}) must be below refractive_index ({c.refractive_index})")
    lo, hi = c.cell_diameter_um
    if not (0 < lo <= hi):
        raise ValueError(f"cell_diameter_um must be (min, max) with 0 < min <= max, got {c.cell_diameter_um!r}")
    for name in ("channel_brightness", "channel_neuropil", "bleach_tau_min"):
        v = getattr(c, name)
        if len(v) < c.channels:
            raise ValueError(f"{name} needs one value per channel ({c.channels}), got {v!r}")
        for x in v[: c.channels]:
            if not (x > 0 or (name == "channel_neuropil" and x == 0)):
                raise ValueError(f"{name} values must be positive, got {v!r}")
    if isinstance(c.bits, bool) or not isinstance(c.bits, int) or not 8 <= c.bits <= 16:
        raise ValueError(f"bits must be an integer from 8 to 16, got {c.bits!r}")
    if not (math.isfinite(c.shutter_closed_s) and c.shutter_closed_s >= 0):
        raise ValueError(f"shutter_closed_s must be a non-negative number, got {c.shutter_closed_s!r}")
    if c.saturated_patch and (len(c.saturated_patch) != 6 or not all(math.isfinite(v) for v in c.saturated_patch)
                              or not all(0 <= v <= 1 for v in c.saturated_patch[2:])):
        raise ValueError("saturated_patch must be (start_s, end_s, top, left, height, width) with the last four "
                         f"fractions of the frame in 0..1, got {c.saturated_patch!r}")
    if isinstance(c.bright_cells, bool) or not isinstance(c.bright_cells, int) or c.bright_cells < 0:
        raise ValueError(f"bright_cells must be a non-negative integer, got {c.bright_cells!r}")
    if not (math.isfinite(c.bright_cell_factor) and c.bright_cell_factor > 0):
        raise ValueError(f"bright_cell_factor must be a positive number, got {c.bright_cell_factor!r}")
    if c.dark_dn >= 2**c.bits - 1:
        raise ValueError(f"dark_dn ({c.dark_dn}) must be below the detector maximum {2**c.bits - 1}")
    if not 0 <= c.zstack_channel < c.channels:
        raise ValueError(f"zstack_channel must be in 0..{c.channels - 1}, got {c.zstack_channel}")
    if c.margin_px is not None and (not isinstance(c.margin_px, int) or c.margin_px < 0):
        raise ValueError(f"margin_px must be None or a non-negative integer, got {c.margin_px!r}")
    for name, width in (("jumps", 3), ("bursts", 3), ("z_steps", 2)):
        for item in getattr(c, name):
            if len(item) != width or not all(math.isfinite(float(x)) for x in item):
                raise ValueError(f"each entry of {name} must hold {width} finite numbers, got {item!r}")
    for start, duration, amplitude in c.bursts:
        if duration <= 0 or amplitude < 0:
            raise ValueError(f"bursts need duration_s > 0 and amplitude_px >= 0, got {(start, duration, amplitude)}")
    if c.gain_change_time_s is not None and not math.isfinite(c.gain_change_time_s):
        raise ValueError(f"gain_change_time_s must be finite or None, got {c.gain_change_time_s!r}")


def config_to_dict(config: SimConfig) -> dict:
    """Plain JSON-ready dict of a config (tuples become lists, infinities become ``"inf"``)."""

    def plain(v):
        if isinstance(v, (tuple, list)):
            return [plain(x) for x in v]
        if isinstance(v, float) and math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return v

    return {f.name: plain(getattr(config, f.name)) for f in dataclasses.fields(config)}


def config_from_dict(d: dict) -> SimConfig:
    """Inverse of :func:`config_to_dict`; unknown keys raise ValueError naming them."""
    names = {f.name for f in dataclasses.fields(SimConfig)}
    unknown = sorted(set(d) - names)
    if unknown:
        raise ValueError(f"unknown SimConfig keys: {', '.join(unknown)}")

    def back(v):
        if isinstance(v, list):
            return tuple(back(x) for x in v)
        if v in ("inf", "-inf"):
            return float(v)
        return v

    return SimConfig(**{k: back(v) for k, v in d.items()})
