"""qcmon's two pages in a real browser (headless Debian chromium): each loads without a console message, every
image decodes, and nothing scrolls sideways on a laptop screen 1,400 px wide. Screenshots are kept beside the
pages for a person to look at (pytest's tmp folder)."""

from __future__ import annotations

import os

import numpy as np
import pytest

from tests.browser import CHROMIUM, look

if CHROMIUM is None:
    if os.environ.get("QCMON_REQUIRE_BROWSER"):  # CI installs chromium (.ci/run): there, a missing browser fails
        raise RuntimeError("QCMON_REQUIRE_BROWSER is set but chromium is not installed")
    pytest.skip("chromium is not installed (.ci/run installs it)", allow_module_level=True)


def _check(page, width=1400):
    seen = look(page, width=width)
    assert seen["console"] == []  # the pages run no script: any console message is a failed load or an error
    assert seen["images"] > 0 and seen["broken"] == 0
    assert seen["scrollWidth"] <= seen["clientWidth"], f"{page} scrolls sideways: {seen}"
    from PIL import Image

    shot = np.asarray(Image.open(seen["screenshot"]).convert("L"))
    assert shot.shape == (900, width) and shot.std() > 10  # something is drawn, not a blank screen
    return seen


def test_report_in_a_browser(tmp_path):
    import tifffile

    from qcmon.record.report import write_report
    from tests.test_report import _real_session

    prof, traces, summary, stack = _real_session(tmp_path)
    out = tmp_path / "fov.qcmon"
    out.mkdir()
    tifffile.imwrite(out / "reference.tif", stack[:5].mean(axis=0).astype(np.float32))
    _check(write_report(out, summary, traces, [], prof, {}))


def test_audit_page_in_a_browser(tmp_path):
    # an archive page as wide as they come: long nested paths, a long error, every column filled, a chronic table
    from qcmon.audit._write import AUDIT_COLUMNS, CHRONIC_COLUMNS, sparkline, write_html

    t = np.arange(600) / 30.0
    png = sparkline({"time_s": t, "displacement_um": 0.5 + 0.1 * np.sin(t), "brightness_pct": 100 - 0.05 * t})
    rows, sparks = [], {}
    for i in range(24):
        path = f"lab-archive-2026/mouse{i:03d}_GCaMP8m_cohort-B/2026-11-{1 + i % 28:02d}/fov{i % 3}_depth-250um/run"
        row = {c: 1234.5678 for c in AUDIT_COLUMNS}
        row.update(path=path, status="measured", verdict=("pass", "warning", "fail")[i % 3], date="2026-11-01",
                   error="", report=f"sessions/{path}.qcmon/report.html")
        if i == 5:
            row["error"] = ("lab-archive-2026/mouse005_GCaMP8m_cohort-B/2026-11-06/fov2_depth-250um/run/"
                            "run_00042.tif, page 0: file is incomplete at the end: a value of the page directory "
                            "at byte 8 is not written yet (and 3 more)")
        rows.append(row)
        sparks[path] = png
    chronic = [{c: 12.345 for c in CHRONIC_COLUMNS} | {"field": "lab-archive-2026/mouse001_GCaMP8m_cohort-B/*/fov1",
                                                         "path": rows[i]["path"], "flags": "dimming;field_shift",
                                                         "date": "2026-11-01T00:00:00"} for i in range(6)]
    page = write_html(tmp_path / "audit.html", rows, sparks, chronic, title="qcmon audit", header="24 sessions")
    seen = _check(page)
    assert seen["images"] == 24
