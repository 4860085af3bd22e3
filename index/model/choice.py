"""Which inference engine embeds: "auto", "torch" or "onnx", decided in one place.

"auto" takes ONNX Runtime (the faster on CPU, see docs/benchmarks.md) when its model is cached, or
when exporting it pays off; otherwise torch. Importing this module imports no torch (the indexer
uses it); make_engine, which builds an engine, does.
"""
from __future__ import annotations

import sys
from pathlib import Path

from .onnx_engine import EngineError, OnnxEngine, cached_model_path, onnx_available

ENGINES = ("auto", "torch", "onnx")
# Below this many images an export (a few seconds, once per database) costs more than ONNX saves,
# so "auto" stays on torch unless the exported model is already cached.
AUTO_EXPORT_MIN_IMAGES = 200


def checked(choice: str) -> str:
    """The choice itself, if it names an engine; EngineError (an ArchiveError) otherwise."""
    if choice not in ENGINES:
        raise EngineError(f"unknown engine {choice!r}; choose one of: {', '.join(ENGINES)}")
    return choice


def export_pays_off(choice: str, images: int | None) -> bool:
    """Whether to export the ONNX model for a job of `images` images (None: unknown, a long one)."""
    return choice == "onnx" or images is None or images >= AUTO_EXPORT_MIN_IMAGES


def make_engine(choice: str, extractor, names: list[str], nodes: list[str], *,
                backbone_manifest: dict, cache_dir: Path | None, threads: int, may_export: bool,
                images: int | None = None, p: float = 3.0):
    """The engine for `choice` ("auto", "torch", "onnx").

    "auto" takes ONNX Runtime (the faster on CPU, see docs/benchmarks.md) when its model is cached, or
    when this caller may write the cache and has at least AUTO_EXPORT_MIN_IMAGES images to embed;
    otherwise, or when ONNX Runtime is missing or its export fails, torch.
    """
    from .torch_engine import TorchEngine, export_onnx

    checked(choice)
    torch_engine = TorchEngine(extractor, names, threads, p)
    if choice == "torch":
        return torch_engine
    if not onnx_available():
        if choice == "onnx":
            raise EngineError("the onnx engine needs the onnxruntime package: pip install onnxruntime")
        return torch_engine
    path = cached_model_path(cache_dir, backbone_manifest, nodes, p) if cache_dir is not None else None
    if path is not None and path.exists():
        try:
            return OnnxEngine(path, names, threads)
        except EngineError:
            if not may_export:
                if choice == "onnx":
                    raise
                return torch_engine
            path.unlink(missing_ok=True)  # a damaged cache file: export it again below
    if path is None or not may_export or not export_pays_off(choice, images):
        if choice == "onnx":
            raise EngineError("the onnx engine's model is not exported yet; index with --engine onnx first"
                              if path is not None else "the onnx engine needs a cache folder")
        return torch_engine
    try:
        export_onnx(extractor, names, backbone_manifest["input_size"], p, path)
        return OnnxEngine(path, names, threads)
    except Exception as exc:
        if choice == "onnx":
            raise EngineError(f"cannot export the model to ONNX: {exc}") from None
        print(f"kinscope: ONNX export failed ({exc}); using torch", file=sys.stderr)
        return torch_engine
