"""The columns of ``traces.csv``: one row per frame. Single source of truth for writers, readers and the README."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class Column:
    name: str
    unit: str
    description: str
    kind: str = "float"  # "int", "float" or "str"


COLUMNS: tuple[Column, ...] = (
    Column("frame", "", "time-point index of the frame within its channel and plane, from 0", "int"),
    Column("channel", "", "channel index, from 0", "int"),
    Column("plane", "", "plane index, from 0", "int"),
    Column("time_s", "s", "time from the session's first frame (timestamps in the files, else frame / frame rate); "
           "blank when neither is known"),
    Column("dx_px", "px", "shift of the frame's content against the reference, + toward increasing column"),
    Column("dy_px", "px", "shift of the frame's content against the reference, + toward increasing row"),
    Column("displacement_um", "µm", "hypot(dx, dy) × pixel size; blank when the pixel size is unknown"),
    Column("displacement_px", "px", "hypot(dx, dy)"),
    Column("reg_corr", "", "normalised correlation of the aligned frame with the reference (1 = identical)"),
    Column("z_um", "µm", "focal-plane offset from its position at the start, + deeper; blank without a z-stack"),
    Column("z_corr", "", "correlation of the running mean with the best-matching stack plane"),
    Column("focus_corr", "", "correlation of the motion-corrected running mean with the reference (1 = unchanged)"),
    Column("focus_measure", "", "normalised variance of the Laplacian of the running mean (sharpness), at the "
           "registration's binning (2×2 px at 512², 4×4 at 1024²)"),
    Column("mean_f", "DN", "mean pixel value above the dark level"),
    Column("baseline_f", "DN", "slow robust baseline of mean_f that neural activity does not move"),
    Column("brightness_pct", "%", "baseline_f as percent of the initial baseline"),
    Column("bleach_pct_per_min", "%/min", "bleach slope fitted to the brightness since the start (or the last "
           "step), % of initial per min; blank while too uncertain to judge"),
    Column("level_step", "", "new / old above-dark brightness at the frame where a sudden, sustained step was "
           "found (detector gain or laser power changed?); blank elsewhere"),
    Column("saturated_frac", "", "fraction of pixels at the detector maximum (0..1)"),
    Column("clipped_frac", "", "fraction of pixels clipped at the floor (0 or below)"),
    Column("noise_sigma", "DN", "Immerkær noise standard deviation, from about 32 000 pixels of the frame (every k-th row)"),
    Column("snr", "", "mean_f / noise_sigma: mean signal above dark over per-pixel noise"),
    Column("photons_per_px", "photons", "mean detected photons per pixel: mean_f / conversion gain"),
    Column("shot_snr", "", "photon-limited SNR per pixel: sqrt(photons_per_px)"),
    Column("line_offset_px", "px", "shift of odd lines against even lines (bidirectional scan), + toward increasing "
           "column; measured every z_every frames on the motion-corrected running mean, carried in between"),
    Column("source", "", "file the frame came from", "str"),
    Column("page", "", "page within that file, from 0", "int"),
)

NAMES: tuple[str, ...] = tuple(c.name for c in COLUMNS)
BY_NAME: dict[str, Column] = {c.name: c for c in COLUMNS}
