"""report.html: self-contained, valid HTML, with the verdict, plots, events, facts, exclusions and caution."""

from __future__ import annotations

import base64
import re
from html.parser import HTMLParser

import numpy as np
import pytest

from qcmon.events import Event
from qcmon.record import rows_to_traces
from qcmon.report import envelope, report_html, write_report
from qcmon.summary import summarize_traces
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
    assert "Overall: FAIL" in body
    assert parser.imgs >= 8  # displacement, focus, registration, brightness, bleach, saturation, clipping, snr, line
    assert "animal <groomed> & moved" in body  # the note, escaped in the source
    assert "TIFF resolution tag" in body and prof.caution in body
    assert "alarm: displacement_um" in body  # the frame range to exclude
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
    from qcmon.report import PlotWorkers

    prof, traces, events, facts, summary = session
    here = report_html(summary, traces, events, prof, facts)
    workers = PlotWorkers(2)
    try:
        there = report_html(summary, traces, events, prof, facts, plots=workers)
    finally:
        workers.close()
    assert there == here
    # a pool that cannot draw any more only means the plots are drawn here
    broken = PlotWorkers(1)
    broken.close()
    assert report_html(summary, traces, events, prof, facts, plots=broken) == here


def test_plot_processes_run_at_the_lowest_priority():
    # POSIX niceness (os.nice, 19 = lowest): loading matplotlib in them must not take the measuring core
    import os

    from qcmon.report import PlotWorkers

    if not hasattr(os, "nice"):
        pytest.skip("no process niceness on this system")
    workers = PlotWorkers(1)
    try:
        theirs = workers._pool.submit(os.getpriority, os.PRIO_PROCESS, 0).result(timeout=120)
    finally:
        workers.close()
    assert theirs == min(19, os.getpriority(os.PRIO_PROCESS, 0) + 19)
