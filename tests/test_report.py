"""report.html: self-contained, valid HTML, with the verdict, plots, events, facts, exclusions and caution."""

from __future__ import annotations

import base64
import os
import re
from html.parser import HTMLParser

import numpy as np
import pytest

from qcmon.events import Event
from qcmon.record.journal import rows_to_traces
from qcmon.record.report import envelope, report_html, write_report
from qcmon.record.summary import summarize_traces
from qcmon.thresholds import ThresholdTracker, load_profile

from tests.test_record import make_rows

VOID = {"meta", "img", "br", "hr", "link", "input"}


class _Checker(HTMLParser):
    """Checks nesting with the standard library's HTML parser and collects every src/href."""

    def __init__(self):
        super().__init__()
        self.stack, self.refs, self.errors, self.imgs, self.text = [], [], [], 0, []

    def handle_starttag(self, tag, attrs):
        for k, v in attrs:
            if k in ("src", "href"):
                self.refs.append(v)
        self.imgs += tag == "img"
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag):
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
        else:
            self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def session():
    prof = load_profile("default")
    rows = make_rows()
    tracker = ThresholdTracker(prof)
    events = [ev for r in rows for ev in tracker.update(r)] + tracker.close()
    events.insert(1, Event(kind="note", message="animal <groomed> & moved", frame=150, time_s=15.0))
    facts = {"pixel_size_um": {"value": 1.0, "origin": "TIFF resolution tag"}}
    traces = rows_to_traces(rows)
    summary = summarize_traces(traces, events, facts=facts, profile=prof)
    return prof, traces, events, facts, summary


def test_report_is_self_contained_valid_html(tmp_path, session):
    prof, traces, events, facts, summary = session
    path = write_report(tmp_path, summary, traces, events, prof, facts)
    text = path.read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>")
    parser = _Checker()
    parser.feed(text)
    parser.close()
    assert parser.errors == [] and parser.stack == []
    assert not re.search(r"https?://", text)  # nothing fetched from the network
    assert parser.refs and all(r.startswith("data:image/png;base64,") for r in parser.refs)
    for ref in parser.refs:  # every embedded image is a real PNG
        assert base64.b64decode(ref.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"
    body = "".join(parser.text)
    assert "‼ FAIL" in body.split("Caution")[0]  # the verdict comes first, before the caution
    assert parser.imgs >= 8  # displacement, focus, registration, brightness, bleach, saturation, clipping, snr, line
    assert "animal <groomed> & moved" in body  # the note, escaped in the source
    assert "TIFF resolution tag" in body and prof.caution in body
    assert "alarm of displacement" in body  # the frame range to exclude, in words
    assert "z offset" in body and "not measured" in body


def test_envelope_keeps_spikes():
    x = np.arange(100_000, dtype=float)
    y = np.zeros_like(x)
    y[54_321] = 9.0
    y[10:20] = np.nan
    xc, lo, hi, mean = envelope(x, y, max_points=500)
    assert xc.size == 500 and hi.max() == 9.0 and np.nanmin(lo) == 0.0
    assert np.isfinite(mean).all()


def test_multi_plane_report_has_a_row_per_plane(tmp_path, session):
    prof = session[0]
    rows = make_rows(200, step=(50, 120)) + make_rows(200, plane=1, step=(0, 0))
    tr = ThresholdTracker(prof)
    events = [ev for r in rows for ev in tr.update(r)]
    traces = rows_to_traces(rows)
    summary = summarize_traces(traces, events, facts={}, profile=prof)
    assert [s["verdict"] for s in summary["streams"]] == ["fail", "pass"]
    text = report_html(summary, traces, events, prof, {})
    assert text.count("<tr><td>0</td><td>1</td>") == 1


def test_plots_drawn_by_other_processes_give_the_same_report(session):
    # PlotWorkers draws the plots in two processes started ahead (qcmon summarize uses it): the page must be the
    # same, byte for byte, as the one drawn in this process (the Agg renderer is deterministic).
    from qcmon.record.report import PlotWorkers

    prof, traces, events, facts, summary = session
    here = report_html(summary, traces, events, prof, facts)
    workers = PlotWorkers(2)
    try:
        assert workers.ready(timeout=120)  # else the plots would be drawn here (see the next test)
        there = report_html(summary, traces, events, prof, facts, plots=workers)
    finally:
        workers.close()
    assert there == here
    # a pool that cannot draw any more only means the plots are drawn here
    broken = PlotWorkers(1)
    broken.close()
    assert report_html(summary, traces, events, prof, facts, plots=broken) == here


def test_plots_are_drawn_here_while_no_process_is_ready_and_such_processes_are_ended(session):
    # At the lowest priority on a busy machine the processes may still be loading matplotlib when the report is
    # written: it is then drawn in this process, and closing does not wait for their loading. Held still here
    # (SIGSTOP), as the scheduler holds them when other programs keep the cores busy.
    import signal

    from qcmon.record.report import PlotWorkers

    if not hasattr(signal, "SIGSTOP"):
        pytest.skip("no SIGSTOP on this system")
    prof, traces, events, facts, summary = session
    here = report_html(summary, traces, events, prof, facts)
    workers = PlotWorkers(2)
    try:
        assert len(workers._processes) == 2
        for proc in workers._processes:
            os.kill(proc.pid, signal.SIGSTOP)
        assert not workers.ready(timeout=0.5)
        assert report_html(summary, traces, events, prof, facts, plots=workers) == here
    finally:
        workers.close()  # a stopped process would never end by itself
    assert not any(proc.is_alive() for proc in workers._processes)


def test_plot_processes_run_at_the_lowest_priority():
    # POSIX niceness (os.nice, 19 = lowest): loading matplotlib in them must not take the measuring core
    import os

    from qcmon.record.report import PlotWorkers

    if not hasattr(os, "nice"):
        pytest.skip("no process niceness on this system")
    workers = PlotWorkers(1)
    try:
        theirs = workers._pool.submit(os.getpriority, os.PRIO_PROCESS, 0).result(timeout=120)
    finally:
        workers.close()
    assert theirs == min(19, os.getpriority(os.PRIO_PROCESS, 0) + 19)


# --- the page a PI reads in one minute -------------------------------------------------------------------------------


def _text(html_text: str) -> str:
    parser = _Checker()
    parser.feed(html_text)
    return "".join(parser.text)


def test_verdict_and_share_of_usable_frames_come_first(session):
    prof, traces, events, facts, summary = session
    # the share of usable frames counted here from the exclusion ranges, row by row (the definition: a frame is
    # usable unless exclude.csv names it — common practice, no source)
    excluded = sum(1 for c, p, f in zip(traces["channel"], traces["plane"], traces["frame"])
                   if any(r[0] == c and r[1] == p and r[2] <= f <= r[3] for r in summary["exclude"]))
    n = len(traces["frame"])
    assert excluded > 0 and summary["usable"] == {"frames": n - excluded, "fraction": (n - excluded) / n}
    body = _text(report_html(summary, traces, events, prof, facts))
    top = body.split("Caution")[0]
    assert f"{100 * (n - excluded) / n:.1f} % of frames usable ({n - excluded:,} of {n:,})" in top
    assert "motion" in top  # why: the metric in alarm, with its time in alarm


def test_statistics_are_readable_with_units(session):
    prof, traces, events, facts, summary = session
    body = _text(report_html(summary, traces, events, prof, facts))
    metrics = body.split("Metrics", 1)[1].split("Traces", 1)[0]
    assert not re.search(r"\d[eE][+-]?\d", metrics)  # never 6.554e+04
    assert not re.search(r"\w+_\w+ = ", metrics)  # never max_px = 9.472
    largest = summary["motion"]["max_um"]
    assert f"largest {largest:.3g} µm" in metrics
    assert f"RMS {summary['motion']['rms_um']:.3g} µm" in metrics
    assert "% of start" in metrics and "%/min" in metrics


def test_readable_numbers():
    from qcmon.record.report import _fmt

    assert _fmt(65535.0) == "65,535" and _fmt(9.4723) == "9.47" and _fmt(0.000123) == "0.0001"
    assert _fmt(-4.75198) == "-4.75" and _fmt(float("nan")) == "—" and _fmt(None) == "—" and _fmt(1800) == "1,800"
    assert _fmt([512, 512]) == "512 × 512"


def test_every_event_has_its_session_time_not_the_wall_clock(session):
    prof, traces, events, facts, summary = session
    stamped = [ev for ev in events]
    for ev in stamped:
        ev.wall_time = "2031-01-01T00:00:00+00:00"  # the time a summary was made, not when it happened
    body = _text(report_html(summary, traces, stamped, prof, facts))
    assert "2031-01-01" not in body
    events_part = body.split("Events and notes", 1)[1]
    for ev in stamped:
        m, s = divmod(round(ev.time_s, 1), 60)
        assert f"{int(m)}:{s:04.1f}" in events_part  # min:s of session time, e.g. the note at 0:15.0
    assert "0:15.0" in events_part


def test_session_clock():
    from qcmon.record.summary import session_clock

    assert session_clock(0) == "0:00.0" and session_clock(42.46) == "0:42.5" and session_clock(61.0) == "1:01.0"
    assert session_clock(3725) == "1:02:05" and session_clock(float("nan")) == "—" and session_clock(None) == "—"


def test_every_plot_starts_at_the_first_frame_even_when_the_metric_starts_later(session):
    from qcmon.record.report import _PANELS, _panel_figure
    from qcmon.record.summary import stream_rows

    prof, traces, events, facts, summary = session
    late = dict(traces)
    late["brightness_pct"] = np.where(np.asarray(traces["time_s"]) < 10.0, np.nan, traces["brightness_pct"])
    for title, columns, scale, unit in _PANELS:
        got = _panel_figure(late, stream_rows(late), events, prof, title, columns, scale, unit)
        if got is None:
            continue
        lo, hi = got[1].axes[0].get_xlim()
        assert lo <= 0.0 and hi >= float(np.nanmax(traces["time_s"])) - 1e-9, title


def test_worst_moment_ranks_metrics_by_their_own_levels():
    from qcmon.record.report import worst_moment

    prof = load_profile("default")
    d, s = prof.limits["displacement_um"], prof.limits["saturated_frac"]
    n = 50
    traces = {"displacement_um": np.full(n, d.warn * 0.5), "saturated_frac": np.zeros(n)}
    traces["displacement_um"][10] = d.alarm  # exactly at its alarm level: 1 on the common scale
    traces["saturated_frac"][30] = s.warn + 2 * (s.alarm - s.warn)  # twice as far beyond as the alarm
    row, metric, sev = worst_moment(traces, prof)
    assert (row, metric) == (30, "saturated_frac") and sev == pytest.approx(2.0)
    traces["saturated_frac"][30] = 0.0
    assert worst_moment(traces, prof)[:2] == (10, "displacement_um")


def _real_session(tmp_path, frames: int = 40):
    """A record whose frames are in a real multi-page TIFF cut from a real fluorescence image (outside data)."""
    import tifffile

    from tests.outside_data import nuclei_2d, specimen_crop

    image = nuclei_2d()
    stack = np.stack([specimen_crop(image, (96, 96), 0.0, 0.4 * i, margin=24) for i in range(frames)])
    stack = np.clip(stack, 0, 65535).astype(np.uint16)
    stack[25, 10:30, 10:30] = 65535  # a saturated patch in frame 25
    session = tmp_path / "fov"
    session.mkdir()
    tifffile.imwrite(session / "run.tif", stack)
    prof = load_profile("default")
    rows = make_rows(frames, step=(frames + 1, frames + 2))
    for i, r in enumerate(rows):
        r["source"], r["page"] = str(session / "run.tif"), i
        r["saturated_frac"] = float((stack[i] >= 65535).mean())
    traces = rows_to_traces(rows)
    summary = summarize_traces(traces, [], facts={}, profile=prof, extra={"saturation.level_dn": 65535.0})
    summary["session"] = str(session)
    return prof, traces, summary, stack


def test_report_shows_the_reference_and_the_field_at_its_worst_moment(tmp_path):
    import tifffile

    prof, traces, summary, stack = _real_session(tmp_path)
    out = tmp_path / "fov.qcmon"
    out.mkdir()
    tifffile.imwrite(out / "reference.tif", stack[:5].mean(axis=0).astype(np.float32))
    text = write_report(out, summary, traces, [], prof, {}).read_text(encoding="utf-8")
    body = _text(text)
    field = body.split("The field", 1)[1].split("Metrics", 1)[0]
    assert "Reference" in field and "96 × 96 px" in field
    assert "frame 25 at 0:" in field and "red: pixels at the detector maximum" in field
    assert text.count('<img alt="Reference"') == 1 and text.count('<img alt="Worst moment"') == 1
    # the worst frame's picture is that frame: decode it and find the red saturated patch where it was put
    import io

    from PIL import Image

    png = re.search(r'<img alt="Worst moment" src="data:image/png;base64,([^"]+)"', text).group(1)
    rgb = np.asarray(Image.open(io.BytesIO(base64.b64decode(png))).convert("RGB"))
    assert rgb.shape == (96, 96, 3)
    red = (rgb[..., 0] == 255) & (rgb[..., 1] == 0x20)
    assert red[10:30, 10:30].all() and red.sum() == 400


def test_a_missing_frame_file_is_a_blank_with_its_reason(tmp_path):
    prof, traces, summary, _ = _real_session(tmp_path)
    (tmp_path / "fov" / "run.tif").unlink()  # the microscope's file moved away since
    text = report_html(summary, traces, [], prof, {}, out_dir=tmp_path / "nothing")
    body = _text(text)
    assert "Not shown:" in body and "run.tif is not there" in body
    assert "no reference image was recorded" in body
    assert '<img alt="Worst moment"' not in text


def test_advice_of_the_events_is_shown_when_the_record_has_it(session):
    # events.jsonl gains an "advice" field (what a warning likely means and what to check); the page shows it
    # when the record has it, and a record without it still gives a page
    from dataclasses import replace

    prof, traces, events, facts, summary = session
    plain = [replace(ev, advice="") for ev in events]  # a record written before events had advice
    i = next(i for i, ev in enumerate(plain) if ev.kind == "start" and ev.state == "alarm")
    with_advice = list(plain)
    with_advice[i] = replace(plain[i], advice="check the head fixation; take a new reference after it settles")
    body = _text(report_html(summary, traces, with_advice, prof, facts))
    assert "What to check" in body and "check the head fixation" in body
    assert body.count("check the head fixation") == 2  # in the list at the top and beside its event
    assert "What to check" not in _text(report_html(summary, traces, plain, prof, facts))


def test_summarize_prints_the_verdict_line_first_and_the_report_shows_the_field(tmp_path):
    # the whole path on frames of a real fluorescence image (outside data), moved by a few px over time
    import json

    import tifffile

    from qcmon.record.summary import verdict_line
    from tests.outside_data import nuclei_2d, specimen_crop
    from tests.reliability_data import run_qcmon

    image = nuclei_2d()
    session = tmp_path / "fov"
    session.mkdir()
    for i in range(45):
        frame = specimen_crop(image, (64, 64), 0.1 * i, -0.1 * i, margin=8)
        tifffile.imwrite(session / f"frame_{i:03d}.tif", np.clip(frame, 0, 65535).astype(np.uint16))
    out = tmp_path / "fov.qcmon"
    res = run_qcmon("summarize", str(session), "--out", str(out), timeout=120)
    assert res.returncode == 0, res.stderr
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    first = res.stdout.splitlines()[0]
    assert first == f"verdict: {verdict_line(summary)}"
    assert "frames usable" in first and f"of {summary['frames']:,} frames" in first
    text = (out / "report.html").read_text(encoding="utf-8")
    assert '<img alt="Reference"' in text and '<img alt="Worst moment"' in text


def test_a_session_with_unread_frames_is_not_a_green_pass(session):
    prof, traces, events, facts, summary = session
    clean = dict(summary, verdict="pass")
    top = report_html(clean, traces, [], prof, facts).split("Caution")[0]
    assert 'class="verdict pass"' in top and "INCOMPLETE" not in top
    cut = dict(clean, problems=["run_3.tif, page 0: file is incomplete at the end"])
    top = report_html(cut, traces, [], prof, facts).split("Caution")[0]
    assert 'class="verdict pass"' not in top and "PASS, INCOMPLETE" in top and "1 input problem" in top


def test_the_worst_frame_is_read_back_from_an_hdf5_series(tmp_path):
    # a container's frames are named in traces.csv by the file and the frame number within its series
    import h5py  # a dependency of qcmon (HDF5 and NWB sources)
    from qcmon.record.report import _read_frame
    from tests.outside_data import nuclei_2d

    data = np.stack([nuclei_2d()[i:i + 48, 2 * i:2 * i + 40] for i in range(12)])  # real image, moved each frame
    path = tmp_path / "run.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("imaging/frames", data=data)
    np.testing.assert_array_equal(_read_frame(str(path), 7, None), data[7])
    np.testing.assert_array_equal(_read_frame(str(path), 0, None, "imaging/frames"), data[0])
    with pytest.raises(ValueError, match="frame 12"):
        _read_frame(str(path), 12, None)


def test_photon_transfer_says_why_its_dark_level_is_blank(session):
    # A dark level that cannot be trusted is blank in the report with its reason beside the other figures.
    import copy

    prof, traces, events, facts, summary = session
    summary = copy.deepcopy(summary)
    summary["photon_transfer"] = {"gain": 2.5, "dark_level": float("nan"), "quality": "",
                                  "bias": "dark level uncertain (±7 DN from the third cumulant of 3000000 samples): "
                                          "needs dark frames or a longer session"}
    metrics = _text(report_html(summary, traces, events, prof, facts)).split("Metrics", 1)[1].split("Traces", 1)[0]
    assert "conversion gain 2.50 DN/photon" in metrics and "dark level 1" not in metrics
    assert "dark level uncertain (±7 DN" in metrics


def test_field_pictures_show_the_image_between_its_percentiles_grey_unless_pixels_are_marked():
    # The page's pictures of the field: grey levels between the 0.5th and 99.5th percentiles (numpy's), saved as a
    # one-channel PNG when no pixel is coloured (it decodes, with Pillow, to the same pixels as three equal
    # channels), as RGB when a mark colours some pixel.
    import io

    from PIL import Image

    from qcmon.record import report
    from tests.outside_data import nuclei_2d

    img = nuclei_2d()[:200, :160].astype(np.float64)
    lo, hi = np.percentile(img, (0.5, 99.5))
    want = (np.clip((img - lo) / (hi - lo), 0, 1) * 255).astype(np.uint8)

    def decoded(png: str) -> Image.Image:
        return Image.open(io.BytesIO(base64.b64decode(png)))

    plain = decoded(report._image_png(img))
    assert plain.mode == "L" and np.array_equal(np.asarray(plain), want)
    unmarked = decoded(report._image_png(img, marks={"#ff2020": np.zeros(img.shape, bool)}))
    assert np.array_equal(np.asarray(unmarked.convert("RGB")), np.repeat(want[..., None], 3, axis=2))
    mask = np.zeros(img.shape, bool)
    mask[5:9, 7:12] = True
    lo_m, hi_m = np.percentile(img[~mask], (0.5, 99.5))  # the contrast is the unmarked pixels'
    marked = np.asarray(decoded(report._image_png(img, marks={"#ff2020": mask})).convert("RGB"))
    assert (marked[mask] == [255, 0x20, 0x20]).all()
    grey = (np.clip((img - lo_m) / (hi_m - lo_m), 0, 1) * 255).astype(np.uint8)
    assert np.array_equal(marked[~mask], np.repeat(grey[~mask][:, None], 3, axis=1))
