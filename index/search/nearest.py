"""Query descriptor -> FAISS -> catalog rows, best first, with folder/date filters and paging."""
from __future__ import annotations

from datetime import date, datetime, timezone
from typing import Callable

import numpy as np

from ..common.paths import prefix
from ..db.catalog import Catalog
from ..vectors.reader import VectorStore

RESULT_KEYS = ("id", "path", "score", "width", "height", "folder", "name", "size", "mtime",
               "captured_at", "camera", "title", "keywords", "format")


def nearest(
    store: VectorStore,
    catalog: Catalog,
    vector: np.ndarray,
    k: int,
    *,
    exclude=None,
    offset: int = 0,
    accept: Callable[[dict], bool] | None = None,
) -> tuple[list[dict], bool]:
    """Results offset..offset+k for one descriptor, and whether more exist.

    Ids not (yet) committed in the catalog, `exclude` (an id or a collection of ids) and rows the filter
    rejects are skipped; FAISS is asked for more neighbours until enough rows pass (never more than the
    store holds).
    """
    skip = {int(exclude)} if isinstance(exclude, (int, np.integer)) else {int(i) for i in exclude or ()}
    (d,) = vector.shape
    want = offset + k + 1  # one extra tells whether there is a next page
    fetch = want
    while True:
        scores, ids = store.search(vector[None, :], fetch)
        pairs = [(int(i), float(s)) for i, s in zip(ids[0], scores[0]) if i >= 0 and int(i) not in skip]
        rows = catalog.get([i for i, _ in pairs])
        results = [as_result(rows[i], s) for i, s in pairs if i in rows and (accept is None or accept(rows[i]))]
        if len(results) >= want or fetch >= len(store):
            return results[offset : offset + k], len(results) > offset + k
        fetch = min(len(store), fetch * 4 + 16)


def row_filter(folder: str | None = None, date_from: str | None = None, date_to: str | None = None):
    """A predicate on catalog rows: below a folder, and dated (capture date, else file date) in a range."""
    if not (folder or date_from or date_to):
        return None
    for name, value in (("date_from", date_from), ("date_to", date_to)):
        if value:
            try:
                date.fromisoformat(value[:10])
            except (TypeError, ValueError):
                raise ValueError(f"{name} must be a real date YYYY-MM-DD, got {value!r}") from None
    start = prefix(folder) if folder else None

    def accept(row: dict) -> bool:
        if start and not row["path"].startswith(start):  # strictly below the folder
            return False
        day = item_date(row)
        return not ((date_from and day < date_from) or (date_to and day > date_to[:10]))

    return accept


def item_date(row: dict) -> str:
    """'YYYY-MM-DD': the EXIF capture date when known, else the file's modification date (UTC)."""
    if row.get("captured_at"):
        return row["captured_at"][:10]
    return datetime.fromtimestamp(row["mtime"] or 0, timezone.utc).strftime("%Y-%m-%d")


def as_result(row: dict, score: float) -> dict:
    """A search result: the row's public keys, its score (6 decimals) and its date."""
    out = {key: row.get(key) for key in RESULT_KEYS}
    out["score"] = round(score, 6)
    out["date"] = item_date(row)
    return out
