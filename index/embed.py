"""Backbone forward pass with layer taps: images -> feature maps -> pooled descriptors."""
from __future__ import annotations

from pathlib import Path

import numpy as np
import torch
from PIL import Image
from torchvision.models.feature_extraction import create_feature_extractor

from .backbones import Backbone
from .engines import TorchEngine, make_engine
from .layers import Layer
from .pooling import GEM_EPS, l2_normalize
from .preprocess import fit_square, to_input


def pool(maps: dict[str, torch.Tensor], p: float) -> tuple[dict[str, np.ndarray], dict[str, tuple]]:
    """Feature maps -> per layer the L2-normalised GeM descriptor (N, C), and each channel's peak
    value (N, C), its flat position (N, C) and the grid (H, W).

    The arithmetic of index.pooling.gem (clamp at GEM_EPS, divide by the per-channel maximum, power,
    mean, root, rescale; bit for bit the same result), done in place: the maps are overwritten.
    In place matters: fresh 30 MB temporaries per batch cost more than the arithmetic (page faults).
    """
    if p <= 0:
        raise ValueError(f"GeM exponent must be positive, got {p}")
    descriptors, peaks = {}, {}
    with torch.inference_mode():
        # Two taps can hand back one tensor (an identity layer): each gets its own copy first.
        storages = [m.untyped_storage().data_ptr() for m in maps.values()]
        shared = {ptr for ptr in storages if storages.count(ptr) > 1}
        maps = {name: (m.clone() if m.untyped_storage().data_ptr() in shared else m) for name, m in maps.items()}
        for name, fmap in maps.items():
            n, c, h, w = fmap.shape
            flat = fmap.contiguous().reshape(n, c, h * w)
            values, where = flat.max(dim=2)
            peaks[name] = (values.numpy(), where.numpy().astype(np.int64), (h, w))
            x = flat.clamp_min_(GEM_EPS)
            if p == 1:
                pooled = x.mean(dim=2)
            else:
                scale = values.clamp_min(GEM_EPS).unsqueeze(2)  # = amax of the clamped map
                pooled = x.div_(scale).pow_(p).mean(dim=2).pow_(1.0 / p).mul_(scale.squeeze(2))
            descriptors[name] = l2_normalize(pooled.numpy())
    return descriptors, peaks


class Embedder:
    """Runs the backbone once per batch and pools every chosen layer.

    Descriptors come from the chosen engine (torch or ONNX Runtime, see index.engines); feature maps
    for explanations (`feature_maps`, `maps_of_image`) always come from torch, the reference.
    """

    def __init__(self, backbone: Backbone, model: torch.nn.Module, layers: list[Layer], p: float = 3.0,
                 *, engine: str = "torch", cache_dir: str | Path | None = None, may_export: bool = False,
                 threads: int | None = None):
        self.backbone = backbone
        self.layers = layers
        self.p = p
        self.size = backbone.input_size
        self.extractor = create_feature_extractor(model, return_nodes={l.node: l.name for l in layers}).eval()
        self.reference = TorchEngine(self.extractor, [l.name for l in layers])
        self.cache_dir = Path(cache_dir) if cache_dir is not None else None
        self._mean = np.asarray(backbone.mean, np.float32)
        self._std = np.asarray(backbone.std, np.float32)
        self._choice = engine
        self._may_export = may_export
        self._threads = threads
        self._engine = None

    # --- engine -----------------------------------------------------------------------------
    def use_engine(self, choice: str = "auto", *, may_export: bool = False, images: int | None = None,
                   threads: int | None = None) -> str:
        """Pick the engine for descriptors (see index.engines.make_engine); returns its name."""
        threads = threads or self._threads or torch.get_num_threads()
        self._engine = make_engine(choice, self.extractor, [l.name for l in self.layers], [l.node for l in self.layers],
                                   backbone_manifest=self._backbone_manifest(), cache_dir=self.cache_dir,
                                   threads=threads, may_export=may_export, images=images)
        self._choice = choice
        return self._engine.name

    @property
    def engine(self):
        if self._engine is None:
            self.use_engine(self._choice, may_export=self._may_export)
        return self._engine

    def _backbone_manifest(self) -> dict:
        if not hasattr(self, "_bm"):
            self._bm = self.backbone.manifest()  # hashes the weights file once
        return self._bm

    # --- preprocessing ----------------------------------------------------------------------
    def preprocess(self, image: Image.Image) -> np.ndarray:
        """RGB image -> (3, S, S) float32 network input (the whole frame, resized, no crop)."""
        return to_input(fit_square(image, self.size)[None], self._mean, self._std)[0]

    def inputs(self, pixels: np.ndarray) -> np.ndarray:
        """(N, S, S, 3) uint8 from index.preprocess.fit_square -> (N, 3, S, S) float32."""
        return to_input(pixels, self._mean, self._std)

    # --- forward ----------------------------------------------------------------------------
    def feature_maps(self, batch: np.ndarray) -> dict[str, torch.Tensor]:
        """(N, 3, S, S) preprocessed inputs -> layer name -> (N, C, H, W) feature maps (torch)."""
        n, c, h, w = batch.shape
        assert c == 3, f"expected 3 colour channels, got {c}"
        return self.reference.maps(batch)

    def embed(self, batch: np.ndarray) -> dict[str, np.ndarray]:
        """(N, 3, S, S) preprocessed inputs -> layer name -> (N, C) L2-normalised GeM descriptors."""
        return self.embed_with_peaks(batch)[0]

    def embed_with_peaks(self, batch: np.ndarray) -> tuple[dict[str, np.ndarray], dict[str, tuple]]:
        """Descriptors, plus per layer each channel's peak (N, C), its flat position (N, C) and the grid (H, W)."""
        n, c, h, w = batch.shape
        assert c == 3, f"expected 3 colour channels, got {c}"
        return pool(self.engine.maps(batch), self.p)

    def embed_pixels(self, pixels: np.ndarray) -> tuple[dict[str, np.ndarray], dict[str, tuple]]:
        """embed_with_peaks for (N, S, S, 3) uint8 pixels as the decode workers send them."""
        return self.embed_with_peaks(self.inputs(pixels))

    def maps_of_image(self, image: Image.Image) -> dict[str, np.ndarray]:
        """One image -> layer name -> (C, H, W) feature map as float32 numpy (torch, the reference)."""
        maps = self.feature_maps(self.preprocess(image)[None])
        return {name: fmap[0].numpy() for name, fmap in maps.items()}

    def embed_images(self, images: list[Image.Image]) -> dict[str, np.ndarray]:
        return self.embed(np.stack([self.preprocess(im) for im in images]))
