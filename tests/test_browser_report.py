"""The static duplicate report (`kinscope duplicates --report FILE`) opened from disk in headless Chromium
(Debian's package) driven by Playwright.

The archive: scikit-image pictures (`skimage.data`) with versions made as in copy-detection benchmarks
(Douze et al. 2021: JPEG re-encoding, resizing, brightness) and one byte-identical copy, one of them under
a long name without break points. The page must load nothing, say in words which file stays and why and
which would move, show it by shape (a wide card under a heavy rule, dashed cards), and let no name overflow
its card. A screenshot goes to test-output/screenshots/report.png (gitignored).
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner

CHROMIUM = Path("/usr/bin/chromium")
if not CHROMIUM.exists():
    pytest.skip("the browser tests need Debian's chromium at /usr/bin/chromium", allow_module_level=True)
sync_api = pytest.importorskip("playwright.sync_api", reason="the browser tests need Playwright for Python")

REPO = Path(__file__).resolve().parents[1]
SHOTS = REPO / "test-output" / "screenshots"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]
LONG = "IMG20240101T123456789012345678-export.jpg"  # 30 characters before its first break point


@pytest.fixture(scope="module")
def report(tmp_path_factory, sample_images):
    from index.api import Archive
    from index.cli import main
    from tests.test_duplicates import make_folder

    root = make_folder(tmp_path_factory.mktemp("report") / "studio-archive", sample_images,
                       names=("astronaut", "coffee", "camera", "chelsea"))
    shutil.move(root / "exports" / "chelsea-bright.jpg", root / "exports" / LONG)
    db = root.parent / "db"
    with Archive.open(db, create=True, layers=["objects"]) as archive:
        archive.add([root], progress=False)
    page = root.parent / "review.html"
    out = CliRunner().invoke(main, ["duplicates", "--db", str(db), "--report", str(page), "-q"])
    assert out.exit_code == 0, out.output
    return page, json.loads(out.stdout)


def test_the_report_says_and_shows_what_stays_and_what_would_move(report):
    path, doc = report
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=ARGS)
        page = browser.new_page(viewport={"width": 1200, "height": 900})
        fetched, errors = [], []
        page.on("request", lambda r: r.url.startswith(("file:", "data:")) or fetched.append(r.url))
        page.on("pageerror", lambda exc: errors.append(str(exc)))
        page.goto(path.as_uri())
        SHOTS.mkdir(parents=True, exist_ok=True)
        page.screenshot(path=str(SHOTS / "report.png"), full_page=True)
        assert not fetched and not errors, (fetched, errors)

        for g in doc["groups"]:
            section = page.locator(f"#group-{g['id']}")
            kind = {"exact": "same bytes", "near": "look-alike"}[g["kind"]]
            assert f"{kind} \u00b7 {len(g['members'])} files, {len(g['members']) - 1} would move" in \
                section.locator("h2").inner_text()
            stays = section.locator("li.file.stays")
            assert stays.count() == 1
            assert stays.locator(".decision").inner_text() == f"stays: {g['keeper_reason']}"
            moves = section.locator("li.file.moves")
            assert [m.inner_text() for m in moves.locator(".decision").all()] == ["would move"] * (len(g["members"]) - 1)
            # Shape, not colour: the file that stays is wider and under a heavy rule; the others are dashed.
            box, other = stays.bounding_box(), moves.first.bounding_box()
            assert box["width"] > 1.8 * other["width"]
            assert float(stays.evaluate("e => getComputedStyle(e).borderTopWidth").rstrip("px")) >= 4
            assert moves.first.evaluate("e => getComputedStyle(e).borderLeftStyle") == "dashed"
        body = page.inner_text("body")
        assert "keeper" not in body.lower()
        # Groups first, the method last.
        last = page.locator(f"#group-{doc['groups'][-1]['id']}").bounding_box()
        assert page.locator("h2", has_text="How these were found").bounding_box()["y"] > last["y"] + last["height"]
        # No name or fact overflows its card, and the long name is cut in the middle with the whole name kept.
        overflowing = page.evaluate("""() => [...document.querySelectorAll('.name, .folder, .decision, .facts dd')]
            .filter(e => e.scrollWidth > e.clientWidth + 1).map(e => e.textContent)""")
        assert overflowing == []
        cut = page.locator(f".name .cut[title='{LONG}']")
        assert cut.count() == 1 and "\u2026" in cut.inner_text() and cut.inner_text().endswith("export.jpg")
        browser.close()
