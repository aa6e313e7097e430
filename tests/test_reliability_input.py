"""Bad input in a session: one clear message per bad item, naming the file (and page), and measuring goes on.

The checks are about qcmon's own promise ("bad input gives a clear message naming the file and what is wrong;
the rows of the good frames are all there"). The TIFF structures that are damaged on purpose follow the TIFF 6.0
specification (Adobe 1992, section 2: header, IFD = tag count, 12-byte entries, next-IFD offset); the valid files
are written by tifffile, a general-purpose reference library.
"""

from __future__ import annotations

import builtins
import errno
import io
import json
import os
import resource
import struct
import tempfile
from pathlib import Path

import numpy as np
import tifffile
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qcmon.errors import FrameError
from qcmon.frames import Frame
from qcmon.monitor.loop import Monitor, MonitorOptions
from qcmon.sources import tiffpages
from qcmon.sources.session import SessionSource
from reliability_data import good_pages, problem_events, recorded_pages, snapshot

GIB = 1 << 30


def _write(path: Path, data, **kwargs) -> None:
    kwargs.setdefault("photometric", "minisblack")
    tifffile.imwrite(path, data, **kwargs)


def _ifd_offsets(path: Path) -> list[int]:
    with tifffile.TiffFile(path) as tif:
        return [p.offset for p in tif.pages]


def _bad_session(folder: Path) -> tuple[list[tuple[str, int]], dict[str, tuple[str, int | None]]]:
    """A session of good frames with one bad item after each few good ones.

    Returns the (file, page) of every good frame, and for each bad file the words its message must hold and
    the page it must name (None: no page).
    """
    folder.mkdir()
    p = good_pages(64)
    good: list[tuple[str, int]] = []
    bad: dict[str, tuple[str, int | None]] = {}

    def ok(name: str, data, **kw):
        _write(folder / name, data, **kw)
        good.extend((name, i) for i in range(1 if data.ndim == 2 else len(data)))

    ok("s_001.tif", p[:40])  # enough for the engine's reference (it holds back the first 30 frames)
    (folder / "s_002.tif").write_bytes(b"")
    bad["s_002.tif"] = ("0 bytes", 0)
    ok("s_003.tif", p[40])
    (folder / "s_004.tif").write_text("acquisition log: laser 20 %, objective 16x\n", encoding="utf-8")
    bad["s_004.tif"] = ("not a TIFF file", None)
    # zlib-compressed pages are decoded by tifffile (imagecodecs) and measured like any other
    ok("s_005.tif", p[41:44], compression="zlib")
    ok("s_006.tif", p[44], tile=(16, 16))  # tiled pages (as converters write them) are measured too
    _write(folder / "s_007.tif", p[45].astype(np.float32))
    bad["s_007.tif"] = ("float32", 0)
    _write(folder / "s_008.tif", p[46].astype(np.int16))
    bad["s_008.tif"] = ("int16", 0)
    tifffile.imwrite(folder / "s_009.tif", np.stack([p[47] >> 4] * 3, axis=-1).astype(np.uint8), photometric="rgb")
    bad["s_009.tif"] = ("colour page (3 samples per pixel", 0)
    ok("s_010.tif", p[48])
    _write(folder / "s_011.tif", p[49][:32])  # the frame size changes mid-session
    bad["s_011.tif"] = ("frame size/type changed from (64, 64) uint16 to (32, 64) uint16", 0)
    _write(folder / "s_012.tif", p[50].astype(np.uint8))  # the pixel type changes mid-session
    bad["s_012.tif"] = ("frame size/type changed from (64, 64) uint16 to (64, 64) uint8", 0)
    _write(folder / "s_013.tif", np.full((64, 64), np.nan, np.float32))  # NaN frame: float is not a detector type
    bad["s_013.tif"] = ("float32", 0)
    ok("s_014.tif", np.full((64, 64), 100, np.uint16))  # a constant frame is a frame: measured, not a problem
    # a corrupt directory: page 1 of 3 claims 5000 tags (TIFF 6.0 section 2: the IFD starts with its tag count)
    _write(folder / "s_015.tif", p[51:54])
    with open(folder / "s_015.tif", "r+b") as fh:
        fh.seek(_ifd_offsets(folder / "s_015.tif")[1])
        fh.write(struct.pack("<H", 5000))
    good.append(("s_015.tif", 0))
    bad["s_015.tif"] = ("claims 5000 tags (corrupt file)", 1)
    ok("s_016.tif", p[54])
    os.symlink("moved_away.tif", folder / "s_017.tif")  # a dangling link: open() fails
    bad["s_017.tif"] = ("broken link", None)
    (folder / "s_018.tif").mkdir()  # a folder under a frame-file name
    bad["s_018.tif"] = ("folder", None)
    ok("s_019.tif", p[55])
    (folder / "s_020.tif").write_bytes(b"")  # replaced below by a file that cannot be opened
    bad["s_020.tif"] = ("Permission denied", None)
    # cut-off last page: the third page's data and directory run past the end of the file
    blob = io.BytesIO()
    _write(blob, p[56:59])
    (folder / "s_021.tif").write_bytes(blob.getvalue()[:-100])
    good += [("s_021.tif", 0), ("s_021.tif", 1)]
    bad["s_021.tif"] = ("incomplete", 2)
    # a huge sparse file (4 GiB, nothing allocated): its first directory lies in the hole, i.e. is all zeros
    with open(folder / "s_022.tif", "wb") as fh:
        fh.write(b"II*\x00" + struct.pack("<I", 3 * GIB))
        fh.truncate(4 * GIB)
    bad["s_022.tif"] = ("empty", 0)
    ok("s_023.tif", p[59:64])
    return good, bad


def _deny(name: str):
    """``open`` as seen by a user without read permission on ``name`` (the tests run as root, where chmod 000
    does not stop reading)."""
    def fake_open(file, *args, **kwargs):
        if os.path.basename(os.fspath(file)) == name:
            raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.fspath(file))
        return builtins.open(file, *args, **kwargs)
    return fake_open


def test_each_bad_item_gives_one_message_and_every_good_frame_is_measured(tmp_path, monkeypatch):
    folder = tmp_path / "session"
    good, bad = _bad_session(folder)
    monkeypatch.setattr(tiffpages, "open", _deny("s_020.tif"), raising=False)
    before = snapshot(folder)
    peak_before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss  # KiB on Linux
    monitor = Monitor(MonitorOptions(path=folder, out_dir=tmp_path / "out", follow=False))
    monitor.run()
    peak_growth_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss - peak_before

    # every good frame has its row, once, in acquisition order
    assert recorded_pages(tmp_path / "out") == good
    # one message per bad item, naming the file (and the page where there is one), in the summary and the events
    summary = json.loads((tmp_path / "out" / "summary.json").read_text(encoding="utf-8"))
    assert summary["problems"] == monitor.problems == problem_events(tmp_path / "out")
    assert len(monitor.problems) == len(bad), "\n".join(monitor.problems)
    for name, (words, page) in bad.items():
        mine = [m for m in monitor.problems if f"{name}" in m]
        assert len(mine) == 1, (name, monitor.problems)
        msg = mine[0]
        assert msg.startswith(str(folder / name)), msg
        assert words in msg, (name, msg)
        if page is not None:
            assert f"{name}, page {page}:" in msg, msg
    # the 4 GiB file was not read into memory
    assert peak_growth_kib < 512 * 1024
    assert snapshot(folder) == before


def test_file_deleted_or_rewritten_between_polls_is_reported_and_reading_goes_on(tmp_path):
    p = good_pages(48)
    _write(tmp_path / "r_1.tif", p[:40])
    for k, i in enumerate(range(40, 44), start=2):
        _write(tmp_path / f"r_{k}.tif", p[i])
    problems: list[FrameError] = []
    source = SessionSource(tmp_path, on_problem=problems.append)
    first = source.poll(max_frames=20)  # live: half of r_1 read, r_2..r_5 seen and queued
    assert [f.page for f in first] == list(range(20)) and problems == []
    _write(tmp_path / "r_1.tif", p[44:48])  # rewritten by another program: shorter than what was read
    os.unlink(tmp_path / "r_3.tif")  # deleted before it was read
    rest = source.poll()
    rest += source.poll(final=True)
    assert [(os.path.basename(f.source), f.page) for f in rest] == [("r_2.tif", 0), ("r_4.tif", 0), ("r_5.tif", 0)]
    for f, i in zip(rest, (40, 42, 43)):
        np.testing.assert_array_equal(f.data, p[i])
    assert len(problems) == 2 and problems == source.problems
    shrank, gone = problems
    assert shrank.path.endswith("r_1.tif") and shrank.page == 20 and "shrank" in shrank.reason
    assert gone.path.endswith("r_3.tif") and "No such file" in gone.reason


def test_rgb_and_multi_sample_pages_mid_session_keep_the_others(tmp_path):
    # a channel count that changes mid-session: a file of 2-sample pages among single-sample ones
    p = good_pages(4)
    _write(tmp_path / "c_1.tif", p[:2])
    tifffile.imwrite(tmp_path / "c_2.tif", np.stack([p[2], p[3]], axis=-1), photometric="minisblack",
                     planarconfig="contig", extrasamples=[0])
    _write(tmp_path / "c_3.tif", p[3])
    source = SessionSource(tmp_path)
    frames = source.poll(final=True)
    assert [(os.path.basename(f.source), f.page, f.index) for f in frames] == [
        ("c_1.tif", 0, 0), ("c_1.tif", 1, 1), ("c_3.tif", 0, 3)]
    assert len(source.problems) == 1
    err = source.problems[0]
    assert err.path.endswith("c_2.tif") and err.page == 0 and "2 samples per pixel" in err.reason


# ------------------------------------------------------------------------------------- mutated TIFF bytes
def _valid_tiff() -> bytes:
    rng = np.random.default_rng(0)
    buf = io.BytesIO()
    tifffile.imwrite(buf, rng.integers(0, 4096, (3, 12, 10), dtype=np.uint16), photometric="minisblack")
    return buf.getvalue()


_VALID = _valid_tiff()
_op = st.one_of(
    st.tuples(st.just("flip"), st.integers(0, len(_VALID) - 1), st.integers(1, 255)),
    st.tuples(st.just("truncate"), st.integers(0, len(_VALID) - 1), st.just(0)),
    st.tuples(st.just("insert"), st.integers(0, len(_VALID)), st.binary(min_size=1, max_size=16)),
)


def _mutate(data: bytes, ops) -> bytes:
    b = bytearray(data)
    for kind, pos, arg in ops:
        pos = min(pos, len(b))
        if kind == "flip" and pos < len(b):
            b[pos] ^= arg
        elif kind == "truncate":
            del b[pos:]
        elif kind == "insert":
            b[pos:pos] = arg
    return bytes(b)


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(ops=st.lists(_op, min_size=1, max_size=4))
def test_mutated_tiff_gives_frames_or_frame_errors_never_anything_else(ops):
    data = _mutate(_VALID, ops)
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "m.tif")
        with open(path, "wb") as fh:
            fh.write(data)
        seen: list = []
        source = SessionSource(path, on_problem=seen.append)
        frames = []
        for _ in range(10):  # live polls first, then the end of the session
            frames += source.poll()
        for _ in range(10):
            got = source.poll(final=True)
            if not got:
                break
            frames += got
        assert all(isinstance(e, FrameError) and e.path == path for e in seen)
        assert all(isinstance(f, Frame) and f.data.ndim == 2 for f in frames)
        # never a frame twice: indices strictly increase
        assert all(a.index < b.index for a, b in zip(frames, frames[1:]))
