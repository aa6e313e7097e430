"""Archives as labs keep them: compressed TIFF, HDF5, NWB and (OME-)Zarr give the same frames and the same numbers
as the equivalent uncompressed TIFF.

Every container here is written by the format's own library (tifffile + imagecodecs, h5py, pynwb — the NWB
standard's reference implementation —, zarr), never by qcmon; the frames are a real fluorescence specimen
(``outside_data.nuclei_2d``) moved by known shifts and detected through the EMVA 1288 camera model.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import tifffile

from outside_data import detect, nuclei_2d, specimen_crop
from qcmon.cli import main
from qcmon.sources import SessionSource

h5py = pytest.importorskip("h5py")

T, H, W = 40, 64, 64
RATE_HZ, PIXEL_UM = 15.0, 0.5


@pytest.fixture(scope="module")
def frames() -> np.ndarray:
    """(T, H, W) uint16: the specimen moved by up to ±2 px, 12-bit camera (gain 2 DN/photon, offset 100 DN)."""
    rng = np.random.default_rng(17)
    img = nuclei_2d().astype(np.float64)
    expected = img / img.max() * 400.0 + 5.0  # photons per pixel
    shifts = rng.uniform(-2, 2, (T, 2))
    return np.stack([detect(specimen_crop(expected, (H, W), dy, dx, margin=8), rng, gain=2.0, offset=100.0,
                            read_noise_dn=3.0, bits=12) for dy, dx in shifts])


def _tiff(path: Path, data: np.ndarray, **kw) -> None:
    tifffile.imwrite(path, data, photometric="minisblack", imagej=True, resolution=(1 / PIXEL_UM, 1 / PIXEL_UM),
                     metadata={"axes": "TYX", "finterval": 1 / RATE_HZ, "unit": "um"}, **kw)


def _summarize(path: Path, out: Path, *extra: str) -> tuple[list[dict], dict]:
    assert main(["summarize", str(path), "--out", str(out), *extra]) == 0
    with open(out / "traces.csv", newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    return rows, json.loads((out / "summary.json").read_text(encoding="utf-8"))


@pytest.fixture(scope="module")
def reference(frames, tmp_path_factory):
    """traces.csv rows and summary.json of the plain uncompressed TIFF of ``frames``."""
    d = tmp_path_factory.mktemp("tiff")
    _tiff(d / "plain.tif", frames)
    return _summarize(d / "plain.tif", d / "plain.qcmon")


def _close(a, b, where: str = "") -> None:
    """Equal to 1e-9 relative (as live against offline): a rate of 1/66.67 ms is 15 Hz to 1e-16, not exactly, and a
    bleach fit over 40 frames turns that into 1e-12."""
    if isinstance(a, dict) and isinstance(b, dict):
        assert sorted(a) == sorted(b), where
        for k in a:
            _close(a[k], b[k], f"{where}.{k}")
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b)):
            _close(x, y, f"{where}[{i}]")
    else:
        try:
            x, y = float(a), float(b)
        except (TypeError, ValueError):
            assert a == b, where
            return
        assert x == pytest.approx(y, rel=1e-9, abs=1e-12, nan_ok=True), where


def _same_numbers(got: tuple[list[dict], dict], want: tuple[list[dict], dict]) -> None:
    rows, summary = got
    ref_rows, ref_summary = want
    assert len(rows) == len(ref_rows) == T
    for i, (a, b) in enumerate(zip(rows, ref_rows)):
        _close({k: v for k, v in a.items() if k not in ("source", "page")},
               {k: v for k, v in b.items() if k not in ("source", "page")}, f"row {i}")
    skip = {"facts", "session", "problems", "frame_rate", "dataset"}  # which session and format, not what was measured
    _close({k: v for k, v in summary.items() if k not in skip}, {k: v for k, v in ref_summary.items() if k not in skip})
    assert summary["frame_rate"]["hz"] == pytest.approx(ref_summary["frame_rate"]["hz"])
    facts, ref_facts = summary["facts"], ref_summary["facts"]
    for key in ("frame_rate_hz", "pixel_size_um", "channels", "planes", "dtype", "shape"):
        assert facts[key]["value"] == pytest.approx(ref_facts[key]["value"]), key


def _digest(path: Path) -> str:
    h = hashlib.sha256()
    for p in sorted(path.rglob("*")) if path.is_dir() else [path]:
        if p.is_file():
            h.update(p.name.encode() + p.read_bytes())
    return h.hexdigest()


# ------------------------------------------------------------------------------------------ compressed TIFF
LOSSLESS = [  # (tifffile compression, extra keywords); every one must give the frames bit for bit
    ("lzw", {}), ("lzw", {"predictor": True}), ("zlib", {"predictor": True}), ("zstd", {}), ("lzma", {}),
    ("jpeg2000", {"compressionargs": {"level": 0}}),  # reversible 5/3 wavelet (ISO/IEC 15444-1): lossless
    ("jpegxr", {"compressionargs": {"level": 1.0}}),  # quality 1.0 is lossless in JPEG XR (ITU-T T.832)
    ("zlib", {"tile": (32, 32)}),  # tiled pages, as converters write them
]


@pytest.mark.parametrize("compression, kw", LOSSLESS, ids=[f"{c}-{'-'.join(k)}" for c, k in LOSSLESS])
def test_lossless_compressed_tiff_gives_the_same_frames(frames, tmp_path, compression, kw):
    import imagecodecs

    codec = {"lzw": "LZW", "zlib": "DEFLATE", "zstd": "ZSTD", "lzma": "LZMA", "jpeg2000": "JPEG2K",
             "jpegxr": "JPEGXR"}[compression]
    if not getattr(imagecodecs, codec).available:
        pytest.skip(f"imagecodecs built without {codec}")
    path = tmp_path / "c.tif"
    tifffile.imwrite(path, frames[:6], photometric="minisblack", compression=compression, **kw)
    with tifffile.TiffFile(path) as tif:  # the file really is compressed as asked
        assert tif.pages[0].compression.name.lower().startswith(compression[:4].replace("zlib", "adob"))
    source = SessionSource(path)
    got = source.poll(final=True)
    assert source.problems == []
    np.testing.assert_array_equal(np.stack([f.data for f in got]), frames[:6])


def test_lzw_tiff_gets_the_numbers_of_the_plain_tiff(frames, reference, tmp_path):
    _tiff(tmp_path / "lzw.tif", frames, compression="lzw", predictor=True)
    _same_numbers(_summarize(tmp_path / "lzw.tif", tmp_path / "lzw.qcmon"), reference)


def test_jpeg_tiff_is_read_within_its_quantisation_error(frames, tmp_path):
    # baseline JPEG is 8-bit (ITU-T T.81): an 8-bit acquisition at quality 95; its error is the DCT quantisation,
    # a few DN at most at this quality (common practice, no source) — documented, not measured as equal
    eight = (frames[:4] >> 4).astype(np.uint8)
    tifffile.imwrite(tmp_path / "j.tif", eight, photometric="minisblack", compression="jpeg",
                     compressionargs={"level": 95})
    source = SessionSource(tmp_path / "j.tif")
    got = np.stack([f.data for f in source.poll(final=True)]).astype(np.int16)
    assert source.problems == []
    err = np.abs(got - eight)
    assert 0 < err.max() <= 12 and err.mean() < 1.5


# ------------------------------------------------------------------------------------------ HDF5
def test_hdf5_dataset_gets_the_numbers_of_the_tiff(frames, reference, tmp_path):
    path = tmp_path / "s.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("notes/mean_image", data=frames.mean(0))  # 2-D: not an image series
        d = f.create_dataset("imaging/movie", data=frames, chunks=(8, H, W), compression="gzip")
        d.attrs["frame_rate_hz"] = RATE_HZ
        f["imaging"].attrs["pixel_size_um"] = PIXEL_UM  # found on the group above the dataset
    before = _digest(path)
    _same_numbers(_summarize(path, tmp_path / "s.qcmon"), reference)
    assert _digest(path) == before  # nothing written into the archive


def test_hdf5_5d_dataset_runs_time_plane_channel(frames, tmp_path):
    data = frames[:24].reshape(4, 2, 3, H, W)  # (t, c, z, y, x), axes named by HDF5 dimension labels
    path = tmp_path / "v.h5"
    with h5py.File(path, "w") as f:
        d = f.create_dataset("v", data=data, chunks=(2, 1, 1, H, W))
        for i, name in enumerate("tczyx"):
            d.dims[i].label = name
        f.create_dataset("w", data=np.transpose(data, (0, 2, 3, 4, 1)))  # (t, z, y, x, c), named by attribute
        f["w"].attrs["axes"] = "tzyxc"
    for name in ("v", "w"):
        source = SessionSource(path, dataset=name)
        got = source.poll(final=True)
        assert source.problems == [] and len(got) == 24
        assert source.facts.get("channels") == 2 and source.facts.get("planes") == 3
        want = [(t, c, z) for t in range(4) for z in range(3) for c in range(2)]  # time -> plane -> channel
        assert [(f.index, f.channel, f.plane) for f in got] == want
        for f in got:
            np.testing.assert_array_equal(f.data, data[f.index, f.channel, f.plane])


def test_hdf5_written_in_swmr_mode_can_be_watched(frames, tmp_path):
    path = tmp_path / "live.h5"
    writer = textwrap.dedent(f"""
        import sys, h5py, numpy as np
        data = np.load({str(tmp_path / 'f.npy')!r})
        with h5py.File({str(path)!r}, "w", libver="latest") as f:
            d = f.create_dataset("movie", shape=(0, {H}, {W}), maxshape=(None, {H}, {W}), dtype="uint16",
                                 chunks=(1, {H}, {W}))
            f.swmr_mode = True
            print("ready", flush=True)
            for k in range(3):
                sys.stdin.readline()
                d.resize(4 * (k + 1), axis=0)
                d[4 * k:4 * (k + 1)] = data[4 * k:4 * (k + 1)]
                d.flush()
                print("wrote", flush=True)
            sys.stdin.readline()
    """)
    np.save(tmp_path / "f.npy", frames[:12])
    with subprocess.Popen([sys.executable, "-c", writer], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                          text=True) as proc:
        got = _watch_swmr(proc, path)
    np.testing.assert_array_equal(np.stack([f.data for f in got]), frames[:12])


def _watch_swmr(proc, path: Path) -> list:
    try:
        assert proc.stdout.readline().strip() == "ready"
        source = SessionSource(path)
        got = []
        for _ in range(3):
            proc.stdin.write("\n")
            proc.stdin.flush()
            assert proc.stdout.readline().strip() == "wrote"
            got += source.poll()  # the writer holds the file open: reading neither fails nor locks it out
            assert len(got) == len(got) // 4 * 4 > 0
        assert source.problems == []
        proc.stdin.write("\n")
        proc.stdin.flush()
        assert proc.wait(30) == 0  # the writer closed its file normally
    finally:
        if proc.poll() is None:
            proc.kill()
    return got


# ------------------------------------------------------------------------------------------ NWB
def _nwb(path: Path, series: dict[str, np.ndarray], *, timestamps=None) -> None:
    """An NWB file written by pynwb (the standard's reference implementation), one TwoPhotonSeries per entry."""
    from datetime import datetime, timezone

    pynwb = pytest.importorskip("pynwb")
    from pynwb.ophys import OpticalChannel, TwoPhotonSeries

    nwb = pynwb.NWBFile(session_description="test", identifier="t1",
                        session_start_time=datetime(2026, 1, 2, tzinfo=timezone.utc))
    device = nwb.create_device(name="scope")
    channel = OpticalChannel(name="green", description="green", emission_lambda=520.0)
    plane = nwb.create_imaging_plane(name="plane0", optical_channel=channel, description="L2/3", device=device,
                                     excitation_lambda=920.0, imaging_rate=RATE_HZ, indicator="GCaMP",
                                     location="V1", grid_spacing=[PIXEL_UM * 1e-6, PIXEL_UM * 1e-6],
                                     grid_spacing_unit="meters")
    for name, data in series.items():
        # NWB ImageSeries data are (frame, x, y): x, the column, before y
        kw = {"timestamps": timestamps} if timestamps is not None else {"rate": RATE_HZ}
        nwb.add_acquisition(TwoPhotonSeries(name=name, data=np.ascontiguousarray(np.transpose(data, (0, 2, 1))),
                                            imaging_plane=plane, unit="normalized amplitude", **kw))
    with pynwb.NWBHDF5IO(str(path), "w") as io:
        io.write(nwb)


def test_nwb_schema_says_frame_x_y():
    # the dimension order qcmon reads is the one in the NWB core schema shipped with pynwb
    pynwb = pytest.importorskip("pynwb")
    from ruamel.yaml import YAML

    schema = Path(pynwb.__file__).parent / "nwb-schema" / "core" / "nwb.image.yaml"
    spec = YAML(typ="safe").load(schema.read_text(encoding="utf-8"))
    image_series = next(g for g in spec["groups"] if g.get("neurodata_type_def") == "ImageSeries")
    data = next(d for d in image_series["datasets"] if d["name"] == "data")
    assert data["dims"] == [["frame", "x", "y"], ["frame", "x", "y", "z"]]


def test_nwb_series_get_the_numbers_of_the_tiff(frames, reference, tmp_path, capsys):
    path = tmp_path / "s.nwb"
    _nwb(path, {"TwoPhotonSeries": frames, "TwoPhotonSeriesDim": frames // 2})
    before = _digest(path)
    source = SessionSource(path, dataset="TwoPhotonSeriesDim")
    assert len(source.poll(final=True)) == T
    facts = source.facts
    assert facts.get("frame_rate_hz") == RATE_HZ and facts.get("pixel_size_um") == pytest.approx(PIXEL_UM)
    assert facts.get("indicator") == "GCaMP" and facts.get("imaging_plane") == "plane0"
    # several series and no choice: nothing measurable, an input error (exit 2) whose message names the file and
    # the series, and no record started
    capsys.readouterr()
    assert main(["summarize", str(path), "--out", str(tmp_path / "x")]) == 2
    err = capsys.readouterr().err
    assert "holds 2 image series" in err and "--dataset" in err and str(path) in err, err
    assert not (tmp_path / "x").exists()
    _same_numbers(_summarize(path, tmp_path / "s.qcmon", "--dataset", "TwoPhotonSeries"), reference)
    assert _digest(path) == before


def test_nwb_timestamps_give_the_frame_times(frames, tmp_path):
    stamps = 100.0 + np.arange(8) / RATE_HZ + np.r_[0, 0, 0, 0.5, 0.5, 0.5, 0.5, 0.5]  # a pause after frame 3
    _nwb(tmp_path / "t.nwb", {"TwoPhotonSeries": frames[:8]}, timestamps=stamps)
    got = SessionSource(tmp_path / "t.nwb").poll(final=True)
    np.testing.assert_allclose([f.time_s for f in got], stamps - stamps[0])
    np.testing.assert_array_equal(np.stack([f.data for f in got]), frames[:8])


# ------------------------------------------------------------------------------------------ OME-Zarr
def _ome_zarr(path: Path, data: np.ndarray) -> None:
    """An OME-Zarr image (OME-NGFF 0.4, https://ngff.openmicroscopy.org/0.4/): two levels, axes t, y, x."""
    zarr = pytest.importorskip("zarr", minversion="3")  # zarr 3 needs Python 3.11
    root = zarr.open_group(str(path), mode="w", zarr_format=2)
    root.create_array("0", data=data, chunks=(8, H, W))
    root.create_array("1", data=data[:, ::2, ::2], chunks=(8, H // 2, W // 2))
    root.attrs["multiscales"] = [{
        "version": "0.4", "name": "movie",
        "axes": [{"name": "t", "type": "time", "unit": "millisecond"},
                 {"name": "y", "type": "space", "unit": "micrometer"},
                 {"name": "x", "type": "space", "unit": "micrometer"}],
        "datasets": [{"path": "0", "coordinateTransformations": [{"type": "scale",
                                                                  "scale": [1000 / RATE_HZ, PIXEL_UM, PIXEL_UM]}]},
                     {"path": "1", "coordinateTransformations": [{"type": "scale",
                                                                  "scale": [1000 / RATE_HZ, 2 * PIXEL_UM,
                                                                            2 * PIXEL_UM]}]}],
    }]


def test_ome_zarr_full_resolution_gets_the_numbers_of_the_tiff(frames, reference, tmp_path):
    path = tmp_path / "s.ome.zarr"
    _ome_zarr(path, frames)
    before = _digest(path)
    _same_numbers(_summarize(path, tmp_path / "z.qcmon"), reference)
    assert _digest(path) == before


# ------------------------------------------------------------------------------------------ bad input
def test_bad_containers_give_a_clear_message_naming_file_and_dataset(frames, tmp_path):
    (tmp_path / "text.h5").write_text("acquisition log, not HDF5\n", encoding="utf-8")
    with h5py.File(tmp_path / "ok.h5", "w") as f:
        f.create_dataset("movie", data=frames[:8], chunks=(1, H, W))
        f.create_dataset("flat", data=frames[0])
        f.create_dataset("floaty", data=frames[:8].astype(np.float32))
        f.create_dataset("four", data=frames[:8].reshape(2, 4, H, W))
    blob = (tmp_path / "ok.h5").read_bytes()
    (tmp_path / "cut.h5").write_bytes(blob[: len(blob) // 2])
    (tmp_path / "empty.zarr").mkdir()
    cases = [
        ("text.h5", None, "not an HDF5 file"),
        ("cut.h5", None, "truncated"),
        ("ok.h5", None, "holds 3 image series"),
        ("ok.h5", "flat", "dataset flat has 2 axes"),
        ("ok.h5", "floaty", "dataset floaty holds float32 values"),
        ("ok.h5", "four", "dataset four has 4 axes (2, 4, 64, 64) without names"),
        ("ok.h5", "nothing", "no image series 'nothing'"),
        ("empty.zarr", None, "Zarr"),
    ]
    for name, dataset, words in cases:
        source = SessionSource(tmp_path / name, dataset=dataset)
        assert source.poll(final=True) == []
        assert len(source.problems) == 1, (name, dataset)
        message = str(source.problems[0])
        assert words in message and str(tmp_path / name) in message, message
    # the 4-D dataset is read once told what its second axis is
    got = SessionSource(tmp_path / "ok.h5", dataset="four", planes=4).poll(final=True)
    assert [(f.index, f.plane) for f in got] == [(t, z) for t in range(2) for z in range(4)]
    # --dataset on a TIFF: a usage error, no traceback
    _tiff(tmp_path / "a.tif", frames[:2])
    assert main(["summarize", str(tmp_path / "a.tif"), "--dataset", "x", "--out", str(tmp_path / "r")]) == 2


def test_tiff_sessions_do_not_load_hdf5_or_zarr(frames, tmp_path):
    _tiff(tmp_path / "a.tif", frames[:32])
    code = textwrap.dedent(f"""
        import sys
        from qcmon.cli import main
        assert main(["summarize", {str(tmp_path / 'a.tif')!r}, "--out", {str(tmp_path / 'r')!r}]) == 0
        print(sorted(m for m in ("h5py", "zarr", "pynwb") if m in sys.modules))
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         env={**os.environ, "PYTHONWARNINGS": "ignore"})
    assert out.stdout.strip().splitlines()[-1] == "[]"


# ------------------------------------------------------------------------------------------ audit
def test_audit_finds_container_sessions(frames, tmp_path):
    from qcmon.audit import discover_sessions

    root = tmp_path / "lab"
    (root / "m1").mkdir(parents=True)
    _nwb(root / "m1" / "day1.nwb", {"TwoPhotonSeries": frames[:4], "TwoPhotonSeriesB": frames[4:8]})
    with h5py.File(root / "m1" / "day2.h5", "w") as f:
        f.create_dataset("movie", data=frames[:4])
    with h5py.File(root / "m1" / "table.h5", "w") as f:  # not an image series: not a session
        f.create_dataset("trace", data=np.zeros(100))
    _ome_zarr(root / "m1" / "day3.ome.zarr", frames[:8])
    (root / "m1" / "broken.nwb").write_bytes(b"\0" * 64)
    found = {e.rel: (e.path.name, e.dataset) for e in discover_sessions([root])}
    assert found == {
        "m1/broken.nwb": ("broken.nwb", None),
        "m1/day1.nwb/TwoPhotonSeries": ("day1.nwb", "TwoPhotonSeries"),
        "m1/day1.nwb/TwoPhotonSeriesB": ("day1.nwb", "TwoPhotonSeriesB"),
        "m1/day2.h5": ("day2.h5", None),
        "m1/day3.ome.zarr": ("day3.ome.zarr", None),
    }


def test_watch_refuses_what_cannot_be_read_while_written(frames, tmp_path, capsys):
    # HDF5 File Format Specification II.A: SWMR needs superblock version 3; h5py's default writes version 0
    with h5py.File(tmp_path / "old.h5", "w") as f:
        f.create_dataset("movie", data=frames[:4])
    _ome_zarr(tmp_path / "z.zarr", frames[:4])
    for name, words in (("old.h5", "not written in SWMR mode"), ("z.zarr", "cannot be watched")):
        assert main(["watch", str(tmp_path / name), "--plain", "--until-idle", "1",
                     "--out", str(tmp_path / f"{name}.rec")]) == 2
        assert not (tmp_path / f"{name}.rec").exists()
        err = capsys.readouterr().err
        assert words in err and str(tmp_path / name) in err and "qcmon summarize" in err


def test_lossy_jpeg_session_leaves_the_noise_figures_blank(frames, tmp_path):
    # bench/bench_formats.py measured JPEG quality 95 on 8-bit frames of a few photons per pixel: noise σ 0.37×,
    # SNR 12× the uncompressed file's — numbers of the codec, not the detector, so they are left blank with a reason
    eight = (frames >> 4).astype(np.uint8)
    tifffile.imwrite(tmp_path / "j.tif", eight, photometric="minisblack", compression="jpeg",
                     compressionargs={"level": 95})
    rows, summary = _summarize(tmp_path / "j.tif", tmp_path / "j.qcmon")
    assert len(rows) == T
    for column in ("noise_sigma", "snr", "photons_per_px", "shot_snr"):
        assert all(r[column] == "" for r in rows), column
    assert all(r["dx_px"] != "" and r["mean_f"] != "" for r in rows)  # the rest is measured
    assert summary["snr"]["median"] is None and summary["photon_transfer"]["gain"] is None
    assert summary["facts"]["compression"] == {"value": "JPEG", "origin": "TIFF tags"}
    assert any("lossy JPEG compression" in p and "left blank" in p for p in summary["problems"])


def test_ome_zarr_05_five_axes(frames, tmp_path):
    # OME-NGFF 0.5 (https://ngff.openmicroscopy.org/0.5/): Zarr format 3, the metadata under attributes["ome"]
    zarr = pytest.importorskip("zarr", minversion="3")
    data = frames[:12].reshape(2, 2, 3, H, W)  # t, c, z, y, x
    root = zarr.open_group(str(tmp_path / "v.zarr"), mode="w", zarr_format=3)
    root.create_array("s0", data=data, chunks=(1, 1, 1, H, W))
    root.create_array("s1", data=data[..., ::2, ::2], chunks=(1, 1, 1, H // 2, W // 2))
    axes = [{"name": "t", "type": "time", "unit": "second"}, {"name": "c", "type": "channel"},
            {"name": "z", "type": "space", "unit": "micrometer"}, {"name": "y", "type": "space", "unit": "micrometer"},
            {"name": "x", "type": "space", "unit": "micrometer"}]
    scale = [0.25, 1.0, 2.0, PIXEL_UM, PIXEL_UM]
    root.attrs["ome"] = {"version": "0.5", "multiscales": [{"axes": axes, "datasets": [
        {"path": "s0", "coordinateTransformations": [{"type": "scale", "scale": scale}]},
        {"path": "s1", "coordinateTransformations": [{"type": "scale", "scale": scale[:3] + [1.0, 1.0]}]}]}]}
    source = SessionSource(tmp_path / "v.zarr")
    got = source.poll(final=True)
    assert source.problems == [] and len(got) == 12
    assert [(f.index, f.channel, f.plane) for f in got] == [(t, c, z) for t in range(2) for z in range(3)
                                                            for c in range(2)]
    for f in got:
        np.testing.assert_array_equal(f.data, data[f.index, f.channel, f.plane])
    facts = source.facts
    assert facts.get("frame_rate_hz") == 4.0 and facts.get("z_step_um") == 2.0
    assert facts.get("pixel_size_um") == PIXEL_UM and facts.get("channels") == 2 and facts.get("planes") == 3


def test_audit_measures_each_series_of_an_nwb_file(frames, tmp_path):
    root = tmp_path / "lab"
    root.mkdir()
    _nwb(root / "day1.nwb", {"TwoPhotonSeries": frames[:32], "TwoPhotonSeriesB": frames[8:40]})
    before = _digest(root)
    assert main(["audit", str(root), "--out", str(tmp_path / "qc"), "--quiet"]) in (0, 1)
    with open(tmp_path / "qc" / "audit.csv", newline="", encoding="utf-8") as fh:
        rows = {r["path"]: r for r in csv.DictReader(fh)}
    assert sorted(rows) == ["day1.nwb/TwoPhotonSeries", "day1.nwb/TwoPhotonSeriesB"]
    for path, row in rows.items():
        assert row["status"] == "measured" and row["frames"] == "32", row
        summary = json.loads((tmp_path / "qc" / "sessions" / f"{path}.qcmon" / "summary.json").read_text())
        assert summary["facts"]["series"]["value"] == path.split("/")[-1]
    assert _digest(root) == before  # nothing written into the archive
