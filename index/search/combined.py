"""Several layers' cosine similarities with weights: the "combined" choice beside the layer presets.

    score(x) = sum_l w_l * cos(q_l, x_l)        (weights sum to 1, so 1.0 is still "identical")

Candidates: the best CANDIDATES_PER_K * (offset + k) + CANDIDATES_EXTRA items of each layer's own index
(with the search's filters), their union re-scored exactly from every layer's stored vectors (decoded
codes for an IVF store: 16-bit floats about 1e-4 off, 8-bit codes about 1e-3). An item that is in no
layer's candidate list is not ranked, so deep pages are approximate; the benchmark
(scripts/bench_retrieval.py) ranks every item.
The weights of COMBINED_WEIGHTS were chosen by that benchmark (docs/retrieval.md).
"""
from __future__ import annotations

from typing import Callable

import numpy as np

from ..db.catalog import Catalog
from ..vectors.reader import VectorStore
from .nearest import as_result, nearest

COMBINED = "combined"
COMBINED_WEIGHTS = {"parts": 0.5, "objects": 0.5}
CANDIDATES_PER_K, CANDIDATES_EXTRA = 4, 50


def layer_weights(layer, names: list[str], default: str) -> dict[str, float]:
    """{layer name: weight} for a search: one layer (weight 1), "combined", or a dict of weights.

    Raises ValueError with a plain message for a layer the archive lacks or weights that are not positive."""
    if layer is None:
        layer = default
    if isinstance(layer, str) and layer != COMBINED:
        return {layer: 1.0}
    weights = dict(COMBINED_WEIGHTS if layer == COMBINED else layer)
    missing = [n for n in weights if n not in names]
    if missing:
        raise ValueError(f"the {COMBINED} choice needs the layer(s) {', '.join(missing)}, which this archive lacks; "
                         f"it has: {', '.join(names)}")
    if not weights or any(not w > 0 for w in weights.values()):
        raise ValueError("layer weights must be positive")
    total = float(sum(weights.values()))
    return {n: float(w) / total for n, w in weights.items()}


def vectors_of(stores: dict[str, VectorStore], ids: list[int]) -> tuple[list[int], dict[str, np.ndarray]]:
    """The ids every store holds and their stored vectors per layer (ids a store lacks are left out)."""
    try:
        return ids, {name: store.reconstruct(np.array(ids, np.int64)) for name, store in stores.items()}
    except RuntimeError:  # one of them is not (yet) in some store: find which, one by one
        pass
    keep = []
    for i in ids:
        try:
            for store in stores.values():
                store.reconstruct(np.array([i], np.int64))
        except RuntimeError:
            continue
        keep.append(i)
    return keep, {name: store.reconstruct(np.array(keep, np.int64)) for name, store in stores.items()}


def ranked(stores: dict[str, VectorStore], weights: dict[str, float], catalog: Catalog, queries: dict[str, np.ndarray],
           want: int, *, exclude=None, accept: Callable[[dict], bool] | None = None) -> tuple[list[dict], bool]:
    """The best `want` items by the weighted sum of similarities, best first, and whether more exist.

    Each result carries `layers`: its similarity on each layer."""
    fetch = CANDIDATES_PER_K * want + CANDIDATES_EXTRA
    candidates, more = {}, False
    for name in weights:
        rows, more_here = nearest(stores[name], catalog, queries[name], fetch, exclude=exclude, accept=accept)
        more = more or more_here
        candidates.update({r["id"]: r for r in rows})
    ids, vectors = vectors_of({n: stores[n] for n in weights}, sorted(candidates))
    if not ids:
        return [], False
    per_layer = {n: vectors[n] @ queries[n] for n in weights}
    total = sum(weights[n] * per_layer[n] for n in weights)
    order = np.argsort(-total, kind="stable")
    rows = catalog.get([ids[j] for j in order[:want]])
    out = []
    for j in order[:want]:
        if ids[j] in rows:
            r = as_result(rows[ids[j]], float(total[j]))
            r["layers"] = {n: round(float(per_layer[n][j]), 6) for n in weights}
            out.append(r)
    return out, more or len(ids) > want
