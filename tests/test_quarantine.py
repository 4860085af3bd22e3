"""Quarantine safety: the file that stays is verified before every move, links are never moved, every
move is journaled so that restore puts back every file after a fault at any step, manifests never
overwrite one another, and bad input gets one plain line.

Images are scikit-image's bundled pictures (`skimage.data`, via conftest.sample_images). Byte-for-byte
comparisons use Python's hashlib SHA-256 (FIPS 180-4) and the files' bytes, independent of kinscope.
"""
from __future__ import annotations

import errno
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from click.testing import CliRunner

from index.duplicates import move_journal, quarantine
from index.cli import main
from index.duplicates.quarantine import QuarantineError, QuarantineStopped, move, restore

NAMES = ("astronaut", "camera", "coffee", "chelsea")
REPO = Path(__file__).resolve().parents[1]


def sha256(path) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def snapshot(root) -> dict:
    """Every file below root (links as their target path): relative path -> (bytes or link, mtime)."""
    out = {}
    for p in sorted(Path(root).rglob("*")):
        if p.is_symlink():
            out[p.relative_to(root)] = ("link", os.readlink(p))
        elif p.is_file():
            out[p.relative_to(root)] = (p.read_bytes(), p.stat().st_mtime)
    return out


def byte_copies(root: Path, sample_images, names=NAMES) -> dict:
    """Originals plus two byte copies each in folders of their own; returns a duplicates document of
    exact groups whose keeper is the original (the shape Archive.duplicates returns)."""
    groups = []
    for n, name in enumerate(names):
        original = root / "scans" / f"{name}.png"
        original.parent.mkdir(parents=True, exist_ok=True)
        sample_images[name].save(original)
        members = [original]
        for c in (1, 2):
            copy = root / "copies" / f"set{c}" / name / f"{name}.png"
            copy.parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(original, copy)
            members.append(copy)
        groups.append({"id": n + 1, "kind": "exact", "keeper": n * 10,
                       "members": [{"id": n * 10 + i, "path": str(p), "size": p.stat().st_size, "sha256": sha256(p)}
                                   for i, p in enumerate(members)]})
    return {"groups": groups, "rules": {"keeper": "the original (test document)"}}


def only_manifests(folder: Path) -> list[Path]:
    return sorted(folder.glob("kinscope-quarantine-*.json"))


# --- the file that stays must be on disk ---------------------------------------------------------------------
def test_a_vanished_keeper_stops_its_group_from_moving(tmp_path, sample_images):
    root = tmp_path / "arch"
    doc = byte_copies(root, sample_images)
    os.remove(root / "scans" / "camera.png")  # deleted by hand after indexing
    before = snapshot(root)
    report = move(doc, tmp_path / "q", [str(root)], apply=True)
    by_name = {}
    for f in report["files"]:
        by_name.setdefault(Path(f["original"]).name, []).append(f)
    assert all(f["status"] == "skipped" and "not verified: the file is no longer there" in f["reason"]
               for f in by_name["camera.png"])
    assert all(f["status"] == "moved" for n, fs in by_name.items() if n != "camera.png" for f in fs)
    assert snapshot(root)[Path("copies/set1/camera/camera.png")] == before[Path("copies/set1/camera/camera.png")]


def test_a_keeper_of_another_size_or_content_is_not_trusted(tmp_path, sample_images):
    root = tmp_path / "arch"
    doc = byte_copies(root, sample_images, names=("astronaut", "coffee"))
    (root / "scans" / "astronaut.png").write_bytes(b"replaced")  # other size
    data = bytearray((root / "scans" / "coffee.png").read_bytes())
    data[-20] ^= 0xFF  # same size, other content: only the hash can tell
    (root / "scans" / "coffee.png").write_bytes(bytes(data))
    dry = move(doc, tmp_path / "q", [str(root)])
    sizes = [f for f in dry["files"] if "astronaut" in f["original"]]
    assert all(f["status"] == "skipped" and "size differs" in f["reason"] for f in sizes)
    before = snapshot(root)
    report = move(doc, tmp_path / "q", [str(root)], apply=True)  # the hash is only read when moving
    assert all(f["status"] == "skipped" for f in report["files"]) and snapshot(root) == before
    assert [("content changed since it was indexed" in f["reason"]) for f in report["files"]] == [False] * 2 + [True] * 2


def test_renamed_root_then_apply_keeps_a_real_copy_of_every_picture(tmp_path, sample_images):
    # Issue 22, section 1: index arch, rename it to photos, index photos: the catalog may list both.
    from tests.test_duplicates import make_folder

    arch = make_folder(tmp_path / "arch", sample_images, names=("astronaut", "coffee", "camera", "chelsea"))
    db, runner = tmp_path / "db", CliRunner()
    assert runner.invoke(main, ["index", str(arch), "--db", str(db)]).exit_code == 0
    photos = tmp_path / "photos"
    arch.rename(photos)
    assert runner.invoke(main, ["index", str(photos), "--db", str(db)]).exit_code == 0
    before = snapshot(photos)
    q = tmp_path / "q"
    res = runner.invoke(main, ["duplicates", "--db", str(db), "--move-to", str(q), "--apply", "-q"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    for g in doc["groups"]:  # a vanished path is never a keeper
        keeper = next(m for m in g["members"] if m["id"] == g["keeper"])
        assert keeper["path"].startswith(str(photos)), g
    after = snapshot(photos)
    moved = {Path(f["original"]).relative_to(photos) for f in doc["quarantine"]["files"] if f["status"] == "moved"}
    assert set(before) - set(after) == moved and all(after[k] == before[k] for k in after)  # the rest untouched
    for name in ("astronaut.png", "camera.png", "chelsea.png"):  # the originals stay where they are
        assert Path("scans") / name in after
    assert Path("scans/coffee.png") in after or Path("exports/coffee-copy.png") in after  # one byte copy stays
    assert Path("exports/web/astronaut-small.jpg") in moved  # a real duplicate still leaves


def test_verification_alone_protects_a_stale_keeper(tmp_path, sample_images):
    """Even if the document names a vanished path as keeper (a catalog with stale rows and no rule to stop
    it), the move verifies the keeper on disk and leaves the real files alone."""
    root = tmp_path / "photos"
    doc = byte_copies(root, sample_images)
    for g in doc["groups"]:  # the keeper a stale row would give: a shorter path that no longer exists
        g["members"].append({"id": 999 + g["id"], "path": str(tmp_path / "a" / f"{g['id']}.png"),
                             "size": g["members"][0]["size"], "sha256": g["members"][0]["sha256"]})
        g["keeper"] = 999 + g["id"]
    before = snapshot(root)
    report = move(doc, tmp_path / "q", [str(root)], apply=True)
    assert snapshot(root) == before and report["manifest"] is None
    assert all(f["status"] == "skipped" for f in report["files"])


# --- links ---------------------------------------------------------------------------------------------------
def test_a_link_with_the_shorter_path_is_neither_kept_nor_moved(tmp_path, sample_images):
    arch = tmp_path / "arch"
    (arch / "photos").mkdir(parents=True)
    for n, name in enumerate(("astronaut", "coffee", "camera")):
        sample_images[name].save(arch / "photos" / f"o{n:02d}.png")
    os.symlink("photos/o00.png", arch / "l.png")  # relative file link, shorter path than its target
    shutil.copy2(arch / "photos" / "o01.png", arch / "photos" / "o01-copy.png")
    db, runner = tmp_path / "db", CliRunner()
    assert runner.invoke(main, ["index", str(arch), "--db", str(db)]).exit_code == 0
    before = snapshot(arch)
    res = runner.invoke(main, ["duplicates", "--db", str(db), "--move-to", str(tmp_path / "q"), "--apply", "-q"])
    assert res.exit_code == 0, res.output
    doc = json.loads(res.stdout)
    for g in doc["groups"]:
        keeper = next(m for m in g["members"] if m["id"] == g["keeper"])
        assert not os.path.islink(keeper["path"])
    after = snapshot(arch)
    assert after[Path("photos/o00.png")] == before[Path("photos/o00.png")]  # the real file stays
    assert after[Path("l.png")] == ("link", "photos/o00.png")  # the link is not moved either
    assert Path("photos/o01.png") in after or Path("photos/o01-copy.png") in after


def test_a_linked_folder_indexed_beside_its_target_never_empties_it(tmp_path, sample_images):
    real = tmp_path / "real"
    real.mkdir()
    for n, name in enumerate(("astronaut", "coffee", "camera")):
        sample_images[name].save(real / f"p{n}.png")
    os.symlink(real, tmp_path / "ln")
    db, runner = tmp_path / "db", CliRunner()
    assert runner.invoke(main, ["index", str(real), str(tmp_path / "ln"), "--db", str(db)]).exit_code == 0
    before = snapshot(real)
    res = runner.invoke(main, ["duplicates", "--db", str(db), "--move-to", str(tmp_path / "q"), "--apply", "-q"])
    assert res.exit_code == 0, res.output
    assert snapshot(real) == before
    for f in json.loads(res.stdout).get("quarantine", {}).get("files", []):
        assert f["status"] == "skipped", f


# --- faults at every step --------------------------------------------------------------------------------------
@pytest.mark.parametrize("when", ["before", "after"])
def test_a_fault_after_every_move_leaves_a_manifest_that_restores_everything(tmp_path, sample_images, monkeypatch,
                                                                             when):
    base = tmp_path / "base"
    doc0 = byte_copies(base, sample_images)
    total = sum(len(g["members"]) - 1 for g in doc0["groups"])
    real_rename = os.rename
    for n in range(total):
        root = tmp_path / f"run{n}" / "arch"
        shutil.copytree(base, root, copy_function=shutil.copy2)
        doc = json.loads(json.dumps(doc0).replace(str(base), str(root)))
        before = snapshot(root)
        calls = []

        def faulty(src, dst):
            calls.append(src)
            if len(calls) == n + 1 and when == "before":
                raise RuntimeError("injected fault")
            real_rename(src, dst)
            if len(calls) == n + 1:
                raise RuntimeError("injected fault")

        monkeypatch.setattr(os, "rename", faulty)
        q = root.parent / "q"
        with pytest.raises(QuarantineStopped) as stop:
            move(doc, q, [str(root)], apply=True)
        monkeypatch.setattr(os, "rename", real_rename)
        moved = n + (when == "after")
        assert f"after moving {n} of {total} files (injected fault)" in str(stop.value)
        assert "kinscope restore" in str(stop.value) and str(only_manifests(q)[0]) in str(stop.value)
        assert len(before) - len(snapshot(root)) == moved
        manifest = json.loads(only_manifests(q)[0].read_text())
        assert [f["status"] for f in manifest["files"]].count("moved") == n  # the journal knows the n+1th
        report = restore(only_manifests(q)[0], apply=True)
        assert report["ok"], report
        assert snapshot(root) == before  # every file back, byte for byte, with its modification time


KILLER = textwrap.dedent("""
    import json, os, signal, sys
    from index.duplicates.quarantine import move
    doc, dest, root, k, when = json.load(open(sys.argv[1])), sys.argv[2], sys.argv[3], int(sys.argv[4]), sys.argv[5]
    real_rename, calls = os.rename, []
    def rename(src, dst):
        calls.append(src)
        if len(calls) == k and when == "before":
            os.kill(os.getpid(), signal.SIGKILL)
        real_rename(src, dst)
        if len(calls) == k:
            os.kill(os.getpid(), signal.SIGKILL)
    os.rename = rename
    move(doc, dest, [root], apply=True)
""")


def test_kill_9_at_any_step_leaves_a_manifest_that_restores_everything(tmp_path, sample_images):
    base = tmp_path / "base"
    doc0 = byte_copies(base, sample_images, names=("astronaut", "coffee"))
    total = sum(len(g["members"]) - 1 for g in doc0["groups"])
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    for k in range(1, total + 1):
        for when in ("before", "after"):
            root = tmp_path / f"k{k}{when}" / "arch"
            shutil.copytree(base, root, copy_function=shutil.copy2)
            doc_path = root.parent / "doc.json"
            doc_path.write_text(json.dumps(doc0).replace(str(base), str(root)))
            before = snapshot(root)
            q = root.parent / "q"
            proc = subprocess.run([sys.executable, "-c", KILLER, str(doc_path), str(q), str(root), str(k), when],
                                  env=env, capture_output=True, text=True)
            assert proc.returncode == -signal.SIGKILL, proc.stderr
            assert len(before) - len(snapshot(root)) == k - (when == "before")
            report = restore(only_manifests(q)[0], apply=True)
            assert report["ok"], report
            assert snapshot(root) == before, (k, when)


def test_a_full_disk_during_apply_is_one_plain_line_and_restore_undoes_it(tmp_path, sample_images, monkeypatch):
    from tests.test_duplicates import make_folder
    from index.api import Archive

    root = make_folder(tmp_path / "archive", sample_images, names=("astronaut", "coffee", "camera", "chelsea"))
    db = tmp_path / "db"
    with Archive.open(db, create=True, layers=["objects"]) as archive:
        archive.add([root], progress=False)
    before = snapshot(root)
    real_rename, calls = os.rename, []

    def full_after_one(src, dst):
        calls.append(src)
        if len(calls) > 1:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), dst)
        real_rename(src, dst)

    monkeypatch.setattr(os, "rename", full_after_one)
    q, out = tmp_path / "q", tmp_path / "groups.json"
    res = CliRunner().invoke(main, ["duplicates", "--db", str(db), "--move-to", str(q), "--apply", "-q",
                                    "--output", str(out)])
    monkeypatch.setattr(os, "rename", real_rename)
    assert res.exit_code == 2 and "Traceback" not in res.output
    last = res.output.strip().splitlines()[-1]
    assert last.startswith("kinscope: the run stopped after moving 1 of 3 files (No space left on device)")
    assert "kinscope restore" in last
    assert json.loads(out.read_text())["quarantine"]["stopped"] == "No space left on device"
    manifest = only_manifests(q)[0]
    statuses = [f["status"] for f in json.loads(manifest.read_text())["files"]]
    assert statuses == ["moved", "skipped", "not moved"], statuses  # the manifest says what happened
    again = CliRunner().invoke(main, ["restore", str(manifest), "--apply"])
    assert again.exit_code == 0 and "restored" in again.output
    assert snapshot(root) == before


ENOSPC_DRIVER = textwrap.dedent("""
    import json, os, shutil, subprocess, sys
    from index.duplicates.quarantine import QuarantineError, QuarantineStopped, move, restore
    mnt, src, inodes = sys.argv[1], sys.argv[2], int(sys.argv[3])
    shutil.copytree(src, os.path.join(mnt, "arch"), copy_function=shutil.copy2)
    doc = json.load(open(os.path.join(src, "..", "doc.json")))
    doc = json.loads(json.dumps(doc).replace(src, os.path.join(mnt, "arch")))
    used = int(subprocess.run(["df", "--output=iused", mnt], capture_output=True, text=True).stdout.split()[-1])
    subprocess.run(["mount", "-o", f"remount,nr_inodes={used + inodes}", mnt], check=True)
    out = {}
    try:
        report = move(doc, os.path.join(mnt, "q"), [os.path.join(mnt, "arch")], apply=True)
        out["result"] = "finished"
    except QuarantineStopped as exc:
        out["result"], out["message"] = "stopped", str(exc)
    except QuarantineError as exc:
        out["result"], out["message"] = "refused", str(exc)
    subprocess.run(["mount", "-o", "remount,nr_inodes=100000", mnt], check=True)  # space freed
    manifests = sorted(f for f in os.listdir(os.path.join(mnt, "q")) if f.endswith(".json")) \\
        if os.path.isdir(os.path.join(mnt, "q")) else []
    if manifests:
        out["restore"] = restore(os.path.join(mnt, "q", manifests[0]), apply=True)["ok"]
    out["files"] = {os.path.relpath(os.path.join(d, f), os.path.join(mnt, "arch")): open(os.path.join(d, f), "rb").read().hex()
                    for d, _, fs in os.walk(os.path.join(mnt, "arch")) for f in fs}
    print(json.dumps(out))
""")


def _can_mount_tmpfs() -> str | None:
    if not shutil.which("unshare") or os.geteuid() != 0:
        return "needs root and unshare to mount a small tmpfs in a private mount namespace"
    probe = subprocess.run(["unshare", "-m", "--propagation", "private", "sh", "-c",
                            "mount -t tmpfs -o size=1m tmpfs /mnt && umount /mnt"], capture_output=True)
    return None if probe.returncode == 0 else "this machine does not allow mounting a tmpfs: " + probe.stderr.decode()


@pytest.mark.parametrize("inodes", [2, 4, 6, 9])
def test_a_real_full_disk_on_a_small_tmpfs(tmp_path, sample_images, inodes):
    """tmpfs with its inode count capped just above what the archive uses: the quarantine folder and the
    run's three files take four, each new quarantine subfolder one more (the first move needs two, the
    second two, the third one), so the run is refused before the first move (2: the journal cannot be
    created) or stops with ENOSPC after 0, 1 or 3 moves (4, 6, 9)."""
    why = _can_mount_tmpfs()
    if why:
        pytest.skip(why)
    src = tmp_path / "src" / "arch"
    doc = byte_copies(src, sample_images)
    (src.parent / "doc.json").write_text(json.dumps(doc))
    expected = {str(p.relative_to(src)): p.read_bytes().hex() for p in src.rglob("*") if p.is_file()}
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    script = f'mount -t tmpfs -o size=64m tmpfs "{mnt}" && exec "{sys.executable}" -c "$0" "{mnt}" "{src}" {inodes}'
    proc = subprocess.run(["unshare", "-m", "--propagation", "private", "sh", "-c", script, ENOSPC_DRIVER],
                          env={**os.environ, "PYTHONPATH": str(REPO)}, capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    if inodes < 4:
        assert out["result"] == "refused" and "nothing was moved" in out["message"], out
    else:
        assert out["result"] == "stopped" and "No space left on device" in out["message"], out
        assert out["restore"] is True
    assert out["files"] == expected  # every file back where it was, byte for byte


# --- names, checks before moving, and restore's input ---------------------------------------------------------
def test_two_runs_in_the_same_second_get_two_manifests_and_both_restore(tmp_path, sample_images, monkeypatch):
    root = tmp_path / "arch"
    doc = byte_copies(root, sample_images)
    before = snapshot(root)
    monkeypatch.setattr(quarantine, "timestamp", lambda: "20260101T000000.000000Z")  # one instant for both
    first = move({**doc, "groups": doc["groups"][:2]}, tmp_path / "q", [str(root)], apply=True)
    second = move({**doc, "groups": doc["groups"][2:]}, tmp_path / "q", [str(root)], apply=True)
    assert first["manifest"] != second["manifest"] and len(only_manifests(tmp_path / "q")) == 2
    assert len(snapshot(root)) == len(before) - 8
    for report in (first, second):
        assert restore(report["manifest"], apply=True)["ok"]
    assert snapshot(root) == before


def test_exclusive_names_never_reuse_a_taken_name(tmp_path):
    (tmp_path / "x.json").write_text("someone else's")
    base, fds = move_journal.create_exclusive(str(tmp_path), "x", (".json", ".journal"))
    for fd in fds:
        os.close(fd)
    assert base == str(tmp_path / "x-2") and (tmp_path / "x.json").read_text() == "someone else's"
    assert not (tmp_path / "x.journal").exists()  # the first attempt's partial files were taken back


def test_an_unwritable_output_is_refused_before_anything_moves(tmp_path):
    runner = CliRunner()
    res = runner.invoke(main, ["duplicates", "--db", str(tmp_path), "--move-to", str(tmp_path / "q"), "--apply",
                               "--output", str(tmp_path / "no-such-folder" / "out.json")])
    assert res.exit_code == 2 and "Traceback" not in res.output
    assert res.output.strip() == (f"kinscope: cannot write {tmp_path / 'no-such-folder' / 'out.json'}: "
                                  "No such file or directory; nothing was moved")


def test_not_enough_space_for_the_manifest_is_refused_before_anything_moves(tmp_path, sample_images, monkeypatch):
    root = tmp_path / "arch"
    doc = byte_copies(root, sample_images)
    before = snapshot(root)
    monkeypatch.setattr(quarantine, "SPACE_MARGIN", 1 << 62)  # more than any disk has free
    with pytest.raises(QuarantineError) as refused:
        move(doc, tmp_path / "q", [str(root)], apply=True)
    assert "not enough free space" in str(refused.value) and "nothing was moved" in str(refused.value)
    assert snapshot(root) == before and not only_manifests(tmp_path / "q")


def test_a_read_only_quarantine_folder_is_one_plain_line(tmp_path, sample_images, monkeypatch):
    root = tmp_path / "arch"
    doc = byte_copies(root, sample_images)
    real_open = os.open

    def read_only(path, flags, *args):
        if str(path).startswith(str(tmp_path / "q")) and flags & os.O_CREAT:
            raise OSError(errno.EROFS, os.strerror(errno.EROFS), path)
        return real_open(path, flags, *args)

    monkeypatch.setattr(os, "open", read_only)
    with pytest.raises(QuarantineError) as refused:
        move(doc, tmp_path / "q", [str(root)], apply=True)
    assert str(refused.value) == (f"cannot write the manifest in the quarantine folder {tmp_path / 'q'}: "
                                  "Read-only file system; nothing was moved")


def test_restore_reports_bad_entries_in_plain_words_and_restores_the_rest(tmp_path, sample_images):
    root = tmp_path / "arch"
    doc = byte_copies(root, sample_images)
    before = snapshot(root)
    report = move(doc, tmp_path / "q", [str(root)], apply=True)
    path = Path(report["manifest"])
    manifest = json.loads(path.read_text())
    manifest["files"][0].pop("sha256")
    manifest["files"][1]["original"] = None
    manifest["files"][2] = 7
    manifest["files"][3]["quarantined"] = "/etc/passwd"  # outside the quarantine folder: never followed
    path.write_text(json.dumps(manifest))
    (path.with_suffix(".journal")).unlink()  # the hand-edited manifest alone
    res = CliRunner().invoke(main, ["restore", str(path), "--apply"])
    assert res.exit_code == 2 and "Traceback" not in res.output
    assert "bad manifest entry 1: 'sha256' must be 64 hexadecimal digits, not null" in res.output
    assert "bad manifest entry 2: 'original' must be an absolute path, not null" in res.output
    assert "bad manifest entry 3: an entry must be an object, not int" in res.output
    assert "its quarantine path lies outside the manifest's folder" in res.output
    lines = res.output.splitlines()
    assert sum(line.startswith("restored") for line in lines) == 4 and "4 of 8 files could not be restored" in res.output
    assert len(snapshot(root)) == len(before) - 4
    for broken in ({"format": "kinscope-quarantine/2", "files": None}, [1, 2], "text"):
        path.write_text(json.dumps(broken))
        res = CliRunner().invoke(main, ["restore", str(path), "--apply"])
        assert res.exit_code == 2 and len(res.output.strip().splitlines()) == 1 and "Traceback" not in res.output


def test_restore_from_a_read_only_quarantine_says_why_per_file(tmp_path, sample_images, monkeypatch):
    root = tmp_path / "arch"
    doc = byte_copies(root, sample_images, names=("astronaut",))
    report = move(doc, tmp_path / "q", [str(root)], apply=True)

    def read_only(src, dst):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), src)

    monkeypatch.setattr(os, "rename", read_only)
    res = CliRunner().invoke(main, ["restore", report["manifest"], "--apply"])
    assert res.exit_code == 2 and "Traceback" not in res.output
    assert res.output.count("could not move back: Read-only file system") == 2


def test_a_quarantine_folder_moved_elsewhere_still_restores(tmp_path, sample_images):
    root = tmp_path / "arch"
    doc = byte_copies(root, sample_images, names=("astronaut", "coffee"))
    before = snapshot(root)
    report = move(doc, tmp_path / "q", [str(root)], apply=True)
    (tmp_path / "q").rename(tmp_path / "q-archived")  # the user tidied the quarantine away
    manifest = tmp_path / "q-archived" / Path(report["manifest"]).name
    assert restore(manifest, apply=True)["ok"]
    assert snapshot(root) == before
