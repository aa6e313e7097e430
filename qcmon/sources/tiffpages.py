"""Pages of a TIFF file that may still be growing, handed on only when complete.

The reader walks the chain of image file directories (IFDs) itself, with a minimal parse of each IFD: the
number of tags, each tag's type, count and value (or value offset), and the pointer to the next IFD (TIFF 6.0
specification, Adobe 1992, section 2 "TIFF Structure"; BigTIFF: the 2008 BigTIFF design note of the LibTIFF
project, 8-byte offsets and counts). A page is complete when its IFD, every out-of-line tag value and every strip
or tile it points to lie inside the current file size. Only then is it decoded, by tifffile.

The minimal parse does two jobs that tifffile's full page parse (about 0.2 ms a page) would make slow on a
session of 100 000 pages: it checks completeness, and it gives a *structure fingerprint* (the tags that decide how
pixels are decoded). Pages whose fingerprint equals that of the last fully parsed page are decoded as light-weight
:class:`tifffile.TiffFrame` objects that share that page's decoding; any other page is parsed in full by
:class:`tifffile.TiffPage` and checked again.

The file is opened read-only for one batch of pages and closed again; nothing is ever written, renamed or locked.

tifffile reports what it tolerates (an invalid tag it skips, a count it corrects) through :mod:`logging`, which
without a handler prints to the terminal, over the dashboard. qcmon decides itself what is a problem (a page that
cannot be measured is reported as one, naming file and page), so these messages go to qcmon's own logger
``qcmon.reader`` at DEBUG level and are never printed raw.
"""

from __future__ import annotations

import logging
import os
import struct
from dataclasses import dataclass

import tifffile

from qcmon.errors import FrameError, NotReadyError
from qcmon.sources._drain import drain


class _LibraryMessages(logging.Handler):
    """Passes tifffile's log records to ``qcmon.reader`` at DEBUG level (see the module docstring)."""

    def emit(self, record: logging.LogRecord) -> None:
        logging.getLogger("qcmon.reader").debug("tifffile: %s", record.getMessage())


def _route_library_logging() -> None:
    lib = logging.getLogger("tifffile")
    if not any(isinstance(h, _LibraryMessages) for h in lib.handlers):
        lib.addHandler(_LibraryMessages())
    lib.propagate = False


_route_library_logging()

#: Size in bytes of one value of each TIFF field type (TIFF 6.0 section 2; BigTIFF adds 16, 17, 18).
_TYPE_SIZES = {1: 1, 2: 1, 3: 2, 4: 4, 5: 8, 6: 1, 7: 1, 8: 2, 9: 4, 10: 8, 11: 4, 12: 8, 13: 4, 16: 8, 17: 8, 18: 8}
#: struct codes of the integer types that can hold offsets and byte counts.
_INT_FORMATS = {3: "H", 4: "I", 13: "I", 16: "Q", 18: "Q"}
#: Tags that decide how a page's pixels are decoded (TIFF 6.0 baseline and extension tags): NewSubfileType,
#: SubfileType, ImageWidth, ImageLength, BitsPerSample, Compression, Photometric, FillOrder, SamplesPerPixel,
#: RowsPerStrip, PlanarConfiguration, Predictor, TileWidth, TileLength, ExtraSamples, SampleFormat, JPEGTables,
#: YCbCrSubSampling, ReferenceBlackWhite.
_STRUCTURE_TAGS = frozenset({254, 255, 256, 257, 258, 259, 262, 266, 277, 278, 284, 317, 322, 323, 338, 339, 347, 530, 532})
_STRIP_OFFSETS, _STRIP_COUNTS, _TILE_OFFSETS, _TILE_COUNTS = 273, 279, 324, 325
_MAX_TAGS = 4096  # the same sanity limit as tifffile


class TiffHeader:
    """Byte order and offset sizes of a classic TIFF or BigTIFF file (fields precomputed: read per page)."""

    __slots__ = ("byteorder", "bigtiff", "first_pointer", "offset_format", "offset_size", "tagno_format",
                 "tagno_size", "tag_size", "tag_head_format")

    def __init__(self, byteorder: str, bigtiff: bool):
        self.byteorder = byteorder  # "<" or ">"
        self.bigtiff = bigtiff
        self.first_pointer = 8 if bigtiff else 4  # file position of the offset of the first IFD
        self.offset_format = byteorder + ("Q" if bigtiff else "I")
        self.offset_size = 8 if bigtiff else 4
        self.tagno_format = byteorder + ("Q" if bigtiff else "H")
        self.tagno_size = 8 if bigtiff else 2
        self.tag_size = 20 if bigtiff else 12
        self.tag_head_format = byteorder + ("HHQ" if bigtiff else "HHI")


def read_header(fh, size: int, path: str) -> TiffHeader:
    """Parse the TIFF header of an open file.

    Raises
    ------
    NotReadyError
        The file is shorter than a header (it may still be being written).
    FrameError
        The first bytes are not a TIFF header.
    """
    if size < 8:
        raise NotReadyError(f"only {size} bytes, shorter than a TIFF header")
    fh.seek(0)
    head = fh.read(16)
    order = {b"II": "<", b"MM": ">"}.get(head[:2])
    if order is None:
        raise FrameError("not a TIFF file (the first bytes are not a TIFF header)", path=path)
    version = struct.unpack(order + "H", head[2:4])[0]
    if version == 42:
        return TiffHeader(order, False)
    if version == 43:
        if size < 16:
            raise NotReadyError(f"only {size} bytes, shorter than a BigTIFF header")
        return TiffHeader(order, True)
    raise FrameError(f"not a TIFF file (version {version}, expected 42 or 43)", path=path)


@dataclass(frozen=True, slots=True)
class IfdInfo:
    """What the minimal parse learns of one IFD."""

    offset: int  # file position of the IFD
    next_pointer: int  # file position of the offset of the next IFD
    fingerprint: tuple
    reduced: bool  # NewSubfileType says "reduced-resolution image" (a thumbnail, not a frame)
    dataoffsets: tuple[int, ...]
    databytecounts: tuple[int, ...]
    #: For a page of one strip: ``(bytes before, bytes after, position, struct format)`` of the StripOffsets value
    #: in the IFD's tag bytes. A next IFD whose tag bytes differ from these only there is the same page but for
    #: where its pixels lie (the usual case: every page of a session written alike), and need not be parsed.
    template: tuple | None = None


def read_pointer(fh, header: TiffHeader, position: int, size: int) -> int:
    """The IFD offset stored at ``position``; raise NotReadyError when it lies beyond the end of the file."""
    if position + header.offset_size > size:
        raise NotReadyError(f"the pointer to the next page at byte {position} is not written yet")
    fh.seek(position)
    return struct.unpack(header.offset_format, fh.read(header.offset_size))[0]


def read_ifd(fh, header: TiffHeader, offset: int, size: int, *, full: bool = True, like: IfdInfo | None = None
             ) -> IfdInfo:
    """Minimal parse of the IFD at ``offset``, checking that it and the data it points to are inside the file.

    With ``full=False`` only the position of the next pointer is found (to pass over consumed pages on resume).
    With ``like`` (the result for an earlier page of the same read, with a ``template``), an IFD whose tag bytes
    equal that page's but for the offset of its one strip is not parsed again: it has the same tags, values and
    out-of-line values (found inside the file for that page, at the same file size) and the same fingerprint.

    Raises
    ------
    NotReadyError
        Part of the IFD, of its out-of-line values or of its image data lies beyond ``size`` bytes.
    FrameError
        The IFD is corrupt (no tags, an absurd tag count, no image data offsets).
    """
    if offset < 8:
        raise FrameError(f"page offset {offset} points into the TIFF header (corrupt file)")
    if offset + header.tagno_size > size:
        raise NotReadyError(f"the page directory at byte {offset} is not written yet")
    fh.seek(offset)
    tagno = struct.unpack(header.tagno_format, fh.read(header.tagno_size))[0]
    if tagno == 0:
        # zeros: space reserved by the writer and not filled yet, or a corrupt file
        raise NotReadyError(f"the page directory at byte {offset} is empty (not written yet?)")
    if tagno > _MAX_TAGS:
        raise FrameError(f"page directory at byte {offset} claims {tagno} tags (corrupt file)")
    nbytes = header.tag_size * tagno
    next_pointer = offset + header.tagno_size + nbytes
    if next_pointer + header.offset_size > size:
        raise NotReadyError(f"the page directory at byte {offset} is not completely written yet")
    if not full:
        return IfdInfo(offset, next_pointer, (), False, (), ())
    buf = fh.read(nbytes)
    bo = header.byteorder
    if like is not None and like.template is not None:
        before, after, pos, fmt = like.template
        if (len(buf) == len(before) + len(after) + header.offset_size and buf.startswith(before)
                and buf.endswith(after)):
            start = struct.unpack_from(fmt, buf, pos)[0]
            if start + like.databytecounts[0] > size:
                raise NotReadyError(f"image data ends at byte {start + like.databytecounts[0]} but the file has "
                                    f"{size} bytes (still being written?)")
            return IfdInfo(offset, next_pointer, like.fingerprint, like.reduced, (start,), like.databytecounts,
                           like.template)
    head_format = header.tag_head_format
    inline, tag_size = header.offset_size, header.tag_size
    fingerprint = []
    values: dict[int, tuple[int, ...]] = {}
    reduced = False
    strip_at = None
    for i in range(tagno):
        start = i * tag_size
        code, dtype, count = struct.unpack_from(head_format, buf, start)
        value = buf[start + tag_size - inline : start + tag_size]
        length = count * _TYPE_SIZES.get(dtype, 1)
        value_offset = None
        if length > inline:
            value_offset = struct.unpack(header.offset_format, value)[0]
            if value_offset + length > size:
                raise NotReadyError(f"a value of the page directory at byte {offset} is not written yet")
        if code in _STRUCTURE_TAGS:
            fingerprint.append((code, dtype, count, value))
            if code == 254 and dtype in _INT_FORMATS and count == 1:
                reduced = bool(_ints(fh, bo, dtype, count, value, value_offset)[0] & 1)
        elif code in (_STRIP_OFFSETS, _STRIP_COUNTS, _TILE_OFFSETS, _TILE_COUNTS):
            if dtype not in _INT_FORMATS:
                raise FrameError(f"tag {code} of the page directory at byte {offset} has type {dtype}")
            values[code] = _ints(fh, bo, dtype, count, value, value_offset)
            if code == _STRIP_OFFSETS and count == 1:
                strip_at = (start + tag_size - inline, f"{bo}{_INT_FORMATS[dtype]}")
    offsets = values.get(_STRIP_OFFSETS, values.get(_TILE_OFFSETS))
    counts = values.get(_STRIP_COUNTS, values.get(_TILE_COUNTS))
    if offsets is None or counts is None or len(offsets) != len(counts):
        raise FrameError("the page has no valid image data offsets and byte counts (corrupt file)")
    end = max((o + c for o, c in zip(offsets, counts)), default=0)
    if end > size:
        raise NotReadyError(f"image data ends at byte {end} but the file has {size} bytes (still being written?)")
    template = None
    if strip_at is not None and len(offsets) == 1 and _TILE_OFFSETS not in values:
        pos, fmt = strip_at
        template = (buf[:pos], buf[pos + inline:], pos, fmt)
    return IfdInfo(offset, next_pointer, tuple(fingerprint), reduced, offsets, counts, template)


def _ints(fh, byteorder: str, dtype: int, count: int, value: bytes, value_offset: int | None) -> tuple[int, ...]:
    fmt = f"{byteorder}{count}{_INT_FORMATS[dtype]}"
    if value_offset is None:
        return struct.unpack_from(fmt, value)
    here = fh.tell()
    fh.seek(value_offset)
    out = struct.unpack(fmt, fh.read(struct.calcsize(fmt)))
    fh.seek(here)
    return out


def page_problem(page: tifffile.TiffPage) -> str | None:
    """Why a complete page cannot be measured as a monochrome frame, or None if it can."""
    if page.samplesperpixel != 1 or page.photometric in (2, 3, 6):
        return (f"colour page ({page.samplesperpixel} samples per pixel, photometric "
                f"{getattr(page.photometric, 'name', page.photometric)}); one monochrome sample per pixel expected")
    if not isinstance(page.compression, tifffile.COMPRESSION):
        return f"unknown compression {page.compression!r}, cannot be decoded"
    if page.compression != 1 and page.compression not in tifffile.TIFF.DECOMPRESSORS:
        # decoding would fail the same way every time: not a page still being written
        return (f"{page.compression.name} compression, for which no decoder is installed (the imagecodecs "
                "package provides most); cannot be decoded")
    dtype = page.dtype
    if dtype is None or dtype.kind not in "uif" or dtype.itemsize > 4 or (dtype.kind == "f" and dtype.itemsize < 4):
        return (f"pixel type {dtype} ({page.bitspersample} bits, sample format "
                f"{getattr(page.sampleformat, 'name', page.sampleformat)}) is not supported; integers of 8 to 32 "
                "bits (signed: offset-subtracted data) or 32-bit floats expected")
    if len(page.shape) != 2 or 0 in page.shape:
        return f"page shape {page.shape} is not a 2-D image"
    return None


class TiffStream:
    """The reading state of one TIFF file: how many pages were consumed and where the next one starts.

    Parameters
    ----------
    path : str
        The file.
    """

    kind = "tiff"

    def __init__(self, path: str):
        self.path = path
        self.pages_done = 0  # pages consumed, including skipped ones
        self.skip = 0  # consumed pages still to be passed over (after resuming)
        self.skip_frames = 0  # frames (pages that are not thumbnails) to pass over without decoding them
        self.pointer: int | None = None  # file position of the offset of the next IFD
        self.seen: set[int] = set()  # IFD offsets already read (a loop in the chain is corruption)
        self.signature: tuple[int, int] | None = None  # (size, mtime_ns) when last read to the end
        self.meta = None  # metadata of the file (set by the session on first open)
        self.header: TiffHeader | None = None
        self.identity: tuple[int, int, bytes] | None = None  # (device, inode, first bytes) when first read

    def read(self, limit: int, *, give_up: bool = False, on_open=None):
        """Read up to ``limit`` new complete pages.

        Parameters
        ----------
        limit : int
            Most pages to return.
        give_up : bool
            A complete page that fails to decode becomes a FrameError item (else: "try again later").
        on_open : callable, optional
            Called as ``on_open(stream, tiff_file)`` when the file is parsed by tifffile.

        Returns
        -------
        items : list of (page, data)
            ``data`` is the image, a FrameError for a complete page that cannot be measured, or None for a
            reduced-resolution page (thumbnail), which is not a frame.
        stop : NotReadyError, FrameError or None
            Why reading stopped early: NotReadyError when the next page is not complete yet (or the file could not
            be read just now), FrameError when the rest of the file is unusable; None at the end of the chain of
            pages or when ``limit`` was reached.
        """
        return drain(self.iter_read(limit, give_up=give_up, on_open=on_open))

    def iter_read(self, limit: int, *, give_up: bool = False, on_open=None):
        """:meth:`read` one page at a time: a generator of the ``(page, data)`` items whose return value
        (``StopIteration.value``) is ``stop``.

        Each page is read when the next item is asked for, so that its pixels are still in the processor's cache
        when they are measured right away. The file stays open (read-only) between the items. A page counts as
        consumed once it is yielded: closing the generator early leaves the rest for the next read.
        """
        with open(self.path, "rb") as fh:  # read-only, closed at the end or when the generator is closed
            st = os.fstat(fh.fileno())  # taken before reading: a change after this is seen next time
            size = st.st_size
            head = fh.read(16)
            fh.seek(0)
            try:
                replaced = self._replaced(st, head)
                if replaced:
                    return FrameError(f"replaced by another file of the same name while being read ({replaced}); "
                                      "the new file is not read, so that pages of two files are not mixed",
                                      path=self.path, page=self.pages_done)
                if self.header is None:
                    self.header = read_header(fh, size, self.path)
                    self.pointer = self.header.first_pointer
                at_end = yield from self._pages(fh, size, limit, give_up, on_open)
            except NotReadyError as exc:
                return exc
            except OSError as exc:
                return NotReadyError(f"read error: {exc}")
            except FrameError as exc:
                if exc.path is None:
                    exc = FrameError(exc.reason, path=self.path, page=self.pages_done)
                return exc
            finally:
                # taken once a page was read: some writers fill in the header's first page pointer only then
                if self.identity is None and self.pages_done:
                    self.identity = (st.st_dev, st.st_ino, head)
        # only a file read to the end of its chain of pages may be passed over while unchanged
        self.signature = (st.st_size, st.st_mtime_ns) if at_end else None
        return None

    def _replaced(self, st, head: bytes) -> str:
        """Why the file (``os.fstat`` result ``st``, first 16 bytes ``head``) is not the one read before ('' when
        it is): another inode, or other first bytes (header and first page pointer: a file rewritten in place)."""
        if self.identity is None:
            return ""
        dev, ino, first = self.identity
        if (st.st_dev, st.st_ino) != (dev, ino):
            return "another inode"
        if head[: len(first)] != first[: len(head)]:
            return "its first bytes changed"
        return ""

    def _pages(self, fh, size, limit, give_up, on_open):
        """Generator of the pages as ``(page, data)``; returns whether the end of the chain was reached."""
        header = self.header
        tif = key = key_fp = like = None
        given = 0
        try:
            while given < limit:
                offset = read_pointer(fh, header, self.pointer, size)
                if offset == 0:
                    return True
                page = self.pages_done
                if offset in self.seen:
                    raise FrameError(f"the chain of pages loops back to byte {offset} (corrupt file)",
                                     path=self.path, page=page)
                info = read_ifd(fh, header, offset, size, full=self.skip == 0, like=like)
                if info.template is not None:
                    like = info
                if self.skip:
                    self.skip -= 1
                    self._advance(info)
                    continue
                if info.reduced:
                    self._advance(info)
                    given += 1
                    yield page, None
                    continue
                if self.skip_frames:
                    self.skip_frames -= 1
                    self._advance(info)
                    continue
                if tif is None:
                    fh.seek(0)
                    try:
                        tif = tifffile.TiffFile(fh)
                    except Exception as exc:  # noqa: BLE001 - corrupt tags raise TypeError etc., not only TiffFileError
                        raise NotReadyError(f"the file cannot be parsed yet: {exc}") from exc
                    if on_open is not None:
                        on_open(self, tif)
                if info.fingerprint != key_fp:
                    tif.filehandle.seek(offset)
                    try:
                        frame = tifffile.TiffPage(tif, index=page)
                    except Exception as exc:  # noqa: BLE001 - tifffile raises several types on corrupt tags
                        if not give_up:
                            raise NotReadyError(f"page {page} cannot be parsed yet: {exc}") from exc
                        self._advance(info)
                        given += 1
                        yield page, FrameError(f"the page directory cannot be parsed (corrupt file): {exc}",
                                               path=self.path, page=page)
                        continue
                    problem = page_problem(frame)
                    if problem is not None:
                        self._advance(info)
                        given += 1
                        yield page, FrameError(problem, path=self.path, page=page)
                        continue
                    key, key_fp = frame, info.fingerprint
                else:
                    frame = tifffile.TiffFrame(tif, index=page, offset=offset, keyframe=key,
                                               dataoffsets=info.dataoffsets, databytecounts=info.databytecounts)
                try:
                    data = frame.asarray()
                except Exception as exc:  # noqa: BLE001 - each decoder raises its own error types
                    if not give_up:
                        raise NotReadyError(f"page {page} cannot be decoded yet: {exc}") from exc
                    data = FrameError(f"cannot be decoded ({frame.compression.name} compression): {exc}",
                                      path=self.path, page=page)
                self._advance(info)  # before the yield: a page handed on is consumed, even if the reader stops
                given += 1
                yield page, data
            return False
        finally:
            if tif is not None:
                tif.close()  # leaves ``fh`` open: tifffile did not open it

    def _advance(self, info: IfdInfo) -> None:
        self.seen.add(info.offset)
        self.pointer = info.next_pointer
        self.pages_done += 1
