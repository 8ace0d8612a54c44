"""Shared test fixtures."""
import html
import re
import shutil
import subprocess
from pathlib import Path

import pytest


def _chromium() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        found = shutil.which(name)
        if found:
            return found
    return None


_SMALLEST_WINDOW = 500
_NARROW = """<!DOCTYPE html><html><head><meta charset="utf-8"></head>
<body style="margin:0"><iframe id="page" src="PAGE" style="width:WIDTHpx;height:800px;border:0"></iframe>
<script>
document.getElementById("page").addEventListener("load", function () {
  var inner = this.contentDocument.body.dataset;
  for (var key in inner) { document.body.dataset[key] = inner[key]; }
});
</script></body></html>
"""


def _browse(page: Path, profile: Path, width: int = 1400) -> dict:
    """Open ``page`` in headless Chromium in a window ``width`` CSS pixels wide; return the data-* attributes of
    <body> after load."""
    binary = _chromium()
    if binary is None:
        pytest.skip("no Chromium binary found (install the Debian packages chromium and chromium-driver)")
    extra, target = [], page.as_uri()
    if width < _SMALLEST_WINDOW:
        # headless Chromium makes no window narrower than 500 px: the page goes into a frame that wide (a phone's
        # screen), and the frame's <body> attributes are copied onto the outer page once the frame has loaded
        Path(profile).mkdir(parents=True, exist_ok=True)
        outer = Path(profile) / "narrow.html"
        outer.write_text(_NARROW.replace("WIDTH", str(int(width))).replace("PAGE", page.as_uri()), encoding="utf-8")
        extra, target = ["--allow-file-access-from-files"], outer.as_uri()
    command = [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               f"--user-data-dir={profile}", f"--window-size={max(int(width), _SMALLEST_WINDOW)},900",
               "--virtual-time-budget=5000", *extra, "--dump-dom", target]
    done = subprocess.run(command, capture_output=True, text=True, timeout=90)
    body = re.search(r"<body([^>]*)>", done.stdout)
    assert body, f"Chromium printed no page (exit {done.returncode}): {done.stderr[-2000:]}"
    return {k: html.unescape(v) for k, v in re.findall(r'data-([a-z-]+)="([^"]*)"', body.group(1))}




@pytest.fixture
def browse():
    """Open a page in headless Chromium and return the data-* attributes of its <body> after load
    (``browse(page, profile, width=1400)``; the width of the window in CSS pixels).

    Skips the test, with the reason, when no Chromium binary is installed (CI installs Debian's chromium).
    """
    return _browse
