"""The ONNX Runtime engine against torch, the reference; its cache; engine choice in an archive."""
from __future__ import annotations

import numpy as np
import pytest

from index.model.torch_embedder import Embedder
from index.model.choice import AUTO_EXPORT_MIN_IMAGES
from index.model.onnx_engine import EngineError, cached_model_path
from index.model.layers import resolve_layers


@pytest.fixture(scope="module")
def embedders(lite0, tmp_path_factory):
    backbone, model = lite0
    layers = resolve_layers(backbone, model, list(backbone.default_layers))
    cache = tmp_path_factory.mktemp("engines")
    reference = Embedder(backbone, model, layers, engine="torch")
    onnx = Embedder(backbone, model, layers, cache_dir=cache)
    assert onnx.use_engine("onnx", may_export=True) == "onnx"
    return reference, onnx, cache


def test_onnx_descriptors_equal_torch_descriptors(embedders, sample_images):
    # Reference: torch eager through torchvision's feature extractor (index.model.torch_engine, the reference engine).
    reference, onnx, _ = embedders
    batch = np.stack([reference.preprocess(im) for im in sample_images.values()])
    want, want_peaks = reference.embed_with_peaks(batch)
    got, got_peaks = onnx.embed_with_peaks(batch)
    for layer in want:
        assert got[layer].shape == want[layer].shape
        assert np.abs(got[layer] - want[layer]).max() < 1e-4, layer  # the bound set in issue 5
        assert np.allclose(np.linalg.norm(got[layer], axis=1), 1.0, atol=1e-5)
        assert np.abs(got_peaks[layer][0] - want_peaks[layer][0]).max() < 1e-3, layer  # channel maxima
        assert got_peaks[layer][2] == want_peaks[layer][2]  # same grid
        # The position of a maximum can differ only where two positions tie to float precision.
        assert (got_peaks[layer][1] == want_peaks[layer][1]).mean() > 0.99, layer


def test_batch_size_does_not_change_onnx_descriptors(embedders, sample_images):
    _, onnx, _ = embedders
    batch = np.stack([onnx.preprocess(im) for im in list(sample_images.values())[:5]])
    together = onnx.embed(batch)
    one_by_one = [onnx.embed(batch[i:i + 1]) for i in range(len(batch))]
    for layer, vectors in together.items():
        assert np.abs(np.concatenate([o[layer] for o in one_by_one]) - vectors).max() < 1e-5


def test_the_exported_model_is_cached_under_a_key_of_backbone_weights_and_layers(embedders, lite0):
    reference, onnx, cache = embedders
    backbone, model = lite0
    files = list(cache.glob("*.onnx"))
    assert len(files) == 1
    stamp = files[0].stat().st_mtime_ns
    again = Embedder(backbone, model, reference.layers, cache_dir=cache)
    assert again.use_engine("auto", may_export=False) == "onnx"  # found in the cache, not exported again
    assert files[0].stat().st_mtime_ns == stamp
    manifest = backbone.manifest()
    nodes = [l.node for l in reference.layers]
    assert cached_model_path(cache, manifest, nodes) == files[0]
    assert cached_model_path(cache, manifest, nodes[:2]) != files[0]
    assert cached_model_path(cache, {**manifest, "weights_sha256": "0" * 64}, nodes) != files[0]


def test_auto_picks_torch_for_a_few_images_without_a_cached_model(lite0, tmp_path):
    backbone, model = lite0
    layers = resolve_layers(backbone, model, ["colour"])
    e = Embedder(backbone, model, layers, cache_dir=tmp_path)
    assert e.use_engine("auto", may_export=True, images=AUTO_EXPORT_MIN_IMAGES - 1) == "torch"
    assert not list(tmp_path.iterdir())
    with pytest.raises(EngineError, match="not exported"):
        e.use_engine("onnx", may_export=False)
    with pytest.raises(EngineError, match="unknown engine"):
        e.use_engine("tensorrt")


def test_an_archive_indexed_with_onnx_is_searched_with_torch(tmp_path, sample_images):
    from index.api import Archive

    folder = tmp_path / "imgs"
    folder.mkdir()
    names = ["astronaut", "coffee", "chelsea", "rocket", "brick"]
    for name in names:
        sample_images[name].save(folder / f"{name}.png")
    archive = Archive.open(tmp_path / "db", create=True, layers=["texture", "objects"])
    report = archive.add([folder], progress=False, engine="onnx")
    assert report["engine"] == "onnx" and report["embedded"] == len(names)
    assert archive.manifest["runtime"]["engine"] == "onnx"
    # Reopened with the torch preference: the settings check does not refuse it, and the torch
    # descriptor of each file finds the ONNX descriptor stored for it with a score of 1.
    reopened = Archive.open(tmp_path / "db", layers=["texture", "objects"])
    reopened.manifest["runtime"]["engine"] = "torch"
    assert reopened.embedder.engine.name == "torch"
    for name in names:
        top = reopened.search(str(folder / f"{name}.png"), layer="objects", k=1)["results"][0]
        assert top["path"].endswith(f"{name}.png")
        assert top["score"] == pytest.approx(1.0, abs=1e-4)


def test_a_reader_never_exports_the_model(tmp_path, sample_images):
    from index.api import Archive

    folder = tmp_path / "imgs"
    folder.mkdir()
    sample_images["coffee"].save(folder / "coffee.png")
    archive = Archive.open(tmp_path / "db", create=True, layers=["colour"])
    archive.add([folder], progress=False)  # one image: "auto" does not export for so few
    assert not (tmp_path / "db" / "engines").exists()
    reader = Archive.open(tmp_path / "db")
    reader.search(str(folder / "coffee.png"), k=1)
    assert reader.embedder.engine.name == "torch"
    assert not (tmp_path / "db" / "engines").exists()


@pytest.mark.parametrize("p", [1.0, 3.0, 4.5])
def test_pooling_equals_the_reference_gem_and_peaks(p):
    # Reference: index.model.pooling.gem (GeM as defined by Radenovic, Tolias and Chum) and torch's max.
    import torch

    from index.model.torch_engine import pool
    from index.model.pooling import gem, l2_normalize

    g = torch.Generator().manual_seed(0)
    fmap = torch.rand(3, 16, 9, 7, generator=g) * 6
    fmap[fmap < 2] = 0  # post-ReLU maps are mostly zeros
    fmap[1, 4] = 0  # a dead channel
    descriptors, peaks = pool({"x": fmap.clone()}, p)  # pool works in place
    assert np.abs(descriptors["x"] - l2_normalize(gem(fmap, p).numpy())).max() < 1e-6
    # Peaks are taken away from the outer ring of cells (index.model.onnx_engine.PEAK_RING = 1), positions in
    # the whole 9 x 7 grid: torch's max over the interior slice is the reference.
    values, inner = fmap[:, :, 1:-1, 1:-1].flatten(2).max(dim=2)
    where = (inner // 5 + 1) * 7 + inner % 5 + 1
    assert np.array_equal(peaks["x"][0], values.numpy()) and np.array_equal(peaks["x"][1], where.numpy())
    assert peaks["x"][2] == (9, 7)
    flat = fmap.flatten(2)
    assert np.array_equal(flat.gather(2, where.unsqueeze(2)).squeeze(2), values)
    # Two layers handing back the same tensor (an identity tap) are both pooled from the original.
    shared = fmap.clone()
    twice, _ = pool({"a": shared, "b": shared}, p)
    assert np.array_equal(twice["a"], twice["b"]) and np.abs(twice["a"] - descriptors["x"]).max() < 1e-6


def test_an_indexer_on_the_onnx_model_never_loads_torch(tmp_path, sample_images):
    """Creating the archive (the model is loaded to resolve its layers) and the export run in child
    processes when the per-user cache lacks them; the indexing process itself, on its first run,
    holds no torch (about 0.7 GB)."""
    import json
    import subprocess
    import sys

    from index.api import Archive

    folder = tmp_path / "imgs"
    folder.mkdir()
    for name in ("astronaut", "coffee", "chelsea"):
        sample_images[name].save(folder / f"{name}.png")
    script = (
        "import json, sys\n"
        "from index.api import Archive\n"
        f"archive = Archive.open({str(tmp_path / 'db')!r}, create=True, layers=['texture', 'objects'])\n"
        f"report = archive.add([{str(folder)!r}], progress=False, engine='onnx')\n"
        "print(json.dumps({'torch': 'torch' in sys.modules, 'engine': report['engine'],"
        " 'embedded': report['embedded']}))\n"
    )
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    seen = json.loads(out.stdout.strip().splitlines()[-1])
    assert seen == {"torch": False, "engine": "onnx", "embedded": 3}
    assert not (tmp_path / "db" / "engines").exists()  # exported once per model, into the per-user cache
    from index.model.model_cache import find_model, user_cache_dir

    assert find_model(json.loads((tmp_path / "db" / "manifest.json").read_text()), tmp_path / "db").parent == \
        user_cache_dir() / "models"
    # The torch reference finds each stored ONNX descriptor with a score of 1.
    archive = Archive.open(tmp_path / "db")
    archive.manifest["runtime"]["engine"] = "torch"
    top = archive.search(str(folder / "coffee.png"), layer="objects", k=1)["results"][0]
    assert top["path"].endswith("coffee.png") and top["score"] == pytest.approx(1.0, abs=1e-4)
