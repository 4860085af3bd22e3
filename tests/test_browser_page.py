"""The search page in everyday use, in headless Chromium: keyboard focus after "Show more", a narrow window,
the archive picker's name filter and arrow keys, the date error beside the fields, sizes that read the same
on the card and the item page, names that wrap only at / _ -, the cautions folded for a session, and the
item page's image never enlarged. The archive and server are tests/test_browser.py's (about 35 demo files).
"""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from tests.test_browser import DEMO, QUERY, SHOTS, _open, _upload, browser, demo_subset, server  # noqa: F401

from index.api import size_text


@pytest.fixture
def page(browser, server):  # noqa: F811 (the fixtures above are pytest's, imported to be shared)
    """A fresh page of a given size; fails the test on any script error."""
    contexts, problems = [], []

    def make(width=1280, height=800):
        context = browser.new_context(viewport={"width": width, "height": height})
        contexts.append(context)
        pg = context.new_page()
        pg.on("pageerror", lambda exc: problems.append(f"script error: {exc}"))
        pg.base = server
        return pg

    yield make
    for context in contexts:
        context.close()
    assert not problems, problems


def _in_view(page, selector, wait_ms: int = 3000) -> bool:
    """Whether the element's top is inside the window, allowing the page up to wait_ms to get it there (a
    loaded machine renders the results and scrolls a little later than the results list appears)."""
    check = "s => { const e = document.querySelector(s); if (!e) return false; const r = e.getBoundingClientRect(); " \
            "return r.top >= 0 && r.top < window.innerHeight - 40; }"
    try:
        page.wait_for_function(check, arg=selector, timeout=wait_ms)
        return True
    except Exception:  # noqa: BLE001 - playwright's TimeoutError: not in view within the time
        return False


def test_show_more_by_keyboard_keeps_the_focus_on_the_first_new_result(page):
    pg = page(1280, 800)
    _open(pg)
    _upload(pg)
    assert pg.locator("#results li.result").count() == 24 and pg.locator("#more-button").is_visible()
    pg.focus("#more-button")
    with pg.expect_response(lambda r: "/api/search" in r.url and "offset=24" in r.url):
        pg.keyboard.press("Enter")
    pg.wait_for_function("() => document.querySelectorAll('#results li.result').length > 24")
    pg.wait_for_function("() => document.activeElement !== document.getElementById('more-button')")
    focused = pg.evaluate("""() => { const a = document.activeElement;
        return {tag: a.tagName, cls: a.className, rank: a.closest('li.result') && a.querySelector('.rank').textContent}; }""")
    assert focused == {"tag": "BUTTON", "cls": "result-main", "rank": "25"}, focused


def test_at_800_pixels_the_first_result_is_in_view_after_a_search(page):
    pg = page(800, 700)
    _open(pg)
    pg.evaluate("window.scrollTo(0, 400)")  # the user has scrolled down the query column
    _upload(pg)
    pg.wait_for_timeout(200)
    assert _in_view(pg, "#results li.result") and _in_view(pg, "#results-heading")
    image = pg.locator("#query-image").bounding_box()
    assert image["width"] < 0.5 * 800  # the query image no longer fills the window's width
    _shot(pg, "narrow-800.png")
    # Stacked columns (a phone-sized window): a search from the picker still brings the results into view.
    small = page(560, 800)
    _open(small)
    _upload(small)
    small.wait_for_timeout(200)
    assert _in_view(small, "#results li.result")
    assert small.locator("#query-image").bounding_box()["width"] <= 18 * 16 + 1  # 18rem at most


def test_picker_finds_an_item_by_part_of_its_name_and_moves_by_arrow_keys(page, demo_subset):  # noqa: F811
    _, key = demo_subset
    pg = page(1280, 800)
    _open(pg)
    pg.click("#browse-button")
    pg.wait_for_selector("#browser-grid li button")
    assert pg.evaluate("document.activeElement.id") == "browser-name"
    total = pg.locator("#browser-grid li").count()
    wanted = Path(key["rescans-2026/scan-0002.jpg"]["source"]).name  # e.g. 24S-010_floral_moss-honey_small.jpg
    part = wanted.split("_")[2].upper()  # a middle part of the name, in the wrong case
    with pg.expect_response(lambda r: "/api/items" in r.url and "name=" in r.url):
        pg.fill("#browser-name", part)
    pg.wait_for_function("n => document.querySelectorAll('#browser-grid li').length < n", arg=total)
    names = pg.locator("#browser-grid .browser-name").all_inner_texts()
    assert wanted in names and all(part.lower() in n.lower() for n in names), names
    assert f"holds “{part}”" in pg.inner_text("#browser-status")
    # A name with LIKE's wildcards is taken literally: "%" matches no demo file.
    pg.fill("#browser-name", "%")
    pg.wait_for_selector("#browser-status:has-text('No items')")
    # Arrow keys: down from the box to the first item, right to the next, Enter picks it.
    pg.fill("#browser-name", "")
    pg.wait_for_function("n => document.querySelectorAll('#browser-grid li').length === n", arg=total)
    pg.focus("#browser-name")
    pg.keyboard.press("ArrowDown")
    pg.keyboard.press("ArrowRight")
    second = pg.locator("#browser-grid li button").nth(1)
    assert second.evaluate("b => b === document.activeElement")
    columns = pg.evaluate("""() => { const b = [...document.querySelectorAll('#browser-grid button')];
        return b.filter(x => Math.abs(x.getBoundingClientRect().top - b[0].getBoundingClientRect().top) < 2).length; }""")
    pg.keyboard.press("ArrowDown")
    assert pg.locator("#browser-grid li button").nth(1 + columns).evaluate("b => b === document.activeElement")
    label = pg.evaluate("document.activeElement.getAttribute('aria-label')")
    pg.keyboard.press("Enter")
    pg.wait_for_selector("#results li.result")
    assert label.startswith(f"Search with {pg.inner_text('#query-label')} (")


def test_item_filter_of_the_api_escapes_wildcards_and_finds_ids(server):  # noqa: F811
    import json
    import urllib.request

    def names(**q):
        from urllib.parse import urlencode
        with urllib.request.urlopen(f"{server}/api/items?{urlencode({'limit': 500, **q})}") as r:
            return json.load(r)

    every = names()["items"]
    assert names(name="_")["total"] == sum("_" in i["name"] for i in every)  # "_" is not LIKE's any-character
    some = every[3]
    assert some["id"] in [i["id"] for i in names(name=str(some["id"]))["items"]]


def test_dates_in_the_wrong_order_are_said_beside_them_and_dim_the_results(page):
    pg = page(1280, 800)
    _open(pg)
    _upload(pg)
    pg.fill("#date-from", "2025-06-01")
    pg.wait_for_selector("#status:has-text('best first'), #status:has-text('No item')")
    pg.fill("#date-to", "2024-01-01")
    error = pg.locator("#date-error")
    error.wait_for(state="visible")
    assert "after" in error.inner_text() and pg.locator("#search-error").is_hidden()
    box, field = error.bounding_box(), pg.locator("#date-to").bounding_box()
    assert 0 <= box["y"] - (field["y"] + field["height"]) < 40  # right below the date fields
    assert pg.get_attribute("#results", "data-stale") == "true"
    assert pg.locator("#date-to").get_attribute("aria-invalid") is not None
    assert "earlier filters" in pg.inner_text("#status")
    pg.click("#filter-clear")
    pg.wait_for_selector("#status:has-text('best first')")
    assert error.is_hidden() and pg.get_attribute("#results", "data-stale") is None


def test_sizes_read_the_same_on_the_card_and_the_item_page(page):
    pg = page(1280, 800)
    _open(pg)
    _upload(pg)
    card = pg.locator("#results li.result").nth(1)
    size = card.locator(".result-size").inner_text()
    assert re.fullmatch(r"\d+\.\d (kB|MB)", size), size
    card.locator(".result-actions a").click()
    pg.wait_for_selector(".meta-table")
    row = pg.locator(".meta-table tr", has_text="File size").locator("td").inner_text()
    count = int(re.search(r"\(([\d,]+) bytes\)", row).group(1).replace(",", ""))
    assert row.startswith(size + " (") and size == size_text(count)
    # The page's own formatter and the engine's agree over sizes around every rounding edge.
    sizes = [0, 1, 999, 1000, 1049, 1050, 1250, 39_110, 999_949, 999_950, 2_449_999, 2_450_000, 10**9 - 50_001]
    assert pg.evaluate("async s => { const m = await import('/static/common.js'); return s.map(m.formatSize); }",
                       sizes) == [size_text(s) for s in sizes]


BREAKS = """e => { // [character before, its offset in the text] at each line break inside the element
    const out = []; let last = null, before = null, at = -1;
    const walk = document.createTreeWalker(e, NodeFilter.SHOW_TEXT);
    for (let n = walk.nextNode(); n; n = walk.nextNode()) {
        for (let i = 0; i < n.length; i++) {
            const r = document.createRange(); r.setStart(n, i); r.setEnd(n, i + 1);
            const rect = r.getClientRects()[0];
            if (!rect) continue;
            at += 1;
            if (last !== null && rect.top > last + 2) out.push(before);
            last = rect.top; before = [n.data[i], at];
        }
    }
    return out; }"""


def test_names_wrap_only_after_a_slash_underscore_or_hyphen(page):
    pg = page(1280, 800)
    _open(pg)
    _upload(pg)
    names = pg.locator("#results .result-name")
    wrapped = 0
    for i in range(names.count()):
        before = names.nth(i).evaluate(BREAKS)
        assert all(c in "/_-" for c, _ in before), (names.nth(i).inner_text(), before)
        wrapped += bool(before)
    assert wrapped > 0  # the demo's long swatch names do wrap, so the check above saw some breaks
    # The item page in a narrow window: path, folder and name cells wrap at the same places only.
    pg.set_viewport_size({"width": 700, "height": 800})
    pg.locator("#results li.result .result-actions a").nth(1).click()
    pg.wait_for_selector(".meta-table")
    cells = pg.locator(".meta-table td.path, .item-figure figcaption, .crumbs")
    seen = []
    for i in range(cells.count()):
        before = cells.nth(i).evaluate(BREAKS)
        assert all(c in "/_- " for c, _ in before), (cells.nth(i).inner_text(), before)
        seen += before
    assert seen  # the full paths are long enough to wrap at 700 px
    sha = pg.locator(".meta-table td.hash")
    breaks = sha.evaluate(BREAKS)
    assert len(sha.inner_text()) == 64 and breaks and all(at % 16 == 15 for _, at in breaks), breaks  # between groups


def test_cautions_fold_for_the_session_and_two_rows_of_results_show(page):
    pg = page(1280, 800)
    _open(pg)
    _upload(pg)
    rows = pg.evaluate("""() => [...new Set([...document.querySelectorAll('#results li.result')]
        .map(li => Math.round(li.getBoundingClientRect().top)))].filter(t => t < window.innerHeight - 100).length""")
    assert rows >= 2  # the second row shows at least 100 px above the fold
    facts = pg.locator(".archive-facts .model-name")
    assert facts.inner_text() == "image model: general-purpose photo recogniser"
    assert facts.get_attribute("title") == "Technical name: efficientnet_lite0"
    _shot(pg, "results-1280.png")
    pg.click("#cautions-toggle")
    assert pg.locator("#cautions-list").is_hidden() and pg.locator("#cautions-note").is_visible()
    pg.reload()
    pg.wait_for_selector("#app[data-ready=true]")
    assert pg.locator("#cautions-list").is_hidden()  # folded for the rest of the session
    text = pg.inner_text("body")
    assert "not a verdict" in text and "never deletes, moves or changes a file" in text and "consent" in text
    pg.click("#cautions-toggle")
    assert pg.locator("#cautions-list").is_visible()


def test_the_item_page_never_enlarges_the_image(page):
    pg = page(1280, 800)
    _open(pg)
    _upload(pg)
    pg.locator("#results li.result .result-actions a").first.click()
    img = pg.locator(".item-figure img")
    img.evaluate("i => i.complete || new Promise(r => i.onload = r)")
    natural, shown = img.evaluate("i => [i.naturalWidth, i.clientWidth]")  # clientWidth: without the border
    assert 0 < shown <= natural + 0.5, (shown, natural)


def _shot(pg, name):
    SHOTS.mkdir(parents=True, exist_ok=True)
    pg.screenshot(path=str(SHOTS / name))
