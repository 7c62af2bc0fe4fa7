"""The sample digest's HTML renders in a real browser engine (headless Chromium).

The primary guard against external requests is the HTML check in test_render.py (no
http(s) resources); here Chromium runs with networking features off, from a temporary
folder where the cid: images are rewritten to local file names. Set DIGEST_SCREENSHOT to
a path to keep the desktop screenshot (e.g. as a CI artefact).
"""

from __future__ import annotations

import os
import shutil
import struct
import subprocess
from pathlib import Path

import pytest

from digest.render import RenderedDigest, check_templates, make_environment

BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification, section 5.2


def find_browser() -> str | None:
    return next((path for name in BROWSERS if (path := shutil.which(name))), None)


BROWSER = find_browser()
pytestmark = [
    pytest.mark.skipif(
        BROWSER is None, reason="no chromium binary on PATH (apt-get install chromium)"
    ),
    pytest.mark.slow,  # a browser start takes a few seconds
]


def write_page(rendered: RenderedDigest, folder: Path) -> Path:
    """The HTML with each cid: image saved beside it under its file name."""
    html = rendered.html
    for chart in rendered.charts:
        (folder / chart.filename).write_bytes(chart.png)
        html = html.replace(f"cid:{chart.cid}", chart.filename)
    page = folder / "digest.html"
    page.write_text(html, encoding="utf-8")
    return page


def screenshot(page: Path, out: Path, width: int, height: int, profile: Path) -> None:
    command = [
        str(BROWSER),
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-dev-shm-usage",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--hide-scrollbars",
        f"--user-data-dir={profile}",
        f"--screenshot={out}",
        f"--window-size={width},{height}",
        page.as_uri(),
    ]
    subprocess.run(command, check=True, capture_output=True, timeout=90)


def test_sample_digest_renders_in_chromium(tmp_path: Path) -> None:
    rendered = check_templates(make_environment(None))
    assert rendered.charts
    page = write_page(rendered, tmp_path)
    out = tmp_path / "digest.png"
    screenshot(page, out, 800, 2900, tmp_path / "profile")  # the whole sample page
    data = out.read_bytes()
    assert data.startswith(PNG_SIGNATURE)
    assert struct.unpack(">II", data[16:24]) == (800, 2900)  # IHDR width, height
    assert len(data) > 50_000  # a blank page compresses to a few kilobytes
    if keep := os.environ.get("DIGEST_SCREENSHOT"):
        shutil.copyfile(out, keep)
