"""Render an HTML report in headless Chromium to a PNG, as a phone would show it (390 px wide by default).

    python scripts/screenshot_report.py RUN_DIR_OR_HTML [--out report.png] [--width 390] [--height 2400]

Given a run folder, report.html is first (re)written from its report.json and pairs.jsonl. Needs the
Debian package `chromium` (apt-get install chromium); nothing is fetched from the network.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from alignrun.html_report import write_run_html

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync", "--hide-scrollbars"]


def screenshot(page: Path, out: Path, width: int, height: int) -> Path:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        sys.exit("chromium not found: apt-get install chromium")
    with tempfile.TemporaryDirectory() as profile:
        subprocess.run([browser, *FLAGS, f"--user-data-dir={profile}", f"--window-size={width},{height}",
                        f"--screenshot={out.resolve()}", page.resolve().as_uri()],
                       check=True, capture_output=True, timeout=120)
    if not out.exists():
        sys.exit(f"chromium wrote no screenshot to {out}")
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("source", type=Path, help="a run folder or an .html file")
    parser.add_argument("--out", type=Path, default=Path("report.png"))
    parser.add_argument("--width", type=int, default=390, help="viewport width in CSS pixels (390: a phone)")
    parser.add_argument("--height", type=int, default=2400, help="viewport height: how much of the page is captured")
    args = parser.parse_args()
    page = write_run_html(args.source) if args.source.is_dir() else args.source
    print(screenshot(page, args.out, args.width, args.height))


if __name__ == "__main__":
    main()
