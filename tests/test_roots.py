"""The catalog notices what is gone: renamed roots, moves across roots, missing files, links, a --db
inside the archive, and a server that shows only the files the catalog describes."""
from __future__ import annotations

import json
import os
import shutil

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

from index.api import Archive, ArchiveError
from index.cli import main


def _folder(path, n, seed=0):
    path.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    for i in range(n):
        sub = path / ("sub" if i % 2 else "")
        sub.mkdir(exist_ok=True)
        Image.fromarray(rng.integers(0, 255, (48, 56, 3), dtype=np.uint8)).save(sub / f"img-{seed}-{i}.png")
    return path


def _new(tmp_path, folder, n=4, seed=0):
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    archive.add([_folder(tmp_path / folder, n, seed)], progress=False)
    return archive


def _vectors(archive):
    ids = np.array(sorted(archive.catalog.ids_with_status("ok")), np.int64)
    return ids, archive.store("colour").reconstruct(ids)


def _no_embedding(monkeypatch):
    """Any attempt to embed an image fails the test."""
    def refuse(*args, **kwargs):
        raise AssertionError("an image was embedded again")

    from index.ingest.indexer import Indexer

    monkeypatch.setattr(Indexer, "embedder_for_run", refuse)


def _run(*args):
    return CliRunner().invoke(main, [str(a) for a in args])


def test_a_renamed_root_is_reported_and_re_pointed_without_embedding_anything(tmp_path, monkeypatch):
    archive = _new(tmp_path, "arch")
    ids_before, vectors_before = _vectors(archive)
    archive.close()
    os.rename(tmp_path / "arch", tmp_path / "photos")
    db = tmp_path / "db"

    out = _run("check", "--db", db)
    assert out.exit_code == 1
    assert f"4 catalogued images are below {tmp_path / 'arch'}, which no longer exists" in out.output
    assert "kinscope roots rename" in out.output
    out = _run("index", tmp_path / "arch", "--db", db, "-q")  # the old way back: refused, with the way out
    assert out.exit_code == 2 and "holds 4 images below it" in out.output and "Traceback" not in out.output
    listed = json.loads(_run("roots", "list", "--db", db, "--json").output)
    assert listed == [{"root": str(tmp_path / "arch"), "rows": 4, "state": "gone"}]

    _no_embedding(monkeypatch)
    out = _run("roots", "rename", tmp_path / "arch", tmp_path / "photos", "--db", db)
    assert out.exit_code == 0, out.output
    assert "4 rows re-pointed" in out.output and "4 files found there, 0 not" in out.output
    archive = Archive.open(db)
    report = archive.add([tmp_path / "photos"], progress=False)
    assert (report["unchanged"], report["new"], report["embedded"]) == (4, 0, 0)
    ids_after, vectors_after = _vectors(archive)
    assert np.array_equal(ids_after, ids_before) and np.array_equal(vectors_after, vectors_before)
    rows = list(archive.catalog.db.query("select path from images"))
    assert len(rows) == 4 and all(r["path"].startswith(str(tmp_path / "photos")) and os.path.isfile(r["path"])
                                  for r in rows)
    assert archive.check()["ok"]


def test_index_moved_from_re_points_then_indexes(tmp_path, monkeypatch):
    _new(tmp_path, "arch").close()
    os.rename(tmp_path / "arch", tmp_path / "photos")
    _no_embedding(monkeypatch)
    out = _run("index", tmp_path / "photos", "--db", tmp_path / "db", "-q", "--moved-from", tmp_path / "arch")
    assert out.exit_code == 0, out.output
    assert "4 rows re-pointed" in out.output and "4 unchanged; 0 embedded" in out.output


def test_a_gone_root_can_be_forgotten_and_repair_never_forgets_it(tmp_path):
    archive = _new(tmp_path, "arch")
    archive.close()
    shutil.rmtree(tmp_path / "arch")
    repaired = Archive.open(tmp_path / "db").repair(progress=False)  # a gone root is not a repair's business
    assert "forgotten_missing" not in repaired
    assert len(Archive.open(tmp_path / "db").catalog.ids_with_status("ok")) == 4
    out = _run("roots", "forget", tmp_path / "arch", "--db", tmp_path / "db")
    assert out.exit_code == 0 and "4 rows below" in out.output
    archive = Archive.open(tmp_path / "db")
    assert archive.catalog.ids_with_status("ok") == [] and len(archive.store("colour")) == 0
    assert archive.roots() == [] and archive.check()["ok"]


def test_forgetting_a_root_that_still_exists_needs_saying_so(tmp_path):
    _new(tmp_path, "arch").close()
    out = _run("roots", "forget", tmp_path / "arch", "--db", tmp_path / "db")
    assert out.exit_code == 2 and "still exists" in out.output
    assert len(Archive.open(tmp_path / "db").catalog.ids_with_status("ok")) == 4


def test_a_move_across_roots_keeps_its_row(tmp_path, monkeypatch):
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    a, b = _folder(tmp_path / "a", 3, seed=1), _folder(tmp_path / "b", 3, seed=2)
    archive.add([a, b], progress=False)
    row = archive.catalog.by_path(str(a / "img-1-0.png"))
    os.rename(a / "img-1-0.png", b / "moved.png")
    _no_embedding(monkeypatch)
    report = archive.add([b], progress=False)  # only the root it arrived in
    assert (report["moved"], report["new"], report["embedded"]) == (1, 0, 0)
    assert archive.catalog.by_path(str(b / "moved.png"))["id"] == row["id"]
    assert archive.add([a], progress=False)["removed"] == 0  # nothing left behind to remove
    assert len(archive.catalog.ids_with_status("ok")) == 6


def test_a_renamed_root_indexed_under_its_new_name_is_matched_by_content(tmp_path, monkeypatch):
    archive = _new(tmp_path, "arch")
    ids_before, _ = _vectors(archive)
    os.rename(tmp_path / "arch", tmp_path / "photos")
    _no_embedding(monkeypatch)
    report = archive.add([tmp_path / "photos"], progress=False)
    assert (report["moved"], report["new"], report["embedded"]) == (4, 0, 0)
    assert np.array_equal(_vectors(archive)[0], ids_before)
    assert report["gone_roots"] == {}  # the old root holds no rows any more ...
    assert archive.roots() == [{"root": str(tmp_path / "photos"), "rows": 4, "state": "present"}]  # ... nor is listed
    assert archive.info()["images"] == 4


def test_check_lists_missing_files_and_repair_forgets_them_saying_how_many(tmp_path):
    archive = _new(tmp_path, "arch", n=5)
    gone = tmp_path / "arch" / "img-0-2.png"
    gone.unlink()
    archive.close()
    out = _run("check", "--db", tmp_path / "db")
    assert out.exit_code == 1 and f"1 catalogued files are missing: {gone}" in out.output
    out = _run("check", "--db", tmp_path / "db", "--repair")
    assert out.exit_code == 0 and "forgotten_missing 1" in out.output and "everything agrees" in out.output
    archive = Archive.open(tmp_path / "db")
    assert archive.catalog.by_path(str(gone)) is None
    assert sorted(archive.store("colour").ids().tolist()) == sorted(archive.catalog.ids_with_status("ok"))
    assert len(archive.catalog.ids_with_status("ok")) == 4


def test_a_link_to_an_indexed_folder_adds_nothing(tmp_path):
    archive = _new(tmp_path, "real")
    os.symlink(tmp_path / "real", tmp_path / "ln")
    report = archive.add([tmp_path / "ln"], progress=False)
    assert (report["new"], report["unchanged"]) == (0, 4)
    report = archive.add([tmp_path / "real", tmp_path / "ln"], progress=False)
    assert report["new"] == 0
    paths = [r["path"] for r in archive.catalog.db.query("select path from images")]
    assert len(paths) == 4 and all(p.startswith(str(tmp_path / "real") + os.sep) for p in paths)


def test_file_links_are_never_catalogued_and_links_outside_are_reported(tmp_path):
    folder = _folder(tmp_path / "arch", 2)
    outside = _folder(tmp_path / "elsewhere", 1, seed=5)
    os.symlink("img-0-0.png", folder / "a-link.png")  # inside: the target has its own row
    os.symlink(outside / "img-5-0.png", folder / "out.png")  # outside every root: not indexed
    os.symlink("nothing.png", folder / "dangling.png")
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    report = archive.add([folder], progress=False)
    paths = {r["path"] for r in archive.catalog.db.query("select path from images")}
    assert paths == {str(folder / "img-0-0.png"), str(folder / "sub" / "img-0-1.png")}
    assert [s["path"] for s in report["skipped"]] == [str(folder / "out.png")]
    failures = {r["path"]: r["reason"] for r in archive.catalog.db.query("select * from failures")}
    assert "dangling link" in failures[str(folder / "dangling.png")]
    archive.close()
    out = _run("index", folder, "--db", tmp_path / "db", "-q")
    assert "not indexed: 1 link to files outside the indexed folders" in out.output


def test_a_db_inside_the_indexed_folder_is_left_out_and_a_root_inside_the_db_refused(tmp_path):
    folder = _folder(tmp_path / "arch", 3)
    archive = Archive.open(folder / "kinscope-db", create=True, layers=["colour"])
    archive.add([folder], progress=False)
    archive.thumbnail(1)  # JPEG thumbnails now sit inside the indexed folder
    assert list((folder / "kinscope-db" / "thumbs").glob("*.jpg"))
    report = archive.add([folder], progress=False)
    assert report["new"] == 0 and any("database folder" in s["reason"] for s in report["skipped"])
    assert not [r for r in archive.catalog.db.query("select path from images") if "kinscope-db" in r["path"]]
    with pytest.raises(ArchiveError, match="inside the database folder"):
        archive.add([folder / "kinscope-db" / "thumbs"], progress=False)


def test_the_server_shows_only_the_file_the_catalog_describes(tmp_path):
    from web import create_app

    archive = _new(tmp_path, "arch")
    rows = {os.path.basename(r["path"]): r for r in archive.catalog.db.query("select * from images")}
    outside = tmp_path / "private.png"
    shutil.copy2(tmp_path / "arch" / "img-0-0.png", outside)  # same bytes, size and date
    os.remove(tmp_path / "arch" / "img-0-0.png")
    os.symlink(outside, tmp_path / "arch" / "img-0-0.png")  # the catalogued path now leads outside
    with pytest.raises(ArchiveError, match="outside the indexed folders"):
        archive.thumbnail(rows["img-0-0.png"]["id"])
    changed = tmp_path / "arch" / "img-0-2.png"
    os.utime(changed, (1e9, 1e9))  # another date: not the file that was indexed
    with pytest.raises(ArchiveError, match="changed since it was indexed"):
        archive.display_image(rows["img-0-2.png"]["id"])
    assert archive.thumbnail(rows["img-0-1.png"]["id"])[:2] == b"\xff\xd8"  # an untouched one still shows
    client = create_app({"KINSCOPE_DB": str(tmp_path / "db"), "TESTING": True}).test_client()
    bad = client.get(f"/media/items/{rows['img-0-0.png']['id']}/image")
    assert bad.status_code == 400 and "outside the indexed folders" in bad.get_json()["error"]


def test_rows_recorded_through_a_link_by_earlier_versions_are_adopted(tmp_path, monkeypatch):
    """Earlier versions kept a root given through a link as typed; a catalog with a folder indexed both
    ways held every file twice. The next run keeps one row per file, at its real path."""
    archive = _new(tmp_path, "real")
    os.symlink(tmp_path / "real", tmp_path / "ln")
    real, ln = str(tmp_path / "real"), str(tmp_path / "ln")
    ids, vectors = _vectors(archive)
    archive.catalog.rename_root(real, ln)  # as an earlier version left it: rows below the link's path
    run = archive.catalog.start_run([real])  # ... and the same files indexed again directly
    doubles = archive.catalog.insert_pending(
        [{"path": os.path.join(real, r["path"][len(ln) + 1:]), "size": r["size"], "mtime": r["mtime"]}
         for r in archive.catalog.db.query("select * from images")], run)
    archive.catalog.set_status(doubles, "ok")
    writer = archive.indexer.writer("colour")
    writer.add(np.array(doubles), vectors)
    archive.indexer.save_stores()
    assert archive.info()["images"] == 8
    _no_embedding(monkeypatch)
    report = archive.add([tmp_path / "ln"], progress=False)
    assert (report["new"], report["embedded"], report["unchanged"]) == (0, 0, 4)
    paths = [r["path"] for r in archive.catalog.db.query("select path from images")]
    assert len(paths) == 4 and all(p.startswith(real + os.sep) for p in paths)
    assert archive.roots() == [{"root": real, "rows": 4, "state": "present"}]
    assert archive.check()["ok"]
