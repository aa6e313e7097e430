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

    from qcmon.report import write_report
    from tests.test_report import _real_session

    prof, traces, summary, stack = _real_session(tmp_path)
    out = tmp_path / "fov.qcmon"
    out.mkdir()
    tifffile.imwrite(out / "reference.tif", stack[:5].mean(axis=0).astype(np.float32))
    _check(write_report(out, summary, traces, [], prof, {}))
