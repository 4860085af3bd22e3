"""Screenshots of the search page for the README (Playwright driving Debian's /usr/bin/chromium).

Made from the demo archive as scripts/demo leaves it (its dates set from demo_archive/key.csv):
    KINSCOPE_DEMO_NO_SERVE=1 scripts/demo
    .venv/bin/python scripts/screenshot_page.py --db demo-db
It serves the database on a free 127.0.0.1 port (stopped at the end), searches with a re-scan of the demo
archive and writes docs/screenshot-results.png (1280 x 800) and docs/screenshot-narrow.png (800 px wide).
Look at both before committing them.
"""
from __future__ import annotations

import argparse
import subprocess
import sys
import time
from pathlib import Path

from playwright.sync_api import sync_playwright

REPO = Path(__file__).resolve().parents[1]
DOCS = REPO / "docs"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--db", type=Path, required=True, help="a database folder (scripts/demo makes demo-db)")
    ap.add_argument("--query", type=Path, default=REPO / "demo_archive" / "rescans-2026" / "scan-0001.jpg")
    a = ap.parse_args()
    sys.path.insert(0, str(REPO))
    from web.serve import free_port

    port = free_port("127.0.0.1")
    server = subprocess.Popen([sys.executable, "-m", "index", "serve", "--db", str(a.db), "--port", str(port)],
                              cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    try:
        line = server.stdout.readline()  # the first line comes once the server listens and its model is warm
        if "is serving" not in line:
            sys.exit(f"the server did not start: {line}{server.stdout.read()}")
        with sync_playwright() as p:
            browser = p.chromium.launch(executable_path="/usr/bin/chromium", args=ARGS)
            for width, name in ((1280, "screenshot-results.png"), (800, "screenshot-narrow.png")):
                page = browser.new_page(viewport={"width": width, "height": 800})
                page.goto(f"http://127.0.0.1:{port}/")
                page.wait_for_selector("#app[data-ready=true]")
                page.set_input_files("#file-input", str(a.query))
                page.wait_for_selector("#results li.result img")
                time.sleep(1.5)  # thumbnails finish loading
                page.screenshot(path=str(DOCS / name))
                page.close()
            browser.close()
    finally:
        server.terminate()
        server.wait(timeout=30)
    print(f"wrote {DOCS / 'screenshot-results.png'} and {DOCS / 'screenshot-narrow.png'}")


if __name__ == "__main__":
    main()
