"""Why a pair matched: the split over positions adds up to the score, and points at the right places."""
from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from index.search.explain import block_sum, explain_pair
from index.search.explain_pairs import RING
from index.search.explain_score import FORMS, descriptor, split


def _gem(f, p):
    """GeM written out with numpy (Radenovic, Tolias and Chum, TPAMI 2018), L2-normalised."""
    g = np.mean(np.maximum(f.reshape(f.shape[0], -1).astype(np.float64), 1e-6) ** p, axis=1) ** (1 / p)
    return g / np.linalg.norm(g)


@pytest.mark.parametrize("form", FORMS)
def test_the_centred_split_sums_to_the_centred_cosine_for_random_maps(form):
    rng = np.random.default_rng(0)
    fq, fd = rng.random((40, 9, 11)).astype(np.float32), rng.random((40, 7, 7)).astype(np.float32)
    mean = np.abs(rng.normal(size=40))
    mean = 0.9 * mean / np.linalg.norm(mean)  # like a mean of unit vectors with non-negative entries
    for p in (1.0, 3.0, 8.0):
        out = split(fq, fd, p, mean, form=form)
        q, d = _gem(fq, p) - mean, _gem(fd, p) - mean
        assert out["score"] == pytest.approx(q @ d / np.linalg.norm(q) / np.linalg.norm(d), abs=1e-5)
        assert out["query_map"].sum() == pytest.approx(out["score"], abs=1e-9)
        assert out["match_map"].sum() == pytest.approx(out["score"], abs=1e-9)
        assert out["cosine"] == pytest.approx(_gem(fq, p) @ _gem(fd, p), abs=1e-5)
        raw = split(fq, fd, p, None, form=form)  # no mean: the raw cosine and its split
        assert raw["score"] == pytest.approx(out["cosine"], abs=1e-6)
        assert raw["query_map"].sum() == pytest.approx(raw["score"], abs=1e-9)


@pytest.mark.parametrize("form", FORMS)
def test_p_1_and_zero_mean_is_the_average_pooling_decomposition(form):
    # Stylianou, Souvenir and Pless, "Visualizing Deep Similarity Networks" (WACV 2019): for average
    # pooling, position i of the query contributes sum_k q_k d_k F_ik / sum_j F_jk (their eq. for
    # the similarity map), written out here independently with numpy.
    rng = np.random.default_rng(1)
    fq, fd = rng.random((16, 5, 6)), rng.random((16, 4, 4))
    gq, gd = fq.mean(axis=(1, 2)), fd.mean(axis=(1, 2))
    q, d = gq / np.linalg.norm(gq), gd / np.linalg.norm(gd)
    expected_q = np.einsum("k,kij->ij", q * d, fq / fq.sum(axis=(1, 2), keepdims=True))
    expected_d = np.einsum("k,kij->ij", q * d, fd / fd.sum(axis=(1, 2), keepdims=True))
    out = split(fq.astype(np.float32), fd.astype(np.float32), 1.0, np.zeros(16), form=form)
    assert np.allclose(out["query_map"], expected_q, atol=1e-6)
    assert np.allclose(out["match_map"], expected_d, atol=1e-6)
    # And a mean that is not zero changes it: the reduction is not true of every input.
    shifted = split(fq.astype(np.float32), fd.astype(np.float32), 1.0, np.full(16, 0.2), form=form)
    assert not np.allclose(shifted["query_map"], expected_q, atol=1e-3)


def test_block_sums_preserve_the_total():
    rng = np.random.default_rng(2)
    grid = rng.random((3, 37, 53))
    assert block_sum(grid, 8).shape == (3, 8, 8)
    assert np.allclose(block_sum(grid, 8).sum(axis=(1, 2)), grid.sum(axis=(1, 2)))


def _store_mean(archive, layer):
    store = archive.store(layer)
    return store.reconstruct(store.ids()).astype(np.float64).mean(axis=0)


def test_archive_explanation_sums_to_its_score_beside_the_search_score(sample_archive):
    archive, folder = sample_archive
    for layer in ("texture", "parts", "objects"):
        hit = archive.search(str(folder / "coffee.png"), layer=layer, k=3)["results"][1]
        out = archive.explain(str(folder / "coffee.png"), hit["id"], layer=layer)
        assert out["mode"] == "centred"
        assert float(np.sum(out["query_map"])) == pytest.approx(out["score"], abs=1e-4)
        assert float(np.sum(out["match_map"])) == pytest.approx(out["score"], abs=1e-4)
        assert out["cosine"] == pytest.approx(hit["score"], abs=1e-4)  # recomputed = indexed descriptor
        assert out["indexed_score"] == pytest.approx(hit["score"], abs=1e-4)
        # The centred score: the cosine after taking off the mean of the layer's stored descriptors.
        m = _store_mean(archive, layer)
        q = descriptor(archive.embedder.maps_of_image(archive.query_image(str(folder / "coffee.png")))[layer], 3.0) - m
        d = archive.store(layer).reconstruct(np.array([hit["id"]]))[0] - m
        assert out["score"] == pytest.approx(q @ d / np.linalg.norm(q) / np.linalg.norm(d), abs=1e-3)
        assert out["centred"] == pytest.approx(out["score"], abs=1e-9)
        assert sum(c["share"] for c in out["channels"]) <= 1.0 + 1e-9
        assert out["pairs"] and all(len(p["query_box"]) == 4 and -1 <= p["similarity"] <= 1 for p in out["pairs"])
        # The old split, on request: it adds up to the search score itself.
        raw = archive.explain(str(folder / "coffee.png"), hit["id"], layer=layer, mode="cosine")
        assert raw["mode"] == "cosine" and raw["score"] == pytest.approx(hit["score"], abs=1e-4)
        assert float(np.sum(raw["query_map"])) == pytest.approx(hit["score"], abs=1e-4)
    from index.api import ArchiveError

    with pytest.raises(ArchiveError, match="mode must be one of"):
        archive.explain(str(folder / "coffee.png"), hit["id"], mode="whitened")


def _ids(archive):
    return {row["path"].rsplit("/", 1)[-1].removesuffix(".png"): row["id"] for row in archive.items(limit=100)["items"]}


@pytest.mark.parametrize("name, kind", [("astronaut", "mirror"), ("chelsea", "crop"), ("coffee", "crop")])
def test_a_mirrored_or_cropped_copy_gets_its_top_pair_at_the_right_place(sample_archive, sample_images, name, kind):
    # Images from skimage.data; the copy's geometry is known, so each pair's query cell can be mapped
    # into the original and must land within one cell of the cell the pair names there.
    archive, _ = sample_archive
    image = sample_images[name]
    w, h = image.size
    if kind == "mirror":
        copy, to_original = image.transpose(Image.FLIP_LEFT_RIGHT), (lambda x, y: (1 - x, y))
    else:
        box = (int(0.2 * w), int(0.1 * h), int(0.85 * w), int(0.75 * h))  # a 65% crop off the centre
        copy = image.crop(box)
        to_original = (lambda x, y: ((box[0] + x * (box[2] - box[0])) / w, (box[1] + y * (box[3] - box[1])) / h))
    out = archive.explain(copy, _ids(archive)[name], layer="parts")
    rows, cols = out["pair_layer"]["grid"]
    assert out["pair_layer"]["name"] == "texture" and out["pair_layer"]["mirrored"] == (kind == "mirror")
    top = out["pairs"][0]
    x, y = to_original(*top["query_cell"])
    assert abs(x - top["match_cell"][0]) <= 1 / cols and abs(y - top["match_cell"][1]) <= 1 / rows, top
    # The boxes drawn on the page hold the cells.
    for cell, b in ((top["query_cell"], top["query_box"]), (top["match_cell"], top["match_box"])):
        assert b[0] <= cell[0] <= b[2] and b[1] <= cell[1] <= b[3]


def test_no_pair_is_offered_for_two_cells_on_the_frames_ring(sample_archive, sample_images):
    # Unrelated images (skimage.data's camera and coins, moon and horse) share nothing but the frame:
    # whatever pairs are left, none joins two cells of the outer ring.
    archive, _ = sample_archive
    ids = _ids(archive)
    for query, match in (("camera", "coins"), ("moon", "horse"), ("brick", "brick")):
        out = archive.explain(sample_images[query], ids[match], layer="parts")
        rows, cols = out["pair_layer"]["grid"]
        for pair in out["pairs"]:
            ring = [min(x * cols, y * rows, (1 - x) * cols, (1 - y) * rows) < RING
                    for x, y in (pair["query_cell"], pair["match_cell"])]
            assert not all(ring), pair


def test_self_match_heat_map_peaks_on_the_textured_half(sample_archive, sample_images, tmp_path):
    # Half flat grey, half scikit-image's `brick` texture: matched against itself, the similarity
    # must come from the textured half (a flat region excites few feature detectors).
    archive, _ = sample_archive
    brick = np.asarray(sample_images["brick"].resize((256, 256)))
    image = np.full((256, 512, 3), 128, np.uint8)
    image[:, 256:] = brick
    path = tmp_path / "half.png"
    Image.fromarray(image).save(path)
    for layer in ("texture", "objects"):
        heat = np.asarray(archive.explain(str(path), _any_id(archive), layer=layer)["query_map"])
        self_heat = np.asarray(_self_map(archive, path, layer))
        assert heat.shape == self_heat.shape
        assert self_heat.std() > 0.1 * self_heat.mean()  # not uniform
        half = self_heat.shape[1] // 2
        assert self_heat[:, half:].sum() > 0.6 * self_heat.sum(), layer
    # The object-level map peaks inside the textured half. (Mid layers also light up the image
    # corners: zero padding at the frame's border excites some channels.)
    _, col = np.unravel_index(self_heat.argmax(), self_heat.shape)
    assert col >= half


def _self_map(archive, path, layer):
    maps = archive.embedder.maps_of_image(archive.query_image(str(path)))[layer]
    return explain_pair(maps, maps, archive.manifest["pooling"]["p"], _store_mean(archive, layer))["query_map"]


def _any_id(archive):
    return archive.items(limit=1)["items"][0]["id"]


def test_exemplars_hold_each_channels_strongest_activation_inside_the_frame(sample_archive):
    archive, folder = sample_archive
    ex = archive.exemplars("parts")
    rows, cols = ex.grid
    channel = 5
    top = ex.top(channel)
    assert top and len({e["id"] for e in top}) == len(top)
    best = top[0]
    row = archive.item(best["id"])
    maps = archive.embedder.maps_of_image(archive.query_image(best["id"]))["parts"]
    # The recorded peak is that image's maximum for the channel away from the outer ring, at the
    # recorded cell (torch's max over the interior slice is the reference).
    assert maps[channel, 1:-1, 1:-1].max() == pytest.approx(best["value"], rel=1e-3)
    r, c = best["cell"]
    assert 1 <= r < rows - 1 and 1 <= c < cols - 1
    assert maps[channel, r, c] == pytest.approx(best["value"], rel=1e-3)
    assert row["path"].startswith(str(folder))
    # And no other indexed image beats it, for any channel: every item of the archive is embedded again, and
    # each channel's kept list is the archive's strongest interior peaks, best first.
    items = archive.items(limit=10_000)["items"]
    assert len(items) == archive.info()["images"]
    peaks = np.stack([archive.embedder.maps_of_image(archive.query_image(it["id"]))["parts"][:, 1:-1, 1:-1]
                      .reshape(ex.values.shape[0], -1).max(axis=1) for it in items])  # (items, channels)
    ids = np.array([it["id"] for it in items])
    for k in range(ex.values.shape[0]):
        kept = ex.top(k)
        strongest = np.sort(peaks[:, k])[::-1][:len(kept)]
        assert len(kept) == min(len(items), ex.values.shape[1])
        assert np.allclose([e["value"] for e in kept], strongest, rtol=1e-3, atol=1e-4), k
        assert all(peaks[ids == e["id"], k][0] == pytest.approx(e["value"], rel=1e-3, abs=1e-4) for e in kept), k
    # No channel keeps a position on the ring.
    cells = np.array([e["cell"] for k in range(ex.values.shape[0]) for e in ex.top(k)])
    assert cells[:, 0].min() >= 1 and cells[:, 1].min() >= 1 and cells[:, 0].max() <= rows - 2 and cells[:, 1].max() <= cols - 2


def test_exemplar_files_from_before_the_interior_rule_lose_their_ring_entries(tmp_path):
    from index.search.exemplars import Exemplars

    ex = Exemplars(2, top_n=3)
    # Channel 0: peaks at a corner (0), inside (5 = row 1, col 1) and on the bottom edge (13); grid 4 x 4.
    ex.update(np.array([7, 8, 9]), np.array([[5.0, 1.0], [4.0, 2.0], [3.0, 3.0]]),
              np.array([[0, 5], [5, 6], [13, 10]]), (4, 4))
    path = tmp_path / "legacy.npz"
    np.savez(path, values=ex.values, ids=ex.ids, positions=ex.positions, grid=np.array(ex.grid))  # no `ring`
    loaded = Exemplars.load(path)
    assert [e["id"] for e in loaded.top(0)] == [8]  # the corner and the edge entries are gone
    assert [e["id"] for e in loaded.top(1)] == [9, 8, 7]  # 10, 6 and 5 are inside a 4 x 4 grid
    ex.save(tmp_path / "new.npz")
    assert len(Exemplars.load(tmp_path / "new.npz").top(0)) == 3  # files of the new rule are taken as they are


def test_region_search_finds_the_image_the_region_came_from(sample_archive, sample_images, tmp_path):
    archive, folder = sample_archive
    # Paste a region of `astronaut` into an unrelated frame; searching by the box finds astronaut.
    frame = Image.new("RGB", (800, 600), (40, 90, 160))
    frame.paste(sample_images["astronaut"].resize((300, 300)), (420, 200))
    box = [420 / 800, 200 / 600, 720 / 800, 500 / 600]
    result = archive.search(frame, layer="objects", k=1, box=box)
    assert result["results"][0]["path"].endswith("astronaut.png")
    assert result["query"]["box"] == box


def test_filters_and_paging_agree_with_the_full_ranking(sample_archive):
    archive, folder = sample_archive
    full = archive.search(str(folder / "moon.png"), k=12)["results"]
    page2 = archive.search(str(folder / "moon.png"), k=4, offset=4)
    assert [r["id"] for r in page2["results"]] == [r["id"] for r in full[4:8]] and page2["more"]
    assert archive.search(str(folder / "moon.png"), folder=str(folder / "nowhere"))["results"] == []
    assert archive.search(str(folder / "moon.png"), k=3, folder=str(folder))["results"]
    assert archive.search(str(folder / "moon.png"), date_to="1971-01-01")["results"] == []


def test_the_vote_finds_the_transform_most_pairs_agree_on():
    # 60 pairs that follow p -> 0.65 p + (0.2, 0.1) (within a tenth of a cell) and 60 random ones on a
    # 32 x 32 grid: the vote keeps the first and drops the others (spatial verification, Philbin et
    # al., CVPR 2007).
    from index.search.explain_pairs import vote

    rng = np.random.default_rng(3)
    good = rng.uniform(0.05, 0.95, (60, 2))
    pq = np.vstack([good, rng.uniform(0, 1, (60, 2))])
    pd = np.vstack([0.65 * good + [0.2, 0.1] + rng.normal(0, 0.1 / 32, (60, 2)), rng.uniform(0, 1, (60, 2))])
    out = vote(pq, pd, np.full(120, 0.9), (32, 32))
    assert out["scale"] == pytest.approx(0.65, abs=0.02) and np.allclose(out["shift"], [0.2, 0.1], atol=1 / 32)
    assert out["inliers"][:60].all() and out["inliers"][60:].mean() < 0.1
