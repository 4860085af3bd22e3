"""The models one archive's process holds: the query model and the torch Embedder, each built once.

Queries (a search by an image file, an upload, a region) are described by the cached ONNX model when
there is one (index.model.model_cache) and the archive does not prefer torch: ONNX Runtime loads in
a fraction of a second, torch in seconds (and about 0.7 GB). The descriptors of both agree to 1e-6
(tests/test_engines.py), and the indexer uses the same cached model, so a query is described exactly
as the archive's items were. Explanations need feature maps of any graph node: always torch.
Importing this module imports no torch; `torch` builds the Embedder, which does.
"""
from __future__ import annotations

import threading
import time
from pathlib import Path
from typing import Callable

from PIL import Image

from .settings import backbone_of, layer_specs


class ArchiveModels:
    """`manifest()` gives the archive's current manifest; `configure()` sets the process's thread pools
    for a model (index.ingest.pipeline.configure_threads, handed down by index.api) and returns the
    number of threads a model may use."""

    def __init__(self, db: Path, manifest: Callable[[], dict], configure: Callable[[], int]):
        self.db = Path(db)
        self._manifest = manifest
        self._configure = configure
        self._backbone = None
        self._torch = None
        self._query = None
        self._lock = threading.RLock()  # the server warms the models in a thread of its own

    @property
    def backbone(self):
        """The archive's backbone, its weights checked against the manifest's hash."""
        with self._lock:
            if self._backbone is None:
                self._backbone = backbone_of(self._manifest()["backbone"])
        return self._backbone

    def preference(self) -> str:
        return self._manifest().get("runtime", {}).get("engine", "auto")

    @property
    def torch(self):
        """The torch Embedder (index.model.torch_embedder): explanations, and queries when no ONNX model
        is cached. Loads torch."""
        with self._lock:
            if self._torch is None:
                from .layers import Layer
                from .torch_embedder import Embedder

                self._configure()
                manifest = self._manifest()
                layers = [Layer(**spec) for spec in layer_specs(manifest)]
                # Queries use ONNX Runtime only when its model is already cached (readers never export).
                self._torch = Embedder(self.backbone, self.backbone.load(), layers, manifest["pooling"]["p"],
                                       engine="torch" if self.preference() == "torch" else "auto",
                                       cache_dir=self._model_folder(manifest), may_export=False)
        return self._torch

    def _model_folder(self, manifest: dict) -> Path:
        from .model_cache import find_model, user_cache_dir, MODELS

        found = find_model(manifest, self.db)
        return found.parent if found is not None else user_cache_dir() / MODELS

    @property
    def query(self):
        """What describes queries: the cached ONNX model (no torch), else the torch Embedder."""
        with self._lock:
            if self._query is None and self.preference() != "torch":
                self._query = self._cached_onnx()
        return self._query or self.torch

    def _cached_onnx(self):
        from .model_cache import find_model
        from .onnx_embedder import OnnxEmbedder
        from .onnx_engine import EngineError, onnx_available

        manifest = self._manifest()
        path = find_model(manifest, self.db) if onnx_available() else None
        if path is None:
            return None
        threads = self._configure()
        try:
            return OnnxEmbedder.for_manifest(path, manifest, threads=threads)
        except EngineError:  # a damaged cache file: torch describes queries instead
            return None

    def warm_query(self) -> str:
        """Build the query model and run one image through it (ONNX Runtime's first run sets up its
        buffers); the engine's name."""
        embedder = self.query
        side = int(self._manifest()["backbone"]["input_size"])
        embedder.embed_images([Image.new("RGB", (side, side), (128, 128, 128))])
        return embedder.engine.name

    def warm_maps(self, nodes: tuple[str, ...]) -> float:
        """Load torch and the backbone and run one image through these graph nodes (what a first
        explanation needs); seconds taken."""
        start = time.perf_counter()
        side = int(self._manifest()["backbone"]["input_size"])
        self.torch.maps_at([Image.new("RGB", (side, side), (128, 128, 128))], nodes)
        return time.perf_counter() - start
