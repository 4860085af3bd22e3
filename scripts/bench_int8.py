#!/usr/bin/env python3
"""An 8-bit graph against fp32, side by side in one run: inference speed, the cosine of each descriptor to its
fp32 twin per layer, and retrieval from the descriptors alone; also fp32 at smaller input sizes (192, 224).

Graphs: the archive default's four layers (colour, texture, parts, objects) exported at 256 (the fp32 graph a
`kinscope index` uses), its int8 graph (scripts/int8_graph.py: QDQ, calibrated on crops of scikit-learn's two
sample photographs), and fp32 exports at 224 and 192 (torch needed for those; measured, not offered).
Images, all shipped in packages or in this repository (nothing downloaded):
- digits: scikit-learn's load_digits, 50 a class, enlarged to 64x64 (as scripts/bench_retrieval.py);
- faces: scikit-image's lfw_subset, 100 faces and 100 non-faces, enlarged to 100x100 (as bench_retrieval);
- demo: every readable file of demo_archive/ (key.csv); the 25 re-scans are queries, their source (or a byte copy) right.
Category precision@5 (every item a query against its set) and copies found first are computed here by exact
cosine ranking of the descriptors (no archive, no FAISS, PIL's decode at full size), so they differ slightly
from bench_retrieval.py's archive figures (the archive runs through an 8-bit engine, docs/benchmarks.md, were made
with the engine of branch issue-20q, which is not merged).
Speed: batches of 8 at 256 px (the indexer's default), 2 ONNX Runtime threads, engines taking turns per round.

    flock /tmp/kinscope-bench.lock .venv/bin/python scripts/bench_int8.py --workdir /tmp/kint8   # ~6 min
"""
from __future__ import annotations

import argparse
import csv
import os
import sys
import time
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from index.images.preprocess import fit_square, to_input  # noqa: E402
from index.model.onnx_engine import OnnxEngine  # noqa: E402

DEMO = Path(__file__).resolve().parents[1] / "demo_archive"
LAYERS = ["colour", "texture", "parts", "objects"]
SIZES = (224, 192)


def export(workdir: Path) -> tuple[dict, dict]:
    """{label: graph path}, the backbone's mean and std: fp32 at 256 (cached per user), int8, fp32 at SIZES."""
    from torchvision.models.feature_extraction import create_feature_extractor

    from index.model.backbones import get_backbone
    from index.model.layers import resolve_layers
    from index.model.model_cache import MODELS, user_cache_dir
    from int8_graph import ensure_int8
    from index.model.torch_embedder import Embedder
    from index.model.torch_engine import export_onnx

    backbone = get_backbone()
    model = backbone.load()
    layers = resolve_layers(backbone, model, LAYERS)
    embedder = Embedder(backbone, model, layers, cache_dir=user_cache_dir() / MODELS)
    embedder.use_engine("onnx", may_export=True)
    norm = {"mean": backbone.mean, "std": backbone.std}
    started = time.perf_counter()
    graphs = {"fp32 256": (embedder.engine.path, backbone.input_size),
              "int8 256": (ensure_int8(embedder.engine.path, LAYERS, size=backbone.input_size, **norm),
                           backbone.input_size)}
    print(f"int8 graph: {graphs['int8 256'][0].name} (built or found in {time.perf_counter() - started:.0f} s)")
    extractor = create_feature_extractor(model, return_nodes={l.node: l.name for l in layers}).eval()
    for size in SIZES:
        path = workdir / f"fp32-{size}.onnx"
        if not path.exists():
            export_onnx(extractor, LAYERS, size, 3.0, path)
        graphs[f"fp32 {size}"] = (path, size)
    return graphs, norm


def image_sets(workdir: Path) -> dict[str, tuple[list[Path], list[str]]]:
    """{set: (files, labels)}; demo labels are the files' own paths (copies are scored apart)."""
    from bench_retrieval import make_sets

    if not (workdir / "faces").exists():
        make_sets(workdir)
    out = {}
    for name in ("digits", "faces"):
        files = sorted((workdir / name).glob("*/*.png"))
        out[name] = (files, [f.parent.name for f in files])
    with open(DEMO / "key.csv", newline="") as fh:
        key = list(csv.DictReader(fh))
    key = [r for r in key if r["kind"] != "broken"]  # the archive's deliberately unreadable files
    out["demo"] = ([DEMO / r["path"] for r in key], [r["path"] for r in key])
    return out


def describe(graphs: dict, norm: dict, sets: dict) -> dict:
    """{graph: {set: {layer: (N, C) descriptors}}}, each graph on 2 threads."""
    out = {}
    for label, (path, size) in graphs.items():
        engine = OnnxEngine(path, LAYERS, threads=2)
        out[label] = {}
        for name, (files, _) in sets.items():
            pixels = np.stack([fit_square(ImageOps.exif_transpose(Image.open(f)).convert("RGB"), size) for f in files])
            parts = [engine.embed(to_input(pixels[i:i + 8], norm["mean"], norm["std"]))[0]
                     for i in range(0, len(pixels), 8)]
            out[label][name] = {n: np.concatenate([p[n] for p in parts]) for n in LAYERS}
    return out


def precision_at_5(vectors: np.ndarray, labels: list[str]) -> float:
    sims = vectors @ vectors.T
    np.fill_diagonal(sims, -np.inf)
    top = np.argsort(-sims, axis=1)[:, :5]
    lab = np.array(labels)
    return float((lab[top] == lab[:, None]).mean())


def copies_first(vectors: np.ndarray, paths: list[str]) -> int:
    with open(DEMO / "key.csv", newline="") as fh:
        key = list(csv.DictReader(fh))
    pos = {p: i for i, p in enumerate(paths)}
    same: dict[str, set] = {}
    for r in key:
        if r["kind"] == "copy":
            same.setdefault(r["source"], set()).add(pos[r["path"]])
    first = 0
    for r in key:
        if r["kind"] != "rescan":
            continue
        q = pos[r["path"]]
        sims = vectors @ vectors[q]
        sims[q] = -np.inf
        first += int(np.argmax(sims)) in {pos[r["source"]]} | same.get(r["source"], set())
    return first


def speed(graphs: dict, norm: dict, rounds: int = 12) -> dict[str, float]:
    """Images a second at batch 8 per graph, the graphs taking turns each round (median round)."""
    from int8_graph import calibration_pixels

    engines = {label: OnnxEngine(path, LAYERS, threads=2) for label, (path, _) in graphs.items()}
    batches = {label: to_input(calibration_pixels(size, 8, seed=7), norm["mean"], norm["std"])
               for label, (_, size) in graphs.items()}
    for label, engine in engines.items():
        engine.embed(batches[label])  # first run sets up buffers
    times: dict[str, list[float]] = {label: [] for label in engines}
    for _ in range(rounds):
        for label, engine in engines.items():
            start = time.perf_counter()
            engine.embed(batches[label])
            times[label].append(time.perf_counter() - start)
    return {label: 8 / float(np.median(t)) for label, t in times.items()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--workdir", type=Path, required=True, help="Image sets and the smaller exports (kept).")
    ap.add_argument("--speed-only", action="store_true", help="Only the speed table (about half a minute).")
    args = ap.parse_args()
    args.workdir.mkdir(parents=True, exist_ok=True)
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    started = time.time()
    print(f"load average at start: {os.getloadavg()[0]:.2f}; cores: {os.cpu_count()}")
    graphs, norm = export(args.workdir)
    rates = speed(graphs, norm)
    print("\nspeed (batch 8, 2 threads, engines taking turns):")
    for label, rate in rates.items():
        print(f"  {label:9s} {rate:6.1f} images/s  {rate / rates['fp32 256']:.2f}x fp32 256")
    if args.speed_only:
        print(f"\nload average at end: {os.getloadavg()[0]:.2f}; {time.time() - started:.0f} s")
        return
    sets = image_sets(args.workdir)
    found = describe(graphs, norm, sets)
    ref = found["fp32 256"]
    print("\ncosine of int8 descriptors to their fp32 twins (all sets, "
          f"{sum(len(f) for f, _ in sets.values())} images): median / 5th percentile / min")
    for n in LAYERS:
        cos = np.concatenate([np.sum(found["int8 256"][s][n] * ref[s][n], axis=1) for s in sets])
        print(f"  {n:8s} {np.median(cos):.4f} / {np.percentile(cos, 5):.4f} / {cos.min():.4f}")
    print("\nretrieval from the descriptors (exact cosine ranking): digits p@5, faces p@5, demo re-scans first /25")
    print(f"  {'layer':8s} " + " ".join(f"{label:>24s}" for label in found))
    for n in LAYERS:
        cells = []
        for label in found:
            d, f, m = (found[label][s][n] for s in ("digits", "faces", "demo"))
            cells.append(f"{precision_at_5(d, sets['digits'][1]):.3f} {precision_at_5(f, sets['faces'][1]):.3f} "
                         f"{copies_first(m, sets['demo'][1]):2d}/25")
        print(f"  {n:8s} " + " ".join(f"{c:>24s}" for c in cells))
    print(f"\nload average at end: {os.getloadavg()[0]:.2f}; {time.time() - started:.0f} s")


if __name__ == "__main__":
    main()
