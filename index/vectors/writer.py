"""The indexer's side of one layer's vector store: appends, removals and checkpoints in bounded memory.

A LayerStore keeps in memory only the codec (the trained IVF index, empty; none while flat) and
the open segment (the tail) that new vectors go into; the sealed segments stay on disk (index.vectors.segments).
- add: into the tail; an id already stored elsewhere is removed there first (a re-embedded file).
- remove: from the tail, and from each sealed segment whose id range may hold the ids (that segment
  is rewritten into a new file without them).
- flush (at every checkpoint): the tail is written to a new file, and sealed once it holds
  SEGMENT_BYTES; returns the layer's new state for the manifest. Nothing is overwritten: the files
  the committed manifest names stay until `committed()` is called after the manifest is written,
  so a crash at any point leaves the last committed state whole (plus unreferenced leftovers, which
  `remove_leftovers` deletes at the next start).
- when the store's size calls for another index type (flat -> IVF, IVF grown past its lists, or
  shrunk back to flat), index.vectors.rebuild rebuilds it segment by segment.
Memory: the codec (nlist x dim floats), one tail, one segment being rewritten; not the archive.
"""
from __future__ import annotations

import os
from pathlib import Path

import faiss
import numpy as np

from . import kinds as vi
from . import segments as sg
from .kinds import FLAT, IVF, IndexPolicy
from .segments import Segment

SEGMENT_BYTES = 32 * 2**20  # a segment is sealed once it holds this much index data
ABSORB_BELOW = SEGMENT_BYTES // 4  # a sealed segment shrunk below this goes back into the tail


class LayerStore:
    def __init__(self, db: Path, layer: str, dim: int, state: dict | None, *, policy: IndexPolicy | None = None,
                 legacy: Path | None = None):
        self.db = Path(db)
        self.layer = layer
        self.folder = sg.layer_folder(layer)
        self.policy = policy or IndexPolicy()
        self.garbage: list[str] = []  # committed files the next commit no longer names
        self.fresh: set[str] = set()  # files written since the last commit
        self.codec_dirty = False
        if state:
            self.dim = int(state["dim"])
            self.codec_file = state.get("codec")
            self.codec = sg.read_codec(self.db, self.codec_file) if self.codec_file else None
            self.sealed = [Segment.from_dict(s) for s in state.get("segments", [])]
            self.measured = dict(state.get("measured") or {})
            self._counter = int(state.get("next_file", 0))
        else:
            self.dim, self.codec_file, self.codec = dim, None, None
            self.sealed, self.measured, self._counter = [], {}, 0
        self.tail = sg.empty(self.dim, self.codec)
        self.tail_from: Segment | None = None  # the committed segment the tail was loaded from
        self.tail_dirty = False
        self._tail_max = -1
        if legacy is not None and not state:
            self._split_legacy(legacy)
        self._open_tail()

    # --- sizes ----------------------------------------------------------------------------------
    @property
    def kind(self) -> str:
        return FLAT if self.codec is None else IVF

    def __len__(self) -> int:
        return sum(s.vectors for s in self.sealed) + int(self.tail.ntotal)

    def nlist(self) -> int:
        return 0 if self.codec is None else int(sg.ivf_of(self.codec).nlist)

    def tail_bytes(self) -> int:
        return sg.data_bytes(self.codec, self.dim, int(self.tail.ntotal))

    def index_info(self) -> dict:
        out = {"type": self.kind, "vectors": len(self), "dim": self.dim}
        if self.codec is not None:
            out.update(vi.ivf_fields(self.codec))
        return {**out, **{k: v for k, v in self.measured.items() if k not in out}}

    # --- reading --------------------------------------------------------------------------------
    def ids(self) -> np.ndarray:
        parts = [sg.read_ids(self.db, s) for s in self.sealed]
        parts.append(vi.stored_ids(self.tail))
        return np.concatenate(parts) if parts else np.zeros(0, np.int64)

    def segment_arrays(self, wanted: np.ndarray | None = None):
        """(segment or None for the tail, arrays) for every segment, one at a time; with `wanted`
        (sorted ids), only the segments whose id range may hold some of them are read."""
        for s in self.sealed:
            if wanted is None or s.may_hold(wanted):
                yield s, sg.read_segment(self.db, s, self.codec_file)
        yield None, sg.extract(self.tail)

    def reconstruct(self, ids: np.ndarray) -> np.ndarray:
        """The stored vectors of these ids, in their order (RuntimeError if one is not stored)."""
        ids = np.ascontiguousarray(ids, np.int64)
        out = np.zeros((len(ids), self.dim), np.float32)
        found = np.zeros(len(ids), bool)
        for _, arrays in self.segment_arrays(np.unique(ids)):
            held = arrays["ids"]
            order = np.argsort(held, kind="stable")
            at = np.minimum(np.searchsorted(held[order], ids), max(0, len(held) - 1))
            hit = (held[order][at] == ids) if len(held) else np.zeros(len(ids), bool)
            if hit.any():
                rows = order[at[hit]]
                out[hit] = sg.decode(self.codec, sg.subset(arrays, rows))
                found |= hit
        if not found.all():
            raise RuntimeError(f"{int((~found).sum())} ids are not in the {self.layer} store")
        return out

    # --- changing -------------------------------------------------------------------------------
    def add(self, ids: np.ndarray, vectors: np.ndarray) -> None:
        """Insert or replace the vectors of these ids; the index type follows the new size."""
        n, d = vectors.shape
        assert d == self.dim, f"expected vectors of dimension {self.dim}, got {d}"
        assert ids.shape == (n,), f"expected {n} ids, got shape {ids.shape}"
        if n == 0:
            return
        ids = np.ascontiguousarray(ids, np.int64)
        low = int(ids.min())
        if self.sealed and low <= max(s.max_id for s in self.sealed):
            self._remove_sealed(ids)  # re-embedded items; fresh catalog ids (above every stored one) skip this
        if self.tail.ntotal and low <= self._tail_max:
            vi.remove(self.tail, ids)
        self.tail.add_with_ids(np.ascontiguousarray(vectors, np.float32), ids)
        self._tail_max = max(self._tail_max, int(ids.max()))
        self.tail_dirty = True
        self.maintain()

    def remove(self, ids: np.ndarray) -> int:
        ids = np.unique(np.ascontiguousarray(ids, np.int64))
        if len(ids) == 0 or len(self) == 0:
            return 0
        removed = 0
        if self.tail.ntotal:
            removed += vi.remove(self.tail, ids)
            self.tail_dirty = self.tail_dirty or removed > 0
        removed += self._remove_sealed(ids)
        if removed:
            self.maintain()
        return removed

    def _remove_sealed(self, ids: np.ndarray) -> int:
        wanted = np.unique(ids)
        removed, kept = 0, []
        for s in self.sealed:
            if not s.may_hold(wanted):
                kept.append(s)
                continue
            hit = np.isin(sg.read_ids(self.db, s), wanted)
            if not hit.any():
                kept.append(s)
                continue
            arrays = sg.read_segment(self.db, s, self.codec_file)
            removed += int(hit.sum())
            self._drop(s.file)
            if not hit.all():
                kept.append(self._write(sg.subset(arrays, ~hit)))
        self.sealed = kept
        return removed

    # --- index type -----------------------------------------------------------------------------
    def maintain(self) -> bool:
        """Rebuild when the size calls for another index type."""
        kind = vi.wanted_kind(self.kind, len(self), self.dim, self.nlist(), self.policy,
                              self.measured.get("built_for"))
        if kind is None:
            return False
        self.rebuild(kind)
        return True

    def rebuild(self, kind: str | None = None, *, transform=None, dim: int | None = None) -> None:
        """Re-lay every vector out as index type `kind` (default: what the size calls for), segment by
        segment; `transform` maps vectors to a new space of dimension `dim` (learned whitening)."""
        from .rebuild import rebuild

        dim = dim or self.dim
        kind = kind or vi.wanted_kind(FLAT, len(self), dim, 0, self.policy) or FLAT
        codec_file = self._name("codec", ".faiss") if kind == IVF else None
        written: list[Segment] = []

        def write(arrays: dict) -> Segment:
            file = self._name("seg", ".npz")
            segment = sg.write_segment(self.db, file, arrays, codec_file)
            self.fresh.add(file)
            written.append(segment)
            return segment

        try:
            result = rebuild(self, kind, transform=transform, dim=dim, write=write,
                             read=lambda segment: sg.read_segment(self.db, segment, codec_file),
                             segment_bytes=SEGMENT_BYTES)
            if codec_file is not None:  # after calibration, so that the file holds the chosen nprobe
                sg.write_codec(self.db, codec_file, result.codec)
                self.fresh.add(codec_file)
        except BaseException:  # interrupted: the store stays as it was, the new files go
            for segment in written:
                self._drop(segment.file)
            if codec_file is not None:
                self._drop(codec_file)
            raise
        for old in self.sealed + ([self.tail_from] if self.tail_from is not None else []):
            self._drop(old.file)
        if self.codec_file is not None:
            self._drop(self.codec_file)
        self.dim, self.codec, self.codec_file, self.measured = dim, result.codec, codec_file, result.measured
        self.sealed = written
        self.tail, self.tail_from, self.tail_dirty = sg.index_with_map(result.tail), None, True
        ids = vi.stored_ids(self.tail)
        self._tail_max = int(ids.max()) if len(ids) else -1

    # --- checkpoints ----------------------------------------------------------------------------
    def flush(self) -> dict:
        """Write what changed since the last checkpoint; the layer's state for the manifest."""
        self._absorb_small()
        if self.tail_dirty:
            if self.tail_from is not None:
                self._drop(self.tail_from.file)
                self.tail_from = None
            if self.tail.ntotal:
                segment = self._write(sg.extract(self.tail))
                if self.tail_bytes() >= SEGMENT_BYTES:
                    self.sealed.append(segment)
                    self.tail, self._tail_max = sg.empty(self.dim, self.codec), -1
                else:
                    self.tail_from = segment
            self.tail_dirty = False
        return self.state()

    def state(self) -> dict:
        segments = self.sealed + ([self.tail_from] if self.tail_from is not None else [])
        return {"kind": self.kind, "dim": self.dim, "codec": self.codec_file,
                "segments": [s.to_dict() for s in segments], "measured": self.measured,
                "next_file": self._counter}

    def committed(self) -> None:
        """The manifest naming the flushed state is on disk: files it no longer names can go."""
        for file in self.garbage:
            (self.db / file).unlink(missing_ok=True)
        self.garbage.clear()
        self.fresh.clear()

    def remove_leftovers(self) -> list[str]:
        """Delete files in this layer's folder that the committed state does not name (an interrupted
        write's). Only for the indexer, under its lock: they may be another writer's work otherwise."""
        keep = sg.referenced(self.state()) | self.fresh
        return remove_unreferenced(self.db, self.folder, keep)

    # --- internals ------------------------------------------------------------------------------
    def _name(self, stem: str, suffix: str) -> str:
        self._counter += 1
        return f"{self.folder}/{stem}-{self._counter:06d}{suffix}"

    def _write(self, arrays: dict) -> Segment:
        file = self._name("seg", ".npz")
        segment = sg.write_segment(self.db, file, arrays, self.codec_file)
        self.fresh.add(file)
        return segment

    def _drop(self, file: str) -> None:
        if file in self.fresh:  # never committed: nobody can be reading it
            (self.db / file).unlink(missing_ok=True)
            self.fresh.discard(file)
        else:
            self.garbage.append(file)

    def _open_tail(self) -> None:
        """Carry on filling the last segment if it is small (each run would leave a small one otherwise)."""
        if self.sealed and self.sealed[-1].bytes < SEGMENT_BYTES // 2:
            last = self.sealed.pop()
            sg.fill(self.tail, sg.read_segment(self.db, last, self.codec_file))
            sg.index_with_map(self.tail)
            self.tail_from, self._tail_max = last, last.max_id

    def _absorb_small(self) -> None:
        """Sealed segments that removals shrank go back into the tail, so they do not pile up."""
        room = SEGMENT_BYTES - self.tail_bytes()
        kept = []
        for s in self.sealed:
            if s.bytes < ABSORB_BELOW and s.bytes <= room:
                arrays = sg.read_segment(self.db, s, self.codec_file)
                if self.tail.ntotal:
                    vi.remove(self.tail, arrays["ids"])
                sg.fill(self.tail, arrays)
                sg.index_with_map(self.tail)
                self._tail_max = max(self._tail_max, s.max_id)
                self._drop(s.file)
                room -= s.bytes
                self.tail_dirty = True
            else:
                kept.append(s)
        self.sealed = kept

    def _split_legacy(self, path: Path) -> None:
        """A store from before segments (one FAISS file for the layer): its codec and segments."""
        index = faiss.read_index(str(path))
        self.dim = int(index.d)
        arrays = sg.extract(index)
        if vi.kind_of(index) == IVF:
            index.reset()  # what is left is the trained, empty index: the codec
            sg.ivf_of(index).set_direct_map_type(faiss.DirectMap.NoMap)
            self.codec, self.codec_file = index, self._name("codec", ".faiss")
            sg.write_codec(self.db, self.codec_file, index)
            self.fresh.add(self.codec_file)
        del index
        per = max(1, SEGMENT_BYTES // max(1, sg.data_bytes(self.codec, self.dim, 1)))
        for start in range(0, len(arrays["ids"]), per):
            self.sealed.append(self._write({k: v[start:start + per] for k, v in arrays.items()}))
        self.tail = sg.empty(self.dim, self.codec)
        self.garbage.append(os.path.relpath(path, self.db))


def remove_unreferenced(db: Path, folder: str, keep: set[str]) -> list[str]:
    base = Path(db) / folder
    if not base.is_dir():
        return []
    gone = []
    for p in sorted(base.iterdir()):
        rel = f"{folder}/{p.name}"
        if p.is_file() and rel not in keep and (sg.is_store_file(p.name) or
                                                (p.name.startswith(".") and p.name.endswith(".tmp"))):
            p.unlink()
            gone.append(rel)
    return gone
