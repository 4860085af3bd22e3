"""Settings of the duplicate benchmark beyond one family at a time (used by scripts/bench_duplicates.py).

- many versions: every original with 5, 10 or 19 of its copies in one run, with the distractors; pairs
  between two copies of one original count. 5 and 10 are drawn per original (fixed seed) from the 16
  standard variants; 19 is every variant, the hard ones (crop 50%, rotation by 90 degrees, flip) too.
  Precision counts every predicted pair; recall is given over the standard pairs (both items the
  original or a standard copy: the target's scope) and over all pairs.
- large: the same runs with thousands of extra generated distractors (scripts/dup_distractors.py).
"""
from __future__ import annotations

from itertools import combinations

import numpy as np

from dup_set import STANDARD_FAMILIES, TRANSFORMS

VERSION_COUNTS = (5, 10, 19)
STANDARD_VARIANTS = [f"{f}/{v}" for f in STANDARD_FAMILIES for v in TRANSFORMS[f]]
ALL_VARIANTS = [f"{f}/{v}" for f in TRANSFORMS for v in TRANSFORMS[f]]


def versions(labels: list[dict], count: int, seed: int = 0) -> np.ndarray:
    """Positions of the originals, `count` copies of each, and the distractors (every label without a source)."""
    rng = np.random.default_rng(seed)
    chosen = {}
    for l in labels:
        if l["source"] and l["family"] is None:
            pool = ALL_VARIANTS if count >= len(ALL_VARIANTS) else STANDARD_VARIANTS
            chosen[l["source"]] = set(rng.choice(pool, min(count, len(pool)), replace=False).tolist())
    return np.array([n for n, l in enumerate(labels) if l["source"] is None or l["family"] is None
                     or f"{l['family']}/{l['variant']}" in chosen[l["source"]]])


def is_standard(label: dict) -> bool:
    return label["source"] is not None and (label["family"] is None or label["family"] in STANDARD_FAMILIES)


def counts(clusters: list[set[int]], labels: list[dict], sel: np.ndarray) -> np.ndarray:
    """[true pairs predicted, false pairs predicted, standard pairs missed, all pairs missed, standard pairs, all
    pairs] for groups given as sets of positions into `labels`, among the positions `sel`."""
    predicted = {p for c in clusters for p in combinations(sorted(c), 2)}
    by_source: dict[str, list[int]] = {}
    for n in sel.tolist():
        if labels[n]["source"] is not None:
            by_source.setdefault(labels[n]["source"], []).append(n)
    truth = {p for ids in by_source.values() for p in combinations(sorted(ids), 2)}
    std = {p for p in truth if is_standard(labels[p[0]]) and is_standard(labels[p[1]])}
    tp = len(predicted & truth)
    return np.array([tp, len(predicted) - tp, len(std - predicted), len(truth - predicted), len(std), len(truth)])


def ratios(c: np.ndarray) -> tuple[float, float, float]:
    """(precision, recall on standard pairs, recall on all pairs) from summed `counts`."""
    tp, fp, miss_std, miss_all, n_std, n_all = c.tolist()
    p = tp / (tp + fp) if tp + fp else 1.0
    return p, (n_std - miss_std) / n_std if n_std else 1.0, (n_all - miss_all) / n_all if n_all else 1.0


def phash_groups(bits: np.ndarray, max_distance: int, star_groups) -> list[np.ndarray]:
    """pHash pairs within Hamming distance `max_distance` (FAISS binary range search), grouped by the star rule."""
    import faiss

    packed = np.packbits(bits.astype(np.uint8), axis=1)
    index = faiss.IndexBinaryFlat(bits.shape[1])
    index.add(packed)
    lims, dist, nb = index.range_search(packed, max_distance + 1)  # radius is exclusive
    i = np.repeat(np.arange(len(bits)), np.diff(lims).astype(np.int64))
    keep = i < nb
    i, j, d = i[keep], nb[keep].astype(np.int64), dist[keep]
    score = (1.0 - d / bits.shape[1]).astype(np.float32)
    return [m for _, m in star_groups(len(bits), i, j, score)]
