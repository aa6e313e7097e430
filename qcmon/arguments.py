"""What the command lines share (``qcmon`` in :mod:`qcmon.cli`, ``qcmon audit`` in :mod:`qcmon.audit.cli`):
exit statuses and option types. It imports nothing of qcmon's at load time, so both can import it downward."""

from __future__ import annotations

import argparse
import math

#: Exit statuses (documented in the README): all passed; something flagged (a session failed its profile or
#: could not be read, a field flagged over days); an error (bad input, usage, configuration, full disk);
#: interrupted (a second Ctrl-C).
EXIT_OK, EXIT_FLAGGED, EXIT_ERROR, EXIT_INTERRUPTED = 0, 1, 2, 130


def positive(kind):
    """An option type: a finite number of type ``kind`` (``int`` or ``float``) greater than 0."""
    def parse(text: str):
        try:
            v = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a {kind.__name__}, got {text!r}") from None
        if not v > 0:
            raise argparse.ArgumentTypeError(f"must be greater than 0, got {text!r}")
        if not math.isfinite(v):
            raise argparse.ArgumentTypeError(f"must be a finite number, got {text!r}")
        return v
    return parse


def finite(text: str) -> float:
    """An option type: a finite number."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"must be a finite number, got {text!r}")
    return v


def raw_dtype(text: str) -> str:
    """An unsigned-integer pixel type, checked when the options are read (not at the first raw file)."""
    from qcmon.sources.raw import parse_dtype

    try:
        parse_dtype(text, what="--raw-dtype")
    except ValueError as err:
        raise argparse.ArgumentTypeError(str(err).removeprefix("--raw-dtype: ")) from None
    return text
