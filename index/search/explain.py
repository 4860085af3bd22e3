"""Why a pair matched: the score split over positions, region pairs, and the channels that carried it.

The parts live in their own modules: index.search.explain_score (the exact split of the score over
feature-map positions, with its formula), index.search.explain_pairs (region pairs from local features, with a
geometric check) and index.search.explain_baseline (the archive's average image, which the split and the
pairs are centred on). This module puts them together for Archive.explain.

The pairs are read on a finer layer than the score when the backbone has one (PAIR_PRESET, the
`texture` tap, stride 8): on the benchmark of docs/explain.md a stride-8 grid placed pairs right more
often than the stride-16 `parts` grid, whichever layer the score is on.
"""
from __future__ import annotations

import numpy as np
from PIL import Image, ImageOps

from .explain_baseline import Baseline
from .explain_pairs import match_regions
from .explain_score import MAX_MAP_SIDE, MODES, block_sum, descriptor, split

PAIR_PRESET = "texture"
PAIRS = 8  # region pairs offered
CHANNELS = 6  # feature detectors listed
PAIR_BOX_CELLS = 3  # a pair's region, in cells of the pair layer's grid (one cell is too small to see)
EXEMPLARS = 4


class ExplainError(ValueError):
    """A request the explanation cannot answer (Archive turns it into ArchiveError)."""


def explain_pair(fq: np.ndarray, fd: np.ndarray, p: float, mean: np.ndarray | None = None, *,
                 channels: int = CHANNELS) -> dict:
    """The score of two feature maps split over positions (see index.search.explain_score) and the channels
    with the largest positive part of it; mean None: the raw cosine, else centred on `mean`."""
    out = split(fq, fd, p, mean)
    contrib, score = out.pop("contrib"), out["score"]
    top = [int(k) for k in np.argsort(-contrib)[:channels] if contrib[k] > 0]
    out["query_map"] = block_sum(out["query_map"], MAX_MAP_SIDE)
    out["match_map"] = block_sum(out["match_map"], MAX_MAP_SIDE)
    out["channels"] = [{"channel": k, "contribution": float(contrib[k]),
                        "share": float(contrib[k] / score) if score > 0 else 0.0} for k in top]
    return out


def box_mass(grid: np.ndarray, box) -> float:
    """The part of a heat map (H, W) over the image that falls in box [x0, y0, x1, y1] (fractions),
    each cell counted by the area it shares with the box."""
    h, w = grid.shape
    x0, y0, x1, y1 = box

    def cover(n, a, b):
        edges = np.arange(n + 1) / n
        return np.clip(np.minimum(edges[1:], b) - np.maximum(edges[:-1], a), 0, None) * n

    return float(cover(h, y0, y1) @ grid @ cover(w, x0, x1))


def region_box(centre, grid: tuple[int, int], cells: int = PAIR_BOX_CELLS) -> list[float]:
    """A box `cells` cells wide around a cell centre (fractions), moved inside the frame."""
    rows, cols = grid
    out = []
    for v, n in ((centre[0], cols), (centre[1], rows)):
        side = min(1.0, cells / n)
        out.append(min(max(v - side / 2, 0.0), 1.0 - side))
    x0, y0 = out
    return [round(x0, 4), round(y0, 4), round(x0 + min(1.0, cells / cols), 4), round(y0 + min(1.0, cells / rows), 4)]


def pairs_with_shares(regions: dict, grid_q, grid_d, query_map, match_map, score: float) -> list[dict]:
    """The region pairs of explain_pairs.match_regions as boxes, each with the part of the score its
    two regions hold (the mean of the query region's and the match region's heat)."""
    out = []
    for pair in regions["pairs"]:
        qbox, mbox = region_box(pair["query"], grid_q), region_box(pair["match"], grid_d)
        value = 0.5 * (box_mass(query_map, qbox) + box_mass(match_map, mbox))
        out.append({"query_box": qbox, "match_box": mbox, "query_cell": [round(v, 4) for v in pair["query"]],
                    "match_cell": [round(v, 4) for v in pair["match"]], "similarity": round(pair["similarity"], 4),
                    "value": value, "share": value / score if score > 0 else 0.0})
    return out


def explained_nodes(backbone, entry: dict) -> tuple[str, ...]:
    """The graph nodes an explanation of layer `entry` runs: its own, then the pair layer's (may be one)."""
    return tuple(dict.fromkeys((entry["node"], backbone.presets.get(PAIR_PRESET, entry["node"]))))


def explain(archive, query, match: int, *, layer: str | None = None, box=None, mode: str = "centred") -> dict:
    """Archive.explain (see there); `archive` is an index.api.Archive."""
    if mode not in MODES:
        raise ExplainError(f"mode must be one of {', '.join(MODES)}, got {mode!r}")
    entry = archive._layer(layer)
    name, p = entry["name"], archive.manifest["pooling"]["p"]
    if archive.whitening(name):
        raise ExplainError(f"layer {name} is PCA-whitened; its scores do not split over positions")
    row = archive.item(int(match))
    nodes = explained_nodes(archive.backbone, entry)
    pair_node = nodes[-1]
    query_image = archive.query_image(query, box)
    # One forward pass: the query, its mirror image (for the pairs only) and the match.
    maps = archive.embedder.maps_at([query_image, ImageOps.mirror(query_image), archive.query_image(int(match))], nodes)
    fq = {n: m[:2] for n, m in maps.items()}
    fd = {n: m[2:] for n, m in maps.items()}
    baseline = _baseline(archive)
    store = archive.store(name)
    mean, averaged = baseline.descriptor(name, archive.manifest.get("generation"), store)
    centred = split(fq[entry["node"]][0], fd[entry["node"]][0], p, mean)["score"] if mean is not None else None
    shown = mean if mode == "centred" else None
    result = explain_pair(fq[entry["node"]][0], fd[entry["node"]][0], p, shown)
    stored = store.reconstruct(np.array([int(match)]))[0]
    result["indexed_score"] = float(descriptor(fq[entry["node"]][0], p) @ stored)
    cell_mean, cell_images = baseline.cells(pair_node, store.ids(), lambda ids: _maps_of(archive, ids, pair_node))
    regions = match_regions(fq[pair_node][0], fq[pair_node][1], fd[pair_node][0], cell_mean, n=PAIRS,
                            spread=PAIR_BOX_CELLS)
    grid_q, grid_d = fq[pair_node].shape[2:], fd[pair_node].shape[2:]
    result["pairs"] = pairs_with_shares(regions, grid_q, grid_d, result["query_map"], result["match_map"],
                                        result["score"])
    result["pair_layer"] = {"name": _layer_name(archive, pair_node), "node": pair_node, "grid": list(grid_d),
                            "mirrored": regions["mirrored"], "scale": round(regions["scale"], 3),
                            "agreeing": regions["agreeing"], "candidates": regions["candidates"]}
    _add_exemplars(archive, name, entry, result["channels"])
    result["query_map"] = np.round(result["query_map"], 7).tolist()
    result["match_map"] = np.round(result["match_map"], 7).tolist()
    return {"layer": name, "mode": "centred" if shown is not None else "cosine", "centred": centred,
            "baseline": {"descriptors": averaged, "cell_images": cell_images},
            "match": {k: row[k] for k in ("id", "path", "width", "height")}, **result}


def _baseline(archive) -> Baseline:
    if getattr(archive, "_explain_baseline", None) is None:
        archive._explain_baseline = Baseline(archive.db)
    return archive._explain_baseline


def _layer_name(archive, node: str) -> str:
    """The archive's name for a graph node, else the backbone's preset name, else the node."""
    for layer in archive.manifest["layers"]:
        if layer["node"] == node:
            return layer["name"]
    presets = {v: k for k, v in archive.backbone.presets.items()}
    return presets.get(node, node)


def _maps_of(archive, ids: list[int], node: str) -> np.ndarray:
    """Feature maps at `node` of archive items, those that can still be read."""
    from ..common.errors import ArchiveError

    images: list[Image.Image] = []
    for i in ids:
        try:
            images.append(archive.query_image(int(i)))
        except ArchiveError:
            continue
    return archive.embedder.maps_at(images, (node,))[node] if images else np.zeros((0, 1, 1, 1))


def _add_exemplars(archive, name: str, entry: dict, channels: list[dict]) -> None:
    exemplars = archive.exemplars(name)
    alive = set(archive.catalog.get([e["id"] for c in channels for e in exemplars.top(c["channel"])]))
    rows, cols = exemplars.grid
    for c in channels:
        c["exemplars"] = [{**e, "box": patch_box(*e["cell"], rows, cols, entry["stride"], archive.backbone.input_size)}
                          for e in exemplars.top(c["channel"], alive)[:EXEMPLARS]]


def patch_box(r: int, c: int, rows: int, cols: int, stride: int, input_size: int) -> list[float]:
    """A box around feature-map cell (r, c), wide enough to show what that position responds to."""
    side = min(0.45, max(0.12, 3.0 * stride / input_size))
    cx, cy = (c + 0.5) / cols, (r + 0.5) / rows
    x0 = min(max(cx - side / 2, 0.0), 1.0 - side)
    y0 = min(max(cy - side / 2, 0.0), 1.0 - side)
    return [round(x0, 4), round(y0, 4), round(x0 + side, 4), round(y0 + side, 4)]
