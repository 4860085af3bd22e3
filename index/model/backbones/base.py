"""What every backbone describes about itself: preprocessing, presets, weights' provenance."""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Callable

from ...common.files import sha256_file

if TYPE_CHECKING:
    import torch


USER_WEIGHTS = "file named by the user"  # the weights_source of a --weights file


class BackboneError(Exception):
    """A backbone that cannot be built as asked (unknown name, missing weights, bad file)."""


@dataclass(frozen=True)
class Weights:
    """Where a backbone's weights come from, so an archive can say what it was built with."""

    path: Path
    source: str  # plain words: which package or file the weights came from
    missing_hint: str = ""  # what to tell the user when the file is absent

    def sha256(self) -> str:
        return sha256_file(self.path)


@dataclass(frozen=True)
class Backbone:
    """One pretrained network, with everything needed to use it correctly.

    ``presets`` map plain names (colour, texture, parts, objects) to graph node names that
    ``torchvision.models.feature_extraction`` can tap; ``listed`` are the nodes shown by
    ``kinscope layers`` (any other node name of the graph is accepted too).
    """

    name: str
    family: str
    build: Callable[[], torch.nn.Module]  # architecture only, random init; load() fills it
    weights: Weights
    mean: tuple[float, float, float]
    std: tuple[float, float, float]
    input_size: int
    presets: dict[str, str]
    listed: tuple[str, ...]
    default_layers: tuple[str, ...] = ("colour", "texture", "parts", "objects")
    default_search_layer: str = "parts"
    categories: tuple[str, ...] = field(default=(), repr=False)

    def load(self) -> torch.nn.Module:
        """The network in eval mode with its pretrained weights; never a silent random init."""
        import torch

        if not self.weights.path.is_file():
            raise BackboneError(self.weights.missing_hint or f"weights file not found: {self.weights.path}")
        model = self.build()
        try:
            state = torch.load(self.weights.path, map_location="cpu", weights_only=True)
        except Exception as exc:  # corrupt or foreign file: say which file, not a stack trace
            raise BackboneError(f"cannot read weights file {self.weights.path}: {exc}") from None
        if isinstance(state, dict) and "state_dict" in state and isinstance(state["state_dict"], dict):
            state = state["state_dict"]
        state = self.adapt_state(state)
        try:
            model.load_state_dict(state, strict=True)
        except RuntimeError as exc:
            first = str(exc).splitlines()[0]
            raise BackboneError(
                f"weights file {self.weights.path} does not fit backbone {self.name}: {first}"
            ) from None
        return model.eval()

    def adapt_state(self, state: dict) -> dict:
        return state

    def resolve(self, layer: str) -> str:
        """Preset name or node name -> node name."""
        return self.presets.get(layer, layer)

    def manifest(self) -> dict:
        return {
            "name": self.name,
            "family": self.family,
            "weights_file": str(self.weights.path),
            "weights_source": self.weights.source,
            "weights_sha256": self.weights.sha256(),
            "mean": list(self.mean),
            "std": list(self.std),
            "input_size": self.input_size,
        }
