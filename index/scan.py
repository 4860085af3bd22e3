"""Walk the roots, stat every image file, and compare with the catalog -> a change set."""
from __future__ import annotations

import hashlib
import os
from collections import defaultdict
from dataclasses import dataclass, field
from typing import Iterator

from .decode import SUPPORTED_EXTENSIONS


@dataclass
class ChangeSet:
    new: list[dict] = field(default_factory=list)  # {"path", "size", "mtime", "sha256" (if known)}
    changed: list[tuple[int, dict]] = field(default_factory=list)  # content differs: re-embed
    touched: list[tuple[int, dict]] = field(default_factory=list)  # new stat, same content
    moved: list[tuple[int, dict]] = field(default_factory=list)  # same content at a new path
    removed: list[int] = field(default_factory=list)
    unchanged: int = 0
    known_failures: int = 0  # failed before and not modified since: not retried
    gone_failures: list[str] = field(default_factory=list)
    walk_errors: list[dict] = field(default_factory=list)  # {"path", "reason"} for unreadable folders/files

    def counts(self) -> dict:
        return {
            "new": len(self.new), "changed": len(self.changed), "moved": len(self.moved),
            "removed": len(self.removed), "unchanged": self.unchanged + len(self.touched),
        }


def sha256_file(path: str) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def normalize_roots(paths) -> list[str]:
    roots = []
    for p in paths:
        p = os.path.abspath(os.fspath(p))
        if not os.path.exists(p):
            raise FileNotFoundError(f"no such file or folder: {p}")
        roots.append(p)
    return roots


def walk(roots: list[str], errors: list[dict]) -> Iterator[dict]:
    """Every file with an image extension below the roots, with size and mtime.

    Folder symlinks are not followed (no loops, no escaping the roots); file symlinks are.
    """
    def on_error(exc: OSError) -> None:
        errors.append({"path": exc.filename, "reason": f"cannot read folder: {exc.strerror}"})

    for root in roots:
        if os.path.isfile(root):
            candidates = [root]
            yield from _stat_all(candidates, errors)
            continue
        for folder, dirs, files in os.walk(root, onerror=on_error):
            dirs.sort()
            names = sorted(f for f in files if os.path.splitext(f)[1].lower() in SUPPORTED_EXTENSIONS)
            yield from _stat_all([os.path.join(folder, n) for n in names], errors)


def _stat_all(paths: list[str], errors: list[dict]) -> Iterator[dict]:
    for path in paths:
        try:
            path.encode("utf-8")
        except UnicodeEncodeError:  # bytes that are not UTF-8 in the name: SQLite text cannot hold it
            shown = os.fsencode(path).decode("utf-8", "backslashreplace")
            errors.append({"path": shown, "reason": "the file name is not valid UTF-8; rename the file to index it"})
            continue
        try:
            st = os.stat(path)
        except OSError as exc:
            errors.append({"path": path, "reason": f"cannot read file: {exc.strerror}"})
            continue
        yield {"path": path, "size": st.st_size, "mtime": st.st_mtime}


def diff(files: Iterator[dict], rows: dict[str, dict], failures: dict[str, dict]) -> ChangeSet:
    """Compare what is on disk with what the catalog holds below the same roots."""
    cs = ChangeSet()
    seen = set()
    unknown = []
    for f in files:
        seen.add(f["path"])
        row = rows.get(f["path"])
        if row is None:
            fail = failures.get(f["path"])
            if fail and fail["size"] == f["size"] and fail["mtime"] == f["mtime"]:
                cs.known_failures += 1
            else:
                unknown.append(f)
        elif row["size"] == f["size"] and row["mtime"] == f["mtime"]:
            cs.unchanged += 1
        else:
            f = {**f, "sha256": _hash_or_none(f["path"])}
            if f["sha256"] is not None and f["sha256"] == row["sha256"] and row["status"] == "ok":
                cs.touched.append((row["id"], f))
            else:
                cs.changed.append((row["id"], f))
    missing = [row for path, row in rows.items() if path not in seen]
    _match_moves(unknown, missing, cs)
    cs.gone_failures = [p for p in failures if p not in seen]
    return cs


def _match_moves(unknown: list[dict], missing: list[dict], cs: ChangeSet) -> None:
    """A new path whose content hash equals a vanished row's is that row, moved."""
    by_size = defaultdict(list)
    for row in missing:
        by_size[row["size"]].append(row)
    by_hash = {}
    for f in unknown:
        if by_size.get(f["size"]):  # only hash new files that could be a move: same size
            f["sha256"] = _hash_or_none(f["path"])
            candidates = [r for r in by_size[f["size"]] if r["sha256"] == f["sha256"] and r["id"] not in by_hash]
            if f["sha256"] and candidates:
                by_hash[candidates[0]["id"]] = f
                cs.moved.append((candidates[0]["id"], f))
                continue
        cs.new.append(f)
    cs.removed = [row["id"] for row in missing if row["id"] not in by_hash]


def _hash_or_none(path: str) -> str | None:
    try:
        return sha256_file(path)
    except OSError:
        return None  # unreadable now: the pipeline will record why
