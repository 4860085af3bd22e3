"""Verify an archive folder: SQLite integrity, catalog vs every vector store, manifest vs files, orphans."""
from __future__ import annotations

import fcntl
import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import segments as sg
from .segments import STORES


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


def check(archive) -> Report:
    """Read-only: nothing is changed. See repair() for the fixes."""
    report = Report()
    db = archive.db
    result = archive.catalog.db.execute("PRAGMA integrity_check").fetchone()[0]
    report.checked["sqlite"] = result
    if result != "ok":
        report.add("error", f"the SQLite catalog is damaged: {result}",
                   "restore catalog.sqlite from a backup; the vector stores alone cannot rebuild it")
    ok_ids = np.array(archive.catalog.ids_with_status("ok"), np.int64)
    pending = archive.catalog.ids_with_status("pending")
    report.checked["images"] = int(len(ok_ids))
    if pending:
        report.add("warning", f"{len(pending)} images are waiting for descriptors (an interrupted run)",
                   "run `kinscope index` again, or `kinscope check --repair`", len(pending))
    for layer in archive.manifest["layers"]:
        _check_layer(archive, layer, ok_ids, report)
    for learned in archive.manifest["whitening"]["learned"].values():
        if not (db / learned["file"]).exists():
            report.add("error", f"the whitening file {learned['file']} named in the manifest is missing",
                       "rebuild the archive: its descriptors cannot be whitened again without it")
    temps = _temporary_files(db)
    if temps:
        report.add("warning", f"{len(temps)} temporary files left by an interrupted write", "`--repair` removes them",
                   len(temps))
    _check_leftovers(archive, report)
    _check_thumbnails(archive, ok_ids, report)
    return report


def _temporary_files(db: Path) -> list[Path]:
    return sorted(db.glob(".*.tmp")) + sorted((db / STORES).glob("*/.*.tmp"))


def _stored_ids(archive, layer: dict, report: Report) -> np.ndarray | None:
    """The ids a layer's store holds, every file it names read in full; None if it cannot be read."""
    name = layer["name"]
    state = archive.manifest.get("stores", {}).get(name)
    if not state:  # a store from before segments: one FAISS file
        try:
            store = archive.store(name)
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
            sg.read_codec(archive.db, state["codec"])
        except (FileNotFoundError, sg.StoreFileError) as exc:
            report.add("error", f"layer {name}: its trained index {state['codec']} is missing or unreadable ({exc})",
                       "`--repair` sets the layer's files aside and re-embeds every image for it")
            return None
    parts = []
    for entry in state.get("segments", []):
        segment = sg.Segment.from_dict(entry)
        try:
            parts.append(sg.read_segment(archive.db, segment, state.get("codec"))["ids"])
        except (FileNotFoundError, sg.StoreFileError) as exc:
            report.add("error", f"layer {name}: the segment {segment.file} is missing or unreadable ({exc})",
                       f"`--repair` sets it aside and re-embeds its {segment.vectors} images", segment.vectors)
    return np.concatenate(parts) if parts else np.zeros(0, np.int64)


def _check_layer(archive, layer: dict, ok_ids: np.ndarray, report: Report) -> None:
    name = layer["name"]
    if not archive.manifest.get("stores", {}).get(name) and not (archive.db / layer["file"]).exists():
        if len(ok_ids):
            report.add("error", f"the vector store of layer {name} is missing",
                       "`--repair` re-embeds every image for it")
        return
    stored = _stored_ids(archive, layer, report)
    if stored is None:
        return
    report.checked[f"layer {name}"] = int(len(stored))
    missing = np.setdiff1d(ok_ids, stored)
    extra = np.setdiff1d(stored, ok_ids)
    dupes = len(stored) - len(np.unique(stored))
    if len(missing):
        report.add("error", f"layer {name}: {len(missing)} indexed images have no descriptor",
                   "`--repair` re-embeds just those", len(missing))
    if len(extra):
        report.add("error", f"layer {name}: {len(extra)} descriptors belong to no indexed image (orphans)",
                   "`--repair` removes them", len(extra))
    if dupes:
        report.add("error", f"layer {name}: {dupes} images have more than one descriptor",
                   "`--repair` embeds them again, once", dupes)


def _indexer_running(archive) -> bool:
    try:
        with open(archive.db / "indexer.lock", "a+") as fh:
            try:
                fcntl.flock(fh, fcntl.LOCK_SH | fcntl.LOCK_NB)
            except BlockingIOError:
                return True
            fcntl.flock(fh, fcntl.LOCK_UN)
    except OSError:
        return False
    return False


def _leftovers(archive) -> list[str]:
    """Store files no committed state names (an interrupted write's); none while an indexer runs."""
    if _indexer_running(archive):
        return []
    out = []
    for layer in archive.manifest["layers"]:
        folder = sg.layer_folder(layer["name"])
        keep = sg.referenced(archive.manifest.get("stores", {}).get(layer["name"]))
        base = archive.db / folder
        if base.is_dir():
            out += [f"{folder}/{p.name}" for p in base.iterdir()
                    if p.is_file() and sg.is_store_file(p.name) and f"{folder}/{p.name}" not in keep]
    return sorted(out)


def _check_leftovers(archive, report: Report) -> None:
    left = _leftovers(archive)
    if left:
        report.add("warning", f"{len(left)} store files are named by no checkpoint (left by an interrupted run)",
                   "`--repair` removes them, as does the next `kinscope index`", len(left))


def _check_thumbnails(archive, ok_ids: np.ndarray, report: Report) -> None:
    folder = archive.db / "thumbs"
    if not folder.is_dir():
        return
    alive = set(ok_ids.tolist())
    orphans = [p for p in folder.glob("*.jpg") if not p.name.split("-")[0].isdigit() or int(p.name.split("-")[0]) not in alive]
    if orphans:
        report.add("info", f"{len(orphans)} cached thumbnails belong to images no longer indexed",
                   "`--repair` removes them", len(orphans))


def repair(archive, *, progress: bool = True) -> dict:
    """Fix what can be fixed without re-embedding, then re-embed only what must be."""
    with archive._writer_lock():  # no indexer may run meanwhile
        done = {"temporary_files": 0, "thumbnails": 0}
        for p in _temporary_files(archive.db):
            p.unlink()
            done["temporary_files"] += 1
        changed = False
        for layer in archive.manifest["layers"]:
            changed |= _set_aside_unreadable(archive, layer, done)
            writer = archive._writer(layer["name"])
            ids = writer.ids()
            unique, counts = np.unique(ids, return_counts=True)
            doubled = unique[counts > 1]
            if len(doubled):  # drop every copy; they are embedded again below
                writer.remove(doubled)
                archive.catalog.set_status(doubled.tolist(), "pending")
                changed = True
        if changed:
            archive._save_stores()
        removed = []
        for layer in archive.manifest["layers"]:
            removed += archive._writer(layer["name"]).remove_leftovers()
        if removed:
            done["leftover_files"] = len(removed)
        done.update(archive.reconcile())  # orphans dropped, missing ones queued as pending
        alive = set(archive.catalog.ids_with_status("ok"))
        folder = archive.db / "thumbs"
        if folder.is_dir():
            for p in folder.glob("*.jpg"):
                head = p.name.split("-")[0]
                if not head.isdigit() or int(head) not in alive:
                    p.unlink()
                    done["thumbnails"] += 1
    pending = archive.catalog.pending()
    done["reembedded"] = 0
    if pending:
        roots = _roots_for(archive, [p for _, p in pending])
        if roots:
            report = archive.add(roots, progress=progress)
            done["reembedded"] = report["embedded"]
    return done


def _set_aside(archive, file: str, done: dict) -> None:
    """Rename a damaged file out of the way (never deleted) and note it."""
    path = archive.db / file
    if path.exists():
        aside = path.with_name(path.name + ".unreadable")
        os.replace(path, aside)
        done.setdefault("set_aside", []).append(os.path.relpath(aside, archive.db))


def _set_aside_unreadable(archive, layer: dict, done: dict) -> bool:
    """Drop the files of a layer's store that cannot be read from its state (their images are then
    missing, and re-embedded by reconcile + add). True if the state changed."""
    name = layer["name"]
    stores = archive.manifest.setdefault("stores", {})
    state = stores.get(name)
    if not state:
        legacy = archive.db / layer["file"]
        if legacy.exists():
            try:
                archive._writer(name)
            except Exception:
                archive._writers.pop(name, None)
                _set_aside(archive, layer["file"], done)
                return True
        return False
    if state.get("codec"):
        try:
            sg.read_codec(archive.db, state["codec"])
        except (FileNotFoundError, sg.StoreFileError):
            for file in sorted(sg.referenced(state)):
                _set_aside(archive, file, done)
            stores[name] = None
            archive._writers.pop(name, None)
            return True
    good = []
    for entry in state.get("segments", []):
        try:
            sg.read_segment(archive.db, sg.Segment.from_dict(entry), state.get("codec"))
            good.append(entry)
        except (FileNotFoundError, sg.StoreFileError):
            _set_aside(archive, entry["file"], done)
    if len(good) == len(state.get("segments", [])):
        return False
    stores[name] = {**state, "segments": good}
    archive._writers.pop(name, None)
    return True


def _roots_for(archive, paths: list[str]) -> list[str]:
    """The indexed roots (from earlier runs) that hold these paths and still exist."""
    roots = set()
    for row in archive.catalog.db.query("select roots from runs"):
        for root in json.loads(row["roots"] or "[]"):
            roots.add(root)
    chosen = [r for r in sorted(roots) if os.path.exists(r)
              and any(p == r or p.startswith(r.rstrip(os.sep) + os.sep) for p in paths)]
    # Drop roots nested in other chosen roots.
    return [r for r in chosen if not any(r != o and r.startswith(o.rstrip(os.sep) + os.sep) for o in chosen)]
