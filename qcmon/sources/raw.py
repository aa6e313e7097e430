"""Raw frame streams: a file of headerless frames (``NAME.raw``, ``.bin`` or ``.dat``) described by a sidecar.

The sidecar ``NAME.toml`` sits beside the stream and uses these keys (all ours):

=================== ========  =========================================================================
key                 required  meaning
=================== ========  =========================================================================
``dtype``           yes       numpy type string of one pixel, e.g. ``"uint16"`` or ``"<u2"`` / ``">u2"``
                              (unsigned integers only)
``height``          yes       rows per frame (px)
``width``           yes       columns per frame (px)
``byte_order``      no        ``"little"`` (default) or ``"big"``, when ``dtype`` does not say
``header_bytes``    no        bytes before the first frame (default 0)
``page_order``      no        must be ``"time, plane, channel"`` (the only order read)
``frame_rate_hz``   no        time points per second (volumes per second when ``planes`` > 1)
``channels``        no        channels interleaved per plane (default 1)
``planes``          no        planes per time point (default 1)
``pixel_size_um``   no        pixel size (µm)
``plane_spacing_um`` no       distance between planes (µm)
``bits``            no        significant bits of the detector (e.g. 12 for a 12-bit camera in uint16)
``n_pages``         no        pages the stream holds when complete (informational)
=================== ========  =========================================================================

Frames follow each other without gaps, in time -> plane -> channel order. A frame is complete when the file
size covers all its bytes. Without a sidecar, the options ``raw_dtype`` and ``raw_shape`` describe the stream.
"""

from __future__ import annotations

import os
import sys

import numpy as np

from qcmon.errors import FrameError, NotReadyError
from qcmon.sources._drain import drain

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

RAW_SUFFIXES = (".raw", ".bin", ".dat")
SIDECAR_KEYS = {
    "dtype": str, "height": int, "width": int, "byte_order": str, "header_bytes": int, "page_order": str,
    "frame_rate_hz": (int, float), "channels": int, "planes": int, "pixel_size_um": (int, float),
    "plane_spacing_um": (int, float), "bits": int, "n_pages": int,
}
#: Sidecar keys -> :class:`~qcmon.frames.AcquisitionFacts` keys.
FACT_KEYS = {"frame_rate_hz": "frame_rate_hz", "channels": "channels", "planes": "planes",
             "pixel_size_um": "pixel_size_um", "plane_spacing_um": "z_step_um", "bits": "bit_depth"}
PAGE_ORDER = "time, plane, channel"
SIDECAR = "sidecar"


def parse_dtype(value, *, what: str) -> np.dtype:
    """An unsigned-integer numpy dtype from ``value``; ValueError naming ``what`` otherwise."""
    try:
        dtype = np.dtype(value)
    except TypeError as exc:
        raise ValueError(f"{what}: {value!r} is not a numpy dtype") from exc
    if dtype.kind != "u":
        raise ValueError(f"{what}: {dtype} is not supported; unsigned integers expected (uint8, uint16, uint32)")
    return dtype


def read_sidecar(path: str) -> dict:
    """The checked contents of a sidecar TOML file.

    Raises
    ------
    NotReadyError
        The file cannot be parsed (it may still be being written).
    FrameError
        Unknown keys, wrong types or values.
    """
    try:
        with open(path, "rb") as fh:
            config = tomllib.load(fh)
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise NotReadyError(f"sidecar cannot be read yet: {exc}") from exc
    unknown = sorted(set(config) - set(SIDECAR_KEYS))
    if unknown:
        raise FrameError(f"unknown sidecar key(s) {', '.join(unknown)}; allowed: {', '.join(SIDECAR_KEYS)}",
                         path=path)
    for key, value in config.items():
        kind = SIDECAR_KEYS[key]
        if isinstance(value, bool) or not isinstance(value, kind):
            raise FrameError(f"sidecar key {key} = {value!r} has the wrong type", path=path)
        if kind is not str and not (value > 0 or (key == "header_bytes" and value == 0)):
            raise FrameError(f"sidecar key {key} = {value!r} must be positive", path=path)
    order = config.pop("byte_order", "little")
    if order not in ("little", "big"):
        raise FrameError(f'sidecar key byte_order = {order!r}: "little" or "big" expected', path=path)
    if config.get("page_order", PAGE_ORDER).replace(" ", "") != PAGE_ORDER.replace(" ", ""):
        raise FrameError(f"sidecar key page_order = {config['page_order']!r}: only {PAGE_ORDER!r} is read",
                         path=path)
    if "dtype" in config:
        try:
            dtype = parse_dtype(config["dtype"], what=f"sidecar key dtype in {path}")
        except ValueError as exc:
            raise FrameError(str(exc), path=path) from None
        if dtype.byteorder == "=" or dtype.byteorder == "|":
            dtype = dtype.newbyteorder("<" if order == "little" else ">")
        config["dtype"] = dtype
    return config


class RawStream:
    """The reading state of one raw stream.

    Parameters
    ----------
    path : str
        The stream.
    dtype : numpy dtype, optional
        Pixel type when the sidecar does not give one (option ``raw_dtype``).
    shape : (int, int), optional
        (height, width) in px when the sidecar does not give them (option ``raw_shape``).
    """

    kind = "raw"

    def __init__(self, path: str, *, dtype=None, shape=None):
        self.path = path
        self.sidecar: str | None = None
        self.option_dtype = dtype
        self.option_shape = shape
        self.pages_done = 0
        self.skip = 0
        self.skip_frames = 0  # frames to pass over without reading them
        self.signature: tuple[int, int] | None = None
        self.config: dict | None = None
        self._from_sidecar: set[str] = set()
        self.meta = None

    def _find_sidecar(self) -> str | None:
        folder, name = os.path.split(self.path)
        wanted = os.path.splitext(name)[0].lower() + ".toml"
        for candidate in sorted(os.listdir(folder or ".")):
            if candidate.lower() == wanted:
                return os.path.join(folder, candidate)
        return None

    def _configure(self, give_up: bool) -> dict:
        self.sidecar = self._find_sidecar()
        config = read_sidecar(self.sidecar) if self.sidecar else {}
        self._from_sidecar = set(config)
        if "dtype" not in config and self.option_dtype is not None:
            config["dtype"] = self.option_dtype
        if ("height" not in config or "width" not in config) and self.option_shape is not None:
            config.setdefault("height", int(self.option_shape[0]))
            config.setdefault("width", int(self.option_shape[1]))
        missing = [k for k in ("dtype", "height", "width") if k not in config]
        if missing:
            where = f"sidecar {self.sidecar}" if self.sidecar else "no sidecar NAME.toml beside it"
            if not self.sidecar and not give_up:
                raise NotReadyError(f"raw stream without a sidecar yet ({', '.join(missing)} unknown)")
            raise FrameError(f"raw stream without {', '.join(missing)} ({where}; or give raw_dtype and raw_shape)",
                             path=self.path)
        config.setdefault("header_bytes", 0)
        return config

    def read(self, limit: int, *, give_up: bool = False, on_open=None):
        """Read up to ``limit`` new complete frames; same contract as :meth:`TiffStream.read`."""
        return drain(self.iter_read(limit, give_up=give_up, on_open=on_open))

    def iter_read(self, limit: int, *, give_up: bool = False, on_open=None):
        """:meth:`read` one frame at a time; same contract as :meth:`TiffStream.iter_read`."""
        if self.config is None:
            try:
                self.config = self._configure(give_up)
            except (NotReadyError, FrameError) as exc:
                return exc
            if on_open is not None:
                on_open(self, None)
        c = self.config
        shape = (c["height"], c["width"])
        dtype = c["dtype"]
        frame_bytes = shape[0] * shape[1] * dtype.itemsize
        with open(self.path, "rb") as fh:  # read-only, closed at the end or when the generator is closed
            st = os.fstat(fh.fileno())
            available = max(0, (st.st_size - c["header_bytes"]) // frame_bytes)
            self.pages_done += self.skip
            self.skip = 0
            passed = min(self.skip_frames, max(available - self.pages_done, 0))
            self.pages_done += passed
            self.skip_frames -= passed
            count = min(available - self.pages_done, limit)
            fh.seek(c["header_bytes"] + self.pages_done * frame_bytes)
            for _ in range(max(count, 0)):
                data = np.empty(shape, dtype)
                try:
                    got = fh.readinto(data)
                except OSError as exc:
                    return NotReadyError(f"read error: {exc}")
                if got != frame_bytes:  # the file shrank under us
                    return NotReadyError("raw stream is shorter than its size said")
                if not dtype.isnative:
                    data = data.byteswap().view(dtype.newbyteorder("="))
                self.pages_done += 1  # before the yield: a frame handed on is consumed
                yield self.pages_done - 1, data
        at_end = self.pages_done >= available
        self.signature = (st.st_size, st.st_mtime_ns) if at_end else None
        remainder = st.st_size - c["header_bytes"] - available * frame_bytes
        if at_end and remainder > 0:
            return NotReadyError(f"frame {available} is incomplete: {remainder} of {frame_bytes} bytes written")
        return None

    def sidecar_facts(self) -> dict[str, tuple[object, str]]:
        """Facts of the sidecar (origin "sidecar"); options fill what it lacks (origin "option")."""
        c = self.config or {}
        from_sidecar = self._from_sidecar
        facts = {}
        for key, fact in FACT_KEYS.items():
            if key in c:
                facts[fact] = (c[key], SIDECAR)
        if "dtype" in c:
            facts["dtype"] = (c["dtype"].name, SIDECAR if "dtype" in from_sidecar else "option")
        if "height" in c:
            facts["shape"] = ((c["height"], c["width"]), SIDECAR if "height" in from_sidecar else "option")
        return facts
