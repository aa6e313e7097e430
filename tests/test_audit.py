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
from qcmon.audit._measure import build_manifest, manifest_path, profile_fingerprint
from qcmon.audit._write import CHRONIC_COLUMNS, sparkline, write_csv, write_html


def _texture(seed: int, shape=(96, 96), sigma=2.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return 100 + 50 * ndimage.gaussian_filter(rng.normal(size=shape), sigma) / 0.14


def _shifted_view(base: np.ndarray, dy: float, dx: float, size: int = 96) -> np.ndarray:
    """The central ``size`` × ``size`` px of ``base`` with its content moved by (+dy, +dx) px: a field moved under
    the objective, no wrapped content (scipy's Fourier shift of the larger image, then a crop)."""
    moved = np.fft.ifft2(ndimage.fourier_shift(np.fft.fft2(base), (dy, dx))).real
    m = (base.shape[0] - size) // 2
    return moved[m:m + size, m:m + size]


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
    big = _texture(1, shape=(160, 160))
    ref, moved = _shifted_view(big, 0, 0), _shifted_view(big, dy, dx)    # planted truth: (+dy, +dx)
    got_dy, got_dx, corr = register_references(ref, moved)
    assert_allclose([got_dy, got_dx], [dy, dx], atol=0.1)
    assert corr > 0.98
    # reference library: scikit-image's phase correlation (Hann-tapered input, its default phase normalisation)
    # returns the registering shift, the opposite sign of ours
    from skimage.filters import window
    from skimage.registration import phase_cross_correlation
    w = window("hann", ref.shape)
    sk, _e, _p = phase_cross_correlation((ref - ref.mean()) * w, (moved - moved.mean()) * w, upsample_factor=20)
    assert_allclose([got_dy, got_dx], -sk, atol=0.3)


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
    base = _texture(3, shape=(160, 160))
    shifts = [(0, 0), (1.5, 2.0), (1.5, 2.0), (1.5, 14.0)]   # (dy, dx) px of the field on each day
    dates = [datetime(2026, 11, 1), datetime(2026, 11, 8), datetime(2026, 11, 15), datetime(2026, 11, 22)]
    bright = [400.0, 340.0, 280.0, 220.0]                     # −60 DN/week = −15 %/week of 400
    sessions, refs = [], {}
    for i, ((dy, dx), d, b) in enumerate(zip(shifts, dates, bright)):
        rel = f"m1/{d.date()}"
        refs[rel] = _shifted_view(base, dy, dx)
        sessions.append({"path": rel, "date": d, "pixel_size_um": 0.8, "brightness_above_dark_dn": b,
                         "snr_median": 10 - i, "photons_per_px_median": 2.0, "motion_rms_um": 0.5})
    sessions.append({"path": "other", "date": None, "pixel_size_um": 0.8, "brightness_above_dark_dn": 1.0})
    refs["other"] = _texture(9)
    fields = {s["path"]: "F" for s in sessions[:4]} | {"other": "G"}
    rows = chronic_table(sessions, fields, refs, shift_limit_um=8.0, fade_limit_pct_per_week=10.0)
    assert [r["path"] for r in rows] == [s["path"] for s in sessions[:4]]   # a lone session has no trend
    steps = [math.hypot(2.0, 1.5) * 0.8, 0.0, 12.0 * 0.8]
    assert_allclose([r["shift_um"] for r in rows[1:]], steps, atol=0.08)
    assert_allclose(rows[3]["shift_from_first_um"], math.hypot(1.5, 14.0) * 0.8, atol=0.08)
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


# ------------------------------------------------------------------------------- end to end (simulated)
# Small sessions at 4 Hz so that the profile's persistence times (up to 10 s, thresholds/default.toml) are
# exceeded: 100 frames = 25 s.
_SMALL = dict(n_frames=100, height=64, width=64, frame_rate_hz=4.0, mean_photons_per_px=6.0,
              bleach_tau_min=(math.inf,), slow_drift_px=0.2)


def _sim(folder: Path, **kw) -> Path:
    from qcmon.simulate import SimConfig
    from qcmon.simulate._write import write_session

    write_session(SimConfig(**{**_SMALL, **kw}), folder)
    return folder / "frames"


@pytest.fixture(scope="module")
def archive(tmp_path_factory):
    """A small lab archive: clean sessions and planted bad ones (the keys of ``planted``, by relative path)."""
    root = tmp_path_factory.mktemp("archive") / "lab"
    _sim(root / "m1" / "2026-11-03", seed=11)
    _sim(root / "m1" / "2026-11-04", seed=12)
    _sim(root / "m1" / "2026-11-05", seed=13)
    planted = {}
    # a lasting lateral jump of (9, -6) px = 10.8 µm at 1 µm/px: beyond the 5 µm alarm of the default profile
    _sim(root / "m2" / "2026-11-03", seed=21, jumps=((8.0, 9.0, -6.0),))
    planted["m2/2026-11-03/frames"] = "motion"
    # a +6 µm focal step: beyond the 4 µm alarm (reference stack zstack.tif beside the frames)
    _sim(root / "m2" / "2026-11-04", seed=22, z_steps=((8.0, 6.0),))
    planted["m2/2026-11-04/frames"] = "z"
    # detector gain × 8 half-way: bright pixels saturate (alarm at 1 % of pixels)
    _sim(root / "m3" / "2026-11-03", seed=31, gain_change_time_s=12.5, gain_change_factor=8.0)
    planted["m3/2026-11-03/frames"] = "saturation"
    # bleaching with an 18-s time constant (−333 %/min at the start): brightness below the 60 % alarm from 9 s
    _sim(root / "m3" / "2026-11-04", seed=32, bleach_tau_min=(0.3,))
    planted["m3/2026-11-04/frames"] = "brightness"
    # a TIFF cut short by a crash: the last half of its bytes are gone
    trunc = _sim(root / "m4" / "2026-11-03", seed=41) / "run_00001.tif"
    data = trunc.read_bytes()
    trunc.write_bytes(data[: len(data) // 2])
    planted["m4/2026-11-03/frames"] = "error"
    (root / "m4" / "2026-11-04" / "frames").mkdir(parents=True)      # the acquisition wrote nothing
    planted["m4/2026-11-04/frames"] = "error"
    bad = root / "m4" / "2026-11-05" / "frames"
    bad.mkdir(parents=True)
    (bad / "run_00001.tif").write_text("this is a text file, not a TIFF\n" * 50)
    planted["m4/2026-11-05/frames"] = "error"
    out = root.parent / "audit"
    res = run_audit(AuditOptions(roots=[root], out_dir=out, workers=2), progress=False)
    return {"root": root, "out": out, "planted": planted, "result": res}


def _flagged_rows(rows):
    return {r["path"]: r for r in rows if r["status"] == "error" or r["verdict"] == "fail" or r["error"]}


def test_archive_finds_exactly_the_planted_sessions(archive):
    res = archive["result"]
    rows = {r["path"]: r for r in res["rows"]}
    assert len(rows) == 10
    flagged = _flagged_rows(res["rows"])
    assert set(flagged) == set(archive["planted"])
    for rel, what in archive["planted"].items():
        r = rows[rel]
        if what == "error":
            assert r["error"], rel
        else:
            assert r[f"verdict_{what}"] == "fail", (rel, r)
    for rel in ("m1/2026-11-03/frames", "m1/2026-11-04/frames", "m1/2026-11-05/frames"):
        assert rows[rel]["verdict"] in ("pass", "warning") and rows[rel]["error"] == ""
        assert rows[rel]["frames"] == 100
        assert_allclose(rows[rel]["duration_s"], 99 / 4.0, rtol=1e-6)  # simulated frame rate (4 Hz)
    assert "run_00001.tif" in rows["m4/2026-11-05/frames"]["error"]    # the message names the file
    # every session is a different simulated field (its own seed): matching reference images groups none of them
    # (unrelated 64² fields reached a correlation of 0.53 before the default limit was raised to 0.8)
    assert res["chronic"] == [], [(r["field"], r["path"], r["match_corr"]) for r in res["chronic"]]
    assert "empty folder" in rows["m4/2026-11-04/frames"]["error"]
    # the whole-session exponential fit sees the fast bleaching (truth: −100 / 0.3 = −333 %/min initially)
    assert rows["m3/2026-11-04/frames"]["bleach_pct_per_min"] < -150
    assert res["exit_status"] == 1
    # outputs: CSV with every session, HTML with relative report links, no absolute path of the archive
    got = list(csv.DictReader(io.StringIO((archive["out"] / "audit.csv").read_text())))
    assert [g["path"] for g in got] == sorted(rows)
    assert list(got[0]) == list(AUDIT_COLUMNS)
    page = (archive["out"] / "audit.html").read_text()
    assert "href='sessions/m1/2026-11-03/frames.qcmon/report.html'" in page
    assert (archive["out"] / "sessions" / "m1" / "2026-11-03" / "frames.qcmon" / "report.html").is_file()
    # the archive holds nothing new
    assert not list(archive["root"].rglob("*.qcmon")) and not list(archive["root"].rglob("summary.json"))


def test_cli_exit_status_and_only_flagged(archive, tmp_path, capsys):
    import argparse
    import shutil

    from qcmon.audit import add_arguments, run

    out = tmp_path / "cli"
    shutil.copytree(archive["out"], out)
    p = argparse.ArgumentParser()
    add_arguments(p)
    assert run(p.parse_args([str(archive["root"]), "--out", str(out), "--only-flagged", "--quiet"])) == 1
    listed = [g["path"] for g in csv.DictReader(io.StringIO((out / "audit.csv").read_text()))]
    assert sorted(listed) == sorted(archive["planted"])
    assert run(p.parse_args([str(archive["root"]), "--out", str(out), "--no-fail-exit", "--quiet"])) == 0
    # the clean sessions alone pass (their records are reused: same relative paths, names, sizes and mtimes)
    clean = tmp_path / "clean"
    shutil.copytree(archive["root"] / "m1", clean / "m1")
    code = run(p.parse_args([str(clean), "--out", str(out)]))
    err = capsys.readouterr().err
    assert code == 0, err
    assert "audit 3/3 sessions" in err and "3 reused" in err                 # progress, a line per session
    assert run(p.parse_args([str(tmp_path / "missing"), "--out", str(out), "--quiet"])) == 2
    assert run(p.parse_args([str(clean), "--profile", "no-such-profile", "--quiet"])) == 2
    err = capsys.readouterr().err
    assert "missing: not a folder" in err and "no-such-profile" in err


def test_rerun_reuses_records_without_reading_frames(archive, tmp_path, monkeypatch):
    import shutil

    import qcmon.monitor.loop

    calls = {"source": 0, "run": 0}
    real_source, real_run = qcmon.monitor.loop.SessionSource, qcmon.monitor.loop.Monitor.run

    def counting_source(*a, **k):
        calls["source"] += 1
        return real_source(*a, **k)

    def counting_run(self, *a, **k):
        calls["run"] += 1
        return real_run(self, *a, **k)

    monkeypatch.setattr(qcmon.monitor.loop, "SessionSource", counting_source)
    monkeypatch.setattr(qcmon.monitor.loop.Monitor, "run", counting_run)
    # the archive copied elsewhere (copy2 keeps modification times) with its audit folder
    root, out = tmp_path / "lab", tmp_path / "audit"
    shutil.copytree(archive["root"], root)
    shutil.copytree(archive["out"], out)
    res = run_audit(AuditOptions(roots=[root], out_dir=out, workers=1), progress=False)
    assert calls == {"source": 0, "run": 0}
    assert res["reused"] == 10 and res["measured"] == 0
    before = (archive["out"] / "audit.csv").read_text().replace(str(archive["root"]), "ROOT")
    after = (out / "audit.csv").read_text().replace(str(root), "ROOT")
    assert after.replace(",reused,", ",measured,") == before
    # a changed frame file (new modification time) is measured again, and only that session
    g = root / "m1" / "2026-11-04" / "frames" / "run_00001.tif"
    os.utime(g, ns=(g.stat().st_atime_ns, g.stat().st_mtime_ns + 5 * 10**9))
    res = run_audit(AuditOptions(roots=[root], out_dir=out), progress=False)
    assert calls == {"source": 1, "run": 1} and res["measured"] == 1 and res["reused"] == 9
    # another profile (other content hash) is another record
    assert reusable({**_task_of(root, out, "m1/2026-11-04/frames"),
                     "profile_fingerprint": profile_fingerprint("awake_headfixed")}) is None
    assert reusable(_task_of(root, out, "m1/2026-11-04/frames")) is not None


def _task_of(root, out, rel):
    from qcmon.audit._run import _tasks

    entries = [e for e in discover_sessions([root]) if e.rel == rel]
    return _tasks(entries, AuditOptions(roots=[root], out_dir=out), profile_fingerprint("default"))[0]


def test_cluster_gives_the_same_audit_as_local_processes(archive, tmp_path):
    import logging
    import shutil

    distributed = pytest.importorskip("distributed")
    logging.getLogger("distributed").setLevel(logging.ERROR)
    keep = ["m1/2026-11-03", "m1/2026-11-04", "m4"]
    root = tmp_path / "lab"
    for k in keep:
        shutil.copytree(archive["root"] / k, root / k)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as lc:
        res = run_audit(AuditOptions(roots=[root], out_dir=tmp_path / "dask", cluster=lc.scheduler_address),
                        progress=False)
    assert res["measured"] == 2 and res["errors"] == 3
    local = (archive["out"] / "audit.csv").read_text().replace(str(archive["root"]), "ROOT").splitlines()
    local = [ln for ln in local if ln.startswith(("path,", *keep))]
    dask = (tmp_path / "dask" / "audit.csv").read_text().replace(str(root), "ROOT").splitlines()
    assert dask == local


def test_chronic_series_shift_and_fading(tmp_path):
    # One field (same specimen seed) on four days: the content shifted by a known lasting jump from t = 0,
    # and fewer photons each week (−15 % of the first day per week).
    pos = [(0.0, 0.0), (2.5, -1.5), (3.0, -1.0), (14.0, -1.0)]      # (dx, dy) px of the field
    photons = [8.0, 6.8, 5.6, 4.4]
    root = tmp_path / "chronic"
    for i, ((dx, dy), ph) in enumerate(zip(pos, photons)):
        _sim(root / "mouse1" / f"2026-11-{1 + 7 * i:02d}", seed=5, n_frames=60, height=80, width=80,
             jumps=((0.0, dx, dy),) if (dx or dy) else (), margin_px=20, slow_drift_px=0.0, jitter_px=0.05,
             mean_photons_per_px=ph)
    res = run_audit(AuditOptions(roots=[root], out_dir=tmp_path / "out", workers=2), progress=False)
    rows = res["chronic"]
    assert [r["path"] for r in rows] == [f"mouse1/2026-11-{1 + 7 * i:02d}/frames" for i in range(4)]
    assert len({r["field"] for r in rows}) == 1                      # found by matching reference images
    steps = [math.hypot(b[0] - a[0], b[1] - a[1]) for a, b in zip(pos, pos[1:])]  # planted, 1 µm/px
    assert_allclose([r["shift_um"] for r in rows[1:]], steps, atol=0.5)
    assert_allclose([r["shift_dx_um"] for r in rows[1:]], [b[0] - a[0] for a, b in zip(pos, pos[1:])], atol=0.5)
    assert "dimming" in rows[0]["field_flags"] and "field_shift" in rows[3]["flags"]
    assert rows[1]["flags"] == "dimming"                              # 2.9 µm: below the 10 µm limit
    assert rows[0]["brightness_trend_pct_per_week"] < -10
    got = list(csv.DictReader(io.StringIO((tmp_path / "out" / "chronic.csv").read_text())))
    assert list(got[0]) == list(CHRONIC_COLUMNS) and len(got) == 4
    assert "field_shift" in (tmp_path / "out" / "audit.html").read_text()
    assert res["exit_status"] == 1
    # the same series grouped by a tag on the path gives the same field
    res2 = run_audit(AuditOptions(roots=[root], out_dir=tmp_path / "out", group_by=r"^(mouse\d+)/"),
                     progress=False)
    assert {r["field"] for r in res2["chronic"]} == {"mouse1"} and res2["reused"] == 4


# ------------------------------------------------------------------------------------------------ the page
def test_a_truncated_or_unread_session_is_never_a_green_pass():
    from qcmon.audit._write import page_state

    assert page_state({"verdict": "pass", "status": "measured", "error": ""}) == ("pass", "✓ PASS")
    cls, word = page_state({"verdict": "pass", "status": "measured",
                            "error": "run_3.tif, page 0: file is incomplete at the end"})
    assert cls != "pass" and "INCOMPLETE" in word
    assert page_state({"verdict": "error", "status": "error", "error": "not a TIFF"})[0] == "error"
    assert page_state({"verdict": "fail", "status": "measured", "error": "x"})[0] == "fail"


def test_worst_sessions_come_first():
    from qcmon.audit._write import worst_first

    rows = [{"path": "a", "verdict": "pass", "status": "measured", "error": ""},
            {"path": "b", "verdict": "warning", "status": "measured", "error": "", "alarms": 0, "warnings": 1},
            {"path": "c", "verdict": "fail", "status": "measured", "error": "", "alarms": 1, "warnings": 0},
            {"path": "d", "verdict": "fail", "status": "measured", "error": "", "alarms": 4, "warnings": 0},
            {"path": "e", "verdict": "pass", "status": "measured", "error": "truncated"},
            {"path": "f", "verdict": "error", "status": "error", "error": "unreadable"},
            {"path": "g", "verdict": "unknown", "status": "measured", "error": ""}]
    assert [r["path"] for r in worst_first(rows)] == ["f", "e", "d", "c", "b", "g", "a"]


def test_fields_are_named_by_the_path_their_sessions_share():
    from qcmon.audit import match_fields  # noqa: F401 - the names replace its first-session keys
    from qcmon.audit._chronic import shared_path_names

    got = shared_path_names({"m1/fov2/2026-11-01": "k1", "m1/fov2/2026-11-08": "k1",
                             "m1/2026-11-01/fovA": "k2", "m1/2026-11-08/fovA": "k2",
                             "m2/2026-11-01/fovB": "k3", "m9/x": "k4",
                             "m3/a/deep/s1": "k5", "m3/a/s2": "k5"})
    assert got["m1/fov2/2026-11-08"] == "m1/fov2" and got["m1/2026-11-08/fovA"] == "m1/*/fovA"
    assert got["m2/2026-11-01/fovB"] == "m2/2026-11-01/fovB" and got["m3/a/s2"] == "m3/a"
    # two fields whose shared paths coincide stay two fields
    twin = shared_path_names({"m1/d1/s": "k1", "m1/d2/s": "k1", "m1/d3/s": "k2", "m1/d4/s": "k2"})
    assert twin["m1/d1/s"] != twin["m1/d3/s"] and twin["m1/d1/s"] == "m1/*/s"


def test_sparkline_axes_keep_small_changes_small():
    from qcmon.audit._write import sparkline_scale

    # a 1 % change of brightness and 0.1 µm of motion: the axes stay 80–100 % and 0–2 µm wide, so the change
    # fills 5 % of the height, not all of it (levels: the default profile's brightness and displacement warnings)
    top, (lo, hi) = sparkline_scale(np.array([0.1, 0.2]), np.array([100.0, 99.0]))
    assert top == 2.0 and (lo, hi) == (80.0, 100.0)
    top, (lo, hi) = sparkline_scale(np.array([0.1, 9.0]), np.array([130.0, 40.0]))
    assert top == 9.0 and (lo, hi) == (40.0, 130.0)
    assert sparkline_scale(np.array([np.nan]), np.array([np.nan])) == (2.0, (80.0, 100.0))
