"""The HTML report opened in a real headless Chromium: it renders, logs nothing, shows the counts."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from labelprep import reports
from test_reports import META, make_report_dataset, parse_page

pytestmark = pytest.mark.browser

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--enable-logging=stderr", "--v=0"]


def _find_browser():
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        found = shutil.which(name)
        if found:
            return found
    return "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None


BROWSER = _find_browser()
needs_browser = pytest.mark.skipif(
    BROWSER is None, reason="no Chromium found (Debian: apt-get install -y chromium); the page was not rendered")


def open_page(page: Path, profile: Path, *extra: str) -> tuple[str, list[str]]:
    """Load ``page`` in a fresh profile; return stdout and the console lines Chromium logged
    (script errors, Content-Security-Policy refusals, console output). ``extra`` must hold an
    action that ends the run (``--dump-dom`` or ``--screenshot``), else headless Chromium waits."""
    proc = subprocess.run([BROWSER, *FLAGS, f"--user-data-dir={profile}", *extra, page.as_uri()],
                          capture_output=True, text=True, timeout=90)
    assert proc.returncode == 0, proc.stderr[-2000:]
    return proc.stdout, [line for line in proc.stderr.splitlines() if ":CONSOLE" in line]


@pytest.fixture(scope="module")
def rendered(tmp_path_factory):
    base = tmp_path_factory.mktemp("browser")
    m = make_report_dataset(base / "root")
    summary = reports.report(m, html=base / "report.html", root=base / "root", meta=META)
    return base, summary


@needs_browser
def test_renders_counts_without_console_messages(rendered):
    """The DOM after load shows the summary's counts, and the console stays silent."""
    base, summary = rendered
    dom, console = open_page(base / "report.html", base / "profile-dom", "--dump-dom")
    assert console == []
    counts = parse_page(dom).counts
    assert counts["files"] == summary["files"] and counts["left-out"] == summary["left_out"]
    assert {k: counts[f"split-{k}"] for k in summary["splits"]} == {k: v["count"] for k, v in summary["splits"].items()}
    assert counts["clusters"] == summary["near_duplicates"]["clusters"]
    assert len(parse_page(dom).images) == 6


@needs_browser
def test_console_check_catches_faults(tmp_path):
    """Control: a page with a script error and a network fetch does log, so silence above means something."""
    bad = tmp_path / "bad.html"
    bad.write_text('<!DOCTYPE html><meta http-equiv="Content-Security-Policy" content="default-src \'none\'; '
                   'script-src \'unsafe-inline\'"><img src="http://192.0.2.1/x.png"><script>missing();</script>')
    _, console = open_page(bad, tmp_path / "profile", "--dump-dom")
    assert any("Content Security Policy" in line for line in console)
    assert any("Uncaught ReferenceError" in line for line in console)


@needs_browser
@pytest.mark.parametrize("width", [390, 1200])
def test_screenshot_has_content(rendered, width):
    """Phone and desktop widths render a page with text and thumbnails (not a blank canvas)."""
    base, _ = rendered
    shot = base / f"shot-{width}.png"
    open_page(base / "report.html", base / f"profile-{width}", f"--screenshot={shot}",
              f"--window-size={width},1800", "--hide-scrollbars")
    with Image.open(shot) as im:
        assert im.size == (width, 1800)
        pixels = np.asarray(im.convert("RGB"), dtype=float)
    assert pixels.std() > 10  # a blank or failed render is one flat colour
    colourful = (pixels.max(axis=2) - pixels.min(axis=2)) > 60
    assert colourful.mean() > 0.005  # bars and thumbnails are coloured; bare text is grey
