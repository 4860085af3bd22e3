#!/usr/bin/env python3
"""Category search and copy search side by side: each layer, layers combined, query expansion, one round of
like/unlike feedback (docs/retrieval.md).

Outside categorised sets, shipped inside packages (nothing generated, nothing downloaded):
- digits: scikit-learn's bundled copy of the UCI handwritten digits (sklearn.datasets.load_digits; 8x8,
  10 classes); the first PER_CLASS of each class, enlarged to 64x64 (bicubic).
- faces: scikit-image's lfw_subset (skimage.data.lfw_subset; 25x25, from Labeled Faces in the Wild:
  100 faces and 100 non-faces cut from the same photographs' backgrounds), enlarged to 100x100 (bicubic).
Each item is a query by id against the rest of its set; precision@5 and mean average precision (mAP) over
the whole ranking. Feedback: the plain search's top 5 are marked like or unlike from their true labels, the
search is run again with those marks, and the *residual* ranking (the 5 marked items left out) is scored,
beside the plain ranking with the same 5 left out ("next 5").
Copies: the demo archive's 25 re-scans (demo_archive/key.csv), each a query by id: is its source (or a byte
copy of it) the first result? The mean rank of the source is printed too.

    flock /tmp/kinscope-bench.lock .venv/bin/python scripts/bench_retrieval.py --workdir /tmp/kret   # ~5 min
"""
from __future__ import annotations

import argparse
import csv
import os
import sys
import time
from pathlib import Path

import numpy as np
from PIL import Image

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from index.api import Archive  # noqa: E402

DEMO = Path(__file__).resolve().parents[1] / "demo_archive"
PER_CLASS = 50
CONFIGS = [  # (label, layer, expand)
    ("colour", "colour", 0), ("texture", "texture", 0), ("parts", "parts", 0), ("objects", "objects", 0),
    ("combined (parts .5, objects .5)", "combined", 0),
    ("parts .75, objects .25", {"parts": 0.75, "objects": 0.25}, 0),
    ("texture, parts, objects 1/3 each", {"texture": 1, "parts": 1, "objects": 1}, 0),
    ("parts + expand 3", "parts", 3), ("objects + expand 3", "objects", 3), ("combined + expand 3", "combined", 3),
]
FEEDBACK = ["parts", "objects", "combined"]


def make_sets(workdir: Path) -> None:
    """The package images as PNG files, one folder per class."""
    from skimage.data import lfw_subset
    from sklearn.datasets import load_digits

    digits = load_digits()
    for c in range(10):
        folder = workdir / "digits" / f"digit-{c}"
        folder.mkdir(parents=True, exist_ok=True)
        for n, i in enumerate(np.flatnonzero(digits.target == c)[:PER_CLASS]):
            a = (digits.images[i] * (255 / 16)).astype(np.uint8)
            Image.fromarray(a).resize((64, 64), Image.BICUBIC).convert("RGB").save(folder / f"{n:03d}.png")
    faces = (np.clip(lfw_subset(), 0, 1) * 255).round().astype(np.uint8)  # floats 0..1 (its docstring says uint8)
    for n, a in enumerate(faces):
        folder = workdir / "faces" / ("face" if n < 100 else "non-face")
        folder.mkdir(parents=True, exist_ok=True)
        Image.fromarray(a).resize((100, 100), Image.BICUBIC).convert("RGB").save(folder / f"{n:03d}.png")


def opened(db: Path, folder: Path) -> Archive:
    archive = Archive.open(db, create=True)
    if not list(archive.catalog.db.query("select id from images limit 1")):
        archive.add([folder], progress=sys.stderr.isatty(), workers=1)
    return archive


def labelled(archive: Archive) -> dict[int, str]:
    return {r["id"]: Path(r["path"]).parent.name for r in archive.catalog.db.query("select id, path from images")}


def ap(hits: np.ndarray, relevant: int) -> float:
    """Average precision of a ranking's hit flags, over `relevant` relevant items."""
    if relevant == 0:
        return 0.0
    ranks = np.flatnonzero(hits) + 1
    return float(np.sum(np.arange(1, len(ranks) + 1) / ranks) / relevant)


def ranking(archive, query, n, **kw) -> list[int]:
    return [r["id"] for r in archive.search(query, k=n, **kw)["results"]]


def category(archive: Archive, labels: dict[int, str]) -> dict[str, tuple[float, float]]:
    """{config label: (precision@5, mAP)} with every item as a query."""
    n = len(labels) - 1
    sizes = {c: sum(1 for v in labels.values() if v == c) for c in set(labels.values())}
    out = {}
    for name, layer, expand in CONFIGS:
        p5, aps = [], []
        for q, c in labels.items():
            hits = np.array([labels[i] == c for i in ranking(archive, q, n, layer=layer, expand=expand)])
            p5.append(hits[:5].mean())
            aps.append(ap(hits, sizes[c] - 1))
        out[name] = (float(np.mean(p5)), float(np.mean(aps)))
    return out


def feedback(archive: Archive, labels: dict[int, str]) -> dict[str, tuple[float, float, float, float]]:
    """{layer: (next-5 precision plain, with feedback, residual mAP plain, with feedback)}."""
    n = len(labels) - 1
    sizes = {c: sum(1 for v in labels.values() if v == c) for c in set(labels.values())}
    out = {}
    for layer in FEEDBACK:
        rows = []
        for q, c in labels.items():
            plain = ranking(archive, q, n, layer=layer)
            top = plain[:5]
            like = [i for i in top if labels[i] == c]
            unlike = [i for i in top if labels[i] != c]
            again = ranking(archive, q, n, layer=layer, like=like, unlike=unlike)
            left = sizes[c] - 1 - len(like)
            scores = []
            for order in (plain, again):
                hits = np.array([labels[i] == c for i in order if i not in top])
                scores.append((hits[:5].mean(), ap(hits, left)))
            rows.append([scores[0][0], scores[1][0], scores[0][1], scores[1][1]])
        out[layer] = tuple(float(v) for v in np.mean(rows, axis=0))
    return out


def copies(archive: Archive) -> dict[str, tuple[int, float]]:
    """{config label: (re-scans whose source is first, mean rank of the source)}."""
    with open(DEMO / "key.csv", newline="") as fh:
        key = list(csv.DictReader(fh))
    ids = {r["path"]: r["id"] for r in archive.catalog.db.query("select id, path from images")}
    same = {}  # a source and its byte copies
    for r in key:
        if r["kind"] == "copy":
            same.setdefault(str(DEMO / r["source"]), set()).add(ids[str(DEMO / r["path"])])
    scans = [(ids[str(DEMO / r["path"])], str(DEMO / r["source"])) for r in key if r["kind"] == "rescan"]
    out = {}
    for name, layer, expand in CONFIGS:
        first, ranks = 0, []
        for scan, source in scans:
            order = ranking(archive, scan, len(ids) - 1, layer=layer, expand=expand)
            good = {ids[source]} | same.get(source, set())
            rank = next(i for i, r in enumerate(order, 1) if r in good)
            first += rank == 1
            ranks.append(rank)
        out[name] = (first, float(np.mean(ranks)))
    return out, len(scans)


def main() -> None:
    ap_ = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap_.add_argument("--workdir", type=Path, required=True, help="Images and archives go here (kept for reruns).")
    ap_.add_argument("--all-cores", action="store_true", help="Do not pin the run (and torch) to one core.")
    args = ap_.parse_args()
    if not args.all_cores:
        os.sched_setaffinity(0, {min(os.sched_getaffinity(0))})  # torch, FAISS and the decoders: one core
    started = time.time()
    if not (args.workdir / "faces").exists():
        make_sets(args.workdir)
    print(f"load average at start: {os.getloadavg()[0]:.2f}")
    for name in ("digits", "faces"):
        archive = opened(args.workdir / f"db-{name}", args.workdir / name)
        labels = labelled(archive)
        print(f"\n{name}: {len(labels)} items, {len(set(labels.values()))} classes")
        print(f"{'search':36s} {'precision@5':>11s} {'mAP':>7s}")
        for label, (p5, m) in category(archive, labels).items():
            print(f"{label:36s} {p5:11.3f} {m:7.3f}")
        print(f"one round of feedback (top 5 marked from true labels; scored without them):")
        print(f"{'layer':36s} {'next5 plain':>11s} {'next5 fb':>9s} {'mAP plain':>9s} {'mAP fb':>7s}")
        for layer, (a, b, c, d) in feedback(archive, labels).items():
            print(f"{layer:36s} {a:11.3f} {b:9.3f} {c:9.3f} {d:7.3f}")
        archive.close()
    archive = opened(args.workdir / "db-demo", DEMO)
    found, total = copies(archive)
    print(f"\ndemo re-scans ({total}): source first, mean rank of the source")
    for label, (first, rank) in found.items():
        print(f"{label:36s} {first:3d}/{total}  {rank:6.2f}")
    archive.close()
    print(f"\nload average at end: {os.getloadavg()[0]:.2f}; {time.time() - started:.0f} s")


if __name__ == "__main__":
    main()
