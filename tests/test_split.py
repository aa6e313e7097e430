"""One finished session measured by several processes: chunks of time points, the reference carried across.

The reference here is the same session measured by one process: the engine's own numbers, which
tests/test_pipeline.py holds against the simulator's ground truth and scikit-image. Per-frame values must be
identical, so the split inherits that accuracy.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose

import qcmon.metrics.reference_growth
import qcmon.monitor.split
from qcmon.monitor.loop import Monitor, MonitorOptions
from qcmon.sources import SessionSource
from qcmon.monitor.split import plan_chunks, warm_start

#: A registration reference that is final after 120 frames (the default grows it for about a minute): these
#: short sessions split once it is final (qcmon.monitor.split copies the engine only then).
SHORT_GROWTH = (60, 120)

# ------------------------------------------------------------------------------------------- planning


@pytest.mark.parametrize("n,workers", [(100, 4), (3000, 1), (3000, 2), (10_000, 3), (4499, 3), (1_000_000, 8)])
def test_chunks_cover_the_session_once_and_balance_the_work(n, workers):
    chunks = plan_chunks(n, workers, warm_up=300, min_chunk=1500)
    assert chunks[0][0] == 0 and chunks[-1][1] == n
    assert all(a[1] == b[0] for a, b in zip(chunks, chunks[1:]))       # contiguous, no overlap, no gap
    assert len(chunks) == max(1, min(workers, n // 1500))
    if len(chunks) > 1:
        work = [chunks[0][1]] + [b - a + 300 for a, b in chunks[1:]]     # later chunks measure a warm-up too
        assert max(work) - min(work) <= 2
        assert all(b - a >= 1500 - 300 for a, b in chunks)


@pytest.mark.parametrize("first", [400, 401, 409, 1234, 5000])
def test_warm_start_keeps_the_recomputation_points(first):
    # the engine recomputes focus and z at a fixed phase of its count of measured frames modulo z_every; a copy that
    # has measured 30 reference frames and starts at s counts 30 + (t - s) at time point t
    s = warm_start(first, measured=30, z_every=10, warm_up=300)
    assert first - 310 < s <= first - 300
    assert all((30 + (t - s)) % 10 == t % 10 for t in range(s, first + 20))
    with pytest.raises(ValueError):
        warm_start(320, measured=30, z_every=10, warm_up=300)


# -------------------------------------------------------------------------- reading from the middle


def _sim(folder: Path, n: int, **kw):
    from qcmon.simulate import SimConfig
    from qcmon.simulate._write import write_session

    layout = kw.pop("layout", "chunks")
    write_session(SimConfig(n_frames=n, height=48, width=48, frame_rate_hz=30.0, **kw), folder, layout=layout,
                  chunk_frames=37)
    return folder / "frames"


@pytest.mark.parametrize("layout,kw", [("chunks", {}), ("per_frame", {}), ("multipage", {}), ("raw", {}),
                                       ("chunks", {"channels": 2, "planes": 2})])
def test_skipped_frames_are_the_ones_a_full_read_gives_first(tmp_path, layout, kw):
    frames = _sim(tmp_path / "s", 90, layout=layout, seed=2, **kw)
    full = list(SessionSource(frames))
    for k in (0, 1, 36, 37, 38, 89, 90, 500):
        part = list(SessionSource(frames, skip_frames=k))
        assert len(part) == max(len(full) - k, 0)
        for a, b in zip(full[k:], part):
            assert (a.index, a.channel, a.plane, a.source, a.page) == (b.index, b.channel, b.plane, b.source, b.page)
            assert np.array_equal(a.data, b.data)
    with pytest.raises(ValueError, match="skip_frames"):
        SessionSource(frames, skip_frames=-1)


# ----------------------------------------------------------------------------------- whole sessions


def _traces(out: Path):
    with open(out / "traces.csv", newline="") as f:
        return list(csv.DictReader(f))


@pytest.fixture(scope="module")
def split_pair(tmp_path_factory):
    """One drifting, bleaching session with a line offset, measured by 1 and by 3 processes."""
    root = tmp_path_factory.mktemp("split")
    frames = _sim(root / "s", 1400, seed=4, line_offset_px=0.4, bleach_tau_min=(3.0,),
                  z_drift_um_per_min=3.0)
    mp = pytest.MonkeyPatch()
    mp.setattr(qcmon.monitor.split, "MIN_CHUNK", 350)        # three chunks of this short session
    mp.setattr(qcmon.metrics.reference_growth, "REFERENCE_UPDATES", SHORT_GROWTH)
    try:
        outs = {}
        for w in (1, 3):
            outs[w] = root / f"out{w}"
            Monitor(MonitorOptions(path=frames, out_dir=outs[w], follow=False, workers=w,
                                   zstack=root / "s" / "zstack.tif")).run()
    finally:
        mp.undo()
    return root, outs


def test_split_gives_the_numbers_of_one_process(split_pair):
    _root, outs = split_pair
    one, three = _traces(outs[1]), _traces(outs[3])
    assert [r["frame"] for r in three] == [str(i) for i in range(1400)]        # every frame once, in order
    # every column, the running mean's (focus, z, line offset) included: the warm-up refills its block sums with
    # the same frames in the same blocks
    for a, b in zip(one, three):
        assert a == b, a["frame"]


def test_split_summary_and_events_match_one_process(split_pair):
    _root, outs = split_pair
    s1 = json.loads((outs[1] / "summary.json").read_text())
    s3 = json.loads((outs[3] / "summary.json").read_text())
    for key in ("frames", "duration_s", "motion", "z", "bleach", "saturation", "snr", "brightness"):
        assert s3[key] == s1[key], key
    def events(out):
        evs = [json.loads(ln) for ln in (out / "events.jsonl").read_text().splitlines() if ln.strip()]
        return [{k: v for k, v in e.items() if k != "wall_time"} for e in evs]  # the clock differs, rightly

    assert events(outs[3]) == events(outs[1]) and events(outs[1])              # the planted bleaching alarms
    info1, info3 = s1["engine"]["streams"]["0,0"], s3["engine"]["streams"]["0,0"]
    assert info3["frames"] == info1["frames"] == 1400
    # the registration reference grew (to the frames that joined by frame 120) before the engine was copied
    assert info3["registration_reference_frames"] == info1["registration_reference_frames"] > 60
    assert info3["bleach_slope_pct_per_min"] == info1["bleach_slope_pct_per_min"]
    # photon transfer from the first chunk's pairs only: the same gain within the EMVA 1288 tolerance we test
    assert_allclose(s3["photon_transfer"]["gain"], s1["photon_transfer"]["gain"], rtol=0.05)


def test_a_failed_worker_is_measured_again_and_nothing_is_lost(tmp_path, monkeypatch):
    frames = _sim(tmp_path / "s", 800, seed=6)
    monkeypatch.setattr(qcmon.monitor.split, "MIN_CHUNK", 350)
    monkeypatch.setattr(qcmon.metrics.reference_growth, "REFERENCE_UPDATES", SHORT_GROWTH)

    class Broken:
        def __init__(self, *a, **k):
            pass

        def submit(self, fn, *args):
            from concurrent.futures import Future

            fut = Future()
            fut.set_exception(RuntimeError("worker killed"))
            return fut

        def shutdown(self, **k):
            pass

    monkeypatch.setattr(qcmon.monitor.split, "ProcessPoolExecutor", Broken)
    mon = Monitor(MonitorOptions(path=frames, out_dir=tmp_path / "o", follow=False, workers=2))
    mon.run()
    rows = _traces(tmp_path / "o")
    assert [r["frame"] for r in rows] == [str(i) for i in range(800)]
    assert any("worker for time points" in p and "measured again" in p for p in mon.problems)


def test_audit_of_one_long_session_splits_it_and_gives_the_same_row(tmp_path, monkeypatch):
    from qcmon.audit import AuditOptions, run_audit

    _sim(tmp_path / "lab" / "m1" / "2026-11-03", 800, seed=8)
    monkeypatch.setattr(qcmon.monitor.split, "MIN_CHUNK", 350)
    monkeypatch.setattr(qcmon.metrics.reference_growth, "REFERENCE_UPDATES", SHORT_GROWTH)
    calls = []
    real = qcmon.monitor.split.SplitRun.launch
    monkeypatch.setattr(qcmon.monitor.split.SplitRun, "launch",
                        lambda self, *a: calls.append(real(self, *a)) or calls[-1])
    one = run_audit(AuditOptions(roots=[tmp_path / "lab"], out_dir=tmp_path / "a1", workers=1), progress=False)
    two = run_audit(AuditOptions(roots=[tmp_path / "lab"], out_dir=tmp_path / "a2", workers=2), progress=False)
    assert [c for c in calls if c] == [2]                 # only the two-process audit split the session (0: not yet)
    # photon-transfer figures (gain, its dark level, photons) come from the first chunk's pairs in a split run
    drop = ("seconds", "frames_per_s", "reused", "status", "record", "dark_level_dn")

    def kept(row):
        return {k: v for k, v in row.items() if k not in drop and "photon" not in k and "gain" not in k}

    r1, r2 = kept(one["rows"][0]), kept(two["rows"][0])
    assert r1 == r2 and r1["frames"] == 800


def _one_and_two_processes(frames, tmp_path, monkeypatch) -> list:
    """Measure ``frames`` with one and with two processes (outputs in ``o1``, ``o2``); the chunk counts each
    ``SplitRun.launch`` returned."""
    launched = []
    real = qcmon.monitor.split.SplitRun.launch
    monkeypatch.setattr(qcmon.monitor.split.SplitRun, "launch",
                        lambda self, *a: launched.append(real(self, *a)) or launched[-1])
    for w in (1, 2):
        Monitor(MonitorOptions(path=frames, out_dir=tmp_path / f"o{w}", follow=False, workers=w)).run()
    return launched


def test_a_session_too_short_to_split_stays_in_one_process(tmp_path, monkeypatch):
    frames = _sim(tmp_path / "s", 200, seed=9)                 # 200 < MIN_CHUNK time points per process
    monkeypatch.setattr(qcmon.metrics.reference_growth, "REFERENCE_UPDATES", SHORT_GROWTH)
    launched = _one_and_two_processes(frames, tmp_path, monkeypatch)
    assert [n for n in launched if n] == [1]                 # 0: not decided yet (the reference still grows)
    assert _traces(tmp_path / "o2") == _traces(tmp_path / "o1")


def test_a_level_found_in_one_chunk_holds_in_the_later_ones(tmp_path, monkeypatch):
    # Outside data (the nuclei of tests/outside_data.py through the EMVA 1288 model, 12 bits in 16-bit pages): a
    # saturated patch in frames 100-149 shows the 12-bit ceiling (a pile-up: inferred in the first chunk); from frame
    # 600 on, in the second chunk, only 6 pixels a frame reach it — too few to show a pile-up on their own. One
    # process counts them as saturated from the level it found; a worker must have that level too.
    import tifffile
    from outside_data import detect, nuclei_2d, specimen_crop

    rng = np.random.default_rng(8)
    img = nuclei_2d().astype(np.float64)
    lam = specimen_crop(img * (20.0 / img.mean()), (64, 64), 0.0, 0.0)
    folder = tmp_path / "s"
    folder.mkdir()
    stack = np.stack([detect(lam, rng, gain=3.0, offset=100.0, read_noise_dn=8.0, bits=12) for _ in range(800)])
    stack[100:150, 10:30, 10:30] = 4095
    stack[600:, 50, 40:46] = 4095
    for i in range(0, 800, 100):
        tifffile.imwrite(folder / f"part_{i // 100:02d}.tif", stack[i:i + 100])
    monkeypatch.setattr(qcmon.monitor.split, "MIN_CHUNK", 350)
    monkeypatch.setattr(qcmon.metrics.reference_growth, "REFERENCE_UPDATES", SHORT_GROWTH)
    outs = {}
    for w in (1, 2):
        outs[w] = tmp_path / f"out{w}"
        Monitor(MonitorOptions(path=folder, out_dir=outs[w], follow=False, workers=w, frame_rate_hz=30.0)).run()
    one, two = _traces(outs[1]), _traces(outs[2])
    assert float(one[700]["saturated_frac"]) == pytest.approx(6 / 64 ** 2)  # the check can fail
    assert [r["frame"] for r in two] == [str(i) for i in range(800)]
    for a, b in zip(one, two):
        assert a == b, a["frame"]
    s1 = json.loads((outs[1] / "summary.json").read_text())
    s2 = json.loads((outs[2] / "summary.json").read_text())
    assert s2["engine"]["streams"]["0,0"]["saturation_level_origin"] == \
        s1["engine"]["streams"]["0,0"]["saturation_level_origin"] == "inferred"


def test_a_reference_still_growing_where_the_first_chunk_would_end_keeps_one_process(tmp_path, monkeypatch):
    # the default growth runs to frame 1920: a worker of an 800-point session would register to beyond its end
    # before its chunk, so the session is split nowhere, and gives one process's numbers
    frames = _sim(tmp_path / "s", 800, seed=10)
    monkeypatch.setattr(qcmon.monitor.split, "MIN_CHUNK", 350)
    launched = _one_and_two_processes(frames, tmp_path, monkeypatch)
    assert not any(launched)                               # 0: not yet, to the end
    assert _traces(tmp_path / "o2") == _traces(tmp_path / "o1")
    info = json.loads((tmp_path / "o2" / "summary.json").read_text())["engine"]["streams"]["0,0"]
    assert info["registration_reference_frames"] > 400   # it did grow (updates at 60 … 480 of 800 frames)


# ------------------------------------------------- workers that start while the registration reference grows

def _real_session(folder: Path, n: int, *, seed: int, gain_at=None):
    """A real specimen (tests/outside_data.py: the nuclei image, moving by up to ±1.5 px, nuclei with calcium-like
    transients) through the EMVA 1288 camera model (2.5 DN/photon, offset 100 DN, 6 DN read noise, 12 bits in
    16-bit pages), written as files of 100 frames. ``gain_at=(frame, gain)``: the gain changes there (a step)."""
    import tifffile
    from outside_data import detect, living_specimen, nuclei_2d

    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True)
    frames = []
    scale = 3.0 / float(nuclei_2d().mean())  # about 3 photons/px in the specimen, 1 more of background
    for i, lam in enumerate(living_specimen((64, 64), n, rng, photons_scale=scale, background=1.0,
                                            motion_px=1.5, rate_hz=0.05)):
        gain = gain_at[1] if gain_at is not None and i >= gain_at[0] else 2.5
        frames.append(detect(lam, rng, gain=gain, offset=100.0, read_noise_dn=6.0, bits=12))
    stack = np.stack(frames)
    for i in range(0, n, 100):
        tifffile.imwrite(folder / f"part_{i // 100:02d}.tif", stack[i:i + 100])
    return folder


def _measure_split(folder: Path, out: Path, workers: int, monkeypatch, **options) -> dict:
    """Measure with ``workers`` processes; what the split did (early launch, chunks measured again)."""
    seen = {"launch": [], "again": []}
    real_launch, real_close = qcmon.monitor.split.SplitRun.launch, qcmon.monitor.split.SplitRun.close

    def launch(self, *a):
        n = real_launch(self, *a)
        seen["launch"].append((n, [j.fast_from for j in self._jobs]))
        return n

    def close(self):
        seen["again"] = list(self.measured_again)
        real_close(self)

    monkeypatch.setattr(qcmon.monitor.split.SplitRun, "launch", launch)
    monkeypatch.setattr(qcmon.monitor.split.SplitRun, "close", close)
    Monitor(MonitorOptions(path=folder, out_dir=out, follow=False, workers=workers, frame_rate_hz=30.0,
                           **options)).run()
    monkeypatch.undo()
    return seen


def _events(out: Path):
    evs = [json.loads(ln) for ln in (out / "events.jsonl").read_text().splitlines() if ln.strip()]
    return [{k: v for k, v in e.items() if k != "wall_time"} for e in evs]  # the clock differs, rightly


def test_workers_that_start_while_the_reference_grows_give_one_process_rows(tmp_path, monkeypatch):
    # The reference grows to frame 240 here; the workers start at the first reference (frame ~31), register up to
    # frame 240 with Engine.register_only, then warm up and measure. Outside data; the reference is one process.
    folder = _real_session(tmp_path / "s", 1200, seed=11)
    growth = (60, 120, 240)
    monkeypatch.setattr(qcmon.metrics.reference_growth, "REFERENCE_UPDATES", growth)
    monkeypatch.setattr(qcmon.monitor.split, "MIN_CHUNK", 350)
    outs = {w: tmp_path / f"out{w}" for w in (1, 2, 3)}
    seen = {}
    for w in (1, 2, 3):
        with monkeypatch.context() as m:
            m.setattr(qcmon.metrics.reference_growth, "REFERENCE_UPDATES", growth)
            m.setattr(qcmon.monitor.split, "MIN_CHUNK", 350)
            seen[w] = _measure_split(folder, outs[w], w, m)
    for w in (2, 3):
        launched = [(n, fast) for n, fast in seen[w]["launch"] if n]
        assert len(launched) == 1 and launched[0][0] == w, seen[w]
        assert all(f is not None and f < growth[-1] for f in launched[0][1])  # started before the final reference
        assert seen[w]["again"] == []          # each worker reached one process's state by itself
    one = _traces(outs[1])
    info = json.loads((outs[1] / "summary.json").read_text())["engine"]["streams"]["0,0"]
    assert info["registration_reference_frames"] > 120                    # the reference did grow
    assert len({r["dx_px"] for r in one}) > 100                           # the shifts vary: the check can fail
    for w in (2, 3):
        rows = _traces(outs[w])
        assert [r["frame"] for r in rows] == [str(i) for i in range(1200)]
        for a, b in zip(one, rows):
            assert a == b, (w, a["frame"])
        assert _events(outs[w]) == _events(outs[1])


def test_a_brightness_step_while_a_worker_only_registers_is_measured_again_exactly(tmp_path, monkeypatch):
    # The gain triples at frame 400, inside the frames the worker only registers: one process blanks photons per
    # pixel and refits the gain there (dark level given: photons are counted); the worker's engine never saw the
    # step. Its state at its first frame is not one process's (Engine.split_digest), so its chunk is measured again
    # from the first chunk's engine. Without that, its photons per pixel would stay blank.
    folder = _real_session(tmp_path / "s", 1500, seed=12, gain_at=(400, 7.5))
    outs = {w: tmp_path / f"out{w}" for w in (1, 2)}
    seen = {}
    for w in (1, 2):
        with monkeypatch.context() as m:
            m.setattr(qcmon.metrics.reference_growth, "REFERENCE_UPDATES", (60, 120, 240, 480))
            m.setattr(qcmon.monitor.split, "MIN_CHUNK", 350)
            seen[w] = _measure_split(folder, outs[w], w, m, dark_level=100.0)
    launched = [(n, fast) for n, fast in seen[2]["launch"] if n]
    assert launched and launched[0][0] == 2 and launched[0][1][0] is not None
    one, two = _traces(outs[1]), _traces(outs[2])
    assert any(r["level_step"] not in ("", "nan") for r in one[400:500])   # one process saw the step
    # and counts photons from the gain it fitted after it (blank before: the copy the worker took has no gain)
    assert one[300]["photons_per_px"] == "" and float(one[-1]["photons_per_px"]) > 0
    assert len(seen[2]["again"]) == 1
    assert [r["frame"] for r in two] == [str(i) for i in range(1500)]
    for a, b in zip(one, two):
        assert a == b, a["frame"]


def _rows_equal(a: list[dict], b: list[dict]) -> bool:
    def norm(r):
        return {k: ("nan" if isinstance(v, float) and v != v else v) for k, v in r.items()}
    return [norm(r) for r in a] == [norm(r) for r in b]


def test_registering_only_reaches_one_engines_reference_and_its_registrations_give_the_same_rows(monkeypatch):
    # Outside data: the real specimen moving by up to ±1.5 px through the EMVA 1288 model. Engine A measures every
    # frame; B, a copy taken at the first reference, only registers (Engine.register_only); C, another copy, measures
    # every frame with B's registrations given. The reference growth (to frame 240 here) must end the same in all
    # three, and C's rows must be A's, although C registered none of those frames itself.
    import pickle

    from outside_data import detect, living_specimen, nuclei_2d

    import qcmon.metrics.registration as registration
    from qcmon.engine import Engine, EngineSettings
    from qcmon.frames import Frame

    rng = np.random.default_rng(13)
    scale = 3.0 / float(nuclei_2d().mean())
    data = [detect(lam, rng, gain=2.5, offset=100.0, read_noise_dn=6.0, bits=12)
            for lam in living_specimen((64, 64), 320, rng, photons_scale=scale, background=1.0, motion_px=1.5)]
    settings = EngineSettings(frame_rate_hz=30.0, reference_updates=(60, 120, 240))
    a = Engine(settings)
    rows_a, copy, at = [], None, 0
    for i, d in enumerate(data):
        rows_a.extend(a.process(Frame(d, i)))
        if copy is None and rows_a:
            copy, at = pickle.dumps(a), i + 1
    calls = []
    real = registration.ShiftEstimator.estimate_binned
    monkeypatch.setattr(registration.ShiftEstimator, "estimate_binned",
                        lambda self, *x, **k: calls.append(1) or real(self, *x, **k))
    b, c = pickle.loads(copy), pickle.loads(copy)
    regs = [(i, 0, 0, b.register_only(Frame(data[i], i))) for i in range(at, len(data))]
    calls_b = len(calls)  # each frame's registration, and the reference updates' own (their zero, their roll-off)
    assert all(r[3] is not None for r in regs)
    assert b.references_settled() and a.references_settled()
    assert b.split_digest() == a.split_digest()
    calls.clear()
    c.give_registrations(regs)
    rows_c = [r for i in range(at, len(data)) for r in c.process(Frame(data[i], i))]
    assert _rows_equal(rows_c, rows_a[-len(rows_c):]) and len(rows_c) == len(data) - at
    assert len(calls) == calls_b - (len(data) - at)  # the updates' only: no frame was registered here
    assert c.split_digest() == a.split_digest()
    # a registration made in another state of the growth is not used: the frame is registered here
    d = pickle.loads(copy)
    d.give_registrations([(i, ch, p, reg[:4] + ((0, 0),)) for i, ch, p, reg in regs])
    calls.clear()
    rows_d = [r for i in range(at, len(data)) for r in d.process(Frame(data[i], i))]
    assert _rows_equal(rows_d, rows_c) and len(calls) == calls_b


def test_workers_that_start_while_the_references_grow_with_channels_and_planes(tmp_path, monkeypatch):
    # four streams (2 channels × 2 planes), each with its own growing reference: the workers register every stream
    # up to where all are final, the monitor takes their registrations per stream; one process's rows
    frames = _sim(tmp_path / "s", 800, seed=14, channels=2, planes=2)
    outs = {w: tmp_path / f"out{w}" for w in (1, 2)}
    seen = {}
    for w in (1, 2):
        with monkeypatch.context() as m:
            m.setattr(qcmon.metrics.reference_growth, "REFERENCE_UPDATES", (60, 120, 240))
            m.setattr(qcmon.monitor.split, "MIN_CHUNK", 250)
            seen[w] = _measure_split(frames, outs[w], w, m)
    launched = [(n, fast) for n, fast in seen[2]["launch"] if n]
    assert len(launched) == 1 and launched[0][0] == 2 and launched[0][1][0] is not None
    assert seen[2]["again"] == []
    one, two = _traces(outs[1]), _traces(outs[2])
    assert len(one) == 3200 and len({r["dx_px"] for r in one}) > 100
    def keys(rows):
        return [(r["frame"], r["channel"], r["plane"]) for r in rows]

    assert keys(two) == keys(one)
    for a, b in zip(one, two):
        assert a == b, (a["frame"], a["channel"], a["plane"])
    assert _events(outs[2]) == _events(outs[1])
