"""The session simulator: pages in acquisition order with their ground truth."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from qcmon.simulate._activity import CalciumState, indicator_fluorescence
from qcmon.simulate._config import SimConfig
from qcmon.simulate._detector import detect
from qcmon.simulate._motion import Trajectory, make_trajectory, ornstein_uhlenbeck
from qcmon.simulate._specimen import Specimen

__all__ = ["Simulator", "SimResult", "simulate", "iter_pages", "TRUTH_COLUMNS"]

#: Ground-truth columns, one row per page: (name, unit, description).
TRUTH_COLUMNS: tuple[tuple[str, str, str], ...] = (
    ("page", "", "page index in acquisition order, from 0"),
    ("frame", "", "time-point index within its channel and plane, from 0"),
    ("time_s", "s", "acquisition instant of the plane (s from the first frame)"),
    ("channel", "", "channel, from 0 (0 carries the calcium indicator)"),
    ("plane", "", "plane, from 0 (most superficial)"),
    ("dx_px", "px", "shift of the content against the z-stack position, + toward increasing column"),
    ("dy_px", "px", "shift of the content against the z-stack position, + toward increasing row"),
    ("z_um", "µm", "focal-plane offset from its starting position, + deeper"),
    ("bleach_factor", "", "remaining fluorophore fraction exp(-t/τ)"),
    ("mean_photons_per_px", "photons", "noise-free mean detected photons per pixel"),
    ("expected_mean_f", "DN", "noise-free mean above the dark level (gain × mean photons, before clipping)"),
    ("saturated_frac", "", "fraction of pixels at the detector maximum in the noisy frame"),
    ("clipped_frac", "", "fraction of pixels clipped at 0 in the noisy frame"),
    ("line_offset_px", "px", "odd rows' content shift against even rows, + toward increasing column"),
    ("gain", "DN/photon", "conversion gain"),
    ("dark_level", "DN", "dark level (offset)"),
    ("read_noise_dn", "DN", "read noise standard deviation"),
)
_INT_COLUMNS = {"page", "frame", "channel", "plane"}

_BURN_IN_S = 10.0  # calcium history simulated before the first frame, so the session does not start quiet


class Simulator:
    """One simulated session: specimen, planted time courses and detector; pages on demand.

    Parameters
    ----------
    config : SimConfig

    Attributes
    ----------
    trajectory : Trajectory
        Planted motion, focus, gain and bleaching per (time point, plane).
    specimen : Specimen
    scale : (C,) ndarray
        Photons per relative brightness unit of each channel.
    """

    def __init__(self, config: SimConfig):
        if not isinstance(config, SimConfig):
            raise ValueError(f"config must be a SimConfig, got {type(config).__name__}")
        c = config
        self.config = c
        seeds = np.random.SeedSequence(c.seed).spawn(5)
        rng_specimen, rng_motion, rng_activity, self._rng_noise = (np.random.default_rng(s) for s in seeds[:4])
        self._stack_seed = seeds[4]
        self.trajectory: Trajectory = make_trajectory(c, rng_motion)
        tr = self.trajectory
        plane_z = np.arange(c.planes) * c.plane_spacing_um
        stack = c.zstack_half_planes * c.z_step_um
        z_lo = min(float(tr.z_um.min()), 0.0, -stack)
        z_hi = max(float(tr.z_um.max()) + plane_z[-1], stack)
        max_shift = float(max(np.abs(tr.dx_px).max() + abs(c.line_offset_px) / 2, np.abs(tr.dy_px).max()))
        self.specimen = Specimen(c, z_range_um=(z_lo, z_hi), max_shift_px=max_shift, rng=rng_specimen)
        self._plane_z = plane_z
        n_cells = self.specimen.n_cells
        self._calcium = CalciumState(n_cells, rate_hz=c.spike_rate_hz, rest_nm=c.ca_rest_nm,
                                     per_spike_nm=c.ca_per_spike_nm, tau_rise_s=c.tau_rise_s,
                                     tau_decay_s=c.tau_decay_s, rng=rng_activity)
        self._dt = 1.0 / (c.frame_rate_hz * c.planes)
        for _ in range(int(_BURN_IN_S / self._dt)):
            self._calcium.step(self._dt)
        self._np_fluct = 1.0 + ornstein_uhlenbeck(tr.time_s.size, self._dt, c.neuropil_tau_s,
                                                  c.neuropil_fluctuation, rng_activity)
        self._f_rest = self._fluor(np.array([c.ca_rest_nm]))[0]
        # scale each channel so that its resting mean at the start is mean_photons_per_px × brightness
        rest = self.specimen.render(0.0, 0.0, 0.0, self._rest_weights(bright=False), self._neuropil_weights(1.0))
        target = c.mean_photons_per_px * np.asarray(c.channel_brightness[: c.channels], dtype=float)
        self.scale = target / rest.reshape(c.channels, -1).mean(axis=1)
        self._used = False

    # helpers ---------------------------------------------------------------------------------------------
    def _fluor(self, ca: np.ndarray) -> np.ndarray:
        c = self.config
        return indicator_fluorescence(ca, kd=c.kd_nm, n=c.hill_n, f_min=1.0, f_max=c.dynamic_range)

    def _rest_weights(self, *, bright: bool = True) -> np.ndarray:
        c = self.config
        w = np.repeat((c.cell_to_neuropil * self.specimen.cell_b)[None, :], c.channels, axis=0)
        if bright and c.bright_cells:  # the somata nearest the focal plane and inside the field saturate
            w[:, self._bright_index()] *= c.bright_cell_factor
        return w

    def _bright_index(self) -> np.ndarray:
        c = self.config
        t = self.specimen.cells_table()
        inside = (t["x_px"] > 0) & (t["x_px"] < c.width) & (t["y_px"] > 0) & (t["y_px"] < c.height)
        order = np.argsort(np.where(inside, np.abs(t["z_um"]), np.inf), kind="stable")
        return order[:c.bright_cells]

    def _artefact(self, photons: np.ndarray, t_s: float, gain: float) -> np.ndarray:
        """Closed shutter (no photons) and the stationary saturated patch, at session time ``t_s``."""
        c = self.config
        if t_s < c.shutter_closed_s:
            return np.zeros_like(photons)
        if c.saturated_patch and c.saturated_patch[0] <= t_s < c.saturated_patch[1]:
            _, _, top, left, hh, ww = c.saturated_patch
            r0, c0 = int(top * c.height), int(left * c.width)
            photons = photons.copy()
            photons[r0:r0 + max(1, int(hh * c.height)), c0:c0 + max(1, int(ww * c.width))] = 2.0 * c.detector_max / gain
        return photons

    def _neuropil_weights(self, fluct: float) -> np.ndarray:
        c = self.config
        w = np.asarray(c.channel_neuropil[: c.channels], dtype=float).copy()
        w[0] *= fluct
        return w

    @property
    def cells(self) -> np.ndarray:
        """Somata (structured array, see :data:`qcmon.simulate._specimen.CELL_DTYPE`)."""
        return self.specimen.cells_table()

    @property
    def zstack_z_um(self) -> np.ndarray:
        """Depth of each z-stack plane relative to the starting focal plane (µm, + deeper)."""
        c = self.config
        return (np.arange(2 * c.zstack_half_planes + 1) - c.zstack_half_planes) * c.z_step_um

    # products --------------------------------------------------------------------------------------------
    def zstack(self) -> np.ndarray:
        """Reference z-stack (Z, H, W) uint16, superficial to deep, around the starting focal plane of plane 0.

        No activity (resting calcium), no motion, no bleaching, no line offset; the mean of
        ``zstack_average`` frames of channel ``zstack_channel`` at the initial gain.
        """
        c = self.config
        ch = c.zstack_channel
        rng = np.random.default_rng(self._stack_seed)  # the same stack on every call
        w = self._rest_weights()[ch:ch + 1]
        nw = self._neuropil_weights(1.0)[ch:ch + 1]
        out = np.empty((self.zstack_z_um.size, c.height, c.width), np.uint16)
        for i, z in enumerate(self.zstack_z_um):
            photons = self.specimen.render(float(z), 0.0, 0.0, w, nw)[0] * self.scale[ch]
            out[i] = detect(photons, gain_dn_per_photon=c.gain_dn_per_photon, dark_dn=c.dark_dn,
                            read_noise_dn=c.read_noise_dn, bits=c.bits, rng=rng, average=c.zstack_average)[0]
        return out

    def iter_pages(self) -> Iterator[tuple[np.ndarray, dict]]:
        """Pages in acquisition order (time → plane → channel) with their truth row; constant memory.

        Yields
        ------
        page : (H, W) ndarray of uint16
        truth : dict
            One value per :data:`TRUTH_COLUMNS` name.
        """
        if self._used:
            raise RuntimeError("a Simulator yields its pages once; make a new one to start again")
        self._used = True
        c = self.config
        tr = self.trajectory
        page = 0
        for t in range(c.n_frames):
            for p in range(c.planes):
                k = t * c.planes + p
                _, ca = self._calcium.step(self._dt)
                weights = self._rest_weights()
                weights[0] *= self._fluor(ca) / self._f_rest
                z = float(tr.z_um[k] + self._plane_z[p])
                images = self.specimen.render(z, float(tr.dx_px[k]), float(tr.dy_px[k]), weights,
                                              self._neuropil_weights(float(self._np_fluct[k])),
                                              line_offset_px=c.line_offset_px, slot=p)
                for ch in range(c.channels):
                    photons = images[ch] * (self.scale[ch] * tr.bleach[k, ch])
                    gain = float(tr.gain[k])
                    photons = self._artefact(photons, float(tr.time_s[k]), gain)
                    frame, sat, clip = detect(photons, gain_dn_per_photon=gain, dark_dn=c.dark_dn,
                                              read_noise_dn=c.read_noise_dn, bits=c.bits, rng=self._rng_noise)
                    mean_ph = float(photons.mean(dtype=np.float64))
                    yield frame, {
                        "page": page, "frame": t, "time_s": float(tr.time_s[k]), "channel": ch, "plane": p,
                        "dx_px": float(tr.dx_px[k]), "dy_px": float(tr.dy_px[k]), "z_um": float(tr.z_um[k]),
                        "bleach_factor": float(tr.bleach[k, ch]), "mean_photons_per_px": mean_ph,
                        "expected_mean_f": gain * mean_ph, "saturated_frac": sat, "clipped_frac": clip,
                        "line_offset_px": c.line_offset_px, "gain": gain, "dark_level": c.dark_dn,
                        "read_noise_dn": c.read_noise_dn,
                    }
                    page += 1


@dataclass
class SimResult:
    """A whole simulated session in memory.

    Attributes
    ----------
    pages : (n_pages, H, W) ndarray of uint16
        Every page in acquisition order: for each time point, for each plane, for each channel.
    truth : dict of str to ndarray
        One array per :data:`TRUTH_COLUMNS` name, one entry per page.
    zstack : (Z, H, W) ndarray of uint16
        Reference stack, superficial to deep (see :meth:`Simulator.zstack`).
    z_step_um : float
        Step between stack planes (µm).
    zstack_z_um : (Z,) ndarray
        Depth of each stack plane relative to the starting focal plane (µm, + deeper).
    cells : structured ndarray
        The somata.
    config : SimConfig
    """

    pages: np.ndarray
    truth: dict[str, np.ndarray]
    zstack: np.ndarray
    z_step_um: float
    zstack_z_um: np.ndarray
    cells: np.ndarray
    config: SimConfig

    @property
    def frames(self) -> np.ndarray:
        """View of the pages as (T, planes, channels, H, W)."""
        c = self.config
        return self.pages.reshape(c.n_frames, c.planes, c.channels, c.height, c.width)

    def frames_for(self, channel: int = 0, plane: int = 0) -> np.ndarray:
        """Frames (T, H, W) of one channel and plane (a view)."""
        c = self.config
        if not 0 <= channel < c.channels:
            raise ValueError(f"channel must be in 0..{c.channels - 1}, got {channel}")
        if not 0 <= plane < c.planes:
            raise ValueError(f"plane must be in 0..{c.planes - 1}, got {plane}")
        return self.frames[:, plane, channel]

    def truth_for(self, channel: int = 0, plane: int = 0) -> dict[str, np.ndarray]:
        """Truth rows of one channel and plane, in frame order."""
        m = (self.truth["channel"] == channel) & (self.truth["plane"] == plane)
        return {k: v[m] for k, v in self.truth.items()}


def _truth_arrays(rows: list[dict]) -> dict[str, np.ndarray]:
    return {name: np.array([r[name] for r in rows], dtype=np.int64 if name in _INT_COLUMNS else np.float64)
            for name, _, _ in TRUTH_COLUMNS}


def simulate(config: SimConfig) -> SimResult:
    """Simulate a whole session in memory.

    Parameters
    ----------
    config : SimConfig

    Returns
    -------
    SimResult
        Pages identical to those of :func:`iter_pages` for the same config.
    """
    sim = Simulator(config)
    c = config
    pages = np.empty((c.n_pages, c.height, c.width), np.uint16)
    rows = []
    for i, (page, row) in enumerate(sim.iter_pages()):
        pages[i] = page
        rows.append(row)
    return SimResult(pages=pages, truth=_truth_arrays(rows), zstack=sim.zstack(), z_step_um=c.z_step_um,
                     zstack_z_um=sim.zstack_z_um, cells=sim.cells, config=c)


def iter_pages(config: SimConfig) -> Iterator[tuple[np.ndarray, dict]]:
    """Yield ``(page, truth_row)`` in acquisition order without keeping the session in memory.

    See :meth:`Simulator.iter_pages`; use :class:`Simulator` directly to get the z-stack as well.
    """
    yield from Simulator(config).iter_pages()
