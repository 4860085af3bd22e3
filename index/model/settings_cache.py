"""Resolved model settings kept per user, so that a new archive can be created without torch.

Creating an archive resolves its layers (preset or node names -> nodes, channels, stride) by a dry
run of the network, which needs torch: about 13 s in a child process on the demo archive before its
first image (issue 20). The result depends only on the backbone, its weights, the layer names asked
and kinscope's own version, so it is recorded in the per-user cache (`settings/`, next to `models/`)
whenever it is made, and read back the next time the same settings are asked for. A record is used
only while the weights file it names still has the recorded SHA-256. Imports no torch.
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path

from ..common.files import atomic_write, sha256_file
from .model_cache import user_cache_dir
from .onnx_engine import EXPORT_FORMAT

FOLDER = "settings"
RECORD_FORMAT = 1


def _key(backbone_name: str, weights, layer_names) -> str:
    from .. import __version__

    key = {"format": RECORD_FORMAT, "export_format": EXPORT_FORMAT, "kinscope": __version__,
           "backbone": backbone_name, "weights": None if weights is None else str(Path(weights).resolve()),
           "layers": None if not layer_names else list(layer_names)}
    return hashlib.sha256(json.dumps(key, sort_keys=True).encode()).hexdigest()[:20]


def record_path(backbone_name: str, weights, layer_names) -> Path:
    return user_cache_dir() / FOLDER / f"{backbone_name}-{_key(backbone_name, weights, layer_names)}.json"


def remember(backbone_name: str, weights, layer_names, resolved: dict) -> None:
    """Record what resolving these settings gave ({backbone, layers, default_search_layer}); a cache
    that cannot be written is no error (the next archive resolves them again)."""
    path = record_path(backbone_name, weights, layer_names)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        atomic_write(path, json.dumps(resolved, indent=1).encode())
    except OSError:
        pass


def recall(backbone_name: str, weights, layer_names) -> dict | None:
    """The recorded resolution of these settings, or None (never recorded, unreadable, or the
    weights file changed since)."""
    try:
        resolved = json.loads(record_path(backbone_name, weights, layer_names).read_text())
        backbone = resolved["backbone"]
        if sha256_file(backbone["weights_file"]) != backbone["weights_sha256"]:
            return None
        if not resolved["layers"] or "default_search_layer" not in resolved:
            return None
    except (OSError, ValueError, KeyError, TypeError):
        return None
    return resolved
