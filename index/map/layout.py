"""A 2-D layout of descriptors: PCA, then t-SNE on a sample, the rest placed by FAISS neighbours.

Published methods only: PCA to 50 dimensions before t-SNE (van der Maaten and Hinton 2008 do the
same), t-SNE with FFT-accelerated gradients (Linderman et al. 2019) through openTSNE (Policar et al.
2019), neighbours for the affinities found exactly by FAISS so that a fixed seed gives the same
layout. Archives larger than the sample are laid out from a uniform sample; every other item is put
by its nearest sampled neighbours (weighted_position; the same rule places items indexed after the
map was made, see index.map.collection). The method, the sample size and the placement rule were
chosen by measurement: docs/map.md, scripts/bench_map.py.
"""
from __future__ import annotations

import os
from dataclasses import dataclass
from typing import Callable

import faiss
import numpy as np

PCA_DIM = 50  # t-SNE on PCA-reduced input, as in van der Maaten and Hinton (2008)
PERPLEXITY = 30.0  # openTSNE's and scikit-learn's default
SAMPLE = 10_000  # items laid out by t-SNE; the rest are placed (docs/map.md: time vs neighbour keeping)
PLACE_K = 10  # sampled neighbours an item's position is taken from
TAU = 0.02  # width of the placement weights, relative to the nearest anchor's squared distance
SPREAD = 0.3  # offsets of placed items, relative to the spacing of anchors on the map
FFT_FROM = 10_000  # t-SNE gradients by FFT interpolation from this many points, Barnes-Hut below
CHUNK = 50_000  # vectors read and placed at a time (bounds memory)


@dataclass
class Projection:
    """PCA fitted on a sample: x -> (x - mean) @ components.T (exact SVD, signs fixed: deterministic)."""

    mean: np.ndarray
    components: np.ndarray

    @classmethod
    def fit(cls, x: np.ndarray, dim: int = PCA_DIM) -> "Projection":
        x = np.asarray(x, np.float64)
        mean = x.mean(axis=0)
        cov = np.cov(x - mean, rowvar=False) if len(x) > 1 else np.zeros((x.shape[1], x.shape[1]))
        values, vectors = np.linalg.eigh(np.atleast_2d(cov))
        order = np.argsort(values)[::-1][: min(dim, x.shape[1], max(1, len(x) - 1))]
        comps = vectors[:, order].T
        # An eigenvector's sign is arbitrary: make its largest entry positive so reruns agree.
        comps *= np.sign(comps[np.arange(len(comps)), np.abs(comps).argmax(axis=1)])[:, None]
        return cls(mean.astype(np.float32), comps.astype(np.float32))

    def __call__(self, x: np.ndarray) -> np.ndarray:
        return np.ascontiguousarray((np.asarray(x, np.float32) - self.mean) @ self.components.T)


def exact_neighbours(x: np.ndarray, k: int, queries: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The k nearest rows of x (euclidean) for each query, by FAISS exact search; without queries each
    row's neighbours other than itself. Returns (indices, distances)."""
    index = faiss.IndexFlatL2(x.shape[1])
    index.add(np.ascontiguousarray(x, np.float32))
    self_query = queries is None
    q = x if self_query else queries
    k_ask = min(len(x), k + 1 if self_query else k)
    d2, idx = index.search(np.ascontiguousarray(q, np.float32), k_ask)
    if self_query:  # drop each row itself (wherever a tie put it)
        keep = idx != np.arange(len(q))[:, None]
        idx = np.array([row[m][:k] for row, m in zip(idx, keep)])
        d2 = np.array([row[m][:k] for row, m in zip(d2, keep)])
    return idx, np.sqrt(np.maximum(d2, 0))


def tsne(x: np.ndarray, seed: int = 0, *, perplexity: float = PERPLEXITY, n_jobs: int | None = None) -> np.ndarray:
    """t-SNE of the rows of x (openTSNE, PCA initialisation), neighbours from FAISS."""
    from openTSNE import TSNEEmbedding, affinity, initialization
    from openTSNE.nearest_neighbors import PrecomputedNeighbors

    n = len(x)
    if n < 4:  # too few points for perplexity-based affinities: a line is as good as any layout
        return np.stack([np.arange(n, dtype=np.float32), np.zeros(n, np.float32)], axis=1)
    jobs = n_jobs or os.cpu_count() or 1
    perplexity = min(perplexity, (n - 1) / 3)
    k = min(n - 1, int(3 * perplexity))
    idx, dist = exact_neighbours(x, k)
    aff = affinity.PerplexityBasedNN(knn_index=PrecomputedNeighbors(idx, dist), perplexity=perplexity,
                                     n_jobs=jobs, random_state=seed, verbose=False)
    init = initialization.pca(x, random_state=seed)
    # Barnes-Hut below FFT_FROM points, where the FFT's fixed grid costs more (openTSNE's own advice).
    gradient = "fft" if n >= FFT_FROM else "bh"
    embedding = TSNEEmbedding(init, aff, negative_gradient_method=gradient, n_jobs=jobs, random_state=seed,
                              verbose=False)
    embedding = embedding.optimize(n_iter=250, exaggeration=12, momentum=0.5)  # early exaggeration phase
    embedding = embedding.optimize(n_iter=500, momentum=0.8)
    return np.asarray(embedding, np.float32)


def place(queries: np.ndarray, anchors: np.ndarray, anchor_xy: np.ndarray, ids: np.ndarray,
          k: int = PLACE_K) -> np.ndarray:
    """Positions for query vectors from their k nearest anchors (exact FAISS search)."""
    idx, dist = exact_neighbours(anchors, min(k, len(anchors)), queries)
    return weighted_position(idx, dist, anchor_xy, ids)


def weighted_position(idx: np.ndarray, dist: np.ndarray, anchor_xy: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """Where items go from their nearest anchors (rows of anchor_xy; -1 = none; nearest first).

    Weights fall off as exp(-(d^2 - d1^2) / (TAU d1^2)) from the nearest distance d1: measured on
    synthetic clusters (docs/map.md), a plain or inverse-distance mean of 10 neighbours, whose distances
    are all alike in many dimensions, put items between islands and kept a quarter as many neighbours
    as following the nearest anchor. An identical descriptor (d1 = 0) follows its twin alone. Each item
    is then moved by a small offset fixed by its id (within SPREAD of the distance from its nearest
    anchor to that anchor's nearest neighbour on the map), so that items following one anchor do not
    hide each other."""
    valid = idx >= 0
    d2 = np.where(valid, np.asarray(dist, np.float64) ** 2, np.inf)
    d1 = d2.min(axis=1, keepdims=True)
    w = np.where(valid, np.exp(-(d2 - d1) / (TAU * d1 + 1e-12)), 0.0)
    w /= np.maximum(w.sum(axis=1, keepdims=True), 1e-300)
    xy = (w[..., None] * anchor_xy[np.where(valid, idx, 0)].astype(np.float64)).sum(axis=1)
    nearest = idx[np.arange(len(idx)), np.argmin(d2, axis=1)] if len(idx) else np.zeros(0, np.int64)
    return (xy + _offsets(ids, _spacing(anchor_xy, nearest))).astype(np.float32)


def _spacing(anchor_xy: np.ndarray, which: np.ndarray) -> np.ndarray:
    """For the anchors `which`: the map distance to their nearest other anchor."""
    from scipy.spatial import cKDTree

    if len(anchor_xy) < 2 or len(which) == 0:
        return np.zeros(len(which))
    unique, back = np.unique(which, return_inverse=True)
    d, _ = cKDTree(anchor_xy).query(anchor_xy[unique], k=2)
    return d[:, 1][back]


def _offsets(ids: np.ndarray, spacing: np.ndarray) -> np.ndarray:
    """A point in a disc of radius SPREAD x spacing, spread evenly over ids (R2 sequence) and fixed by each id."""
    ids = np.asarray(ids, np.float64)
    radius = SPREAD * spacing * np.sqrt(np.modf(ids * 0.7548776662466927 + 0.5)[0])
    angle = 2 * np.pi * np.modf(ids * 0.5698402909980532 + 0.5)[0]
    return np.stack([radius * np.cos(angle), radius * np.sin(angle)], axis=1)


def layout(ids: np.ndarray, fetch: Callable[[np.ndarray], np.ndarray], *, seed: int = 0, sample: int = SAMPLE,
           progress: Callable[[str], None] | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(xy (n, 2) float32 in the unit square, sampled mask) for these ids; `fetch(ids)` -> their vectors.

    Up to `sample` items are laid out by t-SNE; the rest are placed by their sampled neighbours, read
    CHUNK at a time."""
    say = progress or (lambda message: None)
    ids = np.asarray(ids, np.int64)
    n = len(ids)
    rng = np.random.default_rng(seed)
    chosen = np.sort(rng.choice(n, size=min(n, sample), replace=False)) if n else np.zeros(0, np.int64)
    is_sampled = np.zeros(n, bool)
    is_sampled[chosen] = True
    if n == 0:
        return np.zeros((0, 2), np.float32), is_sampled
    say(f"reading {len(chosen):,} descriptors")
    vectors = fetch(ids[chosen])
    projection = Projection.fit(vectors)
    reduced = projection(vectors)
    del vectors
    say(f"t-SNE of {len(chosen):,} items")
    xy = np.zeros((n, 2), np.float32)
    xy[chosen] = tsne(reduced, seed)
    rest = np.flatnonzero(~is_sampled)
    for start in range(0, len(rest), CHUNK):
        part = rest[start:start + CHUNK]
        say(f"placing items {start + 1:,}-{start + len(part):,} of {len(rest):,} by their nearest sampled neighbours")
        xy[part] = place(projection(fetch(ids[part])), reduced, xy[chosen], ids[part])
    return normalise(xy), is_sampled


def normalise(xy: np.ndarray) -> np.ndarray:
    """Into the unit square, centred, aspect kept (t-SNE's scale and rotation carry no meaning)."""
    if len(xy) == 0:
        return xy.astype(np.float32)
    lo, hi = xy.min(axis=0), xy.max(axis=0)
    span = float(max(hi - lo)) or 1.0
    return ((xy - (lo + hi) / 2) / span + 0.5).astype(np.float32)


def neighbour_share(high: np.ndarray, low: np.ndarray, k: int = 10, queries: np.ndarray | None = None) -> float:
    """Mean share of each (query) item's k nearest neighbours in `high` that are also among its k
    nearest in `low` (the same rows in both): how well a layout keeps neighbourhoods."""
    rows = np.arange(len(high)) if queries is None else np.asarray(queries)
    found = []
    for space in (high, low):
        index = faiss.IndexFlatL2(space.shape[1])
        index.add(np.ascontiguousarray(space, np.float32))
        _, idx = index.search(np.ascontiguousarray(space[rows], np.float32), k + 1)
        found.append([set(r[r != q][:k].tolist()) for r, q in zip(idx, rows)])
    return float(np.mean([len(a & b) / k for a, b in zip(*found)]))
