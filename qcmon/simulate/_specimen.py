"""The simulated specimen (somata in textured neuropil) and its image through the two-photon focus.

The specimen is larger than the frame by a margin. Each image is rendered on that larger field with the
objects at their true (unshifted) positions, then blurred by the lateral PSF and shifted by a Fourier phase
ramp (exact subpixel shift), and only then cropped, so shifted content entering at the frame's edges is
real specimen, never wrapped-around or periodic content.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft as sfft
from scipy.spatial import cKDTree

from qcmon.simulate._config import SimConfig
from qcmon.simulate._optics import axial_radius_um, lateral_radius_um, sphere_axial_fraction

__all__ = ["Specimen", "CELL_DTYPE"]

#: Columns of the cell table (positions on the frame's pixel grid at zero displacement).
CELL_DTYPE = np.dtype([("x_px", "f8"), ("y_px", "f8"), ("z_um", "f8"), ("radius_um", "f8"),
                       ("brightness", "f8")])


class Specimen:
    """Somata and neuropil of one session, and their noise-free image for a given focus and shift.

    Parameters
    ----------
    config : SimConfig
    z_range_um : (float, float)
        Focal depths (relative to the starting focal plane of plane 0, + deeper) the session will visit.
    max_shift_px : float
        Largest lateral displacement (px) an image will get; sets the margin when ``config.margin_px`` is None.
    rng : numpy.random.Generator
    """

    def __init__(self, config: SimConfig, *, z_range_um: tuple[float, float], max_shift_px: float,
                 rng: np.random.Generator):
        c = config
        self.config = c
        px = c.pixel_size_um
        self.w_z = axial_radius_um(c.na, c.wavelength_um, c.refractive_index)
        self.w_xy = lateral_radius_um(c.na, c.wavelength_um)
        # exp(-r²/w²) is a Gaussian of σ = w/√2; scattering blur adds in quadrature
        self.blur_sigma_px = math.hypot(self.w_xy / math.sqrt(2.0), c.tissue_blur_um) / px
        r_max_px = c.cell_diameter_um[1] / 2.0 / px
        need = math.ceil(max_shift_px + 4.0 * self.blur_sigma_px + 2.0)
        if c.margin_px is None:
            margin = max(16, math.ceil(need + r_max_px))
        else:
            margin = c.margin_px
            if margin < need:
                raise ValueError(f"margin_px={margin} is too small for displacements up to {max_shift_px:.1f} px;"
                                 f" use at least {need} or None")
        self.margin_px = margin
        self.HL = sfft.next_fast_len(c.height + 2 * margin, real=True)
        self.WL = sfft.next_fast_len(c.width + 2 * margin, real=True)
        self.oy = (self.HL - c.height) // 2
        self.ox = (self.WL - c.width) // 2
        pad = c.cell_diameter_um[1] / 2 + 4 * self.w_z + 2 * c.neuropil_layer_um
        self.z_lo = z_range_um[0] - pad
        self.z_hi = z_range_um[1] + pad
        self._make_cells(rng)
        self._make_neuropil(rng)
        ky = sfft.fftfreq(self.HL)
        kx = sfft.rfftfreq(self.WL)
        s2 = 2.0 * math.pi**2 * self.blur_sigma_px**2
        self._otf_y = np.exp(-s2 * ky**2)
        self._otf_x = np.exp(-s2 * kx**2)
        # drop the Nyquist bins: a subpixel phase ramp there has no real-valued equivalent
        if self.HL % 2 == 0:
            self._otf_y[self.HL // 2] = 0.0
        if self.WL % 2 == 0:
            self._otf_x[-1] = 0.0
        self._ky = ky
        self._kx = kx
        # frame rows 0, 2, 4, ... are "even" (bidirectional scan), whatever the crop offset
        self._even_sel = slice(0, None, 2)
        self._odd_sel = slice(1, None, 2)
        self._cache: dict[int, tuple[float, tuple]] = {}

    # construction ----------------------------------------------------------------------------------------
    def _make_cells(self, rng: np.random.Generator) -> None:
        c = self.config
        px = c.pixel_size_um
        volume_mm3 = self.HL * px * self.WL * px * (self.z_hi - self.z_lo) * 1e-9
        n = int(rng.poisson(c.cell_density_per_mm3 * volume_mm3))
        y = rng.uniform(0, self.HL, n)
        x = rng.uniform(0, self.WL, n)
        z = rng.uniform(self.z_lo, self.z_hi, n)
        radius = rng.uniform(c.cell_diameter_um[0], c.cell_diameter_um[1], n) / 2.0
        cv = c.cell_brightness_cv
        s = math.sqrt(math.log1p(cv * cv))
        bright = rng.lognormal(-0.5 * s * s, s, n) if cv > 0 else np.ones(n)
        # somata do not overlap: drop the later of two cells closer than 0.9 × the sum of their radii
        keep = np.ones(n, bool)
        if n > 1:
            pos = np.column_stack([x * px, y * px, z])
            pairs = cKDTree(pos).query_pairs(r=1.8 * c.cell_diameter_um[1] / 2.0, output_type="ndarray")
            if len(pairs):
                i, j = pairs[:, 0], pairs[:, 1]
                close = np.linalg.norm(pos[i] - pos[j], axis=1) < 0.9 * (radius[i] + radius[j])
                for a, b in pairs[close][np.argsort(pairs[close][:, 1], kind="stable")]:
                    if keep[a] and keep[b]:
                        keep[b] = False
        x, y, z, radius, bright = x[keep], y[keep], z[keep], radius[keep], bright[keep]
        self.n_cells = x.size
        self.cell_x, self.cell_y, self.cell_z = x, y, z
        self.cell_r = radius
        self.cell_b = bright
        half = math.ceil(c.cell_diameter_um[1] / 2.0 / px) + 1
        off = np.arange(-half, half + 1)
        ci = np.rint(y).astype(int)
        cj = np.rint(x).astype(int)
        rows = ci[:, None, None] + off[None, :, None]
        cols = cj[:, None, None] + off[None, None, :]
        rho = np.hypot(rows - y[:, None, None], cols - x[:, None, None]) * px
        valid = (rows >= 0) & (rows < self.HL) & (cols >= 0) & (cols < self.WL)
        rho = np.where(valid, rho, 1e9)  # outside the field: never inside a sphere
        self._rho = rho.astype(np.float32)
        self._flat = np.where(valid, rows * self.WL + cols, 0).astype(np.intp)

    def _make_neuropil(self, rng: np.random.Generator) -> None:
        c = self.config
        step = c.neuropil_layer_um
        n_layers = int(math.ceil((self.z_hi - self.z_lo) / step)) + 2
        sigma = c.neuropil_grain_um / c.pixel_size_um
        ky = sfft.fftfreq(self.HL)[:, None]
        kx = sfft.rfftfreq(self.WL)[None, :]
        filt = np.exp(-2.0 * math.pi**2 * sigma**2 * (ky**2 + kx**2))
        layers = np.empty((n_layers, self.HL, self.WL), np.float32)
        for i in range(n_layers):
            noise = rng.standard_normal((self.HL, self.WL))
            tex = sfft.irfft2(sfft.rfft2(noise) * filt, s=(self.HL, self.WL))
            tex -= tex.mean()
            tex /= tex.std()
            layers[i] = tex
        self._layers = layers

    # rendering -------------------------------------------------------------------------------------------
    def cells_table(self) -> np.ndarray:
        """The somata as a structured array (:data:`CELL_DTYPE`), positions in frame pixels at zero shift."""
        t = np.empty(self.n_cells, CELL_DTYPE)
        t["x_px"] = self.cell_x - self.ox
        t["y_px"] = self.cell_y - self.oy
        t["z_um"] = self.cell_z
        t["radius_um"] = self.cell_r
        t["brightness"] = self.cell_b
        return t

    def neuropil(self, z_um: float) -> np.ndarray:
        """Neuropil density (mean 1) on the large field at focal depth ``z_um``."""
        c = self.config
        u = (z_um - self.z_lo) / c.neuropil_layer_um
        i0 = min(max(int(math.floor(u)), 0), len(self._layers) - 2)
        f = min(max(u - i0, 0.0), 1.0)
        w0, w1 = 1.0 - f, f
        norm = math.hypot(w0, w1)
        tex = (w0 / norm) * self._layers[i0] + (w1 / norm) * self._layers[i0 + 1]
        return np.maximum(1.0 + c.neuropil_contrast * tex, 0.0)

    def geometry(self, z_um: float, *, slot: int | None = None):
        """Cells in focus at depth ``z_um``: (indices, light profiles, spectrum of the neuropil layer).

        The neuropil is excluded where somata fill the focal volume. ``slot`` caches one depth per slot
        (e.g. per plane), which saves the work while the focus does not move.
        """
        if slot is not None:
            hit = self._cache.get(slot)
            if hit is not None and hit[0] == z_um:
                return hit[1]
        c = self.config
        dz = self.cell_z - z_um
        sel = np.flatnonzero(np.abs(dz) < self.cell_r + 4.0 * self.w_z)
        rho = self._rho[sel]
        r = self.cell_r[sel, None, None]
        d = dz[sel, None, None]
        whole = sphere_axial_fraction(rho, r, d, self.w_z)
        nucleus = sphere_axial_fraction(rho, r * c.nucleus_fraction, d, self.w_z)
        light = (whole - nucleus + c.nucleus_brightness * nucleus).astype(np.float32)
        occupied = np.bincount(self._flat[sel].ravel(), weights=whole.ravel(), minlength=self.HL * self.WL)
        base = self.neuropil(z_um) * (1.0 - np.minimum(occupied, 1.0).reshape(self.HL, self.WL))
        geom = (sel, light, sfft.rfft2(base.astype(np.float32)))
        if slot is not None:
            self._cache[slot] = (z_um, geom)
        return geom

    def render(self, z_um: float, dx_px: float, dy_px: float, cell_weight: np.ndarray, neuropil_weight,
               *, line_offset_px: float = 0.0, slot: int | None = None) -> np.ndarray:
        """Noise-free image(s) of the specimen, in relative brightness units.

        Parameters
        ----------
        z_um : float
            Focal depth (µm, + deeper) relative to the starting focal plane of plane 0.
        dx_px, dy_px : float
            Shift of the content (px), + toward increasing column / row.
        cell_weight : (C, n_cells) ndarray
            Brightness of each soma's cytoplasm per channel, relative to the mean neuropil.
        neuropil_weight : (C,) array_like
            Neuropil brightness per channel.
        line_offset_px : float
            Odd rows shifted by this much more than even rows (px, + toward increasing column).
        slot : int, optional
            Cache slot for the focus geometry.

        Returns
        -------
        images : (C, H, W) ndarray of float32
        """
        sel, light, base_spec = self.geometry(z_um, slot=slot)
        cw = np.atleast_2d(cell_weight)
        nw = np.atleast_1d(np.asarray(neuropil_weight, dtype=float))
        H, W = self.config.height, self.config.width
        flat = self._flat[sel].ravel()
        ramp_y = (self._otf_y * np.exp(-2j * math.pi * self._ky * dy_px)).astype(np.complex64)[:, None]
        even_x = (self._otf_x * np.exp(-2j * math.pi * self._kx * (dx_px - line_offset_px / 2.0))).astype(np.complex64)
        odd_x = (self._otf_x * np.exp(-2j * math.pi * self._kx * (dx_px + line_offset_px / 2.0))).astype(np.complex64)
        out = np.empty((cw.shape[0], H, W), np.float32)
        for ch in range(cw.shape[0]):
            weights = (light * cw[ch, sel][:, None, None].astype(np.float32)).ravel()
            cells = np.bincount(flat, weights=weights, minlength=self.HL * self.WL).reshape(self.HL, self.WL)
            spec = sfft.rfft2(cells.astype(np.float32))
            spec += np.complex64(nw[ch]) * base_spec
            spec *= ramp_y
            rows = sfft.ifft(spec, axis=0)[self.oy:self.oy + H]
            rows[self._even_sel] *= even_x
            rows[self._odd_sel] *= odd_x
            img = sfft.irfft(rows, n=self.WL, axis=1)[:, self.ox:self.ox + W]
            np.maximum(img, 0.0, out=out[ch])
        return out
