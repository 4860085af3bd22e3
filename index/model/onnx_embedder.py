"""Descriptors from the cached ONNX model alone: what the indexer uses when the model is exported.

Same interface as index.model.torch_embedder.Embedder for indexing and queries (size, engine,
embed_pixels, embed_images), built from the archive's manifest and the cached model file, without
importing torch: an indexing process then holds ONNX Runtime, FAISS and the catalog, not torch and
torchvision (about 0.7 GB resident on their own), and a search by an image file starts in a fraction
of a second instead of the seconds torch takes to load. Exporting the model needs torch;
index.model.child does it, in a child process when called from Archive.add.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
from PIL import Image

from ..images.preprocess import fit_square, to_input
from .onnx_engine import OnnxEngine


class OnnxEmbedder:
    def __init__(self, path: Path, names: list[str], *, size: int, mean, std, threads: int = 1):
        self.engine = OnnxEngine(path, names, threads)
        self.names = list(names)
        self.size = int(size)
        self._mean = np.asarray(mean, np.float32)
        self._std = np.asarray(std, np.float32)

    @classmethod
    def for_manifest(cls, path: Path, manifest: dict, threads: int = 1) -> "OnnxEmbedder":
        """The embedder of an archive's layers, on its cached model file `path`."""
        b = manifest["backbone"]
        return cls(path, [l["name"] for l in manifest["layers"]], size=b["input_size"], mean=b["mean"],
                   std=b["std"], threads=threads)

    def inputs(self, pixels: np.ndarray) -> np.ndarray:
        """(N, S, S, 3) uint8 from index.images.preprocess.fit_square -> (N, 3, S, S) float32."""
        return to_input(pixels, self._mean, self._std)

    def embed_pixels(self, pixels: np.ndarray) -> tuple[dict[str, np.ndarray], dict[str, tuple]]:
        """Descriptors and channel peaks for (N, S, S, 3) uint8 pixels as the decode workers send them."""
        return self.engine.embed(self.inputs(pixels))

    def embed_images(self, images: list[Image.Image]) -> dict[str, np.ndarray]:
        """Descriptors of whole images, prepared as Embedder.preprocess prepares them (fit_square)."""
        pixels = np.stack([fit_square(im, self.size) for im in images])
        return self.embed_pixels(pixels)[0]
