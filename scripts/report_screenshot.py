"""Render a report at phone and desktop widths with headless Chromium,
check that the page never scrolls sideways, and save a screenshot of each.

::

    python scripts/report_screenshot.py DIR/report.html [--out SHOTS] [--widths 500 1280]

For each width the report is copied beside itself with a small script added
that writes ``document.documentElement.scrollWidth`` and
``window.innerWidth`` into the page; Chromium's ``--dump-dom`` prints the
page after it ran, and the two numbers are read back. A page wider than
its viewport overflows: the script prints one line per width and exits 1.
Exit 2 when Chromium is missing (Debian package ``chromium``). Only the
standard library is used.
"""

from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

CANDIDATES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
WIDTHS = (500, 1280)
HEIGHT = 900
PROBE = ("<script>window.addEventListener('load', function () {"
         "var e = document.documentElement;"
         "e.setAttribute('data-scroll-width', String(e.scrollWidth));"
         "e.setAttribute('data-viewport-width', String(window.innerWidth));});</script>")
MEASURED = re.compile(r'data-scroll-width="(\d+)"[^>]*data-viewport-width="(\d+)"')


def find_chromium() -> str | None:
    """The path of a Chromium-like browser, or ``None``."""
    for name in ("/usr/bin/chromium", *CANDIDATES):
        found = shutil.which(name)
        if found:
            return found
    return None


def _flags(width: int, profile: str) -> list[str]:
    return ["--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
            "--no-first-run", f"--user-data-dir={profile}", f"--window-size={width},{HEIGHT}",
            "--virtual-time-budget=5000"]


def measure(browser: str, report: Path, width: int, work: Path) -> tuple[int, int]:
    """``(scrollWidth, innerWidth)`` of ``report`` in a window ``width`` px wide."""
    html = report.read_text(encoding="utf-8")
    probe = work / f"probe-{width}.html"
    probe.write_text(html.replace("</body>", PROBE + "</body>", 1), encoding="utf-8")
    done = subprocess.run([browser, *_flags(width, str(work / "profile")), "--dump-dom",
                           probe.as_uri()], capture_output=True, text=True, timeout=120,
                          check=False)
    found = MEASURED.search(done.stdout)
    if found is None:
        raise RuntimeError(f"Chromium printed no measurement at {width} px (status "
                           f"{done.returncode}): {done.stderr.strip()[-300:]}")
    return int(found.group(1)), int(found.group(2))


def screenshot(browser: str, report: Path, width: int, out: Path, work: Path) -> Path:
    """A PNG of the top of ``report`` at ``width`` px."""
    target = out / f"report-{width}px.png"
    subprocess.run([browser, *_flags(width, str(work / "profile")),
                    f"--screenshot={target}", report.as_uri()], capture_output=True,
                   timeout=120, check=False)
    return target


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("report", type=Path, help="report.html of a doseattr run")
    parser.add_argument("--out", type=Path, default=None,
                        help="folder for the screenshots (default: the current folder; "
                             "not the run's folder, which holds only what doseattr wrote)")
    parser.add_argument("--widths", type=int, nargs="+", default=list(WIDTHS))
    args = parser.parse_args(argv)
    browser = find_chromium()
    if browser is None:
        print("report_screenshot: no Chromium found (install the Debian package chromium)",
              file=sys.stderr)
        return 2
    report = args.report.resolve()
    out = (args.out or Path.cwd()).resolve()
    out.mkdir(parents=True, exist_ok=True)
    overflow = False
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        for width in args.widths:
            scroll, viewport = measure(browser, report, width, work)
            shot = screenshot(browser, report, width, out, work)
            ok = scroll <= viewport
            overflow |= not ok
            print(f"{width} px window: viewport {viewport} px, page {scroll} px wide "
                  f"({'no horizontal overflow' if ok else 'OVERFLOWS'}); "
                  f"screenshot {os.path.relpath(shot)}")
    return 1 if overflow else 0


if __name__ == "__main__":
    sys.exit(main())
