"""Where an archive's exported ONNX model is looked for: the per-user cache, then the database folder.

A model file is named by index.model.onnx_engine.model_key (exporter format, backbone, weights hash,
input size, layer nodes, GeM exponent), so one export serves every archive built with the same
settings. The per-user folder is $KINSCOPE_CACHE_DIR, else $XDG_CACHE_HOME/kinscope, else
~/.cache/kinscope (models in its `models` folder). Archives exported into their own folder
(`engines/`, before the per-user cache) keep using that copy. Imports no torch.
"""
from __future__ import annotations

import os
from pathlib import Path

from .onnx_engine import CACHE_DIR, cached_model_path

ENV = "KINSCOPE_CACHE_DIR"
MODELS = "models"


def user_cache_dir() -> Path:
    """kinscope's per-user cache folder (not created here)."""
    if os.environ.get(ENV):
        return Path(os.environ[ENV]).expanduser()
    xdg = os.environ.get("XDG_CACHE_HOME")
    base = Path(xdg).expanduser() if xdg and Path(xdg).is_absolute() else Path.home() / ".cache"
    return base / "kinscope"


def model_dirs(db: Path) -> list[Path]:
    """The folders a model is looked for in, first found first used."""
    return [user_cache_dir() / MODELS, Path(db) / CACHE_DIR]


def model_file(folder: Path, manifest: dict) -> Path:
    """The file name the model of this archive's settings has in `folder`."""
    return cached_model_path(folder, manifest["backbone"], [l["node"] for l in manifest["layers"]],
                             manifest["pooling"]["p"])


def find_model(manifest: dict, db: Path) -> Path | None:
    """The cached model of this archive's settings, or None when it was never exported."""
    for folder in model_dirs(db):
        path = model_file(folder, manifest)
        if path.is_file():
            return path
    return None


def export_dir(db: Path) -> Path:
    """Where a new export goes: the per-user cache, or the database folder when that cannot be written."""
    folder = user_cache_dir() / MODELS
    try:
        folder.mkdir(parents=True, exist_ok=True)
        if os.access(folder, os.W_OK):
            return folder
    except OSError:
        pass
    return Path(db) / CACHE_DIR
