"""The FAISS store against brute-force cosine similarity computed with numpy."""
from __future__ import annotations

import numpy as np
import pytest

from index.model.pooling import l2_normalize
from index.vectors.reader import VectorStore


def brute_force(db: np.ndarray, ids: np.ndarray, q: np.ndarray, k: int):
    scores = db @ q
    order = np.argsort(-scores, kind="stable")[:k]
    return scores[order], ids[order]


def test_faiss_results_equal_brute_force_cosine_similarity():
    # Reference: numpy dot products of L2-normalised vectors (cosine similarity, common practice).
    rng = np.random.default_rng(0)
    vectors = l2_normalize(rng.normal(size=(2000, 64)))
    ids = rng.permutation(10_000)[:2000].astype(np.int64)
    store = VectorStore(64)
    store.add(ids, vectors)
    queries = l2_normalize(rng.normal(size=(20, 64)))
    scores, found = store.search(queries, 10)
    for q, s, f in zip(queries, scores, found):
        ref_scores, ref_ids = brute_force(vectors, ids, q, 10)
        assert np.allclose(s, ref_scores, atol=1e-5)
        # Ties allowed: where scores are equal to float precision the order may differ.
        by_id = dict(zip(ids.tolist(), (vectors @ q).tolist()))
        assert np.allclose([by_id[i] for i in f], ref_scores, atol=1e-5)


def test_add_replaces_and_remove_deletes():
    store = VectorStore(4)
    a = l2_normalize(np.eye(4)[:2])
    store.add(np.array([7, 9]), a)
    store.add(np.array([7]), l2_normalize(np.array([[0, 0, 1.0, 0]])))  # re-embedded item 7
    assert len(store) == 2
    scores, ids = store.search(np.array([[0, 0, 1.0, 0]], np.float32), 1)
    assert ids[0, 0] == 7 and scores[0, 0] == pytest.approx(1.0)
    assert store.remove(np.array([9, 12345])) == 1
    assert store.ids().tolist() == [7]


def test_search_with_k_larger_than_the_store():
    store = VectorStore(3)
    store.add(np.array([1, 2]), l2_normalize(np.eye(3)[:2]))
    scores, ids = store.search(l2_normalize(np.ones((1, 3))), 10)
    assert ids.shape == (1, 2)
    assert VectorStore(3).search(np.ones((1, 3), np.float32), 5)[1].shape == (1, 0)


def test_save_load_round_trip_leaves_no_temporary_file(tmp_path):
    rng = np.random.default_rng(3)
    store = VectorStore(16)
    store.add(np.arange(100, 150), l2_normalize(rng.normal(size=(50, 16))))
    store.save(tmp_path / "v.faiss")
    again = VectorStore.load(tmp_path / "v.faiss")
    q = l2_normalize(rng.normal(size=(3, 16)))
    assert np.array_equal(store.search(q, 5)[1], again.search(q, 5)[1])
    assert [p.name for p in tmp_path.iterdir()] == ["v.faiss"]


def test_wrong_dimension_fails_at_the_door():
    with pytest.raises(AssertionError, match="dimension"):
        VectorStore(8).add(np.array([1]), np.ones((1, 4), np.float32))
