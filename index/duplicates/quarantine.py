"""Quarantine: move the non-keepers of duplicate groups into a folder with a manifest, and put them back.

Nothing is ever deleted. A move is a rename on one file system (a quarantine folder on another file
system is refused, since that would need a copy and a delete), never onto an existing file, and only
for a file whose content hash still matches the catalog. Before each move, the file that stays (its
group's keeper) is verified on disk: a regular file reached without any link, of its catalogued size
and SHA-256; otherwise the file stays where it is. Links and files reached through linked folders are
never moved. Every move is recorded before and after it happens in a journal (index/duplicates/move_journal.py),
so `restore` can put back every moved file after a crash, a kill or a full disk. `restore` validates
the manifest, refuses to overwrite, checks each file's hash before moving it back, and can be run
again safely. Without `apply=True` both functions only return the plan.
"""
from __future__ import annotations

import errno
import json
import os

from ..common.errors import ArchiveError
from ..common.files import sha256_file
from ..common.paths import is_inside
from .keeper_evidence import on_disk
from .move_journal import Journal, create_exclusive, fsync_dir, read_journal, reserve, timestamp

MANIFEST_FORMAT = "kinscope-quarantine/2"  # /2 adds the journal and the keepers' size and hash
READABLE_FORMATS = ("kinscope-quarantine/1", MANIFEST_FORMAT)
STOPPING = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EIO}  # errors after which no further move is tried
SPACE_MARGIN = 1 << 20  # free bytes required beyond the manifest and journal (new folders take blocks too)


class QuarantineError(ArchiveError, ValueError):
    """A request that cannot be carried out safely; nothing has been moved."""


class QuarantineStopped(QuarantineError):
    """The run stopped after some moves; `report` says which, and its manifest restores them."""

    def __init__(self, message: str, report: dict):
        super().__init__(message)
        self.report = report


def _device(path: str) -> int:
    """st_dev of the path, or of its nearest existing ancestor."""
    p = os.path.abspath(path)
    while not os.path.exists(p):
        p = os.path.dirname(p)
    return os.stat(p).st_dev


def leaving(doc: dict) -> list[dict]:
    """The members that would leave the archive: everything but one keeper per set of duplicates, each
    with the file that stays in its place (`keeper_path`, `keeper_size`, `keeper_sha256`).

    A near group keeps its keeper; an exact group keeps its keeper unless that keeper is a member of a
    near group, whose keeper then stays for all of them. Each file is listed once.
    """
    def keeper_of(g):
        return next(m for m in g["members"] if m["id"] == g["keeper"])

    near_keeper = {m["path"]: keeper_of(g) for g in doc["groups"] if g["kind"] == "near" for m in g["members"]}
    stays = {g["id"]: near_keeper.get(keeper_of(g)["path"], keeper_of(g)) if g["kind"] == "exact" else keeper_of(g)
             for g in doc["groups"]}
    keep = {k["path"] for k in stays.values()}
    out, seen = [], set()
    for g in doc["groups"]:
        k = stays[g["id"]]
        for m in g["members"]:
            if m["path"] not in keep and m["path"] not in seen:
                seen.add(m["path"])
                out.append({**m, "group": g["id"], "kind": g["kind"], "keeper_path": k["path"],
                            "keeper_size": k.get("size"), "keeper_sha256": k.get("sha256")})
    return out


def _original_problem(path: str) -> str | None:
    """Why the file at `path` must not be moved, judged from the disk; None when it may."""
    try:
        st = os.lstat(path)
    except FileNotFoundError:
        return "the file is no longer there"
    except OSError as exc:
        return f"the file cannot be examined ({exc.strerror or exc})"
    if os.path.islink(path):
        return "a symbolic link: links are never moved (the file it points to stays where it is)"
    if not os.path.isfile(path):
        return "not a regular file"
    if os.path.realpath(path) != os.path.abspath(path):
        return "reached through a linked folder: moving it would move the real file"
    return None


def _keeper_problem(entry: dict, hashes: dict | None) -> str | None:
    """Why the file that stays for `entry` is not verified on disk; None when it is. With `hashes` (a
    cache), its SHA-256 is checked too (once per file and state)."""
    keeper = entry["keeper"]
    why = on_disk(keeper, entry.get("keeper_size"))
    if why is None and os.path.lexists(entry["original"]) and os.path.samefile(entry["original"], keeper):
        why = "it is the same file as the one that would move (a hard link or one folder reached twice)"
    if why is None and hashes is not None and entry.get("keeper_sha256"):
        st = os.stat(keeper)
        key = (keeper, st.st_ino, st.st_size, st.st_mtime_ns)
        if key not in hashes:
            hashes[key] = sha256_file(keeper)
        if hashes[key] != entry["keeper_sha256"]:
            why = "its content changed since it was indexed (hash differs)"
    return None if why is None else f"the file that would stay, {keeper}, is not verified: {why}; left in place"


def plan(doc: dict, dest: str | os.PathLike, roots: list[str]) -> list[dict]:
    """Where each leaving file would go: dest / (its path relative to the common folder of them all)."""
    dest = os.path.abspath(os.fspath(dest))
    for root in roots:
        if is_inside(dest, root, resolve=True) or is_inside(root, dest, resolve=True):
            raise QuarantineError(
                f"the quarantine folder {dest} must be outside the indexed folder {root} (and not contain it): "
                "the next index run would take the moves for renames")
    files = leaving(doc)
    if not files:
        return []
    paths = [f["path"] for f in files]
    common = os.path.commonpath(paths) if len(paths) > 1 else os.path.dirname(paths[0])
    device = _device(dest)
    moves = []
    for f in files:
        target = os.path.join(dest, os.path.relpath(f["path"], common))
        entry = {"original": f["path"], "quarantined": target, "size": f.get("size"), "sha256": f.get("sha256"),
                 "group": f["group"], "kind": f["kind"], "keeper": f["keeper_path"], "keeper_size": f["keeper_size"],
                 "keeper_sha256": f["keeper_sha256"], "status": "planned", "reason": None}
        why = _original_problem(f["path"]) or _keeper_problem(entry, None)
        if why:
            entry.update(status="skipped", reason=why)
        elif os.stat(f["path"]).st_dev != device:
            raise QuarantineError(f"{dest} is on another file system than {f['path']}; moving there would mean "
                                  "copying and deleting, which kinscope does not do. Choose a folder on the same disk.")
        elif os.path.lexists(target):
            entry.update(status="skipped", reason="something already exists at the quarantine path")
        moves.append(entry)
    return moves


# --- carrying out the plan ----------------------------------------------------------------------------------
class _Run:
    """The files of one run: manifest (the plan), journal, and the reserved space for the final manifest."""

    def __init__(self, dest: str, manifest: dict, moves: list[dict]):
        self.dest, self.manifest = dest, manifest
        plan_bytes = _json(manifest)
        journal_bytes = Journal.reservation(moves)
        final_bytes = len(plan_bytes) + 512 * len(moves) + 4096  # statuses and reasons make it longer
        _check_space(dest, len(plan_bytes) + journal_bytes + final_bytes + SPACE_MARGIN)
        base, fds = create_exclusive(dest, f"kinscope-quarantine-{manifest['created_at']}",
                                     (".json", ".journal", ".json.final"))
        self.path, self.journal_path, self.final_path = base + ".json", base + ".journal", base + ".json.final"
        self.final_fd = fds[2]
        manifest["journal"] = os.path.basename(self.journal_path)
        try:
            try:
                os.write(fds[0], _json(manifest))
                os.fsync(fds[0])
            finally:
                os.close(fds[0])
            reserve(fds[1], journal_bytes)
            reserve(fds[2], final_bytes)
            fsync_dir(dest)
        except OSError:  # nothing has moved: take this run's files back and say why
            for fd in fds[1:]:
                os.close(fd)
            for p in (self.path, self.journal_path, self.final_path):
                os.unlink(p)
            raise
        self.journal = Journal(self.journal_path, fds[1], journal_bytes)

    def finish(self, moves: list[dict]) -> str | None:
        """Replace the manifest by its final state; None, or why that failed (the journal still holds all)."""
        self.manifest.update(files=moves, finished_at=timestamp(), moved=sum(m["status"] == "moved" for m in moves))
        try:
            self.journal.write({"step": "finished", "moved": self.manifest["moved"]})
            data = _json(self.manifest)
            os.pwrite(self.final_fd, data, 0)
            os.ftruncate(self.final_fd, len(data))
            os.fsync(self.final_fd)
            os.replace(self.final_path, self.path)
            fsync_dir(self.dest)
            return None
        except OSError as exc:
            return f"{exc.strerror or exc}"
        finally:
            for close in (lambda: os.close(self.final_fd), self.journal.close):
                try:
                    close()
                except OSError:
                    pass


def _json(data: dict) -> bytes:
    return (json.dumps(data, indent=2) + "\n").encode()


def _check_space(dest: str, need: int) -> None:
    st = os.statvfs(dest)
    free = st.f_bavail * st.f_frsize
    if free < need:
        raise QuarantineError(f"not enough free space in {dest} for the manifest and the journal of the moves "
                              f"(needs {need:,} bytes, {free:,} free); nothing was moved")


def _move_one(n: int, entry: dict, run: _Run, hashes: dict) -> None:
    """Verify, journal, rename, journal. Raises OSError for errors after which the run must stop."""
    def skip(reason):
        entry.update(status="skipped", reason=reason)
        run.journal.write({"n": n, "step": "skipped", "reason": reason})

    why = _original_problem(entry["original"]) or _keeper_problem(entry, hashes)
    if why:
        return skip(why)
    current = sha256_file(entry["original"])
    if entry["sha256"] and current != entry["sha256"]:
        return skip("the file changed since it was indexed (hash differs)")
    entry["sha256"] = current
    try:
        os.makedirs(os.path.dirname(entry["quarantined"]), exist_ok=True)
        if os.path.lexists(entry["quarantined"]):
            return skip("something already exists at the quarantine path")
        run.journal.write({"n": n, "step": "moving", "original": entry["original"],
                           "quarantined": entry["quarantined"], "sha256": current})
        entry.update(status="moving", reason="the run stopped while moving this file; restore looks for it in "
                                             "both places")
        os.rename(entry["original"], entry["quarantined"])
    except OSError as exc:
        skip(f"could not move: {exc.strerror or exc}")
        if exc.errno in STOPPING:
            raise
        return None
    entry.update(status="moved", reason=None)
    run.journal.write({"n": n, "step": "moved"})


def move(doc: dict, dest: str | os.PathLike, roots: list[str], *, db: str | None = None, apply: bool = False) -> dict:
    """Plan (and with apply=True carry out) the quarantine; returns the report with the manifest path.

    Raises QuarantineError when nothing could be moved safely (nothing was), QuarantineStopped when the
    run stopped after some moves (its report and manifest say which; restore puts them back).
    """
    moves = plan(doc, dest, roots)
    dest = os.path.abspath(os.fspath(dest))
    report = {"apply": apply, "manifest": None, "files": moves, "stopped": None, "manifest_note": None}
    if not apply or not any(m["status"] == "planned" for m in moves):
        return report
    manifest = {"format": MANIFEST_FORMAT, "created_at": timestamp(), "db": db, "quarantine": dest,
                "rule": doc.get("rules", {}).get("keeper"), "journal": None, "files": moves}
    try:
        os.makedirs(dest, exist_ok=True)
        run = _Run(dest, manifest, moves)
    except OSError as exc:
        raise QuarantineError(f"cannot write the manifest in the quarantine folder {dest}: "
                              f"{exc.strerror or exc}; nothing was moved") from None
    report["manifest"] = run.path
    hashes: dict = {}
    try:
        for n, entry in enumerate(moves):
            if entry["status"] == "planned":
                _move_one(n, entry, run, hashes)
    except BaseException as exc:  # a full disk, a bug, Ctrl-C: every move so far is in the journal
        reason = f"{exc.strerror or exc}" if isinstance(exc, OSError) else (str(exc) or type(exc).__name__)
        for entry in moves:
            if entry["status"] == "planned":
                entry.update(status="not moved", reason="the run stopped before this file")
        report["stopped"] = reason
        report["manifest_note"] = run.finish(moves)
        done = sum(m["status"] == "moved" for m in moves)
        raise QuarantineStopped(
            f"the run stopped after moving {done} of {len(moves)} files ({reason}). The manifest {run.path} "
            f"records every move; put them back with: kinscope restore {run.path} --apply", report) from exc
    report["manifest_note"] = run.finish(moves)
    return report


# --- putting files back -------------------------------------------------------------------------------------
def _load_manifest(path) -> dict:
    try:
        with open(path, "rb") as fh:
            manifest = json.loads(fh.read())
    except (OSError, ValueError) as exc:
        raise QuarantineError(f"cannot read the quarantine manifest {path}: {getattr(exc, 'strerror', None) or exc}") \
            from None
    if not isinstance(manifest, dict) or manifest.get("format") not in READABLE_FORMATS:
        raise QuarantineError(f"{path} is not a kinscope quarantine manifest")
    if not isinstance(manifest.get("files"), list):
        raise QuarantineError(f"the quarantine manifest {path} is damaged: it has no list of files")
    return manifest


def _entry_problem(entry) -> str | None:
    """What makes a manifest entry unusable for a restore; None when it is sound."""
    if not isinstance(entry, dict):
        return f"an entry must be an object, not {type(entry).__name__}"
    for key in ("original", "quarantined"):
        value = entry.get(key)
        if not isinstance(value, str) or not os.path.isabs(value):
            return f"'{key}' must be an absolute path, not {json.dumps(value)}"
    digest = entry.get("sha256")
    if not isinstance(digest, str) or len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest):
        return f"'sha256' must be 64 hexadecimal digits, not {json.dumps(digest)}"
    return None


def _located(quarantined: str, recorded_folder, folder: str) -> str | None:
    """The quarantined file's path now: the manifest's folder may have been moved or renamed since.
    None when the entry points outside the quarantine folder (never followed)."""
    base = recorded_folder if isinstance(recorded_folder, str) and os.path.isabs(recorded_folder) else folder
    rel = os.path.relpath(os.path.normpath(quarantined), os.path.normpath(base))
    if rel == os.pardir or rel.startswith(os.pardir + os.sep) or os.path.isabs(rel):
        return None
    return os.path.join(folder, rel)


def _restore_one(out: dict, entry: dict, quarantined: str, apply: bool) -> None:
    original = entry["original"]
    if os.path.lexists(original):
        same = os.path.isfile(original) and not os.path.islink(original) and sha256_file(original) == entry["sha256"]
        if same and not os.path.lexists(quarantined):
            out["status"] = "already in place"
        else:
            out.update(status="refused", reason="something else is at the original path; nothing overwritten")
        return
    if not os.path.isfile(quarantined) or os.path.islink(quarantined):
        out.update(status="refused", reason="the file is missing from the quarantine folder")
        return
    if sha256_file(quarantined) != entry["sha256"]:
        out.update(status="refused", reason="the quarantined file changed (hash differs from the manifest)")
        return
    if not apply:
        out["status"] = "would restore"
        return
    try:
        os.makedirs(os.path.dirname(original), exist_ok=True)
        if os.path.lexists(original):
            out.update(status="refused", reason="something else is at the original path; nothing overwritten")
            return
        os.rename(quarantined, original)
        out["status"] = "restored"
    except OSError as exc:
        out.update(status="refused", reason=f"could not move back: {exc.strerror or exc}")


def _text(entry, key) -> str:
    value = entry.get(key) if isinstance(entry, dict) else None
    return value if isinstance(value, str) else "?"


def restore(manifest_path: str | os.PathLike, *, apply: bool = False) -> dict:
    """Put the files of a quarantine manifest back where they were (dry run unless apply=True).

    A file counts as moved when the manifest or its journal says so; a file the journal shows as being
    moved when the run stopped is looked for in both places. Bad entries are reported, never followed.
    """
    manifest = _load_manifest(manifest_path)
    folder = os.path.dirname(os.path.abspath(os.fspath(manifest_path)))
    events, problems = {}, []
    journal = manifest.get("journal")
    if isinstance(journal, str) and journal:
        journal_path = os.path.join(folder, os.path.basename(journal))
        try:
            events, problems = read_journal(journal_path)
        except FileNotFoundError:
            problems.append(f"the journal {journal_path} is missing; only the manifest's own record is used")
        except OSError as exc:
            problems.append(f"the journal {journal_path} cannot be read ({exc.strerror or exc})")
    files = []
    for n, entry in enumerate(manifest["files"]):
        step = events.get(n, {}).get("step")
        recorded = entry.get("status") if isinstance(entry, dict) else None
        status = step if step in ("moving", "moved", "skipped") else recorded
        if isinstance(entry, dict) and status not in ("moved", "moving"):
            continue  # never moved: nothing to put back
        bad = _entry_problem(entry)
        out = {"original": _text(entry, "original"), "quarantined": _text(entry, "quarantined"), "status": None,
               "reason": None}
        files.append(out)
        if bad:
            out.update(status="refused", reason=f"bad manifest entry {n + 1}: {bad}")
            continue
        quarantined = _located(entry["quarantined"], manifest.get("quarantine"), folder)
        if quarantined is None:
            out.update(status="refused",
                       reason="bad manifest entry: its quarantine path lies outside the manifest's folder")
            continue
        out["quarantined"] = quarantined
        _restore_one(out, entry, quarantined, apply)
    return {"apply": apply, "manifest": str(manifest_path), "files": files, "problems": problems,
            "ok": all(f["status"] != "refused" for f in files)}
