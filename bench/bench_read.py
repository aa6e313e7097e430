"""Read rate of frame sources against tifffile in the same run (frames/s from the page cache).

Prints, for uint16 frames of 256², 512² and 1024² px in one multipage TIFF:
- ``SessionSource`` (complete-page checks, de-interleaving, Frame objects) reading the whole file;
- ``tifffile.imread`` of the same file (the reference: one call, one output array);
- the ratio SessionSource / imread;
and the cost of one live poll on a long growing file (one new page at the end of N pages) against re-opening the
file with tifffile and counting its pages. No assertions: speed is measured here, never in tests.

Run: ``python bench/bench_read.py [--quick]``
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time

import numpy as np
import tifffile

from qcmon.sources import SessionSource


def _best(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _read_all(path: str) -> int:
    source = SessionSource(path)
    n = 0
    while True:
        frames = source.poll(final=True, max_frames=64)
        if not frames:
            return n
        n += len(frames)


def bench_rates(folder: str, quick: bool) -> None:
    print("frame    frames  SessionSource  tifffile.imread  ratio")
    budget = (64 if quick else 256) * 2**20  # bytes of pixels per file
    for side in (256, 512, 1024):
        n = max(16, budget // (side * side * 2))
        path = os.path.join(folder, f"bench_{side}.tif")
        data = np.random.default_rng(side).integers(0, 4096, size=(n, side, side), dtype=np.uint16)
        tifffile.imwrite(path, data, photometric="minisblack")
        del data
        tifffile.imread(path)  # into the page cache
        assert _read_all(path) == n
        t_source = _best(lambda: _read_all(path), 3)
        t_ref = _best(lambda: tifffile.imread(path), 3)
        print(f"{side:4d}²  {n:8d}  {n / t_source:10.0f}/s  {n / t_ref:12.0f}/s  {t_ref / t_source:6.2f}")
        os.remove(path)


def bench_live_poll(folder: str, quick: bool) -> None:
    n = 5_000 if quick else 20_000
    path = os.path.join(folder, "growing.tif")
    page = np.zeros((16, 16), np.uint16)
    with tifffile.TiffWriter(path) as tw:
        for _ in range(n):
            tw.write(page, metadata=None, photometric="minisblack")
    source = SessionSource(path)
    while source.poll(max_frames=4096):
        pass

    def append_and_poll():
        with tifffile.TiffWriter(path, append=True) as tw:
            tw.write(page, metadata=None, photometric="minisblack")
        t0 = time.perf_counter()
        got = source.poll()
        elapsed = time.perf_counter() - t0
        assert len(got) == 1
        return elapsed

    t_poll = min(append_and_poll() for _ in range(5))

    def reopen_and_count():
        with tifffile.TiffFile(path) as tif:
            return len(tif.pages)

    t_ref = _best(reopen_and_count, 3)
    print(f"\nlive poll, one new page after {n} pages: SessionSource {t_poll * 1e3:.2f} ms; "
          f"tifffile re-open + len(pages) {t_ref * 1e3:.1f} ms; ratio {t_ref / t_poll:.0f}x")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller files")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as folder:
        bench_rates(folder, args.quick)
        bench_live_poll(folder, args.quick)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
