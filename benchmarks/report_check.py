"""Look at the bundled reports as a reader would: in a real browser (headless Chromium), every figure captioned.

``make report-check`` runs the two demos and this script.  For each report.html: the page parses, every
figure is an embedded PNG under a caption, and - where Chromium is installed (Debian: ``apt-get install
chromium``) - a headless browser loads the page and saves a screenshot next to it (report.png), which a
person can open.  Exit code 1 when a check fails.
"""

from __future__ import annotations

import base64
import re
import shutil
import subprocess
import sys
import tempfile
from html.parser import HTMLParser
from pathlib import Path


class _Figures(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.last_heading = ""
        self.in_h3 = False
        self.figures: list[tuple[str, str]] = []

    def handle_starttag(self, tag, attrs):
        if tag == "h3":
            self.in_h3, self.last_heading = True, ""
        if tag == "img":
            self.figures.append((self.last_heading, dict(attrs).get("src", "")))
            self.last_heading = ""

    def handle_endtag(self, tag):
        if tag == "h3":
            self.in_h3 = False

    def handle_data(self, data):
        if self.in_h3:
            self.last_heading += data


def check_page(page: Path) -> list[str]:
    """What is wrong with one report (empty when nothing)."""
    problems = []
    parser = _Figures()
    parser.feed(page.read_text(encoding="utf-8"))
    if not parser.figures:
        problems.append("no figure")
    for caption, src in parser.figures:
        if not caption.strip():
            problems.append("a figure without a caption")
        m = re.match(r"data:image/png;base64,(.*)", src)
        if not m or not base64.b64decode(m.group(1))[:8] == b"\x89PNG\r\n\x1a\n":
            problems.append(f"figure {caption[:40]!r} is not an embedded PNG")
    return problems


def screenshot(page: Path) -> Path | None:
    """A headless-browser screenshot of ``page`` beside it, or None when no Chromium is installed."""
    browser = shutil.which("chromium") or shutil.which("chromium-browser") or shutil.which("google-chrome")
    if browser is None:
        return None
    shot = page.with_name("report.png")
    with tempfile.TemporaryDirectory() as profile:
        subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                        "--disable-background-networking", "--disable-component-update", "--disable-sync",
                        f"--user-data-dir={profile}", "--window-size=1200,3000", f"--screenshot={shot}",
                        page.resolve().as_uri()], check=True, capture_output=True, timeout=120)
    return shot


def main(pages: list[str]) -> int:
    failed = False
    for name in pages:
        page = Path(name)
        problems = check_page(page)
        shot = screenshot(page)
        if shot is not None and (not shot.exists() or shot.stat().st_size < 10_000):
            problems.append("the browser made no screenshot")
        status = "ok" if not problems else "; ".join(problems)
        where = f", screenshot {shot}" if shot else " (no Chromium here: apt-get install chromium for the screenshot)"
        print(f"{page}: {status}{where}")
        failed |= bool(problems)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
