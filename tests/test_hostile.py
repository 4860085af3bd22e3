"""A corpus of over 100 bad and odd files: each is indexed correctly or recorded with its reason."""
from __future__ import annotations

import os

import pytest

from index.api import Archive

from .hostile_corpus import build


@pytest.fixture(scope="module")
def indexed(tmp_path_factory):
    root = tmp_path_factory.mktemp("hostile") / "files"
    expect = build(root)
    archive = Archive.open(root.parent / "db", create=True, layers=["colour", "objects"])
    report = archive.add([root], progress=False)
    return archive, root, expect, report


def test_the_corpus_is_large_enough(indexed):
    _, _, expect, _ = indexed
    assert len(expect) >= 100


def test_every_file_is_indexed_or_recorded_with_a_reason(indexed):
    archive, root, expect, report = indexed
    indexed_paths = {r["path"] for r in archive.catalog.db.query("select path from images where status = 'ok'")}
    failures = {r["path"]: r["reason"] for r in archive.catalog.db.query("select path, reason from failures")}
    wrong = []
    for rel, outcome in expect.items():
        path = str(root / rel)
        got = "ok" if path in indexed_paths else "fail" if path in failures else "missing"
        if got == "missing" or (outcome != "either" and got != outcome):
            wrong.append((rel, outcome, got, failures.get(path)))
    assert not wrong, wrong
    assert all(reason and len(reason) > 8 for reason in failures.values())
    assert report["embedded"] + report["failed"] >= len(expect) - 1


def test_odd_images_keep_their_true_size(indexed):
    archive, root, _, _ = indexed
    rows = {os.path.basename(r["path"]): r for r in archive.catalog.db.query("select * from images")}
    assert (rows["wide-20000x20.png"]["width"], rows["wide-20000x20.png"]["height"]) == (20000, 20)
    assert (rows["large-4000x3000.jpg"]["width"], rows["large-4000x3000.jpg"]["height"]) == (4000, 3000)
    assert rows["animated.gif"]["status"] == "ok" and rows["multipage.tif"]["status"] == "ok"


def test_reasons_say_what_is_wrong(indexed):
    archive, root, _, _ = indexed
    failures = {os.path.basename(r["path"]): r["reason"] for r in archive.catalog.db.query("select * from failures")}
    assert "empty" in failures["zero-bytes.jpg"]
    assert "truncated" in failures["truncated-50.jpg"] or "damaged" in failures["truncated-50.jpg"]
    assert "pixels" in failures["bomb-50000x50000.png"]
    assert "UTF-8" in failures["latin1-\\xe9t\\xe9.jpg"]


def test_a_second_run_retries_nothing_and_changes_nothing(indexed):
    archive, root, expect, first = indexed
    again = archive.add([root], progress=False)
    assert again["embedded"] == 0 and again["new"] == 0
    assert archive.check()["ok"]
