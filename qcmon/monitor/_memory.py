"""Keep the memory of measured frames for the next frames (Linux with the GNU C library; elsewhere nothing).

Frames are read into new arrays, measured and dropped. By default the C library gives freed memory at the top of its
heap back to the kernel as soon as more than about twice the largest freed block lies there (about 1 MiB for
512 x 512 px frames), so frames read in batches (``SessionSource.poll``) go into fresh pages, which the kernel zeroes
on the first write: on the project's machines that took about 0.1 ms of a 512 x 512 uint16 frame's 0.3 ms read, and
270,000 page faults in a summary of 3,600 frames read in batches of 256 (53,000 with this setting). Since the
monitor reads each frame just before measuring it (``SessionSource.frames``), the same summary has 22,000 page
faults without the setting and 19,000 with it: it matters where frames are still read in batches.
:func:`keep_freed_memory` asks the C library (``mallopt``) to serve blocks below 32 MiB from its heap and to keep up
to ``limit_bytes`` of freed memory there. The process's peak memory does not grow: it keeps what a batch of frames
needed anyway, for the next batch.
"""

from __future__ import annotations

import ctypes
import sys

__all__ = ["keep_freed_memory"]

_M_TRIM_THRESHOLD = -1  # mallopt parameters of the GNU C library (malloc.h)
_M_MMAP_THRESHOLD = -3
_MMAP_THRESHOLD = 32 * 2**20  # the largest value the GNU C library accepts on 64-bit systems

_applied = False


def keep_freed_memory(limit_bytes: int = 256 * 2**20) -> bool:
    """Keep up to ``limit_bytes`` of freed memory for reuse instead of returning it to the kernel.

    Returns whether the setting took effect (False on other systems or C libraries, which keep their defaults).
    Calling it again does nothing.
    """
    global _applied
    if _applied:
        return True
    if not sys.platform.startswith("linux"):
        return False
    try:
        mallopt = ctypes.CDLL(None).mallopt  # the C library this process runs on
    except (OSError, AttributeError):
        return False
    mallopt.argtypes = (ctypes.c_int, ctypes.c_int)
    mallopt.restype = ctypes.c_int
    try:
        ok = mallopt(_M_MMAP_THRESHOLD, _MMAP_THRESHOLD) == 1
        ok = mallopt(_M_TRIM_THRESHOLD, int(min(limit_bytes, 2**31 - 1))) == 1 and ok
    except Exception:  # noqa: BLE001 - a C library whose mallopt misbehaves: keep its defaults
        return False
    _applied = ok
    return ok
