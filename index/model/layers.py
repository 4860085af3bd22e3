"""Named taps on a backbone's graph (torchvision.models.feature_extraction) and their shapes."""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import torch
from torchvision.models.feature_extraction import create_feature_extractor, get_graph_node_names

from .backbones import PRESET_HINTS, Backbone, BackboneError


@dataclass(frozen=True)
class Layer:
    """A tapped layer: the name the archive stores it under and the graph node it reads."""

    name: str  # preset name or node name, as the user chose it
    node: str
    channels: int
    stride: int

    def manifest(self) -> dict:
        return {"name": self.name, "node": self.node, "channels": self.channels, "stride": self.stride}


@lru_cache(maxsize=8)
def _node_names(model: torch.nn.Module) -> tuple[str, ...]:
    return tuple(get_graph_node_names(model)[1])


def graph_nodes(model: torch.nn.Module) -> tuple[str, ...]:
    """Every node name of the eval-mode graph that can be tapped."""
    return _node_names(model)


def resolve_layers(backbone: Backbone, model: torch.nn.Module, names: list[str]) -> list[Layer]:
    """Preset or node names -> Layers with channels and stride measured by a dry run."""
    if not names:
        raise BackboneError("choose at least one layer")
    nodes = {}
    known = set(graph_nodes(model))
    for name in names:
        node = backbone.resolve(name)
        if node not in known and not _taps(model, node, backbone.input_size):
            close = [n for n in backbone.listed if name in n][:5]
            hint = f"; did you mean {', '.join(close)}?" if close else "; `kinscope layers` lists them"
            raise BackboneError(f"{backbone.name} has no layer {name!r}{hint}")
        if node in nodes.values():
            raise BackboneError(f"layer {name!r} is the same node as another chosen layer ({node})")
        nodes[name] = node
    shapes = measure(model, tuple(nodes.values()), backbone.input_size)
    return [Layer(name, node, *shapes[node]) for name, node in nodes.items()]


def _taps(model: torch.nn.Module, node: str, size: int) -> bool:
    """Module names (e.g. 'blocks.8') are accepted by the extractor as well as leaf node names."""
    try:
        measure(model, (node,), size)
        return True
    except Exception:
        return False


def measure(model: torch.nn.Module, nodes: tuple[str, ...], size: int) -> dict[str, tuple[int, int]]:
    """node -> (channels, spatial stride), from one forward pass of a blank image."""
    extractor = create_feature_extractor(model, return_nodes={n: n for n in nodes})
    with torch.no_grad():
        out = extractor(torch.zeros(1, 3, size, size))
    result = {}
    for node, fmap in out.items():
        if fmap.ndim != 4:
            raise BackboneError(f"layer {node} is not a spatial feature map (shape {tuple(fmap.shape)})")
        result[node] = (int(fmap.shape[1]), max(1, round(size / fmap.shape[-1])))
    return result


def listing(backbone: Backbone, model: torch.nn.Module) -> list[dict]:
    """The layers `kinscope layers` shows: listed nodes with shapes and the presets naming them.

    `model` may be untrained: only shapes are read.
    """
    shapes = measure(model, tuple(backbone.listed), backbone.input_size)
    by_node = {node: name for name, node in backbone.presets.items()}
    rows = []
    for node in backbone.listed:
        channels, stride = shapes[node]
        preset = by_node.get(node)
        rows.append(
            {
                "node": node,
                "channels": channels,
                "stride": stride,
                "preset": preset,
                "hint": PRESET_HINTS.get(preset, ""),
            }
        )
    return rows
