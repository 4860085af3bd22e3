"""Vector index types chosen by size: the approximate index against exact search."""
from __future__ import annotations

import faiss
import numpy as np
import pytest

from index.vectors.writer import LayerStore
from index.vectors.segments import assemble
from index.vectors.reader import VectorStore
from .synthetic import Descriptors
from index.vectors.kinds import FLAT, IVF, IndexPolicy, lists_for

DIM = 672  # the default search layer (parts) of efficientnet_lite0
N = 24_000
POLICY = IndexPolicy(flat_max=8_000)


@pytest.fixture(scope="module")
def data():
    gen = Descriptors(DIM, seed=5)
    vectors = gen.database(N)
    ids = np.random.default_rng(1).permutation(10 * N)[:N].astype(np.int64) + 1
    return gen, vectors, ids


def commit(writer):
    """A checkpoint without an archive around it: flush, then (manifest written) commit."""
    state = writer.flush()
    writer.committed()
    return state


def searchable(db, state) -> VectorStore:
    """What a reader searches: every segment the state names, in one FAISS index."""
    return VectorStore(state["dim"], assemble(db, state), measured=state["measured"])


@pytest.fixture(scope="module")
def grown(data, tmp_path_factory):
    """A layer's store filled batch by batch, as the indexer fills it: flat first, IVF once past
    flat_max, with a checkpoint every few batches; and what a reader loads from it."""
    gen, vectors, ids = data
    db = tmp_path_factory.mktemp("grown")
    writer = LayerStore(db, "parts", DIM, None, policy=POLICY)
    kinds = []
    for start in range(0, N, 1000):
        writer.add(ids[start:start + 1000], vectors[start:start + 1000])
        kinds.append(writer.kind)
        if start % 4000 == 0:
            commit(writer)
    state = commit(writer)
    return writer, searchable(db, state), kinds


def exact(vectors, ids, queries, k):
    # Reference: FAISS exact inner-product search (IndexFlatIP), i.e. brute-force cosine similarity.
    flat = faiss.IndexFlatIP(vectors.shape[1])
    flat.add(vectors)
    scores, rows = flat.search(queries, k)
    return scores, ids[rows]


def test_flat_while_small_then_ivf(grown):
    writer, store, kinds = grown
    assert kinds[:7] == [FLAT] * 7 and kinds[-1] == IVF
    info = writer.index_info()
    assert store.index_info() == info  # the reader's index is the one the writer built
    assert info["type"] == IVF and info["vectors"] == N
    assert info["nlist"] == lists_for(info["built_for"], POLICY)
    assert 1 <= info["nprobe"] <= info["nlist"] // 4
    assert info["recall_queries"] == POLICY.probe_queries
    assert info["codes"] == "fp16" and info["code_bytes"] == 2 * DIM  # the default: 16-bit floats


def test_recall_at_10_against_exact_search_on_new_queries(grown, data):
    gen, vectors, ids = data
    _, store, _ = grown
    queries = gen.queries(200, N)
    _, truth = exact(vectors, ids, queries, 10)
    _, found = store.search(queries, 10)
    recall = np.mean([len(set(f) & set(t)) / 10 for f, t in zip(found, truth)])
    # The build measured recall on stored vectors; new queries from the same clusters come close to it
    # (the estimate's standard error is about 0.005 on 500 queries, these 200 add about 0.01).
    estimate = store.index_info()["recall_at_10"]
    assert recall >= POLICY.target_recall - 0.01, recall
    assert estimate >= POLICY.target_recall + POLICY.recall_margin and abs(estimate - recall) < 0.03, (estimate, recall)


def test_scores_are_cosine_similarities_to_8_bit_precision(grown, data):
    # Reference: numpy inner products of the original L2-normalised vectors.
    gen, vectors, ids = data
    _, store, _ = grown
    queries = gen.queries(20, N)
    scores, found = store.search(queries, 10)
    row_of = {int(i): r for r, i in enumerate(ids)}
    for q, s, f in zip(queries, scores, found):
        true = np.array([vectors[row_of[int(i)]] @ q for i in f])
        assert np.abs(s - true).max() < 5e-3
        assert np.all(np.diff(s) <= 1e-6)  # best first


def test_ids_replace_remove_and_reconstruct_work_on_the_ivf_index(grown, data):
    gen, vectors, ids = data
    writer, _, _ = grown
    assert sorted(writer.ids().tolist()) == sorted(ids.tolist())
    target = ids[:3]  # in the first, sealed segments
    moved = gen.queries(3, N)
    writer.add(target, moved)  # re-embedded items: replaced, not duplicated
    assert len(writer) == N and len(np.unique(writer.ids())) == N
    assert np.abs(writer.reconstruct(target) - moved).max() < 5e-3
    state = commit(writer)
    scores, found = searchable(writer.db, state).search(moved, 1)
    assert found[:, 0].tolist() == target.tolist()
    assert writer.remove(np.concatenate([target, [-7]])) == 3
    assert len(writer) == N - 3 and not set(target.tolist()) & set(writer.ids().tolist())
    writer.add(target, vectors[:3])  # put back for the other tests
    commit(writer)


def test_a_reopened_writer_and_a_reader_see_the_same_index(grown, data):
    gen, vectors, ids = data
    writer, _, _ = grown
    state = commit(writer)
    again = LayerStore(writer.db, "parts", DIM, state, policy=POLICY)
    assert again.index_info() == writer.index_info() and len(again) == N
    q = gen.queries(5, N)
    assert np.array_equal(searchable(writer.db, again.state()).search(q, 10)[1],
                          searchable(writer.db, state).search(q, 10)[1])


def test_the_index_is_rebuilt_as_the_store_grows_and_shrinks(data, tmp_path):
    gen, vectors, ids = data
    policy = IndexPolicy(flat_max=2_000, train_per_list=20)
    store = LayerStore(tmp_path, "parts", DIM, None, policy=policy)
    store.add(ids[:2_000], vectors[:2_000])
    first = store.index_info()["nlist"]
    store.add(ids[2_000:20_000], vectors[2_000:20_000])  # 10 times larger: the lists are retrained
    assert store.kind == IVF and store.index_info()["nlist"] >= 2 * first
    assert store.index_info()["built_for"] == 20_000
    store.remove(ids[:19_500])  # below half of flat_max: exact again
    assert store.kind == FLAT and len(store) == 500
    assert np.abs(store.reconstruct(ids[19_500:19_505]) - vectors[19_500:19_505]).max() < 5e-3


def test_retraining_the_lists_keeps_every_code(data, tmp_path):
    """More lists move vectors between lists; their 8-bit codes (not residuals) stay exactly as they were."""
    gen, vectors, ids = data
    store = LayerStore(tmp_path, "parts", DIM, None, policy=IndexPolicy(flat_max=2_000, train_per_list=20))
    store.add(ids[:4_000], vectors[:4_000])
    nlist = store.nlist()
    before = store.reconstruct(ids[:4_000])
    store.add(ids[4_000:16_000], vectors[4_000:16_000])
    assert store.nlist() > nlist
    assert np.array_equal(store.reconstruct(ids[:4_000]), before)


def test_pca_reduced_store_keeps_the_interface_and_cuts_code_size(data, tmp_path):
    gen, vectors, ids = data
    writer = LayerStore(tmp_path, "parts", DIM, None, policy=IndexPolicy(flat_max=8_000, pca_dim=128))
    writer.add(ids[:12_000], vectors[:12_000])
    store = searchable(tmp_path, commit(writer))
    info = store.index_info()
    assert info["pca_dim"] == 128 and info["codes"] == "fp16" and info["code_bytes"] == 2 * 128  # < fp16_below
    scores, found = store.search(vectors[:5], 1)
    assert found[:, 0].tolist() == ids[:5].tolist()  # each stored vector finds itself
    assert np.allclose(scores[:, 0], 1.0, atol=5e-3)
    assert store.reconstruct(ids[:2]).shape == (2, DIM)


def test_default_flat_limit_follows_the_work_of_an_exact_query():
    policy = IndexPolicy()
    # vectors x dimensions <= 32 million multiply-adds per query
    assert policy.flat_limit(672) == 32_000_000 // 672
    assert policy.flat_limit(1280) < policy.flat_limit(672) < policy.flat_limit(32) == 1_000_000
    assert lists_for(1_000_000, policy) == 4096 and lists_for(50_000, policy) == 1024  # ~4 sqrt(n), power of 2 (common practice for IVF)


def test_an_archive_switches_to_ivf_records_it_in_the_manifest_and_stays_consistent(tmp_path):
    from index.api import Archive

    folder = tmp_path / "imgs"
    folder.mkdir()
    rng = np.random.default_rng(3)
    for i in range(48):  # generated images: blocks of random colours at random scales
        cells = rng.integers(0, 255, (int(rng.integers(2, 9)),) * 2 + (3,), dtype=np.uint8)
        from PIL import Image

        Image.fromarray(cells).resize((96, 96), Image.NEAREST).save(folder / f"{i:02d}.png")
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    archive.manifest["vector_index"] = {"flat_max": 30, "train_per_list": 4}  # tiny thresholds for a test
    archive.add([folder], progress=False, batch_size=8)
    info = archive.manifest["indexes"]["colour"]
    assert info["type"] == IVF and info["vectors"] == 48 and "recall_at_10" in info
    reopened = Archive.open(tmp_path / "db")
    assert reopened.store("colour").index_info() == info  # loaded with what was measured at build time
    assert reopened.reconcile() == {"dropped": 0, "requeued": 0}
    top = reopened.search(str(folder / "07.png"), k=1)["results"][0]
    assert top["path"].endswith("07.png") and top["score"] == pytest.approx(1.0, abs=5e-3)
    assert reopened.info()["layers"][0]["index"]["type"] == IVF


def codes_loss(dim: int, n: int, codes: str):
    """recall@10 with every list probed (only the codes lose anything) against exact search (FAISS
    IndexFlatIP, brute force), stored vectors as queries; and what a rebuild has: the decoded vectors."""
    from index.vectors import kinds as vi
    from index.vectors.rebuild import recall_without_self

    x = Descriptors(dim, seed=3).database(n)
    codec = vi.new_ivf(dim, 64, IndexPolicy(), codes=codes)
    codec.train(x)
    index = faiss.clone_index(codec)
    index.add_with_ids(x, np.arange(n))
    faiss.extract_index_ivf(index).nprobe = 64
    probe = np.sort(np.random.default_rng(0).choice(n, 500, replace=False))
    exact = faiss.IndexFlatIP(dim)
    exact.add(x)
    measured = recall_without_self(index.search(x[probe], 11)[1], exact.search(x[probe], 11)[1], probe)
    sq = faiss.downcast_index(faiss.extract_index_ivf(index)).sq
    return codec, probe, measured, sq.decode(sq.compute_codes(x))


@pytest.mark.parametrize("dim, n, codes", [(64, 20_000, "sq8"), (256, 50_000, "sq8"), (32, 50_000, "fp16")])
def test_the_simulated_loss_of_the_codes_matches_the_measured_loss(dim, n, codes):
    """Rebuilds no longer have exact vectors, so what the codes lose is simulated: each candidate's
    score moved by the error of uniform quantization within half a step per dimension (the additive
    uniform noise model of quantization, Widrow and Kollar, "Quantization Noise", 2008; from memory).
    Checked here against the loss measured with the exact vectors (FAISS IndexFlatIP, brute force)."""
    from index.vectors.rebuild import code_steps, simulated_code_recall

    codec, probe, measured, decoded = codes_loss(dim, n, codes)
    seen = faiss.IndexFlatIP(dim)
    seen.add(decoded)
    scores, found = seen.search(decoded[probe], 101)
    simulated = simulated_code_recall(decoded[probe], scores, found, probe, code_steps(codec, decoded[probe]))
    if codes == "sq8":
        assert measured < 0.99  # the codes do lose neighbours here, so the comparison means something
    assert abs(simulated - measured) < 0.015, (simulated, measured)


def test_few_dimensions_get_16_bit_codes_which_keep_the_neighbours_8_bit_codes_lose():
    """On 32 dimensions (the colour layer's size) 8-bit codes reorder close neighbours; 16-bit floats
    keep nearly all of them. Reference: exact search, FAISS IndexFlatIP."""
    from index.vectors import kinds as vi

    assert vi.codes_for(32, IndexPolicy(codes="sq8")) == "fp16" and vi.codes_for(672, IndexPolicy(codes="sq8")) == "sq8"
    assert vi.codes_for(672, IndexPolicy(codes="sq8", pca_dim=128)) == "fp16"
    assert vi.codes_for(672, IndexPolicy()) == "fp16"  # the default for every size
    # A store of 8-bit codes keeps them unless its size calls for 16-bit floats: recoding would not
    # bring back what its 8-bit codes lost.
    assert vi.codes_for(672, IndexPolicy(), "sq8") == "sq8" and vi.codes_for(32, IndexPolicy(), "sq8") == "fp16"
    assert vi.codes_for(672, IndexPolicy(codes="sq8"), "fp16") == "sq8"  # the memory option converts
    _, _, sq8, _ = codes_loss(32, 50_000, "sq8")
    _, _, fp16, _ = codes_loss(32, 50_000, "fp16")
    assert fp16 >= 0.97 and fp16 > sq8 + 0.05, (fp16, sq8)


def test_a_low_dimension_store_is_built_with_16_bit_codes_and_an_8_bit_one_is_converted(tmp_path):
    dim = 32
    gen = Descriptors(dim, seed=7)
    x = gen.database(16_000)
    ids = np.arange(1, 16_001, dtype=np.int64)
    # A store built before 16-bit codes existed (as codes="sq8", fp16_below=0 builds it): 8-bit codes.
    store = LayerStore(tmp_path, "colour", dim, None, policy=IndexPolicy(flat_max=2_000, codes="sq8", fp16_below=0))
    store.add(ids[:4_000], x[:4_000])
    assert store.index_info()["codes"] == "sq8"
    nlist = store.nlist()
    store.policy = IndexPolicy(flat_max=2_000)
    store.add(ids[4_000:12_000], x[4_000:12_000])  # the next rebuild (more lists) re-encodes them
    store.add(ids[12_000:], x[12_000:])  # coded as 16-bit floats from the start
    info = store.index_info()
    assert store.nlist() > nlist and info["codes"] == "fp16" and info["code_bytes"] == 2 * dim
    assert info["recall_at_10"] >= IndexPolicy().target_recall
    reader = searchable(tmp_path, commit(store))
    queries = gen.queries(200, len(x))
    _, truth = exact(x, ids, queries, 10)
    _, found = reader.search(queries, 10)
    recall = np.mean([len(set(f) & set(t)) / 10 for f, t in zip(found, truth)])
    assert recall >= 0.9, recall
    # Vectors added since hold 16-bit floats (IEEE 754 binary16, 10 fraction bits: half a step is 2^-13
    # below 0.5 and 2^-12 = 2.44e-4 from 0.5 to 1, hence the bound just above it); converted ones keep the
    # error of their 8-bit codes, which the conversion did not add to.
    assert np.abs(reader.reconstruct(ids[12_000:12_050]) - x[12_000:12_050]).max() < 2.5e-4
    assert np.abs(reader.reconstruct(ids[:50]) - x[:50]).max() < 5e-3


def test_a_store_of_8_bit_codes_keeps_them_and_keeps_working_under_the_16_bit_default(tmp_path, data):
    """Archives indexed before 16-bit floats became the default hold 8-bit codes at 672 dimensions: they
    open and search as before, and a growth rebuild keeps their codes (relisted, not recoded)."""
    gen, vectors, ids = data
    old = LayerStore(tmp_path, "parts", DIM, None, policy=IndexPolicy(flat_max=4_000, codes="sq8"))
    old.add(ids[:10_000], vectors[:10_000])
    state = commit(old)
    assert old.index_info()["codes"] == "sq8"
    store = LayerStore(tmp_path, "parts", DIM, state, policy=IndexPolicy(flat_max=4_000))  # today's default
    codes_before = stored_codes(store, ids[:50])
    nlist = store.nlist()
    store.add(ids[10_000:], vectors[10_000:])  # past twice the lists' training size: rebuilt
    info = store.index_info()
    assert info["built_for"] > 10_000 and store.nlist() >= nlist
    assert info["codes"] == "sq8" and info["code_bytes"] == DIM
    assert np.abs(store.reconstruct(ids[:5]) - vectors[:5]).max() < 5e-3
    reader = searchable(tmp_path, commit(store))
    queries = gen.queries(200, N)
    _, truth = exact(vectors, ids, queries, 10)
    recall = np.mean([len(set(f) & set(t)) / 10 for f, t in zip(reader.search(queries, 10)[1], truth)])
    # The estimate counts what the 8-bit codes lose (simulated) with what the lists lose (measured).
    assert recall >= 0.945 and abs(info["recall_at_10"] - recall) < 0.015, (info["recall_at_10"], recall)
    assert np.array_equal(stored_codes(store, ids[:50]), codes_before)  # relisted, not recoded


def stored_codes(store, wanted):
    """The codes a layer's segments hold for these ids, in their order."""
    rows = {}
    for _, arrays in store.segment_arrays():
        for i, code in zip(arrays["ids"], arrays["codes"]):
            if i in wanted:
                rows[int(i)] = code.copy()
    return np.stack([rows[int(i)] for i in wanted])


def test_nprobe_is_narrowed_to_within_an_eighth_between_the_steps():
    """Between the last step short of the target and the first reaching it, calibration halves the gap
    until it is at most an eighth: a curve known in closed form, recall(n) = 1 - 1/n, reaches 0.99 at
    n = 100, between the steps 96 and 128."""
    from index.vectors.rebuild import _Calibration

    class Curve(_Calibration):
        def __init__(self):
            self.code_recall, self.measured = 1.0, []

        def _lists_recall(self, out, step):
            self.measured.append(step)
            return 1.0 - 1.0 / step

    curve = Curve()
    nprobe, recall = curve._narrow(None, 96, 128, 1 - 1 / 128, 0.99)
    assert 100 <= nprobe <= 100 + 96 // 8 and recall == pytest.approx(1 - 1 / nprobe)
    assert len(curve.measured) <= 3  # a few extra passes, not every value
    curve.code_recall = 0.995  # what the codes lose counts too: 0.995 (1 - 1/n) >= 0.99 needs n >= 199
    nprobe, _ = curve._narrow(None, 192, 256, 1 - 1 / 256, 0.99)
    assert 199 <= nprobe <= 199 + 192 // 8


def test_an_unknown_codes_option_is_refused_in_one_sentence():
    from index.common.errors import ArchiveError

    with pytest.raises(ArchiveError, match="codes must be fp16 or sq8, not 'int4'"):
        IndexPolicy.from_dict({"codes": "int4"})
    assert IndexPolicy.from_dict({"codes": "sq8"}).codes == "sq8" and IndexPolicy.from_dict(None).codes == "fp16"
