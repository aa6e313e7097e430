"""Frame sources: every layout, completeness, order, resume, metadata facts and bad input.

The reference for pixel values is tifffile (``tifffile.imread`` / ``TiffWriter``), a general-purpose TIFF library;
metadata is written with tifffile's OME-XML and ImageJ writers and checked against the values given to them.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import threading
import time

import numpy as np
import pytest
import tifffile

from qcmon.errors import FrameError
from qcmon.sources import SessionSource, natural_key

RNG = np.random.default_rng(20261201)


def _stack(n, shape=(24, 20), dtype=np.uint16):
    return RNG.integers(0, 4000, size=(n, *shape)).astype(dtype)


def _imwrite(path, data, **kwargs):
    """tifffile.imwrite with one monochrome page per 2-D frame (never guessed as RGB)."""
    kwargs.setdefault("photometric", "minisblack")
    tifffile.imwrite(path, data, **kwargs)


def _frames_equal(frames, expected):
    assert len(frames) == len(expected)
    for f, e in zip(frames, expected):
        np.testing.assert_array_equal(f.data, e)


def _read_all(source):
    return list(source)


def _digest(folder):
    out = {}
    for name in sorted(os.listdir(folder)):
        p = os.path.join(folder, name)
        with open(p, "rb") as fh:
            out[name] = (hashlib.sha256(fh.read()).hexdigest(), os.stat(p).st_mtime_ns)
    return out


@pytest.mark.parametrize("layout", ["chunks", "raw", "thumbnails"])
def test_frames_stopped_early_give_every_frame_once(tmp_path, layout):
    # SessionSource.frames reads each frame as it is asked for; a reader that stops at any point gets the rest
    # from the next call: together, the frames of one poll, in order, none twice (qcmon's own contract).
    data = _stack(23)
    if layout == "chunks":
        for k in range(0, 23, 5):
            _imwrite(tmp_path / f"chunk_{k:02d}.tif", data[k : k + 5])
    elif layout == "raw":
        (tmp_path / "frames.raw").write_bytes(data.tobytes())
        (tmp_path / "frames.toml").write_text('dtype = "uint16"\nheight = 24\nwidth = 20\n')
    else:  # a reduced-resolution page after every frame (NewSubfileType 1): not frames, passed over
        with tifffile.TiffWriter(tmp_path / "session.tif") as tw:
            for frame in data:
                tw.write(frame, photometric="minisblack")
                tw.write(frame[::2, ::2], photometric="minisblack", subfiletype=1)
    source = SessionSource(tmp_path)
    got = []
    stops = iter([1, 3, 2, 7, 1, 4, 100])
    while True:
        frames = source.frames(final=True, max_frames=6)
        taken = 0
        for fr in frames:
            got.append(fr)
            taken += 1
            if taken == next(stops, 100):
                break
        frames.close()
        if taken == 0:
            break
    _frames_equal(got, list(data))
    assert [f.index for f in got] == list(range(23))
    assert source.problems == []


def test_a_page_unlike_the_one_before_is_parsed_in_full(tmp_path):
    # Pages whose directory equals the previous one's but for the strip offset are not parsed again
    # (tiffpages.read_ifd, like=...); a page of another size or type in the same file must not pass for one.
    data = _stack(9, shape=(16, 12))
    with tifffile.TiffWriter(tmp_path / "session.tif") as tw:
        for i, frame in enumerate(data):
            if i == 4:
                tw.write(frame[:8], photometric="minisblack")  # another size
            elif i == 6:
                tw.write(frame.astype(np.uint8), photometric="minisblack")  # another type
            else:
                tw.write(frame, photometric="minisblack")
    source = SessionSource(tmp_path)
    frames = _read_all(source)
    keep = [0, 1, 2, 3, 5, 7, 8]
    _frames_equal(frames, [data[i] for i in keep])
    assert [f.page for f in frames] == keep
    assert [str(p.reason) for p in source.problems] == [
        "frame size/type changed from (16, 12) uint16 to (8, 12) uint16; such pages are skipped",
        "frame size/type changed from (16, 12) uint16 to (16, 12) uint8; such pages are skipped"]


# ----------------------------------------------------------------------------------------------- layouts
@pytest.mark.parametrize("layout", ["per_frame", "chunks", "single", "raw", "bigtiff", "zlib"])
def test_every_layout_gives_the_frames_in_order(tmp_path, layout):
    data = _stack(12)
    if layout == "per_frame":
        for i, frame in enumerate(data):
            _imwrite(tmp_path / f"frame_{i}.tif", frame)
    elif layout == "chunks":
        for k in range(3):
            _imwrite(tmp_path / f"chunk_{k + 1}.tif", data[4 * k : 4 * k + 4])
    elif layout == "single":
        _imwrite(tmp_path / "session.tif", data)
    elif layout == "bigtiff":
        _imwrite(tmp_path / "session.tif", data, bigtiff=True)
    elif layout == "zlib":
        _imwrite(tmp_path / "session.tif", data, compression="zlib", rowsperstrip=5)
    else:
        (tmp_path / "frames.raw").write_bytes(b"HEAD" + data.tobytes())
        (tmp_path / "frames.toml").write_text('dtype = "uint16"\nheight = 24\nwidth = 20\nheader_bytes = 4\n')
    source = SessionSource(tmp_path)
    frames = _read_all(source)
    _frames_equal(frames, list(data))
    assert [f.index for f in frames] == list(range(12))
    assert source.problems == []
    if layout in ("single", "bigtiff", "zlib"):
        # reference: tifffile.imread of the same file
        np.testing.assert_array_equal(np.stack([f.data for f in frames]), tifffile.imread(tmp_path / "session.tif"))
        assert [f.page for f in frames] == list(range(12))


def test_natural_order_and_ignored_names(tmp_path):
    data = _stack(5)
    names = ["run_1.tif", "run_2.TIF", "Run_3.tiff", "run_10.tif", "run_11.tif"]
    for name, frame in zip(names, data):
        _imwrite(tmp_path / name, frame)
    _imwrite(tmp_path / ".run_0.tif", data[0])  # hidden
    _imwrite(tmp_path / "~run_0.tif", data[0])  # temporary
    _imwrite(tmp_path / "run_5.tif.part", data[0])  # not a data suffix
    (tmp_path / "notes.txt").write_text("hello")
    (tmp_path / "sub").mkdir()
    _imwrite(tmp_path / "sub" / "run_4.tif", data[0])  # not recursive
    source = SessionSource(tmp_path)
    frames = source.poll(final=True)
    assert [os.path.basename(f.source) for f in frames] == names
    _frames_equal(frames, list(data))
    assert source.problems == []
    assert sorted(["a10", "a2", "A3"], key=natural_key) == ["a2", "A3", "a10"]


def test_single_file_path(tmp_path):
    data = _stack(3)
    _imwrite(tmp_path / "a.tif", data)
    _imwrite(tmp_path / "b.tif", data[:1])
    frames = SessionSource(tmp_path / "a.tif").poll(final=True)
    _frames_equal(frames, list(data))


# ------------------------------------------------------------------------------------------ de-interleave
@pytest.mark.parametrize("how", ["options", "ome", "imagej", "ome_plane_fastest"])
def test_deinterleaving_two_channels_two_planes(tmp_path, how):
    t_n, z_n, c_n = 3, 2, 2
    stack = _stack(t_n * z_n * c_n, shape=(8, 10)).reshape(t_n, z_n, c_n, 8, 10)
    if how == "options":
        _imwrite(tmp_path / "s.tif", stack.reshape(-1, 8, 10))
        source = SessionSource(tmp_path, channels=2, planes=2)
    elif how == "ome":
        _imwrite(tmp_path / "s.ome.tif", stack, ome=True, metadata={"axes": "TZCYX"})
        source = SessionSource(tmp_path)
    elif how == "imagej":
        _imwrite(tmp_path / "s.tif", stack, imagej=True, metadata={"axes": "TZCYX"})
        source = SessionSource(tmp_path)
    else:
        # OME DimensionOrder XYZCT: planes vary fastest within a time point (OME schema 2016-06, Pixels)
        _imwrite(tmp_path / "s.ome.tif", stack.transpose(0, 2, 1, 3, 4), ome=True,
                         metadata={"axes": "TCZYX"})
        source = SessionSource(tmp_path)
    frames = source.poll(final=True)
    assert len(frames) == t_n * z_n * c_n
    for f in frames:
        np.testing.assert_array_equal(f.data, stack[f.index, f.plane, f.channel])
    seen = {(f.index, f.channel, f.plane) for f in frames}
    assert len(seen) == len(frames)
    assert source.facts.get("channels") == 2 and source.facts.get("planes") == 2


# ------------------------------------------------------------------------------------------ completeness
def _complete_pages(blob: bytes, size: int) -> int:
    """Pages whose IFD and data all lie within ``size`` bytes, judged by tifffile on the whole file."""
    with tifffile.TiffFile(io.BytesIO(blob)) as tif:
        n = 0
        for page in tif.pages:
            ends = [o + c for o, c in zip(page.dataoffsets, page.databytecounts)]
            ifd_end = page.offset + 2 + 12 * len(page.tags) + 4
            if max(ends + [ifd_end]) > size:
                break
            n += 1
        return n


@pytest.mark.parametrize("rowsperstrip", [None, 3])
def test_half_written_page_is_not_returned_until_complete(tmp_path, rowsperstrip):
    data = _stack(6, shape=(16, 12))
    buf = io.BytesIO()
    with tifffile.TiffWriter(buf) as tw:
        for frame in data:
            tw.write(frame, rowsperstrip=rowsperstrip, metadata=None, photometric="minisblack")
    blob = buf.getvalue()
    path = tmp_path / "live.tif"
    source = SessionSource(tmp_path)
    got = []
    cuts = list(range(0, len(blob), 53)) + [len(blob)]
    with open(path, "wb") as fh:
        for cut in cuts:
            fh.seek(0, 2)
            fh.write(blob[fh.tell() : cut])
            fh.flush()
            got += source.poll()
            assert len(got) <= _complete_pages(blob, cut)
            assert source.problems == []
    got += source.poll(final=True)
    _frames_equal(got, list(data))
    assert source.problems == []


def test_growing_multipage_file_written_from_a_thread(tmp_path):
    data = _stack(40, shape=(32, 32))
    path = tmp_path / "growing.tif"
    started = threading.Event()

    def write():
        with tifffile.TiffWriter(path) as tw:
            for frame in data:
                tw.write(frame, metadata=None)
                tw._fh.flush()  # make each page visible to the reader at once, as a microscope writer does
                started.set()
                time.sleep(0.004)

    writer = threading.Thread(target=write)
    writer.start()
    started.wait(5)
    source = SessionSource(tmp_path)
    got = []
    while writer.is_alive():
        got += source.poll()
    writer.join()
    got += source.poll(final=True)
    _frames_equal(got, list(data))
    assert [f.page for f in got] == list(range(40))
    assert source.problems == []


def test_raw_stream_growing_and_sidecar_facts(tmp_path):
    data = _stack(5, shape=(6, 7), dtype=np.uint16)
    (tmp_path / "frames.toml").write_text(
        'dtype = "<u2"\nheight = 6\nwidth = 7\nframe_rate_hz = 30.0\npixel_size_um = 0.8\n')
    blob = data.tobytes()
    source = SessionSource(tmp_path)
    got = []
    with open(tmp_path / "frames.raw", "wb") as fh:
        for cut in range(0, len(blob) + 1, 31):
            fh.write(blob[fh.tell() : cut])
            fh.flush()
            got += source.poll()
            assert len(got) == cut // (6 * 7 * 2)  # a frame is complete when the file covers all its bytes
        fh.write(blob[fh.tell() :])
    got += source.poll(final=True)
    _frames_equal(got, list(data))
    facts = source.facts
    assert facts.facts["frame_rate_hz"].value == 30.0 and facts.facts["frame_rate_hz"].origin == "sidecar"
    assert facts.facts["pixel_size_um"].origin == "sidecar"
    assert all(math.isnan(f.time_s) for f in got)


def test_raw_stream_from_options_and_bad_sidecar(tmp_path):
    data = _stack(3, shape=(4, 5), dtype=np.uint8)
    (tmp_path / "a.bin").write_bytes(data.tobytes())
    _frames_equal(SessionSource(tmp_path, raw_dtype="uint8", raw_shape=(4, 5)).poll(final=True), list(data))
    (tmp_path / "a.toml").write_text('dtype = "uint8"\nheight = 4\nwidth = 5\nframerate = 3\n')
    source = SessionSource(tmp_path)
    assert source.poll(final=True) == []
    assert len(source.problems) == 1 and "framerate" in str(source.problems[0])
    with pytest.raises(ValueError, match="raw_dtype"):
        SessionSource(tmp_path, raw_dtype="float32")


# ------------------------------------------------------------------------------------------------- resume
def test_resume_from_position_gives_no_frame_twice_and_misses_none(tmp_path):
    data = _stack(20)
    _imwrite(tmp_path / "part_1.tif", data[:8])
    with tifffile.TiffWriter(tmp_path / "part_2.tif") as tw:
        for frame in data[8:14]:
            tw.write(frame, metadata=None)
    first = SessionSource(tmp_path)
    got = first.poll(max_frames=5) + first.poll(max_frames=6)
    token = json.loads(json.dumps(first.position))  # JSON-serialisable
    second = SessionSource(tmp_path, start=token)
    got += second.poll()
    token = json.loads(json.dumps(second.position))
    # the session goes on: the last file grows and a new one appears
    with tifffile.TiffWriter(tmp_path / "part_2.tif", append=True) as tw:
        for frame in data[14:17]:
            tw.write(frame, metadata=None)
    _imwrite(tmp_path / "part_3.tif", data[17:])
    third = SessionSource(tmp_path, start=token)
    got += third.poll(final=True)
    _frames_equal(got, list(data))
    assert [f.index for f in got] == list(range(20))
    assert first.problems == second.problems == third.problems == []


def test_resume_keeps_channel_plane_slots(tmp_path):
    stack = _stack(16, shape=(4, 4))
    _imwrite(tmp_path / "s.tif", stack)
    a = SessionSource(tmp_path, channels=2, planes=2)
    got = a.poll(max_frames=7)
    b = SessionSource(tmp_path, channels=2, planes=2, start=a.position)
    got += b.poll(final=True)
    assert [(f.index, f.plane, f.channel) for f in got] == [(n // 4, (n // 2) % 2, n % 2) for n in range(16)]


# ------------------------------------------------------------------------------------------------- facts
def test_ome_facts_with_units_and_timestamps(tmp_path):
    stack = _stack(3 * 2, shape=(8, 8)).reshape(3, 2, 8, 8)
    delta_t = [2.0 + 0.05 * k for k in range(6)]
    # OME schema 2016-06 (https://www.openmicroscopy.org/Schemas/OME/2016-06/ome.xsd): PhysicalSizeX with
    # PhysicalSizeXUnit, PhysicalSizeZ (default unit µm), TimeIncrement with TimeIncrementUnit, Plane/@DeltaT (s)
    _imwrite(tmp_path / "s.ome.tif", stack, ome=True, metadata={
        "axes": "TZYX", "PhysicalSizeX": 650.0, "PhysicalSizeXUnit": "nm", "PhysicalSizeY": 650.0,
        "PhysicalSizeYUnit": "nm", "PhysicalSizeZ": 3.5, "TimeIncrement": 100.0, "TimeIncrementUnit": "ms",
        "Plane": {"DeltaT": delta_t}})
    source = SessionSource(tmp_path, frame_rate_hz=7.0)
    frames = source.poll(final=True)
    facts = source.facts
    assert facts.facts["pixel_size_um"].origin == "OME-TIFF"
    np.testing.assert_allclose(facts.get("pixel_size_um"), 0.65, rtol=1e-12)  # 650 nm = 0.65 µm
    np.testing.assert_allclose(facts.get("z_step_um"), 3.5, rtol=1e-12)
    np.testing.assert_allclose(facts.get("frame_rate_hz"), 10.0, rtol=1e-12)  # 1 / 100 ms
    assert facts.get("planes") == 2 and facts.get("channels") == 1
    np.testing.assert_allclose([f.time_s for f in frames], np.array(delta_t) - delta_t[0], atol=1e-12)
    assert [(f.index, f.plane) for f in frames] == [(t, z) for t in range(3) for z in range(2)]
    # the option disagrees with the file: the file wins, the conflict is listed
    assert any("frame_rate_hz" in c for c in source.conflicts)
    forced = SessionSource(tmp_path, frame_rate_hz=7.0, override=True)
    forced.poll(final=True)
    assert forced.facts.get("frame_rate_hz") == 7.0 and forced.facts.facts["frame_rate_hz"].origin == "option"


@pytest.mark.parametrize("unit,per_unit,expected_um", [
    # TIFF 6.0 section 8: XResolution is pixels per ResolutionUnit (3 = centimetre, 2 = inch)
    ("CENTIMETER", 20000.0, 0.5),  # 1 cm = 10 000 µm -> 10 000 / 20 000 px
    ("INCH", 25400.0, 1.0),  # 1 in = 25 400 µm
])
def test_tiff_resolution_tags(tmp_path, unit, per_unit, expected_um):
    _imwrite(tmp_path / "r.tif", _stack(2), resolution=(per_unit, per_unit), resolutionunit=unit)
    source = SessionSource(tmp_path, pixel_size_um=9.0)
    source.poll(final=True)
    assert source.facts.facts["pixel_size_um"].origin == "TIFF resolution tag"
    np.testing.assert_allclose(source.facts.get("pixel_size_um"), expected_um, rtol=1e-9)


def test_screen_default_resolution_is_not_a_pixel_size(tmp_path):
    # 72 pixels per inch: the screen default of many writers (common practice, no source)
    _imwrite(tmp_path / "r.tif", _stack(1), resolution=(72, 72), resolutionunit="INCH")
    source = SessionSource(tmp_path, pixel_size_um=1.2)
    source.poll(final=True)
    assert source.facts.get("pixel_size_um") == 1.2 and source.facts.facts["pixel_size_um"].origin == "option"
    assert any("screen default" in n for n in source.notes)


def test_imagej_metadata(tmp_path):
    stack = _stack(8, shape=(6, 6)).reshape(2, 2, 2, 6, 6)
    _imwrite(tmp_path / "ij.tif", stack, imagej=True, resolution=(4.0, 4.0),
                     metadata={"axes": "TZCYX", "spacing": 2.5, "finterval": 0.04, "unit": "um"})
    source = SessionSource(tmp_path)
    frames = source.poll(final=True)
    facts = source.facts
    assert facts.facts["z_step_um"].origin == "ImageJ metadata"
    np.testing.assert_allclose(facts.get("z_step_um"), 2.5)
    np.testing.assert_allclose(facts.get("frame_rate_hz"), 25.0)  # 1 / 0.04 s
    np.testing.assert_allclose(facts.get("pixel_size_um"), 0.25)  # 4 px per µm
    for f in frames:
        np.testing.assert_array_equal(f.data, stack[f.index, f.plane, f.channel])


# ------------------------------------------------------------------------------------------------ problems
def test_bad_files_give_one_error_each_and_reading_goes_on(tmp_path):
    good = _stack(2)
    _imwrite(tmp_path / "f_00.tif", good[0])  # two files of one size: the session's size (not a first file alone)
    _imwrite(tmp_path / "f_01.tif", good[0])
    (tmp_path / "f_02.tif").write_bytes(b"this is not an image file at all")
    (tmp_path / "f_03.tif").write_bytes(b"")
    _imwrite(tmp_path / "f_04.tif", np.zeros((3, 24, 20), np.float32))
    _imwrite(tmp_path / "f_05.tif", np.zeros((24, 20, 3), np.uint8), photometric="rgb")
    _imwrite(tmp_path / "f_06.tif", np.zeros((32, 32), np.uint16), tile=(16, 16))  # tiled: decoded, wrong size
    _imwrite(tmp_path / "f_07.tif", np.zeros((24, 20), np.int16))
    _imwrite(tmp_path / "f_08.tif", np.zeros((30, 30), np.uint16))  # size changes mid-session
    _imwrite(tmp_path / "f_09.tif", good[:1], compression="zlib")
    with tifffile.TiffFile(tmp_path / "f_09.tif", mode="r+") as tif:
        tif.pages[0].tags["Compression"].overwrite(60000)  # a compression no decoder knows
    _imwrite(tmp_path / "f_10.tif", good[1])
    seen = []
    before = _digest(tmp_path)
    source = SessionSource(tmp_path, on_problem=seen.append)
    frames = source.poll(final=True)
    _frames_equal(frames, [good[0], good[0], good[1]])
    assert seen == source.problems
    by_file = {os.path.basename(e.path): e for e in source.problems}
    assert sorted(by_file) == [f"f_{k:02d}.tif" for k in range(2, 10)]
    assert len(source.problems) == 8
    assert "not a TIFF" in by_file["f_02.tif"].reason
    assert "incomplete" in by_file["f_03.tif"].reason
    assert by_file["f_04.tif"].page == 0 and "float32" in by_file["f_04.tif"].reason
    assert "colour" in by_file["f_05.tif"].reason
    assert "changed" in by_file["f_06.tif"].reason and "(32, 32)" in by_file["f_06.tif"].reason
    assert "int16" in by_file["f_07.tif"].reason
    assert "changed" in by_file["f_08.tif"].reason and "(30, 30)" in by_file["f_08.tif"].reason
    assert "compression" in by_file["f_09.tif"].reason
    for err in source.problems:
        assert isinstance(err, FrameError) and err.path in str(err)
    assert _digest(tmp_path) == before  # nothing written, renamed or touched


def test_live_waits_for_an_empty_file_and_final_reports_it(tmp_path):
    _imwrite(tmp_path / "a_1.tif", _stack(1))
    (tmp_path / "a_2.tif").write_bytes(b"")
    source = SessionSource(tmp_path)
    assert len(source.poll()) == 1
    assert source.poll() == [] and source.problems == []  # may still be written
    _imwrite(tmp_path / "a_2.tif", _stack(2))
    assert len(source.poll()) == 2 and source.problems == []


def test_stalled_earlier_file_is_reported_after_grace(tmp_path):
    data = _stack(3)
    blob = io.BytesIO()
    _imwrite(blob, data[:2])
    (tmp_path / "b_1.tif").write_bytes(blob.getvalue()[:-10])  # truncated second page
    _imwrite(tmp_path / "b_2.tif", data[2])
    source = SessionSource(tmp_path, grace_s=0.0)
    got = source.poll()
    assert len(got) == 1 and source.problems == []  # first sight: wait
    got += source.poll()
    _frames_equal(got, [data[0], data[2]])
    assert len(source.problems) == 1
    err = source.problems[0]
    assert err.path.endswith("b_1.tif") and err.page == 1 and "truncated" in err.reason


def test_file_appearing_out_of_order_is_reported(tmp_path):
    data = _stack(3)
    _imwrite(tmp_path / "c_2.tif", data[0])
    _imwrite(tmp_path / "c_3.tif", data[1])
    source = SessionSource(tmp_path)
    assert len(source.poll()) == 2
    _imwrite(tmp_path / "c_1.tif", data[2])
    assert source.poll(final=True) == []
    assert len(source.problems) == 1 and source.problems[0].path.endswith("c_1.tif")


def test_bad_pages_keep_their_channel_slot(tmp_path):
    # one float page among uint16 pages in a 2-channel file: it is reported, the others keep their channels
    with tifffile.TiffWriter(tmp_path / "m.tif") as tw:
        tw.write(np.full((4, 4), 1, np.uint16), metadata=None)
        tw.write(np.full((4, 4), 2, np.float32), metadata=None)
        tw.write(np.full((4, 4), 3, np.uint16), metadata=None)
        tw.write(np.full((4, 4), 4, np.uint16), metadata=None)
    source = SessionSource(tmp_path, channels=2)
    frames = source.poll(final=True)
    assert [(f.index, f.channel, int(f.data[0, 0])) for f in frames] == [(0, 0, 1), (1, 0, 3), (1, 1, 4)]
    assert len(source.problems) == 1 and source.problems[0].page == 1


def test_option_validation(tmp_path):
    with pytest.raises(ValueError, match="channels"):
        SessionSource(tmp_path, channels=0)
    with pytest.raises(ValueError, match="raw_shape"):
        SessionSource(tmp_path, raw_shape=(3,))
    with pytest.raises(ValueError, match="path"):
        SessionSource(tmp_path / "missing")
    with pytest.raises(ValueError, match="start"):
        SessionSource(tmp_path, start={"files": {}})


def test_simulated_session_reads_the_same_in_every_layout(tmp_path):
    from qcmon.simulate import SimConfig
    from qcmon.simulate._write import write_session

    config = SimConfig(n_frames=5, height=20, width=24, channels=2, planes=2)
    runs = {}
    for layout in ("multipage", "chunks", "per_frame", "raw"):
        write_session(config, tmp_path / layout, layout=layout, chunk_frames=2)
        source = SessionSource(tmp_path / layout / "frames", channels=2, planes=2)
        runs[layout] = list(source)
        assert source.problems == []
    reference = tifffile.imread(tmp_path / "multipage" / "frames" / "run_00001.tif").reshape(-1, 20, 24)
    for layout, frames in runs.items():
        # reference: tifffile reading the simulator's single multipage file
        _frames_equal(frames, list(reference))
        assert [(f.index, f.plane, f.channel) for f in frames] == [
            (t, z, c) for t in range(5) for z in range(2) for c in range(2)]


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.uint32])
@pytest.mark.parametrize("options", [{}, {"byteorder": ">"}, {"byteorder": ">", "bigtiff": True},
                                     {"rowsperstrip": 7}, {"compression": "zlib"},
                                     {"compression": "zlib", "predictor": True}])
def test_pages_read_equal_tifffile(tmp_path, dtype, options):
    # Reference library: tifffile.imread of the same file, over byte orders, BigTIFF, strip layouts and compression;
    # every page after the first is decoded through the first page's parse, in native byte order.
    from qcmon.sources.tiffpages import TiffStream

    data = np.random.default_rng(3).integers(0, 250, (6, 33, 20)).astype(dtype)
    path = tmp_path / "pages.tif"
    tifffile.imwrite(path, data, **options)
    items, stop = TiffStream(str(path)).read(100)
    assert stop is None and [p for p, _ in items] == list(range(6))
    got = np.stack([a for _, a in items])
    assert got.dtype == tifffile.imread(path).dtype and got.dtype.isnative
    assert np.array_equal(got, tifffile.imread(path))
