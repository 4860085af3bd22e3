"""Screenshots of the static duplicate report for docs/ (Playwright driving Debian's /usr/bin/chromium).

The docs' pictures were made from the demo archive copied to a neutral folder, so that no worktree path shows:
    python scripts/demo_dates.py demo_archive   # the dates recorded in key.csv
    cp -a demo_archive /tmp/tansyford/pattern-library
    kinscope index /tmp/tansyford/pattern-library --db /tmp/tansyford/kinscope-db
    kinscope duplicates --db /tmp/tansyford/kinscope-db --report /tmp/tansyford/duplicates.html -q > /dev/null
    python scripts/screenshot_report.py /tmp/tansyford/duplicates.html --group 13
It writes docs/screenshot-report.png (the top of the page) and docs/screenshot-report-group.png (one group).
Look at both before committing them.
"""
from __future__ import annotations

import argparse
from pathlib import Path

from playwright.sync_api import sync_playwright

DOCS = Path(__file__).resolve().parents[1] / "docs"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("report", type=Path, help="an HTML report written by kinscope duplicates --report")
    ap.add_argument("--group", type=int, required=True, help="the group to picture on its own")
    ap.add_argument("--width", type=int, default=1200)
    a = ap.parse_args()
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path="/usr/bin/chromium", args=ARGS)
        page = browser.new_page(viewport={"width": a.width, "height": 860})
        page.goto(a.report.resolve().as_uri())
        page.screenshot(path=str(DOCS / "screenshot-report.png"))
        page.locator(f"#group-{a.group}").screenshot(path=str(DOCS / "screenshot-report-group.png"))
        browser.close()
    print(f"wrote {DOCS / 'screenshot-report.png'} and {DOCS / 'screenshot-report-group.png'}")


if __name__ == "__main__":
    main()
