"""qcmon.monitor._memory: freed frame memory is kept for the next batch instead of going back to the kernel."""

from __future__ import annotations

import platform
import subprocess
import sys

import pytest

# Reads batches of 512 x 512 uint16 frames into new arrays and drops them, as qcmon's readers do, and prints the
# minor page faults (pages the kernel had to map and zero) of the later batches. Run in a fresh interpreter each, so
# that the C library's settings are its defaults unless the test sets them.
_BATCHES = """
import resource, sys
import numpy as np
if sys.argv[1] == "keep":
    from qcmon.monitor._memory import keep_freed_memory
    assert keep_freed_memory()
def batch():
    frames = []
    for _ in range(64):
        a = np.empty((512, 512), np.uint16)
        a.fill(7)  # every page written, as a read into it does
        frames.append(a)
batch()
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
for _ in range(5):
    batch()
print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
"""


def _faults(mode: str) -> int:
    out = subprocess.run([sys.executable, "-c", _BATCHES, mode], capture_output=True, text=True, check=True)
    return int(out.stdout.strip())


@pytest.mark.skipif(not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc",
                    reason="the setting is for the GNU C library on Linux")
def test_later_batches_reuse_the_memory_of_earlier_ones():
    # 5 batches of 64 frames of 512 KiB are 40,960 pages of 4 KiB. By default the C library returns each freed batch
    # to the kernel, which maps and zeroes its pages again for the next (measured, not assumed: the test compares).
    default, kept = _faults("default"), _faults("keep")
    assert default > 20_000
    assert kept < default / 10
