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


def _browse(page: Path, profile: Path) -> dict:
    """Open ``page`` in headless Chromium; return the data-* attributes of <body> after load."""
    binary = _chromium()
    if binary is None:
        pytest.skip("no Chromium binary found (install the Debian packages chromium and chromium-driver)")
    command = [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               f"--user-data-dir={profile}", "--virtual-time-budget=5000", "--dump-dom", page.as_uri()]
    done = subprocess.run(command, capture_output=True, text=True, timeout=90)
    body = re.search(r"<body([^>]*)>", done.stdout)
    assert body, f"Chromium printed no page (exit {done.returncode}): {done.stderr[-2000:]}"
    return {k: html.unescape(v) for k, v in re.findall(r'data-([a-z-]+)="([^"]*)"', body.group(1))}




@pytest.fixture
def browse():
    """Open a page in headless Chromium and return the data-* attributes of its <body> after load.

    Skips the test, with the reason, when no Chromium binary is installed (CI installs Debian's chromium).
    """
    return _browse
