"""What the readers of :mod:`qcmon.sources` share."""

from __future__ import annotations

from collections.abc import Generator


def drain(items: Generator) -> tuple[list, object]:
    """Every item of a generator like :meth:`qcmon.sources.tiffpages.TiffStream.iter_read`, and its return
    value: ``(items, stop)``."""
    out = []
    while True:
        try:
            out.append(next(items))
        except StopIteration as end:
            return out, end.value
