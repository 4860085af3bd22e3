"""Backbone forward pass with layer taps: images -> feature maps -> pooled descriptors."""
from __future__ import annotations

import numpy as np
import torch
from PIL import Image
from torchvision.models.feature_extraction import create_feature_extractor

from .backbones import Backbone
from .layers import Layer
from .pooling import gem, l2_normalize


class Embedder:
    """Runs the backbone once per batch and pools every chosen layer."""

    def __init__(self, backbone: Backbone, model: torch.nn.Module, layers: list[Layer], p: float = 3.0):
        self.backbone = backbone
        self.layers = layers
        self.p = p
        self.size = backbone.input_size
        self.extractor = create_feature_extractor(model, return_nodes={l.node: l.name for l in layers}).eval()
        self._mean = np.asarray(backbone.mean, np.float32).reshape(3, 1, 1)
        self._std = np.asarray(backbone.std, np.float32).reshape(3, 1, 1)

    def preprocess(self, image: Image.Image) -> np.ndarray:
        """RGB image -> (3, S, S) float32 network input (the whole frame, resized, no crop)."""
        if image.mode != "RGB":
            image = image.convert("RGB")
        resized = image.resize((self.size, self.size), Image.BILINEAR, reducing_gap=3.0)
        x = np.asarray(resized, np.float32).transpose(2, 0, 1) / 255.0
        return (x - self._mean) / self._std

    def feature_maps(self, batch: np.ndarray) -> dict[str, torch.Tensor]:
        """(N, 3, S, S) preprocessed inputs -> layer name -> (N, C, H, W) feature maps."""
        n, c, h, w = batch.shape
        assert c == 3, f"expected 3 colour channels, got {c}"
        with torch.inference_mode():
            return self.extractor(torch.from_numpy(np.ascontiguousarray(batch)))

    def embed(self, batch: np.ndarray) -> dict[str, np.ndarray]:
        """(N, 3, S, S) preprocessed inputs -> layer name -> (N, C) L2-normalised GeM descriptors."""
        return self.embed_with_peaks(batch)[0]

    def embed_with_peaks(self, batch: np.ndarray) -> tuple[dict[str, np.ndarray], dict[str, tuple]]:
        """Descriptors, plus per layer each channel's peak (N, C), its flat position (N, C) and the grid (H, W)."""
        maps = self.feature_maps(batch)
        descriptors, peaks = {}, {}
        with torch.inference_mode():
            for name, fmap in maps.items():
                descriptors[name] = l2_normalize(gem(fmap, self.p).numpy())
                values, where = fmap.flatten(2).max(dim=2)
                peaks[name] = (values.numpy(), where.numpy().astype(np.int64), tuple(fmap.shape[-2:]))
        return descriptors, peaks

    def maps_of_image(self, image: Image.Image) -> dict[str, np.ndarray]:
        """One image -> layer name -> (C, H, W) feature map as float32 numpy."""
        maps = self.feature_maps(self.preprocess(image)[None])
        return {name: fmap[0].numpy() for name, fmap in maps.items()}

    def embed_images(self, images: list[Image.Image]) -> dict[str, np.ndarray]:
        return self.embed(np.stack([self.preprocess(im) for im in images]))
