"""Headless Chromium for the report checks (Debian's ``chromium`` package; .ci/run installs it where
apt-get works). Tests that need it skip, with the reason, where it is missing."""
from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-extensions", "--allow-file-access-from-files"]


def chromium() -> str:
    """The browser's path, or skip the test naming what is missing."""
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    pytest.skip("no headless Chromium here (Debian package 'chromium'; .ci/run installs it where apt-get works)")


def render(page: Path, tmp: Path, height: int = 3000) -> tuple[str, Path, str]:
    """(the DOM after loading ``page``, a screenshot of its top, the browser's log) from headless Chromium."""
    exe = chromium()
    common = [exe, *FLAGS, f"--user-data-dir={tmp / 'profile'}", "--enable-logging=stderr", "--v=0"]
    dom = subprocess.run([*common, "--dump-dom", page.as_uri()], capture_output=True, text=True, timeout=120)
    shot = tmp / "page.png"
    snap = subprocess.run([*common, f"--screenshot={shot}", f"--window-size=1200,{height}", page.as_uri()],
                          capture_output=True, text=True, timeout=120)
    return dom.stdout, shot, dom.stderr + snap.stderr
