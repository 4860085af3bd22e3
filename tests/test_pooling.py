"""GeM pooling, L2 normalisation and PCA whitening against their definitions and reference libraries."""
from __future__ import annotations

import numpy as np
import torch

from index.model.pooling import PCAWhitening, gem, l2_normalize


def test_gem_with_p_1_is_average_pooling():
    # Source: Radenovic, Tolias, Chum, "Fine-tuning CNN Image Retrieval with No Human Annotation",
    # TPAMI 2018, eq. for GeM: p = 1 gives average pooling.
    x = torch.rand(2, 5, 7, 9)
    expected = torch.nn.functional.adaptive_avg_pool2d(x, 1).flatten(1)
    assert torch.allclose(gem(x, 1.0), expected, atol=1e-6)


def test_gem_with_large_p_approaches_max_pooling():
    # Same source: p -> infinity gives max pooling.
    x = torch.rand(2, 5, 7, 9) + 0.01
    expected = torch.nn.functional.adaptive_max_pool2d(x, 1).flatten(1)
    err_10 = (gem(x, 10.0) - expected).abs().max()
    err_200 = (gem(x, 200.0) - expected).abs().max()
    assert err_200 < err_10
    assert torch.allclose(gem(x, 200.0), expected, rtol=0.03)


def test_gem_matches_its_formula_for_p_3():
    x = torch.rand(3, 4, 5, 6)
    expected = x.clamp(min=1e-6).pow(3).mean(dim=(2, 3)).pow(1 / 3)
    assert torch.allclose(gem(x, 3.0), expected, atol=1e-6)


def test_l2_normalize_gives_unit_rows():
    x = np.random.default_rng(0).normal(size=(10, 8))
    assert np.allclose(np.linalg.norm(l2_normalize(x), axis=1), 1.0, atol=1e-6)


def test_pca_whitening_agrees_with_scikit_learn():
    # Reference library: scikit-learn's PCA(whiten=True) computes the same projection up to the sign
    # of each component (and its ddof=1 variance), before our final L2 normalisation.
    from sklearn.decomposition import PCA

    rng = np.random.default_rng(1)
    x = rng.normal(size=(400, 12)) @ rng.normal(size=(12, 12))
    ours = PCAWhitening(dim=6).fit(x)
    theirs = PCA(n_components=6, whiten=True).fit(x)
    ours_raw = (x - ours.mean_) @ ours.projection_.T
    theirs_raw = theirs.transform(x)
    signs = np.sign(np.sum(ours_raw * theirs_raw, axis=0))
    assert np.allclose(ours_raw * signs, theirs_raw, atol=1e-3)
    assert np.allclose(np.linalg.norm(ours.transform(x), axis=1), 1.0, atol=1e-5)


def test_pca_whitening_round_trips_through_its_file(tmp_path):
    x = np.random.default_rng(2).normal(size=(50, 8)).astype(np.float32)
    pca = PCAWhitening().fit(x)
    pca.save(tmp_path / "w.npz")
    again = PCAWhitening.load(tmp_path / "w.npz")
    assert np.allclose(pca.transform(x), again.transform(x))
    assert again.out_dim == min(8, 49)
