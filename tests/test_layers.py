"""Layer taps: presets from early to late, any graph node by name, clear errors."""
from __future__ import annotations

import pytest

from index.model.backbones import BackboneError
from index.model.layers import listing, resolve_layers


def test_presets_go_from_fine_to_coarse(lite0):
    backbone, model = lite0
    layers = resolve_layers(backbone, model, ["colour", "texture", "parts", "objects"])
    strides = [l.stride for l in layers]
    assert strides == sorted(strides) and strides[0] < strides[-1]
    # EfficientNet-B0/Lite0 table (Tan and Le, 2019, Table 1): the head has 1280 channels at stride 32.
    assert (layers[-1].channels, layers[-1].stride) == (1280, 32)


def test_any_graph_node_can_be_tapped(lite0):
    backbone, model = lite0
    (layer,) = resolve_layers(backbone, model, ["blocks.8"])
    # Same table: stage 6 (blocks 8-10) outputs 112 channels at stride 16.
    assert (layer.channels, layer.stride) == (112, 16)


def test_unknown_layer_is_refused_with_suggestions(lite0):
    backbone, model = lite0
    with pytest.raises(BackboneError, match="no layer 'blocks.99'"):
        resolve_layers(backbone, model, ["blocks.99"])


def test_the_same_node_twice_is_refused(lite0):
    backbone, model = lite0
    with pytest.raises(BackboneError, match="same node"):
        resolve_layers(backbone, model, ["objects", "head.act"])


def test_listing_marks_every_preset(lite0):
    backbone, model = lite0
    rows = listing(backbone, model)
    assert {r["preset"] for r in rows if r["preset"]} == set(backbone.presets)
