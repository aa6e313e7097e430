"""A full disk where no small file system can be mounted (not root): run ``qcmon ARGS`` with every file opened for
writing under FOLDER limited to QUOTA bytes in all (the sizes of FOLDER's files count); a write beyond it fails
with ``OSError(ENOSPC)``, as the kernel's would.

Usage: ``python full_disk_layer.py FOLDER QUOTA qcmon-arguments...``

Only Python's ``open`` and ``os.fdopen`` are wrapped (all of qcmon's writes go through them); each write is
flushed at once so that the sizes on disk are the bytes written.
"""

from __future__ import annotations

import builtins
import errno
import os
import sys

FOLDER = os.path.realpath(sys.argv[1])
QUOTA = int(sys.argv[2])


def _used() -> int:
    total = 0
    for root, _, files in os.walk(FOLDER):
        for name in files:
            try:
                total += os.lstat(os.path.join(root, name)).st_size
            except OSError:
                pass
    return total


class _Limited:
    def __init__(self, fh):
        self._fh = fh

    def write(self, data):
        if _used() + len(data) > QUOTA:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        n = self._fh.write(data)
        self._fh.flush()
        return n

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self._fh.close()

    def __iter__(self):
        return iter(self._fh)

    def __getattr__(self, name):
        return getattr(self._fh, name)


def _under(path) -> bool:
    try:
        real = os.path.realpath(path)
    except (TypeError, ValueError):
        return False
    return real == FOLDER or real.startswith(FOLDER + os.sep)


_open, _fdopen = builtins.open, os.fdopen


def _limited_open(file, mode="r", *args, **kw):
    fh = _open(file, mode, *args, **kw)
    if isinstance(file, (str, bytes, os.PathLike)) and any(c in mode for c in "wax+") and _under(file):
        return _Limited(fh)
    return fh


def _limited_fdopen(fd, mode="r", *args, **kw):
    fh = _fdopen(fd, mode, *args, **kw)
    if any(c in mode for c in "wax+") and _under(os.readlink(f"/proc/self/fd/{fd}")):
        return _Limited(fh)
    return fh


builtins.open = _limited_open
os.fdopen = _limited_fdopen

if __name__ == "__main__":
    from qcmon.cli import main

    sys.exit(main(sys.argv[3:]))
