"""The archive's manifest: what it was built with, and which catalog state its stores reflect."""
from __future__ import annotations

import json
import platform
import sys
import re
from pathlib import Path

from ..common.errors import ArchiveError
from ..common.files import atomic_write

FORMAT = 2  # 2: stores as codec + segments (index.vectors.segments); 1: one FAISS file per layer
FILE = "manifest.json"


def store_file(layer: str) -> str:
    return "vectors-" + re.sub(r"[^A-Za-z0-9._-]", "_", layer) + ".faiss"


LAYER_COLUMNS = ("name", "node", "channels", "stride", "dim")  # a layer as the catalog and `info` show it


def layer_entry(manifest: dict, name: str | None) -> dict:
    """A layer's entry, by its name or its graph node; None is the archive's default layer."""
    name = name or manifest["default_layer"]
    for layer in manifest["layers"]:
        if name in (layer["name"], layer["node"]):
            return layer
    names = ", ".join(l["name"] for l in manifest["layers"])
    raise ArchiveError(f"this archive has no layer {name!r}; it has: {names}")


def versions() -> dict:
    """The versions a new archive records; torch's are read from the package metadata when torch is
    not loaded (a new archive made from the per-user model cache never imports it)."""
    import faiss

    from .. import __version__

    return {
        "kinscope": __version__,
        "python": platform.python_version(),
        "torch": _package_version("torch"),
        "torchvision": _package_version("torchvision"),
        "faiss": faiss.__version__,
    }


def _package_version(name: str) -> str:
    if name in sys.modules:
        return sys.modules[name].__version__
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version(name)
    except PackageNotFoundError:
        return "not installed"


def read(db: Path) -> dict | None:
    path = Path(db) / FILE
    if not path.exists():
        return None
    try:
        manifest = json.loads(path.read_text())
    except (OSError, ValueError) as exc:
        raise ValueError(f"cannot read {path}: {exc}") from None
    if manifest.get("format", 0) > FORMAT:
        raise ValueError(f"{path} was written by a newer kinscope (format {manifest['format']}); upgrade kinscope")
    return manifest


def write(db: Path, manifest: dict) -> None:
    atomic_write(Path(db) / FILE, json.dumps(manifest, indent=2, sort_keys=True).encode())


def differences(manifest: dict, asked: dict) -> list[str]:
    """Plain sentences for each setting asked for that the archive was not built with."""
    built = {
        "backbone": manifest["backbone"]["name"],
        "layers": [layer["name"] for layer in manifest["layers"]],
        "gem_p": manifest["pooling"]["p"],
        "whiten": manifest["whitening"]["enabled"],
        "weights_sha256": manifest["backbone"]["weights_sha256"],
    }
    out = []
    for key, value in asked.items():
        if value is None or key not in built:
            continue
        if key == "layers" and list(value) == built[key]:
            continue
        if value != built[key]:
            out.append(f"{key}: the archive has {built[key]!r}, this command asks for {value!r}")
    return out
