"""qcmon's own exception types (all subclass :class:`ValueError`, like tifffile's)."""

from __future__ import annotations


class QcmonError(ValueError):
    """Base class of every error qcmon raises on purpose."""


class FrameError(QcmonError):
    """A frame or file that cannot be measured.

    Parameters
    ----------
    message : str
        What is wrong, in words a microscopist reads.
    path : str, optional
        The file concerned.
    page : int, optional
        The page (0-based) within that file, when known.
    """

    def __init__(self, message: str, *, path: str | None = None, page: int | None = None):
        self.path = path
        self.page = page
        self.reason = message
        where = ""
        if path is not None:
            where = f"{path}"
            if page is not None:
                where += f", page {page}"
            where += ": "
        super().__init__(where + message)


class NotReadyError(QcmonError):
    """Data is not complete yet (a page still being written); try again later."""


class ProfileError(QcmonError):
    """An invalid threshold profile or option. The message names the file, the key and the allowed values."""
