"""Synthetic descriptors with cluster structure, for tests and benchmarks of the vector indexes.

Shaped like the GeM descriptors kinscope stores: L2-normalised, concentrated around a common
direction (real `parts` descriptors of the demo archive have mean pairwise cosine about 0.83), with a
power-law variance spectrum and groups of near neighbours, so that recall against exact search means
something (uniform random vectors have no meaningful nearest neighbours in hundreds of dimensions).
"""
from __future__ import annotations

import numpy as np


class Descriptors:
    """A reproducible generator: clusters in a random basis with eigenvalues falling as i^-alpha."""

    def __init__(self, dim: int, *, seed: int = 0, cluster_size: int = 100, alpha: float = 1.5,
                 spread: float = 1.0, offset: float = 3.2):
        rng = np.random.default_rng(seed)
        self.dim = dim
        self.cluster_size = cluster_size
        self.spread = spread
        self.seed = seed
        q, _ = np.linalg.qr(rng.normal(size=(dim, dim)))
        scales = np.arange(1, dim + 1, dtype=np.float64) ** (-alpha / 2)
        self.basis = (q * (scales / np.linalg.norm(scales))).T.astype(np.float32)  # rows: scaled directions
        mean = np.abs(rng.normal(size=dim))
        self.mean = (offset * mean / np.linalg.norm(mean)).astype(np.float32)

    def _points(self, rng: np.random.Generator, centres: np.ndarray, counts: np.ndarray) -> np.ndarray:
        which = np.repeat(np.arange(len(centres)), counts)
        noise = rng.standard_normal((len(which), self.dim), dtype=np.float32) @ self.basis
        x = centres[which] + self.spread * noise
        x /= np.linalg.norm(x, axis=1, keepdims=True)
        return x

    def centres(self, n_clusters: int) -> np.ndarray:
        rng = np.random.default_rng([self.seed, 1])
        return self.mean + rng.standard_normal((n_clusters, self.dim), dtype=np.float32) @ self.basis

    def database(self, n: int, chunk: int = 100_000):
        """n descriptors (float32, (n, dim)), about cluster_size per cluster, in chunks to bound memory."""
        n_clusters = max(1, n // self.cluster_size)
        centres = self.centres(n_clusters)
        out = np.empty((n, self.dim), np.float32)
        rng = np.random.default_rng([self.seed, 2])
        assign = np.sort(rng.integers(0, n_clusters, n))
        for start in range(0, n, chunk):
            part = assign[start:start + chunk]
            ids, counts = np.unique(part, return_counts=True)
            out[start:start + len(part)] = self._points(rng, centres[ids], counts)
        return out

    def queries(self, nq: int, n_database: int) -> np.ndarray:
        """New points (not in the database) drawn around the database's clusters."""
        n_clusters = max(1, n_database // self.cluster_size)
        centres = self.centres(n_clusters)
        rng = np.random.default_rng([self.seed, 3])
        return self._points(rng, centres[rng.integers(0, n_clusters, nq)], np.ones(nq, np.int64))
