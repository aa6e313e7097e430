"""Batch audit: session discovery, record reuse, errors as rows, outputs, chronic fields over days, dask."""

from __future__ import annotations

import csv
import io
import json
import math
import os
import re
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
import tifffile
from numpy.testing import assert_allclose
from scipy import ndimage

from qcmon.audit import (
    AUDIT_COLUMNS, AuditOptions, Progress, discover_sessions, field_keys, linear_trend, match_fields,
    register_references, reusable, run_audit, session_date,
)
from qcmon.audit._chronic import chronic_table
from qcmon.audit._measure import build_manifest, manifest_path, measure_session, profile_fingerprint
from qcmon.audit._write import CHRONIC_COLUMNS, sparkline, write_csv, write_html


def _texture(seed: int, shape=(96, 96), sigma=2.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return 100 + 50 * ndimage.gaussian_filter(rng.normal(size=shape), sigma) / 0.14


def _tif(path: Path, n=3, shape=(16, 16)) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    tifffile.imwrite(path, np.zeros((n, *shape), np.uint16), photometric="minisblack")
    return path


# ------------------------------------------------------------------------------------------------ discovery
def test_discovery_rule(tmp_path):
    root = tmp_path / "lab"
    _tif(root / "m1" / "2026-11-03" / "frames" / "run_00001.tif")
    _tif(root / "m1" / "2026-11-03" / "zstack.tif")                     # a stack, not frames
    _tif(root / "m1" / "2026-11-04" / "a.TIFF")
    (root / "m2" / "raw").mkdir(parents=True)
    (root / "m2" / "raw" / "frames.raw").write_bytes(b"\0" * 512)
    (root / "m2" / "raw" / "frames.toml").write_text("dtype = 'uint16'\n")
    (root / "m2" / "nosidecar").mkdir()
    (root / "m2" / "nosidecar" / "x.raw").write_bytes(b"\0" * 512)    # raw without sidecar: not a session
    (root / "m2" / "notes").mkdir()
    (root / "m2" / "notes" / "readme.txt").write_text("hello")        # other files only: not a session
    (root / "m3" / "empty").mkdir(parents=True)                        # empty leaf: a row that says so
    _tif(root / "m1" / "old.qcmon" / "reference.tif")                   # our own output, never a session
    rec = root / "m1" / "elsewhere"
    _tif(rec / "reference.tif")
    (rec / "summary.json").write_text(json.dumps({"schema": "qcmon.summary/1", "qcmon_version": "0.1"}))
    _tif(root / ".hidden" / "x.tif")
    out = root / "audit-out"
    _tif(out / "sessions" / "foo.tif")                                   # the audit's own --out folder
    found = discover_sessions([root], skip=(out,))
    rels = [e.rel for e in found]
    assert rels == ["m1/2026-11-03/frames", "m1/2026-11-04", "m2/raw", "m3/empty"]
    by = {e.rel: e for e in found}
    assert by["m1/2026-11-03/frames"].zstack.name == "zstack.tif"
    assert [p.name for p in by["m2/raw"].frame_files] == ["frames.raw"]
    assert by["m3/empty"].frame_files == ()
    # several roots: relative paths carry the root's name
    two = discover_sessions([root / "m1", root / "m2"])
    assert [e.rel for e in two] == ["m1/2026-11-03/frames", "m1/2026-11-04", "m2/raw"]
    with pytest.raises(ValueError, match="not a folder"):
        discover_sessions([root / "nope"])


def test_session_date_from_path_then_mtime(tmp_path):
    assert session_date("m1/2026-11-03/frames") == (datetime(2026, 11, 3), "path")
    assert session_date("2025-01-01/m1/2026-11-03T14-05") == (datetime(2026, 11, 3, 14, 5), "path")
    f = _tif(tmp_path / "a.tif")
    os.utime(f, (1_700_000_000, 1_700_000_000))
    d, origin = session_date("m1/run", [f])
    assert origin == "mtime" and d == datetime(2023, 11, 14, 22, 13, 20)  # 1.7e9 s after the Unix epoch, UTC
    assert session_date("m1/run", []) == (None, "")


# ------------------------------------------------------------------------------------------ registration
@pytest.mark.parametrize("dy, dx", [(0.0, 0.0), (3.4, -2.25), (-7.6, 11.3)])
def test_register_references_recovers_planted_shift(dy, dx):
    ref = _texture(1)
    # planted truth: scipy's Fourier shift moves the content by (+dy, +dx)
    moved = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(ref), (dy, dx))).real
    got_dy, got_dx, corr = register_references(ref, moved)
    assert_allclose([got_dy, got_dx], [dy, dx], atol=0.06)
    assert corr > 0.98
    # scikit-image returns the registering shift: the opposite sign of ours
    from skimage.registration import phase_cross_correlation
    sk, _e, _p = phase_cross_correlation(ref, moved, upsample_factor=20)
    assert_allclose([got_dy, got_dx], -sk, atol=1e-9)


def test_register_references_other_field_and_sizes():
    a, b = _texture(1), _texture(2)
    _dy, _dx, corr = register_references(a, b)
    assert abs(corr) < 0.3
    assert all(math.isnan(v) for v in register_references(a, b[:50]))
    with pytest.raises(ValueError, match="upsample"):
        register_references(a, b, upsample=0)


def test_match_fields_groups_same_texture():
    a, b = _texture(1), _texture(2)
    refs = {"d1/a": a, "d2/a": np.roll(a, (2, -3), axis=(0, 1)) * 0.7, "d1/b": b, "d3/a": np.roll(a, 4, axis=1),
            "d2/b": b + 5}
    fields = match_fields(["d1/a", "d1/b", "d2/a", "d2/b", "d3/a"], refs)
    assert fields == {"d1/a": "d1/a", "d2/a": "d1/a", "d3/a": "d1/a", "d1/b": "d1/b", "d2/b": "d1/b"}


def test_field_keys():
    rels = ["mouse1/fov2/2026-11-03", "mouse1/fov2/2026-11-05", "mouse2/fov1/2026-11-03", "misc/x"]
    assert field_keys(rels, r"^(mouse\d+/fov\d+)/") == {rels[0]: "mouse1/fov2", rels[1]: "mouse1/fov2",
                                                        rels[2]: "mouse2/fov1", rels[3]: None}
    assert field_keys(rels[:1], r"(?P<field>fov\d)")[rels[0]] == "fov2"
    with pytest.raises(ValueError, match="regular expression"):
        field_keys(rels, "(")


def test_linear_trend_matches_numpy_polyfit():
    rng = np.random.default_rng(0)
    days = np.array([0, 2, 7, 8, 15, 21.5])
    vals = 40 - 0.8 * days + rng.normal(0, 0.5, days.size)
    slope, icpt = linear_trend(days, vals)
    ref = np.polyfit(days, vals, 1)  # reference library: numpy least squares
    assert_allclose([slope, icpt], ref, rtol=1e-10)
    with pytest.warns(UserWarning, match="fewer than two days"):
        s, i = linear_trend([3.0, 3.0], [1.0, 2.0])
    assert math.isnan(s) and math.isnan(i)
    with pytest.raises(ValueError, match="same length"):
        linear_trend([1, 2], [1])


def test_chronic_table_shift_and_fading():
    base = _texture(3)
    shifts = [(0, 0), (1.5, 2.0), (1.5, 2.0), (1.5, 14.0)]   # (dy, dx) px of the field on each day
    dates = [datetime(2026, 11, 1), datetime(2026, 11, 8), datetime(2026, 11, 15), datetime(2026, 11, 22)]
    bright = [400.0, 340.0, 280.0, 220.0]                     # −60 DN/week = −15 %/week of 400
    sessions, refs = [], {}
    for i, ((dy, dx), d, b) in enumerate(zip(shifts, dates, bright)):
        rel = f"m1/{d.date()}"
        refs[rel] = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(base), (dy, dx))).real
        sessions.append({"path": rel, "date": d, "pixel_size_um": 0.8, "brightness_above_dark_dn": b,
                         "snr_median": 10 - i, "photons_per_px_median": 2.0, "motion_rms_um": 0.5})
    sessions.append({"path": "other", "date": None, "pixel_size_um": 0.8, "brightness_above_dark_dn": 1.0})
    refs["other"] = _texture(9)
    fields = {s["path"]: "F" for s in sessions[:4]} | {"other": "G"}
    rows = chronic_table(sessions, fields, refs, shift_limit_um=8.0, fade_limit_pct_per_week=10.0)
    assert [r["path"] for r in rows] == [s["path"] for s in sessions[:4]]   # a lone session has no trend
    steps = [math.hypot(2.0, 1.5) * 0.8, 0.0, 12.0 * 0.8]
    assert_allclose([r["shift_um"] for r in rows[1:]], steps, atol=0.05)
    assert_allclose(rows[3]["shift_from_first_um"], math.hypot(1.5, 14.0) * 0.8, atol=0.05)
    assert_allclose(rows[0]["brightness_trend_pct_per_week"], -15.0, rtol=1e-9)
    assert_allclose(rows[0]["snr_trend_per_day"], -1 / 7, rtol=1e-9)
    assert [r["flags"] for r in rows] == ["dimming", "dimming", "dimming", "field_shift;dimming"]
    assert rows[0]["field_flags"] == "dimming;field_shift"
    assert_allclose([r["day"] for r in rows], [0, 7, 14, 21])


# ------------------------------------------------------------------------------------------------ outputs
def test_csv_html_and_progress(tmp_path):
    traces = {"time_s": np.arange(50) / 10, "displacement_um": np.linspace(0, 2, 50),
              "displacement_px": np.linspace(0, 2, 50), "brightness_pct": np.linspace(100, 90, 50)}
    png = sparkline(traces)
    import base64
    assert base64.b64decode(png)[:8] == b"\x89PNG\r\n\x1a\n"
    assert sparkline(None) == ""
    rows = [{"path": "a/<b>", "verdict": "fail", "frames": 50, "motion_max_um": 2.0, "snr_median": math.nan,
             "report": "sessions/a/b.qcmon/report.html", "error": ""},
            {"path": "c", "verdict": "error", "error": "c: not a TIFF file"}]
    p = write_csv(tmp_path / "audit.csv", rows, AUDIT_COLUMNS)
    got = list(csv.DictReader(io.StringIO(p.read_text())))
    assert got[0]["path"] == "a/<b>" and got[0]["snr_median"] == "" and got[1]["error"] == "c: not a TIFF file"
    h = write_html(tmp_path / "audit.html", rows, {"a/<b>": png}, [], title="t", header="h").read_text()
    assert "a/&lt;b&gt;" in h and "<script>" in h and "data:image/png;base64," in h
    assert "href='sessions/a/b.qcmon/report.html'" in h
    assert not re.search(r"(src|href)\s*=\s*['\"]?(https?:)?//", h)           # nothing fetched from outside
    buf = io.StringIO()
    bar = Progress(2, 200, stream=buf)
    bar.update({"rel": "a", "status": "measured", "frames": 100, "bytes": 100})
    bar.update({"rel": "b", "status": "reused", "frames": 100, "bytes": 100, "reused": True})
    lines = buf.getvalue().splitlines()
    assert len(lines) == 2 and lines[0].startswith("audit 1/2 sessions,") and "frames/s" in lines[0]
    assert "0:00 left" in lines[1] and "[reused] b" in lines[1]

    class Tty(io.StringIO):
        def isatty(self):
            return True
    tty = Tty()
    bar = Progress(1, 10, stream=tty)
    bar.update({"rel": "a", "status": "error", "bytes": 10})
    assert tty.getvalue().startswith("\raudit 1/1") and tty.getvalue().endswith("\n")


def test_manifest_changes_with_files_and_profile(tmp_path):
    f = _tif(tmp_path / "s" / "run.tif")
    task = {"rel": "s", "path": str(tmp_path / "s"), "frame_files": [str(f)], "extra_files": [], "zstack": None,
            "record": str(tmp_path / "out" / "s.qcmon"), "profile": "default",
            "profile_fingerprint": profile_fingerprint("default"), "monitor": {}}
    m1 = build_manifest(task)
    assert m1["files"][0][:2] == ["run.tif", f.stat().st_size]
    os.utime(f, ns=(f.stat().st_atime_ns, f.stat().st_mtime_ns + 10**9))
    assert build_manifest(task) != m1
    other = dict(task, profile_fingerprint=profile_fingerprint("awake_headfixed"))
    assert build_manifest(other)["profile"] != m1["profile"]
    assert manifest_path(task["record"]) == tmp_path / "out" / "s.qcmon.json"
    assert reusable(task) is None


def test_empty_session_is_an_error_row_and_reused(tmp_path):
    (tmp_path / "lab" / "empty").mkdir(parents=True)
    res = run_audit(AuditOptions(roots=[tmp_path / "lab"], out_dir=tmp_path / "out"), progress=False)
    (row,) = res["rows"]
    assert row["status"] == "error" and "empty folder" in row["error"] and res["exit_status"] == 1
    again = run_audit(AuditOptions(roots=[tmp_path / "lab"], out_dir=tmp_path / "out"), progress=False)
    assert again["reused"] == 1 and again["rows"][0]["error"] == row["error"]


def test_bad_options(tmp_path):
    (tmp_path / "lab").mkdir()
    with pytest.raises(ValueError, match="workers"):
        run_audit(AuditOptions(roots=[tmp_path / "lab"], out_dir=tmp_path / "o", workers=0), progress=False)
    with pytest.raises(ValueError, match="regular expression"):
        run_audit(AuditOptions(roots=[tmp_path / "lab"], out_dir=tmp_path / "o", group_by="("), progress=False)
    from qcmon.errors import ProfileError
    with pytest.raises(ProfileError):
        run_audit(AuditOptions(roots=[tmp_path / "lab"], out_dir=tmp_path / "o", profile="no-such"), progress=False)
