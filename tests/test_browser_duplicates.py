"""The duplicate review page (/duplicates) in headless Chromium (Debian's package) driven by Playwright.

A small archive of scikit-image pictures (`skimage.data`) with versions made as in copy-detection benchmarks
(Douze et al. 2021: JPEG, resizing, brightness, a border) and one byte-identical copy is served by
`kinscope serve` on a free loopback port. The test reviews it as a person would, with the keyboard: another
file stays, one is marked "not a copy", one is split off; the plan is downloaded, applied with
`kinscope duplicates --plan --move-to --apply`, and undone with `kinscope restore`: every file comes back
byte for byte (Python's hashlib SHA-256).
"""
from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import pytest
from click.testing import CliRunner
from PIL import ImageEnhance, ImageOps

from tests.serving import serving

CHROMIUM = Path("/usr/bin/chromium")
if not CHROMIUM.exists():
    pytest.skip("the browser tests need Debian's chromium at /usr/bin/chromium", allow_module_level=True)
sync_api = pytest.importorskip("playwright.sync_api", reason="the browser tests need Playwright for Python")

REPO = Path(__file__).resolve().parents[1]
SHOTS = REPO / "test-output" / "screenshots"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]


def snapshot(root: Path) -> dict:
    return {p.relative_to(root): (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime)
            for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def review_server(tmp_path_factory, sample_images):
    from index.api import Archive

    root = tmp_path_factory.mktemp("dupbrowser") / "photos"
    (root / "scans").mkdir(parents=True)
    (root / "exports").mkdir()
    astronaut = sample_images["astronaut"]
    astronaut.save(root / "scans" / "astronaut.png")
    astronaut.save(root / "exports" / "astronaut-q60.jpg", "JPEG", quality=60)
    astronaut.resize((256, 256)).save(root / "exports" / "astronaut-small.jpg", "JPEG", quality=85)
    ImageEnhance.Brightness(astronaut).enhance(1.3).save(root / "exports" / "astronaut-bright.jpg", "JPEG", quality=90)
    ImageOps.expand(astronaut, border=40, fill=(30, 60, 160)).save(root / "exports" / "astronaut-border.jpg", "JPEG")
    sample_images["coffee"].save(root / "scans" / "coffee.png")
    (root / "exports" / "coffee-copy.png").write_bytes((root / "scans" / "coffee.png").read_bytes())
    for name in ("camera", "rocket", "coins", "horse", "brick"):
        sample_images[name].save(root / "scans" / f"{name}.png")
    db = root.parent / "db"
    with Archive.open(db, create=True, layers=["objects"]) as archive:
        archive.add([root], progress=False)
    with serving(db, root.parent / "serve.log") as base:
        yield base, root, db


@pytest.fixture
def page(review_server):
    base = review_server[0]
    with sync_api.sync_playwright() as p:
        browser = p.chromium.launch(executable_path=str(CHROMIUM), args=ARGS)
        context = browser.new_context(viewport={"width": 1400, "height": 1000}, accept_downloads=True)
        pg = context.new_page()
        problems: list[str] = []
        pg.on("pageerror", lambda exc: problems.append(f"script error: {exc}"))
        pg.on("request", lambda r: r.url.startswith((base + "/", "data:", "blob:")) or problems.append(r.url))
        yield pg
        context.close()
        browser.close()
        assert not problems, problems


def _exactly(name: str):
    # The whole text of the element: names hold <wbr> after - and _ (so :text-is, which reads its text nodes
    # one by one, no longer sees the name).
    return re.compile("^" + re.escape(name) + "$")


def _group_of(page, name: str):
    return page.locator("li.dup-group").filter(has=page.locator(".dup-name", has_text=_exactly(name)))


def _card(group, name: str):
    return group.locator("li.dup-member").filter(has=group.page.locator(".dup-name", has_text=_exactly(name)))


def test_review_by_keyboard_export_apply_and_restore(page, review_server, tmp_path):
    base, root, db = review_server
    before = snapshot(root)
    page.goto(base + "/duplicates")
    page.wait_for_selector("#dup-page[data-ready=true]")
    text = page.inner_text("body")
    assert "this page moves nothing" in text and "not a verdict" in text
    assert "same bytes" in text and "look-alike" in text
    near = _group_of(page, "astronaut-bright.jpg")
    assert near.locator("li.dup-member").count() == 5
    keeper = _card(near, "astronaut.png")  # the original: the keeper rule does not reward the border's pixels
    keeper_text = keeper.locator(".dup-decision").inner_text()
    assert keeper_text.startswith("stays: ") and keeper_text != "stays: your choice"
    assert _card(near, "astronaut-border.jpg").locator(".dup-decision").inner_text() == "would move"
    for card in near.locator("li.dup-member").all():  # each member: score, pixel size, file size, date
        facts = card.locator(".dup-facts").inner_text()
        assert "pixels" in facts and "file size" in facts and "file date" in facts
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / "duplicates.png"), full_page=True)

    # Keyboard only: N jumps to a group; Space on controls changes the decisions.
    page.locator("body").click(position={"x": 5, "y": 5})
    page.keyboard.press("n")
    assert page.evaluate("document.activeElement.tagName") == "H2"
    # N also jumps from a member's radio button (not from the "Belongs to" list, whose keys pick an entry).
    headings = page.locator("li.dup-group > h2")
    at = [h.inner_text() for h in headings.all()].index(near.locator("h2").inner_text())
    _card(near, "astronaut-border.jpg").locator("input[type=radio]").focus()
    page.keyboard.press("n")
    expected = headings.nth(min(at + 1, headings.count() - 1)).inner_text()
    assert page.evaluate("document.activeElement.tagName + ' ' + document.activeElement.innerText") == f"H2 {expected}"
    _card(near, "astronaut-border.jpg").locator("select").focus()
    page.keyboard.press("n")
    assert page.evaluate("document.activeElement.tagName") == "SELECT"
    _card(near, "astronaut-border.jpg").locator("input[type=radio]").focus()
    page.keyboard.press("Space")  # the bordered export stays instead
    near = _group_of(page, "astronaut-bright.jpg")
    assert _card(near, "astronaut-border.jpg").locator(".dup-decision").inner_text() == "stays: your choice"
    assert _card(near, "astronaut.png").locator(".dup-decision").inner_text() == "would move"
    _card(near, "astronaut.png").locator("input[type=radio]").focus()
    page.keyboard.press("Space")  # and back: the original stays, for the rule's own reason
    near = _group_of(page, "astronaut-bright.jpg")
    assert _card(near, "astronaut.png").locator(".dup-decision").inner_text() == keeper_text
    assert _card(near, "astronaut-border.jpg").locator(".dup-decision").inner_text() == "would move"
    _card(near, "astronaut-border.jpg").locator("input[type=checkbox]").focus()
    page.keyboard.press("Space")  # not a copy: it stays where it is
    near = _group_of(page, "astronaut-bright.jpg")
    assert _card(near, "astronaut-border.jpg").locator(".dup-decision").inner_text().startswith("not a copy")
    _card(near, "astronaut-small.jpg").locator("select").select_option("new")  # split off into its own group
    near = _group_of(page, "astronaut-bright.jpg")
    assert "split off from group" in near.inner_text()
    assert _card(near, "astronaut-small.jpg").locator(".dup-decision").inner_text().startswith("stays")

    with page.expect_download() as download:
        page.click("#plan-form button[value=json]")
    plan_file = tmp_path / "plan.json"
    download.value.save_as(plan_file)
    plan = json.loads(plan_file.read_text())
    assert plan["format"] == "kinscope-plan/1"
    assert snapshot(root) == before  # the page moved nothing

    runner, quarantine = CliRunner(), tmp_path / "quarantine"
    from index.cli import main

    out = runner.invoke(main, ["duplicates", "--db", str(db), "--plan", str(plan_file), "--move-to", str(quarantine),
                               "--apply", "-q", "--output", str(tmp_path / "moved.json")])
    assert out.exit_code == 0, out.output
    report = json.loads((tmp_path / "moved.json").read_text())["quarantine"]
    moved = {Path(f["original"]).name for f in report["files"] if f["status"] == "moved"}
    assert moved - {"coffee-copy.png", "coffee.png"} == {"astronaut-q60.jpg", "astronaut-bright.jpg"}
    assert len(moved) == 3  # and one of the two byte-identical coffee files
    assert (root / "scans" / "astronaut.png").exists() and (root / "exports" / "astronaut-border.jpg").exists()
    assert (root / "exports" / "astronaut-small.jpg").exists()
    back = runner.invoke(main, ["restore", report["manifest"], "--apply"])
    assert back.exit_code == 0, back.output
    assert snapshot(root) == before  # every file back, byte for byte
