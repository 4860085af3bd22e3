"""torchvision classification models as a second backbone family.

Weights are never downloaded: they come from torchvision's own cache (where an earlier, online
use of torchvision left them) or from a file the user names with ``--weights``.
"""
from __future__ import annotations

import os
from pathlib import Path

import torch
import torchvision

from .base import USER_WEIGHTS, Backbone, Weights

# name -> presets (colour, texture, parts, objects) and the nodes worth listing
MODELS = {
    "resnet18": {
        "presets": {"colour": "relu", "texture": "layer2", "parts": "layer3", "objects": "layer4"},
        "listed": ("relu", "layer1", "layer2", "layer3", "layer4"),
    },
    "resnet50": {
        "presets": {"colour": "relu", "texture": "layer2", "parts": "layer3", "objects": "layer4"},
        "listed": ("relu", "layer1", "layer2", "layer3", "layer4"),
    },
    "mobilenet_v3_small": {
        "presets": {"colour": "features.0", "texture": "features.3", "parts": "features.8", "objects": "features.12"},
        "listed": tuple(f"features.{i}" for i in range(13)),
    },
    "mobilenet_v3_large": {
        "presets": {"colour": "features.0", "texture": "features.6", "parts": "features.12", "objects": "features.16"},
        "listed": tuple(f"features.{i}" for i in range(17)),
    },
}


def imagenet_categories() -> tuple[str, ...]:
    """The 1000 ImageNet class names as torchvision's weights metadata lists them."""
    return tuple(torchvision.models.ResNet50_Weights.IMAGENET1K_V1.meta["categories"])


def cache_path(name: str) -> Path:
    weights = torchvision.models.get_model_weights(name).DEFAULT
    return Path(torch.hub.get_dir()) / "checkpoints" / os.path.basename(weights.url)


def torchvision_backbone(name: str, weights_file: str | Path | None = None) -> Backbone:
    spec = MODELS[name]
    default = torchvision.models.get_model_weights(name).DEFAULT
    cached = cache_path(name)
    hint = (
        f"no weights for {name}: kinscope never downloads at run time. Either copy "
        f"torchvision's file {cached.name} into {cached.parent} (torchvision's cache, set by "
        f"TORCH_HOME), or pass --weights FILE with a state dict for torchvision's {name}."
    )
    if weights_file:
        path, source = Path(weights_file), USER_WEIGHTS
        hint = f"weights file not found: {path}"
    else:
        path, source = cached, "torchvision's cache"
    transform = default.transforms()
    return Backbone(
        name=name,
        family="torchvision",
        build=lambda: torchvision.models.get_model(name, weights=None),
        weights=Weights(path, source, hint),
        mean=tuple(transform.mean),
        std=tuple(transform.std),
        input_size=256,
        presets=dict(spec["presets"]),
        listed=spec["listed"],
        categories=tuple(default.meta["categories"]),
    )
