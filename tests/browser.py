"""A real headless browser (Debian's ``chromium``) looking at qcmon's pages, for the tests of ``report.html`` and
``audit.html``: a screenshot, the console messages, and whether the page scrolls sideways at a laptop width.

The page is copied next to itself with a small script appended that writes, once loaded, the page's scroll width,
its visible width and its broken images into the DOM, which ``--dump-dom`` prints. The pages themselves run no
script, so any console message (a failed resource, a script error) is a defect.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

__all__ = ["CHROMIUM", "look"]

#: The browser, when installed (``.ci/run`` installs it; a test without it is skipped locally, never in CI).
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")

_PROBE = """<script>window.addEventListener("load", function () {
  var d = document.documentElement;
  var broken = [].filter.call(document.images, function (i) { return !(i.complete && i.naturalWidth > 0); });
  var p = document.createElement("pre"); p.id = "qcmon-probe";
  p.textContent = JSON.stringify({scrollWidth: d.scrollWidth, clientWidth: d.clientWidth,
                                  images: document.images.length, broken: broken.length});
  document.body.appendChild(p);
});</script>"""


def _chromium(args: list[str], profile: Path) -> subprocess.CompletedProcess:
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           "--disable-extensions", f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=120, check=False)


def look(page: Path, *, width: int = 1400, height: int = 900) -> dict:
    """Open ``page`` in headless chromium at ``width`` × ``height`` px.

    Returns
    -------
    dict
        ``scrollWidth``, ``clientWidth`` (px: the page scrolls sideways when the first exceeds the second),
        ``images`` and ``broken`` (images that did not decode), ``console`` (console messages of the page:
        script errors, failed loads), ``screenshot`` (path of a PNG of the first screen, beside the page).
    """
    if CHROMIUM is None:
        raise RuntimeError("chromium is not installed")
    page = Path(page).resolve()
    probe = page.with_name(page.stem + ".probe.html")
    text = page.read_text(encoding="utf-8")
    if "</body>" not in text:
        raise ValueError(f"{page}: no </body>")
    probe.write_text(text.replace("</body>", _PROBE + "</body>"), encoding="utf-8")
    profile = page.parent / f".chromium-{page.stem}"
    size = f"--window-size={width},{height}"
    dom = _chromium([size, "--virtual-time-budget=10000", "--dump-dom", probe.as_uri()], profile)
    found = re.search(r'<pre id="qcmon-probe">([^<]*)</pre>', dom.stdout)
    if not found:
        raise RuntimeError(f"chromium did not load {probe} (exit {dom.returncode}): {dom.stderr[-2000:]}")
    out = json.loads(found.group(1).replace("&quot;", '"'))
    out["console"] = [line for line in dom.stderr.splitlines() if ":CONSOLE" in line]
    shot = page.with_suffix(".png")
    _chromium([size, f"--screenshot={shot}", page.as_uri()], profile)
    out["screenshot"] = shot
    probe.unlink()
    shutil.rmtree(profile, ignore_errors=True)
    return out
