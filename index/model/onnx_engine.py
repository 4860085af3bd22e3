"""The ONNX Runtime engine: the backbone with GeM pooling inside the graph, run without torch.

The exported graph (index.model.torch_engine.export_onnx, which needs torch) takes the normalised input batch
and returns, for each chosen layer, the L2-normalised GeM descriptor and each channel's peak value and
position, so only (N, C) arrays leave ONNX Runtime and the pooling runs on its threads. The file is
cached once per model in the per-user cache (index.model.model_cache; earlier versions: the database
folder's `engines/`), named by a key of exporter format, backbone, weights hash, input size, layer
nodes and GeM exponent, and carries the layers' grids in its metadata. This module imports no
torch: an indexer that finds the model cached never loads it (index.model.onnx_embedder).
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np

from ..common.errors import ArchiveError

OPSET = 17
EXPORT_FORMAT = 3  # 2: pooled outputs (descriptor, peak, position); 3: peaks from interior positions only
#                   (PEAK_RING); bump when the exported graph changes
# Channel peaks (what the exemplars keep) are taken away from the frame's outer ring of cells: zero
# padding makes many channels fire there in every image (measured in docs/explain.md), so border
# peaks show the frame, not content. The descriptor still pools the whole map.
PEAK_RING = 1
CACHE_DIR = "engines"  # in a database folder: where earlier versions exported (still read)
META_KEY = "kinscope"  # ONNX metadata entry: {"layers": [...], "grids": {layer: [h, w]}, "p": ...}


class EngineError(ArchiveError):
    """The engine asked for cannot be used (missing runtime, failed export, mismatching output)."""


def onnx_available() -> bool:
    try:
        import onnxruntime  # noqa: F401
    except ImportError:
        return False
    return True


def model_key(backbone_manifest: dict, nodes: list[str], p: float) -> str:
    """What the exported graph depends on; equal keys mean the same graph and weights."""
    key = {"format": EXPORT_FORMAT, "opset": OPSET, "backbone": backbone_manifest["name"],
           "weights_sha256": backbone_manifest["weights_sha256"], "input_size": backbone_manifest["input_size"],
           "nodes": list(nodes), "gem_p": float(p)}
    return hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()[:20]


def cached_model_path(cache_dir: Path, backbone_manifest: dict, nodes: list[str], p: float = 3.0) -> Path:
    return Path(cache_dir) / f"{backbone_manifest['name']}-{model_key(backbone_manifest, nodes, p)}.onnx"


def interior(h: int, w: int) -> int:
    """Cells left out on each side of an (h, w) grid when looking for channel peaks (none when the
    grid is too small to have an interior)."""
    return PEAK_RING if min(h, w) > 2 * PEAK_RING else 0


def output_names(names: list[str]) -> list[str]:
    """Graph outputs, three per layer: descriptor, channel peak values, channel peak positions."""
    return [out for name in names for out in (name, f"{name}.peak", f"{name}.where")]


class OnnxEngine:
    name = "onnx"

    def __init__(self, path: Path, names: list[str], threads: int = 1):
        import onnxruntime as ort

        options = ort.SessionOptions()
        options.intra_op_num_threads = max(1, int(threads))
        options.inter_op_num_threads = 1
        options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        # Idle threads must sleep, not spin: the decode workers need the cores between batches.
        options.add_session_config_entry("session.intra_op.allow_spinning", "0")
        options.log_severity_level = 3
        try:
            self.session = ort.InferenceSession(str(path), options, providers=["CPUExecutionProvider"])
        except Exception as exc:
            raise EngineError(f"ONNX Runtime cannot load {path}: {exc}") from None
        self.path = Path(path)
        self.names = list(names)
        self.threads = threads
        missing = set(output_names(self.names)) - {o.name for o in self.session.get_outputs()}
        if missing:
            raise EngineError(f"{path} lacks the outputs {sorted(missing)}")
        try:
            meta = json.loads(self.session.get_modelmeta().custom_metadata_map[META_KEY])
            self.grids = {name: tuple(meta["grids"][name]) for name in self.names}
        except (KeyError, ValueError, TypeError):
            raise EngineError(f"{path} lacks kinscope's metadata (the layers' grids); export it again") from None

    def embed(self, batch: np.ndarray) -> tuple[dict[str, np.ndarray], dict[str, tuple]]:
        """(N, 3, S, S) float32 -> per layer the L2-normalised descriptor (N, C), and its peaks:
        value (N, C), flat position (N, C) and the grid (H, W)."""
        n, c, h, w = batch.shape
        assert c == 3, f"expected 3 colour channels, got {c}"
        outs = self.session.run(output_names(self.names), {"input": np.ascontiguousarray(batch, np.float32)})
        descriptors, peaks = {}, {}
        for k, name in enumerate(self.names):
            descriptor, value, where = outs[3 * k: 3 * k + 3]
            descriptors[name] = np.ascontiguousarray(descriptor, np.float32)
            peaks[name] = (value, where.astype(np.int64), self.grids[name])
        return descriptors, peaks
