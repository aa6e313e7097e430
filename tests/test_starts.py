"""Any start, end to end through the command line: dark, constant, saturated or noise-only first frames, a first
file of another size, one-frame and tiny sessions, signed pixels — every frame gets its row, blank values have a
reason in the events, a problem names file and page, and no traceback ever (``summarize``, ``watch``, ``audit``).

The specimen is the real fluorescence image of ``tests/outside_data.py`` (stardist wheel) through the EMVA 1288
camera model (``outside_data.detect``), not qcmon's simulator.
"""

from __future__ import annotations

import csv
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import tifffile

from outside_data import detect, nuclei_2d, specimen_crop

S = (64, 64)


def _good(rng, n, shape=S):
    img = nuclei_2d().astype(np.float64)
    img *= 5.0 / img.mean()  # 5 photons/px on average
    return [detect(specimen_crop(img, shape, *rng.uniform(-1, 1, 2)), rng, gain=3.0, offset=100.0,
                   read_noise_dn=8.0, bits=12) for _ in range(n)]


def _cases(rng) -> dict[str, tuple[list[np.ndarray], int]]:
    """name -> (frames, leading frames without structure)."""
    good = _good(rng, 40)
    dark_noise = [detect(np.zeros(S), rng, gain=3.0, offset=100.0, read_noise_dn=8.0, bits=12) for _ in range(35)]
    half_sat = [np.where(f > np.percentile(f, 30), 4095, f).astype(np.uint16) for f in _good(rng, 35)]
    return {
        "dark_zero": ([np.zeros(S, np.uint16)] * 35 + good, 35),  # digitiser offset below zero: all 0
        "constant": ([np.full(S, 100, np.uint16)] * 35 + good, 35),
        "shutter_closed": (dark_noise + good, 35),  # read noise only
        "saturated": ([np.full(S, 4095, np.uint16)] * 35 + good, 35),
        "mostly_saturated": (half_sat + good, 35),
        "all_dark": ([np.zeros(S, np.uint16)] * 12, 12),
        "one_frame": (good[:1], 1),
        "two_frames": (good[:2], 0),
        "tiny_frames": ([f[:10, :10] for f in good], 40),
        "signed": ([(f.astype(np.int32) - 100).astype(np.int16) for f in [np.full(S, 100, np.uint16)] * 5 + good],
                   5),
    }


@pytest.fixture(scope="module")
def sessions(tmp_path_factory) -> tuple[Path, dict]:
    root = tmp_path_factory.mktemp("starts")
    rng = np.random.default_rng(2)
    cases = _cases(rng)
    for name, (frames, _) in cases.items():
        (root / name).mkdir()
        tifffile.imwrite(root / name / "s.tif", np.stack(frames), photometric="minisblack")
    (root / "first_file_size").mkdir()
    tifffile.imwrite(root / "first_file_size" / "a_000.tif", np.stack(_good(rng, 5, (32, 48))),
                     photometric="minisblack")
    for k in (1, 2):
        tifffile.imwrite(root / "first_file_size" / f"a_00{k}.tif", np.stack(_good(rng, 30)),
                         photometric="minisblack")
    cases["first_file_size"] = ([None] * 65, 0)
    return root, cases


def _qcmon(*args: str, timeout: float = 300) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "qcmon", *map(str, args)], capture_output=True, text=True,
                          timeout=timeout)


def _record(out: Path) -> tuple[list[dict], list[dict], dict]:
    with open(out / "traces.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    events = [json.loads(line) for line in (out / "events.jsonl").read_text().splitlines() if line.strip()]
    summary = json.loads((out / "summary.json").read_text())
    return rows, events, summary


def _check(out: Path, name: str, cases: dict) -> None:
    frames, blank = cases[name]
    rows, events, summary = _record(out)
    assert [int(r["frame"]) for r in rows] == list(range(len(frames)))  # every frame its row, in order
    for r in rows[:blank]:
        assert r["dx_px"] == r["dy_px"] == r["reg_corr"] == ""  # no motion without structure
        assert r["saturated_frac"] != "" and r["clipped_frac"] != ""  # what is defined is there
    if blank:
        ev = [e for e in events if e["kind"] == "blank"]
        assert ev and ev[0]["started_frame"] == 0 and ev[0]["frame"] == blank - 1, ev
        assert "without structure" in ev[0]["message"]
    if len(frames) - blank >= 2 and name != "tiny_frames":
        later = rows[blank:]
        assert sum(r["dx_px"] != "" for r in later) >= 0.9 * len(later)  # frames with structure: motion measured
    if name == "saturated":
        assert summary["saturation"]["level_dn"] == 4095 and "piled up" in summary["saturation"]["level_origin"]
        assert all(float(r["saturated_frac"]) == 1.0 for r in rows[:blank])
    if name == "mostly_saturated":
        assert summary["saturation"]["level_dn"] == 4095
        truth = [np.count_nonzero(f == 4095) / f.size for f in frames[:blank]]
        assert min(truth) > 0.6
        np.testing.assert_allclose([float(r["saturated_frac"]) for r in rows[:blank]], truth, atol=1e-12)
    if name == "first_file_size":
        probs = [e["message"] for e in events if e["kind"] == "problem"]
        assert any("a_001.tif, page 0" in m and "measured anew" in m for m in probs), probs
        assert all(r["dx_px"] != "" for r in rows[5:]) and rows[5]["source"].endswith("a_001.tif")


@pytest.mark.parametrize("name", ["dark_zero", "saturated", "one_frame"])
def test_summarize_any_start(sessions, tmp_path, capsys, name):
    # the command line's entry point in this process (the imports are paid once; warnings are errors here, so a
    # warning leaking to the console fails too); watch and audit below run as separate processes
    from qcmon.cli import main

    root, cases = sessions
    assert main(["summarize", str(root / name), "--frame-rate", "30", "--out", str(tmp_path / "o")]) == 0
    err = capsys.readouterr().err
    assert "Traceback" not in err and "Warning" not in err, err
    _check(tmp_path / "o", name, cases)


@pytest.mark.parametrize("name", ["shutter_closed", "first_file_size"])
def test_watch_any_start(sessions, tmp_path, name):
    root, cases = sessions
    res = _qcmon("watch", root / name, "--plain", "--until-idle", "1", "--frame-rate", "30", "--out", tmp_path / "o")
    assert res.returncode == 0, res.stderr
    assert "Traceback" not in res.stderr + res.stdout
    _check(tmp_path / "o", name, cases)


def test_audit_any_start(sessions, tmp_path):
    root, cases = sessions
    res = _qcmon("audit", root, "--frame-rate", "30", "--out", tmp_path / "a", "--quiet", "--no-fail-exit",
                 timeout=600)
    assert res.returncode == 0, res.stderr
    assert "Traceback" not in res.stderr + res.stdout
    with open(tmp_path / "a" / "audit.csv", newline="") as fh:
        rows = {r["path"]: r for r in csv.DictReader(fh)}
    assert sorted(rows) == sorted(cases)
    for name, r in rows.items():
        assert r["status"] == "measured" and int(r["frames"]) == len(cases[name][0]), r
    assert rows["saturated"]["saturation_level_dn"] == "4095"
    assert "piled up" in rows["saturated"]["saturation_level_origin"]
    for name in cases:  # each session's own record, as summarize would write it
        _check(tmp_path / "a" / "sessions" / f"{name}.qcmon", name, cases)
