"""End to end: simulator files → ``qcmon summarize`` / ``qcmon watch`` → record, checked against ground truth.

The ground truth is the simulator's own table (``truth.csv``: the planted shifts, focal offsets, saturation); the
live-versus-offline check holds the two paths of the same program against each other.
"""

from __future__ import annotations

import csv
import json
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from qcmon.monitor.loop import Monitor, MonitorOptions
from qcmon.record.journal import read_events, read_traces
from qcmon.simulate import write_session
from qcmon.simulate.scenarios import scenario_config

RATE = 30.0


def _truth(path: Path) -> dict[str, np.ndarray]:
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    return {k: np.array([float(r[k]) for r in rows]) for k in rows[0]}


def _summarize(session: Path, out: Path, **kw) -> dict:
    zstack = session / "zstack.tif"
    opts = MonitorOptions(path=session / "frames", out_dir=out, follow=False,
                          zstack=zstack if zstack.exists() else None, **kw)
    return Monitor(opts).run()


@pytest.fixture(scope="module")
def drift_session(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("drift") / "s"
    write_session(scenario_config("drift", n_frames=540, height=128, width=128, frame_rate_hz=RATE, seed=3),
                  out, layout="multipage")
    return out


@pytest.fixture(scope="module")
def drift_record(drift_session, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("drift_rec")
    _summarize(drift_session, out)
    return out


def test_summarize_rows_follow_ground_truth(drift_session, drift_record):
    tr = read_traces(drift_record / "traces.csv")
    truth = _truth(drift_session / "truth.csv")
    n = truth["frame"].size
    # every frame measured once, in order
    np.testing.assert_array_equal(tr["frame"], np.arange(n))
    # displacement: the reference sits at the mean position of its frames, so compare up to a constant offset
    for axis in ("dx_px", "dy_px"):
        err = tr[axis] - truth[axis]
        err -= np.median(err)
        rms = float(np.sqrt(np.mean(err ** 2)))
        assert rms < 0.15, f"{axis}: RMS error {rms:.3f} px against the planted motion (simulator truth)"
    # z: the running mean lags by half its length; leave out 1 s around the planted step
    step_t = 0.6 * n / RATE
    keep = np.abs(truth["time_s"] - step_t) > 1.0
    z_err = tr["z_um"][keep] - (truth["z_um"][keep] - truth["z_um"][0])
    assert np.nanmax(np.abs(z_err)) < 0.75, "z offset against the planted focal drift (simulator truth)"
    # saturation and clipping are counts of pixels: exact
    np.testing.assert_array_equal(tr["saturated_frac"], truth["saturated_frac"])
    np.testing.assert_array_equal(tr["clipped_frac"], truth["clipped_frac"])
    # mean above dark against the noise-free expectation (dark level estimated by photon transfer)
    rel = np.median(tr["mean_f"] / truth["expected_mean_f"]) - 1
    assert abs(rel) < 0.05, f"mean above dark off by {100 * rel:.1f} %"


def test_summary_has_the_documented_keys(drift_record):
    summary = json.loads((drift_record / "summary.json").read_text())
    for key in ("schema", "frames", "duration_s"):
        assert key in summary
    flat = _flatten(summary)
    for key in ("motion.max_px", "motion.rms_px", "z.max_abs_um", "bleach.slope_pct_per_min",
                "saturation.max_frac", "snr.median", "photon_transfer.gain", "photon_transfer.dark_level"):
        assert key in flat, key
    assert summary["frames"] == 540
    assert summary["duration_s"] == pytest.approx(539 / RATE)
    for name in ("report.html", "exclude.csv", "events.jsonl", "reference.tif"):
        assert (drift_record / name).is_file()


def _flatten(d: dict, prefix: str = "") -> dict:
    out = {}
    for k, v in d.items():
        key = f"{prefix}{k}"
        out[key] = v
        if isinstance(v, dict):
            out.update(_flatten(v, key + "."))
    return out


def _starts(events, metric):
    return [e for e in events if e.kind == "start" and e.metric == metric]


def test_planted_focal_step_warns_within_persistence(drift_session, drift_record):
    """The +2 µm focal step at 60 % of the session must raise the z warning within persist_s + 1 s."""
    from qcmon.thresholds import load_profile

    limit = load_profile("default").limits["z_um"]
    events = read_events(drift_record / "events.jsonl")
    truth = _truth(drift_session / "truth.csv")
    z = truth["z_um"] - truth["z_um"][0]
    crossing = truth["time_s"][np.argmax(np.abs(z) > limit.warn)]
    starts = _starts(events, "z_um")
    assert starts, "no z warning for a planted step beyond the warn level"
    assert starts[0].time_s <= crossing + limit.persist_s + 1.0


@pytest.fixture(scope="module")
def clean_record(tmp_path_factory) -> Path:
    base = tmp_path_factory.mktemp("clean")
    write_session(scenario_config("clean", n_frames=450, height=128, width=128, frame_rate_hz=RATE, seed=5),
                  base / "s", layout="chunks", chunk_frames=100)
    _summarize(base / "s", base / "rec")
    return base / "rec"


def test_clean_session_raises_no_warning(clean_record):
    events = read_events(clean_record / "events.jsonl")
    assert [e for e in events if e.kind == "start"] == []
    summary = json.loads((clean_record / "summary.json").read_text())
    assert summary["verdict"] == "pass"


def _start_writer(out: Path, *, layout: str, frames: int, scenario: str = "clean", size: int = 96) -> subprocess.Popen:
    cmd = [sys.executable, "-m", "qcmon", "simulate", str(out), "--scenario", scenario, "--live",
           "--layout", layout, "--frames", str(frames), "--size", str(size), str(size), "--rate", str(RATE),
           "--chunk-frames", "40", "--zero-pad", "0", "--seed", "11"]
    log = open(out.parent / "writer.log", "wb")
    try:
        return subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT)
    finally:
        log.close()  # the child keeps its own copy


def _writer_log(out: Path) -> str:
    return (out.parent / "writer.log").read_text(errors="replace")


def _watch(frames_dir: Path, out: Path, *extra: str, idle: float = 3.0) -> subprocess.Popen:
    """``qcmon watch --plain`` in its own process, with the session's z-stack as ``_summarize`` uses it."""
    cmd = [sys.executable, "-m", "qcmon", "watch", str(frames_dir), "--plain", "--until-idle", str(idle),
           "--out", str(out), "--zstack", str(frames_dir.parent / "zstack.tif"), *extra]
    return subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _wait_dir(path: Path, proc: subprocess.Popen, timeout: float = 60.0) -> None:
    t0 = time.monotonic()
    while not path.is_dir():
        assert proc.poll() is None, _writer_log(path.parent)
        assert time.monotonic() - t0 < timeout, f"{path} never appeared"
        time.sleep(0.05)


@pytest.mark.slow
@pytest.mark.parametrize("layout", ["multipage", "chunks", "per_frame", "raw"])
def test_live_watch_measures_every_frame_once_and_equals_offline(tmp_path, layout):
    n = 150
    session = tmp_path / "s"
    writer = _start_writer(session, layout=layout, frames=n)
    try:
        _wait_dir(session / "frames", writer)
        watch = _watch(session / "frames", tmp_path / "live")
        out, err = watch.communicate(timeout=120)
        assert writer.wait(timeout=60) == 0, _writer_log(session)
    finally:
        if writer.poll() is None:
            writer.kill()
    assert watch.returncode == 0, err
    live = read_traces(tmp_path / "live" / "traces.csv")
    np.testing.assert_array_equal(live["frame"], np.arange(n))
    _summarize(session, tmp_path / "offline")
    offline = read_traces(tmp_path / "offline" / "traces.csv")
    for name, col in offline.items():
        if col.dtype.kind == "f":
            np.testing.assert_allclose(live[name], col, rtol=1e-9, atol=0, equal_nan=True, err_msg=name)
        else:
            np.testing.assert_array_equal(live[name], col, err_msg=name)
    live_summary = json.loads((tmp_path / "live" / "summary.json").read_text())
    assert live_summary["frames"] == n
    # equal with the registration reference grown at frames 60 and 120 (qcmon.metrics.reference_growth) in both
    assert live_summary["engine"]["streams"]["0,0"]["registration_reference_frames"] > 60


@pytest.mark.slow
def test_live_saturation_warning_within_persistence(tmp_path):
    """Detector gain ×16 at half the session saturates cells: a saturation state must start within
    persist_s + 1 s of the change, and the plain console must say so."""
    from qcmon.thresholds import load_profile

    n = 180
    session = tmp_path / "s"
    writer = _start_writer(session, layout="chunks", frames=n, scenario="gain_saturation")
    try:
        _wait_dir(session / "frames", writer)
        watch = _watch(session / "frames", tmp_path / "live")
        out, err = watch.communicate(timeout=120)
        writer.wait(timeout=60)
    finally:
        if writer.poll() is None:
            writer.kill()
    assert watch.returncode == 0, err
    limit = load_profile("default").limits["saturated_frac"]
    events = read_events(tmp_path / "live" / "events.jsonl")
    change_t = 0.5 * n / RATE
    starts = _starts(events, "saturated_frac")
    assert starts and change_t <= starts[0].time_s <= change_t + limit.persist_s + 1.0
    assert f"{starts[0].state} begins" in out  # the plain console printed it


def test_out_dir_inside_the_session_is_refused(drift_session):
    from qcmon.errors import QcmonError

    with pytest.raises(QcmonError, match="cannot go into the session folder"):
        Monitor(MonitorOptions(path=drift_session / "frames", out_dir=drift_session / "frames", follow=False))


def test_default_record_goes_beside_the_session(tmp_path):
    from qcmon.monitor.loop import default_out_dir

    (tmp_path / "fov2").mkdir()
    assert default_out_dir(tmp_path / "fov2") == (tmp_path / "fov2.qcmon").resolve()


def _options_of(parser, command: str) -> list[tuple]:
    sub = next(a for a in parser._actions if a.dest == "command").choices[command]  # argparse's own registry
    return [(tuple(a.option_strings), a.dest, a.default, a.help) for a in sub._actions]


def test_command_line_builds_only_the_named_command_with_the_same_options():
    """``qcmon summarize`` does not load the simulator or the audit to build its options; every command's options
    are those of the full parser."""
    from qcmon.cli import COMMANDS, build_parser

    full = build_parser()
    for command in COMMANDS:
        assert _options_of(build_parser(only=command), command) == _options_of(full, command), command
    code = ("import sys; from qcmon.cli import build_parser; build_parser(only='summarize'); "
            "print(sorted(m for m in sys.modules if m.startswith(('qcmon.audit', 'qcmon.simulate'))))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def test_plot_processes_given_to_monitors_serve_one_session_after_another(tmp_path, drift_session, drift_record):
    # The audit hands one set of plot processes to each session's Monitor: each report is the one drawn in
    # process (Agg is deterministic), and the processes stay open for the next session.
    from qcmon.record.report import PlotWorkers

    plots = PlotWorkers(2)
    try:
        for k in range(2):
            opts = MonitorOptions(path=drift_session / "frames", out_dir=tmp_path / f"rec{k}", follow=False,
                                  zstack=drift_session / "zstack.tif")
            paths = Monitor(opts, plots=plots).run()
            shown = Path(paths["report"]).read_text(encoding="utf-8").split("<h2>Traces</h2>")[1]
            drawn_here = (drift_record / "report.html").read_text(encoding="utf-8").split("<h2>Traces</h2>")[1]
            assert shown.split("<h2>Events")[0] == drawn_here.split("<h2>Events")[0]
        assert plots._pool.submit(int, "3").result(timeout=60) == 3  # still open: a closed pool refuses work
    finally:
        plots.close()
