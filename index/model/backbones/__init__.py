"""Backbones: what each network describes about itself (base), the registry of names (registry), and
the model definitions (efficientnet_lite, torchvision_models; they import torch, the rest does not)."""
from __future__ import annotations

from .base import USER_WEIGHTS, Backbone, BackboneError, Weights
from .registry import DEFAULT_BACKBONE, NAMES, PRESET_HINTS, TORCHVISION_NAMES, get_backbone, plain_name

__all__ = ["Backbone", "BackboneError", "Weights", "USER_WEIGHTS", "DEFAULT_BACKBONE", "NAMES", "PRESET_HINTS",
           "TORCHVISION_NAMES", "get_backbone", "plain_name"]
