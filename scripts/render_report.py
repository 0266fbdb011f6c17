"""Render a treewright HTML report in a headless browser and save a screenshot.

    python scripts/render_report.py runs/em_demo/report.html --out report.png
    python scripts/render_report.py runs/em_demo --gold src/treewright/data/demo/dev.trees --out report.png

Given a run folder, the report is built first (into RUN/report.html). The browser is Chromium,
started with networking features off, so the screenshot also shows that the page needs nothing
from the network. Prints the number of <svg> figures in the page and where the screenshot went.
Install Chromium on Debian/Ubuntu with:  apt-get update && apt-get install -y chromium
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")


def find_browser() -> str | None:
    return next((path for path in map(shutil.which, BROWSERS) if path), None)


def screenshot(page: Path, out: Path, width: int = 1400, height: int = 3000,
               browser: str | None = None) -> None:
    browser = browser or find_browser()
    if browser is None:
        raise SystemExit("No Chromium found. Install it with:\n"
                         "  apt-get update && apt-get install -y chromium\n"
                         "(or put chromium / google-chrome on PATH).")
    with tempfile.TemporaryDirectory() as profile:
        command = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                   "--no-first-run", "--disable-background-networking",
                   "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
                   f"--screenshot={out.resolve()}", f"--window-size={width},{height}",
                   page.resolve().as_uri()]
        done = subprocess.run(command, capture_output=True, text=True, timeout=120)
    if done.returncode != 0 or not out.exists():
        raise SystemExit(f"the browser failed (exit {done.returncode}):\n{done.stderr[-2000:]}")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__,
                                     formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("target", help="a report .html file, or a run folder to build it from")
    parser.add_argument("--gold", help="gold trees, when building from a run folder")
    parser.add_argument("--text", help="raw text, when building from a run folder")
    parser.add_argument("--max-sentences", type=int, default=100,
                        help="sentences parsed when building (default 100)")
    parser.add_argument("--out", default="report.png", help="screenshot file (PNG)")
    parser.add_argument("--width", type=int, default=1400,
                        help="window width in px (default 1400, the width the page is made for)")
    parser.add_argument("--height", type=int, default=3000)
    args = parser.parse_args(argv)
    target = Path(args.target)
    if target.is_dir():
        from treewright.report.html import write_report
        page = write_report(target, gold=args.gold, text=args.text,
                            max_sentences=args.max_sentences)
    else:
        page = target
    figures = page.read_text(encoding="utf-8").count("<svg")
    screenshot(page, Path(args.out), args.width, args.height)
    print(f"{page}: {figures} SVG figures; screenshot saved to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
