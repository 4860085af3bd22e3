"""The collection map: layout quality on outside data, incremental updates, determinism, /api/map.

Outside data: scikit-learn's handwritten digits (sklearn.datasets.load_digits: the UCI optical
recognition of handwritten digits test set, 1797 8x8 images in 10 classes) laid out from their pixels,
and scikit-image's photographs (skimage.data) with transformed copies of each (tests/map_families.py)
indexed through the real pipeline. The tests run in file order over one archive: the last ones change it.
"""
from __future__ import annotations

import json
import shutil

import numpy as np
import pytest

from index.map import collection as cm
from index.map import layout as ml
from tests.map_families import write_families


def _pair_distances(xy: np.ndarray, labels: np.ndarray) -> tuple[float, float]:
    """Mean map distance between items of one class/family, and between all pairs."""
    d = np.linalg.norm(xy[:, None, :] - xy[None, :, :], axis=2)
    same = labels[:, None] == labels[None, :]
    off = ~np.eye(len(xy), dtype=bool)
    return float(d[same & off].mean()), float(d[off].mean())


@pytest.fixture(scope="module")
def digits():
    from sklearn.datasets import load_digits

    d = load_digits()  # source: scikit-learn's copy of the UCI optical digits set
    return d.data[:600].astype(np.float32), d.target[:600]


@pytest.mark.parametrize("sample", [600, 200])  # t-SNE of every item; t-SNE of a third, the rest placed
def test_digits_of_one_class_lie_together_and_neighbours_are_kept(digits, sample):
    x, labels = digits
    ids = np.arange(len(x))
    xy, sampled = ml.layout(ids, lambda i: x[i], seed=0, sample=sample)
    assert sampled.sum() == sample and xy.min() >= 0 and xy.max() <= 1
    within, overall = _pair_distances(xy, labels)
    assert within < 0.5 * overall, (within, overall)
    kept = ml.neighbour_share(x, xy, 10)
    at_random = ml.neighbour_share(x, np.random.default_rng(0).random((len(x), 2)), 10)
    assert kept > 0.3 and kept > 10 * at_random, (kept, at_random)
    # Among each item's 10 nearest on the map, most are of its own class (chance is about a tenth).
    idx, _ = ml.exact_neighbours(xy, 10)
    assert np.mean(labels[idx] == labels[:, None]) > 0.8


def test_layout_is_deterministic_for_a_seed(digits):
    x, _ = digits
    ids = np.arange(200)  # 120 laid out by t-SNE, 80 placed
    first, _ = ml.layout(ids, lambda i: x[i], seed=3, sample=120)
    again, _ = ml.layout(ids, lambda i: x[i], seed=3, sample=120)
    other, _ = ml.layout(ids, lambda i: x[i], seed=4, sample=120)
    assert np.array_equal(first, again)
    assert not np.allclose(first, other)


def test_placement_follows_the_nearest_anchor_and_puts_a_twin_beside_its_original():
    anchors_xy = np.array([[0.1, 0.1], [0.9, 0.9], [0.5, 0.2], [0.1, 0.3]], np.float32)
    idx = np.array([[0, 1, 2], [1, 2, -1], [2, 1, 0]])
    dist = np.array([[0.0, 0.4, 0.5], [0.2, 0.2, 0.0], [0.30, 0.33, 0.6]])
    xy = ml.weighted_position(idx, dist, anchors_xy, np.array([11, 12, 13]))
    # distance 0: beside its twin, nearer to it than to any other anchor (offset < SPREAD x spacing 0.2)
    assert np.linalg.norm(xy[0] - anchors_xy[0]) <= ml.SPREAD * 0.2 + 1e-6
    # two at the same distance share the weight (the missing third carries none): halfway, give or take
    # the offset (anchor 1's nearest other anchor is 0.806 away)
    assert np.linalg.norm(xy[1] - [0.7, 0.55]) <= ml.SPREAD * 0.807
    # 0.33 against 0.30 (21% more squared distance, TAU 0.02): the nearest carries nearly all
    assert np.linalg.norm(xy[2] - anchors_xy[2]) <= ml.SPREAD * 0.413 + 1e-3
    again = ml.weighted_position(idx, dist, anchors_xy, np.array([11, 12, 13]))
    assert np.array_equal(xy, again)  # offsets are fixed by the id


@pytest.fixture(scope="module")
def families(tmp_path_factory, sample_images):
    from index.api import Archive

    root = tmp_path_factory.mktemp("map")
    family = write_families(root / "photos", sample_images)
    archive = Archive.open(root / "db", create=True, layers=["parts"])
    archive.add([root / "photos"], progress=False)
    return archive, root, family


def _stored(archive) -> cm.Layout:
    archive.refresh()
    return cm.load(archive.db, "parts")


def test_images_of_one_family_lie_closer_on_the_map_than_random_pairs(families):
    archive, _, family = families
    report = archive.map()
    assert report["action"] == "laid out" and report["items"] == len(family)
    layout = _stored(archive)
    names = {r["id"]: r["name"] for r in archive.catalog.get(layout.ids.tolist()).values()}
    labels = np.array([family[names[i]] for i in layout.ids])
    within, overall = _pair_distances(layout.xy, labels)
    assert within < 0.5 * overall, (within, overall)


def test_the_same_seed_gives_the_same_map_and_another_seed_another(families):
    archive, _, _ = families
    first = _stored(archive)
    archive.map(full=True)
    again = _stored(archive)
    assert np.array_equal(first.ids, again.ids) and np.array_equal(first.xy, again.xy)
    archive.map(seed=7)  # another seed is another layout, made in full
    assert not np.allclose(_stored(archive).xy, first.xy)
    archive.map(seed=0)
    assert np.array_equal(_stored(archive).xy, first.xy)


def test_api_serves_the_stored_map_in_chunks(families):
    from web import create_app

    archive, root, family = families
    layout = _stored(archive)
    c = create_app({"KINSCOPE_DB": str(archive.db), "TESTING": True}).test_client()
    first = c.get("/api/map?limit=30").get_json()
    assert first["total"] == len(family) and first["count"] == 30 and first["next"] == 30
    assert first["folders"] == [str(root / "photos")]
    ids, xs, ys = list(first["items"]["id"]), list(first["items"]["x"]), list(first["items"]["y"])
    offset = first["next"]
    while offset is not None:
        part = c.get(f"/api/map?limit=30&offset={offset}").get_json()
        assert "folders" not in part
        ids += part["items"]["id"]
        xs += part["items"]["x"]
        ys += part["items"]["y"]
        offset = part["next"]
    assert ids == layout.ids.tolist()
    grid = first["grid"]
    assert np.abs(np.array(xs) / grid - layout.xy[:, 0]).max() <= 1 / grid
    assert np.abs(np.array(ys) / grid - layout.xy[:, 1]).max() <= 1 / grid
    paths = c.post("/api/map/paths", json={"ids": ids[:3] + [10**9]}).get_json()
    assert [p["id"] for p in paths["items"]] == ids[:3] and paths["missing"] == 1
    assert all(p["path"].startswith(str(root / "photos")) for p in paths["items"])
    assert c.get("/api/map?layer=colour").status_code == 400  # not a layer of this archive
    assert c.post("/api/map/paths", data="ids=1").status_code == 400
    assert c.post("/api/map/paths", json={"ids": [-1]}).status_code == 400
    assert c.get("/map").status_code == 200


def test_api_says_how_to_make_a_missing_map(sample_archive):
    from web import create_app

    archive, _ = sample_archive
    c = create_app({"KINSCOPE_DB": str(archive.db), "TESTING": True}).test_client()
    r = c.get("/api/map")
    assert r.status_code == 404 and "kinscope map" in r.get_json()["error"]


def test_a_reindexed_copy_is_placed_next_to_its_original(families, sample_images):
    archive, root, family = families
    before = _stored(archive)
    photos = root / "photos"
    shutil.copy2(photos / "coffee-original.png", photos / "coffee-again.png")  # the same picture, a new file
    sample_images["clock"].save(photos / "clock-rescan.jpg", quality=50)  # re-encoded: a near copy
    (photos / "moon-bright.png").unlink()
    archive.add([photos], progress=False)
    report = archive.map()
    assert report["action"] == "updated" and (report["added"], report["removed"]) == (2, 1)
    after = _stored(archive)
    rows = {r["name"]: r["id"] for r in archive.catalog.get(after.ids.tolist()).values()}
    assert "moon-bright.png" not in rows and len(after) == len(before) + 1
    pos = {name: after.xy[np.searchsorted(after.ids, i)] for name, i in rows.items()}
    # Items that stayed did not move.
    kept = np.isin(before.ids, after.ids)
    assert np.array_equal(after.xy[np.searchsorted(after.ids, before.ids[kept])], before.xy[kept])
    # The exact copy lands beside its original (its nearest item on the map); the re-encoded one nearer
    # its original than most items are.
    copy = pos["coffee-again.png"]
    assert min((np.linalg.norm(copy - p), n) for n, p in pos.items() if n != "coffee-again.png")[1] == "coffee-original.png"
    to_original = np.linalg.norm(pos["clock-rescan.jpg"] - pos["clock-original.png"])
    others = [np.linalg.norm(pos["clock-rescan.jpg"] - p) for n, p in pos.items() if not n.startswith("clock")]
    assert to_original < np.percentile(others, 10), (to_original, sorted(others)[:5])


def test_the_map_is_laid_out_again_once_the_archive_grew_by_a_quarter(families, sample_images):
    archive, root, _ = families
    more = root / "photos" / "more"
    write_families(more, sample_images, sources=("gravel", "text", "colorwheel", "cell", "logo"))  # 25 more
    archive.add([root / "photos"], progress=False)
    report = archive.map()
    assert report["action"] == "laid out" and report["meta"]["placed_since"] == 0
    assert report["items"] == len(_stored(archive)) and report["meta"]["laid_out"] == report["items"]


def test_cli_map_reports_what_it_did(families):
    from click.testing import CliRunner

    from index.cli import main

    archive, _, _ = families
    out = CliRunner().invoke(main, ["map", "--db", str(archive.db), "--json"])
    assert out.exit_code == 0, out.output
    assert json.loads(out.output)["action"] == "updated"
    bad = CliRunner().invoke(main, ["map", "--db", str(archive.db), "--layer", "nothing"])
    assert bad.exit_code == 2 and "has no layer 'nothing'" in bad.output
