"""Candidate pairs of the duplicate job: each item's nearest neighbours by inner product (FAISS), rescored exactly.

Exact search up to EXACT_SEARCH_MAX items; above, an IVF index over a PCA projection built for the job,
with a Cauchy-Schwarz bound so that the projection never rejects a pair the exact score would keep.
See docs/duplicates.md, section Scale.
"""
from __future__ import annotations

import os

import numpy as np

from ..common.progress import bar as progress_bar
from .background import normalise

NEIGHBOURS = 32  # candidate neighbours per item; a star group holds at most NEIGHBOURS + 1 items
EXACT_SEARCH_MAX = 5_000  # up to this many items: exact inner-product search; above: IVF (approximate)
IVF_TRAIN_PER_LIST = 40  # k-means training points per inverted list (2 sqrt(n) lists)
IVF_NPROBE = 8  # inverted lists visited per query
PCA_DIM = 128  # above EXACT_SEARCH_MAX the candidate search runs on a PCA projection; final scores are exact
PCA_SAMPLE = 10_000  # rows the projection is learned from
CHUNK = 4096  # queries per search call (progress granularity and memory bound)


def _f32(x: np.ndarray) -> np.ndarray:
    return np.ascontiguousarray(x, dtype=np.float32)


def _bar(total: int, desc: str, progress: bool):
    return progress_bar(total, desc, enabled=progress, leave=False)  # plain lines in a log


def _threads() -> None:
    import faiss

    faiss.omp_set_num_threads(max(1, os.cpu_count() or 1))


def projection(vectors: np.ndarray, dim: int = PCA_DIM, *, seed: int = 0) -> np.ndarray:
    """(d, dim) orthonormal basis close to the top principal directions of the rows (uncentred, so inner
    products of projections approximate inner products of the rows), learned on a sample by subspace
    iteration (a randomised range finder, Halko, Martinsson and Tropp, SIAM Review 2011)."""
    n, d = vectors.shape
    dim = min(dim, d)
    rng = np.random.default_rng(seed)
    sample = _f32(vectors[np.sort(rng.choice(n, min(n, PCA_SAMPLE), replace=False))])
    moment = sample.T @ sample
    q = _f32(rng.normal(size=(d, min(d, dim + 16))))
    for _ in range(4):
        q, _ = np.linalg.qr(moment @ q)
    small = (q.T @ moment @ q).astype(np.float64)
    eigval, eigvec = np.linalg.eigh(small)
    return _f32(q @ eigvec[:, ::-1][:, :dim])


def candidate_pairs(vectors: np.ndarray, threshold: float, bg: np.ndarray | None = None, *,
                    min_cosine: float = -1.0, k: int = NEIGHBOURS, exact_max: int = EXACT_SEARCH_MAX, seed: int = 0,
                    kth: int = 0, progress: bool = False) -> tuple[np.ndarray, ...]:
    """Pairs (i < j) among each row's k most similar rows whose score is >= threshold (and cosine >= min_cosine).

    vectors (n, d) are L2-normalised; score = cosine, or normalise(cosine, bg[i], bg[j]) when the
    background bg (n,) is given. Returns positions i, j, the score and the cosine, all exact.
    Up to `exact_max` rows the neighbours come from an exact inner-product search. Above it, from a
    FAISS IVF index over a PCA projection built for this job (approximate: a true neighbour can be
    missed); a candidate is then rescored exactly when the projection plus the Cauchy-Schwarz bound
    on the discarded part (|x.y - Px.Py| <= |x - Px| |y - Py|) could reach the threshold.
    With kth > 0 a fifth array (n,) is returned: each row's kth-highest similarity to another row in its own
    search results (exact up to `exact_max` rows, in the projection above; -inf when it has fewer).
    """
    import faiss

    n, d = vectors.shape
    if bg is not None:
        assert bg.shape == (n,), f"expected {n} background values, got {bg.shape}"
    k = int(min(k, n - 1))
    local = np.full(n, -np.inf, np.float32)
    empty = (np.zeros(0, np.int64),) * 2 + (np.zeros(0, np.float32),) * 2
    if k <= 0:
        return empty + ((local,) if kth else ())
    _threads()
    x = _f32(vectors)
    half_bg = np.zeros(n, np.float32) if bg is None else _f32(bg) / 2
    if n <= exact_max:
        index, y, resid = faiss.IndexFlatIP(d), x, np.zeros(n, np.float32)
        index.add(x)
    else:
        basis = projection(x, seed=seed)
        y = _f32(x @ basis)
        resid = np.sqrt(np.maximum((x * x).sum(1) - (y * y).sum(1), 0)).astype(np.float32)
        nlist = int(min(4096, max(64, 2 * np.sqrt(n))))
        rng = np.random.default_rng(seed)
        index = faiss.IndexIVFFlat(faiss.IndexFlatIP(y.shape[1]), y.shape[1], nlist, faiss.METRIC_INNER_PRODUCT)
        index.cp.niter, index.cp.seed, index.cp.min_points_per_centroid = 10, seed, 1
        index.train(y[np.sort(rng.choice(n, min(n, nlist * IVF_TRAIN_PER_LIST), replace=False))])
        index.add(y)
        index.nprobe = min(IVF_NPROBE, nlist)
    out_i, out_j, out_s, out_c = [], [], [], []
    with _bar(n, "near-duplicate search", progress) as bar:
        for start in range(0, n, CHUNK):
            rows = np.arange(start, min(start + CHUNK, n))
            approx, cand = index.search(y[rows], k + 1)
            if kth:
                others = np.where((cand >= 0) & (cand != rows[:, None]), approx, -np.inf)
                local[rows] = -np.partition(-others, kth - 1, axis=1)[:, kth - 1] if kth <= k else -np.inf
            i = np.repeat(rows, cand.shape[1])
            j = cand.ravel()
            a = approx.ravel()
            ok = (j >= 0) & (j != i)
            i, j, a = i[ok], j[ok], a[ok]
            need = threshold + half_bg[i] + half_bg[j]
            bound = a + resid[i] * resid[j]  # for exact search resid = 0: the test is exact
            maybe = (bound >= need) & (bound >= min_cosine)
            i, j = i[maybe], j[maybe]
            cos = np.einsum("nd,nd->n", x[i], x[j]) if len(i) else np.zeros(0, np.float32)
            score = cos if bg is None else normalise(cos, bg[i], bg[j])
            keep = (score >= threshold) & (cos >= min_cosine)
            out_i.append(i[keep]); out_j.append(j[keep]); out_s.append(score[keep]); out_c.append(cos[keep])
            bar.update(len(rows))
    i, j, s, c = (np.concatenate(v) for v in (out_i, out_j, out_s, out_c))
    a, b = np.minimum(i, j), np.maximum(i, j)
    _, first = np.unique(a * n + b, return_index=True)
    out = a[first], b[first], s[first].astype(np.float32), np.clip(c[first], -1, 1).astype(np.float32)
    return out + ((local,) if kth else ())
