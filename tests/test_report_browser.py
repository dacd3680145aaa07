"""report.html in a real headless browser (Chromium from the system packages).

.ci/run installs Chromium when it is missing; these tests are skipped, with the reason,
only where no Chromium binary exists at all.
"""

from __future__ import annotations

import shutil
import subprocess

import pytest
from PIL import Image, ImageStat

from _report_cases import cached_case
from invariance.report import write_reports

CHROMIUM = next((p for p in (shutil.which("chromium"), shutil.which("chromium-browser"), shutil.which("google-chrome"))
                 if p), None)
pytestmark = pytest.mark.skipif(CHROMIUM is None, reason="Chromium is not installed (apt-get install -y chromium)")

ERROR_MARKS = (":CONSOLE", "Uncaught", "Refused to")


def render(page, tmp_path, *, size=(1200, 2000)):
    """Open ``page`` headless; return (console error lines, screenshot image)."""
    shot = tmp_path / f"{page.stem}.png"
    cmd = [
        CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", f"--window-size={size[0]},{size[1]}",
        "--enable-logging=stderr", "--v=0", page.resolve().as_uri(),
    ]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)
    errors = [line for line in proc.stderr.splitlines() if any(m in line for m in ERROR_MARKS)]
    assert shot.exists(), f"no screenshot; chromium said: {proc.stderr[-2000:]}"
    im = Image.open(shot)
    im.load()
    return errors, im


def not_blank(im: Image.Image) -> bool:
    gray = im.convert("L")
    dark = sum(gray.histogram()[:200]) / (im.width * im.height)  # share of pixels clearly not white
    return dark > 0.01 and ImageStat.Stat(gray).stddev[0] > 10 and len(im.convert("RGB").getcolors(1 << 24)) > 50


def test_detector_sees_console_errors(tmp_path):
    # control: a page with a failing script must be caught, or the checks below prove nothing
    page = tmp_path / "bad.html"
    page.write_text("<!DOCTYPE html><p>x</p><script>console.error('boom'); notDefined();</script>")
    errors, im = render(page, tmp_path, size=(400, 300))
    assert any("Uncaught" in e for e in errors) and any("boom" in e for e in errors)
    assert not not_blank(im)  # an almost empty page counts as blank


@pytest.mark.parametrize("case", ["three", "hostile"])
def test_report_renders_without_console_errors(case, tmp_path):
    out = tmp_path / "run"
    write_reports(out, *cached_case(case))
    errors, im = render(out / "report.html", tmp_path)
    assert errors == []
    assert im.size == (1200, 2000)
    assert not_blank(im)
