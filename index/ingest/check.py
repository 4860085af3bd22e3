"""Verify an archive folder: SQLite integrity, catalog vs every vector store, manifest vs files, orphans."""
from __future__ import annotations

import os
import sqlite3
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..common.errors import ArchiveError
from ..common.locks import writer_running
from ..common.paths import is_inside, strictly_inside
from ..db.catalog import Catalog
from ..images.renditions import THUMBS, cached_thumbnails
from ..vectors import segments as sg
from ..vectors.reader import Reader
from ..vectors.segments import STORES
from .indexer import Indexer


@dataclass
class Finding:
    severity: str  # "error" (something is wrong), "warning" (incomplete but safe), "info"
    message: str
    fix: str = ""
    count: int = 0


@dataclass
class Report:
    findings: list[Finding] = field(default_factory=list)
    checked: dict = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return not any(f.severity in ("error", "warning") for f in self.findings)

    def add(self, severity: str, message: str, fix: str = "", count: int = 0) -> None:
        self.findings.append(Finding(severity, message, fix, count))

    def as_dict(self) -> dict:
        return {"ok": self.ok, "checked": self.checked,
                "findings": [f.__dict__ for f in self.findings]}


@dataclass
class Parts:
    """What check and repair work on: the catalog, the stores as this process reads them (its manifest
    too), and the indexer (the writer lock, each layer's writer, checkpoints, reconcile, add)."""

    catalog: Catalog
    reader: Reader
    indexer: Indexer

    @property
    def db(self) -> Path:
        return self.reader.db

    @property
    def manifest(self) -> dict:
        return self.reader.manifest


def check(catalog, reader, indexer) -> Report:
    """Read-only: nothing is changed. See repair() for the fixes.

    While an indexer runs, only committed state is compared (the manifest read before and after the
    catalog and the store files, until both agree) and no fix is offered for the run in progress."""
    parts = Parts(catalog, reader, indexer)
    report = Report()
    if parts.catalog.damage:
        report.checked["sqlite"] = parts.catalog.damage
        report.add("error", f"the SQLite catalog is damaged: {parts.catalog.damage}", DAMAGED_FIX)
        return report
    try:
        _check_catalog_and_stores(parts, report)
    except sqlite3.DatabaseError as exc:
        report.add("error", f"the SQLite catalog is damaged: {exc}", DAMAGED_FIX)
    return report


DAMAGED_FIX = "restore catalog.sqlite from a backup; the vector stores alone cannot rebuild it"
RUNNING_FIX = "an indexer is running on this database: run `kinscope check` again when it has finished"


def _check_catalog_and_stores(parts, report: Report) -> None:
    db = parts.db
    result = parts.catalog.db.execute("PRAGMA integrity_check").fetchone()[0]
    report.checked["sqlite"] = result
    if result != "ok":
        report.add("error", f"the SQLite catalog is damaged: {result}", DAMAGED_FIX)
        return
    running = writer_running(parts.db)
    ok_ids, pending = _consistent_state(parts, report, running)
    report.checked["images"] = int(len(ok_ids))
    if pending and running:
        report.add("info", f"an indexer is running: {len(pending)} images are waiting for descriptors",
                   count=len(pending))
    elif pending:
        report.add("warning", f"{len(pending)} images are waiting for descriptors (an interrupted run)",
                   "run `kinscope index` again, or `kinscope check --repair`", len(pending))
    for learned in parts.manifest["whitening"]["learned"].values():
        if not (db / learned["file"]).exists():
            report.add("error", f"the whitening file {learned['file']} named in the manifest is missing",
                       "rebuild the archive: its descriptors cannot be whitened again without it")
    temps = [] if running else _temporary_files(db)  # an indexer's writes in flight are not leftovers
    if temps:
        report.add("warning", f"{len(temps)} temporary files left by an interrupted write", "`--repair` removes them",
                   len(temps))
    _check_leftovers(parts, report)
    _check_missing_files(parts, report, running)
    _check_thumbnails(parts, ok_ids, report)


def _consistent_state(parts, report: Report, running: bool, attempts: int = 20):
    """The catalog's ok and pending ids, with every layer checked against the same committed manifest.

    An indexer saves the stores, then the manifest, then marks the catalog rows: a manifest that is the
    same before and after reading the catalog and the store files names stores holding every row the
    catalog had marked. Descriptors of rows not yet marked are the run's work in progress."""
    for _ in range(attempts if running else 1):
        if running:
            parts.reader.reread_manifest()
        generation = parts.manifest.get("generation")
        rows = parts.catalog.db.execute("select id, status from images").fetchall()
        ok_ids = np.array(sorted(i for i, status in rows if status == "ok"), np.int64)
        pending = [i for i, status in rows if status == "pending"]
        layers = Report()
        for layer in parts.manifest["layers"]:
            _check_layer(parts, layer, ok_ids, layers, running)
        if not running or (not parts.reader.reread_manifest() and parts.manifest.get("generation") == generation):
            for finding in layers.findings:
                finding.fix = RUNNING_FIX if running and finding.fix else finding.fix
            report.findings += layers.findings
            report.checked.update(layers.checked)
            return ok_ids, pending
    report.add("info", "an indexer committed new work while its stores were being read, every time; "
               "they were not compared", RUNNING_FIX)
    return ok_ids, pending


def _temporary_files(db: Path) -> list[Path]:
    return sorted(db.glob(".*.tmp")) + sorted((db / STORES).glob("*/.*.tmp"))


def _stored_ids(parts, layer: dict, report: Report) -> np.ndarray | None:
    """The ids a layer's store holds, every file it names read in full; None if it cannot be read."""
    name = layer["name"]
    state = parts.manifest.get("stores", {}).get(name)
    if not state:  # a store from before segments: one FAISS file
        try:
            store = parts.reader.store(name)
        except Exception as exc:  # an unreadable FAISS file
            report.add("error", f"the vector store of layer {name} cannot be read: {exc}",
                       "`--repair` rebuilds it by re-embedding")
            return None
        if store.dim != layer["dim"]:
            report.add("error", f"layer {name}: store dimension {store.dim} != manifest {layer['dim']}")
        return store.ids()
    if int(state["dim"]) != layer["dim"]:
        report.add("error", f"layer {name}: store dimension {state['dim']} != manifest {layer['dim']}")
    if state.get("codec"):
        try:
            sg.read_codec(parts.db, state["codec"])
        except (FileNotFoundError, sg.StoreFileError) as exc:
            report.add("error", f"layer {name}: its trained index {state['codec']} is missing or unreadable ({exc})",
                       "`--repair` sets the layer's files aside and re-embeds every image for it")
            return None
    found = []
    for entry in state.get("segments", []):
        segment = sg.Segment.from_dict(entry)
        try:
            found.append(sg.read_segment(parts.db, segment, state.get("codec"))["ids"])
        except (FileNotFoundError, sg.StoreFileError) as exc:
            report.add("error", f"layer {name}: the segment {segment.file} is missing or unreadable ({exc})",
                       f"`--repair` sets it aside and re-embeds its {segment.vectors} images", segment.vectors)
    return np.concatenate(found) if found else np.zeros(0, np.int64)


def _check_layer(parts, layer: dict, ok_ids: np.ndarray, report: Report, running: bool = False) -> None:
    name = layer["name"]
    if not parts.manifest.get("stores", {}).get(name) and not (parts.db / layer["file"]).exists():
        if len(ok_ids):
            report.add("error", f"the vector store of layer {name} is missing",
                       "`--repair` re-embeds every image for it")
        return
    stored = _stored_ids(parts, layer, report)
    if stored is None:
        return
    report.checked[f"layer {name}"] = int(len(stored))
    missing = np.setdiff1d(ok_ids, stored)
    extra = np.setdiff1d(stored, ok_ids)
    dupes = len(stored) - len(np.unique(stored))
    if len(missing):
        report.add("error", f"layer {name}: {len(missing)} indexed images have no descriptor",
                   RUNNING_FIX if running else "`--repair` re-embeds just those", len(missing))
    if len(extra) and running:  # saved by the indexer, not yet marked in the catalog: work in progress
        report.add("info", f"layer {name}: {len(extra)} descriptors belong to images the running indexer has "
                   "not committed yet", count=len(extra))
    elif len(extra):
        report.add("error", f"layer {name}: {len(extra)} descriptors belong to no indexed image (orphans)",
                   "`--repair` removes them", len(extra))
    if dupes:
        report.add("error", f"layer {name}: {dupes} images have more than one descriptor",
                   "`--repair` embeds them again, once", dupes)


def _leftovers(parts) -> list[str]:
    """Store files no committed state names (an interrupted write's); none while an indexer runs."""
    if writer_running(parts.db):
        return []
    out = []
    for layer in parts.manifest["layers"]:
        folder = sg.layer_folder(layer["name"])
        keep = sg.referenced(parts.manifest.get("stores", {}).get(layer["name"]))
        base = parts.db / folder
        if base.is_dir():
            out += [f"{folder}/{p.name}" for p in base.iterdir()
                    if p.is_file() and sg.is_store_file(p.name) and f"{folder}/{p.name}" not in keep]
    return sorted(out)


def _check_leftovers(parts, report: Report) -> None:
    left = _leftovers(parts)
    if left:
        report.add("warning", f"{len(left)} store files are named by no checkpoint (left by an interrupted run)",
                   "`--repair` removes them, as does the next `kinscope index`", len(left))


def _check_missing_files(parts, report: Report, running: bool) -> None:
    """Rows whose files are gone: whole roots that vanished, and single files (one stat per row)."""
    from ..db.roots import missing

    found = missing(parts.catalog)
    db = parts.db
    for root, count in found["gone_roots"].items():
        report.add("warning", f"{count} catalogued images are below {root}, which no longer exists (or is empty)",
                   f"if it moved: `kinscope roots rename {root} NEWPATH --db {db}` (nothing is embedded again); "
                   f"if it is gone for good: `kinscope roots forget {root} --db {db}`", count)
    n = len(found["ids"])
    report.checked["missing files"] = n + sum(found["gone_roots"].values())
    if n:
        shown = ", ".join(found["paths"][:5]) + (f" and {n - 5} more" if n > 5 else "")
        report.add("warning", f"{n} catalogued files are missing: {shown}",
                   RUNNING_FIX if running else "`--repair` forgets them (their descriptors are dropped); "
                   "or put the files back", n)


def _check_thumbnails(parts, ok_ids: np.ndarray, report: Report) -> None:
    alive = set(ok_ids.tolist())
    orphans = [p for p, image_id in cached_thumbnails(parts.db / THUMBS) if image_id not in alive]
    if orphans:
        report.add("info", f"{len(orphans)} cached thumbnails belong to images no longer indexed",
                   "`--repair` removes them", len(orphans))


def _unsound(result: str) -> str | None:
    return None if result == "ok" else result.splitlines()[0]


class RepairRefused(ArchiveError):
    """--repair would do harm; the message says why and what to do instead."""


def repair(catalog, reader, indexer, *, progress: bool = True) -> dict:
    """Fix what can be fixed without re-embedding, then re-embed only what must be.

    Files missing below roots that still exist are forgotten; a root that is gone entirely is left to
    `kinscope roots rename/forget` (a disk not mounted must not cost its descriptors)."""
    from ..db.roots import missing

    parts = Parts(catalog, reader, indexer)
    damage = parts.catalog.damage or _unsound(parts.catalog.quick_check())
    if damage:
        raise RepairRefused(f"the catalog is damaged ({damage}); --repair would lose descriptors. "
                            f"{DAMAGED_FIX[0].upper()}{DAMAGED_FIX[1:]}; nothing was changed")
    with parts.indexer.lock():  # no indexer may run meanwhile
        done = {"temporary_files": 0, "thumbnails": 0}
        gone = missing(parts.catalog)["ids"]
        if gone:
            done["forgotten_missing"] = parts.indexer.drop(gone)
        for p in _temporary_files(parts.db):
            p.unlink()
            done["temporary_files"] += 1
        changed = False
        for layer in parts.manifest["layers"]:
            changed |= _set_aside_unreadable(parts, layer, done)
            writer = parts.indexer.writer(layer["name"])
            ids = writer.ids()
            unique, counts = np.unique(ids, return_counts=True)
            doubled = unique[counts > 1]
            if len(doubled):  # drop every copy; they are embedded again below
                writer.remove(doubled)
                parts.catalog.set_status(doubled.tolist(), "pending")
                changed = True
        if changed:
            parts.indexer.save_stores()
        removed = []
        for layer in parts.manifest["layers"]:
            removed += parts.indexer.writer(layer["name"]).remove_leftovers()
        if removed:
            done["leftover_files"] = len(removed)
        done.update(parts.indexer.reconcile())  # orphans dropped, missing ones queued as pending
        alive = set(parts.catalog.ids_with_status("ok"))
        for p, image_id in cached_thumbnails(parts.db / THUMBS):
            if image_id not in alive:
                p.unlink()
                done["thumbnails"] += 1
    pending = parts.catalog.pending()
    done["reembedded"] = 0
    if pending:
        roots = _roots_for(parts, [p for _, p in pending])
        if roots:
            report = parts.indexer.add(roots, progress=progress)
            done["reembedded"] = report["embedded"]
    return done


def _set_aside(parts, file: str, done: dict) -> None:
    """Rename a damaged file out of the way (never deleted) and note it."""
    path = parts.db / file
    if path.exists():
        aside = path.with_name(path.name + ".unreadable")
        os.replace(path, aside)
        done.setdefault("set_aside", []).append(os.path.relpath(aside, parts.db))


def _set_aside_unreadable(parts, layer: dict, done: dict) -> bool:
    """Drop the files of a layer's store that cannot be read from its state (their images are then
    missing, and re-embedded by reconcile + add). True if the state changed."""
    name = layer["name"]
    stores = parts.manifest.setdefault("stores", {})
    state = stores.get(name)
    if not state:
        legacy = parts.db / layer["file"]
        if legacy.exists():
            try:
                parts.indexer.writer(name)
            except Exception:
                parts.indexer.forget_writer(name)
                _set_aside(parts, layer["file"], done)
                return True
        return False
    if state.get("codec"):
        try:
            sg.read_codec(parts.db, state["codec"])
        except (FileNotFoundError, sg.StoreFileError):
            for file in sorted(sg.referenced(state)):
                _set_aside(parts, file, done)
            stores[name] = None
            parts.indexer.forget_writer(name)
            return True
    good = []
    for entry in state.get("segments", []):
        try:
            sg.read_segment(parts.db, sg.Segment.from_dict(entry), state.get("codec"))
            good.append(entry)
        except (FileNotFoundError, sg.StoreFileError):
            _set_aside(parts, entry["file"], done)
    if len(good) == len(state.get("segments", [])):
        return False
    stores[name] = {**state, "segments": good}
    parts.indexer.forget_writer(name)
    return True


def _roots_for(parts, paths: list[str]) -> list[str]:
    """The indexed roots (from earlier runs) that hold these paths and still exist."""
    chosen = [r for r in parts.catalog.known_roots() if os.path.exists(r) and any(is_inside(p, r) for p in paths)]
    # Drop roots nested in other chosen roots.
    return [r for r in chosen if not any(strictly_inside(r, o) for o in chosen)]
