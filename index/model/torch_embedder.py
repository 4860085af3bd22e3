"""Backbone forward pass with layer taps: images -> feature maps -> pooled descriptors."""
from __future__ import annotations

import threading
from pathlib import Path

import numpy as np
import torch
from PIL import Image
from torchvision.models.feature_extraction import create_feature_extractor

from ..images.preprocess import fit_square, to_input
from .backbones import Backbone
from .choice import make_engine
from .layers import Layer
from .torch_engine import TorchEngine


class Embedder:
    """Runs the backbone once per batch and pools every chosen layer.

    Descriptors come from the chosen engine (torch or ONNX Runtime, see index.model.choice); feature maps
    for explanations (`feature_maps`, `maps_of_image`) always come from torch, the reference.
    (Indexing with a cached ONNX model needs none of this: see index.model.onnx_embedder.)
    """

    def __init__(self, backbone: Backbone, model: torch.nn.Module, layers: list[Layer], p: float = 3.0,
                 *, engine: str = "torch", cache_dir: str | Path | None = None, may_export: bool = False,
                 threads: int | None = None):
        self.backbone = backbone
        self.layers = layers
        self.p = p
        self.size = backbone.input_size
        self.model = model
        self.extractor = create_feature_extractor(model, return_nodes={l.node: l.name for l in layers}).eval()
        self._extra: dict[tuple[str, ...], torch.nn.Module] = {}  # explanation taps -> their extractor
        self._tracing = threading.Lock()  # torch.fx traces the shared model: one extractor made at a time
        self.reference = TorchEngine(self.extractor, [l.name for l in layers], p=p)
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
        """Pick the engine for descriptors (see index.model.choice.make_engine); returns its name."""
        threads = threads or self._threads or torch.get_num_threads()
        self._engine = make_engine(choice, self.extractor, [l.name for l in self.layers], [l.node for l in self.layers],
                                   backbone_manifest=self._backbone_manifest(), cache_dir=self.cache_dir,
                                   threads=threads, may_export=may_export, images=images, p=self.p)
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
        """(N, S, S, 3) uint8 from index.images.preprocess.fit_square -> (N, 3, S, S) float32."""
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
        return self.engine.embed(batch)

    def embed_pixels(self, pixels: np.ndarray) -> tuple[dict[str, np.ndarray], dict[str, tuple]]:
        """embed_with_peaks for (N, S, S, 3) uint8 pixels as the decode workers send them."""
        return self.embed_with_peaks(self.inputs(pixels))

    def maps_of_image(self, image: Image.Image) -> dict[str, np.ndarray]:
        """One image -> layer name -> (C, H, W) feature map as float32 numpy (torch, the reference)."""
        maps = self.feature_maps(self.preprocess(image)[None])
        return {name: fmap[0].numpy() for name, fmap in maps.items()}

    def maps_at(self, images: list[Image.Image], nodes: tuple[str, ...]) -> dict[str, np.ndarray]:
        """Images -> graph node -> (N, C, H, W) float32 feature maps (torch), for any nodes of the
        backbone (explanations read a finer layer than the archive may keep); one forward pass."""
        with self._tracing:  # the server warms this in a thread while an explanation may ask for it
            if nodes not in self._extra:
                self._extra[nodes] = create_feature_extractor(self.model, return_nodes={n: n for n in nodes}).eval()
        batch = np.stack([self.preprocess(im) for im in images])
        with torch.inference_mode():
            out = self._extra[nodes](torch.from_numpy(batch))
        return {n: out[n].numpy() for n in nodes}

    def embed_images(self, images: list[Image.Image]) -> dict[str, np.ndarray]:
        return self.embed(np.stack([self.preprocess(im) for im in images]))
