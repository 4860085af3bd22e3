"""The search page in a real browser: headless Chromium (the Debian package) driven by Playwright.

A small archive is copied from demo_archive/ (originals of a few re-scans, a few re-scans, other
swatches), indexed, and served by `kinscope serve` on a free loopback port. The tests use the page as a
person would: upload, read results, open an explanation, draw a region, change the layer, pick an
archive item, and hit a bad upload. Screenshots go to test-output/screenshots/ (gitignored).
"""
from __future__ import annotations

import csv
import json
import os
import shutil
import urllib.request
from pathlib import Path

import pytest

from tests.serving import serving

CHROMIUM = Path("/usr/bin/chromium")
if not CHROMIUM.exists():
    pytest.skip("the browser tests need Debian's chromium at /usr/bin/chromium (apt-get install chromium)",
                allow_module_level=True)
sync_api = pytest.importorskip("playwright.sync_api", reason="the browser tests need Playwright for Python")

REPO = Path(__file__).resolve().parents[1]
DEMO = REPO / "demo_archive"
SHOTS = REPO / "test-output" / "screenshots"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]
QUERY = "rescans-2026/scan-0001.jpg"  # kept out of the test archive: it is the file a person brings along
INDEXED_RESCANS = ("rescans-2026/scan-0002.jpg", "rescans-2026/scan-0003.jpg", "rescans-2026/scan-0004.jpg")
OTHERS_PER_SEASON = 6


def _key() -> dict[str, dict]:
    with open(DEMO / "key.csv", newline="") as f:
        return {row["path"]: row for row in csv.DictReader(f)}


@pytest.fixture(scope="session")
def demo_subset(tmp_path_factory):
    """About 35 demo files: the originals of scan-0001..0006, three of those re-scans, and other swatches."""
    key = _key()
    wanted = {key[f"rescans-2026/scan-000{i}.jpg"]["source"] for i in range(1, 7)}
    wanted |= set(INDEXED_RESCANS)
    for season in ("2024-spring", "2024-autumn", "2025-spring", "2025-autumn"):
        names = sorted(p for p, row in key.items() if p.startswith(season + "/") and row["kind"] == "original")
        wanted |= set(names[:OTHERS_PER_SEASON])
    root = tmp_path_factory.mktemp("browser") / "swatches"
    for rel in sorted(wanted):
        target = root / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(DEMO / rel, target)
    return root, key


@pytest.fixture(scope="session")
def server(demo_subset, tmp_path_factory):
    """`kinscope serve` on a free 127.0.0.1 port over a freshly indexed archive; stopped at the end."""
    from index.api import Archive

    root, _ = demo_subset
    db = tmp_path_factory.mktemp("browser-db") / "db"
    with Archive.open(db, create=True) as archive:
        archive.add([root], progress=False)
    with serving(db, db / "serve.log") as base:
        yield base


@pytest.fixture(scope="module")
def browser():
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), args=ARGS)
        yield b
        b.close()


@pytest.fixture
def page(browser, server):
    """A fresh page; fails the test on any script error or any request that leaves the page's own server."""
    context = browser.new_context(viewport={"width": 1400, "height": 1000})
    pg = context.new_page()
    problems: list[str] = []
    pg.on("pageerror", lambda exc: problems.append(f"script error: {exc}"))
    pg.on("request", lambda r: r.url.startswith((server + "/", "data:", "blob:")) or problems.append(f"request off the server: {r.url}"))
    pg.on("console", lambda m: m.type == "error" and "status of 4" not in m.text and problems.append(f"console: {m.text}"))
    pg.base = server
    yield pg
    context.close()
    assert not problems, problems


def _open(page):
    page.goto(page.base + "/")
    page.wait_for_selector("#app[data-ready=true]")


def _upload(page, rel=QUERY):
    page.set_input_files("#file-input", str(DEMO / rel))
    page.wait_for_selector("#results li.result")


def _shot(page, name, locator=None):
    SHOTS.mkdir(parents=True, exist_ok=True)
    (locator or page).screenshot(path=str(SHOTS / name))
    assert (SHOTS / name).stat().st_size > 5000


def test_page_shows_the_cautions_and_labels_every_control(page):
    _open(page)
    text = page.inner_text("body")
    assert "not a verdict" in text
    assert "never deletes, moves or changes a file" in text
    assert "separate, undoable command-line step" in text  # moving duplicates is the CLI's, not the page's
    assert "consent" in text and "data-protection law" in text
    assert "loopback" in text and "unencrypted" not in text  # this test server listens on 127.0.0.1
    unlabelled = page.evaluate("""() => Array.from(document.querySelectorAll('input, select, button'))
        .filter(e => !(e.labels && e.labels.length) && !e.getAttribute('aria-label') && !e.textContent.trim())
        .map(e => e.id || e.name || e.outerHTML)""")
    assert unlabelled == []
    # The layer chooser offers every layer with its plain-language hint.
    hints = page.locator(".layer-option").all_inner_texts()
    assert len(hints) == 5 and any("colour" in h.lower() for h in hints) and any("objects" in h.lower() for h in hints)
    assert page.locator('input[name="layer"]:checked').get_attribute("value") == "parts"
    assert "0.5 × parts + 0.5 × objects" in hints[-1]  # the combined choice states its weights


def test_upload_shows_results_with_the_original_first(page, demo_subset):
    _, key = demo_subset
    _open(page)
    _upload(page)
    expected = Path(key[QUERY]["source"]).name
    first = page.locator("#results li.result").first
    assert first.locator(".result-name").inner_text() == expected
    assert float(first.locator(".score").inner_text()) > 0.9
    assert "2024-spring" in first.inner_text()  # the folder, relative to the archive's root
    assert first.locator("img").get_attribute("loading") == "lazy"
    assert first.locator("img").get_attribute("alt") == f"Thumbnail of {expected}"
    assert "best first" in page.inner_text("#status")
    assert page.locator("#query-image").get_attribute("src").startswith("/media/uploads/")
    _shot(page, "results.png")


def test_explanation_opens_with_heat_maps_pairs_and_channels(page):
    _open(page)
    _upload(page)
    card = page.locator("#results li.result .result-main").first
    card.focus()
    page.keyboard.press("Enter")  # keyboard: Enter on a result opens its explanation
    page.wait_for_selector("#channel-list li.channel")
    dialog = page.locator("#explain-dialog")
    assert dialog.evaluate("d => d.open")
    assert "not a verdict" in dialog.inner_text()
    # Two scores, each with its sentence: the search score, and the similarity beyond the archive's average.
    score = float(dialog.locator(".big-score").inner_text())
    assert score == pytest.approx(float(page.locator("#results li.result .score").first.inner_text()), abs=2e-3)
    centred = float(dialog.locator(".big-score-centred").inner_text())
    assert -1 <= centred < score
    summary = dialog.locator(".explain-summary").inner_text()
    assert "the results are ranked by" in summary and "beyond the archive's average" in summary.lower()
    for who in ("query", "match"):
        canvas = dialog.locator(f"canvas.heat-{who}")
        assert "add up to the similarity beyond the archive's average" in canvas.get_attribute("aria-label")
        # The canvas has been drawn on: some pixel is not transparent.
        drawn = canvas.evaluate("c => c.width > 0 && c.getContext('2d').getImageData(0, 0, c.width, c.height).data.some((v, i) => i % 4 === 3 && v > 0)")
        assert drawn, f"nothing drawn over the {who}"
    pairs = dialog.locator("#pair-list li")
    assert pairs.count() >= 3 and "alike" in pairs.first.inner_text()
    assert "texture layer" in dialog.locator("#pairs-heading + p").inner_text()  # where the pairs come from
    # Stepping through the pairs: the buttons, then the arrow keys on the list.
    page.click("#pair-next")
    assert page.inner_text("#pair-position").startswith(f"Pair 1 of {pairs.count()}")
    page.keyboard.press("ArrowDown")
    assert page.inner_text("#pair-position").startswith("Pair 2 of")
    assert page.evaluate("document.activeElement.dataset.n") == "2"
    assert dialog.locator("#pair-list li.is-active").get_attribute("data-n") == "2"
    page.keyboard.press("ArrowUp")
    page.keyboard.press("ArrowUp")  # wraps round to the last pair
    assert page.inner_text("#pair-position").startswith(f"Pair {pairs.count()} of")
    page.click("#pair-all")
    assert page.inner_text("#pair-position").startswith("All")
    # The stepper above the images steps without scrolling them away (focus stays on its button).
    dialog.locator(".explain-controls").scroll_into_view_if_needed()
    page.click("#pair-next-top")
    page.click("#pair-next-top")
    assert page.inner_text("#pair-quick-position") == f"2 of {pairs.count()}"
    assert page.inner_text("#pair-position").startswith("Pair 2 of")
    assert page.evaluate("document.activeElement.id") == "pair-next-top"
    top = dialog.locator("canvas.heat-match").evaluate("c => c.getBoundingClientRect().top")
    assert 0 <= top < page.viewport_size["height"] / 2, top
    page.click("#pair-all")
    channels = dialog.locator("#channel-list li.channel")
    assert channels.count() >= 3 and "Detector" in channels.first.inner_text()
    patch = channels.first.locator(".exemplars img").first
    patch.scroll_into_view_if_needed()
    assert patch.evaluate("img => img.complete ? img.naturalWidth : new Promise(r => img.onload = () => r(img.naturalWidth))") > 0
    dialog.locator(".explain-summary").scroll_into_view_if_needed()
    _shot(page, "explanation.png", dialog)
    page.set_viewport_size({"width": 1400, "height": 2000})  # the whole view at once (docs/explain.md)
    page.click("#pair-next")
    _shot(page, "explanation-full.png", dialog)
    page.click("#pair-all")
    page.set_viewport_size({"width": 1400, "height": 1000})
    # The raw score's split is one choice away, and says so.
    with page.expect_response(lambda r: "/api/explain" in r.url and "mode=cosine" in r.url):
        page.click("label[for=explain-mode-cosine]")
    page.wait_for_selector("#explain-mode-cosine:checked")
    assert "add up to the score" in dialog.locator("canvas.heat-query").get_attribute("aria-label")
    assert float(dialog.locator(".big-score").inner_text()) == pytest.approx(score, abs=1e-3)
    page.click("label[for=explain-mode-centred]")  # back, from what the page kept
    page.wait_for_selector("#explain-mode-centred:checked")
    # The heat maps can be switched off, and the legend goes with them.
    page.click("label[for=toggle-heat]")
    assert page.locator("#heat-legend").is_hidden()
    page.keyboard.press("Escape")
    assert not dialog.evaluate("d => d.open")
    assert page.evaluate("document.activeElement.classList.contains('result-main')")  # focus goes back


def test_drawing_a_region_reruns_the_search_with_that_box(page):
    _open(page)
    _upload(page)
    canvas = page.locator("#region-canvas")
    box = canvas.bounding_box()
    with page.expect_response(lambda r: "/api/search" in r.url and "box=" in r.url) as response:
        page.mouse.move(box["x"] + 0.1 * box["width"], box["y"] + 0.15 * box["height"])
        page.mouse.down()
        page.mouse.move(box["x"] + 0.55 * box["width"], box["y"] + 0.6 * box["height"], steps=6)
        page.mouse.up()
    assert response.value.status == 200
    page.wait_for_selector('#results:not([data-box=""])', state="attached")
    x0, y0, x1, y1 = map(float, page.get_attribute("#results", "data-box").split(","))
    assert x0 == pytest.approx(0.1, abs=0.02) and y1 == pytest.approx(0.6, abs=0.02)
    assert "marked region" in page.inner_text("#region-state")
    assert page.locator("#results li.result").count() > 0
    _shot(page, "region.png")
    # The explanation of a region search marks the region on the query.
    page.locator("#results li.result .result-main").first.click()
    page.wait_for_selector("#channel-list li.channel")
    assert "marked region" in page.inner_text("#explain-dialog .explain-summary")
    page.keyboard.press("Escape")
    # And the region can be removed again.
    with page.expect_response(lambda r: "/api/search" in r.url and "box=" not in r.url):
        page.click("#region-clear")
    page.wait_for_selector('#results[data-box=""]', state="attached")
    assert "whole image" in page.inner_text("#region-state")


def test_region_typed_with_the_keyboard_and_kept_in_the_address(page):
    _open(page)
    page.click("#browse-button")
    page.locator("#browser-grid li button").first.click()
    page.wait_for_selector("#results li.result")
    page.click(".region-numbers summary")
    # A box with left >= right is refused in words, and no search is sent.
    page.fill('#region-form input[name="x0"]', "60")
    page.fill('#region-form input[name="x1"]', "40")
    page.click('#region-form button[type="submit"]')
    assert "left < right" in page.inner_text("#query-error")
    assert page.get_attribute("#region-canvas", "data-box") == ""
    with page.expect_response(lambda r: "/api/search" in r.url and "box=" in r.url):
        page.fill('#region-form input[name="x0"]', "20")
        page.fill('#region-form input[name="y0"]', "10")
        page.fill('#region-form input[name="x1"]', "70")
        page.fill('#region-form input[name="y1"]', "90")
        page.click('#region-form button[type="submit"]')
    page.wait_for_selector('#results:not([data-box=""])', state="attached")
    assert page.get_attribute("#region-canvas", "data-box") == "0.200,0.100,0.700,0.900"
    assert "50% × 80%" in page.inner_text("#region-state")
    assert "box=0.2" in page.url
    # The address brings the same region back in a new page.
    address = page.url
    page.goto(page.base + "/")
    page.goto(address)
    page.wait_for_selector("#app[data-ready=true]")
    page.wait_for_selector('#results:not([data-box=""])', state="attached")
    assert page.get_attribute("#region-canvas", "data-box") == "0.200,0.100,0.700,0.900"
    assert page.input_value('#region-form input[name="x1"]') == "70"


def test_layer_chooser_reruns_without_reloading(page):
    _open(page)
    _upload(page)
    page.evaluate("window.__marker = 'same page'")
    with page.expect_response(lambda r: "/api/search" in r.url and "layer=texture" in r.url):
        page.check('input[name="layer"][value="texture"]')
    page.wait_for_selector('#results[data-layer="texture"]', state="attached")
    assert "Texture" in page.inner_text("#status")
    assert page.evaluate("window.__marker") == "same page"  # no page reload


def test_a_non_image_upload_shows_a_plain_message(page):
    _open(page)
    page.set_input_files("#file-input", files=[{"name": "notes.jpg", "mimeType": "image/jpeg",
                                                "buffer": b"these are meeting notes, not a picture"}])
    error = page.locator("#query-error")
    error.wait_for(state="visible")
    assert "cannot be used as a query" in error.inner_text()
    assert "Traceback" not in page.content()
    assert page.locator("#results li").count() == 0


def test_archive_item_as_query_and_the_item_page(page, demo_subset):
    _, key = demo_subset
    _open(page)
    page.click("#browse-button")
    page.wait_for_selector("#browser-grid li button")
    assert "of 3" in page.inner_text("#browser-status")  # "Showing N of 3x items"
    original = Path(key["rescans-2026/scan-0002.jpg"]["source"]).name
    page.click(f'#browser-grid button[aria-label^="Search with {original}"]')
    page.wait_for_selector("#results li.result")
    assert "item=" in page.url
    names = page.locator("#results .result-name").all_inner_texts()
    assert names[0] == "scan-0002.jpg"  # its re-scan comes first
    # The item page: full image, path, metadata, its own neighbours.
    page.locator("#results li.result .result-actions a").first.click()
    page.wait_for_selector("#results li.result")
    assert page.locator(".item-figure img").evaluate("img => img.complete && img.naturalWidth > 0")
    table = page.inner_text(".meta-table")
    assert "scan-0002.jpg" in table and "SHA-256" in table and "rescans-2026" in table
    assert page.locator("#results .result-name").first.inner_text() == original
    _shot(page, "item.png")
    # "Why it matched" on the item page opens the search page with that explanation.
    page.locator("#results li.result .result-main").first.click()
    page.wait_for_selector("#channel-list li.channel")
    assert page.inner_text("#explain-title") == f"Why {original} matched"
    assert page.inner_text("#query-label") == "scan-0002.jpg"


def test_folder_and_date_filters(page):
    _open(page)
    _upload(page)
    option = page.locator("#folder-filter option", has_text="2024-autumn")
    with page.expect_response(lambda r: "/api/search" in r.url and "folder=" in r.url):
        page.select_option("#folder-filter", option.get_attribute("value"))
    page.wait_for_selector("#status:has-text('in 2024-autumn')")
    folders = set(page.locator("#results .result-folder").all_inner_texts())
    assert folders == {"2024-autumn"}
    with page.expect_response(lambda r: "/api/search" in r.url and "date_from=2090-01-01" in r.url):
        page.fill("#date-from", "2090-01-01")
    page.wait_for_selector("#status:has-text('No item passes these filters')")
    assert page.locator("#results li").count() == 0
    page.click("#filter-clear")
    page.wait_for_selector("#status:has-text('best first')")
    assert len(set(page.locator("#results .result-folder").all_inner_texts())) > 1


@pytest.mark.parametrize("how", ["paste", "drop"])
def test_paste_and_drop_give_a_query(page, demo_subset, how):
    _, key = demo_subset
    _open(page)
    data = list((DEMO / QUERY).read_bytes())
    page.evaluate("""([how, bytes]) => {
        const file = new File([new Uint8Array(bytes)], 'scan.jpg', {type: 'image/jpeg'});
        const dt = new DataTransfer();
        dt.items.add(file);
        if (how === 'paste') {
            document.dispatchEvent(new ClipboardEvent('paste', {clipboardData: dt, bubbles: true}));
        } else {
            const target = document.getElementById('dropzone');
            for (const type of ['dragenter', 'dragover', 'drop']) {
                target.dispatchEvent(new DragEvent(type, {dataTransfer: dt, bubbles: true, cancelable: true}));
            }
        }
    }""", [how, data])
    page.wait_for_selector("#results li.result")
    assert page.locator("#results .result-name").first.inner_text() == Path(key[QUERY]["source"]).name
    assert page.inner_text("#query-label") == ("Pasted image" if how == "paste" else "scan.jpg")
    assert page.locator("#drop-overlay").is_hidden()


ATTACK = """async ([target, item, jpeg]) => {
    const out = {};
    const form = new FormData();
    form.append('file', new Blob([new Uint8Array(jpeg)], {type: 'image/jpeg'}), 'q.jpg');
    try { out.upload = (await fetch(target + '/api/queries', {method: 'POST', body: form, mode: 'no-cors'})).type; }
    catch (e) { out.upload = 'failed'; }
    try { out.items = await (await fetch(target + '/api/items?limit=5')).text(); } catch (e) { out.items = 'failed'; }
    out.img = await new Promise(done => {
        const img = new Image();
        img.onload = () => done(img.naturalWidth);
        img.onerror = () => done(0);
        img.src = target + '/media/items/' + item + '/image';
    });
    return out;
}"""



@pytest.fixture
def other_site():
    """A page of another site on this machine: http://localhost:PORT (the server is http://127.0.0.1:...)."""
    import http.server
    import threading

    class Page(http.server.BaseHTTPRequestHandler):
        def do_GET(self):
            body = b"<!doctype html><title>another site</title><p>an ordinary page</p>"
            self.send_response(200)
            self.send_header("Content-Type", "text/html")
            self.send_header("Content-Length", str(len(body)))
            self.end_headers()
            self.wfile.write(body)

        def log_message(self, *args):
            pass

    httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Page)
    thread = threading.Thread(target=httpd.serve_forever, daemon=True)
    thread.start()
    yield f"http://localhost:{httpd.server_address[1]}/"
    httpd.shutdown()
    httpd.server_close()


def test_other_sites_in_the_same_browser_get_nothing(browser, server, other_site):
    """The attacks of a web page the user happens to visit, made by Chromium itself. A page of another
    site uploads, fetches and embeds an image; the statuses the server answered are read through the
    DevTools protocol (the browser hides them from the page). Then a name re-pointed at 127.0.0.1
    (--host-resolver-rules stands in for DNS rebinding) opens the server as its own origin."""
    port = int(server.rsplit(":", 1)[1])
    with urllib.request.urlopen(server + "/api/items?limit=1") as r:
        item = json.load(r)["items"][0]
    rebinding = browser.browser_type.launch(executable_path=str(CHROMIUM),
                                            args=ARGS + ["--host-resolver-rules=MAP rebound.example 127.0.0.1"])
    try:
        context = rebinding.new_context()
        page = context.new_page()
        cdp = context.new_cdp_session(page)
        cdp.send("Network.enable")
        urls, statuses = {}, {}
        cdp.on("Network.requestWillBeSent", lambda e: urls.__setitem__(e["requestId"], e["request"]["url"]))
        cdp.on("Network.responseReceivedExtraInfo", lambda e: statuses.__setitem__(e["requestId"], e["statusCode"]))
        page.goto(other_site)
        out = page.evaluate(ATTACK, [server, item["id"], list((DEMO / QUERY).read_bytes())])
        page.wait_for_timeout(500)
        answered = {urls[k].removeprefix(server): v for k, v in statuses.items() if urls.get(k, "").startswith(server)}
        assert answered == {"/api/queries": 403, "/api/items?limit=5": 403, f"/media/items/{item['id']}/image": 403}
        assert out["items"] == "failed" and out["img"] == 0, out
        # DNS rebinding: to the browser, http://rebound.example:PORT is the attacker's own origin.
        for path in ("/", "/api/items?limit=5", f"/media/items/{item['id']}/image"):
            response = page.goto(f"http://rebound.example:{port}{path}")
            assert response.status == 421, (path, response.status)
            assert item["path"] not in page.content()
        context.close()
    finally:
        rebinding.close()
