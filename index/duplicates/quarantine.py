"""Quarantine: move the non-keepers of duplicate groups into a folder with a manifest, and put them back.

Nothing is ever deleted. A move is a rename on one file system (a quarantine folder on another file
system is refused, since that would need a copy and a delete), never onto an existing file, and only
for a file whose content hash still matches the catalog. `restore` refuses to overwrite, checks each
file's hash before moving it back, and can be run again safely. Without `apply=True` both functions
only return the plan.
"""
from __future__ import annotations

import json
import os
from datetime import datetime, timezone
from pathlib import Path

from ..common.errors import ArchiveError
from ..common.files import atomic_write, sha256_file
from ..common.paths import is_inside

MANIFEST_FORMAT = "kinscope-quarantine/1"


class QuarantineError(ArchiveError, ValueError):
    """A request that cannot be carried out safely; nothing has been moved."""


def _device(path: str) -> int:
    """st_dev of the path, or of its nearest existing ancestor."""
    p = os.path.abspath(path)
    while not os.path.exists(p):
        p = os.path.dirname(p)
    return os.stat(p).st_dev


def leaving(doc: dict) -> list[dict]:
    """The members that would leave the archive: everything but one keeper per set of duplicates.

    A near group keeps its keeper; an exact group keeps its keeper unless that keeper is itself a
    non-keeper of a near group. Each file is listed once.
    """
    near_members = {m["path"] for g in doc["groups"] if g["kind"] == "near" for m in g["members"]}
    keep = set()
    for g in doc["groups"]:
        keeper = next(m for m in g["members"] if m["id"] == g["keeper"])
        if g["kind"] == "near" or keeper["path"] not in near_members:
            keep.add(keeper["path"])
    out, seen = [], set()
    for g in doc["groups"]:
        keeper = next(m for m in g["members"] if m["id"] == g["keeper"])
        for m in g["members"]:
            if m["path"] not in keep and m["path"] not in seen:
                seen.add(m["path"])
                out.append({**m, "group": g["id"], "kind": g["kind"], "keeper_path": keeper["path"]})
    return out


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
                 "group": f["group"], "kind": f["kind"], "keeper": f["keeper_path"],
                 "status": "planned", "reason": None}
        if not os.path.isfile(f["path"]):
            entry.update(status="skipped", reason="the file is no longer there")
        elif os.stat(f["path"]).st_dev != device:
            raise QuarantineError(f"{dest} is on another file system than {f['path']}; moving there would mean "
                                  "copying and deleting, which kinscope does not do. Choose a folder on the same disk.")
        elif os.path.lexists(target):
            entry.update(status="skipped", reason="something already exists at the quarantine path")
        moves.append(entry)
    return moves


def move(doc: dict, dest: str | os.PathLike, roots: list[str], *, db: str | None = None, apply: bool = False) -> dict:
    """Plan (and with apply=True carry out) the quarantine; returns the report with the manifest path."""
    moves = plan(doc, dest, roots)
    dest = os.path.abspath(os.fspath(dest))
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    manifest_path = os.path.join(dest, f"kinscope-quarantine-{stamp}.json")
    report = {"apply": apply, "manifest": manifest_path if apply and moves else None, "files": moves}
    if not apply or not moves:
        return report
    os.makedirs(dest, exist_ok=True)
    manifest = {"format": MANIFEST_FORMAT, "created_at": stamp, "db": db, "quarantine": dest,
                "rule": doc.get("rules", {}).get("keeper"), "files": moves}
    _write_json(manifest_path, manifest)  # the plan is on disk before the first file moves
    for entry in moves:
        if entry["status"] != "planned":
            continue
        try:
            current = sha256_file(entry["original"])
            if entry["sha256"] and current != entry["sha256"]:
                entry.update(status="skipped", reason="the file changed since it was indexed (hash differs)")
                continue
            entry["sha256"] = current
            os.makedirs(os.path.dirname(entry["quarantined"]), exist_ok=True)
            if os.path.lexists(entry["quarantined"]):
                entry.update(status="skipped", reason="something already exists at the quarantine path")
                continue
            os.rename(entry["original"], entry["quarantined"])
            entry["status"] = "moved"
        except OSError as exc:
            entry.update(status="skipped", reason=f"could not move: {exc.strerror or exc}")
        finally:
            _write_json(manifest_path, manifest)
    return report


def restore(manifest_path: str | os.PathLike, *, apply: bool = False) -> dict:
    """Put the files of a quarantine manifest back where they were (dry run unless apply=True)."""
    try:
        with open(manifest_path) as fh:
            manifest = json.load(fh)
    except (OSError, ValueError) as exc:
        raise QuarantineError(f"cannot read the quarantine manifest {manifest_path}: {exc}") from None
    if not isinstance(manifest, dict) or manifest.get("format") != MANIFEST_FORMAT:
        raise QuarantineError(f"{manifest_path} is not a kinscope quarantine manifest")
    files = []
    for entry in manifest["files"]:
        if entry.get("status") != "moved":
            continue
        original, quarantined = entry["original"], entry["quarantined"]
        out = {"original": original, "quarantined": quarantined, "status": None, "reason": None}
        files.append(out)
        if os.path.lexists(original):
            same = os.path.isfile(original) and sha256_file(original) == entry["sha256"]
            if same and not os.path.lexists(quarantined):
                out["status"] = "already in place"
            else:
                out.update(status="refused", reason="something else is at the original path; nothing overwritten")
            continue
        if not os.path.isfile(quarantined):
            out.update(status="refused", reason="the file is missing from the quarantine folder")
            continue
        if sha256_file(quarantined) != entry["sha256"]:
            out.update(status="refused", reason="the quarantined file changed (hash differs from the manifest)")
            continue
        if not apply:
            out["status"] = "would restore"
            continue
        try:
            os.makedirs(os.path.dirname(original), exist_ok=True)
            if os.path.lexists(original):
                out.update(status="refused", reason="something else is at the original path; nothing overwritten")
                continue
            os.rename(quarantined, original)
            out["status"] = "restored"
        except OSError as exc:
            out.update(status="refused", reason=f"could not move back: {exc.strerror or exc}")
    return {"apply": apply, "manifest": str(manifest_path), "files": files,
            "ok": all(f["status"] != "refused" for f in files)}


def _write_json(path: str, data: dict) -> None:
    atomic_write(Path(path), (json.dumps(data, indent=2) + "\n").encode())
