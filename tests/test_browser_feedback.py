"""Like / unlike marks on the search page in Chromium (Playwright): mark, the search runs again with the marks,
undo, export. Fixtures (the demo subset archive, `kinscope serve` on loopback, the browser) from test_browser."""
from __future__ import annotations

import json

from tests.test_browser import DEMO, _open, _shot, _upload, browser, demo_subset, page, server  # noqa: F401


def card_words(page, item):
    return page.locator(f'#results li.result[data-id="{item}"] .mark-row button').all_inner_texts()


def _ids(page):
    return [int(i) for i in page.locator("#results li.result").evaluate_all("els => els.map(e => e.dataset.id)")]


def test_mark_research_undo_and_export(page, tmp_path):
    _open(page)
    _upload(page)
    assert page.locator("#marks-panel").is_hidden()
    before = _ids(page)
    liked, unliked = before[1], before[0]
    # "More like this" on the second result: the search runs again with like_item.
    with page.expect_response(lambda r: "/api/search" in r.url and f"like_item={liked}" in r.url) as resp:
        page.locator(f'#results li.result[data-id="{liked}"] .mark-like').click()
    assert resp.value.json()["query"]["like"][0]["id"] == liked
    page.wait_for_selector(f'#results li.result[data-id="{liked}"].is-liked')
    # "Not like this" on the first: it sinks (an unlike mark pushes the item itself away).
    with page.expect_response(lambda r: "/api/search" in r.url and f"unlike_item={unliked}" in r.url) as resp:
        page.locator(f'#results li.result[data-id="{unliked}"] .mark-unlike').click()
    ranked = [r["id"] for r in resp.value.json()["results"]]
    assert unliked not in ranked[:1]
    page.wait_for_selector("#marks-panel .marks-item[data-mark=unlike]")
    assert page.locator("#marks-panel .marks-item").count() == 2
    assert "1 marked more like this, 1 marked not like this" in page.inner_text("#marks-panel")
    assert card_words(page, liked) == ["Toward", "Away"]  # the buttons' own words (their titles say more)
    card = page.locator(f'#results li.result[data-id="{liked}"]')
    assert card.locator(".mark-like").get_attribute("aria-pressed") == "true"
    assert "Marked: more like this" in card.inner_text()
    _shot(page, "marks.png")
    # Export: the marked paths, as JSON and as CSV.
    with page.expect_download() as dl:
        page.click("#marks-json")
    doc = json.loads(open(dl.value.path()).read())
    assert {(m["mark"], m["id"]) for m in doc["marks"]} == {("like", liked), ("unlike", unliked)}
    assert all(m["path"].startswith("/") for m in doc["marks"])
    with page.expect_download() as dl:
        page.click("#marks-csv")
    lines = open(dl.value.path()).read().splitlines()
    assert lines[0] == "mark,id,path" and len(lines) == 3
    # Undo: the unlike mark goes, the search runs again without it, the like stays.
    with page.expect_response(lambda r: "/api/search" in r.url and "unlike_item" not in r.url) as resp:
        page.click("#marks-undo")
    assert resp.value.json()["query"]["unlike"] == [] and page.locator("#marks-panel .marks-item").count() == 1
    page.wait_for_selector(f'#results li.result[data-id="{unliked}"]:not(.is-unliked)')
    # Undo again: no marks left, the plain search and its order are back.
    with page.expect_response(lambda r: "/api/search" in r.url and "like_item" not in r.url):
        page.click("#marks-undo")
    page.wait_for_function(f"() => document.querySelectorAll('#results li.result.is-liked').length === 0")
    assert _ids(page) == before


def test_combined_choice_searches_with_its_weights(page):
    _open(page)
    _upload(page)
    with page.expect_response(lambda r: "/api/search" in r.url and "layer=combined" in r.url) as resp:
        page.check('input[name="layer"][value="combined"]')
    assert resp.value.json()["weights"] == {"parts": 0.5, "objects": 0.5}
    page.wait_for_selector('#results[data-layer="combined"]', state="attached")


def test_another_example_image_joins_the_query_and_can_be_removed(page):
    _open(page)
    _upload(page)
    with page.expect_response(lambda r: "/api/search" in r.url and "upload=" in r.url and "%2C" in r.url) as resp:
        page.set_input_files("#extra-input", str(DEMO / "rescans-2026/scan-0002.jpg"))
    doc = resp.value.json()
    assert len(doc["query"]["examples"]) == 2 and doc["query"]["rule"]["name"] == "rocchio"
    assert page.locator("#extra-list li").count() == 1
    with page.expect_response(lambda r: "/api/search" in r.url and "%2C" not in r.url) as resp:
        page.click("#extra-list button")
    assert "examples" not in resp.value.json()["query"] and page.locator("#extra-list li").count() == 0


def test_a_match_of_several_examples_is_explained_against_each_of_them(page):
    """With an added example, the explanation offers a choice of example: the first explains the match
    against the query image, the second against the added one (its own upload token and image)."""
    _open(page)
    _upload(page)
    with page.expect_response(lambda r: "/api/search" in r.url and "%2C" in r.url):
        page.set_input_files("#extra-input", str(DEMO / "rescans-2026/scan-0002.jpg"))
    page.wait_for_selector("#extra-list li")
    extra_token = page.locator("#extra-list li").get_attribute("data-upload")
    with page.expect_response(lambda r: "/api/explain" in r.url) as first:
        page.locator("#results li.result .result-main").first.click()
    assert extra_token not in first.value.url  # the query image itself
    chooser = page.locator("#explain-example")
    chooser.wait_for()
    assert chooser.locator("option").count() == 2 and "scan-0002.jpg" in chooser.inner_text()
    with page.expect_response(lambda r: "/api/explain" in r.url) as second:
        chooser.select_option("1")
    assert f"upload={extra_token}" in second.value.url and second.value.ok
    page.wait_for_selector("#channel-list li.channel")
    assert page.locator("#explain-example").input_value() == "1"
    assert "scan-0002.jpg" in page.inner_text("#explain-body")
