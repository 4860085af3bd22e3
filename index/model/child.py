"""`python -m index.model.child --new-manifest | --export`: the work that loads the model (torch), in a
process of its own, so that an indexer never holds torch. --new-manifest exports the ONNX model too when
asked ("export_to"), so a first archive loads torch once, not twice. The settings come as JSON on stdin (see
index.model.settings, which starts this); no Archive is opened here.
"""
from __future__ import annotations

import json
import sys
from pathlib import Path

from ..common.errors import ArchiveError
from .settings import backbone_of, export_loaded, new_manifest

USAGE = "usage: python -m index.model.child --new-manifest | --export  (settings as JSON on stdin)"


def export(backbone: dict, layers: list[dict], p: float, cache_dir: Path) -> Path:
    """Export (or find cached) the ONNX model of these settings; its path."""
    from .layers import Layer

    found = backbone_of(backbone)
    return export_loaded(found, found.load(), [Layer(**spec) for spec in layers], p, cache_dir)


def _new_manifest(asked: dict) -> dict:
    """{"manifest": ...}, or {"error": message}; with "export_to", the ONNX model exported there too."""
    export_to = asked.get("export_to")
    try:
        return {"manifest": new_manifest(Path(asked["db"]), asked["backbone"], asked["layers"], asked["gem_p"],
                                         asked["whiten"], asked["weights"],
                                         export_to=Path(export_to) if export_to else None)}
    except ArchiveError as exc:
        return {"error": str(exc)}


def main(argv: list[str] | None = None) -> int:
    """--new-manifest: {"manifest": ...} or {"error": message} as JSON on stdout. --export: the model's
    path on stdout, or `kinscope: message` on stderr and exit status 1."""
    args = sys.argv[1:] if argv is None else argv
    if args not in (["--new-manifest"], ["--export"]):
        print(USAGE, file=sys.stderr)
        return 2
    asked = json.loads(sys.stdin.read())
    if args == ["--new-manifest"]:
        answer = _new_manifest(asked)
        print(json.dumps(answer))
        return 1 if "error" in answer else 0
    try:
        print(export(asked["backbone"], asked["layers"], asked["p"], Path(asked["cache_dir"])))
    except ArchiveError as exc:
        print(f"kinscope: {exc}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
