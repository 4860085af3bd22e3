"""The database folder's catalog: opened for writing, or read-only where the folder cannot be written.

A missing, empty or damaged catalog is refused in one plain sentence that says what to do, and is
never replaced by an empty one: the vector stores beside it are worthless without it (a store holds
ids, the catalog says which file each id is).
"""
from __future__ import annotations

import os
import sqlite3
from pathlib import Path

from .catalog import Catalog, PendingJournal

CATALOG = "catalog.sqlite"


class CatalogProblem(Exception):
    """The catalog cannot be used; the message is one sentence for the user."""


def missing_message(db: Path) -> str:
    return (f"{db} has no {CATALOG}: the catalog was deleted or moved away while its vector stores are still "
            f"there. Put {CATALOG} back from a backup, or index into a new, empty --db folder; nothing was changed")


def damaged_message(db: Path, exc: BaseException) -> str:
    return (f"the catalog {Path(db) / CATALOG} is damaged ({exc}): restore it from a backup, or index into a new, "
            "empty --db folder (the vector stores alone cannot rebuild it); nothing was changed")


def sqlite_message(db: Path | None, exc: sqlite3.Error) -> str:
    """One sentence for an SQLite error that reached a command."""
    text = str(exc)
    where = Path(db) / CATALOG if db else CATALOG
    if "malformed" in text or "not a database" in text or "corrupt" in text:
        return damaged_message(db or Path("."), exc)
    if "locked" in text or "busy" in text:
        return f"the catalog {where} is busy ({text}); try again in a moment"
    if "readonly" in text or "read-only" in text or "unable to open" in text:
        return f"the catalog {where} cannot be written ({text}): is the database folder read-only?"
    return f"the catalog {where} cannot be used ({text})"


def writable(db: Path) -> bool:
    """Can this process create files in the folder? (access() also says no on a read-only mount,
    even for root.)"""
    return os.access(db, os.W_OK)


def open_catalog(db: Path, manifest: dict, *, lenient: bool = False) -> Catalog:
    """The catalog of an existing archive, for writing when the folder allows it, else read-only.

    lenient: a damaged catalog is returned with `.damage` set instead of refused (for `check`, which
    reports it with the rest)."""
    path = Path(db) / CATALOG
    if not path.exists():
        raise CatalogProblem(missing_message(db))
    catalog = _connect(path, db)
    catalog.damage = None
    try:
        _probe(catalog, db, manifest)
    except sqlite3.DatabaseError as exc:
        if not lenient:
            catalog.close()
            raise CatalogProblem(damaged_message(db, exc)) from None
        catalog.damage = str(exc)
    return catalog


def _connect(path: Path, db: Path) -> Catalog:
    if writable(db):
        try:
            return Catalog(path, mode="write")
        except sqlite3.OperationalError as exc:
            if "unable to open" not in str(exc) and "readonly" not in str(exc):
                raise CatalogProblem(sqlite_message(db, exc)) from None
        except sqlite3.DatabaseError as exc:  # "file is not a database": the header itself is gone
            raise CatalogProblem(damaged_message(db, exc)) from None
    try:
        return Catalog(path, mode="read")
    except PendingJournal:
        raise CatalogProblem(
            f"the database folder {db} is read-only and its catalog still has changes in its journal "
            f"({CATALOG}-wal) that SQLite cannot apply without writing: open it once where the folder is writable "
            "(any `kinscope info --db ...`), then make it read-only again") from None
    except sqlite3.DatabaseError as exc:
        raise CatalogProblem(damaged_message(db, exc)) from None


def _probe(catalog: Catalog, db: Path, manifest: dict) -> None:
    """Read what every command reads first (the schema, the images table's ids, runs, failures), so
    damage there is reported at once; damage deeper in is found by `kinscope check`."""
    tables = catalog.tables()
    if "images" not in tables:
        if manifest.get("generation", 0) > 0 or manifest.get("stores"):
            raise CatalogProblem(
                f"the catalog {Path(db) / CATALOG} is empty while the vector stores hold descriptors: it was "
                "replaced or lost. Restore it from a backup, or index into a new, empty --db folder; "
                "nothing was changed")
        if catalog.read_only:
            raise CatalogProblem(f"the catalog {Path(db) / CATALOG} holds no tables and the folder is read-only")
        catalog._create()  # an archive created but never indexed into
        return
    for query in ("select count(*), max(id) from images", "select count(*) from runs",
                  "select count(*) from failures"):
        catalog.db.execute(query).fetchall()
