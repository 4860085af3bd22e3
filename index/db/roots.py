"""The roots of an archive: the folders (or files) its runs were given, and what became of them.

A root that was renamed or moved leaves catalog rows that point nowhere. `rename` re-points them
(same ids, so the descriptors stay and nothing is embedded again); `forget` drops them with their
descriptors (through the indexer, which holds the writer lock and the stores). `missing` finds rows
whose files are gone, for `check`.
"""
from __future__ import annotations

import os

from ..common.errors import ArchiveError
from ..common.paths import below, is_inside, strictly_inside
from .catalog import under_clause


class RootError(ArchiveError):
    """A plain sentence for the user."""


def outermost(roots: list[str]) -> list[str]:
    """The roots not inside another one."""
    return [r for r in roots if not any(strictly_inside(r, o) for o in roots)]


def is_gone(root: str) -> bool:
    """The root no longer exists, or is an empty folder (a disk not mounted at its mount point, say):
    every row below it points nowhere, and that is a matter for `roots rename/forget`, never for an
    automatic repair."""
    if not os.path.exists(root):
        return True
    if os.path.isdir(root):
        try:
            with os.scandir(root) as entries:
                return next(entries, None) is None
        except OSError:
            return True
    return False


def gone_roots(catalog) -> dict[str, int]:
    """Root -> rows below it, for the roots that are gone and still have rows."""
    out = {}
    for root in outermost(catalog.known_roots()):
        if is_gone(root):
            count = catalog.count_under(root)
            if count:
                out[root] = count
    return out


def missing_root_message(catalog, db, paths, message: str) -> str:
    """For `index GONE`: how many rows the gone root holds, and how to re-point or forget them."""
    gone = gone_roots(catalog)
    for p in paths:
        p = os.path.abspath(os.fspath(p))
        if p in gone:
            return (f"{message}. The catalog holds {gone[p]} images below it: if the folder moved, run "
                    f"`kinscope roots rename {p} NEWPATH --db {db}` (no image is embedded again); "
                    f"to drop them, `kinscope roots forget {p} --db {db}`")
    return message


def listing(catalog) -> list[dict]:
    """Every root with its rows; `state` is "present", "gone" or "inside ROOT" (nested in another)."""
    roots = catalog.known_roots()
    top = outermost(roots)
    out = []
    for root in roots:
        outer = next((o for o in top if strictly_inside(root, o)), None)
        state = f"inside {outer}" if outer else "gone" if is_gone(root) else "present"
        out.append({"root": root, "rows": catalog.count_under(root), "state": state})
    return out


def missing(catalog) -> dict:
    """Rows whose files are gone: {"gone_roots": {root: rows}, "ids": [...], "paths": [...]}.

    Rows below a gone root are only counted; every other row's file is looked up (one stat each)."""
    gone = gone_roots(catalog)
    skip = below(gone)
    ids, paths = [], []
    for image_id, path in catalog.iter_paths():
        if skip(path):
            continue
        if not os.path.isfile(path):
            ids.append(image_id)
            paths.append(path)
    return {"gone_roots": gone, "ids": ids, "paths": paths}


def _resolved(path: str) -> str:
    return os.path.realpath(os.path.abspath(os.fspath(path)))


def _known(catalog, root: str) -> str:
    """The root as the catalog spells it (given as typed, absolute, or resolved)."""
    roots = catalog.known_roots()
    for candidate in (os.fspath(root), os.path.abspath(os.fspath(root)), _resolved(root)):
        if candidate in roots:
            return candidate
    shown = "\n  ".join(roots) or "(none)"
    raise RootError(f"{root} is not a root of this archive; its roots are:\n  {shown}")


def rename(catalog, indexer, old: str, new: str) -> dict:
    """Re-point the rows below `old` to `new` (where the folder went). Rows already catalogued at the
    new place keep theirs; the old duplicates are dropped. No descriptor is computed again.
    `indexer` (index.ingest.indexer.Indexer) holds the writer lock and drops descriptors."""
    old = _known(catalog, old)
    if not os.path.exists(new):
        raise RootError(f"no such file or folder: {new}")
    new = _resolved(new)
    if not is_gone(old):
        raise RootError(f"{old} still exists; index {new} as a root of its own, or forget {old} first")
    if is_inside(new, old) or is_inside(old, new):
        raise RootError(f"{old} and {new} overlap; give the folder's new place outside its old one")
    with indexer.lock():
        moved, doubled = _repoint(catalog, indexer, old, new)
    found = not_found = 0
    where, args = under_clause("path", new)
    for path, size in catalog.db.execute(f"select path, size from images where {where}", args):
        if os.path.isfile(path) and os.path.getsize(path) == size:  # is each file where the catalog now says?
            found += 1
        else:
            not_found += 1
    return {"old": old, "new": new, "renamed": moved, "dropped_doubles": doubled,
            "found": found, "not_found": not_found}


def _repoint(catalog, indexer, old: str, new: str) -> tuple[int, int]:
    """Rows below `old` moved below `new` (the caller holds the writer lock); rows whose new path is
    already catalogued are dropped as doubles. Returns (rows re-pointed, doubles dropped)."""
    doubled = catalog.ids_taken_after_rename(old, new)
    indexer.drop(doubled)
    return catalog.rename_root(old, new), len(doubled)


def drop_empty_gone_roots(catalog) -> None:
    """Roots that no longer exist and hold no row (every file was found elsewhere by its content)
    leave the list of roots."""
    for root in catalog.known_roots():
        if not os.path.exists(root) and catalog.count_under(root) == 0:
            catalog.forget_root(root)


def adopt_resolved_roots(catalog, indexer) -> int:
    """Roots recorded through a link (by versions that did not resolve them) re-pointed to their real
    path: the same files, so nothing is embedded again, and a folder indexed both through a link and
    directly keeps one row per file. The caller holds the writer lock."""
    moved = 0
    for root in outermost(catalog.known_roots()):
        real = os.path.realpath(root)
        overlap = strictly_inside(real, root) or strictly_inside(root, real)
        if real != root and os.path.exists(root) and not overlap:
            moved += _repoint(catalog, indexer, root, real)[0]
    return moved


def forget(catalog, indexer, root: str, *, even_if_present: bool = False) -> dict:
    """Drop the rows below `root` and their descriptors (the files are not touched)."""
    root = _known(catalog, root)
    if not even_if_present and not is_gone(root):
        raise RootError(f"{root} still exists; forgetting it drops the descriptors of its images. Add "
                        "--even-if-present if that is what you want")
    with indexer.lock():
        ids = catalog.ids_under(root)
        indexer.drop(ids)
        catalog.forget_root(root)
    return {"root": root, "forgotten": len(ids)}
