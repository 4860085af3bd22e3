"""A layer's vectors as one in-memory FAISS index keyed by catalog id (what searches use), and
atomic file writes.

The index is exact inner-product search (flat) or IVF with 8-bit scalar quantization (see
index.vector_index); index.layer_store chooses and builds it, segment by segment on disk, and
index.segments assembles it for readers. Scores are inner products of L2-normalised vectors
(cosine similarities; with SQ8 codes to about 1e-3).
"""
from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import BinaryIO, Callable

import faiss
import numpy as np

from . import kinds as vi


def atomic_write(path: Path, data: bytes | Callable[[BinaryIO], None]) -> None:
    """Write to a temporary file in the same folder, fsync, rename over the target, fsync the folder.

    `data` is the bytes, or a function that writes them to the open file (streams large indexes).
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as fh:
            if callable(data):
                data(fh)
            else:
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
    """An in-memory FAISS index over L2-normalised descriptors (inner product = cosine), keyed by
    catalog id: what readers search. Its type is what it was built as (index.layer_store builds and
    changes the stored index; this class never does)."""

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
        """The stored vectors of these ids (decoded from 8-bit codes for IVF: about 1e-3 off)."""
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

    def describe(self) -> dict:
        """Type and parameters (recorded in the manifest), with the recall measured when it was built."""
        return {**vi.describe(self.index), **self.measured}

    def bytes_per_vector(self) -> float:
        """Memory the index holds per stored vector: codes, id, id lookup (an estimate; see bench_search)."""
        return vi.bytes_per_vector(self.index)

    # --- files ----------------------------------------------------------------------------------
    def save(self, path: Path) -> None:
        index = self.index
        atomic_write(Path(path), lambda fh: faiss.write_index(index, faiss.PyCallbackIOWriter(fh.write)))

    @classmethod
    def load(cls, path: Path, *, measured: dict | None = None) -> "VectorStore":
        """A store saved as one FAISS file (archives from before segments, and tests)."""
        index = faiss.read_index(str(path))
        info = vi.describe(index)
        # What was measured at build time is kept only if it describes this very index.
        keep = measured if measured and all(measured.get(k, v) == v for k, v in info.items() if k != "vectors") else None
        return cls(index.d, index, measured={k: v for k, v in (keep or {}).items() if k not in info})
