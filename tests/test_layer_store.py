"""The indexer's segmented store: bounded memory, nothing changed in place, readers see committed states."""
from __future__ import annotations

import numpy as np
import pytest

import index.vectors.writer as ls
import index.vectors.segments as sg
from index.vectors.writer import LayerStore
from index.model.pooling import l2_normalize
from index.vectors.kinds import FLAT, IVF, IndexPolicy

DIM = 32
POLICY = IndexPolicy(flat_max=1_500, train_per_list=10, probe_queries=100)


@pytest.fixture
def small_segments(monkeypatch):
    """Segments of about 40 kB (a few hundred vectors) instead of 32 MB, so a test sees many."""
    monkeypatch.setattr(ls, "SEGMENT_BYTES", 40_000)
    monkeypatch.setattr(ls, "ABSORB_BELOW", 10_000)
    return 40_000


def vectors(n, seed=0):
    return l2_normalize(np.random.default_rng(seed).normal(size=(n, DIM))).astype(np.float32)


def commit(writer):
    state = writer.flush()
    writer.committed()
    return state


def test_the_assembled_index_equals_brute_force_while_flat(tmp_path, small_segments):
    # Reference: numpy inner products of L2-normalised vectors (cosine similarity, common practice).
    x, ids = vectors(1_000), np.arange(10, 1_010)
    writer = LayerStore(tmp_path, "colour", DIM, None, policy=POLICY)
    for start in range(0, 1_000, 64):
        writer.add(ids[start:start + 64], x[start:start + 64])
        if start % 256 == 0:
            commit(writer)
    state = commit(writer)
    assert writer.kind == FLAT and len(state["segments"]) > 2  # several sealed segments and a tail
    index = sg.assemble(tmp_path, state)
    q = vectors(5, seed=1)
    scores, found = index.search(q, 10)
    for row, (s, f) in enumerate(zip(scores, found)):
        order = np.argsort(-(x @ q[row]), kind="stable")[:10]
        assert np.allclose(s, (x @ q[row])[order], atol=1e-5)
        assert np.allclose((x @ q[row])[f - 10], s, atol=1e-5)  # ties may swap ids, not scores


def test_segments_stay_bounded_and_reopening_reads_at_most_the_last_one(tmp_path, small_segments, monkeypatch):
    x, ids = vectors(4_000), np.arange(1, 4_001)
    writer = LayerStore(tmp_path, "parts", DIM, None, policy=POLICY)
    for start in range(0, 4_000, 100):
        writer.add(ids[start:start + 100], x[start:start + 100])
        state = commit(writer)
        assert writer.tail_bytes() < small_segments  # the tail is sealed once it holds SEGMENT_BYTES
    per_vector = sg.data_bytes(writer.codec, DIM, 1)
    assert writer.kind == IVF
    assert all(s["bytes"] < small_segments + 100 * per_vector for s in state["segments"])
    reads = []
    real = sg.read_segment
    monkeypatch.setattr(sg, "read_segment", lambda *a, **k: reads.append(a[1].file) or real(*a, **k))
    again = LayerStore(tmp_path, "parts", DIM, state, policy=POLICY)
    assert len(reads) <= 1  # the codec, and the last segment if it is small enough to carry on filling
    reads.clear()
    again.add(np.arange(5_000, 5_100), vectors(100, seed=2))  # new catalog ids: no sealed segment is read
    commit(again)
    assert reads == [] and len(again) == 4_100


def test_removal_rewrites_only_the_segments_that_hold_the_ids(tmp_path, small_segments):
    x, ids = vectors(1_200), np.arange(1, 1_201)
    writer = LayerStore(tmp_path, "colour", DIM, None, policy=POLICY)
    for start in range(0, 1_200, 100):
        writer.add(ids[start:start + 100], x[start:start + 100])
    before = commit(writer)
    untouched = {s["file"] for s in before["segments"] if s["min_id"] > 300}
    assert writer.remove(np.arange(1, 301)) == 300
    after = commit(writer)
    assert untouched <= {s["file"] for s in after["segments"]}  # files are kept, not rewritten
    assert sorted(writer.ids().tolist()) == list(range(301, 1_201))
    assert np.allclose(writer.reconstruct(np.array([301, 1_200])), x[[300, 1_199]], atol=1e-6)
    writer.add(np.array([700]), x[:1])  # a re-embedded item replaces its vector in a sealed segment
    state = commit(writer)
    assert len(writer) == 900 and len(np.unique(writer.ids())) == 900
    assert np.allclose(sg.assemble(tmp_path, state).reconstruct(700), x[0], atol=1e-6)


def test_a_crash_before_the_commit_leaves_the_committed_state_whole(tmp_path, small_segments):
    x, ids = vectors(3_000), np.arange(1, 3_001)
    writer = LayerStore(tmp_path, "parts", DIM, None, policy=POLICY)
    writer.add(ids[:1_000], x[:1_000])
    committed = commit(writer)
    files = {p.name for p in (tmp_path / "stores" / "parts").iterdir()}
    q = vectors(3, seed=4)
    expected = sg.assemble(tmp_path, committed).search(q, 5)
    writer.remove(ids[:500])
    writer.add(ids[1_000:], x[1_000:])  # crosses into IVF: a rebuild writes new files
    writer.flush()  # ...written, but the process dies before the manifest names them
    assert writer.kind == IVF
    assert files <= {p.name for p in (tmp_path / "stores" / "parts").iterdir()}  # nothing deleted yet
    again = sg.assemble(tmp_path, committed)
    assert all(np.array_equal(a, b) for a, b in zip(again.search(q, 5), expected))
    restarted = LayerStore(tmp_path, "parts", DIM, committed, policy=POLICY)
    gone = restarted.remove_leftovers()
    assert gone and {p.name for p in (tmp_path / "stores" / "parts").iterdir()} == files
    assert len(restarted) == 1_000


def test_a_segment_of_another_codec_is_refused(tmp_path):
    writer = LayerStore(tmp_path, "parts", DIM, None, policy=POLICY)
    writer.add(np.arange(1, 2_001), vectors(2_000))
    state = commit(writer)
    assert state["codec"]
    forged = {**state, "codec": None, "kind": FLAT}
    with pytest.raises(sg.StoreFileError, match="another codec"):
        sg.assemble(tmp_path, forged)


def test_learned_whitening_maps_every_stored_vector_segment_by_segment(tmp_path, small_segments):
    from index.model.pooling import PCAWhitening

    x, ids = vectors(1_000), np.arange(1, 1_001)
    writer = LayerStore(tmp_path, "parts", DIM, None, policy=POLICY)
    writer.add(ids, x)
    commit(writer)
    pca = PCAWhitening(dim=16).fit(x[:500])
    writer.rebuild(transform=pca.transform, dim=16)
    state = commit(writer)
    assert writer.dim == 16 and state["dim"] == 16 and len(writer) == 1_000
    assert np.allclose(writer.reconstruct(ids[[0, 999]]), pca.transform(x[[0, 999]]), atol=1e-5)


def test_an_archive_from_before_segments_is_read_and_converted_on_the_next_run(tmp_path):
    import json
    import shutil

    from PIL import Image

    from index.api import Archive

    imgs = tmp_path / "imgs"
    imgs.mkdir()
    rng = np.random.default_rng(0)
    for i in range(6):
        Image.fromarray(rng.integers(0, 255, (48, 64, 3), dtype=np.uint8)).save(imgs / f"{i}.png")
    db = tmp_path / "db"
    archive = Archive.open(db, create=True, layers=["colour"])
    archive.add([imgs], progress=False)
    before = archive.search(str(imgs / "3.png"), k=6)["results"]
    # Format 1: one FAISS file per layer (vectors-colour.faiss), no stores/ folder.
    archive.store("colour").save(db / "vectors-colour.faiss")
    shutil.rmtree(db / "stores")
    manifest = json.loads((db / "manifest.json").read_text())
    manifest.pop("stores")
    manifest["format"] = 1
    (db / "manifest.json").write_text(json.dumps(manifest))

    old = Archive.open(db)
    assert [r["id"] for r in old.search(str(imgs / "3.png"), k=6)["results"]] == [r["id"] for r in before]
    assert old.check()["ok"] and old.info()["layers"][0]["vectors"] == 6
    Image.fromarray(rng.integers(0, 255, (48, 64, 3), dtype=np.uint8)).save(imgs / "6.png")
    report = old.add([imgs], progress=False)
    assert report["embedded"] == 1
    converted = Archive.open(db)
    assert converted.manifest["format"] == 2 and converted.manifest["stores"]["colour"]["segments"]
    assert not (db / "vectors-colour.faiss").exists()
    assert converted.check()["ok"] and len(converted.store("colour")) == 7
    after = converted.search(str(imgs / "3.png"), k=7)["results"]
    assert after[0]["id"] == before[0]["id"] and {r["id"] for r in before} < {r["id"] for r in after}


def test_a_reader_follows_checkpoints_by_the_segments_that_changed(tmp_path, small_segments, monkeypatch):
    x, ids = vectors(2_400), np.arange(1, 2_401)
    writer = LayerStore(tmp_path, "colour", DIM, None, policy=IndexPolicy(flat_max=100_000))
    for start in range(0, 1_000, 100):
        writer.add(ids[start:start + 100], x[start:start + 100])
        first = commit(writer)
    files: dict = {}
    index = sg.assemble(tmp_path, first, files)
    writer.add(ids[1_000:], x[1_000:])
    writer.remove(ids[:50])  # from the first segment only
    second = commit(writer)
    reads = []
    real = sg.read_segment
    monkeypatch.setattr(sg, "read_segment", lambda *a, **k: reads.append(a[1].file) or real(*a, **k))
    assert sg.update(index, files, tmp_path, first, second)
    unchanged = {s["file"] for s in first["segments"]} & {s["file"] for s in second["segments"]}
    assert unchanged and not unchanged & set(reads)  # segments both states name are not read again
    fresh = sg.assemble(tmp_path, second)
    assert index.ntotal == fresh.ntotal == 2_350
    q = vectors(5, seed=7)
    assert np.array_equal(index.search(q, 10)[1], fresh.search(q, 10)[1])
    # Past the flat limit the store is rebuilt under a codec: the reader must load it anew.
    ivf = LayerStore(tmp_path, "colour", DIM, second, policy=IndexPolicy(flat_max=2_000, train_per_list=10))
    ivf.maintain()
    assert ivf.kind == IVF and not sg.update(index, files, tmp_path, second, commit(ivf))
