"""One FAISS index per layer, keyed by catalog id, persisted atomically."""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

import faiss
import numpy as np


def atomic_write(path: Path, data: bytes) -> None:
    """Write to a temporary file in the same folder, fsync, rename over the target, fsync the folder."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


class VectorStore:
    """Exact inner-product search over L2-normalised descriptors (inner product = cosine)."""

    def __init__(self, dim: int, index: faiss.Index | None = None):
        self.dim = dim
        self.index = index if index is not None else faiss.IndexIDMap2(faiss.IndexFlatIP(dim))
        assert self.index.d == dim, f"index dimension {self.index.d} != {dim}"

    def __len__(self) -> int:
        return int(self.index.ntotal)

    def ids(self) -> np.ndarray:
        return faiss.vector_to_array(self.index.id_map).astype(np.int64)

    def add(self, ids: np.ndarray, vectors: np.ndarray) -> None:
        """Insert or replace the vectors of these ids."""
        n, d = vectors.shape
        assert d == self.dim, f"expected vectors of dimension {self.dim}, got {d}"
        assert ids.shape == (n,), f"expected {n} ids, got shape {ids.shape}"
        ids = np.ascontiguousarray(ids, dtype=np.int64)
        self.remove(ids)
        self.index.add_with_ids(np.ascontiguousarray(vectors, dtype=np.float32), ids)

    def remove(self, ids: np.ndarray) -> int:
        ids = np.ascontiguousarray(ids, dtype=np.int64)
        if len(ids) == 0 or len(self) == 0:
            return 0
        return int(self.index.remove_ids(faiss.IDSelectorBatch(ids)))

    def reconstruct(self, ids: np.ndarray) -> np.ndarray:
        return np.stack([self.index.reconstruct(int(i)) for i in ids]) if len(ids) else np.zeros((0, self.dim), np.float32)

    def search(self, queries: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
        """(nq, d) -> scores (nq, k') and ids (nq, k'), best first; k' = min(k, stored)."""
        nq, d = queries.shape
        assert d == self.dim, f"expected queries of dimension {self.dim}, got {d}"
        k = min(k, len(self))
        if k == 0:
            return np.zeros((nq, 0), np.float32), np.zeros((nq, 0), np.int64)
        return self.index.search(np.ascontiguousarray(queries, dtype=np.float32), k)

    def save(self, path: Path) -> None:
        atomic_write(Path(path), faiss.serialize_index(self.index).tobytes())

    @classmethod
    def load(cls, path: Path) -> "VectorStore":
        data = np.fromfile(path, dtype=np.uint8)
        index = faiss.deserialize_index(data)
        return cls(index.d, index)
