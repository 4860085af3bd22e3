"""Query image or indexed item -> descriptor -> FAISS -> catalog rows, best first."""
from __future__ import annotations

import numpy as np

from .catalog import Catalog
from .store import VectorStore

RESULT_KEYS = ("id", "path", "score", "width", "height", "folder", "name", "size", "mtime",
               "captured_at", "camera", "title", "keywords", "format")


def nearest(store: VectorStore, catalog: Catalog, vector: np.ndarray, k: int, exclude: int | None = None) -> list[dict]:
    """The k best catalog rows for one descriptor; ids not (yet) committed in the catalog are skipped."""
    (d,) = vector.shape
    want = k + (1 if exclude is not None else 0)
    fetch = want
    while True:
        scores, ids = store.search(vector[None, :], fetch)
        pairs = [(int(i), float(s)) for i, s in zip(ids[0], scores[0]) if i >= 0 and i != exclude]
        rows = catalog.get([i for i, _ in pairs])
        results = [_result(rows[i], s) for i, s in pairs if i in rows]
        # Rows still pending (an indexer is writing) are dropped; fetch more until k are found.
        if len(results) >= k or fetch >= len(store):
            return results[:k]
        fetch = min(len(store), fetch * 2 + 8)


def _result(row: dict, score: float) -> dict:
    out = {key: row.get(key) for key in RESULT_KEYS}
    out["score"] = round(score, 6)
    return out
