"""The backbones really carry their pretrained weights, and refuse to run without them."""
from __future__ import annotations

import numpy as np
import pytest
import torch

from index.model.backbones import BackboneError, get_backbone
from index.model.backbones.efficientnet_lite import rename_state


def top5(backbone, model, image) -> list[str]:
    from index.model.torch_embedder import Embedder
    from index.model.layers import resolve_layers

    size = 224  # Lite0's training resolution, as listed in the EfficientNet-Lite release of the TensorFlow TPU
    # models repository (2020) that introduced the Lite variants (from memory; the EfficientNet paper covers B0-B7 only)
    x = np.asarray(image.convert("RGB").resize((size, size)), np.float32).transpose(2, 0, 1) / 255.0
    mean = np.asarray(backbone.mean, np.float32)[:, None, None]
    std = np.asarray(backbone.std, np.float32)[:, None, None]
    with torch.no_grad():
        logits = model(torch.from_numpy((x - mean) / std)[None])
    return [backbone.categories[i] for i in logits[0].topk(5).indices.tolist()]


def test_lite0_classifies_the_cat_photograph_as_a_cat(lite0, sample_images):
    # Source: scikit-image's `chelsea` is a photograph of a cat; ImageNet's domestic-cat classes as
    # listed in torchvision's weights metadata (indices 281-285).
    backbone, model = lite0
    cats = {"tabby", "tiger cat", "Persian cat", "Siamese cat", "Egyptian cat"}
    assert cats & set(top5(backbone, model, sample_images["chelsea"]))


def test_lite0_classifies_the_coffee_photograph_as_espresso_or_cup(lite0, sample_images):
    # Source: scikit-image's `coffee` shows a cup of coffee; classes from torchvision's ImageNet metadata.
    backbone, model = lite0
    assert {"espresso", "cup", "coffee mug"} & set(top5(backbone, model, sample_images["coffee"]))


def test_lite0_weights_change_the_output_compared_with_random_init(lite0, sample_images):
    backbone, model = lite0
    random_model = backbone.build().eval()
    x = torch.randn(1, 3, 224, 224)
    with torch.no_grad():
        assert not torch.allclose(model(x), random_model(x))


def test_package_keys_are_renamed_onto_the_architecture(lite0):
    backbone, model = lite0
    renamed = rename_state({"_blocks.3._bn1.running_mean": 0, "_conv_stem.weight": 1, "_fc.bias": 2})
    assert set(renamed) == {"blocks.3.depthwise.bn.running_mean", "stem.conv.weight", "fc.bias"}
    assert set(renamed) <= set(model.state_dict())


def test_torchvision_backbone_without_weights_says_how_to_provide_them(tmp_path, monkeypatch):
    monkeypatch.setenv("TORCH_HOME", str(tmp_path / "empty-cache"))
    backbone = get_backbone("resnet18")
    with pytest.raises(BackboneError) as err:
        backbone.load()
    message = str(err.value)
    assert "never downloads" in message and "--weights" in message and "resnet18" in message


@pytest.mark.parametrize("name", ["resnet18", "mobilenet_v3_small"])
def test_torchvision_backbone_loads_a_weights_file(tmp_path, name):
    import torchvision

    reference = torchvision.models.get_model(name, weights=None).eval()
    path = tmp_path / f"{name}.pth"
    torch.save(reference.state_dict(), path)
    model = get_backbone(name, path).load()
    x = torch.randn(1, 3, 64, 64)
    with torch.no_grad():
        assert torch.equal(model(x), reference(x))


def test_a_weights_file_for_another_network_is_refused_with_a_message(tmp_path):
    import torchvision

    path = tmp_path / "wrong.pth"
    torch.save(torchvision.models.resnet18(weights=None).state_dict(), path)
    with pytest.raises(BackboneError, match="does not fit backbone mobilenet_v3_small"):
        get_backbone("mobilenet_v3_small", path).load()


def test_a_corrupt_weights_file_is_refused_with_a_message(tmp_path):
    path = tmp_path / "garbage.pth"
    path.write_bytes(b"not a state dict")
    with pytest.raises(BackboneError, match="cannot read weights file"):
        get_backbone("resnet18", path).load()


def test_unknown_backbone_lists_the_choices():
    with pytest.raises(BackboneError, match="efficientnet_lite0"):
        get_backbone("nonexistent_net")
