"""Verify an archive folder: SQLite integrity, catalog vs every vector store, manifest vs files, orphans."""
from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np


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
    temps = sorted(p.name for p in db.glob(".*.tmp"))
    if temps:
        report.add("warning", f"{len(temps)} temporary files left by an interrupted write", "`--repair` removes them",
                   len(temps))
    _check_thumbnails(archive, ok_ids, report)
    return report


def _check_layer(archive, layer: dict, ok_ids: np.ndarray, report: Report) -> None:
    name, path = layer["name"], archive.db / layer["file"]
    if not path.exists():
        if len(ok_ids):
            report.add("error", f"the vector store of layer {name} ({layer['file']}) is missing",
                       "`--repair` re-embeds every image for it")
        return
    try:
        stored = archive.store(name).ids()
    except Exception as exc:  # an unreadable FAISS file
        report.add("error", f"the vector store of layer {name} cannot be read: {exc}",
                   "`--repair` rebuilds it by re-embedding")
        return
    if archive.store(name).dim != layer["dim"]:
        report.add("error", f"layer {name}: store dimension {archive.store(name).dim} != manifest {layer['dim']}")
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
                   "`--repair` keeps one", dupes)


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
        for p in archive.db.glob(".*.tmp"):
            p.unlink()
            done["temporary_files"] += 1
        changed = False
        for layer in archive.manifest["layers"]:
            store = _loadable_store(archive, layer, done)
            ids = store.ids()
            unique, counts = np.unique(ids, return_counts=True)
            doubled = unique[counts > 1]
            if len(doubled):  # keep one copy of each
                vectors = store.reconstruct(doubled)
                store.remove(doubled)
                store.add(doubled, vectors)
                changed = True
        if changed:
            archive._save_stores()
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


def _loadable_store(archive, layer: dict, done: dict):
    """The layer's store; an unreadable file is set aside (renamed, never deleted) and replaced by an empty one."""
    try:
        return archive.store(layer["name"])
    except Exception:
        path = archive.db / layer["file"]
        aside = path.with_name(path.name + ".unreadable")
        os.replace(path, aside)
        done.setdefault("set_aside", []).append(aside.name)
        return archive.store(layer["name"])


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
