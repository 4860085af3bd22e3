"""The database folder: a deleted, damaged or read-only catalog, and `check` while an indexer runs."""
from __future__ import annotations

import fcntl
import hashlib
import os
import shutil
import subprocess
import sys
import time

import numpy as np
import pytest
from click.testing import CliRunner
from PIL import Image

from index.api import Archive, ArchiveError
from index.cli import main

REPO = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _folder(path, n, seed=0):
    path.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    for i in range(n):
        Image.fromarray(rng.integers(0, 255, (48, 56, 3), dtype=np.uint8)).save(path / f"img-{i:03d}.png")
    return path


@pytest.fixture(scope="module")
def indexed(tmp_path_factory):
    """A small archive to copy: (images folder, database folder)."""
    root = tmp_path_factory.mktemp("dbfolder")
    imgs = _folder(root / "imgs", 6)
    with Archive.open(root / "db", create=True, layers=["colour"]) as archive:
        archive.add([imgs], progress=False)
    assert not (root / "db" / "catalog.sqlite-wal").exists()  # closed: the whole catalog is in its file
    return imgs, root / "db"


def _copy(indexed, tmp_path):
    imgs, db = indexed
    shutil.copytree(db, tmp_path / "db")
    return imgs, tmp_path / "db"


def _stores(db):
    return {p.relative_to(db): hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted((db / "stores").rglob("*"))
            if p.is_file()}


def _commands(imgs, db):
    return {"info": ["info", "--db", db], "check": ["check", "--db", db], "repair": ["check", "--db", db, "--repair"],
            "search": ["search", imgs / "img-001.png", "--db", db, "-k", "2"], "index": ["index", imgs, "--db", db, "-q"],
            "duplicates": ["duplicates", "--db", db, "--threshold", "0.99"], "roots": ["roots", "list", "--db", db]}


def _plain(out) -> list[str]:
    """The lines of an error that reached the user: no traceback, no exception escaping the CLI."""
    assert out.exception is None or isinstance(out.exception, SystemExit), repr(out.exception)
    assert "Traceback" not in out.output
    return [line for line in out.output.splitlines() if line.strip()]


def test_a_deleted_catalog_is_refused_in_one_line_and_nothing_is_created_or_discarded(indexed, tmp_path):
    imgs, db = _copy(indexed, tmp_path)
    (db / "catalog.sqlite").unlink()
    stores = _stores(db)
    runner = CliRunner()
    for name, argv in _commands(imgs, db).items():
        out = runner.invoke(main, [str(a) for a in argv])
        lines = _plain(out)
        assert out.exit_code != 0, name
        assert len(lines) == 1 and "has no catalog.sqlite" in lines[0] and "backup" in lines[0], (name, lines)
        assert not (db / "catalog.sqlite").exists(), f"{name} created an empty catalog"
    assert _stores(db) == stores  # `check --repair` discarded no descriptor
    from web import create_app

    with pytest.raises(ArchiveError, match="has no catalog.sqlite"):  # `serve` opens the archive the same way
        create_app({"KINSCOPE_DB": str(db)})


def test_an_empty_catalog_beside_stores_is_refused(indexed, tmp_path):
    imgs, db = _copy(indexed, tmp_path)
    (db / "catalog.sqlite").write_bytes(b"")  # what earlier versions left after a deleted catalog
    with pytest.raises(ArchiveError, match="is empty while the vector stores hold descriptors"):
        Archive.open(db)


@pytest.mark.parametrize("damage", ["cut to 4 KiB", "3 KB at 0", "3 KB at 4096", "3 KB at 8192", "3 KB at 20000",
                                    "3 KB at 40000"])
def test_a_damaged_catalog_gives_one_plain_line_and_is_never_written(indexed, tmp_path, damage):
    imgs, db = _copy(indexed, tmp_path)
    path = db / "catalog.sqlite"
    if damage.startswith("cut"):
        os.truncate(path, 4096)
    else:
        with open(path, "r+b") as fh:
            fh.seek(int(damage.split()[-1]))
            fh.write(np.random.default_rng(1).integers(0, 256, 3000, dtype=np.uint8).tobytes())
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    stores = _stores(db)
    runner = CliRunner()
    for name, argv in _commands(imgs, db).items():
        out = runner.invoke(main, [str(a) for a in argv])
        lines = _plain(out)
        if name in ("check", "repair", "index"):
            assert out.exit_code != 0, (name, lines)  # the damage is always found before anything is written
            assert any("damaged" in line for line in lines), (name, lines)
        if out.exit_code == 2:
            assert len(lines) == 1 and lines[0].startswith("kinscope: ") and "damaged" in lines[0], (name, lines)
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before and _stores(db) == stores


def _read_only_mounts_work() -> bool:
    """Tests run as root, whom chmod does not stop: a read-only bind mount in a private mount
    namespace (unshare -m) is what makes a folder truly read-only here."""
    if shutil.which("unshare") is None or sys.platform != "linux":
        return False
    probe = subprocess.run(["unshare", "-m", "sh", "-c", "mount --bind /tmp /tmp && mount -o remount,ro,bind /tmp /tmp "
                            "&& ! touch /tmp/.kinscope-ro-probe"], capture_output=True)
    return probe.returncode == 0


def _in_read_only(db, argv, code=None):
    """Run `python -m index ARGV` (or python -c CODE) with `db` mounted read-only."""
    python = [sys.executable, "-m", "index", *map(str, argv)] if code is None else [sys.executable, "-c", code]
    script = 'mount --bind "$0" "$0" && mount -o remount,ro,bind "$0" "$0" && exec "$@"'
    env = {**os.environ, "PYTHONPATH": REPO, "KINSCOPE_TEST_DB": str(db)}
    return subprocess.run(["unshare", "-m", "sh", "-c", script, str(db), *python], capture_output=True, text=True,
                          env=env, timeout=300)


SERVE = """
import os
from web import create_app
client = create_app({"KINSCOPE_DB": os.environ["KINSCOPE_TEST_DB"]}).test_client()
found = client.get("/api/search?item=1&layer=colour&k=3")
thumb = client.get("/media/items/2/thumbnail")
print(found.status_code, len(found.get_json()["results"]), thumb.status_code, thumb.data[:2] == b"\\xff\\xd8")
"""


@pytest.mark.skipif(not _read_only_mounts_work(), reason="no read-only bind mount here (needs unshare -m and mount "
                    "rights); tests run as root, so chmod cannot make a folder read-only")
def test_a_read_only_database_folder_serves_searches(indexed, tmp_path):
    imgs, db = _copy(indexed, tmp_path)
    out = _in_read_only(db, ["search", imgs / "img-001.png", "--db", db, "-k", "3", "--json"])
    assert out.returncode == 0, out.stderr
    assert '"path": "' + str(imgs / "img-001.png") in out.stdout
    out = _in_read_only(db, ["info", "--db", db])
    assert out.returncode == 0 and "6 indexed" in out.stdout, out.stderr
    out = _in_read_only(db, ["check", "--db", db])
    assert out.returncode == 0 and "everything agrees" in out.stdout, out.stderr
    out = _in_read_only(db, [], code=SERVE)  # the page's app, as `serve` runs it
    assert out.stdout.split() == ["200", "3", "200", "True"], out.stderr
    assert not (db / "thumbs").exists()  # no cache written
    out = _in_read_only(db, ["index", imgs, "--db", db, "-q"])
    assert out.returncode == 2 and out.stderr.strip().count("\n") == 0 and "Read-only file system" in out.stderr


@pytest.mark.skipif(not _read_only_mounts_work(), reason="no read-only bind mount here (needs unshare -m and mount "
                    "rights); tests run as root, so chmod cannot make a folder read-only")
def test_a_read_only_folder_with_a_journal(indexed, tmp_path):
    imgs, db = _copy(indexed, tmp_path)
    # A writer killed before SQLite folded its journal into the file: -wal and -shm stay behind.
    code = ("import os, sqlite3; c = sqlite3.connect(os.environ['CAT']); c.execute('pragma wal_autocheckpoint=0'); "
            "c.execute(\"insert into failures(path, reason) values ('/x.png', 'only in the journal')\"); c.commit(); "
            "os._exit(0)")
    subprocess.run([sys.executable, "-c", code], env={**os.environ, "CAT": str(db / "catalog.sqlite")}, check=True)
    assert (db / "catalog.sqlite-wal").stat().st_size > 0 and (db / "catalog.sqlite-shm").exists()
    out = _in_read_only(db, ["info", "--db", db])
    assert out.returncode == 0 and "only in the journal" in out.stdout, out.stderr  # read through the journal
    (db / "catalog.sqlite-shm").unlink()  # SQLite cannot read that journal without writing: refused
    out = _in_read_only(db, ["search", imgs / "img-001.png", "--db", db])
    assert out.returncode == 2 and len(out.stderr.strip().splitlines()) == 1, out.stderr
    assert "read-only" in out.stderr and "journal" in out.stderr and "Traceback" not in out.stderr


# --- check while an indexer runs ---------------------------------------------------------------
def _hold_the_indexer_lock(db):
    fh = open(db / "indexer.lock", "a+")
    fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
    return fh


def _mid_run_state(imgs, db):
    """What an indexer leaves between saving its stores and marking the batch in the catalog: new rows
    still pending, their descriptors already in the store."""
    archive = Archive.open(db)
    _folder(imgs, 9)  # three new files
    run = archive.catalog.start_run([str(imgs)])
    new = archive.catalog.insert_pending([{"path": str(imgs / f"img-{i:03d}.png"), "size": 1, "mtime": 1.0}
                                          for i in (6, 7, 8)], run)
    writer = archive.indexer.writer("colour")
    writer.add(np.array(new), writer.reconstruct(np.array([1, 2, 3])))
    archive.indexer.save_stores()
    archive.close()


def test_check_during_a_run_offers_no_repair_and_calls_nothing_interrupted(indexed, tmp_path):
    imgs, db = _copy(indexed, tmp_path)
    imgs = shutil.copytree(imgs, tmp_path / "imgs")
    _mid_run_state(imgs, db)
    lock = _hold_the_indexer_lock(db)
    try:
        report = Archive.open(db).check()
        assert report["ok"], report["findings"]
        assert not [f for f in report["findings"] if "interrupted" in f["message"] or "--repair" in f["fix"]]
        assert any("not committed yet" in f["message"] for f in report["findings"])
        out = CliRunner().invoke(main, ["check", "--db", str(db), "--repair"])
        assert out.exit_code == 2 and "another kinscope indexer" in out.output
    finally:
        lock.close()
    report = Archive.open(db).check()  # no indexer now: the same state is an interrupted run
    assert not report["ok"] and any("interrupted run" in f["message"] for f in report["findings"])


def test_check_rereads_when_the_indexer_commits_meanwhile(indexed, tmp_path, monkeypatch):
    """A commit between reading the catalog and the stores: the comparison is made again, on one state."""
    import index.ingest.check as check_module

    imgs, db = _copy(indexed, tmp_path)
    lock = _hold_the_indexer_lock(db)
    calls = {"n": 0}
    real = check_module._check_layer

    def commit_meanwhile(archive, layer, ok_ids, report, running=False):
        calls["n"] += 1
        if calls["n"] == 1:  # the indexer checkpoints while check reads: a new generation, one id fewer
            writer = Archive.open(db)
            writer.indexer.writer("colour").remove(np.array([ok_ids[0]]))
            writer.catalog.delete_images([int(ok_ids[0])])
            writer.indexer.save_stores()
        return real(archive, layer, ok_ids, report, running)

    monkeypatch.setattr(check_module, "_check_layer", commit_meanwhile)
    try:
        report = Archive.open(db).check()
    finally:
        lock.close()
    assert calls["n"] == 2 and report["ok"], report["findings"]
    assert report["checked"]["images"] == 5 and report["checked"]["layer colour"] == 5


def test_check_against_a_real_running_indexer(tmp_path):
    imgs = _folder(tmp_path / "imgs", 40, seed=7)
    db = tmp_path / "db"
    Archive.open(db, create=True, layers=["colour", "objects"]).add([imgs / "img-000.png"], progress=False)
    cmd = [sys.executable, "-m", "index", "index", str(imgs), "--db", str(db), "-q", "--batch-size", "2",
           "--checkpoint-every", "2"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    reports = []
    try:
        while proc.poll() is None and len(reports) < 40:
            reports.append(Archive.open(db).check())
    finally:
        assert proc.wait(timeout=300) == 0
    during = [r for r in reports if r["checked"]["images"] < 40]  # taken while the run was committing
    print(f"{len(reports)} checks, {len(during)} during the run")
    assert during
    for report in reports:
        offered = [f for f in report["findings"] if "--repair" in f["fix"] or "interrupted" in f["message"]]
        assert not offered and report["ok"], report["findings"]
    assert Archive.open(db).check()["ok"]


# --- filters ---------------------------------------------------------------------------------
def test_impossible_dates_are_refused(indexed, tmp_path):
    from web import create_app

    imgs, db = _copy(indexed, tmp_path)
    client = create_app({"KINSCOPE_DB": str(db), "TESTING": True}).test_client()
    for value in ("2026-13-45", "2026-02-30", "2026-1-1"):
        response = client.get(f"/api/search?item=1&layer=colour&date_from={value}")
        assert response.status_code == 400 and "date_from" in response.get_json()["error"], value
        if value != "2026-1-1":  # (that one is refused by its form already)
            assert "is not a real date" in response.get_json()["error"], value  # params.date, before any search
    assert client.get("/api/search?item=1&layer=colour&date_to=2026-02-28").status_code == 200
    with pytest.raises(ArchiveError, match="real date"):
        Archive.open(db).search(1, layer="colour", date_from="2026-13-45")


def test_nothing_in_the_database_folder_changes_while_reading(indexed, tmp_path):
    """Reading commands leave the catalog as it was (no schema change, no index created by a reader)."""
    imgs, db = _copy(indexed, tmp_path)
    before = hashlib.sha256((db / "catalog.sqlite").read_bytes()).hexdigest()
    time.sleep(0.01)
    for argv in (["info", "--db", db], ["roots", "list", "--db", db], ["check", "--db", db]):
        assert CliRunner().invoke(main, [str(a) for a in argv]).exit_code == 0
    assert hashlib.sha256((db / "catalog.sqlite").read_bytes()).hexdigest() == before
