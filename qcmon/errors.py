"""qcmon's own exception types (all subclass :class:`ValueError`, like tifffile's)."""

from __future__ import annotations

import os


def display_path(path) -> str:
    """``path`` as one line of valid text: undecodable bytes of the name (kept by Python as surrogate escapes)
    shown as ``\\xNN``, control characters (newline, tab, …) as ``\\n``, ``\\t`` or ``\\xNN``.

    File names are bytes to the system; the record (UTF-8), the console (one line per message) and the report need
    text. The name shown is for people: the file itself is still opened by its real name.
    """
    text = os.fspath(path)
    if isinstance(text, bytes):
        text = os.fsdecode(text)
    if text.isprintable():
        return text
    out = []
    for ch in text:
        code = ord(ch)
        if 0xDC80 <= code <= 0xDCFF:  # an undecodable byte (surrogateescape)
            out.append(f"\\x{code - 0xDC00:02x}")
        elif ch == "\n":
            out.append("\\n")
        elif ch == "\t":
            out.append("\\t")
        elif ch == "\r":
            out.append("\\r")
        elif not ch.isprintable() and ch != " ":
            out.append(f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}")
        else:
            out.append(ch)
    return "".join(out)


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
            where = display_path(path)
            if page is not None:
                where += f", page {page}"
            where += ": "
        super().__init__(where + message)


class NotReadyError(QcmonError):
    """Data is not complete yet (a page still being written); try again later."""


class ProfileError(QcmonError):
    """An invalid threshold profile or option. The message names the file, the key and the allowed values."""
