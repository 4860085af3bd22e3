"""Several examples, like/unlike marks and query expansion, as one query descriptor per layer.

Rocchio's relevance feedback (J. J. Rocchio, "Relevance feedback in information retrieval", in The SMART
Retrieval System, 1971), on L2-normalised descriptors:

    q = unit( ALPHA * mean(e_i) + BETA * mean(l_j) - GAMMA * mean(u_k) )

e_i: the query examples, l_j: results marked "like", u_k: examples and results marked "unlike" (every
descriptor made unit length first; a missing group's term is left out). unit(v) = v / |v|.
Weights ALPHA = 1, BETA = 0.75, GAMMA = 0.15: the values Manning, Raghavan and Schütze give as reasonable
(Introduction to Information Retrieval, 2008, section 9.1.1; from memory). One example and no marks is
that example's own descriptor, unchanged: the plain search.

Average query expansion with a power (alpha-QE; F. Radenović, G. Tolias, O. Chum, "Fine-tuning CNN image
retrieval with no human annotation", TPAMI 2018):

    q' = unit( q + sum_{i=1..N} max(s_i, 0) ** QE_POWER * d_i )

d_i: the stored descriptors of the N best results for q, s_i their scores (the query's own weight is
1 = its similarity to itself). QE_POWER = 3, the value the paper uses (from memory). N = 0 leaves q
unchanged.
"""
from __future__ import annotations

from typing import Sequence

import numpy as np

ALPHA, BETA, GAMMA = 1.0, 0.75, 0.15
QE_POWER = 3.0
MAX_EXPAND = 50


def unit(v: np.ndarray) -> np.ndarray:
    """v / |v| along the last axis (a zero vector stays zero)."""
    v = np.asarray(v, np.float32)
    norm = np.linalg.norm(v, axis=-1, keepdims=True)
    return v / np.where(norm > 0, norm, 1)


def rocchio(examples: np.ndarray, liked: np.ndarray | None = None, unliked: np.ndarray | None = None,
            weights: Sequence[float] = (ALPHA, BETA, GAMMA)) -> np.ndarray:
    """The combined query descriptor (d,) from (n, d) arrays of examples, likes and unlikes.

    One example and no marks returns that example itself (bit for bit), so such a search is the plain one."""
    examples = np.atleast_2d(np.asarray(examples, np.float32))
    liked = _rows(liked, examples.shape[1])
    unliked = _rows(unliked, examples.shape[1])
    if len(examples) == 1 and not len(liked) and not len(unliked):
        return examples[0]
    alpha, beta, gamma = weights
    q = alpha * unit(examples).mean(0)
    if len(liked):
        q = q + beta * unit(liked).mean(0)
    if len(unliked):
        q = q - gamma * unit(unliked).mean(0)
    return unit(q)


def expand(q: np.ndarray, neighbours: np.ndarray, scores: np.ndarray, power: float = QE_POWER) -> np.ndarray:
    """alpha-QE: q plus its neighbours' descriptors (n, d) weighted by max(score, 0) ** power; unit length.

    No neighbours returns q itself (bit for bit)."""
    neighbours = np.asarray(neighbours, np.float32)
    if neighbours.size == 0:
        return q
    w = np.maximum(np.asarray(scores, np.float32), 0) ** power
    return unit(q + (w[:, None] * neighbours).sum(0))


def _rows(a, d: int) -> np.ndarray:
    if a is None:
        return np.zeros((0, d), np.float32)
    return np.asarray(a, np.float32).reshape(-1, d)
