"""Inference engines: the tapped feature maps of one forward pass, from torch or from ONNX Runtime.

torch (eager, through torchvision's feature extractor) is the reference. The ONNX engine runs the same
extractor exported with the chosen layers as graph outputs; the exported file is cached in the
database folder (`engines/`), named by a key of backbone, weights hash, input size and layer nodes,
and checked against torch when it is made. Both engines return torch tensors, so pooling (GeM, peaks)
is one code path whichever engine ran.
"""
from __future__ import annotations

import hashlib
import io
import json
import sys
import warnings
from pathlib import Path

import numpy as np
import torch

ENGINES = ("auto", "torch", "onnx")
OPSET = 17
EXPORT_FORMAT = 1  # bump when the exported graph changes, so old cache files are not reused
CACHE_DIR = "engines"
# Below this many images an export (a few seconds, once per database) costs more than ONNX saves,
# so "auto" stays on torch unless the exported model is already cached.
AUTO_EXPORT_MIN_IMAGES = 200
VERIFY_ATOL = 1e-3  # on raw feature maps (ReLU6 activations, 0..6) of a random batch


class EngineError(Exception):
    """The engine asked for cannot be used (missing runtime, failed export, mismatching output)."""


def onnx_available() -> bool:
    try:
        import onnxruntime  # noqa: F401
    except ImportError:
        return False
    return True


class TorchEngine:
    name = "torch"

    def __init__(self, extractor: torch.nn.Module, names: list[str], threads: int | None = None):
        self.extractor = extractor
        self.names = list(names)
        self.threads = threads

    def maps(self, batch: np.ndarray) -> dict[str, torch.Tensor]:
        """(N, 3, S, S) float32 -> layer name -> (N, C, H, W) feature maps."""
        if self.threads:
            torch.set_num_threads(self.threads)
        with torch.inference_mode():
            out = self.extractor(torch.from_numpy(np.ascontiguousarray(batch, np.float32)))
        return {name: out[name] for name in self.names}


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
        missing = set(self.names) - {o.name for o in self.session.get_outputs()}
        if missing:
            raise EngineError(f"{path} lacks the outputs {sorted(missing)}")

    def maps(self, batch: np.ndarray) -> dict[str, torch.Tensor]:
        outs = self.session.run(self.names, {"input": np.ascontiguousarray(batch, np.float32)})
        return {name: torch.from_numpy(out) for name, out in zip(self.names, outs)}


def model_key(backbone_manifest: dict, nodes: list[str]) -> str:
    """What the exported graph depends on; equal keys mean the same graph and weights."""
    key = {"format": EXPORT_FORMAT, "opset": OPSET, "backbone": backbone_manifest["name"],
           "weights_sha256": backbone_manifest["weights_sha256"], "input_size": backbone_manifest["input_size"],
           "nodes": list(nodes)}
    return hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()[:20]


def cached_model_path(cache_dir: Path, backbone_manifest: dict, nodes: list[str]) -> Path:
    return Path(cache_dir) / f"{backbone_manifest['name']}-{model_key(backbone_manifest, nodes)}.onnx"


class _Outputs(torch.nn.Module):
    """The feature extractor with a tuple of outputs in layer order (ONNX graphs return sequences)."""

    def __init__(self, extractor: torch.nn.Module, names: list[str]):
        super().__init__()
        self.extractor = extractor
        self.names = list(names)

    def forward(self, x):
        out = self.extractor(x)
        return tuple(out[name] for name in self.names)


def export_onnx(extractor: torch.nn.Module, names: list[str], input_size: int, path: Path) -> None:
    """Export with a dynamic batch axis, check it against torch, then write `path` atomically."""
    from .store import atomic_write

    buf = io.BytesIO()
    dummy = torch.zeros(2, 3, input_size, input_size)
    with warnings.catch_warnings(), torch.inference_mode(False), torch.no_grad():
        warnings.simplefilter("ignore")
        torch.onnx.export(_Outputs(extractor, names).eval(), (dummy,), buf, input_names=["input"],
                          output_names=list(names), opset_version=OPSET, dynamo=False,
                          dynamic_axes={"input": {0: "batch"}, **{n: {0: "batch"} for n in names}})
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(path).with_suffix(".unchecked")
    tmp.write_bytes(buf.getvalue())
    try:
        difference = max_difference(TorchEngine(extractor, names), OnnxEngine(tmp, names), input_size)
    finally:
        tmp.unlink(missing_ok=True)
    if not difference <= VERIFY_ATOL:
        raise EngineError(f"the exported model differs from torch by {difference:.2e} (limit {VERIFY_ATOL:g})")
    atomic_write(Path(path), buf.getvalue())


def max_difference(a, b, input_size: int, batch: int = 2, seed: int = 0) -> float:
    """Largest absolute difference between two engines' feature maps on one random batch."""
    x = np.random.default_rng(seed).normal(size=(batch, 3, input_size, input_size)).astype(np.float32)
    ma, mb = a.maps(x), b.maps(x)
    return max(float((ma[n] - mb[n]).abs().max()) for n in a.names)


def make_engine(choice: str, extractor: torch.nn.Module, names: list[str], nodes: list[str], *,
                backbone_manifest: dict, cache_dir: Path | None, threads: int, may_export: bool,
                images: int | None = None):
    """The engine for `choice` ("auto", "torch", "onnx").

    "auto" takes ONNX Runtime (the faster on CPU, see docs/benchmarks.md) when its model is cached, or
    when this caller may write the cache and has at least AUTO_EXPORT_MIN_IMAGES images to embed;
    otherwise, or when ONNX Runtime is missing or its export fails, torch.
    """
    if choice not in ENGINES:
        raise EngineError(f"unknown engine {choice!r}; choose one of: {', '.join(ENGINES)}")
    torch_engine = TorchEngine(extractor, names, threads)
    if choice == "torch":
        return torch_engine
    if not onnx_available():
        if choice == "onnx":
            raise EngineError("the onnx engine needs the onnxruntime package: pip install onnxruntime")
        return torch_engine
    path = cached_model_path(cache_dir, backbone_manifest, nodes) if cache_dir is not None else None
    if path is not None and path.exists():
        try:
            return OnnxEngine(path, names, threads)
        except EngineError:
            if not may_export:
                if choice == "onnx":
                    raise
                return torch_engine
            path.unlink(missing_ok=True)  # a damaged cache file: export it again below
    worth_it = images is None or images >= AUTO_EXPORT_MIN_IMAGES
    if path is None or not may_export or (choice == "auto" and not worth_it):
        if choice == "onnx":
            raise EngineError("the onnx engine's model is not exported yet; index with --engine onnx first"
                              if path is not None else "the onnx engine needs a cache folder")
        return torch_engine
    try:
        export_onnx(extractor, names, backbone_manifest["input_size"], path)
        return OnnxEngine(path, names, threads)
    except Exception as exc:
        if choice == "onnx":
            raise EngineError(f"cannot export the model to ONNX: {exc}") from None
        print(f"kinscope: ONNX export failed ({exc}); using torch", file=sys.stderr)
        return torch_engine
