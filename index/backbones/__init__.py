"""Backbone registry: a name (and optionally a weights file) -> a described, loadable network."""
from __future__ import annotations

from pathlib import Path

from .base import Backbone, BackboneError, Weights
from .efficientnet_lite import efficientnet_lite0
from .torchvision_models import MODELS as TORCHVISION_MODELS
from .torchvision_models import torchvision_backbone

DEFAULT_BACKBONE = "efficientnet_lite0"
NAMES = (DEFAULT_BACKBONE,) + tuple(TORCHVISION_MODELS)

__all__ = ["Backbone", "BackboneError", "Weights", "DEFAULT_BACKBONE", "NAMES", "get_backbone"]


def get_backbone(name: str = DEFAULT_BACKBONE, weights: str | Path | None = None) -> Backbone:
    """Describe backbone ``name``; raises BackboneError with a plain message if it cannot be had."""
    if name == DEFAULT_BACKBONE:
        return efficientnet_lite0(weights)
    if name in TORCHVISION_MODELS:
        return torchvision_backbone(name, weights)
    raise BackboneError(f"unknown backbone {name!r}; choose one of: {', '.join(NAMES)}")
