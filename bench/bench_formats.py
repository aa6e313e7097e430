"""Archive formats: reading speed against the plain TIFF, and what lossy TIFF compression does to the numbers.

Part 1 (speed): frames per second of ``SessionSource`` reading the same frames from each format, and the ratio to
the plain uncompressed TIFF read in the same run (files in the page cache: decoding, not the disk).
Part 2 (lossy compression): ``qcmon summarize`` of the same session stored plain and with lossy codecs; the
median of ``noise_sigma``, ``snr`` and ``mean_f`` as a ratio to the plain file's, and the RMS error of the measured
displacement against the known shifts. Frames: the real specimen of ``tests/outside_data.py`` (stardist wheel),
moved by known subpixel shifts and detected through the EMVA 1288 camera model (12-bit, 2 DN/photon).

Figures are printed, never asserted. ``--frames N --size S`` (default 300 frames of 128²).
"""

from __future__ import annotations

import argparse
import csv
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import tifffile

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))


def _frames(n: int, size: int):
    from outside_data import detect, nuclei_2d, specimen_crop

    rng = np.random.default_rng(5)
    img = nuclei_2d().astype(np.float64)
    expected = img / img.max() * 60.0 + 2.0  # photons per pixel: two-photon-like, cells bright on a dim field
    shifts = rng.uniform(-3, 3, (n, 2))
    frames = np.stack([detect(specimen_crop(expected, (size, size), dy, dx, margin=8), rng, gain=2.0,
                              offset=100.0, read_noise_dn=3.0, bits=12) for dy, dx in shifts])
    return frames, shifts


def _read_rate(path: Path, repeats: int = 3, **kw) -> float:
    from qcmon.sources import SessionSource

    best = 0.0
    for _ in range(repeats):
        t0 = time.perf_counter()
        n = sum(1 for _ in SessionSource(path, **kw))
        best = max(best, n / (time.perf_counter() - t0))
    return best


def speed(frames: np.ndarray, where: Path) -> None:
    import h5py
    import zarr

    plain = where / "plain.tif"
    tifffile.imwrite(plain, frames, photometric="minisblack")
    files = {"TIFF LZW+predictor": ("lzw.tif", {}), "TIFF deflate": ("zlib.tif", {}),
             "TIFF JPEG 2000 (lossless)": ("j2k.tif", {}), "HDF5 (chunk 1 frame)": ("one.h5", {}),
             "HDF5 gzip (chunk 32 frames)": ("gz.h5", {}), "Zarr (chunk 32 frames)": ("z.zarr", {})}
    tifffile.imwrite(where / "lzw.tif", frames, photometric="minisblack", compression="lzw", predictor=True)
    tifffile.imwrite(where / "zlib.tif", frames, photometric="minisblack", compression="zlib")
    tifffile.imwrite(where / "j2k.tif", frames, photometric="minisblack", compression="jpeg2000",
                     compressionargs={"level": 0})
    with h5py.File(where / "one.h5", "w") as f:
        f.create_dataset("m", data=frames, chunks=(1,) + frames.shape[1:])
    with h5py.File(where / "gz.h5", "w") as f:
        f.create_dataset("m", data=frames, chunks=(32,) + frames.shape[1:], compression="gzip")
    z = zarr.open_array(str(where / "z.zarr"), mode="w", shape=frames.shape, chunks=(32,) + frames.shape[1:],
                        dtype=frames.dtype)
    z[:] = frames
    base = _read_rate(plain)
    print(f"plain TIFF: {base:,.0f} frames/s (reference)")
    for label, (name, kw) in files.items():
        rate = _read_rate(where / name, **kw)
        print(f"{label:30s} {rate:10,.0f} frames/s  {rate / base:5.2f}× plain TIFF")


def lossy(frames: np.ndarray, shifts: np.ndarray, where: Path) -> None:
    from qcmon.cli import main

    eight = (frames >> 4).astype(np.uint8)  # baseline JPEG is 8-bit only (ITU-T T.81)
    cases = {
        "plain 16-bit": (frames, {}),
        # imagecodecs' JPEG 2000 level is a PSNR target in dB of the 16-bit full scale: 40 dB left nothing of a
        # 12-bit signal at a few photons per pixel (every frame decoded as 0)
        "JPEG 2000 lossy 90 dB": (frames, {"compression": "jpeg2000", "compressionargs": {"level": 90}}),
        "JPEG 2000 lossy 80 dB": (frames, {"compression": "jpeg2000", "compressionargs": {"level": 80}}),
        "JPEG XR quality 0.9": (frames, {"compression": "jpegxr", "compressionargs": {"level": 0.9}}),
        "plain 8-bit": (eight, {}),
        "JPEG quality 95 (8-bit)": (eight, {"compression": "jpeg", "compressionargs": {"level": 95}}),
        "JPEG quality 75 (8-bit)": (eight, {"compression": "jpeg", "compressionargs": {"level": 75}}),
    }
    ref: dict[str, dict] = {}
    for label, (data, kw) in cases.items():
        path = where / (label.replace(" ", "_") + ".tif")
        tifffile.imwrite(path, data, photometric="minisblack", **kw)
        out = where / (path.stem + ".qcmon")
        main(["summarize", str(path), "--out", str(out), "--frame-rate", "30", "--pixel-size", "1"])
        with open(out / "traces.csv", newline="") as fh:
            rows = list(csv.DictReader(fh))
        col = {k: np.array([float(r[k]) if r[k] else np.nan for r in rows]) for k in ("noise_sigma", "snr",
                                                                                       "mean_f", "dx_px", "dy_px")}
        # displacement against the known shifts, up to the reference's own offset (median removed)
        ex = col["dx_px"] - shifts[:, 1]
        ey = col["dy_px"] - shifts[:, 0]
        err = float(np.sqrt(np.nanmean((ex - np.nanmedian(ex)) ** 2 + (ey - np.nanmedian(ey)) ** 2)))
        stats = {k: float(np.nanmedian(col[k])) for k in ("noise_sigma", "snr", "mean_f")}
        base = ref.setdefault("8" if "8-bit" in label else "16", stats)
        ratios = "  ".join(f"{k} {stats[k]:.3g} ({stats[k] / base[k]:.2f}×)" for k in stats)
        size = path.stat().st_size / data.nbytes
        print(f"{label:26s} size {size:4.2f}×  {ratios}  displacement error {err:.3f} px RMS")


def run() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--frames", type=int, default=300)
    ap.add_argument("--size", type=int, default=128)
    args, _ = ap.parse_known_args()
    frames, shifts = _frames(args.frames, args.size)
    with tempfile.TemporaryDirectory() as tmp:
        print(f"{args.frames} frames of {args.size}²")
        speed(frames, Path(tmp))
        lossy(frames, shifts, Path(tmp))


if __name__ == "__main__":
    run()
