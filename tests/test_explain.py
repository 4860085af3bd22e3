"""Why a pair matched: the split over positions adds up to the score, and points at the right places."""
from __future__ import annotations

import numpy as np
import pytest
from PIL import Image

from index.search.explain import block_sum, descriptor, explain_pair, shares


def test_the_position_split_sums_to_the_score_for_random_maps():
    rng = np.random.default_rng(0)
    fq, fd = rng.random((40, 9, 11)).astype(np.float32), rng.random((40, 7, 7)).astype(np.float32)
    for p in (1.0, 3.0, 8.0):
        out = explain_pair(fq, fd, p)
        assert out["query_map"].sum() == pytest.approx(out["score"], abs=1e-6)
        assert out["match_map"].sum() == pytest.approx(out["score"], abs=1e-6)


def test_p_1_is_the_average_pooling_decomposition():
    # Stylianou, Souvenir and Pless, "Visualizing Deep Similarity Networks" (WACV 2019): for average
    # pooling, position i of the query contributes sum_k q_k d_k F_ik / sum_j F_jk (their eq. for
    # the similarity map), written out here independently with numpy.
    rng = np.random.default_rng(1)
    fq, fd = rng.random((16, 5, 6)), rng.random((16, 4, 4))
    gq, gd = fq.mean(axis=(1, 2)), fd.mean(axis=(1, 2))
    q, d = gq / np.linalg.norm(gq), gd / np.linalg.norm(gd)
    expected = np.einsum("k,kij->ij", q * d, fq / fq.sum(axis=(1, 2), keepdims=True))
    out = explain_pair(fq.astype(np.float32), fd.astype(np.float32), 1.0)
    assert np.allclose(out["query_map"], expected, atol=1e-6)


def test_block_sums_preserve_the_total_and_pairs_split_the_score():
    rng = np.random.default_rng(2)
    grid = rng.random((3, 37, 53))
    assert block_sum(grid, 8).shape == (3, 8, 8)
    assert np.allclose(block_sum(grid, 8).sum(axis=(1, 2)), grid.sum(axis=(1, 2)))
    fq, fd = rng.random((12, 6, 6)), rng.random((12, 6, 6))
    out = explain_pair(fq.astype(np.float32), fd.astype(np.float32), 3.0, pairs=36)
    # Each cell is used once, so a full matching covers only part of the mass; every value is positive
    # and no more than the score.
    values = [p["value"] for p in out["pairs"]]
    assert values == sorted(values, reverse=True) and 0 < sum(values) <= out["score"] + 1e-9
    q, d = (descriptor(f, 3.0) for f in (fq, fd))
    joint = np.einsum("ka,k,kb->ab", shares(fq, 3.0), q * d, shares(fd, 3.0))
    assert joint.sum() == pytest.approx(out["score"], abs=1e-6)  # the split over pairs of positions is exact


def test_archive_explanation_sums_to_the_search_score(sample_archive):
    archive, folder = sample_archive
    for layer in ("texture", "parts", "objects"):
        hit = archive.search(str(folder / "coffee.png"), layer=layer, k=3)["results"][1]
        out = archive.explain(str(folder / "coffee.png"), hit["id"], layer=layer)
        total_q = float(np.sum(out["query_map"]))
        total_d = float(np.sum(out["match_map"]))
        assert total_q == pytest.approx(out["score"], abs=1e-4)
        assert total_d == pytest.approx(out["score"], abs=1e-4)
        assert out["score"] == pytest.approx(hit["score"], abs=1e-4)  # recomputed = indexed descriptor
        assert out["indexed_score"] == pytest.approx(hit["score"], abs=1e-4)
        assert sum(c["share"] for c in out["channels"]) <= 1.0 + 1e-9
        assert all(len(p["query_box"]) == 4 for p in out["pairs"])


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
    return explain_pair(maps, maps, archive.manifest["pooling"]["p"])["query_map"]


def _any_id(archive):
    return archive.items(limit=1)["items"][0]["id"]


def test_exemplars_hold_each_channels_strongest_activation(sample_archive):
    archive, folder = sample_archive
    ex = archive.exemplars("parts")
    channel = 5
    top = ex.top(channel)
    assert top and len({e["id"] for e in top}) == len(top)
    best = top[0]
    row = archive.item(best["id"])
    maps = archive.embedder.maps_of_image(archive.query_image(best["id"]))["parts"]
    # The recorded peak is that image's maximum for the channel, at the recorded cell.
    assert maps[channel].max() == pytest.approx(best["value"], rel=1e-3)
    r, c = best["cell"]
    assert maps[channel, r, c] == pytest.approx(best["value"], rel=1e-3)
    # And no other indexed image of the sample set beats it.
    others = [archive.embedder.maps_of_image(archive.query_image(str(p)))["parts"][channel].max()
              for p in sorted(folder.iterdir())[:6]]
    assert best["value"] >= max(others) - 1e-3
    assert row["path"].startswith(str(folder))


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
