"""Never lose an overnight run: kills mid-run, damaged stores, and `kinscope check` / `--repair`."""
from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from PIL import Image

from index.api import Archive


def _folder(path, n, seed=0, size=(80, 64)):
    path.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    for i in range(n):
        base = rng.integers(0, 255, 3)
        noise = rng.integers(0, 90, (size[1], size[0], 3))
        Image.fromarray(np.clip(base + noise, 0, 255).astype(np.uint8)).save(path / f"img-{i:03d}.png")
    return path


def _agrees(db):
    archive = Archive.open(db)
    report = archive.check()
    ok = sorted(archive.catalog.ids_with_status("ok"))
    stores = {l: sorted(archive.store(l).ids().tolist()) for l in archive.layer_names}
    return archive, report, ok, stores


def test_check_passes_on_a_healthy_archive(tmp_path):
    Archive.open(tmp_path / "db", create=True, layers=["colour"]).add([_folder(tmp_path / "imgs", 5)], progress=False)
    archive, report, ok, stores = _agrees(tmp_path / "db")
    assert report["ok"], report["findings"]
    assert report["checked"]["sqlite"] == "ok" and report["checked"]["images"] == 5


def test_check_finds_orphans_gaps_and_temp_files_and_repair_fixes_them(tmp_path):
    imgs = _folder(tmp_path / "imgs", 6)
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour", "objects"])
    archive.add([imgs], progress=False)
    store = archive.indexer.writer("objects")
    store.add(np.array([777]), store.reconstruct(np.array([2])))  # an orphan descriptor
    store.remove(np.array([4]))  # an indexed image without one
    archive.indexer.save_stores()
    (tmp_path / "db" / ".vectors-objects.faiss.abc.tmp").write_bytes(b"half written")
    report = Archive.open(tmp_path / "db").check()
    messages = " | ".join(f["message"] for f in report["findings"])
    assert not report["ok"]
    assert "1 descriptors belong to no indexed image" in messages
    assert "1 indexed images have no descriptor" in messages
    assert "temporary files" in messages
    repaired = Archive.open(tmp_path / "db").repair(progress=False)
    assert repaired["reembedded"] == 1 and repaired["temporary_files"] == 1  # only the missing one
    archive, report, ok, stores = _agrees(tmp_path / "db")
    assert report["ok"], report["findings"]
    assert all(ids == ok for ids in stores.values()) and len(ok) == 6


def test_an_unreadable_segment_is_set_aside_and_its_images_embedded_again(tmp_path):
    imgs = _folder(tmp_path / "imgs", 4)
    Archive.open(tmp_path / "db", create=True, layers=["colour"]).add([imgs], progress=False)
    segment = Archive.open(tmp_path / "db").manifest["stores"]["colour"]["segments"][0]["file"]
    (tmp_path / "db" / segment).write_bytes(b"\0" * 100)
    report = Archive.open(tmp_path / "db").check()
    assert not report["ok"] and "is missing or unreadable" in report["findings"][0]["message"]
    repaired = Archive.open(tmp_path / "db").repair(progress=False)
    assert repaired["reembedded"] == 4 and repaired["set_aside"] == [segment + ".unreadable"]
    assert (tmp_path / "db" / (segment + ".unreadable")).exists()  # nothing is deleted
    assert Archive.open(tmp_path / "db").check()["ok"]


def test_an_unreadable_trained_index_sets_the_layer_aside_and_rebuilds_it(tmp_path):
    imgs = _folder(tmp_path / "imgs", 12)
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    archive.manifest["vector_index"] = {"flat_max": 8, "train_per_list": 2}  # IVF from 8 images (a test size)
    archive.add([imgs], progress=False)
    state = Archive.open(tmp_path / "db").manifest["stores"]["colour"]
    assert state["kind"] == "ivf-sq8" and state["codec"]
    (tmp_path / "db" / state["codec"]).write_bytes(b"\0" * 100)
    assert not Archive.open(tmp_path / "db").check()["ok"]
    repaired = Archive.open(tmp_path / "db").repair(progress=False)
    assert repaired["reembedded"] == 12
    assert sorted(repaired["set_aside"]) == sorted(f + ".unreadable" for f in
                                                   [state["codec"]] + [s["file"] for s in state["segments"]])
    archive, report, ok, stores = _agrees(tmp_path / "db")
    assert report["ok"], report["findings"]
    assert stores["colour"] == ok and len(ok) == 12


def test_check_command_exit_codes(tmp_path):
    from click.testing import CliRunner

    from index.cli import main

    Archive.open(tmp_path / "db", create=True, layers=["colour"]).add([_folder(tmp_path / "imgs", 3)], progress=False)
    runner = CliRunner()
    out = runner.invoke(main, ["check", "--db", str(tmp_path / "db")])
    assert out.exit_code == 0 and "everything agrees" in out.output
    archive = Archive.open(tmp_path / "db")
    archive.indexer.writer("colour").remove(np.array([1]))
    archive.indexer.save_stores()
    out = runner.invoke(main, ["check", "--db", str(tmp_path / "db")])
    assert out.exit_code == 1 and "no descriptor" in out.output
    out = runner.invoke(main, ["check", "--db", str(tmp_path / "db"), "--repair"])
    assert out.exit_code == 0 and "everything agrees" in out.output


def _index_cmd(imgs, db):
    return [sys.executable, "-m", "index", "index", str(imgs), "--db", str(db), "-q",
            "--layers", "colour,objects", "--batch-size", "4", "--checkpoint-every", "4"]


def test_sigkill_at_random_moments_loses_nothing(tmp_path):
    """The short form of the crash test: a few SIGKILLs at random moments of a small run."""
    imgs = _folder(tmp_path / "imgs", 48, seed=3)
    db = tmp_path / "db"
    rng = random.Random(11)
    kills = 0
    for attempt in range(4):
        proc = subprocess.Popen(_index_cmd(imgs, db), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        time.sleep(rng.uniform(2.0, 7.0))  # model load takes ~2 s; the kill lands anywhere after it
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            kills += 1
        proc.wait(timeout=60)
    final = subprocess.run(_index_cmd(imgs, db), capture_output=True, text=True, timeout=300)
    assert final.returncode == 0, final.stderr[-2000:]
    archive, report, ok, stores = _agrees(db)
    assert report["ok"], report["findings"]
    assert len(ok) == 48  # every image indexed ...
    rows = list(archive.catalog.db.query("select path from images"))
    assert len({r["path"] for r in rows}) == len(rows) == 48  # ... exactly once
    assert all(ids == ok for ids in stores.values())
    assert kills >= 1


def _wait_for_progress(db, proc, timeout=120):
    """Until the first checkpoint has committed some images (the run is in its embedding loop)."""
    import sqlite3

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            with sqlite3.connect(db / "catalog.sqlite") as con:
                if con.execute("select count(*) from images where status = 'ok'").fetchone()[0] > 0:
                    return
        except sqlite3.Error:
            pass
        time.sleep(0.1)


def test_ctrl_c_stops_after_the_batch_and_says_how_to_resume(tmp_path):
    imgs = _folder(tmp_path / "imgs", 60, seed=4)
    db = tmp_path / "db"
    proc = subprocess.Popen(_index_cmd(imgs, db), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    _wait_for_progress(db, proc)
    proc.send_signal(signal.SIGINT)
    out, err = proc.communicate(timeout=120)
    if proc.returncode == 0:
        pytest.skip("the run finished before the interrupt arrived")
    assert proc.returncode == 130 and "run the same command again to resume" in err.lower()
    again = subprocess.run(_index_cmd(imgs, db), capture_output=True, text=True, timeout=300)
    assert again.returncode == 0
    archive, report, ok, stores = _agrees(db)
    assert report["ok"] and len(ok) == 60


def test_a_full_disk_mid_run_gives_a_clear_error_and_leaves_whole_files(tmp_path, monkeypatch):
    import errno

    import index.db.manifest
    import index.vectors.segments
    import index.vectors.reader
    from index.api import ArchiveError

    imgs = _folder(tmp_path / "imgs", 12)
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    real = index.vectors.reader.atomic_write
    calls = {"n": 0}

    def filling_disk(path, data):
        calls["n"] += 1
        if calls["n"] > 4:  # the first checkpoints succeed, then the disk is full
            raise OSError(errno.ENOSPC, "No space left on device", str(path))
        real(path, data)

    monkeypatch.setattr(index.vectors.reader, "atomic_write", filling_disk)
    monkeypatch.setattr(index.db.manifest, "atomic_write", filling_disk)
    monkeypatch.setattr(index.vectors.segments, "atomic_write", filling_disk)
    with pytest.raises(ArchiveError, match="No space left on device.*Nothing was half-written"):
        archive.add([imgs], progress=False, batch_size=2, checkpoint_every=2)
    monkeypatch.undo()
    assert not list((tmp_path / "db").rglob(".*.tmp"))  # no temporary file left behind
    again = Archive.open(tmp_path / "db")
    again.add([imgs], progress=False)
    archive, report, ok, stores = _agrees(tmp_path / "db")
    assert report["ok"] and len(ok) == 12


def test_a_database_from_a_newer_kinscope_is_refused(tmp_path):
    import json

    from index.api import ArchiveError

    Archive.open(tmp_path / "db", create=True, layers=["colour"]).add([_folder(tmp_path / "imgs", 2)], progress=False)
    manifest = json.loads((tmp_path / "db" / "manifest.json").read_text())
    manifest["format"] = 99
    (tmp_path / "db" / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(ArchiveError, match="newer kinscope"):
        Archive.open(tmp_path / "db")


def test_the_archive_folder_is_never_written_to(tmp_path):
    """Indexing, searching, checking and thumbnails leave every archive file byte-identical."""
    import hashlib

    imgs = _folder(tmp_path / "imgs", 5)

    def snapshot():
        return {p: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime) for p in sorted(imgs.rglob("*"))}

    before = snapshot()
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    archive.add([imgs], progress=False)
    archive.search(str(imgs / "img-001.png"), k=3)
    archive.thumbnail(1)
    archive.check()
    assert snapshot() == before


def test_searching_while_an_indexer_runs_sees_the_last_committed_state(tmp_path):
    imgs = _folder(tmp_path / "imgs", 60, seed=9)
    db = tmp_path / "db"
    Archive.open(db, create=True, layers=["colour", "objects"]).add([imgs / "img-000.png"], progress=False)
    proc = subprocess.Popen(_index_cmd(imgs, db), stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    seen, searches = [], 0
    reader = Archive.open(db)
    while proc.poll() is None and searches < 400:
        reader.refresh()
        committed = set(reader.catalog.ids_with_status("ok"))
        result = reader.search(str(imgs / "img-000.png"), layer="colour", k=100)["results"]
        ids = {r["id"] for r in result}
        assert ids <= committed | set(reader.catalog.ids_with_status("ok"))  # never an uncommitted item
        seen.append(len(ids))
        searches += 1
        time.sleep(0.05)
    assert proc.wait(timeout=300) == 0
    # The reader saw the archive at several sizes while the run went on (so the test observed a run in
    # progress), and never smaller than before.
    assert len(set(seen)) >= 2, seen
    assert seen == sorted(seen), seen
    reader.refresh()
    assert len(reader.search(str(imgs / "img-000.png"), layer="colour", k=100)["results"]) == 60
