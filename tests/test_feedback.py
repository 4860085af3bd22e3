"""Several examples, like/unlike marks (Rocchio 1971), query expansion (alpha-QE, Radenovic, Tolias and Chum,
TPAMI 2018) and the combined layer choice, on photographs shipped by scikit-image (skimage.data) and
scikit-learn (load_sample_images)."""
from __future__ import annotations

import numpy as np
import pytest

from index.api import Archive, ArchiveError
from index.search import feedback as fb

NAMES = ("astronaut", "camera", "chelsea", "coffee", "rocket", "coins", "moon", "horse", "brick", "grass",
         "clock", "sklearn-china", "sklearn-flower")


@pytest.fixture(scope="module")
def small_archive(tmp_path_factory, sample_images):
    """Thirteen package photographs and a near copy of `coffee` (cropped, half size, JPEG quality 50)."""
    root = tmp_path_factory.mktemp("feedback")
    folder = root / "archive"
    folder.mkdir()
    for name in NAMES:
        sample_images[name].save(folder / f"{name}.png")
    coffee = sample_images["coffee"]
    w, h = coffee.size
    coffee.crop((20, 15, w - 30, h - 10)).resize((w // 2, h // 2)).save(folder / "coffee-copy.jpg", quality=50)
    archive = Archive.open(root / "db", create=True)
    archive.add([folder], progress=False)
    yield archive, folder
    archive.close()


def _ranking(result):
    return [(r["id"], r["score"]) for r in result["results"]]


@pytest.mark.parametrize("layer", [None, "objects", "combined"])
def test_one_example_without_marks_is_the_plain_search(small_archive, layer):
    archive, folder = small_archive
    path = str(folder / "chelsea.png")
    item = archive.search(path, k=1)["results"][0]["id"]
    for query in (path, item):
        plain = archive.search(query, layer=layer, k=8)
        for same in (archive.search([query], layer=layer, k=8, like=[], unlike=[]),
                     archive.search(query, layer=layer, k=8, expand=0)):
            assert _ranking(same) == _ranking(plain)
            assert same["query"] == plain["query"]


def test_an_unlike_example_pushes_its_near_copy_down(small_archive):
    archive, folder = small_archive
    query, negative = str(folder / "astronaut.png"), str(folder / "coffee.png")
    for layer in ("parts", "objects", "combined"):
        plain = [r["path"] for r in archive.search(query, layer=layer, k=20)["results"]]
        marked = [r["path"] for r in archive.search(query, layer=layer, k=20, unlike=[negative])["results"]]
        copy = str(folder / "coffee-copy.jpg")
        assert marked.index(copy) > plain.index(copy), layer


def test_several_examples_are_left_out_and_reported(small_archive):
    archive, folder = small_archive
    ids = {r["path"]: r["id"] for r in archive.search(str(folder / "coffee.png"), k=20)["results"]}
    a, b = ids[str(folder / "chelsea.png")], ids[str(folder / "horse.png")]
    out = archive.search([a, b], k=20, unlike=[str(folder / "moon.png")])
    assert {a, b}.isdisjoint(r["id"] for r in out["results"])
    assert [q["id"] for q in out["query"]["examples"]] == [a, b]
    assert out["query"]["rule"] == {"name": "rocchio", "alpha": fb.ALPHA, "beta": fb.BETA, "gamma": fb.GAMMA}
    assert out["query"]["unlike"][0]["path"].endswith("moon.png")


def test_combined_scores_are_the_weighted_sum_of_each_layers_search(small_archive):
    """The combined score re-scored from stored vectors equals the weights applied to each layer's own FAISS
    search score of the same item."""
    archive, folder = small_archive
    query = str(folder / "rocket.png")
    out = archive.search(query, layer="combined", k=5)
    assert out["layer"] == "combined" and abs(sum(out["weights"].values()) - 1) < 1e-6
    per_layer = {n: {r["id"]: r["score"] for r in archive.search(query, layer=n, k=14)["results"]}
                 for n in out["weights"]}
    for r in out["results"]:
        expected = sum(w * per_layer[n][r["id"]] for n, w in out["weights"].items())
        assert r["score"] == pytest.approx(expected, abs=1e-5)
        assert r["layers"] == pytest.approx({n: per_layer[n][r["id"]] for n in out["weights"]}, abs=1e-5)
    scores = [r["score"] for r in out["results"]]
    assert scores == sorted(scores, reverse=True)


def test_expansion_moves_the_query_towards_its_best_results(small_archive):
    archive, folder = small_archive
    query = str(folder / "coffee.png")
    out = archive.search(query, layer="objects", k=3, expand=2)
    assert out["query"]["expand"] == {"n": 2, "power": fb.QE_POWER}
    # The query itself is among the archive's items: its score drops below 1 once two neighbours join it.
    assert out["results"][0]["path"] == query and out["results"][0]["score"] < 0.9999


def test_rocchio_and_expansion_formulas():
    rng = np.random.default_rng(0)
    e, l, u = fb.unit(rng.normal(size=(2, 8))), fb.unit(rng.normal(size=(3, 8))), fb.unit(rng.normal(size=(1, 8)))
    q = fb.ALPHA * e.mean(0) + fb.BETA * l.mean(0) - fb.GAMMA * u.mean(0)
    np.testing.assert_allclose(fb.rocchio(e, l, u), q / np.linalg.norm(q), atol=1e-6)
    assert fb.rocchio(e[:1]) is not None and np.array_equal(fb.rocchio(e[:1]), e[0])
    assert np.array_equal(fb.expand(e[0], np.zeros((0, 8)), np.zeros(0)), e[0])
    x = e[0] + 0.5 ** fb.QE_POWER * l[0]
    np.testing.assert_allclose(fb.expand(e[0], l[:1], np.array([0.5])), x / np.linalg.norm(x), atol=1e-6)


def test_bad_choices_are_refused_in_one_sentence(small_archive):
    archive, folder = small_archive
    query = str(folder / "coffee.png")
    for kwargs, words in (({"expand": -1}, "expand"), ({"expand": 999}, "at most"), ({"layer": {"nope": 1}}, "lacks"),
                          ({"layer": {"parts": 0}}, "positive")):
        with pytest.raises(ArchiveError, match=words):
            archive.search(query, **kwargs)
    with pytest.raises(ArchiveError, match="at least one"):
        archive.search([])
