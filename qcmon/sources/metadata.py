"""Acquisition facts read from TIFF files: OME-XML, ImageJ metadata and the TIFF resolution tags.

Sources of the rules
--------------------
- OME-TIFF: the OME Data Model and File Formats specification and its XML schema
  (https://www.openmicroscopy.org/Schemas/OME/2016-06/ome.xsd). ``Pixels`` carries ``DimensionOrder``,
  ``SizeC/Z/T``, ``PhysicalSizeX/Y/Z`` with ``PhysicalSize?Unit`` (default µm), ``TimeIncrement`` with
  ``TimeIncrementUnit`` (default s) and ``SignificantBits``; each ``Plane`` may carry ``DeltaT`` (unit
  ``DeltaTUnit``, default s) for the plane with indices ``TheC``, ``TheZ``, ``TheT``.
- TIFF resolution tags: XResolution/YResolution are pixels per ResolutionUnit, 2 = inch, 3 = centimetre, 1 = no
  absolute unit (TIFF 6.0 specification, Adobe 1992, section 8).
- ImageJ metadata: the ``key=value`` lines of the first page's ImageDescription (``channels``, ``slices``,
  ``frames``, ``spacing``, ``finterval``, ``unit``) as tifffile decodes them; with them the XResolution tag holds
  pixels per ``unit`` (from memory: documented only in the ImageJ sources).
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field

#: Length units of the OME schema (UnitsLength) and ImageJ's spellings, in µm.
LENGTH_UM = {
    "m": 1e6, "dm": 1e5, "cm": 1e4, "mm": 1e3, "µm": 1.0, "μm": 1.0, "um": 1.0, "micron": 1.0, "microns": 1.0,
    "nm": 1e-3, "pm": 1e-6, "Å": 1e-4, "in": 25400.0, "inch": 25400.0, "\\u00B5m": 1.0,
}
#: Time units of the OME schema (UnitsTime), in s.
TIME_S = {"s": 1.0, "ms": 1e-3, "µs": 1e-6, "μs": 1e-6, "us": 1e-6, "ns": 1e-9, "ps": 1e-12, "min": 60.0,
          "h": 3600.0, "d": 86400.0}
#: Micrometres per TIFF ResolutionUnit (TIFF 6.0: 2 = inch, 3 = centimetre).
RESOLUTION_UNIT_UM = {2: 25400.0, 3: 10000.0}
#: 72 and 96 pixels per inch are the screen defaults many writers store without measuring anything
#: (common practice, no source); such tags are not taken as a pixel size.
SCREEN_DPI = (72.0, 96.0)

OME = "OME-TIFF"
RESOLUTION = "TIFF resolution tag"
IMAGEJ = "ImageJ metadata"


@dataclass(slots=True)
class FileMetadata:
    """What one file says about the acquisition.

    Attributes
    ----------
    facts : dict
        ``key -> (value, origin)`` with the keys of :class:`qcmon.frames.AcquisitionFacts`.
    plane_fastest : bool or None
        True when planes vary faster than channels within a time point (OME ``XYZCT``), False for channel
        fastest (``XYCZT``, ImageJ), None when the file does not say.
    sizes : (int, int, int) or None
        (channels, planes, time points) the file declares.
    delta_t : dict
        ``(channel, plane, time point) -> seconds`` from OME ``Plane/@DeltaT``.
    notes : list of str
        Metadata that was present but could not be used (says why).
    declared_pages : int or None
        Pages the file says it holds (ImageJ ``images``; OME ``TiffData/@PlaneCount`` of a one-file dataset, else
        ``SizeC × SizeZ × SizeT``); None when it does not say or the dataset spans several files.
    """

    facts: dict[str, tuple[object, str]] = field(default_factory=dict)
    plane_fastest: bool | None = None
    sizes: tuple[int, int, int] | None = None
    delta_t: dict[tuple[int, int, int], float] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    declared_pages: int | None = None

    def drop_layout(self, why: str) -> None:
        """Forget the channels and planes the file declares (they contradict the file): one of each, noted."""
        dropped = [f"{self.facts.pop(k)[0]} {k}" for k in ("channels", "planes")
                   if k in self.facts and self.facts[k][1] != "option"]
        self.sizes = None
        self.delta_t.clear()
        self.declared_pages = None
        self.notes.append(f"{why}; its layout ({', '.join(dropped) or 'sizes'}) is not used: one channel and one "
                          "plane per page unless --channels/--planes say otherwise")

    def put(self, key: str, value, origin: str) -> None:
        if value is not None and key not in self.facts:
            self.facts[key] = (value, origin)

    def timestamp(self, page: int) -> float:
        """Seconds of ``DeltaT`` for the file's ``page`` (0-based), NaN when unknown."""
        if not self.delta_t or self.sizes is None:
            return math.nan
        c_n, z_n, t_n = self.sizes
        if self.plane_fastest:
            z, c, t = page % z_n, (page // z_n) % c_n, page // (z_n * c_n)
        else:
            c, z, t = page % c_n, (page // c_n) % z_n, page // (c_n * z_n)
        return self.delta_t.get((c, z, t), math.nan)


def read_file_metadata(tif) -> FileMetadata:
    """Facts from an open :class:`tifffile.TiffFile`, reading only its first page.

    OME-XML is preferred, then ImageJ metadata, then the plain TIFF tags, fact by fact.
    """
    meta = FileMetadata()
    page = tif.pages.first
    if tif.is_ome:
        _read_ome(tif.ome_metadata, meta)
    if tif.is_imagej:
        _read_imagej(tif.imagej_metadata or {}, page, meta)
    _read_resolution(page, meta)
    if page.dtype is not None:  # a corrupt page may have no pixel type; it is reported when read
        meta.put("dtype", str(page.dtype), "TIFF tags")
    meta.put("compression", getattr(page.compression, "name", str(page.compression)), "TIFF tags")
    meta.put("shape", tuple(int(n) for n in page.shape), "TIFF tags")
    return meta


def _local(tag: str) -> str:
    return tag.rsplit("}", 1)[-1]


def _length_um(value: str | None, unit: str | None, what: str, meta: FileMetadata) -> float | None:
    if value is None:
        return None
    unit = "µm" if unit is None else unit
    scale = LENGTH_UM.get(unit)
    try:
        number = float(value)
    except ValueError:
        meta.notes.append(f"OME {what}={value!r} is not a number")
        return None
    if scale is None:
        meta.notes.append(f"OME {what} has unit {unit!r}, which is not a length in µm")
        return None
    if not (number > 0 and math.isfinite(number)):
        meta.notes.append(f"OME {what}={value} is not a positive length")
        return None
    return number * scale


def _time_s(value: str | None, unit: str | None) -> float | None:
    if value is None:
        return None
    scale = TIME_S.get("s" if unit is None else unit)
    try:
        number = float(value)
    except ValueError:
        return None
    return None if scale is None or not math.isfinite(number) else number * scale


def _read_ome(xml: str | None, meta: FileMetadata) -> None:
    if not xml:
        return
    try:
        root = ET.fromstring(xml)
    except ET.ParseError as exc:
        meta.notes.append(f"OME-XML cannot be parsed: {exc}")
        return
    pixels = next((el for el in root.iter() if _local(el.tag) == "Pixels"), None)
    if pixels is None:
        meta.notes.append("OME-XML has no Pixels element")
        return
    a = pixels.attrib
    meta.put("pixel_size_um", _length_um(a.get("PhysicalSizeX"), a.get("PhysicalSizeXUnit"), "PhysicalSizeX", meta), OME)
    size_y = _length_um(a.get("PhysicalSizeY"), a.get("PhysicalSizeYUnit"), "PhysicalSizeY", meta)
    meta.put("pixel_size_y_um", size_y, OME)
    meta.put("z_step_um", _length_um(a.get("PhysicalSizeZ"), a.get("PhysicalSizeZUnit"), "PhysicalSizeZ", meta), OME)
    increment = _time_s(a.get("TimeIncrement"), a.get("TimeIncrementUnit"))
    if increment is not None and increment > 0:
        meta.put("frame_rate_hz", 1.0 / increment, OME)
    elif a.get("TimeIncrement") is not None:
        meta.notes.append(f"OME TimeIncrement={a.get('TimeIncrement')!r} is not a positive time; not used as the "
                          "frame interval")
    try:
        sizes = tuple(int(a.get(k, "1")) for k in ("SizeC", "SizeZ", "SizeT"))
    except ValueError:
        sizes = None
        meta.notes.append("OME SizeC/SizeZ/SizeT are not whole numbers; not used")
    if sizes is not None and min(sizes) < 1:
        meta.notes.append(f"OME SizeC/SizeZ/SizeT = {sizes} are not all positive; not used")
        sizes = None
    if sizes is not None:
        meta.sizes = sizes
        meta.put("channels", sizes[0], OME)
        meta.put("planes", sizes[1], OME)
        meta.declared_pages = _ome_pages(pixels, sizes)
        if meta.declared_pages is not None and meta.declared_pages != sizes[0] * sizes[1] * sizes[2]:
            meta.drop_layout(f"OME SizeC={sizes[0]} × SizeZ={sizes[1]} × SizeT={sizes[2]} is not the "
                             f"{meta.declared_pages} pages its TiffData elements list")
        spp = [int(el.attrib.get("SamplesPerPixel", "1")) for el in pixels if _local(el.tag) == "Channel"
               and el.attrib.get("SamplesPerPixel", "1").isdigit()]
        if meta.sizes is not None and sizes[0] > 1 and spp and max(spp) > 1:
            # the channels are samples within each page (RGB-like), not pages of their own
            meta.sizes = (max(1, sizes[0] // max(spp)), sizes[1], sizes[2])
            meta.facts["channels"] = (meta.sizes[0], OME)
            meta.declared_pages = None
    if "SignificantBits" in a:
        try:
            meta.put("bit_depth", int(a["SignificantBits"]), OME)
        except ValueError:
            pass
    order = a.get("DimensionOrder", "XYCZT")
    if order in ("XYCZT", "XYZCT"):
        meta.plane_fastest = order == "XYZCT"
    else:
        meta.notes.append(f"OME DimensionOrder {order} puts time before channels or planes; pages are taken in "
                          "time -> plane -> channel order instead")
        meta.plane_fastest = False
    meta.facts.setdefault("dimension_order", (order, OME))
    for el in pixels:
        if _local(el.tag) != "Plane":
            continue
        p = el.attrib
        t = _time_s(p.get("DeltaT"), p.get("DeltaTUnit"))
        if t is None:
            continue
        try:
            key = (int(p.get("TheC", 0)), int(p.get("TheZ", 0)), int(p.get("TheT", 0)))
        except ValueError:
            continue
        meta.delta_t[key] = t
    _check_delta_t(meta)


def _ome_pages(pixels, sizes: tuple[int, int, int]) -> int | None:
    """Pages an OME-TIFF file holds by its own account; None when its dataset spans several files."""
    tiffdata = [el for el in pixels if _local(el.tag) == "TiffData"]
    if any(_local(child.tag) == "UUID" for el in tiffdata for child in el):
        return None  # a dataset over several files: this file holds only part of it
    counts = [el.attrib.get("PlaneCount") for el in tiffdata]
    if tiffdata and all(c is not None and c.isdigit() for c in counts):
        return sum(int(c) for c in counts)
    return sizes[0] * sizes[1] * sizes[2]


def _check_delta_t(meta: FileMetadata) -> None:
    """OME ``DeltaT`` must increase from one time point to the next of each channel and plane; else none is used."""
    by_stream: dict[tuple[int, int], list[tuple[int, float]]] = {}
    for (c, z, t), value in meta.delta_t.items():
        by_stream.setdefault((c, z), []).append((t, value))
    for (c, z), pts in by_stream.items():
        pts.sort()
        for (t0, v0), (t1, v1) in zip(pts, pts[1:]):
            if not v1 > v0:
                meta.notes.append(f"OME Plane DeltaT does not increase with time (channel {c}, plane {z}: "
                                  f"{v0:g} s at time point {t0}, {v1:g} s at {t1}); no DeltaT is used")
                meta.delta_t.clear()
                return


def _read_imagej(ij: dict, page, meta: FileMetadata) -> None:
    unit = ij.get("unit")
    scale = LENGTH_UM.get(unit) if isinstance(unit, str) else None
    spacing = _number(ij.get("spacing"))
    if spacing is not None and scale is not None:
        if spacing > 0:
            meta.put("z_step_um", spacing * scale, IMAGEJ)
        else:
            meta.notes.append(f"ImageJ spacing={ij.get('spacing')!r} is not a positive length; not used as z step")
    if scale is not None:
        xres = _rational(page, 282)
        if xres:
            meta.put("pixel_size_um", scale / xres, RESOLUTION)
            yres = _rational(page, 283)
            if yres:
                meta.put("pixel_size_y_um", scale / yres, RESOLUTION)
    finterval, fps = _number(ij.get("finterval")), _number(ij.get("fps"))
    if finterval is not None and finterval > 0:
        meta.put("frame_rate_hz", 1.0 / finterval, IMAGEJ)
    elif fps is not None and fps > 0:
        meta.put("frame_rate_hz", fps, IMAGEJ)
    for key, value in (("finterval", finterval), ("fps", fps)):
        if key in ij and not (value is not None and value > 0):
            meta.notes.append(f"ImageJ {key}={ij[key]!r} is not a positive number; not used for the frame rate")
    counts = {k: _number(ij.get(k, 1)) for k in ("channels", "slices", "frames", "images")}
    bad = [k for k, v in counts.items() if k in ij and not (v is not None and v >= 1 and v == int(v))]
    if bad:
        meta.notes.append("ImageJ " + ", ".join(f"{k}={ij[k]!r}" for k in bad) + " not a positive whole number; "
                          "the file's channels and slices are not used")
        return
    channels, slices, frames = (int(counts[k]) for k in ("channels", "slices", "frames"))
    meta.put("channels", channels, IMAGEJ)
    meta.put("planes", slices, IMAGEJ)
    if "images" in ij and channels * slices > 1:
        meta.declared_pages = int(counts["images"])
        if (channels * slices * frames != meta.declared_pages if "frames" in ij
                else meta.declared_pages % (channels * slices)):
            meta.drop_layout(f"ImageJ channels={channels} × slices={slices} × frames={frames} is not "
                             f"images={meta.declared_pages}")
            return
    if meta.sizes is None:
        meta.sizes = (channels, slices, frames)
        meta.plane_fastest = False  # ImageJ hyperstacks store channel fastest (czt order)


def _number(value) -> float | None:
    """A finite number from an ImageJ value (number or text), else None."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def _rational(page, code: int) -> float | None:
    value = page.tags.valueof(code)
    if value is None:
        return None
    try:
        number = value[0] / value[1] if isinstance(value, tuple) else float(value)
    except (ZeroDivisionError, TypeError, IndexError):
        return None
    return number if number > 0 and math.isfinite(number) else None


def _read_resolution(page, meta: FileMetadata) -> None:
    unit = page.tags.valueof(296, default=2)  # TIFF 6.0: ResolutionUnit defaults to inch
    unit_um = RESOLUTION_UNIT_UM.get(int(unit))
    xres = _rational(page, 282)
    if unit_um is None or xres is None:
        return
    if int(unit) == 2 and xres in SCREEN_DPI:
        meta.notes.append(f"XResolution {xres:g} pixels per inch looks like a screen default; not used as pixel size")
        return
    meta.put("pixel_size_um", unit_um / xres, RESOLUTION)
    yres = _rational(page, 283)
    if yres is not None:
        meta.put("pixel_size_y_um", unit_um / yres, RESOLUTION)
