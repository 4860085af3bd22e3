"""The incremental scan, folder by folder: what it finds against what the catalog holds."""
from __future__ import annotations

import os
import shutil

from index.db.catalog import Catalog
from index.ingest.scan import diff_by_folder, normalize_roots, walk, walk_roots


def write(path, data: bytes) -> str:
    os.makedirs(os.path.dirname(path), exist_ok=True)
    with open(path, "wb") as fh:
        fh.write(data)
    return str(path)


def catalogue(catalog: Catalog, paths: list[str]) -> dict[str, int]:
    """Rows as a finished run leaves them ('ok', with the content hash); path -> id."""
    from index.ingest.scan import sha256_file

    files = [{"path": p, "size": os.stat(p).st_size, "mtime": os.stat(p).st_mtime, "sha256": sha256_file(p)}
             for p in paths]
    ids = catalog.insert_pending(files, catalog.start_run(["test"]))
    catalog.set_status(ids, "ok")
    return dict(zip(paths, ids))


def scan(catalog: Catalog, roots: list[str]):
    roots = normalize_roots(roots)
    errors: list[dict] = []
    return diff_by_folder(walk(walk_roots(roots), errors), catalog.rows_in_folder, catalog.folders_under(roots),
                          roots, catalog.failures_under(roots))


def test_moves_across_folders_removals_of_whole_folders_and_changes(tmp_path):
    root = tmp_path / "archive"
    a = write(root / "a" / "1.jpg", b"one")
    b = write(root / "a" / "2.jpg", b"two")
    c = write(root / "b" / "deep" / "3.jpg", b"three")
    d = write(root / "c" / "4.jpg", b"four")
    catalog = Catalog(tmp_path / "catalog.sqlite")
    ids = catalogue(catalog, [a, b, c, d])

    os.rename(a, root / "c" / "moved.jpg")  # to another folder, same content
    shutil.rmtree(root / "b")  # a folder the walk will no longer reach
    write(d, b"four, edited")  # same path, new content
    write(root / "a" / "5.jpg", b"five")  # new

    cs = scan(catalog, [root])
    assert [(i, f["path"]) for i, f in cs.moved] == [(ids[a], str(root / "c" / "moved.jpg"))]
    assert cs.removed == [ids[c]]
    assert [i for i, _ in cs.changed] == [ids[d]]
    assert [f["path"] for f in cs.new] == [str(root / "a" / "5.jpg")]
    assert cs.unchanged == 1  # 2.jpg


def test_rows_outside_the_roots_are_left_alone(tmp_path):
    root = tmp_path / "archive"
    inside = write(root / "x" / "in.jpg", b"in")
    sibling = write(root / "x" / "sibling.jpg", b"sibling")
    other = write(root / "y" / "other.jpg", b"other")
    catalog = Catalog(tmp_path / "catalog.sqlite")
    catalogue(catalog, [inside, sibling, other])
    os.remove(sibling)
    os.remove(other)
    cs = scan(catalog, [inside])  # a file root: its folder's other rows are not below the roots
    assert cs.removed == [] and cs.unchanged == 1 and cs.new == []


def test_overlapping_roots_see_each_file_once(tmp_path):
    root = tmp_path / "archive"
    write(root / "1.jpg", b"1")
    write(root / "sub" / "2.jpg", b"2")
    catalog = Catalog(tmp_path / "catalog.sqlite")
    roots = [str(root), str(root / "sub"), str(root / "sub" / "2.jpg"), str(root)]
    assert walk_roots(normalize_roots(roots)) == [str(root)]
    cs = scan(catalog, roots)
    assert sorted(f["path"] for f in cs.new) == [str(root / "1.jpg"), str(root / "sub" / "2.jpg")]


def test_holds_one_folder_of_rows_at_a_time(tmp_path):
    root = tmp_path / "archive"
    paths = [write(root / f"f{k}" / f"{i}.jpg", f"{k}-{i}".encode()) for k in range(5) for i in range(20)]
    catalog = Catalog(tmp_path / "catalog.sqlite")
    catalogue(catalog, paths)
    largest = 0
    fetch = catalog.rows_in_folder

    def rows_in_folder(folder):
        nonlocal largest
        rows = fetch(folder)
        largest = max(largest, len(rows))
        return rows

    roots = [str(root)]
    cs = diff_by_folder(walk(roots, []), rows_in_folder, catalog.folders_under(roots), roots, {})
    assert cs.unchanged == 100 and largest == 20
