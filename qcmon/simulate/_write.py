"""Write a simulated session to disk the way a microscope does: at once, or live at the frame rate."""

from __future__ import annotations

import csv
import io
import json
import os
import time
from pathlib import Path

import numpy as np
import tifffile

from qcmon.simulate._config import LAYOUTS, SimConfig, config_to_dict
from qcmon.simulate._core import TRUTH_COLUMNS, Simulator
from qcmon.simulate._motion import planted_events
from qcmon.simulate._tiff_append import AppendingTiffWriter

__all__ = ["write_session", "LAYOUTS", "RAW_SIDECAR_KEYS"]


#: Keys of ``frames/frames.toml`` beside a raw stream ``frames/frames.raw``.
RAW_SIDECAR_KEYS = {
    "dtype": 'pixel type, always "uint16"',
    "byte_order": 'always "little"',
    "height": "rows per page (px)",
    "width": "columns per page (px)",
    "header_bytes": "bytes before the first page (0)",
    "page_order": '"time, plane, channel": for each time point, each plane, each channel one page',
    "frame_rate_hz": "time points per second (Hz)",
    "channels": "channels per time point",
    "planes": "planes per time point",
    "pixel_size_um": "pixel size (µm)",
    "plane_spacing_um": "distance between planes (µm)",
    "bits": "significant bits of the detector",
    "n_pages": "pages the session will hold when complete",
}


def _ome_metadata(c: SimConfig) -> dict:
    return {"axes": "TZCYX", "PhysicalSizeX": c.pixel_size_um, "PhysicalSizeXUnit": "µm",
            "PhysicalSizeY": c.pixel_size_um, "PhysicalSizeYUnit": "µm",
            "PhysicalSizeZ": c.plane_spacing_um, "PhysicalSizeZUnit": "µm",
            "TimeIncrement": 1.0 / c.frame_rate_hz, "TimeIncrementUnit": "s",
            "SignificantBits": c.bits}


def _ome_xml(c: SimConfig, n_frames: int) -> str:
    ome = tifffile.OmeXml()
    shape = (n_frames, c.planes, c.channels, c.height, c.width)
    ome.addimage(np.uint16, shape, (n_frames * c.planes * c.channels, 1, 1, c.height, c.width, 1),
                 **_ome_metadata(c))
    return ome.tostring(declaration=True)


def _resolution(c: SimConfig) -> dict:
    return {"resolution": (1e4 / c.pixel_size_um, 1e4 / c.pixel_size_um), "resolutionunit": "CENTIMETER"}


def _name(prefix: str, number: int, zero_pad: int) -> str:
    return f"{prefix}{number:0{zero_pad}d}.tif" if zero_pad else f"{prefix}{number}.tif"


def _packing(compression: str | None) -> dict:
    return {"compression": compression, "predictor": True} if compression else {}


def _write_zstack(sim: Simulator, path: Path, *, ome: bool, compression: str | None = None) -> None:
    c = sim.config
    stack = sim.zstack()
    if ome:
        tifffile.imwrite(path, stack, ome=True, photometric="minisblack", **_resolution(c), **_packing(compression),
                         metadata={"axes": "ZYX", "PhysicalSizeZ": c.z_step_um, "PhysicalSizeZUnit": "µm",
                                   "PhysicalSizeX": c.pixel_size_um, "PhysicalSizeXUnit": "µm",
                                   "PhysicalSizeY": c.pixel_size_um, "PhysicalSizeYUnit": "µm"})
    else:
        tifffile.imwrite(path, stack, imagej=True, **_packing(compression), resolution=(1 / c.pixel_size_um, 1 / c.pixel_size_um),
                         metadata={"axes": "ZYX", "spacing": c.z_step_um, "unit": "um"})


def _raw_sidecar(c: SimConfig) -> str:
    values = {"dtype": "uint16", "byte_order": "little", "height": c.height, "width": c.width,
              "header_bytes": 0, "page_order": "time, plane, channel", "frame_rate_hz": c.frame_rate_hz,
              "channels": c.channels, "planes": c.planes, "pixel_size_um": c.pixel_size_um,
              "plane_spacing_um": c.plane_spacing_um, "bits": c.bits, "n_pages": c.n_pages}
    lines = ["# raw stream of uint16 little-endian pages written by qcmon's simulator"]
    for k, v in values.items():
        lines.append(f'{k} = "{v}"' if isinstance(v, str) else f"{k} = {v!r}")
    return "\n".join(lines) + "\n"


def _encode_single(page: np.ndarray, c: SimConfig) -> bytes:
    buf = io.BytesIO()
    tifffile.imwrite(buf, page, photometric="minisblack", **_resolution(c))
    return buf.getvalue()


def write_session(config: SimConfig, out_dir, *, layout: str = "multipage", chunk_frames: int = 100,
                  live: bool = False, ome: bool = True, prefix: str = "run_", zero_pad: int = 5,
                  atomic: bool = True, partial_delay_s: float = 0.0, overwrite: bool = False,
                  compression: str | None = None, progress=None) -> dict:
    """Write a simulated session folder.

    Creates ``OUT/scenario.json`` (config, planted events, layout), ``OUT/zstack.tif`` (reference stack with
    its z step in OME-TIFF metadata, or ImageJ metadata when ``ome=False``), ``OUT/truth.csv`` (one row per
    page, columns :data:`TRUTH_COLUMNS`, appended and flushed page by page) and ``OUT/frames/``.

    Parameters
    ----------
    config : SimConfig
    out_dir : str or os.PathLike
        Session folder (created).
    layout : {"multipage", "chunks", "per_frame", "raw"}
        ``multipage``: one file ``run_00001.tif`` with every page. ``chunks``: files of ``chunk_frames`` time
        points each, ``run_00001.tif``, ``run_00002.tif``, ... ``per_frame``: one single-page file per page,
        numbered from 1 in acquisition order. ``raw``: ``frames.raw`` (uint16 little-endian pages, no header)
        and ``frames.toml`` (keys in :data:`RAW_SIDECAR_KEYS`).
        Pages always run time → plane → channel: for each time point, each plane, each channel one page.
    chunk_frames : int
        Time points per chunk file.
    live : bool
        Write at the real frame rate (a page is written when its acquisition ends, paced by a monotonic
        clock). Multipage and chunk files grow page by page and contain only complete pages at any moment.
    ome : bool
        Put OME-XML (pixel size, time increment, sizes T/Z/C) in multipage and chunk files.
    prefix : str
        File-name prefix.
    zero_pad : int
        Digits of the file number; 0 writes ``run_2.tif``, ``run_10.tif`` (tests natural ordering).
    atomic : bool
        Per-frame files: write to a hidden temporary name in the same folder, then rename. ``False`` writes the
        final name directly (a reader can meet a partial file), in two halves ``partial_delay_s`` apart.
    partial_delay_s : float
        Pause (s) between the two halves of a directly written per-frame file.
    compression : str, optional
        tifffile compression (e.g. "zlib", with a horizontal predictor) for the z-stack and non-live
        multipage/chunk files; ``None`` (default) writes uncompressed files.
    overwrite : bool
        Allow an existing non-empty ``OUT/frames``.
    progress : callable, optional
        Called with (pages written, total pages) after every page.

    Returns
    -------
    dict
        ``{"out_dir", "frames_dir", "files", "zstack", "truth", "scenario"}`` (paths as str).
    """
    if layout not in LAYOUTS:
        raise ValueError(f"layout must be one of {', '.join(LAYOUTS)}, got {layout!r}")
    if not isinstance(chunk_frames, int) or chunk_frames < 1:
        raise ValueError(f"chunk_frames must be a positive integer, got {chunk_frames!r}")
    if not isinstance(zero_pad, int) or zero_pad < 0:
        raise ValueError(f"zero_pad must be a non-negative integer, got {zero_pad!r}")
    c = config
    out = Path(out_dir)
    frames_dir = out / "frames"
    if frames_dir.exists() and any(frames_dir.iterdir()) and not overwrite:
        raise FileExistsError(f"{frames_dir} already holds files; choose a new folder or pass overwrite=True")
    frames_dir.mkdir(parents=True, exist_ok=True)
    sim = Simulator(c)
    meta = {"schema": 1, "scenario": c.scenario, "layout": layout, "live": live, "ome": ome,
            "compression": compression,
            "page_order": "time, plane, channel", "n_pages": c.n_pages,
            "events": planted_events(c), "config": config_to_dict(c),
            "truth_columns": [{"name": n, "unit": u, "description": d} for n, u, d in TRUTH_COLUMNS]}
    (out / "scenario.json").write_text(json.dumps(meta, indent=2, ensure_ascii=False), encoding="utf-8")
    _write_zstack(sim, out / "zstack.tif", ome=ome, compression=compression)

    pages_per_t = c.planes * c.channels
    files: list[str] = []
    names = [n for n, _, _ in TRUTH_COLUMNS]
    t0 = time.monotonic()
    page_period = 1.0 / (c.frame_rate_hz * c.planes)
    writer: AppendingTiffWriter | None = None
    raw_fh = None
    batch: list[np.ndarray] = []  # pages of the current non-live file

    def flush_batch(number: int) -> None:
        path = frames_dir / _name(prefix, number, zero_pad)
        arr = np.stack(batch).reshape(-1, c.planes, c.channels, c.height, c.width)
        if ome:
            tifffile.imwrite(path, arr, ome=True, photometric="minisblack", metadata=_ome_metadata(c),
                             **_resolution(c), **_packing(compression))
        else:
            tifffile.imwrite(path, arr.reshape(-1, c.height, c.width), photometric="minisblack",
                             **_resolution(c), **_packing(compression))
        files.append(str(path))
        batch.clear()

    if layout == "raw":
        (frames_dir / "frames.toml").write_text(_raw_sidecar(c), encoding="utf-8")
        raw_fh = open(frames_dir / "frames.raw", "wb")
        files.append(str(frames_dir / "frames.raw"))
    with open(out / "truth.csv", "w", newline="", encoding="utf-8") as truth_fh:
        tw = csv.writer(truth_fh)
        tw.writerow(names)
        try:
            for page, row in sim.iter_pages():
                i = row["page"]
                if live:
                    # a plane image is available when its acquisition ends
                    due = t0 + row["time_s"] + page_period
                    wait = due - time.monotonic()
                    if wait > 0:
                        time.sleep(wait)
                if layout == "raw":
                    raw_fh.write(page.astype("<u2", copy=False).tobytes())
                    raw_fh.flush()
                elif layout == "per_frame":
                    path = frames_dir / _name(prefix, i + 1, zero_pad)
                    data = _encode_single(page, c)
                    if atomic:
                        tmp = frames_dir / f".{path.name}.part"
                        tmp.write_bytes(data)
                        os.replace(tmp, path)
                    else:
                        with open(path, "wb") as fh:
                            fh.write(data[: len(data) // 2])
                            fh.flush()
                            if partial_delay_s > 0:
                                time.sleep(partial_delay_s)
                            fh.write(data[len(data) // 2:])
                    files.append(str(path))
                else:
                    per_file = c.n_pages if layout == "multipage" else chunk_frames * pages_per_t
                    number = i // per_file + 1
                    if live:
                        if i % per_file == 0:
                            if writer is not None:
                                writer.close()
                            path = frames_dir / _name(prefix, number, zero_pad)
                            n_t = min(chunk_frames if layout == "chunks" else c.n_frames,
                                      c.n_frames - (i // pages_per_t))
                            writer = AppendingTiffWriter(path, description=_ome_xml(c, n_t) if ome else None,
                                                         pixel_size_um=c.pixel_size_um)
                            files.append(str(path))
                        writer.write_page(page)
                    else:
                        batch.append(page)
                        if (i + 1) % per_file == 0 or i + 1 == c.n_pages:
                            flush_batch(number)
                tw.writerow([row[n] for n in names])
                truth_fh.flush()
                if progress is not None:
                    progress(i + 1, c.n_pages)
        finally:
            if writer is not None:
                writer.close()
            if raw_fh is not None:
                raw_fh.close()
    return {"out_dir": str(out), "frames_dir": str(frames_dir), "files": files,
            "zstack": str(out / "zstack.tif"), "truth": str(out / "truth.csv"),
            "scenario": str(out / "scenario.json")}
