"""Frame sources: a session's frames, read as the microscope writes them or afterwards, through one reader.

- :class:`SessionSource` reads a session folder (TIFF pages, raw streams with a sidecar) or one file.
- :class:`FolderWatcher` wakes a consumer when the folder changes; :func:`iter_live` ties the two together.
- :func:`drain` takes every frame of a stream's read at once (also for the report, which reads one page back).
"""

from __future__ import annotations

from qcmon.sources._drain import drain
from qcmon.sources.session import SessionSource, natural_key

__all__ = ["FolderWatcher", "SessionSource", "drain", "iter_live", "natural_key"]


def __getattr__(name: str):
    """``FolderWatcher`` and ``iter_live`` load the file-system watcher library when first asked for: a summary,
    an audit or a split worker reads finished files and never needs it."""
    if name in ("FolderWatcher", "iter_live"):
        from qcmon.sources import watcher

        return getattr(watcher, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
