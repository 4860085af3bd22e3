"""The readers' side of the stores: a layer's vectors as one in-memory FAISS index keyed by catalog
id (VectorStore, what searches use), and the stores of an archive as one process reads them (Reader).

The index is exact inner-product search (flat) or IVF with scalar-quantized codes (see
index.vectors.kinds). On disk it is segment files: the indexer's writer (index.vectors.writer) fills
them and decides when the type changes, index.vectors.rebuild re-lays them out, and
index.vectors.segments assembles them into the one index a reader searches. Scores are inner products
of L2-normalised vectors (cosine similarities; with 16-bit float codes to about 1e-4, 8-bit ones about 1e-3).
"""
from __future__ import annotations

from pathlib import Path
from typing import Callable

import faiss
import numpy as np

from ..common.errors import ArchiveError
from ..common.files import atomic_write
from . import kinds as vi
from .segments import StoreFileError, assemble, update


class VectorStore:
    """An in-memory FAISS index over L2-normalised descriptors (inner product = cosine), keyed by
    catalog id: what readers search. Its type is what it was built as (the writer and the rebuild
    change the stored index; this class never does)."""

    def __init__(self, dim: int, index: faiss.Index | None = None, *, measured: dict | None = None):
        self.dim = dim
        self.index = index if index is not None else vi.flat(dim)
        self.measured = dict(measured or {})  # how the index was built and how well it recalls
        self.files: dict[str, np.ndarray] | None = None  # segment file -> its ids, when assembled from segments
        assert self.index.d == dim, f"index dimension {self.index.d} != {dim}"

    @property
    def kind(self) -> str:
        return vi.kind_of(self.index)

    def __len__(self) -> int:
        return int(self.index.ntotal)

    def ids(self) -> np.ndarray:
        return vi.stored_ids(self.index)

    def add(self, ids: np.ndarray, vectors: np.ndarray) -> None:
        """Insert or replace the vectors of these ids."""
        n, d = vectors.shape
        assert d == self.dim, f"expected vectors of dimension {self.dim}, got {d}"
        assert ids.shape == (n,), f"expected {n} ids, got shape {ids.shape}"
        ids = np.ascontiguousarray(ids, dtype=np.int64)
        if n == 0:
            return
        if len(self):
            self.remove(ids)  # a replacement keeps one vector per id
        self.index.add_with_ids(np.ascontiguousarray(vectors, dtype=np.float32), ids)

    def remove(self, ids: np.ndarray) -> int:
        ids = np.ascontiguousarray(ids, dtype=np.int64)
        if len(ids) == 0 or len(self) == 0:
            return 0
        return vi.remove(self.index, ids)

    def reconstruct(self, ids: np.ndarray) -> np.ndarray:
        """The stored vectors of these ids (decoded from the codes for IVF: 16-bit floats about 1e-4 off,
        8-bit codes about 1e-3)."""
        ids = np.ascontiguousarray(ids, dtype=np.int64)
        if len(ids) == 0:
            return np.zeros((0, self.dim), np.float32)
        return vi.reconstruct(self.index, ids)

    def search(self, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        """(nq, d) -> scores (nq, k') and ids (nq, k'), best first; k' = min(k, stored).

        An approximate index may return fewer than k' hits for a query; the rest have id -1.
        """
        nq, d = queries.shape
        assert d == self.dim, f"expected queries of dimension {self.dim}, got {d}"
        k = min(k, len(self))
        if k == 0:
            return np.zeros((nq, 0), np.float32), np.zeros((nq, 0), np.int64)
        return self.index.search(np.ascontiguousarray(queries, dtype=np.float32), k)

    def index_info(self) -> dict:
        """Type and parameters (recorded in the manifest), with the recall measured when it was built."""
        return {**vi.index_info(self.index), **self.measured}

    # --- files ----------------------------------------------------------------------------------
    def save(self, path: Path) -> None:
        index = self.index
        atomic_write(Path(path), lambda fh: faiss.write_index(index, faiss.PyCallbackIOWriter(fh.write)))

    @classmethod
    def load(cls, path: Path, *, measured: dict | None = None) -> "VectorStore":
        """A store saved as one FAISS file (archives from before segments, and tests)."""
        index = faiss.read_index(str(path))
        info = vi.index_info(index)
        # What was measured at build time is kept only if it describes this very index.
        same = measured and all(measured.get(k, v) == v for k, v in info.items() if k != "vectors")
        keep = measured if same else None
        return cls(index.d, index, measured={k: v for k, v in (keep or {}).items() if k not in info})


class Reader:
    """Every layer's store as this process reads it: loaded on first use from the files the manifest
    names (every segment in one FAISS index), then kept in step with the manifest's commits.

    `manifest` is the archive's own dict, shared with its indexer; it is replaced in place (never
    rebound) when a newer commit is read. `read` reads the manifest file anew (None if absent)."""

    def __init__(self, db: Path, manifest: dict, read: Callable[[], dict | None]):
        self.db = Path(db)
        self.manifest = manifest
        self._read = read
        self._stores: dict[str, VectorStore] = {}

    def store(self, layer: str) -> VectorStore:
        """Layer `layer` (its manifest name) as of the last committed checkpoint."""
        if layer not in self._stores:
            self._stores[layer] = self._load(layer)
        return self._stores[layer]

    def _load(self, layer: str, attempts: int = 5) -> VectorStore:
        for attempt in range(attempts):
            entry = next(l for l in self.manifest["layers"] if l["name"] == layer)
            state = self.manifest.get("stores", {}).get(layer)
            try:
                if state:
                    files: dict = {}
                    store = VectorStore(int(state["dim"]), assemble(self.db, state, files),
                                        measured=state.get("measured"))
                    store.files = files
                    return store
                legacy = self.db / entry["file"]  # a store from before segments: one FAISS file
                if legacy.exists():
                    return VectorStore.load(legacy, measured=self.manifest.get("indexes", {}).get(layer))
                return VectorStore(entry["dim"])
            except FileNotFoundError:
                # An indexer committed a newer state and removed files of the one read: read it again.
                if attempt + 1 == attempts or not self.reread_manifest():
                    raise ArchiveError(f"the vector store of layer {layer} names files that are missing; "
                                       "run `kinscope check`") from None
            except StoreFileError as exc:
                raise ArchiveError(f"{exc}; run `kinscope check`") from None
        raise AssertionError("unreachable")

    def reread_manifest(self) -> bool:
        """Take the manifest on disk if an indexer committed since it was read; True if it had."""
        try:
            current = self._read()
        except ValueError:
            return False
        changed = bool(current) and current.get("generation") != self.manifest.get("generation")
        if changed:
            self.manifest.clear()
            self.manifest.update(current)
        return changed

    def refresh(self) -> bool:
        """Pick up a newer commit: loaded stores read only the segments that changed (an indexer's
        checkpoint replaces its tail and adds a few); after a rebuild, or if that fails, a store is
        loaded anew when next needed. True if anything changed."""
        before = self.manifest.get("stores", {})
        if not self.reread_manifest():
            return False
        self.follow(before)
        return True

    def follow(self, before: dict) -> None:
        """Loaded stores follow the manifest's new states (from `before`, the states they were loaded
        at): by the segments that changed, or loaded anew when next needed."""
        for layer, store in list(self._stores.items()):
            old, new = before.get(layer), self.manifest.get("stores", {}).get(layer)
            try:
                kept = bool(old and new and store.files is not None
                            and update(store.index, store.files, self.db, old, new))
            except (OSError, StoreFileError, RuntimeError):
                kept = False
            if kept:
                store.measured = dict(new.get("measured") or {})
            else:
                del self._stores[layer]
