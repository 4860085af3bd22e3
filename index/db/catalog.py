"""The SQLite catalog (through sqlite-utils): images, layers, runs, failures."""
from __future__ import annotations

import json
import os
import sqlite3
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterable

import sqlite_utils

from ..common.paths import below, is_inside, prefix

# status of an image row: 'pending' (waiting for descriptors) or 'ok' (in every layer's store)
IMAGE_COLUMNS = {
    "id": int,
    "path": str,
    "folder": str,
    "name": str,
    "size": int,
    "mtime": float,
    "sha256": str,
    "status": str,
    "width": int,
    "height": int,
    "format": str,
    "captured_at": str,
    "camera": str,
    "title": str,
    "keywords": str,  # JSON list
    "run_id": int,
    "indexed_at": str,
}


def now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


class Catalog:
    """mode: "create" makes the file and its tables when absent (a new archive); "write" opens an
    existing file only (never an empty catalog beside existing stores); "read" never writes (a
    read-only database folder: SQLite read-only mode, or immutable when no journal is pending)."""

    def __init__(self, path: Path, *, mode: str = "create"):
        uri = _uri(Path(path), mode)
        # One connection, usable from the web server's threads (the web layer serialises calls).
        self.db = sqlite_utils.Database(sqlite3.connect(uri, uri=True, check_same_thread=False))
        self.read_only = mode == "read"
        self.damage: str | None = None  # set by dbfolder.open_catalog(lenient=True) for `check`
        if not self.read_only:
            self.db.execute("PRAGMA journal_mode=WAL")  # readers see the last commit while indexing runs
        self.db.execute("PRAGMA busy_timeout=10000")
        if mode == "create":
            self._create()

    def quick_check(self) -> str:
        """SQLite's own check of every page ("ok" when sound); reads the whole file."""
        try:
            return str(self.db.execute("PRAGMA quick_check").fetchone()[0])
        except sqlite3.DatabaseError as exc:
            return str(exc)

    def tables(self) -> set[str]:
        return set(self.db.table_names())

    def prepare_for_writing(self) -> None:
        """The indexer's schema: tables missing from an older catalog, and the size index that
        matching moves across roots needs."""
        self._create()
        self.db.execute("create index if not exists idx_images_size on images(size)")

    def _create(self) -> None:
        db = self.db
        if "images" not in db.table_names():
            db["images"].create(IMAGE_COLUMNS, pk="id", not_null={"path", "status"})
            db["images"].create_index(["path"], unique=True)
            db["images"].create_index(["sha256"])
            db["images"].create_index(["status"])
            db["images"].create_index(["folder"])
        if "failures" not in db.table_names():
            db["failures"].create(
                {"path": str, "size": int, "mtime": float, "reason": str, "run_id": int, "at": str}, pk="path"
            )
        if "layers" not in db.table_names():
            db["layers"].create({"name": str, "node": str, "channels": int, "stride": int, "dim": int}, pk="name")
        if "runs" not in db.table_names():
            db["runs"].create(
                {
                    "id": int, "started_at": str, "finished_at": str, "roots": str, "status": str,
                    "new": int, "changed": int, "moved": int, "removed": int, "unchanged": int,
                    "embedded": int, "failed": int,
                },
                pk="id",
            )

    # --- runs -------------------------------------------------------------------------------
    def start_run(self, roots: list[str]) -> int:
        table = self.db["runs"]
        table.insert({"started_at": now(), "roots": json.dumps(roots), "status": "running"})
        return int(table.last_pk)

    def finish_run(self, run_id: int, status: str, counts: dict) -> None:
        self.db["runs"].update(run_id, {"finished_at": now(), "status": status, **counts})

    # --- images -----------------------------------------------------------------------------
    def folders_under(self, roots: Iterable[str]) -> set[str]:
        """The folders of every image row below any of these folders (or equal to a root file)."""
        out = set()
        for root in roots:
            where, args = under_clause("folder", root)
            query = f"select distinct folder from images where {where} or path = ?"
            out.update(r[0] for r in self.db.execute(query, [*args, root]).fetchall())
        return out

    def rows_in_folder(self, folder: str) -> dict[str, dict]:
        """path -> row for the image rows directly in this folder."""
        query = "select id, path, size, mtime, sha256, status from images where folder = ?"
        return {row["path"]: row for row in self.db.query(query, [folder])}

    def insert_pending(self, files: list[dict], run_id: int) -> list[int]:
        """New files -> pending rows; returns their ids (the FAISS ids in every layer)."""
        ids = []
        with self.db.conn:
            for f in files:
                cur = self.db.execute(
                    "insert into images (path, folder, name, size, mtime, sha256, status, run_id) "
                    "values (?, ?, ?, ?, ?, ?, 'pending', ?)",
                    [f["path"], os.path.dirname(f["path"]), os.path.basename(f["path"]), f["size"], f["mtime"],
                     f.get("sha256"), run_id],
                )
                ids.append(int(cur.lastrowid))
        return ids

    def update_files(self, updates: list[tuple[int, dict]]) -> None:
        """Apply stat/path/status changes to existing rows in one transaction."""
        with self.db.conn:
            for image_id, values in updates:
                if "path" in values:
                    path = values["path"]
                    values = {**values, "folder": os.path.dirname(path), "name": os.path.basename(path)}
                sets = ", ".join(f"{k} = ?" for k in values)
                self.db.execute(f"update images set {sets} where id = ?", [*values.values(), image_id])

    def delete_images(self, ids: list[int]) -> None:
        with self.db.conn:
            for chunk in _chunks(ids, 500):
                self.db.execute(f"delete from images where id in ({','.join('?' * len(chunk))})", chunk)

    def pending(self, roots: Iterable[str] | None = None) -> list[tuple[int, str]]:
        """(id, path) of rows still waiting for descriptors, optionally only below these roots."""
        rows = self.db.execute("select id, path from images where status = 'pending' order by id").fetchall()
        if roots is None:
            return rows
        inside = below(roots)
        return [(i, p) for i, p in rows if inside(p)]

    def mark_embedded(self, rows: list[dict], run_id: int) -> None:
        stamp = now()
        with self.db.conn:
            for r in rows:
                self.db.execute(
                    "update images set status = 'ok', sha256 = ?, width = ?, height = ?, format = ?, captured_at = ?, "
                    "camera = ?, title = ?, keywords = ?, run_id = ?, indexed_at = ? where id = ?",
                    [r["sha256"], r["width"], r["height"], r["format"], r["captured_at"], r["camera"], r["title"],
                     json.dumps(r["keywords"]), run_id, stamp, r["id"]],
                )

    def ids_with_status(self, status: str) -> list[int]:
        return [r[0] for r in self.db.execute("select id from images where status = ?", [status]).fetchall()]

    def set_status(self, ids: list[int], status: str) -> None:
        with self.db.conn:
            for chunk in _chunks(ids, 500):
                self.db.execute(
                    f"update images set status = ? where id in ({','.join('?' * len(chunk))})", [status, *chunk]
                )

    def get(self, ids: list[int]) -> dict[int, dict]:
        """id -> row for these ids (one query per 500 ids; rows of images not yet embedded are left out)."""
        out = {}
        for chunk in _chunks(list(ids), 500):
            q = f"select * from images where status = 'ok' and id in ({','.join('?' * len(chunk))})"
            for row in self.db.query(q, chunk):
                row["keywords"] = json.loads(row["keywords"]) if row["keywords"] else []
                out[row["id"]] = row
        return out

    def page(self, *, offset: int = 0, limit: int = 60, folder: str | None = None, name: str | None = None) -> dict:
        """Indexed items in id order, `limit` at a time, optionally below one folder and with `name` in the file
        name (any case) or, when it is a whole number, as the item's id."""
        where, args = "status = 'ok'", []
        if folder:
            clause, args = under_clause("folder", folder.rstrip(os.sep))
            where += f" and {clause}"
        if name:
            clause, more = name_clause(name)
            where, args = f"{where} and {clause}", [*args, *more]
        total = self.db.execute(f"select count(*) from images where {where}", args).fetchone()[0]
        rows = list(self.db.query(f"select * from images where {where} order by id limit ? offset ?",
                                  [*args, int(limit), int(offset)]))
        for row in rows:
            row["keywords"] = json.loads(row["keywords"]) if row["keywords"] else []
        return {"total": total, "offset": int(offset), "items": rows}

    def folders(self) -> list[dict]:
        """Every folder holding indexed items, with its count."""
        q = "select folder, count(*) as count from images where status = 'ok' group by folder order by folder"
        return list(self.db.query(q))

    def by_path(self, path: str) -> dict | None:
        rows = list(self.db.query("select * from images where path = ?", [path]))
        return rows[0] if rows else None

    def size_known(self, size: int) -> bool:
        """Does any row have a file of this size? (a new file of that size may be a moved one)"""
        return self.db.execute("select 1 from images where size = ? limit 1", [size]).fetchone() is not None

    def rows_with_hash(self, sha256: str) -> list[dict]:
        """Rows of files with this content hash (candidates for a move detected by content)."""
        q = "select id, path, size, mtime, sha256, status from images where sha256 = ?"
        return list(self.db.query(q, [sha256]))

    def iter_paths(self, chunk: int = 10_000):
        """(id, path) of every image row, a chunk of rows in memory at a time."""
        last = -1
        while True:
            rows = self.db.execute("select id, path from images where id > ? order by id limit ?",
                                   [last, chunk]).fetchall()
            if not rows:
                return
            yield from rows
            last = rows[-1][0]

    # --- roots: the folders (or files) earlier runs were given --------------------------------
    def known_roots(self) -> list[str]:
        """Every folder (or file) any run was given, sorted (a run's unreadable list is skipped)."""
        roots: set[str] = set()
        for row in self.db.query("select roots from runs"):
            try:
                roots.update(json.loads(row["roots"] or "[]"))
            except ValueError:
                continue
        return sorted(roots)

    def count_under(self, root: str) -> int:
        where, args = under_clause("path", root)
        return self.db.execute(f"select count(*) from images where {where}", args).fetchone()[0]

    def ids_under(self, root: str) -> list[int]:
        where, args = under_clause("path", root)
        return [r[0] for r in self.db.execute(f"select id from images where {where}", args).fetchall()]

    def ids_taken_after_rename(self, old: str, new: str) -> list[int]:
        """Rows below `old` whose path under `new` another row already has (catalogued twice)."""
        where, args = under_clause("a.path", old)
        q = (f"select a.id from images a where {where} and exists "
             "(select 1 from images b where b.path = ? || substr(a.path, ?))")
        return [r[0] for r in self.db.execute(q, [*args, new, len(old) + 1]).fetchall()]

    def rename_root(self, old: str, new: str) -> int:
        """Every row and failure below `old` now lies below `new` (same ids); the runs' roots follow.
        Rows whose new path is taken must have been deleted first (ids_taken_after_rename)."""
        n = len(old) + 1
        where, args = under_clause("path", old)
        with self.db.conn:
            count = self.db.execute(f"select count(*) from images where {where}", args).fetchone()[0]
            self.db.execute("update images set path = ?, folder = ?, name = ? where path = ?",
                            [new, os.path.dirname(new), os.path.basename(new), old])  # a file root
            self.db.execute(f"update images set path = ? || substr(path, ?), folder = ? || substr(folder, ?) "
                            f"where {where}", [new, n, new, n, *args])
            self.db.execute(f"delete from failures where {where} and ? || substr(path, ?) in "
                            "(select path from failures)", [*args, new, n])
            self.db.execute(f"update failures set path = ? || substr(path, ?) where {where}", [new, n, *args])
            self._rewrite_run_roots(lambda r: new + r[len(old):] if is_inside(r, old) else r)
        return count

    def forget_root(self, root: str) -> None:
        """Failures below `root` dropped and the root taken out of the runs' roots (image rows are
        deleted by the caller, which also takes their descriptors out of the stores)."""
        where, args = under_clause("path", root)
        with self.db.conn:
            self.db.execute(f"delete from failures where {where}", args)
            self._rewrite_run_roots(lambda r: None if is_inside(r, root) else r)

    def _rewrite_run_roots(self, fn) -> None:
        for run_id, raw in self.db.execute("select id, roots from runs").fetchall():
            roots = json.loads(raw or "[]")
            changed = [r for r in (fn(r) for r in roots) if r is not None]
            if changed != roots:
                self.db.execute("update runs set roots = ? where id = ?", [json.dumps(changed), run_id])

    # --- failures ---------------------------------------------------------------------------
    def failures_under(self, roots: Iterable[str]) -> dict[str, dict]:
        out = {}
        for root in roots:
            where, args = under_clause("path", root)
            for row in self.db.query(f"select * from failures where {where}", args):
                out[row["path"]] = row
        return out

    def record_failures(self, failures: list[dict], run_id: int) -> None:
        stamp = now()
        self.db["failures"].upsert_all(
            [{**f, "run_id": run_id, "at": stamp} for f in failures], pk="path"
        )

    def clear_failures(self, paths: list[str]) -> None:
        with self.db.conn:
            for chunk in _chunks(paths, 500):
                self.db.execute(f"delete from failures where path in ({','.join('?' * len(chunk))})", chunk)

    # --- layers and summary -----------------------------------------------------------------
    def set_layers(self, layers: list[dict]) -> None:
        self.db["layers"].upsert_all(layers, pk="name")

    def summary(self) -> dict:
        counts = dict(self.db.execute("select status, count(*) from images group by status").fetchall())
        failures = [
            {"path": r["path"], "reason": r["reason"], "at": r["at"]}
            for r in self.db.query("select path, reason, at from failures order by path")
        ]
        last = list(self.db.query("select * from runs order by id desc limit 1"))
        return {
            "images": counts.get("ok", 0),
            "pending": counts.get("pending", 0),
            "failed": len(failures),
            "failures": failures,
            "bytes": self.db.execute("select coalesce(sum(size), 0) from images where status = 'ok'").fetchone()[0],
            "last_run": last[0] if last else None,
        }

    def close(self) -> None:
        self.db.close()


def under_clause(column: str, root: str) -> tuple[str, list]:
    """SQL for "column is root or lies below it" (no LIKE: paths may hold % and _)."""
    start = prefix(root)
    return f"({column} = ? or substr({column}, 1, ?) = ?)", [root, len(start), start]


def name_clause(text: str) -> tuple[str, list]:
    """SQL for "the file name contains text" (LIKE, its wildcards % and _ escaped: a name may hold them), or
    "the id is text" when text is a whole number."""
    pattern = "%" + text.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_") + "%"
    if text.isascii() and text.isdigit() and len(text) < 19:
        return "(name like ? escape '\\' or id = ?)", [pattern, int(text)]
    return "name like ? escape '\\'", [pattern]


def _uri(path: Path, mode: str) -> str:
    base = path.absolute().as_uri()
    if mode == "create":
        return base + "?mode=rwc"
    if mode == "write":
        return base + "?mode=rw"
    wal, shm = Path(f"{path}-wal"), Path(f"{path}-shm")
    if not wal.exists() or wal.stat().st_size == 0:
        return base + "?mode=ro&immutable=1"  # nothing pending in a journal: the file is the whole catalog
    if shm.exists():
        return base + "?mode=ro"  # SQLite reads the journal through the existing shared-memory file
    raise PendingJournal(str(wal))


class PendingJournal(Exception):
    """A read-only catalog whose journal (-wal) holds changes SQLite cannot apply without writing."""


def _chunks(items: list, n: int):
    for i in range(0, len(items), n):
        yield items[i : i + n]
