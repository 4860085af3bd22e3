"""The main job end to end: index a folder, search it by example, keep it current."""
from __future__ import annotations

import io
import os
import shutil

import numpy as np
import pytest
from PIL import Image

from index.api import Archive, ArchiveError


def degraded(image: Image.Image) -> bytes:
    """70% crop, half size, JPEG quality 40 (transformations of the kinds used in copy detection: Douze et al.,
    "The 2021 Image Similarity Dataset and Challenge", 2021)."""
    w, h = image.size
    cw, ch = int(w * 0.7), int(h * 0.7)
    left, top = (w - cw) // 2, (h - ch) // 3
    small = image.crop((left, top, left + cw, top + ch))
    small = small.resize((max(1, small.width // 2), max(1, small.height // 2)), Image.BILINEAR)
    buf = io.BytesIO()
    small.save(buf, "JPEG", quality=40)
    return buf.getvalue()


def test_a_degraded_copy_finds_its_original_first(sample_archive, sample_images):
    # Source of the images: scikit-image's bundled data and scikit-learn's sample images; every other
    # image in the archive is a distractor for each query.
    archive, folder = sample_archive
    misses = []
    for name, image in sample_images.items():
        top = archive.search(degraded(image), k=1)["results"][0]
        if os.path.basename(top["path"]) != f"{name}.png":
            misses.append((name, os.path.basename(top["path"])))
    assert not misses, misses


def test_search_by_file_inside_the_archive_finds_itself_with_score_one(sample_archive):
    archive, folder = sample_archive
    result = archive.search(str(folder / "coffee.png"), k=3)
    assert result["results"][0]["path"] == str(folder / "coffee.png")
    assert result["results"][0]["score"] == pytest.approx(1.0, abs=1e-4)
    scores = [r["score"] for r in result["results"]]
    assert scores == sorted(scores, reverse=True)


def test_search_by_id_excludes_the_item_and_matches_its_file_search(sample_archive):
    archive, folder = sample_archive
    by_file = archive.search(str(folder / "chelsea.png"), layer="objects", k=4)["results"]
    item = by_file[0]["id"]
    by_id = archive.search(item, layer="objects", k=3)
    assert by_id["query"]["id"] == item
    assert [r["id"] for r in by_id["results"]] == [r["id"] for r in by_file[1:4]]


def test_scores_are_cosine_similarities_of_the_stored_descriptors(sample_archive):
    # Reference: numpy dot product of the two L2-normalised descriptors (cosine similarity).
    archive, folder = sample_archive
    result = archive.search(str(folder / "rocket.png"), layer="texture", k=5)
    q = archive.query_vector(str(folder / "rocket.png"), "texture")
    for r in result["results"]:
        d = archive.store("texture").reconstruct(np.array([r["id"]]))[0]
        assert r["score"] == pytest.approx(float(q @ d), abs=1e-5)


def test_every_layer_can_be_searched_and_unknown_layers_are_refused(sample_archive):
    archive, folder = sample_archive
    for layer in archive.layer_names:
        assert archive.search(str(folder / "moon.png"), layer=layer, k=1)["results"]
    with pytest.raises(ArchiveError, match="no layer"):
        archive.search(str(folder / "moon.png"), layer="nonexistent")


# Exif 2.3 / CIPA DC-008, Orientation tag (0x0112): how the stored pixels must be transformed for
# display. Each entry maps a correctly displayed image to the stored pixels that carry that tag.
ORIENTATION_STORE = {
    1: lambda im: im,
    2: lambda im: im.transpose(Image.FLIP_LEFT_RIGHT),
    3: lambda im: im.transpose(Image.ROTATE_180),
    4: lambda im: im.transpose(Image.FLIP_TOP_BOTTOM),
    5: lambda im: im.transpose(Image.TRANSPOSE),
    6: lambda im: im.transpose(Image.ROTATE_90),  # displayed = stored rotated 90 degrees clockwise
    7: lambda im: im.transpose(Image.TRANSVERSE),
    8: lambda im: im.transpose(Image.ROTATE_270),
}


def test_the_eight_exif_orientations_give_the_descriptor_of_the_upright_pixels(sample_archive, sample_images, tmp_path):
    archive, _ = sample_archive
    upright = sample_images["astronaut"].resize((256, 192))
    upright.save(tmp_path / "upright.png")
    reference = archive.query_vector(str(tmp_path / "upright.png"), "parts")
    for value, store in ORIENTATION_STORE.items():
        exif = Image.Exif()
        exif[0x0112] = value
        path = tmp_path / f"orientation-{value}.png"
        store(upright).save(path, exif=exif.tobytes())
        got = archive.query_vector(str(path), "parts")
        assert float(got @ reference) == pytest.approx(1.0, abs=1e-5), f"orientation {value}"


def _write(path, colour, size=(96, 80)):
    rng = np.random.default_rng(sum(colour))
    noise = rng.integers(0, 60, size=(size[1], size[0], 3))
    Image.fromarray(np.clip(np.array(colour) + noise, 0, 255).astype(np.uint8)).save(path)


def test_incremental_reindex_add_change_delete_move_and_a_broken_file(tmp_path):
    root = tmp_path / "photos"
    (root / "a").mkdir(parents=True)
    for i, colour in enumerate([(200, 30, 30), (30, 200, 30), (30, 30, 200), (200, 200, 30)]):
        _write(root / "a" / f"p{i}.png", colour)
    (root / "a" / "broken.jpg").write_bytes(b"\xff\xd8\xff\xe0 definitely not a whole jpeg")
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour", "objects"])
    first = archive.add([root], progress=False)
    assert (first["new"], first["embedded"], first["failed"]) == (5, 4, 1)
    info = archive.info()
    assert info["images"] == 4 and info["failures"][0]["path"].endswith("broken.jpg")
    ids = {os.path.basename(r["path"]): r["id"] for r in archive.search(str(root / "a" / "p0.png"), k=10)["results"]}

    again = archive.add([root], progress=False)
    assert (again["unchanged"], again["embedded"], again["known_failures"]) == (4, 0, 1)

    _write(root / "a" / "p1.png", (250, 250, 250))  # changed content
    os.utime(root / "a" / "p1.png", (1_000_000_000, 1_000_000_000))
    (root / "a" / "p2.png").unlink()  # deleted
    (root / "b").mkdir()
    shutil.move(root / "a" / "p3.png", root / "b" / "renamed.png")  # moved and renamed
    _write(root / "b" / "new.png", (10, 10, 10))  # new
    os.utime(root / "a" / "p0.png")  # touched: new mtime, same content
    third = archive.add([root], progress=False)
    assert (third["new"], third["changed"], third["moved"], third["removed"]) == (1, 1, 1, 1)
    assert third["embedded"] == 2  # the changed and the new file; the move and the touch cost nothing

    rows = {os.path.basename(r["path"]): r for r in archive.search(str(root / "a" / "p0.png"), k=10)["results"]}
    assert set(rows) == {"p0.png", "p1.png", "renamed.png", "new.png"}
    assert rows["renamed.png"]["id"] == ids["p3.png"]  # the moved file kept its record
    assert rows["p0.png"]["id"] == ids["p0.png"]
    assert all(len(archive.store(l)) == 4 for l in archive.layer_names)
    changed = archive.search(str(root / "a" / "p1.png"), layer="colour", k=1)["results"][0]
    assert changed["path"].endswith("p1.png") and changed["score"] == pytest.approx(1.0, abs=1e-4)


def test_files_outside_the_roots_are_left_alone_on_reindex(tmp_path):
    for folder, colour in (("one", (200, 0, 0)), ("two", (0, 0, 200))):
        (tmp_path / folder).mkdir()
        _write(tmp_path / folder / "x.png", colour)
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    archive.add([tmp_path / "one", tmp_path / "two"], progress=False)
    report = archive.add([tmp_path / "one"], progress=False)
    assert report["removed"] == 0 and archive.info()["images"] == 2


def test_other_settings_on_an_existing_archive_are_refused(tmp_path):
    (tmp_path / "imgs").mkdir()
    _write(tmp_path / "imgs" / "x.png", (1, 2, 3))
    Archive.open(tmp_path / "db", create=True, layers=["colour"]).add([tmp_path / "imgs"], progress=False)
    with pytest.raises(ArchiveError, match="layers: the archive has"):
        Archive.open(tmp_path / "db", layers=["objects"])
    with pytest.raises(ArchiveError, match="gem_p"):
        Archive.open(tmp_path / "db", gem_p=2.0)
    assert Archive.open(tmp_path / "db", layers=["colour"]).info()["images"] == 1


def test_opening_a_folder_that_is_not_an_archive(tmp_path):
    with pytest.raises(ArchiveError, match="not a kinscope database"):
        Archive.open(tmp_path / "nothing-here")
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("mine")
    with pytest.raises(ArchiveError, match="not empty"):
        Archive.open(tmp_path / "busy", create=True)


def test_a_store_ahead_of_the_catalog_is_reconciled(tmp_path):
    """A crash between saving the vector stores and committing the catalog loses nothing."""
    (tmp_path / "imgs").mkdir()
    for i in range(3):
        _write(tmp_path / "imgs" / f"{i}.png", (60 * i, 50, 100))
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    archive.add([tmp_path / "imgs"], progress=False)
    # Simulate the crash: an id in the store that the catalog never committed, and a committed id missing.
    store = archive.indexer.writer("colour")  # what the indexer writes through
    store.add(np.array([999]), store.reconstruct(np.array([1])))
    store.remove(np.array([2]))
    archive.indexer.save_stores()
    reopened = Archive.open(tmp_path / "db")
    report = reopened.add([tmp_path / "imgs"], progress=False)
    assert report["embedded"] == 1
    assert sorted(reopened.store("colour").ids().tolist()) == [1, 2, 3]


def test_two_indexers_on_one_database_are_refused(tmp_path):
    import fcntl

    (tmp_path / "imgs").mkdir()
    _write(tmp_path / "imgs" / "x.png", (9, 9, 9))
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    with open(tmp_path / "db" / "indexer.lock", "a+") as held:
        fcntl.flock(held, fcntl.LOCK_EX)
        with pytest.raises(ArchiveError, match="another kinscope indexer"):
            archive.add([tmp_path / "imgs"], progress=False)


def test_a_query_that_is_not_an_image_gets_a_clear_error(sample_archive, tmp_path):
    archive, _ = sample_archive
    (tmp_path / "notes.jpg").write_text("hello")
    with pytest.raises(ArchiveError, match="cannot use"):
        archive.search(str(tmp_path / "notes.jpg"))
    with pytest.raises(ArchiveError, match="not found"):
        archive.search(str(tmp_path / "missing.jpg"))
    with pytest.raises(ArchiveError, match="no indexed item"):
        archive.search(987654)
