"""The demo's report at 500 px and 1280 px has no horizontal overflow
(issue 16 "Done when"), measured by headless Chromium through
scripts/report_screenshot.py; skipped where Chromium is not installed.

The measurement itself is checked on a page made to overflow (a 900 px
wide block in a 500 px window), so that the test cannot pass by reading
nothing.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from doseattr.cli import main

ROOT = Path(__file__).resolve().parent.parent
SCRIPT = ROOT / "scripts" / "report_screenshot.py"
sys.path.insert(0, str(SCRIPT.parent))
from report_screenshot import find_chromium  # noqa: E402

pytestmark = pytest.mark.skipif(find_chromium() is None,
                                reason="no Chromium (Debian package chromium) to render with")


def _script(report: Path, shots: Path) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, str(SCRIPT), str(report), "--out", str(shots)],
                          capture_output=True, text=True, timeout=300, check=False)


def test_the_demo_report_fits_at_500_and_1280_px(tmp_path):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--quiet"]) == 0
    done = _script(out / "report.html", tmp_path / "shots")
    assert done.returncode == 0, done.stdout + done.stderr
    lines = done.stdout.splitlines()
    assert len(lines) == 2
    for width, line in zip((500, 1280), lines):
        assert line.startswith(f"{width} px window: viewport {width} px, page {width} px wide")
        png = tmp_path / "shots" / f"report-{width}px.png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_an_overflowing_page_is_caught(tmp_path):
    page = tmp_path / "wide.html"
    page.write_text("<!DOCTYPE html><html><head><meta name='viewport' "
                    "content='width=device-width, initial-scale=1'></head><body>"
                    "<div style='width:900px'>wide</div></body></html>")
    done = _script(page, tmp_path / "shots")
    assert done.returncode == 1
    assert "500 px window: viewport 500 px, page" in done.stdout and "OVERFLOWS" in done.stdout
