"""The map page in a real browser: headless Chromium (the Debian package) driven by Playwright.

An archive of scikit-image's photographs and transformed copies of each (tests/map_families.py) is
indexed, mapped with `kinscope map`, and served by `kinscope serve` on a free loopback port. The tests
check that the map draws, that zooming in switches from points to thumbnails (the page's data-level and
data-thumbs attributes say what the last frame drew), hover and click on an item, and that a box
drawn with the mouse selects exactly the items whose positions lie inside it, with their paths in the
JSON download.
"""
from __future__ import annotations

import json
import urllib.request
from pathlib import Path

import pytest

from tests.map_families import write_families
from tests.serving import serving

CHROMIUM = Path("/usr/bin/chromium")
if not CHROMIUM.exists():
    pytest.skip("the browser tests need Debian's chromium at /usr/bin/chromium (apt-get install chromium)",
                allow_module_level=True)
sync_api = pytest.importorskip("playwright.sync_api", reason="the browser tests need Playwright for Python")

REPO = Path(__file__).resolve().parents[1]
SHOTS = REPO / "test-output" / "screenshots"
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]


@pytest.fixture(scope="module")
def server(tmp_path_factory, sample_images):
    from index.api import Archive

    root = tmp_path_factory.mktemp("browser-map")
    write_families(root / "photos", sample_images)
    db = root / "db"
    with Archive.open(db, create=True, layers=["parts"]) as archive:
        archive.add([root / "photos"], progress=False)
        archive.map()
    with serving(db, root / "serve.log") as base:
        yield base


@pytest.fixture(scope="module")
def browser():
    with sync_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), args=ARGS)
        yield b
        b.close()


@pytest.fixture
def page(browser, server):
    """A fresh map page; fails the test on any script error or request that leaves the page's own server."""
    context = browser.new_context(viewport={"width": 1400, "height": 1000}, accept_downloads=True)
    pg = context.new_page()
    problems: list[str] = []
    pg.on("pageerror", lambda exc: problems.append(f"script error: {exc}"))
    pg.on("request", lambda r: r.url.startswith((server + "/", "data:", "blob:")) or problems.append(f"request off the server: {r.url}"))
    pg.base = server
    pg.goto(server + "/map")
    pg.wait_for_selector("#map-app:not([data-level=loading])")
    yield pg
    context.close()
    assert not problems, problems


def _map(server) -> dict:
    with urllib.request.urlopen(server + "/api/map") as r:
        return json.load(r)


def _state(page) -> dict:
    return page.evaluate("() => ({...window.kinscopeMap.view(), ...document.getElementById('map-app').dataset})")


def _shot(page, name):
    SHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SHOTS / name))


def test_the_map_draws_every_item(page, server):
    data = _map(server)
    state = _state(page)
    assert state["level"] == "points" and int(state["visible"]) == data["total"]
    # The canvas holds dots in the accent colour (--accent #285e54 in style.css).
    accent = page.evaluate("""() => { const c = document.getElementById('map-canvas');
        const d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data; let n = 0;
        for (let i = 0; i < d.length; i += 4) if (d[i] === 0x28 && d[i + 1] === 0x5e && d[i + 2] === 0x54) n++;
        return n; }""")
    assert accent >= data["total"]
    assert "items on the map" in page.inner_text("#map-status")
    _shot(page, "map-points.png")


def test_zooming_in_switches_from_points_to_thumbnails(page):
    page.focus("#map-canvas")
    for _ in range(12):
        if _state(page)["level"] == "thumbnails":
            break
        page.keyboard.press("+")
        page.wait_for_timeout(100)
    state = _state(page)
    assert state["level"] == "thumbnails", state
    page.wait_for_function("() => Number(document.getElementById('map-app').dataset.thumbs) > 0")
    assert 0 < int(_state(page)["thumbs"]) <= int(_state(page)["visible"])
    _shot(page, "map-thumbnails.png")
    page.keyboard.press("0")  # the whole map again
    page.wait_for_function("() => document.getElementById('map-app').dataset.level === 'points'")
    assert int(_state(page)["thumbs"]) == 0


def test_hover_shows_the_item_and_a_click_offers_search_by_it(page, server):
    data = _map(server)
    view = _state(page)
    box = page.locator("#map-canvas").bounding_box()
    i = 0
    x = box["x"] + data["items"]["x"][i] / data["grid"] * view["scale"] + view["tx"]
    y = box["y"] + data["items"]["y"][i] / data["grid"] * view["scale"] + view["ty"]
    page.mouse.move(x, y)
    page.wait_for_selector("#map-tip:not([hidden])")
    page.mouse.click(x, y)
    page.wait_for_selector("#map-item:not([hidden])")
    item_id = int(page.get_attribute("#map-item-search", "href").split("item=")[1].split("&")[0])
    assert page.get_attribute("#map-item-open", "href") == f"/items/{item_id}"
    # The item chosen is the one under the pointer (or one within the 8 pixels the page looks in).
    k = data["items"]["id"].index(item_id)
    sx = box["x"] + data["items"]["x"][k] / data["grid"] * view["scale"] + view["tx"]
    sy = box["y"] + data["items"]["y"][k] / data["grid"] * view["scale"] + view["ty"]
    assert abs(sx - x) <= 8 and abs(sy - y) <= 8
    page.click("#map-item-search")
    page.wait_for_selector("#results li.result")
    assert f"item={item_id}" in page.url


def test_keyboard_zoom_keeps_the_chosen_image_in_place(page, server):
    data = _map(server)
    view = _state(page)
    box = page.locator("#map-canvas").bounding_box()
    g = data["grid"]

    def screen(k, v):
        return data["items"]["x"][k] / g * v["scale"] + v["tx"], data["items"]["y"][k] / g * v["scale"] + v["ty"]

    # The item furthest from the middle of the canvas: zooming at the middle would push it out of view.
    mid = (box["width"] / 2, box["height"] / 2)
    k = max(range(data["total"]), key=lambda i: sum((a - b) ** 2 for a, b in zip(screen(i, view), mid)))
    x, y = screen(k, view)
    page.mouse.click(box["x"] + x, box["y"] + y)
    page.wait_for_selector("#map-item:not([hidden])")
    chosen = int(page.get_attribute("#map-item-open", "href").rsplit("/", 1)[1])
    k = data["items"]["id"].index(chosen)
    before = screen(k, _state(page))
    page.mouse.move(box["x"] + box["width"] + 40, box["y"] + 10)  # off the canvas: no pointer to zoom at
    page.focus("#map-canvas")
    for _ in range(4):
        page.keyboard.press("+")
    page.wait_for_timeout(100)
    after_view = _state(page)
    assert after_view["scale"] > 2 * view["scale"]
    after = screen(k, after_view)
    assert abs(after[0] - before[0]) < 1 and abs(after[1] - before[1]) < 1, (before, after)


def test_on_a_narrow_window_the_map_comes_first(page, server):
    page.set_viewport_size({"width": 800, "height": 800})
    page.goto(server + "/map")
    page.wait_for_selector("#map-app:not([data-level=loading])")
    canvas = page.locator("#map-canvas").bounding_box()
    heading = page.locator("#map-heading").bounding_box()
    assert canvas["y"] < 200 and canvas["y"] + canvas["height"] < 800, canvas
    assert heading["y"] > canvas["y"] + canvas["height"]  # the settings follow the map
    view = _state(page)
    data = _map(server)
    k = 0
    x = canvas["x"] + data["items"]["x"][k] / data["grid"] * view["scale"] + view["tx"]
    y = canvas["y"] + data["items"]["y"][k] / data["grid"] * view["scale"] + view["ty"]
    page.mouse.click(x, y)
    page.wait_for_selector("#map-item:not([hidden])", state="attached")
    panel = page.locator("#map-item").bounding_box()
    assert panel["y"] < 800 - 100  # the chosen item's panel starts in the window, under the map


def test_a_box_selection_returns_the_items_inside_it(page, server):
    data = _map(server)
    page.check('input[name="map-mode"][value="box"]')
    view = _state(page)
    box = page.locator("#map-canvas").bounding_box()
    # A box over the left half of the map, from the top to 60% of its height.
    x0, y0 = view["tx"] + 0.0 * view["scale"], view["ty"] + 0.0 * view["scale"]
    x1, y1 = view["tx"] + 0.5 * view["scale"], view["ty"] + 0.6 * view["scale"]
    page.mouse.move(box["x"] + x0, box["y"] + y0)
    page.mouse.down()
    page.mouse.move(box["x"] + x1, box["y"] + y1, steps=8)
    page.mouse.up()
    page.wait_for_function("() => Number(document.getElementById('map-app').dataset.selected) > 0")
    g = data["grid"]
    expected = sorted(i for i, x, y in zip(data["items"]["id"], data["items"]["x"], data["items"]["y"])
                      if x0 <= x / g * view["scale"] + view["tx"] <= x1 and y0 <= y / g * view["scale"] + view["ty"] <= y1)
    selected = sorted(page.evaluate("() => window.kinscopeMap.selectedIds()"))
    assert selected == expected and 0 < len(selected) < data["total"]
    assert f"{len(selected)} items selected" in page.inner_text("#map-selection")
    _shot(page, "map-selection.png")
    with page.expect_download() as download:
        page.click("#map-json")
    rows = json.loads(Path(download.value.path()).read_text())
    assert [r["id"] for r in rows] == expected and all(r["path"].endswith(".png") for r in rows)
