"""Backbone registry: a name (and optionally a weights file) -> a described, loadable network.

Imports no torch: the model definitions are imported when a backbone is asked for (an indexer
running a cached ONNX model never needs them). They import nothing from here.
"""
from __future__ import annotations

from pathlib import Path

from .base import USER_WEIGHTS, Backbone, BackboneError

DEFAULT_BACKBONE = "efficientnet_lite0"
TORCHVISION_NAMES = ("resnet18", "resnet50", "mobilenet_v3_small", "mobilenet_v3_large")
NAMES = (DEFAULT_BACKBONE,) + TORCHVISION_NAMES

# Plain-language hints for the layer presets, early to late.
PRESET_HINTS = {
    "colour": "colour, edges and fine grain",
    "texture": "texture and repeated motifs",
    "parts": "shapes and object parts",
    "objects": "whole objects and scenes",
}

# The networks in words for people who do not know them: all are general-purpose image classifiers
# trained on ImageNet's everyday photographs (they differ in size, which the technical name tells).
PLAIN_NAMES = {name: "general-purpose photo recogniser" for name in NAMES}


def plain_name(name: str, weights_source: str = "") -> str:
    """What the network is, in plain words; with a user's own weights, nothing is claimed of its training."""
    if weights_source == USER_WEIGHTS:
        return "image recognition network with weights you supplied"
    return PLAIN_NAMES.get(name, "image recognition network")


def get_backbone(name: str = DEFAULT_BACKBONE, weights: str | Path | None = None) -> Backbone:
    """Describe backbone ``name``; raises BackboneError with a plain message if it cannot be had."""
    if name == DEFAULT_BACKBONE:
        from .efficientnet_lite import efficientnet_lite0

        return efficientnet_lite0(weights)
    if name in TORCHVISION_NAMES:
        from .torchvision_models import MODELS, torchvision_backbone

        assert tuple(MODELS) == TORCHVISION_NAMES, "torchvision_models.MODELS lists the registry's models"
        return torchvision_backbone(name, weights)
    raise BackboneError(f"unknown backbone {name!r}; choose one of: {', '.join(NAMES)}")
