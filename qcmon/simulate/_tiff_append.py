"""A TIFF file that grows page by page and is valid at every moment, for the live writer.

tifffile writes a multi-page series efficiently but links the next page into the IFD chain before that
page's directory and pixels are on disk (and writes a contiguous series' directories at close), so a
reader opening the file mid-write can meet a page that is not there yet. A microscope that writes while
qcmon reads must not do that. This writer appends the pixels, then the page's directory, flushes, and only
then patches the previous "next IFD" pointer, so a reader sees only complete pages. It writes classic,
uncompressed, little-endian, one-strip uint16 pages; the OME-XML of the first page comes from
:class:`tifffile.OmeXml`.
"""

from __future__ import annotations

import os
import struct

import numpy as np

__all__ = ["AppendingTiffWriter"]

_SHORT, _LONG, _RATIONAL, _ASCII = 3, 4, 5, 2
_SIZES = {_SHORT: 2, _LONG: 4, _RATIONAL: 8, _ASCII: 1}


class AppendingTiffWriter:
    """Append uint16 pages to a new TIFF file; every page is linked only once it is complete.

    Parameters
    ----------
    path : str or os.PathLike
        New file (an existing file is replaced).
    description : str, optional
        ImageDescription of the first page (e.g. OME-XML).
    pixel_size_um : float, optional
        Written as X/Y resolution in pixels per centimetre.
    software : str
        Software tag of the first page.
    """

    def __init__(self, path, *, description: str | None = None, pixel_size_um: float | None = None,
                 software: str = "qcmon simulate"):
        self.path = os.fspath(path)
        self._fh = open(self.path, "wb")
        self._fh.write(b"II" + struct.pack("<HI", 42, 0))
        self._fh.flush()
        self._next_ptr = 4  # where the offset of the next IFD must be written
        self._description = description
        self._software = software
        self._pixel_size_um = pixel_size_um
        self.n_pages = 0

    def __enter__(self) -> AppendingTiffWriter:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        if not self._fh.closed:
            self._fh.close()

    def write_page(self, page: np.ndarray) -> None:
        """Append one (H, W) uint16 page and link it into the file."""
        page = np.ascontiguousarray(page)
        if page.ndim != 2 or page.dtype != np.uint16:
            raise ValueError(f"page must be a 2-D uint16 array, got {page.dtype} {page.shape}")
        h, w = page.shape
        data = page.astype("<u2", copy=False).tobytes()
        fh = self._fh
        fh.seek(0, os.SEEK_END)
        pos = fh.tell()
        if pos % 2:
            fh.write(b"\0")
            pos += 1
        if pos + len(data) + 4096 + len(self._description or "") > 2**32 - 1:
            raise ValueError(f"{self.path}: classic TIFF is limited to 4 GiB; write chunks instead")
        fh.write(data)
        ifd_pos = pos + len(data)
        tags: list[tuple[int, int, int, bytes]] = [
            (254, _LONG, 1, struct.pack("<I", 0)),
            (256, _LONG, 1, struct.pack("<I", w)),
            (257, _LONG, 1, struct.pack("<I", h)),
            (258, _SHORT, 1, struct.pack("<H", 16)),
            (259, _SHORT, 1, struct.pack("<H", 1)),
            (262, _SHORT, 1, struct.pack("<H", 1)),
        ]
        if self.n_pages == 0 and self._description:
            # TIFF ASCII is 7-bit: non-ASCII characters (µ) become XML character references
            text = self._description.encode("ascii", "xmlcharrefreplace") + b"\0"
            tags.append((270, _ASCII, len(text), text))
        tags += [
            (273, _LONG, 1, struct.pack("<I", pos)),
            (277, _SHORT, 1, struct.pack("<H", 1)),
            (278, _LONG, 1, struct.pack("<I", h)),
            (279, _LONG, 1, struct.pack("<I", len(data))),
        ]
        if self._pixel_size_um:
            per_cm = round(1e4 / self._pixel_size_um * 1000)
            rational = struct.pack("<II", per_cm, 1000)
            tags += [(282, _RATIONAL, 1, rational), (283, _RATIONAL, 1, rational),
                     (296, _SHORT, 1, struct.pack("<H", 3))]
        if self.n_pages == 0 and self._software:
            text = self._software.encode("ascii") + b"\0"
            tags.append((305, _ASCII, len(text), text))
        tags.append((339, _SHORT, 1, struct.pack("<H", 1)))
        tags.sort()
        n = len(tags)
        extra_pos = ifd_pos + 2 + 12 * n + 4
        entries = [struct.pack("<H", n)]
        extra = bytearray()
        for code, typ, count, value in tags:
            if len(value) <= 4:
                entries.append(struct.pack("<HHI", code, typ, count) + value.ljust(4, b"\0"))
            else:
                if (extra_pos + len(extra)) % 2:
                    extra += b"\0"
                entries.append(struct.pack("<HHII", code, typ, count, extra_pos + len(extra)))
                extra += value
        entries.append(struct.pack("<I", 0))
        fh.write(b"".join(entries) + bytes(extra))
        fh.flush()
        # the page is complete on disk: only now link it
        fh.seek(self._next_ptr)
        fh.write(struct.pack("<I", ifd_pos))
        fh.flush()
        self._next_ptr = ifd_pos + 2 + 12 * n
        self.n_pages += 1
