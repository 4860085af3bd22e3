"""An archive's model settings: a new archive's manifest, and what a manifest says to load.

A new manifest needs the layers resolved, which loads the model (torch). A process that does not
hold torch yet (an indexer creating its archive) asks a child process for it (index.model.child),
and so it does for the ONNX export: the indexer then never loads torch (about 0.7 GB).
"""
from __future__ import annotations

import json
import subprocess
import sys
from datetime import datetime, timezone
from pathlib import Path

from ..common.errors import ArchiveError
from ..db import manifest as mf
from .backbones import PRESET_HINTS, USER_WEIGHTS, Backbone, BackboneError, get_backbone

DEFAULT_GEM_P = 3.0
DEFAULT_WHITEN_MIN_IMAGES = 1000
LAYER_KEYS = ("name", "node", "channels", "stride")  # what the model needs of a layer (index.model.layers.Layer)


def weights_file(backbone: dict) -> str | None:
    """The weights file a manifest's backbone names, or None for the packaged weights."""
    return backbone["weights_file"] if backbone["weights_source"] == USER_WEIGHTS else None


def layer_specs(manifest: dict) -> list[dict]:
    """The archive's layers as the model needs them (Layer(**spec))."""
    return [{k: layer[k] for k in LAYER_KEYS} for layer in manifest["layers"]]


def backbone_of(backbone: dict) -> Backbone:
    """The backbone a manifest names, with the very weights the archive was built with."""
    try:
        found = get_backbone(backbone["name"], weights_file(backbone))
    except BackboneError as exc:
        raise ArchiveError(str(exc)) from None
    if found.weights.sha256() != backbone["weights_sha256"]:
        raise ArchiveError(
            f"the weights of {backbone['name']} at {found.weights.path} differ from the ones this archive "
            "was built with (sha256 mismatch); its descriptors would not be comparable"
        )
    return found


def check_settings(db: Path, manifest: dict, **asked) -> None:
    """Settings asked for an existing archive (backbone, layers, gem_p, whiten, weights; None: the
    archive's own) must be what it was built with; ArchiveError names each difference."""
    weights = asked.pop("weights", None)
    if weights is not None:
        try:
            name = asked.get("backbone") or manifest["backbone"]["name"]
            asked["weights_sha256"] = get_backbone(name, weights).weights.sha256()
        except BackboneError as exc:
            raise ArchiveError(str(exc)) from None
    problems = mf.differences(manifest, asked)
    if problems:
        raise ArchiveError(
            f"{db} was built with other settings:\n  " + "\n  ".join(problems)
            + "\nUse a new --db folder for these settings, or leave them out to use the archive's own."
        )


def available_layers(backbone: str, weights: str | None = None) -> dict:
    """The layers one can index for a backbone, with channels, stride and presets (builds the network)."""
    from .layers import listing

    try:
        b = get_backbone(backbone, weights)
        rows = listing(b, b.build().eval())
    except BackboneError as exc:
        raise ArchiveError(str(exc)) from None
    return {"backbone": b.name, "input_size": b.input_size, "default_layers": list(b.default_layers),
            "default_search_layer": b.default_search_layer, "layers": rows,
            "presets": {name: {"node": node, "hint": PRESET_HINTS[name]} for name, node in b.presets.items()}}


def new_manifest(db: Path, backbone_name, layer_names, gem_p, whiten, weights, export_to: Path | None = None) -> dict:
    """A new archive's manifest (the folder is created); loads the model to resolve the layers, and
    records what that gave in the per-user cache (index.model.settings_cache). export_to: also export
    the ONNX model there while the model is loaded (see new_manifest_apart); a failed export is only
    reported on stderr."""
    from .layers import resolve_layers
    from .settings_cache import remember

    p = _gem_p(gem_p)
    try:
        backbone = get_backbone(backbone_name, weights)
        model = backbone.load()
        layers = resolve_layers(backbone, model, list(layer_names or backbone.default_layers))
    except BackboneError as exc:
        raise ArchiveError(str(exc)) from None
    resolved = {"backbone": backbone.manifest(), "layers": [l.manifest() for l in layers],
                "default_search_layer": backbone.default_search_layer}
    remember(backbone_name, weights, layer_names, resolved)
    if export_to is not None:
        try:
            export_loaded(backbone, model, layers, p, Path(export_to))
        except ArchiveError as exc:  # left to the indexer, which tries again (or takes torch) and says why
            print(f"kinscope: ONNX export deferred ({exc})", file=sys.stderr)
    return _manifest(db, resolved, p, whiten)


def export_loaded(backbone: Backbone, model, layers: list, p: float, cache_dir: Path) -> Path:
    """Export (or find cached) the ONNX model of a loaded network, checked against torch; its path.
    ArchiveError when it cannot be exported."""
    from .onnx_engine import EngineError
    from .torch_embedder import Embedder

    embedder = Embedder(backbone, model, layers, p, cache_dir=cache_dir)
    try:
        embedder.use_engine("onnx", may_export=True)
    except EngineError as exc:
        raise ArchiveError(str(exc)) from None
    return embedder.engine.path


def _gem_p(gem_p) -> float:
    p = DEFAULT_GEM_P if gem_p is None else float(gem_p)
    if p <= 0:
        raise ArchiveError(f"the GeM exponent must be positive, got {p}")
    return p


def _manifest(db: Path, resolved: dict, p: float, whiten) -> dict:
    """The manifest of resolved settings: {backbone (its manifest), layers (Layer.manifest() each),
    default_search_layer}."""
    db.mkdir(parents=True, exist_ok=True)
    names = [l["name"] for l in resolved["layers"]]
    default = resolved["default_search_layer"] if resolved["default_search_layer"] in names else names[0]
    return {
        "format": mf.FORMAT,
        "created_at": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "backbone": resolved["backbone"],
        "layers": [{**l, "dim": l["channels"], "file": mf.store_file(l["name"])} for l in resolved["layers"]],
        "default_layer": default,
        "pooling": {"method": "GeM", "p": p, "normalisation": "L2"},
        "whitening": {"enabled": bool(whiten), "min_images": DEFAULT_WHITEN_MIN_IMAGES, "learned": {}},
        "generation": 0,
        "stores": {},
        "versions": mf.versions(),
    }


def new_manifest_apart(db: Path, backbone_name, layer_names, gem_p, whiten, weights,
                       export_to: Path | None = None) -> dict:
    """new_manifest without loading torch here: from the settings recorded in the per-user cache when
    the same ones were resolved before, else in this process if it already holds torch (tests, the
    torch engine), else in a child process.

    export_to: the child also exports the ONNX model into this folder (the per-user cache) while it
    holds the loaded model, so the indexer does not start a second child that loads torch again for
    the export (about a third of a first archive's preparation). An export that fails there is left
    to the indexer, which tries it again (or falls back to torch) and says why."""
    from .settings_cache import recall

    resolved = recall(backbone_name, weights, layer_names)
    if resolved is not None:
        return _manifest(db, resolved, _gem_p(gem_p), whiten)
    if "torch" in sys.modules:
        return new_manifest(db, backbone_name, layer_names, gem_p, whiten, weights)
    asked = {"db": str(db), "backbone": backbone_name, "layers": layer_names, "gem_p": gem_p,
             "whiten": whiten, "weights": None if weights is None else str(weights),
             "export_to": None if export_to is None else str(export_to)}
    out = _child("--new-manifest", asked)
    try:
        answer = json.loads(out.stdout.strip().splitlines()[-1])
    except (IndexError, ValueError):
        message = (out.stderr.strip().splitlines() or ["no answer"])[-1]
        raise ArchiveError(f"cannot load the backbone to create the archive: {message}") from None
    if "error" in answer:
        raise ArchiveError(answer["error"])
    return answer["manifest"]


def export_apart(manifest: dict, cache_dir: Path) -> str | None:
    """Export the archive's ONNX model into `cache_dir` in a child process; None when done, else why not."""
    asked = {"backbone": manifest["backbone"], "layers": layer_specs(manifest), "p": manifest["pooling"]["p"],
             "cache_dir": str(cache_dir)}
    out = _child("--export", asked)
    if out.returncode == 0:
        return None
    return (out.stderr.strip().splitlines() or ["unknown error"])[-1]


def _child(command: str, asked: dict) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "index.model.child", command], input=json.dumps(asked),
                          capture_output=True, text=True)
