"""Walk the roots, stat every image file, and compare with the catalog -> a change set."""
from __future__ import annotations

import os
from collections import defaultdict
from dataclasses import dataclass, field
from itertools import groupby
from typing import Callable, Iterator

from ..common.files import sha256_file
from ..common.paths import below, strictly_inside
from ..images.decode import SUPPORTED_EXTENSIONS


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


def normalize_roots(paths) -> list[str]:
    """Absolute paths with every link resolved: a file is catalogued once, at its real path, however
    it was reached (a link to an indexed folder given as a root adds nothing)."""
    roots = []
    for p in paths:
        p = os.path.abspath(os.fspath(p))
        if not os.path.exists(p):
            raise FileNotFoundError(f"no such file or folder: {p}")
        roots.append(os.path.realpath(p))
    return roots


def finds_images(paths) -> bool:
    """True once one file below the paths would be indexed (a file given by name counts): stops at the first,
    so it walks everything only when there is none. FileNotFoundError for a path that does not exist."""
    return next(walk(walk_roots(normalize_roots(paths)), [], []), None) is not None


def walk_roots(roots: list[str]) -> list[str]:
    """The roots to walk so that each folder comes once: duplicates and roots inside another root
    dropped, file roots grouped by their folder."""
    unique = list(dict.fromkeys(roots))
    files = {r for r in unique if os.path.isfile(r)}
    folders = [r for r in unique if r not in files]

    def inside(r: str) -> bool:  # strictly inside another folder root
        return any(strictly_inside(r, o) for o in folders)

    return ([r for r in folders if not inside(r)]
            + sorted((r for r in files if not inside(r)), key=lambda r: (os.path.dirname(r), r)))


def walk(roots: list[str], errors: list[dict], skipped: list[dict] | None = None,
         exclude: tuple[str, ...] = ()) -> Iterator[dict]:
    """Every file with an image extension below the roots (real paths), with size and mtime.

    Links are never catalogued themselves: folder links are not followed (no loops, no second copy of
    a folder), a file link whose target lies inside the roots is left to the target's own entry, and
    one whose target lies outside them is not indexed and is noted in `skipped`; a dangling link is
    an error. Folders in `exclude` and kinscope database folders (their thumbnails are images too)
    are left out, also noted in `skipped`.
    """
    def on_error(exc: OSError) -> None:
        errors.append({"path": exc.filename, "reason": f"cannot read folder: {exc.strerror}"})

    skipped = [] if skipped is None else skipped
    inside = below(roots)
    for root in roots:
        if os.path.isfile(root):
            yield from _stat_all([root], errors, inside, skipped)
            continue
        for folder, dirs, files in os.walk(root, onerror=on_error):
            if folder in exclude or is_database_folder(files):
                skipped.append({"path": folder, "reason": "a kinscope database folder: left out of the scan"})
                dirs[:] = []
                continue
            dirs.sort()
            names = sorted(f for f in files if os.path.splitext(f)[1].lower() in SUPPORTED_EXTENSIONS)
            yield from _stat_all([os.path.join(folder, n) for n in names], errors, inside, skipped)


def is_database_folder(names) -> bool:
    names = set(names)
    return "catalog.sqlite" in names and "manifest.json" in names


def _stat_all(paths: list[str], errors: list[dict], inside: Callable[[str], bool] | None = None,
              skipped: list[dict] | None = None) -> Iterator[dict]:
    for path in paths:
        try:
            path.encode("utf-8")
        except UnicodeEncodeError:  # bytes that are not UTF-8 in the name: SQLite text cannot hold it
            shown = os.fsencode(path).decode("utf-8", "backslashreplace")
            errors.append({"path": shown, "reason": "the file name is not valid UTF-8; rename the file to index it"})
            continue
        if os.path.islink(path) and not _link_to_catalogue(path, errors, inside, skipped):
            continue
        try:
            st = os.stat(path)
        except OSError as exc:
            errors.append({"path": path, "reason": f"cannot read file: {exc.strerror}"})
            continue
        yield {"path": path, "size": st.st_size, "mtime": st.st_mtime}


def _link_to_catalogue(path: str, errors: list[dict], inside, skipped) -> bool:
    """A file link below a root: never catalogued under its own name (see walk); False = skip it."""
    target = os.path.realpath(path)
    if not os.path.exists(target):
        errors.append({"path": path, "reason": "a link to a file that does not exist (dangling link)"})
    elif inside is not None and not inside(target) and skipped is not None:
        skipped.append({"path": path, "target": target,
                        "reason": "a link to a file outside the indexed folders: not indexed"})
    return False


def diff_by_folder(files: Iterator[dict], rows_in_folder: Callable[[str], dict[str, dict]], folders: set[str],
                   roots: list[str], failures: dict[str, dict],
                   size_known: Callable[[int], bool] | None = None,
                   rows_with_hash: Callable[[str], list[dict]] | None = None) -> ChangeSet:
    """Compare what is on disk with what the catalog holds below the same roots.

    The walk yields each folder's files together, so only one folder's catalog rows are in memory at
    a time (all rows at once took 0.6 GB at a million files, measured).

    rows_in_folder(folder): the catalog rows directly in a folder; folders: every folder the catalog
    holds rows in below the roots (catalog.folders_under). Only rows below the roots take part, but
    a new file may also be a row elsewhere whose file is gone (a folder moved from another root, or
    from a root that no longer exists): size_known(size) says whether any row has that size (only
    then is the new file hashed), rows_with_hash(sha256) gives the rows with that content.
    """
    cs = ChangeSet()
    unknown, missing = [], []
    seen_failures = set()
    visited = set()
    under = below(roots)
    for folder, group in groupby(files, key=lambda f: os.path.dirname(f["path"])):
        rows = {p: r for p, r in rows_in_folder(folder).items() if under(p)}
        first = folder not in visited  # (a folder comes twice only from overlapping roots: see walk_roots)
        visited.add(folder)
        seen = set()
        for f in group:
            seen.add(f["path"])
            if f["path"] in failures:
                seen_failures.add(f["path"])
            _compare(f, rows.get(f["path"]), failures, cs, unknown)
        if first:
            missing.extend(row for path, row in rows.items() if path not in seen)
    for folder in sorted(folders - visited):  # folders the catalog knows and the walk did not reach
        missing.extend(r for p, r in rows_in_folder(folder).items() if under(p))
    elsewhere = (size_known, rows_with_hash, under) if size_known and rows_with_hash else None
    _match_moves(unknown, missing, cs, elsewhere)
    cs.gone_failures = [p for p in failures if p not in seen_failures]
    return cs


def _compare(f: dict, row: dict | None, failures: dict[str, dict], cs: ChangeSet, unknown: list[dict]) -> None:
    """One file on disk against its catalog row (None: not in the catalog)."""
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


def _match_moves(unknown: list[dict], missing: list[dict], cs: ChangeSet, elsewhere=None) -> None:
    """A new path whose content hash equals a vanished row's is that row, moved: a row below the
    roots that the walk did not find, or (elsewhere: size_known, rows_with_hash, under) a row outside
    the roots whose file no longer exists."""
    by_size = defaultdict(list)
    for row in missing:
        by_size[row["size"]].append(row)
    claimed: dict[int, dict] = {}
    for f in unknown:
        here = [r for r in by_size.get(f["size"], ()) if r["id"] not in claimed]
        there = elsewhere is not None and elsewhere[0](f["size"])
        if here or there:  # only hash new files that could be a move: same size
            f["sha256"] = _hash_or_none(f["path"])
            match = _moved_row(f, here, elsewhere if there else None, claimed)
            if match is not None:
                claimed[match["id"]] = f
                cs.moved.append((match["id"], f))
                continue
        cs.new.append(f)
    cs.removed = [row["id"] for row in missing if row["id"] not in claimed]


def _moved_row(f: dict, here: list[dict], elsewhere, claimed: dict) -> dict | None:
    if not f["sha256"]:
        return None
    match = next((r for r in here if r["sha256"] == f["sha256"]), None)
    if match is None and elsewhere is not None:
        _, rows_with_hash, under = elsewhere
        match = next((r for r in rows_with_hash(f["sha256"]) if r["size"] == f["size"] and r["id"] not in claimed
                      and not under(r["path"]) and not os.path.lexists(r["path"])), None)
    return match


def _hash_or_none(path: str) -> str | None:
    try:
        return sha256_file(path)
    except OSError:
        return None  # unreadable now: the pipeline will record why
