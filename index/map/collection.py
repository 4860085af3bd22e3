"""The collection map: every item of a layer placed in 2-D so that similar images lie close together.

`build` lays the layer's descriptors out (index.map.layout) and stores the result in the database
folder as `map-<layer>.npz` (atomic write), with the manifest generation and the items' content hashes
it reflects. After later indexing runs it is brought up to date instead of laid out again: removed or
changed items leave it, new ones are placed by their nearest mapped neighbours (the rule of
index.map.layout.weighted_position), found by the layer's own FAISS store (cosine similarity). A full
layout is made again when the items placed that way since the last one exceed GROWTH of the items it
laid out (or with full=True). `current` applies the same update in memory, without writing (the web
server is a reader), up to that threshold.
"""
from __future__ import annotations

import io
import json
import weakref
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable

import numpy as np

from . import layout as ml
from ..common.files import atomic_write

FORMAT = 1
GROWTH = 0.25  # a full layout again once the items placed since the last exceed a quarter of it
SEARCH_K = 4 * ml.PLACE_K  # store neighbours asked for a new item (some may be new themselves)
DEEPER_K = 200  # asked again for items whose first neighbours were all unmapped
READ_CHUNK = 20_000


class MapError(Exception):
    """A plain sentence for the user."""


@dataclass
class Layout:
    ids: np.ndarray  # int64, ascending
    xy: np.ndarray  # float32 (n, 2), in the unit square
    sha: np.ndarray  # uint64: the first 8 bytes of each item's SHA-256 when it was placed
    meta: dict = field(default_factory=dict)

    def __len__(self) -> int:
        return len(self.ids)


def path_of(db: Path, layer: str) -> Path:
    return Path(db) / f"map-{layer}.npz"


def save(db: Path, layout: Layout) -> None:
    buf = io.BytesIO()
    np.savez(buf, ids=layout.ids, xy=layout.xy, sha=layout.sha, meta=np.array(json.dumps(layout.meta)))
    atomic_write(path_of(db, layout.meta["layer"]), buf.getvalue())


def load(db: Path, layer: str) -> Layout | None:
    path = path_of(db, layer)
    if not path.exists():
        return None
    try:
        with np.load(path, allow_pickle=False) as f:
            meta = json.loads(str(f["meta"]))
            layout = Layout(f["ids"].astype(np.int64), f["xy"].astype(np.float32), f["sha"].astype(np.uint64), meta)
    except (OSError, ValueError, KeyError) as exc:
        raise MapError(f"the map file {path} cannot be read ({exc}); "
                       "make it again with `kinscope map --full`") from None
    if meta.get("format") != FORMAT or len(layout.xy) != len(layout.ids):
        raise MapError(f"the map file {path} is of another format; make it again with `kinscope map --full`")
    return layout


def _catalog_state(archive, layer: str) -> tuple[np.ndarray, np.ndarray]:
    """(ids, hash prefixes) of the items the catalog has committed and the layer's store holds."""
    rows = archive.catalog.db.execute("select id, sha256 from images where status = 'ok' order by id").fetchall()
    ids = np.fromiter((r[0] for r in rows), np.int64, len(rows))
    sha = np.fromiter((int((r[1] or "0")[:16], 16) for r in rows), np.uint64, len(rows))
    keep = np.isin(ids, archive.store(layer).ids())
    return ids[keep], sha[keep]


def _fetch(archive, layer: str) -> Callable[[np.ndarray], np.ndarray]:
    store = archive.store(layer)

    def fetch(ids: np.ndarray) -> np.ndarray:
        parts = [store.reconstruct(ids[i:i + READ_CHUNK]) for i in range(0, len(ids), READ_CHUNK)]
        return np.concatenate(parts) if parts else np.zeros((0, store.dim), np.float32)

    return fetch


def full_layout(archive, layer: str, *, seed: int = 0, sample: int = ml.SAMPLE,
                progress: Callable[[str], None] | None = None) -> Layout:
    ids, sha = _catalog_state(archive, layer)
    xy, sampled = ml.layout(ids, _fetch(archive, layer), seed=seed, sample=sample, progress=progress)
    now = datetime.now(timezone.utc).isoformat(timespec="seconds")
    meta = {"format": FORMAT, "layer": layer, "method": "PCA-50 + t-SNE (openTSNE)", "seed": int(seed),
            "sample": int(sample), "laid_out": len(ids), "sampled": int(sampled.sum()), "placed_since": 0,
            "generation": archive.manifest.get("generation"), "made_at": now, "updated_at": now}
    return Layout(ids, xy, sha, meta)


def update(archive, layout: Layout, *, limit: int | None = None) -> tuple[Layout, dict]:
    """The layout brought up to the archive's committed state: removed and changed items out, new
    ones placed by their nearest mapped neighbours. With `limit`, more new items than that are left
    unplaced (counted in the answer) rather than placed."""
    layer = layout.meta["layer"]
    ids, sha = _catalog_state(archive, layer)
    pos = np.searchsorted(layout.ids, ids)
    pos_ok = np.minimum(pos, max(len(layout.ids) - 1, 0))
    if len(layout):
        kept = (pos < len(layout.ids)) & (layout.ids[pos_ok] == ids) & (layout.sha[pos_ok] == sha)
    else:
        kept = np.zeros(len(ids), bool)
    new = ids[~kept]
    counts = {"kept": int(kept.sum()), "removed": len(layout) - int(kept.sum()), "added": len(new), "unplaced": 0}
    base = Layout(ids[kept], layout.xy[pos_ok[kept]], sha[kept], dict(layout.meta))
    if limit is not None and len(new) > limit:
        counts["unplaced"], counts["added"] = len(new), 0
        return base, counts
    if len(new) and len(base):
        new_xy = _place_new(archive, layer, new, base)
        order = np.argsort(np.concatenate([base.ids, new]), kind="stable")
        base = Layout(np.concatenate([base.ids, new])[order], np.concatenate([base.xy, new_xy])[order],
                      np.concatenate([base.sha, sha[~kept]])[order], base.meta)
    elif len(new):  # nothing left to place them by
        counts["unplaced"], counts["added"] = len(new), 0
    base.meta["placed_since"] = int(layout.meta.get("placed_since", 0)) + counts["added"]
    base.meta["generation"] = archive.manifest.get("generation")
    base.meta["updated_at"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
    return base, counts


def _place_new(archive, layer: str, new: np.ndarray, base: Layout) -> np.ndarray:
    """Positions of new items from their nearest mapped neighbours in the layer's store."""
    store, fetch = archive.store(layer), _fetch(archive, layer)
    out = np.zeros((len(new), 2), np.float32)
    for start in range(0, len(new), READ_CHUNK):
        vectors = fetch(new[start:start + READ_CHUNK])
        idx, dist = _mapped_neighbours(store, vectors, base.ids, SEARCH_K)
        lost = np.flatnonzero((idx < 0).all(axis=1))
        if len(lost):  # every near item was new as well: look further for mapped ones
            idx[lost], dist[lost] = _mapped_neighbours(store, vectors[lost], base.ids, max(SEARCH_K, DEEPER_K))
        still = (idx < 0).all(axis=1)
        out[start:start + len(vectors)] = ml.weighted_position(idx, dist, base.xy, new[start:start + len(vectors)])
        out[start + np.flatnonzero(still)] = 0.5  # nothing mapped near it: the centre, until the next layout
    return out


def _mapped_neighbours(store, vectors: np.ndarray, mapped: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """For each vector, its PLACE_K nearest items that are on the map: (rows of `mapped` or -1, L2 distances)."""
    scores, found = store.search(vectors, k)
    pos = np.searchsorted(mapped, found)
    pos_ok = np.minimum(pos, len(mapped) - 1)
    on_map = (found >= 0) & (mapped[pos_ok] == found)
    idx = np.full((len(vectors), ml.PLACE_K), -1, np.int64)
    dist = np.zeros((len(vectors), ml.PLACE_K), np.float32)
    for row in range(len(vectors)):
        cols = np.flatnonzero(on_map[row])[: ml.PLACE_K]
        idx[row, : len(cols)] = pos_ok[row, cols]
        # unit vectors: |a - b|^2 = 2 - 2 cos
        dist[row, : len(cols)] = np.sqrt(np.maximum(0.0, 2.0 - 2.0 * scores[row, cols]))
    return idx, dist


def build(archive, layer: str, *, seed: int = 0, full: bool = False, sample: int = ml.SAMPLE,
          progress: Callable[[str], None] | None = None) -> dict:
    """Make or update the stored map of a layer; returns what was done."""
    stored = load(archive.db, layer)
    if stored is not None and not full and (stored.meta.get("seed"), stored.meta.get("sample")) != (seed, sample):
        full = True  # asked for another seed or sample size: that is another layout
    if stored is not None and not full:
        layout, counts = update(archive, stored)
        grown = layout.meta["placed_since"] > GROWTH * max(1, layout.meta["laid_out"])
        if not grown and not counts["unplaced"]:
            save(archive.db, layout)
            return {"layer": layer, "action": "updated", "items": len(layout), **counts, "meta": layout.meta}
        full = True
    layout = full_layout(archive, layer, seed=seed, sample=sample, progress=progress)
    save(archive.db, layout)
    return {"layer": layer, "action": "laid out", "items": len(layout), "meta": layout.meta}


_served: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()  # archive -> {layer: (generation, view)}


def current(archive, layer: str) -> dict | None:
    """The stored map as of the archive's committed state (updated in memory, never written), with
    each item's folder and date for filtering; None when no map was made. Cached per generation."""
    cache = _served.setdefault(archive, {})
    generation = archive.manifest.get("generation")
    if layer in cache and cache[layer][0] == generation:
        return cache[layer][1]
    stored = load(archive.db, layer)
    if stored is None:
        return None
    counts = {"kept": len(stored), "removed": 0, "added": 0, "unplaced": 0}
    layout = stored
    if stored.meta.get("generation") != generation:
        room = max(0, int(GROWTH * max(1, stored.meta["laid_out"])) - int(stored.meta.get("placed_since", 0)))
        layout, counts = update(archive, stored, limit=room)
    view = {"layout": layout, "counts": counts, **_folders_and_days(archive, layout.ids)}
    cache[layer] = (generation, view)
    return view


def _folders_and_days(archive, ids: np.ndarray) -> dict:
    """Per item: the index of its folder in a sorted list, and its date (capture date, else file date)
    as days since 1970-01-01."""
    rows = archive.catalog.db.execute(
        "select id, folder, captured_at, mtime from images where status = 'ok' order by id").fetchall()
    row_ids = np.fromiter((r[0] for r in rows), np.int64, len(rows))
    at = np.searchsorted(row_ids, ids)
    picked = [rows[i] for i in at]
    folders, folder_index = np.unique(np.array([r[1] for r in picked], dtype=object).astype(str), return_inverse=True) \
        if picked else (np.array([], str), np.zeros(0, np.int64))
    days = np.array([_day(r[2], r[3]) for r in picked], np.int64)
    return {"folders": folders.tolist(), "folder": folder_index.astype(np.int32), "day": days}


def _day(captured_at: str | None, mtime: float | None) -> int:
    if captured_at:
        try:
            return int(np.datetime64(captured_at[:10], "D").astype(np.int64))
        except ValueError:
            pass
    return int((mtime or 0) // 86400)
